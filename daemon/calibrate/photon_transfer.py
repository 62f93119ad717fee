"""Photon transfer analysis following EMVA Standard 1288, Release 4.0 Linear (2021).

Pure analysis, no devices: ``step_statistics`` reduces the frames of one exposure
step to the EMVA quantities as soon as they are taken (so a long series never
holds all frames in memory), and ``analyse_photon_transfer`` fits the camera
from the series. ``plot_photon_transfer`` draws the photon transfer and the
linearity plots into one PNG. This module fits the series; the per-step statistics, the
result and the errors are in ``photon_transfer_data``, the figure in ``photon_transfer_plot``
(every name importable from here).

Quantities (EMVA 1288 R4.0 Linear notation, units in brackets):

- mu_y      mean grey value of the bright frames [DN]
- mu_y.dark mean grey value of the dark frames at the same exposure [DN]
- sigma_y^2 temporal variance, var(y_A - y_B) / 2 from a pair of frames [DN^2]
  (averaged over consecutive pairs when more than two frames per step)
- K         overall system gain [DN/e-], slope of the photon transfer
  sigma_y^2 - sigma_y.dark^2 = K (mu_y - mu_y.dark), fitted over the steps
  from the smallest signal up to 70 % of the saturation signal
- saturation the step where sigma_y^2 peaks; saturation capacity
  mu_e.sat = (mu_y.sat - mu_y.dark) / K [e-]
- dark noise sigma_d [e-]: ONE definition everywhere in maskrun, the dark noise of the
  EMVA 1288 linear model, sigma_y.dark^2 = K^2 sigma_d^2 + sigma_q^2 with the quantisation
  noise sigma_q^2 = 1/12 DN^2 (EMVA 1288 R4.0 Linear, sec. 2, mathematical model; from memory),
  so sigma_d = sqrt(sigma_y.dark^2 - 1/12) / K; ``dark_noise_dn`` is the measured
  sigma_y.dark itself (DN, quantisation included). ``read_noise_e`` is the same number
  (kept for older readers of the profile)
- linearity error: straight-line fit of mu_y - mu_y.dark against mu_p (photons
  per pixel, when known) or against the exposure time (constant light), over
  the steps between 5 % and 95 % of the saturation signal; the relative
  deviations delta_i = 100 (signal_i - fit_i) / fit_i [%]; we report their
  minimum, maximum and the EMVA linearity error LE = (max - min) / 2
- quantum efficiency eta = R / K with the responsivity R [DN/photon], the slope
  of mu_y - mu_y.dark against mu_p over the 0-70 % range (only if mu_p known)

The fit ranges (0-70 % for the photon transfer, 5-95 % for linearity) and the
two-frame variance follow EMVA 1288 (from memory of Release 3.1 / 4.0 Linear,
sections 6 and 8).

Range checks (``range_warnings``; any of them marks the result ``within_range = False``
and the profile built from it as not measured):

- quantisation-limited dark noise: sigma_y.dark^2 below 0.24 DN^2 (sigma_y.dark < 0.49 DN):
  EMVA 1288 then gives only an upper limit, sigma_d < 0.49 / K (from memory of Release
  3.1 / 4.0 Linear, dark noise section); ``dark_noise_e`` is that upper limit and
  ``read_noise_e`` is None (unknown, not zero);
- clipped dark frames: more than 0.1 % of the dark pixels at 0 DN or at the ADC maximum
  (EMVA 1288 asks for an offset that keeps the dark signal off zero, from memory; the
  0.1 % is common practice, no source): the dark mean and noise are biased;
- saturation capacity below 20 x the dark noise (dynamic range mu_e.sat / sigma_d < 20,
  26 dB; common practice, no source): the photon transfer range is too short for the
  gain to be fitted reliably;
- fewer than 10 steps in the 0-70 % gain fit (EMVA 1288 asks for about 50 steps over the
  whole range, from memory; 10 in the fit is common practice, no source). The illumination must be spatially uniform (no sample, no
mask; a diffuser in front of the camera) for the numbers to mean what they say.
"""

from __future__ import annotations

import math
from typing import Sequence

import numpy as np

# the data, the errors and the figure live in photon_transfer_data / photon_transfer_plot; importable from here
from maskrun.daemon.calibrate.photon_transfer_data import (
    QUANTISATION_VARIANCE_DN2,
    LightTooWeak,
    PhotonTransferError,
    PhotonTransferResult,
    SaturatedFromStart,
    StepStatistics,
    TooFewSteps,
    clipped_dark_fraction,
    dark_noise_e,
    mean_and_temporal_variance,
    step_statistics,
)
from maskrun.daemon.calibrate.photon_transfer_plot import _BLUE, _GREEN, _GREY, _ORANGE, _VERMILION, plot_photon_transfer

