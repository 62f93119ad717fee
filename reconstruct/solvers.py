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

from . import kernels
from .fft import FFTPlan, PropagatorPlan, aligned_empty
from .metrics import norm as _norm
from .metrics import relative_error
from .validation import (
    ReconstructionInputError,
    warn_single_pattern,
    check_dtype,
    working_dtype,
    check_intensities,
    check_masks,
    check_object,
)

__all__ = ["solve", "SolveResult", "spectral_initialization", "METHODS", "Workspace", "default_method"]

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
# stop reasons that mean "converged" (the others: "iterations", "time budget", "stalled", ...)
CONVERGED_REASONS = ("tolerance", "converged", "precision floor")
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


_POOL = None
_THREAD_CHOICE: dict[tuple, int] = {}
_THREAD_MEASURE_MIN_ELEMENTS = 8 * 96 * 96


def _thread_pool(n: int):
    global _POOL
    if _POOL is None or _POOL._max_workers < n:
        from concurrent.futures import ThreadPoolExecutor

        _POOL = ThreadPoolExecutor(max_workers=n, thread_name_prefix="maskrun-recon")
    return _POOL


def _single_thread_backend(shape, dtype) -> str:
    """Fastest single-threaded FFT backend for a chunk (checked, ranked and kept by the fft module)."""
    from . import fft as _fft

    return _fft._choose(tuple(shape), dtype, unitary=False, single_thread=True)


def _choose_threads(ws: "Workspace") -> int:
    from . import fft as _fft

    cores = _fft._cpu_workers()
    K = ws.shape[0]
    if cores < 2 or K < 2 or int(np.prod(ws.shape)) < _THREAD_MEASURE_MIN_ELEMENTS:
        return 1
    key = (tuple(ws.shape), ws.dtype.str, cores, ws.transfer is not None)
    if key in _THREAD_CHOICE:
        return _THREAD_CHOICE[key]
    rng = np.random.default_rng(0)
    H, W = ws.shape[1:]
    x = (rng.standard_normal((H, W)) + 1j * rng.standard_normal((H, W))).astype(ws.dtype)
    saved = ws.sqrty.copy(), ws.norm_sqrty
    ws.sqrty[...] = 1.0
    ws.norm_sqrty = float(np.sqrt(ws.sqrty.size))
    times = {}
    unconstrained = _Constraints(None, False, ws.shape[1:], ws.dtype)
    for n in (1, min(cores, K)):
        ws._set_threads(n)
        _run_er(ws, x, 1, unconstrained, [], _Stopper(-1.0, 0.0), None, None, [])
        best = np.inf
        for _ in range(3):  # an ER iteration as the solvers run it (fused loop with one chunk)
            t0 = time.perf_counter()
            _run_er(ws, x, 2, unconstrained, [], _Stopper(-1.0, 0.0), None, None, [])
            best = min(best, time.perf_counter() - t0)
        times[n] = best
    ws.sqrty[...], ws.norm_sqrty = saved
    choice = min(times, key=times.get)
    _THREAD_CHOICE[key] = choice
    return choice


