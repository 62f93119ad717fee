"""RAAR (relaxed averaged alternating reflections, Luke 2005) in the lifted Fourier space."""
from __future__ import annotations

import time

import numpy as np

from . import kernels
from .fft import aligned_empty
from .metrics import relative_error


class _RAARState:
    """The lifted iterate Zl and the reflection buffer T of a RAAR run."""

    def __init__(self, ws):
        self.T = aligned_empty(ws.shape, ws.dtype)
        self.Zl = aligned_empty(ws.shape, ws.dtype)


def _raar_estimate(ws, st):
    """x = (A^*A)^{-1} A^* P_M(Z), the estimate carried by the lifted iterate."""
    ws.magnitude_project(st.Zl, ws.Z)
    return ws.pseudo_inverse(ws.Z)


def _run_raar(ws, x, n, cons, residuals, stopper, deadline, truth, errors, beta=0.9, state=None):
    """RAAR in the lifted Fourier space: 2K FFTs and two or three passes over the K frames per iteration.

    With P = P_M(Z) = r*Z (r = sqrt(y)/|Z|) the update
    Z <- beta (Z + P_R(2P - Z)) + (1 - 2 beta) P is computed as
    Z <- Z * (beta + (1 - 2 beta) r) + A(beta * x_s),  x_s = (A^*A)^{-1} A^* (Z (2r - 1)).
    The reflection T = Z (r - 1/2) of the next iteration (and its residual) is made in the same
    pass as the update; with the masks in one chunk and no constraints, x_s and A(beta x_s) are
    one more pass, else two.
    """
    st = state or _RAARState(ws)
    Zl, T = st.Zl, st.T
    sqrty, tiny, masks, mcw = ws.sqrty, ws.tiny, ws.masks, ws.masks_conj_w
    a, b = 1.0 - 2.0 * beta, beta
    xs = np.empty(ws.shape[1:], ws.dtype)

    def start(c, plan):
        Zc = Zl[c]
        np.multiply(masks[c], x, out=Zc)
        plan.forward(Zc)
        return kernels.raar_reflect(Zc, sqrty[c], tiny, T[c])  # T = (2P - Z) / 2

    def phase1(c, plan):
        Tc = T[c]
        plan.inverse(Tc)
        kernels.conj_mask_sum(Tc, mcw[c], ws.sum_buffer(c, xs))

    def phase2(c, plan):
        Tc = T[c]
        np.multiply(masks[c], xs, out=Tc)
        plan.forward(Tc)
        return kernels.raar_update(Zl[c], sqrty[c], tiny, Tc, a, b)

    # masks in one chunk and no constraints: the conjugate-mask sum, the scaling by 2 beta and the
    # mask multiply are one pass (backproject_remask), as in error reduction
    fused = ws.threads == 1 and not cons.active
    ss_parts = ws.map_chunks(start)
    it = 0
    for it in range(1, n + 1):
        residuals.append(float(np.sqrt(sum(ss_parts))) / ws.norm_sqrty)
        if fused:
            ws.plan.inverse(T)
            kernels.backproject_remask(T, masks, ws.inv_weight, 2.0 * beta, xs)
            ws.plan.forward(T)
            ss_parts = [kernels.raar_update(Zl, sqrty, tiny, T, a, b)]
        else:
            ws.map_chunks(phase1)
            ws.add_partials(xs)
            xs *= 2.0
            if cons.active:
                cons(xs)
            xs *= beta
            ss_parts = ws.map_chunks(phase2)
        if truth is not None:
            xe = _raar_estimate(ws, st)
            if cons.active:
                cons(xe)
            errors.append(relative_error(truth, xe))
        if stopper.done(residuals) or (deadline is not None and time.perf_counter() >= deadline):
            break
    x = _raar_estimate(ws, st)
    if cons.active:
        cons(x)
    return x, it
