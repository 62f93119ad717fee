"""Priors for low-dose data: total-variation regularised Poisson maximum likelihood.

At a few photons per pixel the Poisson ML estimate (``method="poisson"``) is dominated by
noise. A total-variation (TV) prior (Rudin, Osher, Fatemi, "Nonlinear total variation based
noise removal algorithms", Physica D 60, 259-268 (1992)) trades a small bias (flattened
fine texture) for a large cut in variance on objects made of smooth regions and edges:

    minimise  NLL(x) + lambda TV(x),   NLL = sum_k,r mu - y log mu,  mu = |F(m_k x)|^2,
    TV(x) = sum_r sqrt(|D_row x|^2 + |D_col x|^2 + eps^2)   (periodic forward differences).

TV acts on the complex field, which is TV of amplitude and phase together: for x = a e^{i phi},
|grad x|^2 = |grad a|^2 + a^2 |grad phi|^2, so jumps of the amplitude and of the phase are both
penalised (the phase where there is light to define it), with no phase unwrapping. eps (1 % of
the rms field) keeps it differentiable; the problem is solved by the project's L-BFGS
(``solvers._lbfgs``) from an error-reduction start, as the plain Poisson method is.

Weight: given (``prior_weight``), or by Morozov's discrepancy principle (Morozov 1966; for
Poisson data e.g. Bertero, Boccacci, Talenti, Zanella, Zanni, Inverse Problems 26, 105004 (2010),
from memory): the largest lambda whose fit is as good as the noise allows, i.e. whose Poisson
deviance 2 sum [y log(y/mu) - (y - mu)] equals its expected value for data drawn from mu
(``expected_deviance``, computed exactly from the Poisson distribution, about 1 per
measurement at high counts and less at low counts). Found by bisection in log lambda with warm
starts.
"""
from __future__ import annotations

import time

import numpy as np

from .solvers_poisson import _lbfgs
from .fft import FFTPlan, PropagatorPlan
from .metrics import norm as _norm
from .metrics import relative_error

__all__ = ["PRIORS", "tv", "tv_gradient", "expected_deviance", "poisson_deviance", "run_poisson_tv"]

PRIORS = (None, "tv")
TV_EPS_FRACTION = 0.01
DISCREPANCY_STEPS = 8  # bisection steps in log lambda (after bracketing)


def _dr(x):
    return np.roll(x, -1, axis=0) - x


def _dc(x):
    return np.roll(x, -1, axis=1) - x


def tv(x, eps: float = 0.0) -> float:
    """Isotropic total variation of a (complex) field, periodic forward differences, smoothed by eps."""
    a, b = _dr(x), _dc(x)
    return float(np.sum(np.sqrt(np.abs(a) ** 2 + np.abs(b) ** 2 + eps * eps)))


def tv_gradient(x, eps: float) -> tuple[float, np.ndarray]:
    """(TV(x), gradient as d/d(re) + i d/d(im)): D^T (D x / s) with s the smoothed magnitude."""
    a, b = _dr(x), _dc(x)
    s = np.sqrt(a.real ** 2 + a.imag ** 2 + b.real ** 2 + b.imag ** 2 + eps * eps)
    a /= s
    b /= s
    g = (np.roll(a, 1, axis=0) - a) + (np.roll(b, 1, axis=1) - b)
    return float(s.sum()), g


_TABLE = None


def _deviance_table():
    """E[2 (y log(y/mu) - (y - mu))] for y ~ Poisson(mu), tabulated on a log grid of mu."""
    global _TABLE
    if _TABLE is None:
        from scipy.stats import poisson

        mus = np.geomspace(1e-4, 1e3, 400)
        vals = np.empty_like(mus)
        for i, mu in enumerate(mus):
            top = int(mu + 12 * np.sqrt(mu) + 20)
            yv = np.arange(top + 1, dtype=np.float64)
            p = poisson.pmf(yv, mu)
            with np.errstate(divide="ignore", invalid="ignore"):
                term = np.where(yv > 0, yv * np.log(yv / mu), 0.0)
            vals[i] = float(np.sum(p * 2.0 * (term - (yv - mu))))
        _TABLE = (np.log(mus), vals)
    return _TABLE


def expected_deviance(mu) -> np.ndarray:
    """Expected Poisson deviance of one measurement of mean mu (-> 1 for large mu; 2 mu for tiny mu)."""
    mu = np.asarray(mu, dtype=np.float64)
    lm, vals = _deviance_table()
    out = np.interp(np.log(np.clip(mu, 1e-4, 1e3)), lm, vals)
    out = np.where(mu < 1e-4, 2.0 * mu, out)  # E[dev] -> 2 mu as mu -> 0 (only y = 0, 1 matter)
    return np.where(mu > 1e3, 1.0 + 1.0 / (6.0 * np.maximum(mu, 1e3)), out)


def poisson_deviance(y, mu) -> float:
    """2 sum [y log(y/mu) - (y - mu)] (0 log 0 = 0)."""
    y = np.asarray(y, dtype=np.float64)
    mu = np.asarray(mu, dtype=np.float64)
    pos = y > 0
    return float(2.0 * (np.sum(y[pos] * np.log(y[pos] / mu[pos])) - np.sum(y - mu)))


