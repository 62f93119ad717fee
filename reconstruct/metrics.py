"""Error metrics that respect the global-phase ambiguity."""
from __future__ import annotations

import numpy as np

from .validation import ReconstructionInputError

__all__ = ["relative_error", "align_global_phase", "amplitude_residual", "norm", "inner"]


# BLAS-free reductions: on the shared 2-core machine the threaded BLAS was
# seen to stall (8 ms for a 16k-element dot); einsum's own loop does not.
def inner(b, a) -> complex:
    """<b, a> = sum(conj(b) * a), complex128, without BLAS."""
    b = np.asarray(b, dtype=np.complex128).reshape(-1)
    a = np.asarray(a, dtype=np.complex128).reshape(-1)
    return complex(np.einsum("i,i->", np.conj(b), a))


def norm(a) -> float:
    """Euclidean norm of any real or complex array, float64, without BLAS."""
    a = np.asarray(a).reshape(-1)
    if np.iscomplexobj(a):
        return float(np.sqrt(np.einsum("i,i->", a.real, a.real, dtype=np.float64)
                             + np.einsum("i,i->", a.imag, a.imag, dtype=np.float64)))
    return float(np.sqrt(np.einsum("i,i->", a, a, dtype=np.float64)))


def align_global_phase(x, x_hat) -> np.ndarray:
    """Return e^{i phi} x_hat with phi minimising ||x - e^{i phi} x_hat|| (complex128)."""
    a = np.asarray(x, dtype=np.complex128)
    b = np.asarray(x_hat, dtype=np.complex128)
    if a.shape != b.shape:
        raise ReconstructionInputError(f"shapes differ: truth {a.shape} vs estimate {b.shape}.")
    c = inner(b, a)
    phase = c / abs(c) if c != 0 else 1.0
    return b * phase


def relative_error(x, x_hat) -> float:
    """min over phi of ||x - e^{i phi} x_hat|| / ||x|| (computed in float64).

    The minimising phase is phi = arg(<x_hat, x>), as in Candès, Li,
    Soltanolkotabi, "Phase retrieval via Wirtinger flow" (2015).
    """
    a = np.asarray(x, dtype=np.complex128)
    b = np.asarray(x_hat, dtype=np.complex128)
    if a.shape != b.shape:
        raise ReconstructionInputError(f"shapes differ: truth {a.shape} vs estimate {b.shape}.")
    na = norm(a)
    if na == 0:
        raise ReconstructionInputError("relative_error is undefined for an all-zero reference x.")
    c = inner(b, a)
    # ||a - e^{i phi} b||^2 = ||a||^2 + ||b||^2 - 2|<b, a>| at the optimum
    sq = na**2 + norm(b) ** 2 - 2 * abs(c)
    if sq < 1e-6 * na**2:  # cancellation: compute directly for small errors
        return float(norm(a - align_global_phase(a, b)) / na)
    return float(np.sqrt(max(sq, 0.0)) / na)


def amplitude_residual(intensities, predicted) -> float:
    """|| sqrt(y) - sqrt(y_hat) || / || sqrt(y) ||: the relative data residual."""
    sy = np.sqrt(np.maximum(np.asarray(intensities, dtype=np.float64), 0))
    sp = np.sqrt(np.maximum(np.asarray(predicted, dtype=np.float64), 0))
    return float(norm(sy - sp) / norm(sy))
