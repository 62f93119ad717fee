"""Phase-retrieval solvers for multi-mask (coded diffraction) data.

Model: y_k = |A_k x|^2 with A_k = F diag(m_k), F the unitary DFT. Because F
is unitary, A^*A = diag(w) with w = sum_k |m_k|^2, so the least-squares
projection onto the range of A costs one batched inverse FFT and a divide.

Methods (``method=``):

``"hybrid"``  The default (``"auto"``) for K >= 5 masks: RAAR until the
              relative amplitude residual is below 2 % (or RAAR stalls),
              then error reduction.
              RAAR finds the basin from a poor start (with K = 3 octanary
              masks ER alone never converges, RAAR does); ER's linear rate
              near the solution is faster than RAAR's, and ER settles
              exactly on the amplitude least-squares point for noisy data.
              Wins "iterations to 1e-6" and "to 1e-10" in bench/recon_bench.py
              (K = 8; ER alone is within a few per cent there).
``"er"``      Error reduction (Gerchberg & Saxton 1972; Fienup 1982) for many
              masks: replace the Fourier magnitudes by sqrt(y), average the K
              back-transformed fields weighted by conj(m_k)/w. Monotone on the
              amplitude loss, 2K FFTs per iteration, the cheapest iteration.
              With >= 6 octanary masks it converges linearly to machine
              precision from the spectral start; with K <= 4 it stagnates.
``"raar"``    The default for K <= 4 masks. Relaxed averaged alternating
              reflections (Luke 2005) in the lifted Fourier space, beta = 0.9
              by default. Escapes stagnation better than ER when masks are
              few or constraints are used; dearer per iteration (more buffer
              passes). On noisy data its fixed point is a little off the
              least-squares point: polish with ``method="er", x0=...``
              (at 30 photons/pixel, K = 4: 0.17 -> 0.13 relative error).
``"wf"``      Wirtinger flow with spectral initialization (Candès, Li,
              Soltanolkotabi 2015) on the intensity loss, step schedule
              mu_t = min(1 - exp(-t/330), 0.2). The published reference; the
              ML estimator for Gaussian intensity noise; slower to converge.
``"poisson"`` Poisson maximum likelihood: negative log-likelihood
              sum(mu - y log mu), mu = |Ax|^2, minimised by L-BFGS (scipy) on
              the real and imaginary parts, started from ER. Use for
              shot-noise-limited data where the last factor in precision
              matters (its MSE approaches the Cramér-Rao bound).

All methods start from ``x0`` if given, else from the spectral estimate
(power iterations on sum_k A_k^* diag(t_k) A_k with t the intensities
truncated at 9x their mean and the mask-amplitude bias removed, scaled to
the measured energy; see ``spectral_initialization``). Optional constraints: ``support`` (boolean (H, W), zero outside) and
``nonnegative`` (real, >= 0, after removing the global phase).
"""
from __future__ import annotations

import time
from dataclasses import dataclass

import numpy as np

# the solvers' parts live in solvers_*.py; every name below stays reachable as solvers.<name>, and the
# workspace looks the thread choice up here at call time (so replacing it here takes effect)
from . import kernels  # noqa: F401
from .fft import FFTPlan, PropagatorPlan, aligned_empty  # noqa: F401
from .metrics import norm as _norm  # noqa: F401
from .metrics import relative_error  # noqa: F401
from .solvers_constraints import _Constraints
from .solvers_er import _er_step, _run_er, _run_er_single  # noqa: F401
from .solvers_poisson import _dot, _lbfgs, _run_poisson  # noqa: F401
from .solvers_raar import _raar_estimate, _RAARState, _run_raar  # noqa: F401
from .solvers_spectral import spectral_initialization
from .solvers_stopping import CONVERGED_REASONS, _Stopper, _SwitchStopper  # noqa: F401
from .solvers_wf import _run_wf  # noqa: F401
from .solvers_workspace import (  # noqa: F401
    _THREAD_CHOICE,
    _THREAD_MEASURE_MIN_ELEMENTS,
    Workspace,
    _choose_threads,
    _single_thread_backend,
    _thread_pool,
)
from .validation import (
    ReconstructionInputError,
    warn_single_pattern,
    check_dtype,
    working_dtype,
    check_intensities,
    check_masks,
    check_object,
)