__all__ = [
    "QUANTISATION_VARIANCE_DN2",
    "QUANTISATION_LIMITED_DARK_VARIANCE_DN2",
    "MAX_DARK_CLIPPED_FRACTION",
    "MIN_DYNAMIC_RANGE",
    "MIN_MEASURED_FIT_STEPS",
    "dark_noise_e",
    "GAIN_FIT_FRACTION",
    "LINEARITY_RANGE",
    "PhotonTransferError",
    "LightTooWeak",
    "SaturatedFromStart",
    "TooFewSteps",
    "StepStatistics",
    "PhotonTransferResult",
    "step_statistics",
    "mean_and_temporal_variance",
    "analyse_photon_transfer",
    "plot_photon_transfer",
]

#: Photon transfer fit from the smallest signal up to this fraction of the saturation signal (EMVA: 70 %).
GAIN_FIT_FRACTION = 0.70
#: Linearity fit range as fractions of the saturation signal (EMVA: 5 % to 95 %).
LINEARITY_RANGE = (0.05, 0.95)
#: A series counts as past saturation once some later step's variance drops below this fraction of the peak.
_PAST_PEAK_DROP = 0.8
#: Fewest steps the photon transfer fit accepts.
_MIN_FIT_STEPS = 3
#: sigma_y.dark^2 below this is quantisation-limited (EMVA 1288, from memory): 0.24 DN^2, i.e. 0.49 DN.
QUANTISATION_LIMITED_DARK_VARIANCE_DN2 = 0.24
#: Dark pixels at 0 or the ADC maximum above this fraction: the dark frames clip (common practice, no source).
MAX_DARK_CLIPPED_FRACTION = 0.001
#: Saturation capacity must be at least this many times the dark noise (common practice, no source).
MIN_DYNAMIC_RANGE = 20.0
#: Fewest steps in the gain fit for a measured profile (common practice, no source).
MIN_MEASURED_FIT_STEPS = 10


# ----------------------------------------------------------------------------- analysis
def _line_fit(x: np.ndarray, y: np.ndarray) -> tuple[float, float]:
    """Least-squares straight line y = slope * x + intercept."""
    slope, intercept = np.polyfit(np.asarray(x, float), np.asarray(y, float), 1)
    return float(slope), float(intercept)


