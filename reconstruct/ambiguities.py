"""The ambiguities of one far-field pattern, and an error metric that aligns them.

A single intensity |F x|^2 (unitary DFT, periodic grid) is unchanged by
  * a global phase: x -> e^{i phi} x;
  * a translation: x -> x(r - s) (a linear phase ramp in the far field), on the periodic grid;
  * conjugate inversion, the "twin image": x -> conj(x(-r)) (the far field is conjugated,
    its modulus unchanged).
Fienup, "Phase retrieval algorithms: a comparison", Appl. Opt. 21, 2758 (1982), section 2, and
Fienup and Wackerman, JOSA A 3, 1897 (1986), from memory. A support constraint pins the translation
only up to the shifts that keep the object inside it, and removes the twin only when the support is
not centrosymmetric; non-negativity pins the global phase of a real object. So an estimate from one
pattern is compared with the truth after removing all three: ``relative_error_modulo_ambiguities``.
With K >= 2 different masks the translation and the twin are not ambiguities any more (the masks do
not move with the object); use ``metrics.relative_error`` (global phase only) there.
"""
from __future__ import annotations

import numpy as np

from .metrics import norm
from .validation import ReconstructionInputError

__all__ = ["twin", "align_ambiguities", "relative_error_modulo_ambiguities"]


def twin(x) -> np.ndarray:
    """Conjugate inversion on the periodic grid: conj(x[-r]) (index -r taken modulo the grid)."""
    a = np.asarray(x)
    return np.conj(np.roll(a[::-1, ::-1], (1, 1), axis=(0, 1)))


def align_ambiguities(truth, estimate) -> tuple[np.ndarray, dict]:
    """The version of ``estimate`` (itself or its twin, shifted by whole pixels, times a global phase)
    closest to ``truth``, and how it was aligned: {"twin": bool, "shift": (rows, cols), the
    roll applied to the (twinned) estimate, "phase": rad}.

    The best shift for each candidate maximises |c(s)|, c(s) = sum_r truth(r) conj(cand(r - s)) (the
    circular cross-correlation, by FFT); the best phase is arg c(s) (as for the global phase alone,
    Candès, Li, Soltanolkotabi 2015).
    """
    t = np.asarray(truth, dtype=np.complex128)
    e = np.asarray(estimate, dtype=np.complex128)
    if t.ndim != 2 or t.shape != e.shape:
        raise ReconstructionInputError(f"truth and estimate must be (H, W) arrays of one shape; got {t.shape} and {e.shape}.")
    Ft = np.fft.fft2(t)
    best = None
    for is_twin, cand in ((False, e), (True, twin(e))):
        c = np.fft.ifft2(Ft * np.conj(np.fft.fft2(cand)))
        k = int(np.argmax(np.abs(c)))
        s = np.unravel_index(k, c.shape)
        val = c.flat[k]
        if best is None or abs(val) > abs(best[0]):
            best = (val, is_twin, (int(s[0]), int(s[1])), cand)
    val, is_twin, shift, cand = best
    phase = float(np.angle(val)) if val != 0 else 0.0
    aligned = np.roll(cand, shift, axis=(0, 1)) * np.exp(1j * phase)
    H, W = t.shape
    signed = (shift[0] - H if shift[0] > H // 2 else shift[0], shift[1] - W if shift[1] > W // 2 else shift[1])
    return aligned, {"twin": is_twin, "shift": signed, "phase": phase}


def relative_error_modulo_ambiguities(truth, estimate) -> float:
    """min over twin, whole-pixel shift and global phase of ||truth - T(estimate)|| / ||truth||."""
    t = np.asarray(truth, dtype=np.complex128)
    nt = norm(t)
    if nt == 0:
        raise ReconstructionInputError("the error is undefined for an all-zero truth.")
    aligned, _ = align_ambiguities(t, estimate)
    return float(norm(t - aligned) / nt)
