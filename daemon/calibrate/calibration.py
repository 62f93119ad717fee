"""Drive a camera and a shutter through an EMVA 1288 photon transfer series.

``measure_photon_transfer`` takes, for every exposure, dark frames with the
shutter closed and bright frames with the shutter open, reduces each step to
its statistics at once (no frame series is held in memory) and fits the
camera with ``photon_transfer.analyse_photon_transfer``. The shutter is closed
in a ``finally`` whatever happens (safety rule: any fault leaves the bench
with the shutter closed).

The light must be steady and spatially uniform over the frame (no sample and no
mask in the beam; a diffuser in front of the camera), as EMVA 1288 requires.

``measure_flat_field`` then takes flat frames in the same light (about half of
saturation, ``flat_exposure_s`` picks the exposure from the photon transfer
result) and dark frames at the same exposure, and returns the per-pixel
response map normalised to mean 1 (the photo-response non-uniformity, PRNU, of
EMVA 1288). The pipeline divides dark-subtracted frames by it.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Callable, Sequence

import numpy as np

from maskrun.drivers.base import Camera, Frame, SafetyBox
from maskrun.drivers.errors import DeviceFault
from maskrun.daemon.calibrate.photon_transfer import (
    PhotonTransferResult,
    StepStatistics,
    analyse_photon_transfer,
    clipped_dark_fraction,
    mean_and_temporal_variance,
    step_statistics,
)

__all__ = ["photons_per_pixel_per_s_from_power", "ProgressCallback", "measure_photon_transfer", "default_exposure_series", "CalibrationAborted",
           "FlatField", "FlatFieldError", "flat_exposure_s", "measure_flat_field"]

#: progress(done_frames, total_frames, what) is called after every frame.
ProgressCallback = Callable[[int, int, str], None]

#: Exposure reported by the camera may differ from the request by this much (relative) before we refuse.
_EXPOSURE_TOLERANCE = 0.05


class CalibrationAborted(RuntimeError):
    """A device failed during the series. ``steps`` holds the statistics measured so far; the shutter is closed."""

    def __init__(self, message: str, steps: Sequence[StepStatistics]):
        self.steps = list(steps)
        super().__init__(message)


def photons_per_pixel_per_s_from_power(power_w: float, beam_area_m2: float, pixel_area_m2: float,
                                       wavelength_m: float) -> float:
    """Photons per pixel per second of a uniform beam from a power-meter reading.

    Irradiance E = power_w / beam_area_m2 [W/m^2]; mu_p / t = E * pixel_area_m2 * lambda / (h c)
    (EMVA 1288 R4.0 Linear, the number of photons per pixel, mu_p = A E t_exp / (h c / lambda); from memory).
    The power must be what falls on ``beam_area_m2`` at the sensor, uniform over the pixels used.
    """
    from maskrun.daemon.safety.dose import photon_energy_j

    for name, v in (("power_w", power_w), ("beam_area_m2", beam_area_m2), ("pixel_area_m2", pixel_area_m2)):
        if not (math.isfinite(float(v)) and float(v) > 0):
            raise ValueError(f"{name} must be a finite number > 0, got {v}")
    return float(power_w) / float(beam_area_m2) * float(pixel_area_m2) / photon_energy_j(wavelength_m)


def _grab(camera: Camera, timeout_s: float) -> Frame:
    camera.trigger()
    return camera.grab(timeout_s)


def _take_frames(camera: Camera, exposure_s: float, count: int, discard: int, timeout_s: float) -> list[np.ndarray]:
    frames: list[np.ndarray] = []
    for _ in range(discard):
        _grab(camera, timeout_s)
    while len(frames) < count:
        frame = _grab(camera, timeout_s)
        used = float(frame.exposure_s)
        if not math.isclose(used, exposure_s, rel_tol=_EXPOSURE_TOLERANCE, abs_tol=1e-7):
            raise DeviceFault(
                f"requested exposure {exposure_s:.6g} s but the frame reports {used:.6g} s",
                device="camera",
                hint="give exposures inside the camera's range and step (see its documentation)",
            )
        frames.append(np.array(frame.pixels, copy=True))
    return frames


def measure_photon_transfer(
    camera: Camera,
    safety_box: SafetyBox,
    exposures_s: Sequence[float],
    *,
    frames_per_step: int = 2,
    progress: ProgressCallback | None = None,
    photons_per_pixel_per_s: float | None = None,
    discard_frames: int = 0,
    timeout_margin_s: float = 5.0,
) -> PhotonTransferResult:
    """Measure and fit a photon transfer series (EMVA 1288 R4.0 Linear).

    camera, safety_box: opened maskrun drivers. The camera's ROI, binning and gain stay as set.
    exposures_s: exposure times [s], from (nearly) dark to beyond saturation; EMVA suggests ~50
        equally spaced steps. Duplicates are allowed; order does not matter.
    frames_per_step: bright frames and dark frames per exposure (>= 2, even numbers use all frames).
    progress: called as progress(done_frames, total_frames, message) after every frame.
    photons_per_pixel_per_s: known irradiance as incident photons per pixel per second; gives the
        quantum efficiency and linearity against photons. None: linearity against exposure time.
    discard_frames: frames thrown away after every change of exposure or shutter (for
        free-running cameras whose next frame may still belong to the old setting).
    timeout_margin_s: grab timeout = 2 x exposure + this margin.

    Order: all dark steps first (shutter closed), then all bright steps (shutter open), so the
    shutter moves only twice. The shutter is closed in a ``finally`` whatever happens.
    Raises CalibrationAborted (device failure; keeps the steps measured so far) or the typed
    PhotonTransferError of the analysis (LightTooWeak, SaturatedFromStart, TooFewSteps),
    which also keeps the measured steps in ``.steps``.
    """
    exposures = [float(t) for t in exposures_s]
    if not exposures:
        raise ValueError("give at least one exposure time (seconds)")
    bad = [t for t in exposures if not (math.isfinite(t) and t > 0)]
    if bad:
        raise ValueError(f"exposure times must be finite and > 0 seconds, got {bad[:3]}")
    if int(frames_per_step) != frames_per_step or frames_per_step < 2:
        raise ValueError(
            f"frames_per_step must be an integer >= 2 (EMVA needs a pair A, B per step), got {frames_per_step}"
        )
    if photons_per_pixel_per_s is not None and not (photons_per_pixel_per_s >= 0):
        raise ValueError(f"photons_per_pixel_per_s must be >= 0, got {photons_per_pixel_per_s}")
    frames_per_step = int(frames_per_step)
    total = 2 * frames_per_step * len(exposures)
    done = 0
    max_dn = int(camera.max_dn)
    dark_stats: list[tuple[float, float, float]] = []
    steps: list[StepStatistics] = []
    saved_exposure = camera.exposure_s

    def tick(message: str) -> None:
        nonlocal done
        done += frames_per_step
        if progress is not None:
            progress(done, total, message)

    try:
        safety_box.close_shutter()
        if safety_box.shutter_is_open():
            raise DeviceFault("the shutter reports open after a close command", device="safety",
                              hint="check the shutter before calibrating; no bright frames were taken")
        # Dark pairs (shutter closed), reduced to (mean, variance) at once.
        for t in exposures:
            camera.exposure_s = t
            frames = _take_frames(camera, t, frames_per_step, discard_frames, 2 * t + timeout_margin_s)
            dark_stats.append((*mean_and_temporal_variance(frames), clipped_dark_fraction(frames, max_dn)))
            tick(f"dark {t:.4g} s")
        safety_box.open_shutter()
        for t, darks in zip(exposures, dark_stats):
            camera.exposure_s = t
            bright = _take_frames(camera, t, frames_per_step, discard_frames, 2 * t + timeout_margin_s)
            if not safety_box.shutter_is_open():
                raise DeviceFault(
                    f"the shutter closed during the bright frames at {t:.4g} s (interlock opened, or the safety "
                    "box's watchdog closed it: a step longer than [safety.settings] watchdog_s?)",
                    device="safety",
                    hint="close the interlock chain and calibrate again; the frames of this step were discarded",
                )
            mu_p = None if photons_per_pixel_per_s is None else photons_per_pixel_per_s * t
            steps.append(step_statistics(t, bright, darks, photons_per_pixel=mu_p, max_dn=max_dn))
            tick(f"bright {t:.4g} s")
    except Exception as exc:
        raise CalibrationAborted(
            f"photon transfer stopped after {len(steps)} of {len(exposures)} bright steps: {exc}", steps
        ) from exc
    finally:
        safety_box.close_shutter()
        try:
            camera.exposure_s = saved_exposure
        except Exception:
            pass
    return analyse_photon_transfer(steps, max_dn=max_dn)


def default_exposure_series(
    camera: Camera,
    safety_box: SafetyBox | None = None,
    *,
    steps: int = 50,
    longest_s: float | None = None,
    overshoot: float = 1.3,
    probe_exposure_s: float | None = None,
    max_probe_tries: int = 8,
    timeout_margin_s: float = 5.0,
) -> list[float]:
    """Equally spaced exposures from longest_s/steps to longest_s (EMVA 1288 recommends equal
    steps in irradiation, about 50 of them, from memory).

    longest_s: the longest exposure [s]; if None it is found with a probe: with the shutter
        open one frame at ``probe_exposure_s`` (default: the camera's current exposure) is
        compared with a dark frame; the exposure at which the mean signal would reach the
        ADC maximum, times ``overshoot``, becomes the longest exposure. A probe that clips
        halves the exposure and retries (up to ``max_probe_tries``). Needs ``safety_box``.
    Raises ValueError with advice if no light is seen or every probe clips.
    """
    if steps < 5:
        raise ValueError(f"steps must be >= 5 for a photon transfer series, got {steps} (EMVA suggests ~50)")
    if longest_s is None:
        if safety_box is None:
            raise ValueError("give longest_s, or a safety_box so the light can be probed with the shutter open")
        longest_s = overshoot * _probe_saturation_exposure(
            camera, safety_box, probe_exposure_s or float(camera.exposure_s), max_probe_tries, timeout_margin_s
        )
    if not (math.isfinite(longest_s) and longest_s > 0):
        raise ValueError(f"longest_s must be a finite time > 0 seconds, got {longest_s}")
    return [float(longest_s * (i + 1) / steps) for i in range(steps)]


def _probe_saturation_exposure(camera, safety_box, exposure_s, tries, margin_s) -> float:
    """Exposure [s] at which the mean signal would reach the ADC maximum (linear extrapolation)."""
    saved = camera.exposure_s
    max_dn = camera.max_dn
    try:
        safety_box.close_shutter()
        for _ in range(tries):
            camera.exposure_s = exposure_s
            dark = float(np.mean(_take_frames(camera, exposure_s, 1, 0, 2 * exposure_s + margin_s)[0]))
            safety_box.open_shutter()
            bright_frame = _take_frames(camera, exposure_s, 1, 0, 2 * exposure_s + margin_s)[0]
            safety_box.close_shutter()
            clipped = np.count_nonzero(bright_frame >= max_dn) / bright_frame.size
            signal = float(np.mean(bright_frame)) - dark
            if clipped > 0.01:
                exposure_s /= 2.0
                continue
            noise_floor = 3.0 * max(float(np.std(bright_frame)) / math.sqrt(bright_frame.size), 0.5)
            if signal <= noise_floor:
                raise ValueError(
                    f"no light seen at {exposure_s:.3g} s (signal {signal:.2f} DN above dark): check that the "
                    "light is on and reaches the camera, or give longest_s"
                )
            return exposure_s * (max_dn - dark) / signal
        raise ValueError(
            f"the probe frame still clips at {exposure_s:.3g} s: lower the light, or give longest_s"
        )
    finally:
        safety_box.close_shutter()
        try:
            camera.exposure_s = saved
        except Exception:
            pass


# ----------------------------------------------------------------------------- flat field
class FlatFieldError(ValueError):
    """The flat frames cannot give a flat field (clipped, no light); the message says what to change."""


@dataclass
class FlatField:
    """Per-pixel response map from flat frames.

    flat: (rows, cols) float32, mean 1: (mean flat frame - mean dark frame) / its mean.
    exposure_s: exposure of the flat and dark frames [s].
    mean_signal_dn: mean dark-subtracted signal of the averaged flat frame [DN].
    prnu_fraction: spatial spread of ``flat`` (std / mean), which includes the temporal noise
        left after averaging (about sqrt(mean_signal_e * frames)^-1).
    frames, dark_frames: frames averaged.
    """

    flat: np.ndarray
    exposure_s: float
    mean_signal_dn: float
    prnu_fraction: float
    frames: int
    dark_frames: int


def flat_exposure_s(result: PhotonTransferResult, fraction_of_saturation: float = 0.5) -> float:
    """Exposure [s] at which the mean signal is ``fraction_of_saturation`` of the saturation signal,
    from a straight line through the photon transfer steps used for the linearity fit."""
    if not 0.0 < fraction_of_saturation < 1.0:
        raise ValueError(f"fraction_of_saturation must be in (0, 1), got {fraction_of_saturation}")
    use = np.asarray(result.in_linearity_fit, dtype=bool)
    if np.count_nonzero(use) < 2:
        use = np.asarray(result.clipped_fraction) == 0
    t = np.asarray(result.exposure_s, dtype=float)[use]
    signal = np.asarray(result.signal_dn, dtype=float)[use]
    if t.size < 2 or np.ptp(t) <= 0:
        raise FlatFieldError("too few unclipped photon transfer steps to choose the flat-frame exposure; "
                             "calibrate with more steps")
    slope, intercept = np.polyfit(t, signal, 1)
    if not slope > 0:
        raise FlatFieldError("the signal does not grow with the exposure: check the light before taking flat frames")
    target = fraction_of_saturation * float(result.saturation_signal_dn)
    return float(max((target - intercept) / slope, float(t.min())))


def measure_flat_field(
    camera: Camera,
    safety_box: SafetyBox,
    exposure_s: float,
    *,
    frames: int = 16,
    dark_frames: int = 16,
    progress: ProgressCallback | None = None,
    discard_frames: int = 0,
    timeout_margin_s: float = 5.0,
    max_clipped_fraction: float = 0.001,
) -> FlatField:
    """Average ``frames`` flat frames (shutter open, uniform light) and ``dark_frames`` dark frames
    (shutter closed) at ``exposure_s`` and return the dark-subtracted mean normalised to mean 1.

    Sums are kept in float64 (no frame list in memory). The shutter is closed in a ``finally``.
    Raises CalibrationAborted (device failure) or FlatFieldError when more than
    ``max_clipped_fraction`` of the flat pixels clip or some pixel sees no light.
    """
    if int(frames) != frames or frames < 1 or int(dark_frames) != dark_frames or dark_frames < 1:
        raise ValueError(f"frames and dark_frames must be integers >= 1, got {frames} and {dark_frames}")
    exposure_s = float(exposure_s)
    if not (math.isfinite(exposure_s) and exposure_s > 0):
        raise ValueError(f"exposure_s must be a finite time > 0 seconds, got {exposure_s}")
    frames, dark_frames = int(frames), int(dark_frames)
    total = frames + dark_frames
    max_dn = int(camera.max_dn)
    saved_exposure = camera.exposure_s
    timeout = 2 * exposure_s + timeout_margin_s
    dark_sum = bright_sum = None
    clipped = 0
    try:
        safety_box.close_shutter()
        if safety_box.shutter_is_open():
            raise DeviceFault("the shutter reports open after a close command", device="safety",
                              hint="check the shutter; no flat frames were taken")
        camera.exposure_s = exposure_s
        for i in range(dark_frames):
            (px,) = _take_frames(camera, exposure_s, 1, discard_frames if i == 0 else 0, timeout)
            dark_sum = px.astype(np.float64) if dark_sum is None else dark_sum + px
            if progress is not None:
                progress(i + 1, total, f"flat-field dark {i + 1}/{dark_frames}")
        safety_box.open_shutter()
        for i in range(frames):
            (px,) = _take_frames(camera, exposure_s, 1, discard_frames if i == 0 else 0, timeout)
            if not safety_box.shutter_is_open():  # per frame: a closed shutter is caught at once, and the box's
                break                            # watchdog hears from us during a long series
            clipped += int(np.count_nonzero(px >= max_dn))
            bright_sum = px.astype(np.float64) if bright_sum is None else bright_sum + px
            if progress is not None:
                progress(dark_frames + i + 1, total, f"flat frame {i + 1}/{frames}")
        if not safety_box.shutter_is_open():
            raise DeviceFault("the shutter closed during the flat frames (interlock opened, or the safety box's "
                              "watchdog closed it: frames longer than [safety.settings] watchdog_s?)", device="safety",
                              hint="close the interlock chain and calibrate again")
    except Exception as exc:
        raise CalibrationAborted(f"flat frames stopped: {exc}", []) from exc
    finally:
        safety_box.close_shutter()
        try:
            camera.exposure_s = saved_exposure
        except Exception:
            pass
    if clipped > max_clipped_fraction * bright_sum.size * frames:
        raise FlatFieldError(
            f"{clipped} clipped pixels in the flat frames at {exposure_s:.4g} s: the flat field needs unclipped "
            "frames; lower the light or the exposure"
        )
    signal = bright_sum / frames - dark_sum / dark_frames
    mean = float(signal.mean())
    if not mean > 0 or float(signal.min()) <= 0:
        raise FlatFieldError(
            f"some pixels see no light in the flat frames (mean signal {mean:.3g} DN, lowest "
            f"{float(signal.min()):.3g} DN at {exposure_s:.4g} s): make the light uniform over the frame "
            "(diffuser in, sample and mask out) or lengthen the exposure"
        )
    flat = (signal / mean).astype(np.float32)
    return FlatField(flat=flat, exposure_s=exposure_s, mean_signal_dn=mean, prnu_fraction=float(flat.std()),
                     frames=frames, dark_frames=dark_frames)