class Workspace:
    """Masks, data and preallocated buffers for one problem size.

    Holds masks and their conjugates divided by w in the working dtype, the
    measured amplitudes sqrt(y), and (K, H, W) buffers reused by every
    iteration. The FFT plans are unnormalised (``fft_scale`` = sqrt(H W) times
    the unitary DFT, which FFTW cannot scale without an extra pass), and
    ``masks`` and ``masks_conj_w`` carry ``1/fft_scale``: ``plan.forward(masks * x)``
    is exactly the unitary A x and ``conj_mask_sum(plan.inverse(z), masks_conj_w)``
    exactly (A^*A)^{-1} A^* z, with no pass of its own for the scaling.
    ``weight`` and ``inv_weight`` are the true mask weights. ``set_intensities`` swaps the data in place (the incremental
    engine uses this to warm-start without reallocating).
    """

    def __init__(self, masks: np.ndarray, dtype=np.complex64, fft_backend: str = "auto", threads: int | str = "auto",
                 propagation=None):
        self.dtype = check_dtype(dtype)
        self.real_dtype = np.float32 if self.dtype == np.complex64 else np.float64
        m = np.asarray(masks)
        self.shape = m.shape
        w = np.sum(np.abs(m.astype(np.complex128)) ** 2, axis=0)
        self.weight = w
        self.weight_r = w.astype(self.real_dtype)
        self.lit = w > 0
        inv_w = np.where(self.lit, 1.0 / np.where(self.lit, w, 1.0), 0.0)
        self.inv_weight = inv_w.astype(self.real_dtype)  # 1/w where lit, 0 elsewhere
        self.mean_weight = float(w.mean())
        self.propagation = propagation
        self.transfer = None if propagation is None else propagation.transfer(self.shape)
        self.plan = self._wrap(FFTPlan(self.shape, self.dtype, fft_backend, unitary=False))
        self.fft_scale = self.plan.scale  # the same for every plan of this (H, W)
        self.masks = (m / self.fft_scale).astype(self.dtype)
        self.masks_conj_w = (np.conj(m) * (inv_w / self.fft_scale)).astype(self.dtype)
        self.Z = aligned_empty(self.shape, self.dtype)
        self.sqrty = np.zeros(self.shape, self.real_dtype)
        self.y = np.zeros(self.shape, self.real_dtype)
        self.norm_sqrty = 1.0
        self.tiny = self.real_dtype(np.finfo(self.real_dtype).tiny * 1e3)
        kernels.accelerated()  # load (or compile) the fused kernels now, not inside the chunk threads
        self._set_threads(threads, fft_backend)

    def _wrap(self, plan):
        """Far field: the plain unitary DFT; near field: the angular-spectrum propagator."""
        return plan if self.transfer is None else PropagatorPlan(plan, self.transfer)

    # --- splitting the K masks over threads -----------------------------
    def _set_threads(self, threads, fft_backend: str = "auto") -> None:
        """Split the masks into chunks, one per thread (1 = no threading).

        "auto" measures a few ER iterations serially (with the best batched
        FFT, possibly itself multi-threaded) and split over all cores (each
        chunk with a single-threaded FFT), and keeps the faster; the choice
        is cached per (shape, dtype) like the FFT backend.
        """
        K = self.shape[0]
        if threads == "auto":
            threads = _choose_threads(self)
        threads = max(1, min(int(threads), K))
        self.threads = threads
        bounds = np.linspace(0, K, threads + 1).round().astype(int)
        self.chunks = [slice(int(a), int(b)) for a, b in zip(bounds[:-1], bounds[1:])]
        # one (H, W) buffer per extra chunk for its partial sum over masks (chunk 0 writes the result)
        self.partials = [np.empty(self.shape[1:], self.dtype) for _ in self.chunks[1:]]
        if threads == 1:
            self.chunk_plans = [self.plan]
        else:
            backend = fft_backend if fft_backend in ("numpy", "scipy-1", "fftw-1", "mkl") else None
            self.chunk_plans = [
                self._wrap(FFTPlan((c.stop - c.start,) + tuple(self.shape[1:]), self.dtype,
                                   backend or _single_thread_backend((c.stop - c.start,) + tuple(self.shape[1:]),
                                                                     self.dtype), unitary=False))
                for c in self.chunks
            ]

    def map_chunks(self, fn):
        """Run fn(chunk_slice, plan) for every chunk (in parallel if threaded); return the results."""
        if self.threads == 1:
            return [fn(self.chunks[0], self.chunk_plans[0])]
        pool = _thread_pool(self.threads)
        futures = [pool.submit(fn, c, p) for c, p in zip(self.chunks[1:], self.chunk_plans[1:])]
        first = fn(self.chunks[0], self.chunk_plans[0])
        return [first] + [f.result() for f in futures]

    def sum_buffer(self, c: slice, out: np.ndarray) -> np.ndarray:
        """Where chunk ``c`` writes its partial sum over masks: ``out`` for the first chunk."""
        i = self.chunks.index(c)
        return out if i == 0 else self.partials[i - 1]

    def add_partials(self, out: np.ndarray) -> np.ndarray:
        """out += the other chunks' partial sums (after map_chunks); return out."""
        for p in self.partials:
            out += p
        return out

    def set_intensities(self, y: np.ndarray) -> None:
        self.y[...] = y
        np.sqrt(self.y, out=self.sqrty)
        self.norm_sqrty = float(np.sqrt(np.sum(self.y, dtype=np.float64)))

    # --- operators -------------------------------------------------------
    def apply(self, x: np.ndarray, out: np.ndarray) -> np.ndarray:
        """out = A x (K, H, W)."""
        np.multiply(self.masks, x, out=out)
        return self.plan.forward(out)

    def pseudo_inverse(self, z: np.ndarray) -> np.ndarray:
        """(A^*A)^{-1} A^* z; destroys z. Returns a new (H, W) array."""
        self.plan.inverse(z)
        return kernels.conj_mask_sum(z, self.masks_conj_w, np.empty(self.shape[1:], self.dtype))

    def magnitude_project(self, z: np.ndarray, out: np.ndarray) -> float:
        """out = sqrt(y) * z/|z| (out may be z); return the relative amplitude residual of z."""
        if out is not z:
            out[...] = z
        return float(np.sqrt(kernels.amplitude_project(out, self.sqrty, self.tiny))) / self.norm_sqrty

    def residual_of(self, x: np.ndarray) -> float:
        """Relative amplitude residual || |A x| - sqrt(y) || / || sqrt(y) || (uses the Z buffer)."""
        return self.magnitude_project(self.apply(x, self.Z), self.Z)


