"""Incremental reconstruction: one frame set at a time, warm-started.

``IncrementalEngine`` is what the daemon's reconstruction worker holds. Each
``update(frame_set)`` folds one complete frame set (one frame per mask) into
its data, runs a bounded amount of work from the previous estimate, and
returns an ``EngineUpdate``.

Modes
-----
``"accumulate"`` (static sample): the data are the mean of all frame sets so
    far, so the shot noise falls as 1/sqrt(passes) and the estimate sharpens.
    The first update starts from the spectral estimate with the hybrid
    method (RAAR then ER); later updates polish with error reduction (the
    estimate is already close, and ER settles on the least-squares point).
    With K <= 4 masks every update uses RAAR (ER stagnates there).
``"follow"`` (alignment, moving sample): the data are the mean of the last
    ``window`` frame sets only; every update runs the hybrid method from the
    previous estimate (RAAR for K <= 4), so the estimate tracks changes.

Units: the estimate is in sqrt(counts per frame set), the same units as
sqrt(intensities) of one frame set. Negative intensities (normal after dark
subtraction) are clamped to 0. ``photons`` is the total photon count in the
data used (all masks, all frame sets used), and ``error_estimate`` is the
shot-noise rule sqrt(pixels/photons) (see ``bounds``), pixels being the
illuminated pixels (or the support size if a support is given).

Work per update is bounded by ``iterations_per_update`` and, if given, by
``time_budget_s`` (wall clock for the whole update including set-up; at
least one iteration always runs). The engine computes on one core (one
thread, single-threaded FFTs) so that acquisition on the same machine keeps
the other; ``solve`` uses all cores when that measures faster.
"""
from __future__ import annotations

import collections
import time
from dataclasses import dataclass

import numpy as np

from . import solvers as _s
from .bounds import shot_noise_relative_error
from .validation import ReconstructionInputError, check_intensities, check_masks, warn_single_pattern, working_dtype

__all__ = ["IncrementalEngine", "EngineUpdate", "ENGINE_MODES", "update_method"]

ENGINE_MODES = ("accumulate", "follow")
# Power iterations for the very first estimate (each costs about one ER
# iteration); 15 already reach the shot-noise floor on the 128x128 and
# 256x256 demo problems after 35 hybrid iterations.
SPECTRAL_START_ITERATIONS = 15


def update_method(method: str, mask_count: int, *, warm_start: bool, accumulating: bool) -> str:
    """The solver one engine update runs.

    "auto" is the K-dependent default from scratch (``solvers.default_method``:
    hybrid, or RAAR for K <= 4); once an accumulating engine has an estimate,
    a hybrid default becomes error reduction from the warm start (the RAAR
    phase would only wander away from an estimate that is already close).
    Any other method is used as given. The reconstruction worker calls this
    too, so a live update and an offline one choose alike.
    """
    if method != "auto":
        return method
    chosen = _s.default_method(mask_count)
    if chosen == "hybrid" and warm_start and accumulating:
        return "er"
    return chosen


@dataclass
class EngineUpdate:
    """Result of one ``IncrementalEngine.update`` call."""

    estimate: np.ndarray      # complex (H, W), same units as sqrt(counts)
    residual: float           # relative data residual of the last iteration
    error_estimate: float     # predicted relative error from the photon count (shot-noise rule)
    iterations: int
    passes_used: int          # frame sets in the data used (accumulate: all so far; follow: window)
    photons: float            # total photons in the data used
    elapsed_s: float


