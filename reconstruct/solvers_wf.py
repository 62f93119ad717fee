"""Wirtinger flow (Candès, Li, Soltanolkotabi 2015) on the intensity loss, with a step safeguard."""
from __future__ import annotations

import time

import numpy as np

from . import kernels
from .metrics import norm as _norm
from .metrics import relative_error


def _run_wf(ws, x, n, cons, residuals, stopper, deadline, truth, errors, t0=0, x0_norm2=None, mu_max=0.2,
            tau0=330.0):
    """Wirtinger flow on f = sum (|Ax|^2 - y)^2, step mu_t n / (mean(w) ||x0||^2).

    Safeguard (ours, not in the paper): a step that raises the loss is
    rejected and halved, and the schedule is halved for the rest of the run,
    so the published schedule cannot diverge on hard objects.
    """
    Z = ws.Z
    H, W = ws.shape[1:]
    npix = H * W
    if x0_norm2 is None:
        x0_norm2 = _norm(x) ** 2
    damping = 1.0
    f_prev = np.inf
    masks, mcw, y = ws.masks, ws.masks_conj_w, ws.y

    def chunk(c, plan, g):
        Zc = Z[c]
        np.multiply(masks[c], x, out=Zc)
        plan.forward(Zc)
        ss, f = kernels.intensity_gradient(Zc, y[c])
        plan.inverse(Zc)
        kernels.conj_mask_sum(Zc, mcw[c], ws.sum_buffer(c, g))
        return ss, f

    x_prev = g_prev = None
    step_prev = 0.0
    it = 0
    for it in range(1, n + 1):
        g = np.empty(ws.shape[1:], ws.dtype)
        parts = ws.map_chunks(lambda c, plan: chunk(c, plan, g))
        res = float(np.sqrt(sum(p[0] for p in parts))) / ws.norm_sqrty
        f = sum(p[1] for p in parts)
        if x_prev is None and not np.isfinite(f):
            raise FloatingPointError("Wirtinger flow: the starting estimate gives a non-finite loss; check x0.")
        if not np.isfinite(f) or f > f_prev:
            # reject the step: go back and take half of it, and damp the schedule from now on
            damping *= 0.5
            step_prev *= 0.5
            x = x_prev - step_prev * g_prev
            residuals.append(residuals[-1] if residuals else res)
            if truth is not None:
                errors.append(relative_error(truth, x))
            if damping < 1e-12:
                stopper.reason = "stalled"
                x = x_prev
                break
            continue
        residuals.append(res)
        f_prev = f
        ws.add_partials(g)
        g *= ws.weight_r  # A^* z = w * (A^*A)^{-1} A^* z
        mu = min(1.0 - np.exp(-(t0 + it) / tau0), mu_max) * damping
        # a Python float: a numpy float64 scalar would promote x to complex128 (NEP 50)
        step = float(mu * npix / (ws.mean_weight * x0_norm2))
        x_prev, g_prev, step_prev = x, g, step
        x = x - step * g
        if cons.active:
            cons(x)
        if truth is not None:
            errors.append(relative_error(truth, x))
        if stopper.done(residuals) or (deadline is not None and time.perf_counter() >= deadline):
            break
    return x, it