METHODS = ("auto", "hybrid", "er", "raar", "wf", "poisson", "hio")
NOISE_MODELS = ("amplitude", "poisson", "gaussian")
DEFAULT_ITERATIONS = {"hybrid": 500, "er": 500, "raar": 500, "wf": 2000, "poisson": 200, "hio": 8000}
# hybrid: leave RAAR for ER once the relative amplitude residual is below
# 2 % (inside ER's basin: about 25 iterations for K = 8 on a natural image),
# or when RAAR's residual improves by less than 0.1 % over 20 iterations
# (noisy data at its floor).
HYBRID_SWITCH_RESIDUAL = 0.02
# Default tolerance on the relative amplitude residual, per working precision (a few units of
# rounding of the residual computed in that precision), and the rounding floor under which a
# residual that no longer improves stops the run as "precision floor".
DEFAULT_TOLERANCE = {np.dtype(np.complex64): 3e-7, np.dtype(np.complex128): 1e-14}
PRECISION_FLOOR = {np.dtype(np.complex64): 1e-5, np.dtype(np.complex128): 1e-12}
HYBRID_STALL_FRACTION = 1e-3


@dataclass
class SolveResult:
    """Outcome of ``solve``.

    estimate : complex (H, W) in units of sqrt(counts).
    residuals : relative amplitude residual ||sqrt(y)-|Ax||| / ||sqrt(y)|| per
        iteration (for "poisson": per L-BFGS evaluation, of the current point).
    errors : relative error to ``truth`` per iteration (only if truth given).
    """

    estimate: np.ndarray
    residuals: np.ndarray
    method: str
    iterations: int
    converged: bool
    elapsed_s: float
    errors: np.ndarray | None = None
    stop_reason: str = ""

    @property
    def history(self) -> dict:
        """Per-iteration history as a dict of arrays ("residual" and, if tracked, "error")."""
        h = {"residual": self.residuals}
        if self.errors is not None:
            h["error"] = self.errors
        return h

    @property
    def residual(self) -> float:
        return float(self.residuals[-1]) if len(self.residuals) else float("nan")


def default_method(mask_count: int) -> str:
    """The amplitude-model method "auto" picks: "raar" for K <= 4 masks, else "hybrid".

    With K <= 4, ER (and so the ER end of the hybrid) converges slowly or
    stagnates, RAAR does not (64x64 objects, octanary masks: K = 3 needs RAAR;
    K = 4: RAAR 320 iterations to 1e-14, hybrid 370, ER 650-950).
    """
    if mask_count == 1:
        return "hio"  # one pattern: HIO with a support (shrink-wrapped when none is given)
    return "raar" if mask_count <= 4 else "hybrid"



def _run_hybrid(ws, x, n, cons, residuals, stopper, deadline, truth, errors, beta=0.9,
                switch_residual=HYBRID_SWITCH_RESIDUAL, stall_fraction=HYBRID_STALL_FRACTION):
    """RAAR until the residual is below ``switch_residual`` (or RAAR stalls), then ER."""
    sw = _SwitchStopper(stopper, switch_residual, stall_fraction)
    x, it1 = _run_raar(ws, x, n, cons, residuals, sw, deadline, truth, errors, beta=beta)
    if sw.reason != "switch" or it1 >= n or (deadline is not None and time.perf_counter() >= deadline):
        stopper.reason = stopper.reason or sw.reason
        return x, it1
    x, it2 = _run_er(ws, x, n - it1, cons, residuals, stopper, deadline, truth, errors)
    return x, it1 + it2



