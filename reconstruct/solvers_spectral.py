"""The solvers' default start: the truncated spectral initialization (power iterations on
sum_k A_k^* diag(t_k) A_k, mask-amplitude bias removed, scaled to the measured energy)."""
from __future__ import annotations

import numpy as np

from .metrics import norm as _norm
from .solvers_workspace import Workspace


def spectral_initialization(ws: Workspace, iterations: int = 50, seed: int = 0,
                            truncation: float = 9.0) -> np.ndarray:
    """Leading eigenvector of sum_k A_k^* diag(t_k) A_k by power iteration, scaled.

    t = y where y <= truncation * mean(y), else 0 (truncated spectral
    initialization, Chen & Candès, "Solving random quadratic systems of
    equations is nearly as easy as solving linear systems", CPAM 2017,
    alpha_y = 3). Without the truncation the few brightest speckles of a
    large frame dominate the matrix and the power method locks onto a
    vector that explains one pixel (seen at 128x128, K = 8). The scale makes
    sum_k ||A_k x0||^2 equal the measured total sum(y). Power-method form of
    Candès, Li, Soltanolkotabi 2015, Wirtinger flow, Algorithm 1.
    """
    rng = np.random.default_rng(seed)
    H, W = ws.shape[1:]
    v = (rng.standard_normal((H, W)) + 1j * rng.standard_normal((H, W))).astype(ws.dtype)
    v *= ws.lit
    v /= _norm(v)
    Z = ws.Z
    t = ws.y.copy()
    if truncation is not None and truncation > 0:
        t[t > truncation * float(np.mean(ws.y, dtype=np.float64))] = 0
    # Remove the mask-amplitude bias: sum_r a_r a_r^* = A^*A = diag(w), so
    # Y = sum t_r a_r a_r^* carries mean(t) * diag(w), whose largest entries
    # (pixels where many masks are bright) would attract the power method to
    # a single pixel. Iterate with Y - mean(t) (diag(w) - mean(w) I) instead.
    t_mean = float(np.mean(t, dtype=np.float64))
    bias = (t_mean * (ws.weight - ws.mean_weight)).astype(ws.real_dtype)
    for _ in range(iterations):
        ws.apply(v, Z)
        np.multiply(Z, t, out=Z)
        v_new = ws.pseudo_inverse(Z)
        v_new *= ws.weight_r
        v_new -= bias * v
        v = v_new
        nv = _norm(v)
        if nv == 0:
            break
        v /= nv
    energy = float(np.sum(ws.weight * np.abs(v) ** 2))
    total = float(np.sum(ws.y, dtype=np.float64))
    return (v * np.sqrt(total / energy)).astype(ws.dtype)