def analyse_photon_transfer(
    steps: Sequence[StepStatistics],
    *,
    max_dn: int | None = None,
    gain_fit_fraction: float = GAIN_FIT_FRACTION,
    linearity_range: tuple[float, float] = LINEARITY_RANGE,
) -> PhotonTransferResult:
    """Fit the EMVA 1288 linear camera model to a photon transfer series.

    steps: one StepStatistics per exposure (any order; sorted by exposure, then photons).
    max_dn: ADC maximum, used for the advice when the light is too weak.
    Raises LightTooWeak, SaturatedFromStart or TooFewSteps (all PhotonTransferError, a
    ValueError) with a message that says what to change; the error keeps ``steps``.
    """
    steps = list(steps)
    if len(steps) < _MIN_FIT_STEPS + 2:
        raise TooFewSteps(
            f"a photon transfer series needs at least {_MIN_FIT_STEPS + 2} exposure steps from dark to past "
            f"saturation, got {len(steps)}; EMVA 1288 recommends about 50 equally spaced steps",
            steps,
        )
    steps.sort(key=lambda s: (s.exposure_s, s.photons_per_pixel or 0.0))
    texp = np.array([s.exposure_s for s in steps], float)
    mu_p = np.array([np.nan if s.photons_per_pixel is None else s.photons_per_pixel for s in steps], float)
    mean = np.array([s.mean_dn for s in steps], float)
    mean_d = np.array([s.mean_dark_dn for s in steps], float)
    var = np.array([s.variance_dn2 for s in steps], float)
    var_d = np.array([s.variance_dark_dn2 for s in steps], float)
    clipped = np.array([s.clipped_fraction for s in steps], float)
    signal = mean - mean_d
    signal_var = var - var_d
    n = len(steps)

    # --- saturated from the start: clipped, or a signal that does not grow with the light.
    n_pix = max(int(steps[-1].n_pixels), 1)
    noise_floor_dn = max(0.5, 5.0 * math.sqrt((var[-1] + var_d[-1]) / n_pix))
    light = mu_p if np.all(np.isfinite(mu_p)) else texp
    flat = bool(signal[0] > noise_floor_dn and light[-1] >= 1.2 * light[0]
                and signal[-1] - signal[0] <= 0.05 * signal[0])
    if clipped[0] > 0.5 or flat:
        raise SaturatedFromStart(
            f"the series is saturated from the first step (at {texp[0]:.3g} s the mean is {mean[0]:.1f} DN, "
            f"{100 * clipped[0]:.0f} % of pixels at the ADC maximum, and the signal does not grow with the "
            f"light): lower the light or the shortest exposure, e.g. start at {texp[0] / 20:.3g} s",
            steps,
        )

    # --- saturation: where the temporal variance peaks (EMVA 1288).
    sat = int(np.argmax(var))
    past_peak = bool(sat < n - 1 and np.min(var[sat + 1:]) < _PAST_PEAK_DROP * var[sat])
    if not past_peak:
        raise LightTooWeak(_advice_never_saturates(texp, signal, mean_d, max_dn, noise_floor_dn), steps)
    if sat == 0 or signal[sat] <= 0:
        raise SaturatedFromStart(
            f"the series is saturated from the first step (the variance peaks at the shortest exposure, "
            f"{texp[0]:.3g} s, mean {mean[0]:.1f} DN): lower the light or the shortest exposure, e.g. start "
            f"at {texp[0] / 20:.3g} s",
            steps,
        )
    sat_signal = float(signal[sat])

    # --- photon transfer fit over 0-70 % of saturation (EMVA 1288).
    in_gain = np.zeros(n, bool)
    in_gain[: sat + 1] = signal[: sat + 1] <= gain_fit_fraction * sat_signal
    if in_gain.sum() < _MIN_FIT_STEPS:
        below = int(in_gain.sum())
        if signal[0] > gain_fit_fraction * sat_signal:
            raise SaturatedFromStart(
                f"the first step already gives {100 * signal[0] / sat_signal:.0f} % of the saturation signal "
                f"(only {below} step(s) below {100 * gain_fit_fraction:.0f} %, need {_MIN_FIT_STEPS}): lower "
                f"the light or the shortest exposure (shortest was {texp[0]:.3g} s)",
                steps,
            )
        raise TooFewSteps(
            f"only {below} step(s) lie below {100 * gain_fit_fraction:.0f} % of saturation, need "
            f"{_MIN_FIT_STEPS}: add more exposure steps below {texp[sat] * gain_fit_fraction:.3g} s",
            steps,
        )
    gain, gain_intercept = _line_fit(signal[in_gain], signal_var[in_gain])
    if not gain > 0:
        raise PhotonTransferError(
            f"the photon transfer slope is not positive (K = {gain:.3g} DN/e-): the variance does not grow "
            "with the signal; check that the light is steady and that the frames are not processed "
            "(denoising, averaging) by the camera",
            steps,
        )

    # --- dark: offset, dark noise, dark current (intercepts / slopes vs exposure).
    if np.ptp(texp) > 0:
        dark_current_dn_per_s, offset = _line_fit(texp, mean_d)
        _, var_d0 = _line_fit(texp, var_d)
        var_d0 = var_d0 if var_d0 > 0 else float(var_d[0])
        dark_current = dark_current_dn_per_s / gain
    else:
        offset, var_d0, dark_current = float(mean_d[0]), float(var_d[0]), float("nan")
    dark_noise_dn = math.sqrt(var_d0)
    range_warnings: list[str] = []
    upper_limit = var_d0 < QUANTISATION_LIMITED_DARK_VARIANCE_DN2
    if upper_limit:
        sigma_d = math.sqrt(QUANTISATION_LIMITED_DARK_VARIANCE_DN2) / gain
        read_noise = None
        range_warnings.append(
            f"the dark noise ({dark_noise_dn:.2f} DN) is below the rounding step: quantisation-limited "
            f"(sigma_y.dark^2 < {QUANTISATION_LIMITED_DARK_VARIANCE_DN2} DN^2, EMVA 1288), so only an upper limit "
            f"sigma_d < {sigma_d:.3g} e- is known; calibrate at a higher camera gain to measure it")
    else:
        sigma_d = dark_noise_e(var_d0, gain)
        read_noise = sigma_d
    dark_clipped = np.array([s.dark_clipped_fraction for s in steps], float)
    if float(dark_clipped.max()) > MAX_DARK_CLIPPED_FRACTION:
        range_warnings.append(
            f"the dark frames clip: {100 * float(dark_clipped.max()):.2g} % of dark pixels at 0 DN or the ADC maximum "
            f"(more than {100 * MAX_DARK_CLIPPED_FRACTION:g} %), so the offset and dark noise are biased; raise the "
            "camera's black level (offset) so that the dark signal stays off zero")
    capacity = sat_signal / gain
    if capacity < MIN_DYNAMIC_RANGE * sigma_d:
        range_warnings.append(
            f"the saturation capacity ({capacity:.3g} e-) is less than {MIN_DYNAMIC_RANGE:g} x the dark noise "
            f"({sigma_d:.3g} e-): the photon transfer range is too short to fit the gain reliably; lower the camera "
            "gain or use a mode with more bits")
    if int(in_gain.sum()) < MIN_MEASURED_FIT_STEPS:
        range_warnings.append(
            f"only {int(in_gain.sum())} steps lie in the 0-{100 * gain_fit_fraction:.0f} % gain fit (fewer than "
            f"{MIN_MEASURED_FIT_STEPS}; EMVA 1288 asks for about 50 steps over the range): calibrate with more steps")

    # --- linearity over 5-95 % of saturation.
    have_mu_p = bool(np.all(np.isfinite(mu_p)))
    x_lin = mu_p if have_mu_p else texp
    lo, hi = linearity_range
    in_lin = np.zeros(n, bool)
    in_lin[: sat + 1] = (signal[: sat + 1] >= lo * sat_signal) & (signal[: sat + 1] <= hi * sat_signal)
    if in_lin.sum() < _MIN_FIT_STEPS:
        raise TooFewSteps(
            f"only {int(in_lin.sum())} step(s) lie between {100 * lo:.0f} % and {100 * hi:.0f} % of "
            f"saturation, need {_MIN_FIT_STEPS}: use more, evenly spaced exposure steps",
            steps,
        )
    lin_slope, lin_intercept = _line_fit(x_lin[in_lin], signal[in_lin])
    deviation = np.full(n, np.nan)
    fit_values = lin_slope * x_lin[in_lin] + lin_intercept
    deviation[in_lin] = 100.0 * (signal[in_lin] - fit_values) / fit_values
    dev_min, dev_max = float(np.nanmin(deviation)), float(np.nanmax(deviation))

    # --- responsivity and quantum efficiency if mu_p is known.
    responsivity = qe = sat_photons = None
    if have_mu_p:
        responsivity, _ = _line_fit(mu_p[in_gain], signal[in_gain])
        qe = responsivity / gain
        sat_photons = float(mu_p[sat])

    return PhotonTransferResult(
        gain_dn_per_e=gain,
        gain_fit_intercept_dn2=gain_intercept,
        gain_fit_steps=int(in_gain.sum()),
        offset_dn=float(offset),
        dark_noise_dn=dark_noise_dn,
        dark_noise_e=sigma_d,
        read_noise_e=read_noise,
        dark_current_e_per_s=float(dark_current),
        saturation_index=sat,
        saturation_mean_dn=float(mean[sat]),
        saturation_signal_dn=sat_signal,
        saturation_capacity_e=capacity,
        saturation_photons_per_pixel=sat_photons,
        responsivity_dn_per_photon=responsivity,
        quantum_efficiency=qe,
        linearity_error_pct=(dev_max - dev_min) / 2.0,
        linearity_error_min_pct=dev_min,
        linearity_error_max_pct=dev_max,
        linearity_axis="photons_per_pixel" if have_mu_p else "exposure_s",
        linearity_slope=lin_slope,
        linearity_intercept_dn=lin_intercept,
        n_pixels=int(steps[0].n_pixels),
        max_dn=max_dn,
        exposure_s=texp,
        photons_per_pixel=mu_p,
        mean_dn=mean,
        mean_dark_dn=mean_d,
        variance_dn2=var,
        variance_dark_dn2=var_d,
        clipped_fraction=clipped,
        in_gain_fit=in_gain,
        in_linearity_fit=in_lin,
        linearity_deviation_pct=deviation,
        steps=steps,
        dark_noise_upper_limit=upper_limit,
        range_warnings=range_warnings,
    )


