"""Hybrid input-output (HIO) with a support, for one far-field pattern (or a few masks).

Fienup, "Phase retrieval algorithms: a comparison", Appl. Opt. 21(15), 2758-2769 (1982):
with x' = P_M(x) the estimate whose far field has the measured magnitudes (for K masks, the
least-squares combination of the K magnitude-projected fields, ``solvers._er_step``),

    x_{n+1}(r) = x'(r)                    where r is in the support gamma (and, with
                                          non-negativity, Re x'(r) >= 0)
    x_{n+1}(r) = x_n(r) - beta x'(r)      elsewhere,        beta ~ 0.9;

for a real object the imaginary part is a violation everywhere. The estimate is x' with the
constraints applied, P_C(x'). The fixed points are solutions; HIO is not a descent method, which
is what lets it leave the stagnation points of error reduction (ER: x_{n+1} = P_C(x'), the
Gerchberg-Saxton-Fienup iteration, which is monotone but stalls on one pattern; Fienup 1982,
sections 3-4). Each attempt ends with ER iterations from the HIO estimate (Fienup 1982's practice
of finishing with ER), which polish it onto the data.

Support: given (fixed), or estimated: the thresholded autocorrelation to start, then shrink-wrap
every 20 iterations (``support.shrinkwrap``; Marchesini et al., PRB 68, 140101 (2003), from
memory), Gaussian width from 3 px down by 1 % per update to 1.5 px, threshold 20 % of the maximum.
A support over half the grid in either direction warns (``support.check_oversampling``).

Stagnation (Fienup and Wackerman, JOSA A 3, 1897 (1986), from memory): every ``check_every``
iterations the constraint violation E is compared with the best of the previous window; when it
has not fallen by 10 % while still above ``stagnation_level``, the first remedy is the twin-image
one: ``twin_iterations`` iterations with a support that is not centrosymmetric
(``support.reduced_support``, a corner of its box cut off), which the object fits and its twin
(conjugate inversion) does not, then the full support again; if the next window still stagnates,
the attempt ends and a new one starts from a new random start (``restarts`` times). The attempt
with the smallest amplitude residual is returned. All attempts share the ``iterations`` budget.

History (``residuals``): during HIO, E = ||sqrt(w) (x' - P_C x')|| / ||sqrt(y)||, Fienup's
object-domain error (the energy of x' violating the constraints, w = sum_k |m_k|^2), which bounds
the amplitude residual of the estimate P_C x' (for K = 1 since |F x'| = sqrt(y) exactly); during
the ER polish, the amplitude residual itself.
"""
from __future__ import annotations

import time
from dataclasses import dataclass

import numpy as np

from .solvers_constraints import _Constraints
from .solvers_er import _er_step, _run_er
from .solvers_stopping import CONVERGED_REASONS
from .ambiguities import relative_error_modulo_ambiguities
from .metrics import norm as _norm
from .metrics import relative_error
from .hio_kernels import constrained, hio_update
from .support import autocorrelation_support, check_oversampling, check_support, reduced_support, shrinkwrap

__all__ = ["HIOSettings", "HIOOutcome", "run_hio"]


@dataclass(frozen=True)
class HIOSettings:
    """Tuning of ``run_hio`` (defaults from the papers cited in the module docstring)."""

    beta: float = 0.9
    shrinkwrap: bool | None = None  # None: on when no support is given
    shrinkwrap_every: int = 20
    sigma_start_px: float = 3.0
    sigma_min_px: float = 1.0
    sigma_decay: float = 0.99
    shrinkwrap_threshold: float = 0.1
    autocorrelation_threshold: float = 0.04
    check_every: int = 200
    stagnation_level: float = 1e-3
    twin_iterations: int = 30
    restarts: int = 3
    er_iterations: int = 200  # ER polish at the end of each attempt

    def validate(self) -> None:
        from .validation import ReconstructionInputError

        if not 0 < self.beta < 2:
            raise ReconstructionInputError(f"HIO beta must be in (0, 2) (Fienup 1982 uses 0.5-1); got {self.beta}.")
        if self.shrinkwrap_every < 1 or self.check_every < 1 or self.restarts < 0 or self.er_iterations < 0:
            raise ReconstructionInputError("HIO settings: shrinkwrap_every and check_every must be >= 1, "
                                           "restarts and er_iterations >= 0.")


@dataclass
class HIOOutcome:
    estimate: np.ndarray
    support: np.ndarray
    iterations: int
    reason: str
    attempts: int
    twin_remedies: int
    residual: float  # amplitude residual of the estimate


def _random_start(ws, support, rng) -> np.ndarray:
    """Fienup's start: the measured magnitudes with random phases, back-projected, restricted to the support."""
    phase = np.exp(2j * np.pi * rng.random(ws.shape))
    z = (ws.sqrty * phase).astype(ws.dtype)
    x = ws.pseudo_inverse(z)
    x *= support
    return x


