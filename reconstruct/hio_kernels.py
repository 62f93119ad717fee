"""The fused HIO update (one pass over the grid), compiled by numba when the solver kernels are.

``hio_update(p, x, support, weight, beta, nonnegative)``: with p = P_M(x) (the magnitude-projected
estimate) and the constraints (support, and Re p >= 0 with no imaginary part if ``nonnegative``),
x <- p where they hold and x - beta p where not (Fienup 1982, eq. for the hybrid input-output;
for a real object the imaginary part is a violation everywhere), in place; returns the violation
energy sum w |p - P_C p|^2. The numpy twin does the same arithmetic (used with ``MASKRUN_JIT=0`` or
without numba; ``kernels.accelerated()`` decides, as for the other kernels).
"""
from __future__ import annotations

import numpy as np

from . import kernels

__all__ = ["hio_update", "constrained"]

_COMPILED = None


def _np_hio_update(p, x, support, weight, beta, nonnegative):
    if nonnegative:
        good = (support > 0) & (p.real >= 0)
        vr = np.where(good, 0.0, p.real)
        energy = float(np.sum(weight * (vr * vr + p.imag * p.imag), dtype=np.float64))
        x.real[...] = np.where(good, p.real, x.real - beta * p.real)
        x.imag[...] = x.imag - beta * p.imag
    else:
        good = support > 0
        v = np.where(good, 0, p)
        energy = float(np.sum(weight * (v.real ** 2 + v.imag ** 2), dtype=np.float64))
        x[...] = np.where(good, p, x - beta * p)
    return energy


def _compile():
    global _COMPILED
    if _COMPILED is None:
        import numba

        @numba.njit(cache=True, error_model="numpy", fastmath={"reassoc", "contract"})
        def update(p, x, s, w, beta, nonneg):  # p, x: interleaved real views (2N); s, w: (N)
            acc = 0.0
            for i in range(s.size):
                pr = p[2 * i]
                pi = p[2 * i + 1]
                if nonneg:
                    if s[i] > 0 and pr >= 0:
                        x[2 * i] = pr
                        vr = 0.0
                    else:
                        x[2 * i] = x[2 * i] - beta * pr
                        vr = pr
                    x[2 * i + 1] = x[2 * i + 1] - beta * pi
                    acc += w[i] * (vr * vr + pi * pi)
                elif s[i] > 0:
                    x[2 * i] = pr
                    x[2 * i + 1] = pi
                else:
                    x[2 * i] = x[2 * i] - beta * pr
                    x[2 * i + 1] = x[2 * i + 1] - beta * pi
                    acc += w[i] * (pr * pr + pi * pi)
            return acc

        _COMPILED = update
    return _COMPILED


def hio_update(p: np.ndarray, x: np.ndarray, support: np.ndarray, weight: np.ndarray, beta: float,
               nonnegative: bool) -> float:
    """x <- HIO update from p = P_M(x), in place (C-contiguous complex (H, W)); returns the violation energy."""
    if not kernels.accelerated():
        return _np_hio_update(p, x, support, weight, beta, nonnegative)
    rdt = np.float32 if x.dtype == np.complex64 else np.float64
    f = _compile()
    return float(f(p.reshape(-1).view(rdt), x.reshape(-1).view(rdt), support.reshape(-1), weight.reshape(-1),
                   rdt(beta), bool(nonnegative)))


def constrained(p: np.ndarray, support: np.ndarray, nonnegative: bool) -> np.ndarray:
    """P_C(p): zero outside the support; with non-negativity, the real part clipped at 0 and no imaginary part."""
    if nonnegative:
        return np.where((support > 0) & (p.real >= 0), p.real, 0).astype(p.dtype)
    return np.where(support > 0, p, 0).astype(p.dtype)
