"""Photon transfer data (EMVA 1288): the statistics of one exposure step, reduced from its frames as
they are taken, the fitted result of a series, and the errors of the analysis. The EMVA notation and
the sources are in ``photon_transfer``, which fits the series and re-exports every name here."""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Sequence

import numpy as np

#: Variance of uniform rounding to whole DN, 1/12 DN^2 (EMVA 1288 R4.0 Linear, sec. 2).
QUANTISATION_VARIANCE_DN2 = 1.0 / 12.0


# ----------------------------------------------------------------------------- errors
class PhotonTransferError(ValueError):
    """The series cannot be analysed. ``steps`` keeps the measured statistics (nothing is lost)."""

    def __init__(self, message: str, steps: Sequence["StepStatistics"] = ()):
        self.steps = list(steps)
        super().__init__(message)

class LightTooWeak(PhotonTransferError):
    """The series never saturates: the variance does not peak and fall within the exposure range."""

class SaturatedFromStart(PhotonTransferError):
    """The series is saturated (or nearly) from the first step."""

class TooFewSteps(PhotonTransferError):
    """Not enough steps in a fit range (too few exposures or an unfortunate spacing)."""

# ----------------------------------------------------------------------------- per step
@dataclass(frozen=True)
class StepStatistics:
    """EMVA statistics of one exposure step (all means over all pixels).

    exposure_s: exposure used [s] (as reported by the camera).
    photons_per_pixel: mean incident photons per pixel mu_p, or None if unknown.
    mean_dn / mean_dark_dn: mu_y and mu_y.dark [DN].
    variance_dn2 / variance_dark_dn2: temporal variances sigma_y^2 and sigma_y.dark^2 [DN^2].
    clipped_fraction: fraction of bright pixels at the ADC maximum (``max_dn``), or 0 if unknown.
    n_pixels: pixels per frame.
    dark_clipped_fraction: fraction of dark pixels at 0 DN or at ``max_dn`` (0 if unknown).
    """

    exposure_s: float
    mean_dn: float
    variance_dn2: float
    mean_dark_dn: float
    variance_dark_dn2: float
    photons_per_pixel: float | None = None
    clipped_fraction: float = 0.0
    n_pixels: int = 0
    dark_clipped_fraction: float = 0.0

def dark_noise_e(dark_variance_dn2: float, gain_dn_per_e: float) -> float:
    """The dark noise sigma_d [e-] from sigma_y.dark^2 [DN^2]: sqrt(sigma_y.dark^2 - 1/12) / K, the one
    definition maskrun uses (EMVA 1288 R4.0 Linear, sec. 2: sigma_y.dark^2 = K^2 sigma_d^2 + sigma_q^2)."""
    return math.sqrt(max(float(dark_variance_dn2) - QUANTISATION_VARIANCE_DN2, 0.0)) / float(gain_dn_per_e)

def clipped_dark_fraction(frames: Sequence[np.ndarray], max_dn: int | None) -> float:
    """Fraction of pixels at 0 DN or at the ADC maximum in dark frames."""
    total = 0
    for f in frames:
        n = np.count_nonzero(f <= 0)
        if max_dn is not None:
            n += np.count_nonzero(f >= max_dn)
        total += int(n)
    return total / max(sum(f.size for f in frames), 1)

def mean_and_temporal_variance(frames: Sequence[np.ndarray]) -> tuple[float, float]:
    """Mean grey value [DN] and temporal variance [DN^2] of >= 2 frames taken under the same conditions.

    sigma^2 = var(y_A - y_B) / 2 (EMVA 1288 R4.0 Linear, sec. 6), averaged over disjoint pairs.
    """
    if len(frames) < 2:
        raise ValueError(
            f"need at least 2 frames per step for the temporal variance (EMVA pair A, B), got {len(frames)}"
        )
    shape = frames[0].shape
    for f in frames:
        if f.shape != shape:
            raise ValueError(f"frames of one step differ in shape: {shape} vs {f.shape}")
    means = [float(np.mean(f, dtype=np.float64)) for f in frames]
    variances = []
    for a, b in zip(frames[:-1:2], frames[1::2]):  # disjoint pairs (A, B), (C, D), ...
        diff = a.astype(np.float64) - b.astype(np.float64)
        variances.append(float(np.var(diff)) / 2.0)
    return float(np.mean(means)), float(np.mean(variances))