def _advice_never_saturates(texp, signal, mean_d, max_dn, noise_floor_dn) -> str:
    """Message for a series whose variance never peaks: how long the exposure must get."""
    longest = float(texp[-1])
    if not signal[-1] > noise_floor_dn:
        return (
            f"light too weak: no signal above the dark level even at the longest exposure ({longest:.3g} s, "
            f"{signal[-1]:.2f} DN above dark); "
            "check that the shutter opens and the light source is on, then raise the light or the exposure range"
        )
    rate_dn_per_s = float(signal[-1] / longest) if longest > 0 else float("nan")
    if max_dn is not None and rate_dn_per_s > 0:
        # The ADC range bounds the saturation signal from above; 1.5x to get past the peak.
        needed = 1.5 * (max_dn - float(mean_d[-1])) / rate_dn_per_s
        return (
            f"light too weak: the series never saturates (the temporal variance does not peak and fall); "
            f"the signal reached {signal[-1]:.0f} DN of at most {max_dn - mean_d[-1]:.0f} DN at {longest:.3g} s; "
            f"raise the exposure range to at least {needed:.3g} s, or raise the light"
        )
    return (
        f"light too weak: the series never saturates (the temporal variance does not peak and fall) up to "
        f"{longest:.3g} s (signal {signal[-1]:.0f} DN); raise the exposure range to at least {4 * longest:.3g} s, "
        "or raise the light"
    )