class _Constraints:
    def __init__(self, support, nonnegative: bool, shape, dtype):
        self.support = None
        if support is not None:
            s = np.asarray(support)
            if s.shape != tuple(shape):
                raise ReconstructionInputError(f"support shape {s.shape} does not match the grid {tuple(shape)}.")
            s = s.astype(bool)
            if not s.any():
                raise ReconstructionInputError("support is empty (all False): nothing would be reconstructed.")
            self.support = s.astype(np.float32 if dtype == np.complex64 else np.float64)
        self.nonnegative = bool(nonnegative)

    @property
    def active(self) -> bool:
        return self.support is not None or self.nonnegative

    def __call__(self, x: np.ndarray) -> np.ndarray:
        if self.support is not None:
            x *= self.support
        if self.nonnegative:
            s = x.sum()
            if s != 0:
                x *= np.conj(s) / abs(s)
            np.maximum(x.real, 0, out=x.real)
            x.imag[...] = 0
        return x


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


# ---------------------------------------------------------------------------
# iteration kernels: each advances x by n iterations, appending residuals.
# ---------------------------------------------------------------------------

class _Stopper:
    """When to stop: residual <= tol ("tolerance"); residual improving by less than stall_tol
    over ``window`` iterations ("stalled"); and, when ``floor`` > 0, residual below the rounding
    floor of the working precision and no longer improving by 1 % over the window
    ("precision floor": the tolerance cannot be met in this precision, more iterations only
    spend the budget)."""

    def __init__(self, tol: float, stall_tol: float, window: int = 20, floor: float = 0.0):
        self.tol, self.stall_tol, self.window, self.floor = tol, stall_tol, window, floor
        self.reason = ""

    def done(self, residuals: list) -> bool:
        r = residuals[-1]
        if not np.isfinite(r):
            return False
        if r <= self.tol:
            self.reason = "tolerance"
            return True
        if self.floor > 0 and r <= self.floor and len(residuals) > self.window \
                and residuals[-1 - self.window] - r <= 0.01 * residuals[-1 - self.window]:
            self.reason = "precision floor"
            return True
        if self.stall_tol > 0 and len(residuals) > self.window:
            prev = residuals[-1 - self.window]
            if prev - r <= self.stall_tol * prev:
                self.reason = "stalled"
                return True
        return False


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