def step_statistics(
    exposure_s: float,
    bright_frames: Sequence[np.ndarray],
    dark_frames: Sequence[np.ndarray] | tuple[float, float],
    *,
    photons_per_pixel: float | None = None,
    max_dn: int | None = None,
) -> StepStatistics:
    """Reduce the frames of one exposure step (>= 2 bright, >= 2 dark) to EMVA statistics.

    dark_frames may also be an already reduced (mean_dn, variance_dn2) or (mean_dn, variance_dn2,
    clipped_fraction) tuple of floats.

    sigma_y^2 = var(y_A - y_B) / 2 (EMVA 1288 R4.0 Linear, sec. 6); with more than two
    frames the variance is averaged over disjoint pairs.
    """
    mean, var = mean_and_temporal_variance(list(bright_frames))
    dark_clipped = 0.0
    if isinstance(dark_frames, tuple) and len(dark_frames) in (2, 3) and np.ndim(dark_frames[0]) == 0:
        mean_d, var_d = float(dark_frames[0]), float(dark_frames[1])  # already reduced (mean, variance[, clipped])
        dark_clipped = float(dark_frames[2]) if len(dark_frames) == 3 else 0.0
    else:
        mean_d, var_d = mean_and_temporal_variance(list(dark_frames))
        dark_clipped = clipped_dark_fraction(list(dark_frames), max_dn)
        if bright_frames[0].shape != dark_frames[0].shape:
            raise ValueError(
                f"bright frames {bright_frames[0].shape} and dark frames {dark_frames[0].shape} differ in shape"
            )
    clipped = 0.0
    if max_dn is not None:
        clipped = float(np.mean([np.count_nonzero(f >= max_dn) / f.size for f in bright_frames]))
    return StepStatistics(
        exposure_s=float(exposure_s),
        mean_dn=mean,
        variance_dn2=var,
        mean_dark_dn=mean_d,
        variance_dark_dn2=var_d,
        photons_per_pixel=None if photons_per_pixel is None else float(photons_per_pixel),
        clipped_fraction=clipped,
        n_pixels=int(bright_frames[0].size),
        dark_clipped_fraction=dark_clipped,
    )