class _Objective:
    """Poisson NLL (minus its saturated value) + lambda TV, with its gradient, in float64."""

    def __init__(self, ws, sup, floor_fraction=1e-12):
        K, H, W = ws.shape
        self.H, self.W = H, W
        self.masks = ws.masks.astype(np.complex128) * ws.fft_scale  # the true masks (ws.masks carry 1/fft_scale); this plan is unitary
        self.masks_c = np.conj(self.masks)
        self.y = ws.y.astype(np.float64)
        plan = FFTPlan(ws.shape, np.complex128)
        self.plan = plan if ws.transfer is None else PropagatorPlan(plan, ws.transfer)
        self.Z = np.empty(ws.shape, np.complex128)
        self.eps_mu = max(floor_fraction * float(self.y.mean()), 1e-300)
        self.pos = self.y > 0
        self.sqrty = np.sqrt(self.y)
        self.norm_sqrty = float(_norm(self.sqrty))
        self.sup = sup
        self.weight = 0.0
        self.eps_tv = 1.0
        self.last_residual = np.nan

    def unpack(self, v):
        x = (v[: self.H * self.W] + 1j * v[self.H * self.W:]).reshape(self.H, self.W)
        return x * self.sup if self.sup is not None else x

    def mu(self, x):
        np.multiply(self.masks, x, out=self.Z)
        self.plan.forward(self.Z)
        return self.Z.real ** 2 + self.Z.imag ** 2

    def __call__(self, v):
        x = self.unpack(v)
        mu = self.mu(x)
        self.last_residual = float(_norm(self.sqrty - np.sqrt(mu))) / self.norm_sqrty
        mu_e = mu + self.eps_mu
        f = float(np.sum(mu_e - self.y) - np.sum(self.y[self.pos] * np.log(mu_e[self.pos] / self.y[self.pos])))
        np.multiply(self.Z, 1.0 - self.y / mu_e, out=self.Z)
        self.plan.inverse(self.Z)
        np.multiply(self.Z, self.masks_c, out=self.Z)
        g = 2.0 * self.Z.sum(axis=0)
        if self.weight > 0:
            t, gt = tv_gradient(x, self.eps_tv)
            f += self.weight * t
            g += self.weight * gt
        if self.sup is not None:
            g *= self.sup
        return f, np.concatenate([g.real.ravel(), g.imag.ravel()])


def run_poisson_tv(ws, x, n, cons, residuals, stopper, deadline, truth, errors, weight=None, info=None):
    """TV-regularised Poisson ML from x (see the module docstring); ``weight`` None = discrepancy principle.

    ``n`` bounds the L-BFGS steps of each solve (the discrepancy search makes up to ~12 solves);
    ``info`` (a dict, optional) receives the weight used and the deviance against its target.
    """
    sup = cons.support.astype(bool) if cons.support is not None else None
    obj = _Objective(ws, sup)
    x = np.asarray(x, dtype=np.complex128)
    obj.eps_tv = TV_EPS_FRACTION * float(np.sqrt(np.mean(np.abs(x) ** 2))) or 1e-12
    K = ws.shape[0]
    step0 = 1.0 / (4.0 * ws.mean_weight)

    def fit(lam, v0, iters):
        obj.weight = float(lam)
        v, it, reason = _lbfgs(obj, v0, iters, gtol=0.0, ftol=1e-10, step0=step0, deadline=deadline)
        mu = obj.mu(obj.unpack(v))
        dev = poisson_deviance(obj.y, mu)
        target = float(np.sum(expected_deviance(mu)))
        residuals.append(obj.last_residual)
        return v, it, reason, dev, target

    v = np.concatenate([x.real.ravel(), x.imag.ravel()])
    total = 0
    if weight is not None:
        v, total, reason, dev, target = fit(weight, v, n)
        lam = float(weight)
    else:
        # bracket: the deviance grows with lambda; find lam_lo (dev below target) and lam_hi (above)
        v_ml, it, reason, dev0, target0 = fit(0.0, v, n)
        total += it
        lam, v, dev, target = 0.0, v_ml, dev0, target0
        if dev0 < target0:
            scale = K * float(np.sqrt(np.mean(obj.y)))  # NLL gradient per pixel ~ K sqrt(counts)
            lo, hi = 0.0, None
            v_lo, v_hi = v_ml, None
            lam_try = 0.1 * scale
            for _ in range(12):  # expand until the fit is worse than the noise allows
                v_t, it, reason, dev_t, tgt_t = fit(lam_try, v_lo, max(20, n // 2))
                total += it
                if dev_t > tgt_t:
                    hi, v_hi = lam_try, v_t
                    break
                lo, v_lo = lam_try, v_t
                lam_try *= 4.0
                if deadline is not None and time.perf_counter() >= deadline:
                    break
            if hi is None:
                lam, v = lo, v_lo
            else:
                for _ in range(DISCREPANCY_STEPS):
                    mid = np.sqrt(hi * lo) if lo > 0 else hi / 4.0
                    v_t, it, reason, dev_t, tgt_t = fit(mid, v_lo, max(20, n // 2))
                    total += it
                    if dev_t > tgt_t:
                        hi, v_hi = mid, v_t
                    else:
                        lo, v_lo = mid, v_t
                    if deadline is not None and time.perf_counter() >= deadline:
                        break
                lam = lo if lo > 0 else hi
                v, it, reason, dev, target = fit(lam, v_lo if lo > 0 else v_hi, n)  # polish at the chosen weight
                total += it
    stopper.reason = {"iterations": "iterations"}.get(reason, reason)
    if info is not None:
        info.update(weight=lam, deviance=dev, deviance_target=target)
    xr = obj.unpack(v)
    if truth is not None:
        errors.append(relative_error(truth, xr))
    return xr.astype(ws.dtype), total