def run_hio(ws, x0, n: int, support, nonnegative: bool, residuals: list, stopper, deadline, truth, errors,
            settings: HIOSettings = HIOSettings(), seed: int = 0, single_pattern: bool = True,
            check_sampling: bool = True) -> HIOOutcome:
    """HIO attempts within a budget of ``n`` iterations in all (see the module docstring).

    ws : a ``solvers.Workspace`` with the intensities set. x0 : first start or None (random).
    support : boolean (H, W) (fixed unless settings.shrinkwrap) or None (estimated, shrink-wrapped).
    truth : optional; ``errors`` then gets the error per iteration (modulo twin, shift and global
    phase when ``single_pattern``, else modulo global phase). check_sampling=False skips the
    oversampling check of a given support (the engine's own shrink-wrapped one from a previous update).
    """
    settings.validate()
    shape = ws.shape[1:]
    rng = np.random.default_rng(seed)
    if support is None:
        s0, obj_extent = autocorrelation_support(ws.y, threshold=settings.autocorrelation_threshold)
        check_oversampling(s0, extent=obj_extent, what="the object (estimated from the autocorrelation)")
        wrap = True if settings.shrinkwrap is None else settings.shrinkwrap
    else:
        s0 = check_support(support, shape)
        if check_sampling:
            check_oversampling(s0)
        wrap = False if settings.shrinkwrap is None else settings.shrinkwrap
    err_fn = relative_error_modulo_ambiguities if single_pattern else relative_error
    beta = float(settings.beta)
    wr = ws.weight_r
    best: HIOOutcome | None = None
    used = 0
    attempts = twin_total = 0
    reason = "iterations"
    while used < n and attempts <= settings.restarts:
        attempts += 1
        S = s0.copy()
        x = (np.asarray(x0, dtype=ws.dtype) * S) if (x0 is not None and attempts == 1) else _random_start(ws, S, rng)
        sigma = settings.sigma_start_px
        hio_budget = max(1, n - used - settings.er_iterations) if n - used > settings.er_iterations else max(1, (n - used) // 2)
        window_best = prev_best = np.inf
        twin_left = 0
        twin_tried = False
        S_full = S
        restart = False
        it = 0
        Sr = S.astype(ws.real_dtype)
        for it in range(1, hio_budget + 1):
            p, _ = _er_step(ws, x)
            viol2 = hio_update(p, x, Sr, wr, beta, nonnegative)  # x <- HIO(x), in place
            E = float(np.sqrt(viol2)) / ws.norm_sqrty
            residuals.append(E)
            need_est = truth is not None or (wrap and it % settings.shrinkwrap_every == 0 and twin_left == 0)
            est = constrained(p, Sr, nonnegative) if need_est else None
            if truth is not None:
                errors.append(err_fn(truth, est))
            if stopper.done(residuals):
                x = est if est is not None else constrained(p, Sr, nonnegative)
                break
            if wrap and it % settings.shrinkwrap_every == 0 and twin_left == 0:
                S_full = shrinkwrap(est, sigma, settings.shrinkwrap_threshold)
                S = S_full
                Sr = S.astype(ws.real_dtype)
                sigma = max(settings.sigma_min_px, sigma * settings.sigma_decay)
            if twin_left:
                twin_left -= 1
                if twin_left == 0:
                    S = S_full
                    Sr = S.astype(ws.real_dtype)
            window_best = min(window_best, E)
            if it % settings.check_every == 0 and not (wrap and sigma > settings.sigma_min_px):
                stagnant = window_best > 0.9 * prev_best and window_best > settings.stagnation_level
                if stagnant and not twin_tried:
                    twin_tried = True
                    twin_total += 1
                    S = reduced_support(S_full)
                    Sr = S.astype(ws.real_dtype)
                    twin_left = settings.twin_iterations
                elif stagnant:
                    restart = attempts <= settings.restarts
                    if restart:
                        break
                prev_best, window_best = min(prev_best, window_best), np.inf
            if deadline is not None and time.perf_counter() >= deadline:
                break
        used += it
        x_est = constrained(_er_step(ws, x)[0], S_full, nonnegative) if stopper.reason == "" else x
        # ER polish with the final support
        cons = _Constraints(S_full, nonnegative, shape, ws.dtype)
        n_er = min(settings.er_iterations, max(0, n - used))
        if n_er and stopper.reason == "":
            x_est, it_er = _run_er(ws, x_est, n_er, cons, residuals, stopper, deadline, None, [])
            used += it_er
        if truth is not None:
            while len(errors) < len(residuals):
                errors.append(err_fn(truth, x_est))
        res = ws.residual_of(x_est)
        outcome = HIOOutcome(x_est, S_full, used, stopper.reason or "iterations", attempts, twin_total, res)
        if best is None or res < best.residual:
            best = outcome
        if stopper.reason in CONVERGED_REASONS or (deadline is not None and time.perf_counter() >= deadline):
            break
        stopper.reason = ""
        if not restart and used >= n:
            break
    reason = stopper.reason or ("time budget" if deadline is not None and time.perf_counter() >= deadline else "iterations")
    best.iterations, best.attempts, best.twin_remedies, best.reason = used, attempts, twin_total, reason
    return best