# ----------------------------------------------------------------------------- result
@dataclass
class PhotonTransferResult:
    """Everything the photon transfer measurement found, plus the arrays for plotting.

    Scalars (units in the names):
        gain_dn_per_e: overall system gain K.
        gain_fit_intercept_dn2: intercept of the photon transfer fit (ideally ~0).
        gain_fit_steps: number of steps in the 0-70 % fit.
        offset_dn: mu_y.dark at zero exposure (intercept of mu_y.dark vs exposure).
        dark_noise_dn: sigma_y.dark at zero exposure (intercept of sigma_y.dark^2 vs exposure), DN,
            quantisation included.
        dark_noise_e: sigma_d = sqrt(sigma_y.dark^2 - 1/12) / K (``dark_noise_e()``); when the dark
            noise is quantisation-limited, the EMVA upper limit 0.49 / K.
        read_noise_e: the same as dark_noise_e, or None when quantisation-limited (unknown, not 0).
        dark_noise_upper_limit: True when dark_noise_e is only an upper limit.
        range_warnings: why the camera is outside what photon transfer can measure (empty if fine).
        within_range: no range warning (a profile from this result counts as measured).
        dark_current_e_per_s: slope of mu_y.dark vs exposure divided by K (nan with one exposure).
        saturation_index: step where sigma_y^2 peaks.
        saturation_mean_dn: mu_y at that step; saturation_signal_dn = mu_y.sat - mu_y.dark.
        saturation_capacity_e: (mu_y.sat - mu_y.dark) / K.
        saturation_photons_per_pixel: mu_p.sat (None if mu_p unknown).
        responsivity_dn_per_photon, quantum_efficiency: R and eta = R / K (None if mu_p unknown).
        linearity_error_pct: EMVA LE = (max delta - min delta) / 2.
        linearity_error_min_pct, linearity_error_max_pct: extreme deviations from the fit.
        linearity_axis: 'photons_per_pixel' or 'exposure_s' (x of the linearity fit).
        max_dn: ADC maximum if known.
    Arrays (one entry per step, in exposure order): exposure_s, photons_per_pixel (nan if unknown),
        mean_dn, mean_dark_dn, variance_dn2, variance_dark_dn2, clipped_fraction,
        in_gain_fit, in_linearity_fit (bool), linearity_deviation_pct (nan outside the range).
    """

    gain_dn_per_e: float
    gain_fit_intercept_dn2: float
    gain_fit_steps: int
    offset_dn: float
    dark_noise_dn: float
    dark_noise_e: float
    read_noise_e: float | None
    dark_current_e_per_s: float
    saturation_index: int
    saturation_mean_dn: float
    saturation_signal_dn: float
    saturation_capacity_e: float
    saturation_photons_per_pixel: float | None
    responsivity_dn_per_photon: float | None
    quantum_efficiency: float | None
    linearity_error_pct: float
    linearity_error_min_pct: float
    linearity_error_max_pct: float
    linearity_axis: str
    linearity_slope: float
    linearity_intercept_dn: float
    n_pixels: int
    max_dn: int | None
    exposure_s: np.ndarray
    photons_per_pixel: np.ndarray
    mean_dn: np.ndarray
    mean_dark_dn: np.ndarray
    variance_dn2: np.ndarray
    variance_dark_dn2: np.ndarray
    clipped_fraction: np.ndarray
    in_gain_fit: np.ndarray
    in_linearity_fit: np.ndarray
    linearity_deviation_pct: np.ndarray
    steps: list[StepStatistics] = field(default_factory=list, repr=False)
    dark_noise_upper_limit: bool = False
    range_warnings: list[str] = field(default_factory=list)

    @property
    def within_range(self) -> bool:
        return not self.range_warnings

    @property
    def signal_dn(self) -> np.ndarray:
        """mu_y - mu_y.dark per step [DN]."""
        return self.mean_dn - self.mean_dark_dn

    @property
    def signal_variance_dn2(self) -> np.ndarray:
        """sigma_y^2 - sigma_y.dark^2 per step [DN^2]."""
        return self.variance_dn2 - self.variance_dark_dn2

    def summary_rows(self) -> list[tuple[str, str, str]]:
        """(quantity, value, unit) rows for a printed table."""

        def fmt(v, digits=4):
            return "n/a" if v is None or (isinstance(v, float) and math.isnan(v)) else f"{v:.{digits}g}"

        return [
            ("overall system gain K", fmt(self.gain_dn_per_e), "DN/e-"),
            ("inverse gain 1/K", fmt(1.0 / self.gain_dn_per_e), "e-/DN"),
            ("dark offset", fmt(self.offset_dn), "DN"),
            ("temporal dark noise sigma_y.dark (quantisation included)", fmt(self.dark_noise_dn), "DN"),
            ("dark noise sigma_d (quantisation removed)",
             ("< " if self.dark_noise_upper_limit else "") + fmt(self.dark_noise_e), "e-"),
            ("dark current", fmt(self.dark_current_e_per_s), "e-/s"),
            ("saturation capacity", fmt(self.saturation_capacity_e), "e-"),
            ("saturation signal", fmt(self.saturation_signal_dn), "DN"),
            ("quantum efficiency", fmt(self.quantum_efficiency), "1"),
            ("linearity error LE", fmt(self.linearity_error_pct, 3), "%"),
            ("linearity deviation min / max",
             f"{fmt(self.linearity_error_min_pct, 3)} / {fmt(self.linearity_error_max_pct, 3)}", "%"),
            ("steps in gain fit", str(self.gain_fit_steps), "1"),
            ("within the range photon transfer measures", "yes" if self.within_range else "NO (see warnings)", ""),
        ]
