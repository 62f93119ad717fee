"""How precise is an estimate, without knowing the sample: a prediction with its floors, and the data's own word.

Three numbers, side by side (relative error of the field, after global-phase alignment):

* ``shot``: the photon-count prediction, sqrt(pixels / photons) (``bounds.shot_noise_relative_error``).
  More frame sets lower it as 1/sqrt(sets).
* the **floors** more frame sets do not lower, and the read noise that averages down like the shot
  noise. Each is an intensity noise of variance v_i (electrons^2, per measured pixel i of the mean frame
  set) turned into a field error the same way (below):

  - ``read``: (read noise^2 + quantisation^2) / sets, read noise from the run's own dark frames;
  - ``dark``: the noise of the mean dark frame subtracted from every set alike, sigma_dark^2 / dark frames;
  - ``response``: the pixel-response spread left in the data, (s * mu_i)^2 with s the data-sheet
    PRNU when no flat field is applied (0 with a flat field; unknown when neither is known);
  - ``quantisation``: 1 / (12 g^2) per frame, a floor only when the read noise is below half a count
    (else the noise dithers it and it averages down inside ``read``).

  ``predicted`` = the root sum of squares of all of them.
* ``data``: from the misfit of the estimate to the data. The amplitude residual r_i =
  sqrt(y_i) - |A x|_i of a least-squares fit keeps (M - p) / M of the noise variance (M measured
  pixels, p = 2 x lit pixels - 1 real parameters: Seber & Lee, Linear Regression Analysis, 2nd ed.
  2003, sec. 3.3, E[RSS] = sigma^2 (M - p)), so the noise of the data is sum r_i^2 M / (M - p),
  whatever its source (dark frames, pixel response, a model that is wrong).

From intensity noise to the field: an intensity y = |z|^2 with noise variance v has amplitude noise
v / (4 mu) (delta sqrt(y) = delta y / (2 sqrt(y)), first-order error propagation; Taylor, An
Introduction to Error Analysis, 2nd ed. 1997, sec. 3.11); at dim pixels that diverges, so
v / (4 mu + 2 sqrt(v)) is used (the noise alone then gives about sqrt(v) / 2, from memory of the
half-normal mean). For the unweighted amplitude least squares that error reduction solves,
A^H A = diag(w) (w = sum_k |m_k|^2), so the mean-square field error is 4 sum_i var_a_i / w^2 over
the lit pixels; divided by ||x||^2 this gives the relative error. With Poisson noise alone
(v = mu / sets, mu >> 1) it is sqrt(N / photons): the shot-noise rule, so the two scales agree.

``chi2_dof`` = sum_i r_i^2 / var_a_i / (M - p), with var_a_i from the predicted variances: about 1 when
the noise model explains the data; well above 1 (``MISFIT_CHI2_DOF``) the model is missing something
(an unknown pixel-response spread, a misregistered modulator, a moving sample), and the estimate is
reported with a misfit warning instead of a confident number.

``reported`` is the data estimate (it includes every source, known or not, and a solver that has not
converged yet); it is never below the prediction's floors alone.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass, field

import numpy as np

__all__ = ["NoiseModel", "PrecisionEstimate", "estimate_precision", "MISFIT_CHI2_DOF", "ADVICE"]

MISFIT_CHI2_DOF = 3.0  # chi^2 per degree of freedom above this: the data contradict the noise model

# what lowers each term (shown when it dominates)
ADVICE = {
    "shot": "more frame sets or a longer exposure (more photons)",
    "read": "more frame sets or a longer exposure (read noise averages down)",
    "dark": "more dark frames (the mean dark frame's noise is subtracted from every set alike)",
    "response": "a flat field ('maskrun calibrate' measures it; the run divides by it)",
    "quantisation": "a higher camera gain (counts per electron) or more read noise to dither",
    "misfit": "a registration check of the modulator against the camera, a flat field, a steady sample",
}
LABELS = {
    "shot": "photon count",
    "read": "read noise",
    "dark": "mean dark frame",
    "response": "pixel response",
    "quantisation": "quantisation",
    "misfit": "misfit",
}


@dataclass
class NoiseModel:
    """What is known about the noise of the data, in electrons (all optional: None = unknown).

    read_noise_e: temporal noise of one frame without light (read noise with dark current and
        quantisation), e.g. measured from the run's dark frames.
    dark_frames: how many dark frames the subtracted mean dark frame averages (0: none subtracted
        from frames, the profile's offset was used).
    response_spread: pixel-response spread left in the data (0 with a flat field applied; the
        data-sheet PRNU without one; None unknown).
    gain_dn_per_e: camera counts per electron (for quantisation).
    """

    read_noise_e: float | None = None
    dark_frames: int = 0
    response_spread: float | None = None
    gain_dn_per_e: float | None = None

    def to_dict(self) -> dict:
        return asdict(self)


@dataclass
class PrecisionEstimate:
    """Relative field errors (fractions, NaN when unknown); see the module docstring."""

    shot: float
    read: float
    dark: float
    response: float
    quantisation: float
    predicted: float
    data: float
    chi2_dof: float
    reported: float
    misfit: bool
    dominant: str  # the largest term of the prediction, or "misfit" when the data say more
    advice: str
    unknown: list[str] = field(default_factory=list)  # terms that could not be computed

    def to_dict(self) -> dict:
        d = asdict(self)
        for k, v in d.items():
            if isinstance(v, float) and not np.isfinite(v):
                d[k] = None
        return d


def _field_error_sq(var_i: np.ndarray, mu: np.ndarray, weight_sq_norm: float) -> float:
    """Relative mean-square field error from intensity variances var_i (see the module docstring)."""
    var_i = np.maximum(var_i, 0.0)
    var_a = var_i / (4.0 * mu + 2.0 * np.sqrt(var_i) + 1e-30)
    return float(4.0 * var_a.sum(dtype=np.float64) / weight_sq_norm)


def estimate_precision(model_intensities: np.ndarray, data: np.ndarray, *, sets: int, photons: float,
                       pixels: int, lit_pixels: int, mean_weight: float, field_norm_sq: float,
                       noise: NoiseModel | None = None) -> PrecisionEstimate:
    """The precision of an estimate x from its model intensities |A x|^2 and the data.

    model_intensities, data: (K, H, W) electrons per frame set (data: the mean of ``sets`` sets);
    photons: electrons in all the sets used; pixels: reconstructed pixels (the shot-noise rule);
    lit_pixels: pixels some mask lights; mean_weight: mean over lit pixels of sum_k |m_k|^2;
    field_norm_sq: ||x||^2 in the units of sqrt(model_intensities)."""
    noise = noise or NoiseModel()
    mu = np.maximum(np.asarray(model_intensities, dtype=np.float64), 0.0)
    y = np.maximum(np.asarray(data, dtype=np.float64), 0.0)
    n = max(int(sets), 1)
    wsq = mean_weight ** 2 * max(field_norm_sq, 1e-300)
    unknown: list[str] = []
    shot = float(np.sqrt(pixels / photons)) if photons > 0 else float("inf")

    zeros = np.zeros_like(mu)
    var_pred = mu / n  # Poisson (mean of n sets)
    terms = {}
    gain = noise.gain_dn_per_e
    q_sq = (1.0 / gain) ** 2 / 12.0 if gain else 0.0  # quantisation variance per frame, e^2 (uniform step)
    read_sq = noise.read_noise_e ** 2 if noise.read_noise_e is not None else None
    dithered = read_sq is not None and gain and noise.read_noise_e * gain >= 0.5
    if read_sq is None:
        unknown.append("read")
        terms["read"] = float("nan")
        v_read = zeros
    else:
        # the dark frames' temporal noise already holds the quantisation
        v_read = np.full_like(mu, read_sq / n)
        terms["read"] = np.sqrt(_field_error_sq(v_read, mu, wsq))
    if noise.dark_frames and read_sq is not None:
        v_dark = np.full_like(mu, read_sq / noise.dark_frames)
        terms["dark"] = np.sqrt(_field_error_sq(v_dark, mu, wsq))
    elif noise.dark_frames:
        unknown.append("dark")
        terms["dark"] = float("nan")
        v_dark = zeros
    else:
        v_dark = zeros
        terms["dark"] = 0.0
    if noise.response_spread is None:
        unknown.append("response")
        terms["response"] = float("nan")
        v_resp = zeros
    else:
        v_resp = (noise.response_spread * mu) ** 2
        terms["response"] = np.sqrt(_field_error_sq(v_resp, mu, wsq))
    if gain and not dithered:
        v_q = np.full_like(mu, q_sq)
        terms["quantisation"] = np.sqrt(_field_error_sq(v_q, mu, wsq))
    else:
        v_q = zeros
        terms["quantisation"] = 0.0
    known = [shot] + [t for t in terms.values() if np.isfinite(t)]
    predicted = float(np.sqrt(np.sum(np.square(known))))

    # the data's own estimate: noise variance from the amplitude residual, corrected for the fitted parameters
    m = mu.size
    p = 2 * int(lit_pixels) - 1
    dof = max(m - p, 1)
    r_sq = (np.sqrt(y) - np.sqrt(mu)) ** 2
    data_err = float(np.sqrt(4.0 * r_sq.sum(dtype=np.float64) * m / dof / wsq))
    v_all = var_pred + v_read + v_dark + v_resp + v_q
    var_a = np.maximum(v_all, 1e-30) / (4.0 * mu + 2.0 * np.sqrt(np.maximum(v_all, 1e-30)))
    chi2_dof = float((r_sq / var_a).sum(dtype=np.float64) / dof)
    misfit = chi2_dof > MISFIT_CHI2_DOF
    reported = max(data_err, float(np.sqrt(np.nansum(np.square([terms["dark"], terms["response"],
                                                                   terms["quantisation"]])))))
    named = {"shot": shot, **{k: v for k, v in terms.items() if np.isfinite(v)}}
    dominant = max(named, key=named.get)
    if misfit or data_err > 1.5 * predicted:
        dominant = "misfit" if misfit else dominant
    if misfit:
        advice = (f"the data scatter {np.sqrt(chi2_dof):.1f}x more than the noise model explains: "
                  f"{ADVICE['misfit']}" + (f"; unknown: {', '.join(LABELS[u] for u in unknown)}" if unknown else ""))
    else:
        advice = ADVICE[dominant]
    return PrecisionEstimate(shot=shot, read=terms["read"], dark=terms["dark"], response=terms["response"],
                             quantisation=terms["quantisation"], predicted=predicted, data=data_err,
                             chi2_dof=chi2_dof, reported=reported, misfit=misfit, dominant=dominant,
                             advice=advice, unknown=unknown)