def solve(intensities, masks, *, method: str = "auto", iterations: int | None = None, x0=None,
          noise_model: str = "amplitude", support=None, nonnegative: bool = False, dtype=None,
          tol: float | None = None, stall_tol: float = 0.0, time_budget_s: float | None = None,
          beta: float = 0.9, init_iterations: int = 20, er_warmup: int = 100, truth=None, seed: int = 0,
          fft_backend: str = "auto", propagation=None, prior: str | None = None,
          prior_weight: float | None = None) -> SolveResult:
    """Recover x from y_k = |F(m_k x)|^2.

    Parameters
    ----------
    intensities : (K, H, W) real, photon counts (negative values, e.g. after
        dark subtraction, are clamped to 0).
    masks : (K, H, W) complex mask family.
    method : "auto" ("hybrid", or "raar" for K <= 4 masks; "poisson" when
        noise_model="poisson", "wf" when noise_model="gaussian"), "hybrid",
        "er", "raar", "wf", "poisson" (see the module docstring).
    iterations : maximum iterations (defaults per method: er/raar 500,
        wf 2000, poisson 200 L-BFGS steps).
    x0 : starting estimate (H, W); default the spectral initialization.
    noise_model : "amplitude" (default; least squares on sqrt(y), near-ML for
        Poisson and Gaussian-in-amplitude noise), "poisson" (selects the
        Poisson-likelihood method under "auto"), "gaussian" (Gaussian
        intensity noise: selects Wirtinger flow under "auto").
    support, nonnegative : optional constraints.
    dtype : None (default: the precision of the inputs, ``validation.working_dtype``:
        complex64 when the intensities and masks are single precision, e.g. float32
        frames with complex64 masks; complex128 when either is double), or
        complex64 (fast; relative errors down to ~1e-6) / complex128 (1e-10 and below)
        to choose.
    iterations : a budget, not a target: the run stops earlier when ``tol`` is met,
        when the residual sits at the rounding floor of the precision in use, or when
        ``stall_tol`` / ``time_budget_s`` say so; ``result.stop_reason`` says which.
    tol : stop when the relative amplitude residual falls below this
        (default ``DEFAULT_TOLERANCE``: 1e-14 for complex128, 3e-7 for complex64).
    stall_tol : if > 0, stop when the residual improves by less than this
        fraction over 20 iterations (useful on noisy data).
    time_budget_s : wall-clock cap on the iterations.
    beta : RAAR relaxation (0 < beta < 1), used by "raar" and "hybrid".
    init_iterations : power iterations of the spectral start (20: each
        costs about one ER iteration; more do not pay on K >= 6 problems).
    er_warmup : ER iterations before the Poisson L-BFGS (when no x0).
    seed : seed of the spectral start's random vector (results are
        deterministic for a given seed).
    fft_backend : "auto" (checked, measured and kept), "fftw-1", "fftw-all", "numpy", "scipy-1",
        "scipy-all" or "mkl" (see ``maskrun.reconstruct.fft``).
    propagation : None (far field, the default) or a
        ``propagation.NearField(wavelength_m, pixel_pitch_m, distance_m)``
        for a camera in the near field (angular-spectrum model).
    prior : None, or "tv" (total variation of the field, i.e. of amplitude and phase, added to the
        Poisson likelihood: for low-dose data; implies method "poisson"; ``reconstruct/priors.py``).
    prior_weight : the prior's weight lambda; None = chosen by the discrepancy principle.
    truth : optional true object; then ``result.errors`` tracks the
        relative error per iteration (costs time; for tests and benchmarks).
    """
    t_start = time.perf_counter()
    if method not in METHODS:
        raise ReconstructionInputError(f"unknown method {method!r}; choose one of {METHODS}.")
    if noise_model not in NOISE_MODELS:
        raise ReconstructionInputError(f"unknown noise_model {noise_model!r}; choose one of {NOISE_MODELS}.")
    dt = working_dtype(dtype, intensities, masks)
    m = check_masks(masks, warn_k1=False)
    if prior not in (None, "tv"):
        raise ReconstructionInputError(f"unknown prior {prior!r}; choose None or 'tv'.")
    if prior is not None:
        if method not in ("auto", "poisson"):
            raise ReconstructionInputError(f"prior={prior!r} regularises the Poisson likelihood: use method='poisson' "
                                           f"(or 'auto'), not {method!r}.")
        if nonnegative:
            raise ReconstructionInputError("prior='tv' does not take nonnegative=True; use a support, or no prior.")
        if prior_weight is not None and not (np.isfinite(prior_weight) and prior_weight >= 0):
            raise ReconstructionInputError(f"prior_weight must be a finite number >= 0 or None; got {prior_weight}.")
        method = "poisson"
    if method == "auto":
        method = {"poisson": "poisson", "gaussian": "wf"}.get(noise_model, default_method(m.shape[0]))
    if m.shape[0] == 1 and method != "hio" and support is None:
        warn_single_pattern()
    y = check_intensities(intensities, m.shape)
    ws = Workspace(m, dt, fft_backend, propagation=propagation)
    ws.set_intensities(y)
    cons = _Constraints(support, nonnegative, m.shape[1:], dt)
    if iterations is None:
        iterations = DEFAULT_ITERATIONS[method]
    if int(iterations) < 0:
        raise ReconstructionInputError(f"iterations must be >= 0; got {iterations}.")
    if tol is None:
        tol = DEFAULT_TOLERANCE[dt]
    if x0 is None and method == "hio":
        x = None  # HIO starts from random phases on the measured magnitudes (hio._random_start)
    elif x0 is None:
        x = spectral_initialization(ws, init_iterations, seed)
    else:
        x = check_object(x0, m.shape[1:], name="x0").astype(dt)
    if cons.active and x is not None:
        cons(x)
    truth_arr = None if truth is None else check_object(truth, m.shape[1:], name="truth")
    residuals: list[float] = []
    errors: list[float] = []
    stopper = _Stopper(tol, stall_tol, floor=PRECISION_FLOOR[dt])
    deadline = None if time_budget_s is None else t_start + float(time_budget_s)
    args = (ws, x, int(iterations), cons, residuals, stopper, deadline, truth_arr, errors)
    if method == "hio":  # Fienup's HIO with a (given or shrink-wrapped) support: reconstruct/hio.py
        from . import hio

        out = hio.run_hio(ws, x0 if x0 is None else x, int(iterations), support, nonnegative, residuals, stopper,
                          deadline, truth_arr, errors, hio.HIOSettings(beta=beta), seed=seed,
                          single_pattern=m.shape[0] == 1)
        x, it = out.estimate, out.iterations
    elif method == "hybrid":
        x, it = _run_hybrid(*args, beta=beta)
    elif method == "er":
        x, it = _run_er(*args)
    elif method == "raar":
        if not 0 < beta < 1:
            raise ReconstructionInputError(f"RAAR beta must be in (0, 1); got {beta}.")
        x, it = _run_raar(*args, beta=beta)
    elif method == "wf":
        x, it = _run_wf(*args)
    else:
        if x0 is None and er_warmup > 0:
            warm = _Stopper(tol, 1e-4)
            x, _ = _run_er(ws, x, er_warmup, cons, [], warm, deadline, None, [])
        if prior == "tv":
            from .priors import run_poisson_tv

            x, it = run_poisson_tv(ws, x, int(iterations), cons, residuals, stopper, deadline, truth_arr, errors,
                                   weight=prior_weight)
        else:
            x, it = _run_poisson(*args)
    x = np.asarray(x, dtype=dt)
    x *= ws.lit
    if not np.all(np.isfinite(x)):
        raise FloatingPointError(f"solver {method!r} diverged (non-finite estimate); try method='er'.")
    return SolveResult(estimate=x, residuals=np.asarray(residuals), method=method, iterations=it,
                       converged=stopper.reason in CONVERGED_REASONS, elapsed_s=time.perf_counter() - t_start,
                       errors=np.asarray(errors) if truth is not None else None,
                       stop_reason=stop_reason(stopper.reason, it, iterations, deadline))


def stop_reason(reason: str, done: int, budget: int, deadline) -> str:
    """Why a run stopped, in words: the stopper's reason, else "time budget" when the deadline
    passed, else "iterations" (the budget was used up)."""
    if reason and reason != "switch":
        return reason
    if deadline is not None and time.perf_counter() >= deadline and done < budget:
        return "time budget"
    return "iterations"