class IncrementalEngine:
    """Warm-started phase retrieval fed one frame set at a time.

    Parameters
    ----------
    masks : (K, H, W) complex mask family (validated once here).
    mode : "accumulate" or "follow" (see module docstring).
    window : frame sets averaged in follow mode (>= 1).
    iterations_per_update : maximum iterations per update (>= 1).
    time_budget_s : optional wall-clock cap per update (seconds, > 0).
    method : "auto" (hybrid first, ER polish in accumulate mode), or any
        solver method name ("hybrid", "er", "raar", "wf", "poisson").
    dtype : None (default: the precision of the masks, as ``solve`` follows its inputs:
        complex64 masks compute in complex64, complex128 masks in complex128), or
        complex64 / complex128 to choose (the daemon's worker asks for complex64).
    support, nonnegative : optional constraints as in ``solve``.
    seed : seed of the spectral initialization.
    propagation : None (far field) or ``NearField(...)`` (camera in the near field).
    """

    def __init__(self, masks, *, mode="accumulate", window=1, iterations_per_update=50,
                 time_budget_s=None, method="auto", dtype=None, support=None,
                 nonnegative=False, seed=0, propagation=None):
        if mode not in ENGINE_MODES:
            raise ReconstructionInputError(f"mode must be one of {ENGINE_MODES}; got {mode!r}.")
        if int(window) != window or window < 1:
            raise ReconstructionInputError(f"window must be a positive integer number of frame sets; got {window}.")
        if int(iterations_per_update) != iterations_per_update or iterations_per_update < 1:
            raise ReconstructionInputError(f"iterations_per_update must be a positive integer; got {iterations_per_update}.")
        if time_budget_s is not None and not (np.isfinite(time_budget_s) and time_budget_s > 0):
            raise ReconstructionInputError(f"time_budget_s must be a positive number of seconds or None; got {time_budget_s}.")
        if method not in _s.METHODS:
            raise ReconstructionInputError(f"unknown method {method!r}; choose one of {_s.METHODS}.")
        self.mode = mode
        self.window = int(window)
        self.iterations_per_update = int(iterations_per_update)
        self.time_budget_s = time_budget_s
        self.method = method
        self.dtype = working_dtype(dtype, masks)
        self.seed = seed
        m = check_masks(masks, warn_k1=False)
        if m.shape[0] == 1 and method not in ("auto", "hio") and support is None:
            warn_single_pattern()
        # one core: the engine runs beside acquisition, which must never wait
        # for it (the 256x256, K = 8 update target is set for one core too)
        self._ws = _s.Workspace(m, self.dtype, fft_backend=_s._single_thread_backend(m.shape, self.dtype),
                                threads=1, propagation=propagation)
        self.shape = m.shape
        self._cons = _s._Constraints(support, nonnegative, m.shape[1:], self.dtype)
        lit = self._ws.lit if self._cons.support is None else (self._ws.lit & (self._cons.support > 0))
        self.pixels = int(np.count_nonzero(lit))
        self._given_support = None if self._cons.support is None else self._cons.support > 0
        self.reset()

    # ------------------------------------------------------------------
    def reset(self) -> None:
        """Forget all data and the estimate (next update starts from scratch)."""
        self._x: np.ndarray | None = None
        self._sum = np.zeros(self.shape, np.float64)
        self._count = 0
        self._recent: collections.deque = collections.deque()
        self.updates = 0
        self._hio_support = getattr(self, "_given_support", None)

    @property
    def estimate(self) -> np.ndarray | None:
        """The current estimate (copy), or None before the first update."""
        return None if self._x is None else self._x.copy()

    @property
    def passes_used(self) -> int:
        return self._count

    def _fold_in(self, y: np.ndarray) -> None:
        self._sum += y
        self._count += 1
        if self.mode == "follow":
            self._recent.append(y)
            while len(self._recent) > self.window:
                self._sum -= self._recent.popleft()
                self._count -= 1
            if self._count == 1:  # avoid drift of the running sum
                self._sum[...] = self._recent[0]

    def update(self, intensities) -> EngineUpdate:
        """Fold in one frame set (K, H, W) of photon counts and refine the estimate."""
        t0 = time.perf_counter()
        deadline = None if self.time_budget_s is None else t0 + float(self.time_budget_s)
        y = check_intensities(intensities, self.shape, dtype=np.float64)
        self._fold_in(y)
        ws = self._ws
        data = self._sum / self._count
        ws.set_intensities(data)
        photons = float(self._sum.sum())
        residuals: list[float] = []
        n = self.iterations_per_update
        stopper = _s._Stopper(_s.DEFAULT_TOLERANCE[self.dtype], 0.0)
        cons = self._cons
        first = self._x is None
        method = update_method(self.method, self.shape[0], warm_start=not first,
                               accumulating=self.mode == "accumulate")
        if first and method == "hio":
            x = None  # HIO starts from random phases (hio._random_start)
        elif first:
            x = _s.spectral_initialization(ws, SPECTRAL_START_ITERATIONS, self.seed)
            if cons.active:
                cons(x)
        else:
            x = self._x
        args = (ws, x, n, cons, residuals, stopper, deadline, None, [])
        if method == "hio":  # one pattern: the support found by the first update is kept (reconstruct/hio.py)
            from . import hio

            out = hio.run_hio(ws, x, n, self._hio_support, cons.nonnegative, residuals, stopper, deadline, None,
                              [], seed=self.seed, single_pattern=self.shape[0] == 1,
                              check_sampling=self._hio_support is self._given_support)
            self._hio_support = out.support
            x, it = out.estimate, out.iterations
        elif method == "hybrid":
            x, it = _s._run_hybrid(*args)
        elif method == "er":
            x, it = _s._run_er(*args)
        elif method == "raar":
            x, it = _s._run_raar(*args)
        elif method == "wf":
            x, it = _s._run_wf(*args)
        else:
            x, it = _s._run_poisson(*args)
        x = np.asarray(x, dtype=self.dtype)
        x *= ws.lit
        if not np.all(np.isfinite(x)):
            self._x = None
            raise FloatingPointError(
                f"the {method!r} iteration diverged on this frame set; the engine was restarted from scratch "
                "for the next update (check the frame set for saturation or wrong mask order)."
            )
        self._x = x
        self.updates += 1
        # residual of the iterate entering the last iteration (free; one more
        # forward transform would cost half an iteration)
        residual = residuals[-1] if residuals else ws.residual_of(x)
        return EngineUpdate(
            estimate=x.copy(),
            residual=residual,
            error_estimate=shot_noise_relative_error(self.pixels, photons),
            iterations=int(it),
            passes_used=self._count,
            photons=photons,
            elapsed_s=time.perf_counter() - t0,
        )
