"""Error reduction (Gerchberg & Saxton 1972; Fienup 1982) for many masks: magnitude projection and the
weighted least-squares combination of the K back-transformed fields, per chunk of masks or fused.

Like every iteration kernel of the solvers, ``_run_er`` advances x by n iterations, appending residuals."""
from __future__ import annotations

import time

import numpy as np

from . import kernels
from .metrics import relative_error


def _er_step(ws, x):
    """One error-reduction step; returns (new x, relative residual of the old x).

    Per chunk of masks: mask multiply, FFT, magnitude projection with the residual (one fused
    pass), inverse FFT, conjugate-mask multiply and sum over masks (one fused pass).
    """
    masks, mcw, Z, sqrty, tiny = ws.masks, ws.masks_conj_w, ws.Z, ws.sqrty, ws.tiny
    xn = np.empty(ws.shape[1:], ws.dtype)

    def chunk(c, plan):
        Zc = Z[c]
        np.multiply(masks[c], x, out=Zc)
        plan.forward(Zc)
        ss = kernels.amplitude_project(Zc, sqrty[c], tiny)
        plan.inverse(Zc)
        kernels.conj_mask_sum(Zc, mcw[c], ws.sum_buffer(c, xn))
        return ss

    parts = ws.map_chunks(chunk)
    ws.add_partials(xn)
    return xn, float(np.sqrt(sum(parts))) / ws.norm_sqrty


def _run_er(ws, x, n, cons, residuals, stopper, deadline, truth, errors):
    if ws.threads == 1 and not cons.active:
        return _run_er_single(ws, x, n, residuals, stopper, deadline, truth, errors)
    it = 0
    for it in range(1, n + 1):
        x, res = _er_step(ws, x)
        residuals.append(res)
        if cons.active:
            cons(x)
        if truth is not None:
            errors.append(relative_error(truth, x))
        if stopper.done(residuals) or (deadline is not None and time.perf_counter() >= deadline):
            break
    return x, it


def _run_er_single(ws, x, n, residuals, stopper, deadline, truth, errors):
    """Error reduction with the masks in one chunk and no constraints: the conjugate-mask sum of
    each iteration and the mask multiply of the next are one pass (``backproject_remask``).

    The same arithmetic as ``_er_step`` (rounding aside): one pass fewer over the K frames.
    """
    Z, plan, masks, inv_w, sqrty, tiny = ws.Z, ws.plan, ws.masks, ws.inv_weight, ws.sqrty, ws.tiny
    np.multiply(masks, x, out=Z)
    it = 0
    for it in range(1, n + 1):
        plan.forward(Z)
        ss = kernels.amplitude_project(Z, sqrty, tiny)
        plan.inverse(Z)
        x = kernels.backproject_remask(Z, masks, inv_w, 1.0, np.empty(ws.shape[1:], ws.dtype))
        residuals.append(float(np.sqrt(ss)) / ws.norm_sqrty)
        if truth is not None:
            errors.append(relative_error(truth, x))
        if stopper.done(residuals) or (deadline is not None and time.perf_counter() >= deadline):
            break
    return x, it