class _RAARState:
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


def default_method(mask_count: int) -> str:
    """The amplitude-model method "auto" picks: "raar" for K <= 4 masks, else "hybrid".

    With K <= 4, ER (and so the ER end of the hybrid) converges slowly or
    stagnates, RAAR does not (64x64 objects, octanary masks: K = 3 needs RAAR;
    K = 4: RAAR 320 iterations to 1e-14, hybrid 370, ER 650-950).
    """
    if mask_count == 1:
        return "hio"  # one pattern: HIO with a support (shrink-wrapped when none is given)
    return "raar" if mask_count <= 4 else "hybrid"


class _SwitchStopper(_Stopper):
    """Stops the RAAR phase of the hybrid: overall tolerance met, in the ER basin, or RAAR stalled."""

    def __init__(self, outer: _Stopper, switch_residual: float, stall_fraction: float, window: int = 20):
        super().__init__(outer.tol, 0.0, window)
        self.outer = outer
        self.switch_residual = switch_residual
        self.stall_fraction = stall_fraction

    def done(self, residuals: list) -> bool:
        if self.outer.done(residuals):
            self.reason = self.outer.reason
            return True
        r = residuals[-1]
        if np.isfinite(r) and r <= self.switch_residual:
            self.reason = "switch"
            return True
        if len(residuals) > self.window:
            prev = residuals[-1 - self.window]
            if prev - r <= self.stall_fraction * prev:
                self.reason = "switch"
                return True
        return False


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


def _dot(a: np.ndarray, b: np.ndarray) -> float:
    return float(np.einsum("i,i->", a, b))


def _lbfgs(fg, v0: np.ndarray, maxiter: int, *, m: int = 20, gtol: float = 0.0, ftol: float = 1e-15,
           step0: float = 1.0, deadline=None, on_step=None):
    """Unconstrained L-BFGS (two-loop recursion, Armijo backtracking) in plain numpy.

    Used instead of scipy's L-BFGS-B for unconstrained problems: that one's
    inner BLAS calls were seen to cost ~1.6 ms per step on the shared 2-core
    machine for a 128-variable problem. Returns (v, iterations, reason).
    Nocedal & Wright, Numerical Optimization (2006), Algorithm 7.4/7.5.
    """
    v = v0.copy()
    f, g = fg(v)
    hist: list[tuple[np.ndarray, np.ndarray, float]] = []
    reason = "iterations"
    it = 0
    for it in range(1, maxiter + 1):
        q = g.copy()
        alphas = []
        for s_, y_, rho in reversed(hist):
            a = rho * _dot(s_, q)
            q -= a * y_
            alphas.append(a)
        if hist:
            s_, y_, _ = hist[-1]
            q *= _dot(s_, y_) / _dot(y_, y_)
        else:
            q *= step0
        for (s_, y_, rho), a in zip(hist, reversed(alphas)):
            b = rho * _dot(y_, q)
            q += (a - b) * s_
        d = -q
        gd = _dot(g, d)
        if not gd < 0:  # not a descent direction: restart from steepest descent
            hist.clear()
            d = -step0 * g
            gd = _dot(g, d)
            if not gd < 0:
                reason = "converged"
                break
        t = 1.0
        while True:
            f_new, g_new = fg(v + t * d)
            if np.isfinite(f_new) and f_new <= f + 1e-4 * t * gd:
                break
            t *= 0.5
            if t < 1e-20:
                return v, it, "line search failed (converged to precision)"
        s_new = t * d
        y_new = g_new - g
        sy = _dot(s_new, y_new)
        if sy > 1e-12 * np.sqrt(_dot(s_new, s_new) * _dot(y_new, y_new)):
            hist.append((s_new, y_new, 1.0 / sy))
            if len(hist) > m:
                hist.pop(0)
        v = v + s_new
        f_old, f, g = f, f_new, g_new
        if on_step is not None:
            on_step(v)
        if abs(f_old - f) <= ftol * max(abs(f), abs(f_old), 1.0):
            reason = "converged"
            break
        if float(np.max(np.abs(g))) <= gtol:
            reason = "converged"
            break
        if deadline is not None and time.perf_counter() >= deadline:
            reason = "time budget"
            break
    return v, it, reason


