"""Photon budget planner: how many photons, how long an exposure and how many passes a
reconstruction of a given precision needs, and whether saturation or the dose limit
gets in the way first.

Precision models (``method``):

* ``"crb"`` - the Poisson Cramér-Rao bound (Kay, Fundamentals of Statistical Signal
  Processing: Estimation Theory, 1993, ch. 3) for the configured mask family and a
  representative object (default: uniform amplitude, random phase), at every grid size:
  the dense Fisher information (``bounds.poisson_crb``) up to ``bounds.CRB_MAX_PIXELS``
  (32 x 32), the matrix-free estimate above (``bounds.poisson_crb_matrix_free``: trace of
  the inverse Fisher information by random probes and conjugate gradients, 0.5 % standard
  error). The two agree where both fit, so the photons asked for do not step at the switch.
  The bound scales exactly as 1/photons, so one evaluation gives the photons for any target.
* ``"shot_noise"`` - the shot-noise rule: relative error ~ sqrt(pixels / photons), about
  one photon of mean-square error per reconstructed pixel (common practice, no source),
  ``bounds.shot_noise_relative_error``. It asks for fewer photons than the bound (1.33
  photons per pixel for K = 8 octanary masks, 1.9 for K = 4), so it is only on request.
* ``"auto"`` (default) - the bound.

``photons`` are *detected* photons (photo-electrons) summed over every frame that goes
into one estimate: all K masks of all averaged passes.

Phase precision and relative error: for a field of roughly uniform amplitude the phase
standard deviation in radians is about the relative error of the field (common practice,
no source). It is conservative: an error spread evenly between amplitude and phase puts
only half of the error power into phase (phase std ~ relative error / sqrt(2)).

Saturation: a frame's brightest pixel must stay below ``saturation_fraction`` (default
0.85) of the camera's saturation capacity (keep the peak below about 80-90 % of full scale:
common practice, no source). The brightest-to-mean ratio comes from the representative
object's diffraction patterns when one is used, else from fully developed speckle: the
expected maximum of n independent exponential intensities is the harmonic number
H_n ~ ln n + 0.5772 (order statistics of the exponential distribution; David & Nagaraja,
Order Statistics, 3rd ed., 2003, from memory). Frame sets that would saturate are split
into several passes of lower exposure that are averaged.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from maskrun.daemon.calibrate.budget_plan import PhotonPlan, PlanInfeasible
# the precision models live in budget_precision, the plan's type in budget_plan; importable from here
from maskrun.daemon.calibrate.budget_precision import (
    _CRB_MAX_PIXELS,
    _DENSE_MAX_PIXELS,
    _ESTIMATORS,
    _EULER_GAMMA,
    PlanError,
    _bounds,
    _count,
    _crb_default,
    _crb_unit,
    _default_masks,
    _grid,
    _opt_positive,
    _peak_to_mean,
    _Precision,
    _precision_model,
    _shot_noise_relative_error,
    predict_relative_error,
    representative_object,
    speckle_peak_to_mean,
)
from maskrun.daemon.safety.dose import photon_energy_j, photon_rate_per_s as _power_to_rate

__all__ = [
    "PlanError",
    "PlanInfeasible",
    "PhotonPlan",
    "plan_photons",
    "predict_relative_error",
    "speckle_peak_to_mean",
    "dark_frame_advice",
    "DEFAULT_SATURATION_FRACTION",
]

DEFAULT_SATURATION_FRACTION = 0.85


def plan_photons(
    grid_shape: tuple[int, int],
    mask_count: int,
    target_phase_precision_rad: float | None = None,
    target_relative_error: float | None = None,
    *,
    method: str = "auto",
    object_estimate: np.ndarray | None = None,
    masks: np.ndarray | None = None,
    seed: int = 0,
    mask_family: str = "octanary",
    mask_seed: int | None = None,
    mask_levels: int = 8,
    estimator: str = "auto",
    profile: Any = None,
    quantum_efficiency: float | None = None,
    saturation_capacity_e: float | None = None,
    bit_depth: int | None = None,
    offset_dn: float = 0.0,
    gain_dn_per_e: float | None = None,
    read_noise_e: float | None = None,
    saturation_fraction: float = DEFAULT_SATURATION_FRACTION,
    camera_pixels: int | None = None,
    peak_to_mean_ratio: float | None = None,
    photon_rate_per_s: float | None = None,
    laser_power_w: float | None = None,
    max_exposure_s: float | None = None,
    wavelength_m: float | None = None,
    illuminated_area_m2: float | None = None,
    optical_transmission: float = 1.0,
    max_energy_per_area_j_per_m2: float | None = None,
    max_photons: float | None = None,
) -> PhotonPlan:
    """Plan the photons for a target precision (give exactly one target).

    grid_shape, mask_count: reconstruction grid (rows, cols) and masks per frame set K.
    target_phase_precision_rad: phase standard deviation wanted [rad] (~ relative error).
    target_relative_error: relative error of the field wanted, min_phi ||x - e^{i phi} x^|| / ||x||.
    method: 'auto' | 'crb' | 'shot_noise' (see the module docstring).
    object_estimate, masks, seed: representative object and masks for the bound (defaults:
        uniform amplitude random phase of ``seed``; masks of ``mask_family`` built with ``mask_seed``
        (default ``seed``) and ``mask_levels``, as the [masks] table builds them).
    estimator: 'auto' (dense Fisher information up to CRB_MAX_PIXELS, matrix-free above),
        'dense' or 'matrix_free'.
    profile: a CameraProfile (quantum efficiency, saturation capacity, read noise); the
        keywords ``quantum_efficiency``, ``saturation_capacity_e``, ``read_noise_e`` override it.
    bit_depth, offset_dn, gain_dn_per_e: without a saturation capacity (no profile), the ADC range
        gives one: (2^bit_depth - 1 - offset_dn) / gain_dn_per_e electrons (the full well may be
        lower; the plan says so).
    saturation_fraction: the brightest pixel must stay below this fraction of saturation.
    camera_pixels: pixels the pattern covers on the camera (default: the grid's pixels).
    peak_to_mean_ratio: brightest/mean pixel of a frame (default: from the object, or speckle).
    photon_rate_per_s: incident photons per second reaching the camera, whole frame; or
    laser_power_w: power on the sample [W] (needs wavelength_m; times optical_transmission).
    max_exposure_s: longest exposure the camera allows; longer frames are split into passes.
    wavelength_m, illuminated_area_m2: for the energy per area on the sample.
    optical_transmission: fraction of the sample's photons that reach the camera (0, 1].
    max_energy_per_area_j_per_m2, max_photons: dose limits on the sample (photons on the sample).
    """
    grid_shape = _grid(grid_shape)
    mask_count = _count(mask_count)
    if (target_phase_precision_rad is None) == (target_relative_error is None):
        raise PlanError(
            "give exactly one target: a phase precision in radians (e.g. 0.05) or a relative error "
            "(e.g. 0.05 for 5 %)"
        )
    if target_phase_precision_rad is not None:
        target = _opt_positive("target_phase_precision_rad", target_phase_precision_rad)
        if target >= 1.0:
            raise PlanError(
                f"a phase precision of {target} rad is no better than a random guess for the relation "
                "phase std ~ relative error; ask for less than 1 rad (e.g. 0.05)"
            )
    else:
        target = _opt_positive("target_relative_error", target_relative_error)
        if target >= 1.0:
            raise PlanError(f"target_relative_error must be < 1 (a fraction, 0.05 = 5 %), got {target}")
    if not 0 < saturation_fraction <= 1:
        raise PlanError(f"saturation_fraction must be in (0, 1], got {saturation_fraction}")
    if not 0 < optical_transmission <= 1:
        raise PlanError(f"optical_transmission must be in (0, 1], got {optical_transmission}")
    if photon_rate_per_s is not None and laser_power_w is not None:
        raise PlanError("give photon_rate_per_s (at the camera) or laser_power_w (on the sample), not both")
    for name, value in (("max_exposure_s", max_exposure_s), ("wavelength_m", wavelength_m),
                        ("illuminated_area_m2", illuminated_area_m2), ("photon_rate_per_s", photon_rate_per_s),
                        ("laser_power_w", laser_power_w), ("peak_to_mean_ratio", peak_to_mean_ratio),
                        ("max_energy_per_area_j_per_m2", max_energy_per_area_j_per_m2),
                        ("max_photons", max_photons)):
        _opt_positive(name, value)
    warnings: list[str] = []

    # --- camera constants
    if profile is not None:
        quantum_efficiency = quantum_efficiency if quantum_efficiency is not None else profile.quantum_efficiency
        saturation_capacity_e = saturation_capacity_e or profile.saturation_capacity_e
        if read_noise_e is None:
            read_noise_e = profile.read_noise_e if profile.read_noise_e is not None else profile.dark_noise_e
    if quantum_efficiency is None:
        quantum_efficiency = 1.0
        warnings.append("quantum efficiency unknown: assumed 1, so incident photons and dose are lower bounds; "
                        "calibrate with known photons or give quantum_efficiency from the data sheet")
    qe = float(quantum_efficiency)
    if not 0 < qe <= 1:
        raise PlanError(f"quantum_efficiency must be in (0, 1], got {qe}")
    _opt_positive("saturation_capacity_e", saturation_capacity_e)
    saturation_note = "measured (camera profile)" if profile is not None else "given"
    if saturation_capacity_e is None and bit_depth is not None and gain_dn_per_e is not None:
        max_dn = (1 << int(bit_depth)) - 1
        gain = _opt_positive("gain_dn_per_e", gain_dn_per_e)
        if not 0 <= float(offset_dn) < max_dn:
            raise PlanError(f"offset_dn must lie in [0, {max_dn}) for a {int(bit_depth)}-bit camera, got {offset_dn}")
        saturation_capacity_e = (max_dn - float(offset_dn)) / gain
        saturation_note = (f"from the ADC range, no camera profile: (2^{int(bit_depth)} - 1 - {float(offset_dn):g} DN) / "
                           f"{gain:g} DN/e- = {saturation_capacity_e:.5g} e-")
        warnings.append(f"saturation capacity taken {saturation_note}; the sensor's full well may be lower: "
                        "run 'maskrun calibrate' for the measured value")
    elif saturation_capacity_e is None:
        saturation_note = "unknown"

    # --- precision -> photons
    model = _precision_model(grid_shape, mask_count, method, object_estimate, masks, seed, mask_family, mask_seed,
                             mask_levels, estimator)
    photons_total = model.photons_for_unit_error / target**2
    pixels_cam = int(camera_pixels) if camera_pixels is not None else grid_shape[0] * grid_shape[1]
    if pixels_cam < 1:
        raise PlanError(f"camera_pixels must be >= 1, got {camera_pixels}")
    peak_ratio = float(peak_to_mean_ratio) if peak_to_mean_ratio is not None else model.peak_to_mean

    # --- passes: saturation ceiling and longest exposure
    passes = 1
    ceiling = None
    if saturation_capacity_e is not None:
        ceiling = saturation_fraction * float(saturation_capacity_e) * pixels_cam / peak_ratio
        passes = max(passes, math.ceil(photons_total / (mask_count * ceiling) - 1e-12))
        if passes > 1:
            warnings.append(
                f"saturation comes first: one frame set would put {photons_total / mask_count / pixels_cam * peak_ratio:.3g} "
                f"e- in the brightest pixel, above {100 * saturation_fraction:.0f} % of the saturation capacity "
                f"({saturation_capacity_e:.4g} e-); the plan averages {passes} passes of shorter exposure"
            )
    else:
        warnings.append("no saturation capacity known (no camera profile, no bit depth and gain): passes not "
                        "limited by saturation, so the exposure may saturate; give a camera profile or the bit depth")

    rate_at_camera = None
    if laser_power_w is not None:
        if wavelength_m is None:
            raise PlanError("laser_power_w needs wavelength_m to convert watts to photons per second")
        rate_at_camera = _power_to_rate(laser_power_w, wavelength_m) * optical_transmission
    elif photon_rate_per_s is not None:
        rate_at_camera = float(photon_rate_per_s)
    exposure = None
    if rate_at_camera is not None and max_exposure_s is not None:
        exposure_one_pass = photons_total / mask_count / (rate_at_camera * qe)
        need = math.ceil(exposure_one_pass / max_exposure_s - 1e-12)
        if need > passes:
            warnings.append(
                f"the light is weak: one frame set would need {exposure_one_pass:.3g} s per frame, longer than "
                f"the camera's {max_exposure_s:.3g} s; the plan averages {need} passes"
            )
            passes = need
    photons_per_frame = photons_total / (mask_count * passes)
    mean_per_pixel = photons_per_frame / pixels_cam
    if rate_at_camera is not None:
        exposure = photons_per_frame / (rate_at_camera * qe)
    if read_noise_e is not None and mean_per_pixel < float(read_noise_e) ** 2:
        warnings.append(
            f"read noise dominates: {mean_per_pixel:.3g} detected photons per pixel per frame is below the read "
            f"noise variance ({float(read_noise_e) ** 2:.3g} e-^2); the estimate is optimistic, use fewer, "
            "longer frames or a camera with lower read noise"
        )

    # --- dose on the sample
    incident = photons_total / qe
    on_sample = incident / optical_transmission
    energy = None
    if wavelength_m is not None and illuminated_area_m2 is not None:
        energy = on_sample * photon_energy_j(wavelength_m) / illuminated_area_m2
    elif max_energy_per_area_j_per_m2 is not None:
        raise PlanError("a limit in J/m^2 needs wavelength_m and illuminated_area_m2 to be checked")
    feasible, reason, achievable = True, None, None
    allowed_on_sample = math.inf
    if max_photons is not None:
        allowed_on_sample = min(allowed_on_sample, float(max_photons))
    if max_energy_per_area_j_per_m2 is not None:
        allowed_on_sample = min(allowed_on_sample,
                                max_energy_per_area_j_per_m2 * illuminated_area_m2 / photon_energy_j(wavelength_m))
    if math.isfinite(allowed_on_sample):
        allowed_detected = allowed_on_sample * optical_transmission * qe
        achievable = math.sqrt(model.photons_for_unit_error / allowed_detected)
        if on_sample > allowed_on_sample:
            feasible = False
            parts = [f"{on_sample:.3g} photons on the sample"]
            if energy is not None:
                parts.append(f"{energy:.3g} J/m^2")
            limits = []
            if max_photons is not None:
                limits.append(f"{max_photons:.3g} photons")
            if max_energy_per_area_j_per_m2 is not None:
                limits.append(f"{max_energy_per_area_j_per_m2:.3g} J/m^2")
            reason = (
                f"the dose limit is hit first: a relative error of {target:.3g} needs {' = '.join(parts)}, "
                f"above the limit of {' and '.join(limits)}; under the limit the best is a relative error of "
                f"{achievable:.3g} (phase ~ {achievable:.3g} rad). Relax the precision, raise the limit if the "
                "sample tolerates it, collect more of the light (transmission, quantum efficiency) or use a "
                "smaller grid"
            )
            warnings.append(reason)

    return PhotonPlan(
        method=model.method,
        method_note=model.note,
        grid_shape=grid_shape,
        mask_count=mask_count,
        target_relative_error=target,
        target_phase_precision_rad=target,
        photons_total=photons_total,
        passes=passes,
        photons_per_frame=photons_per_frame,
        photons_per_pixel_mean=mean_per_pixel,
        photons_per_pixel_peak=mean_per_pixel * peak_ratio,
        peak_to_mean_ratio=peak_ratio,
        frame_ceiling_photons=ceiling,
        quantum_efficiency=qe,
        incident_photons_at_camera=incident,
        photons_on_sample=on_sample,
        energy_per_area_j_per_m2=energy,
        exposure_per_frame_s=exposure,
        total_exposure_s=None if exposure is None else exposure * mask_count * passes,
        feasible=feasible,
        infeasible_reason=reason,
        achievable_relative_error=achievable,
        warnings=warnings,
        saturation_capacity_e=None if saturation_capacity_e is None else float(saturation_capacity_e),
        saturation_note=saturation_note,
    )


def dark_frame_advice(dark_frames: int, passes: int, *, accumulating: bool) -> str:
    """A warning when too few dark frames would limit an accumulated estimate ("" when fine).

    The mean dark frame is subtracted from every frame set alike, so its noise (read noise /
    sqrt(dark_frames) per pixel) is a fixed pattern that averaging P frame sets does not reduce,
    while the read noise of the averaged bright frames falls as 1/sqrt(P). With fewer dark frames
    than sets the dark pattern dominates the read-noise part of the error; in the amplitude domain
    it weighs most in the dim pixels of the diffraction patterns. Measured on the simulated bench
    (3 e- read noise, 60 sets, no pixel-response spread): 0.28 % error with 4 dark frames,
    0.21 % with 60 (photon-count prediction 0.16 %). No warning without dark frames (the
    configured offset is subtracted, a constant) or for a few sets.
    """
    if not accumulating or dark_frames <= 0 or passes < 8 or dark_frames >= passes:
        return ""
    return (f"{dark_frames} dark frame(s) for {passes} frame sets: the mean dark frame's noise is subtracted "
            "from every set alike and does not average away as the sets accumulate; take about "
            f"{passes} dark frames ([run] dark_frames or --dark-frames; they cost exposures with the shutter "
            "closed, nothing else) for the full precision of the accumulated estimate")