def _run_poisson(ws, x, n, cons, residuals, stopper, deadline, truth, errors, floor_fraction=1e-12):
    """L-BFGS on the Poisson negative log-likelihood (float64 internally)."""
    from scipy.optimize import minimize

    K, H, W = ws.shape
    masks = ws.masks.astype(np.complex128) * ws.fft_scale  # the true masks: this plan is unitary
    masks_c = np.conj(masks)
    y = ws.y.astype(np.float64)
    plan = FFTPlan(ws.shape, np.complex128)
    if ws.transfer is not None:
        plan = PropagatorPlan(plan, ws.transfer)
    Z = np.empty(ws.shape, np.complex128)
    mean_y = float(y.mean())
    eps = max(floor_fraction * mean_y, 1e-300)
    sup = cons.support.astype(bool) if cons.support is not None else None
    nonneg = cons.nonnegative
    sqrty64 = np.sqrt(y)
    pos = y > 0
    norm_sqrty = float(_norm(sqrty64))
    n_real = H * W if nonneg else 2 * H * W

    def unpack(v):
        if nonneg:
            return v.reshape(H, W).astype(np.complex128)
        return (v[: H * W] + 1j * v[H * W:]).reshape(H, W)

    def fun(v):
        xx = unpack(v)
        if sup is not None:
            xx = xx * sup
        np.multiply(masks, xx, out=Z)
        plan.forward(Z)
        mu = Z.real**2 + Z.imag**2
        amp = np.sqrt(mu)
        residuals.append(float(_norm(sqrty64 - amp)) / norm_sqrty)
        mu_e = mu + eps
        # NLL minus its saturated value (y log y - y): zero at a perfect fit,
        # so L-BFGS's relative ftol test stays meaningful near the optimum.
        f = float(np.sum(mu_e - y) - np.sum(y[pos] * np.log(mu_e[pos] / y[pos])))
        np.multiply(Z, 1.0 - y / mu_e, out=Z)
        plan.inverse(Z)
        np.multiply(Z, masks_c, out=Z)
        g = 2.0 * Z.sum(axis=0)  # gradient wrt real and imaginary parts
        if sup is not None:
            g *= sup
        if nonneg:
            return f, g.real.ravel()
        return f, np.concatenate([g.real.ravel(), g.imag.ravel()])

    xs = x.astype(np.complex128)
    if nonneg:
        v0 = xs.real.ravel().copy()
    else:
        v0 = np.concatenate([xs.real.ravel(), xs.imag.ravel()])
    bounds = [(0, None)] * n_real if nonneg else None
    count = {"n": 0}

    def callback(intermediate_result):
        count["n"] += 1
        if truth is not None:
            errors.append(relative_error(truth, unpack(intermediate_result.x)))
        if deadline is not None and time.perf_counter() >= deadline:
            raise StopIteration

    gtol = 1e-12 * max(mean_y, 1e-30)
    if nonneg:  # bound constraints: scipy's L-BFGS-B
        res = minimize(fun, v0, jac=True, method="L-BFGS-B", bounds=bounds, callback=callback,
                       options={"maxiter": n, "maxcor": 20, "ftol": 1e-15, "gtol": gtol})
        stopper.reason = "converged" if res.success else str(res.message)
        v_best, nit = res.x, int(res.nit)
    else:
        v_best, nit, stopper.reason = _lbfgs(fun, v0, n, gtol=gtol, ftol=1e-15,
                                             step0=1.0 / (4.0 * ws.mean_weight), deadline=deadline,
                                             on_step=(lambda v: errors.append(relative_error(truth, unpack(v))))
                                             if truth is not None else None)
    xr = unpack(v_best)
    if sup is not None:
        xr = xr * sup
    return xr.astype(ws.dtype), max(count["n"], nit)


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
