"""Phase-retrieval solvers for multi-mask (coded diffraction) data.

Model: y_k = |A_k x|^2 with A_k = F diag(m_k), F the unitary DFT. Because F
is unitary, A^*A = diag(w) with w = sum_k |m_k|^2, so the least-squares
projection onto the range of A costs one batched inverse FFT and a divide.

Methods (``method=``):

``"hybrid"``  The default (``"auto"``): RAAR for the first 25 iterations
              (it leaves the spectral start fast, where ER stalls for ~100
              iterations on natural images), then error reduction (whose
              linear rate near the solution is faster than RAAR's, and which
              settles exactly on the amplitude least-squares point for noisy
              data). Wins both "iterations to 1e-6" and "to 1e-10" in
              bench/recon_bench.py.
``"er"``      Error reduction (Gerchberg & Saxton 1972; Fienup 1982) for many
              masks: replace the Fourier magnitudes by sqrt(y), average the K
              back-transformed fields weighted by conj(m_k)/w. Monotone on the
              amplitude loss, 2K FFTs per iteration, the cheapest iteration.
              With >= 6 octanary masks it converges linearly to machine
              precision, but from a spectral start on a natural image it can
              plateau near 100 % error for ~100 iterations first.
``"raar"``    Relaxed averaged alternating reflections (Luke 2005) in the
              lifted Fourier space, beta = 0.9 by default. Escapes stagnation
              better than ER when masks are few or constraints are used;
              slightly dearer per iteration (more buffer passes).
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
(power iterations on sum_k A_k^* diag(y_k) A_k, scaled to the measured
energy). Optional constraints: ``support`` (boolean (H, W), zero outside) and
``nonnegative`` (real, >= 0, after removing the global phase).
"""
from __future__ import annotations

import time
import warnings
from dataclasses import dataclass, field

import numpy as np

from .fft import FFTPlan
from .metrics import norm as _norm
from .metrics import relative_error
from .validation import (
    ReconstructionInputError,
    check_dtype,
    check_intensities,
    check_masks,
    check_object,
)

__all__ = ["solve", "SolveResult", "spectral_initialization", "METHODS", "Workspace"]

METHODS = ("auto", "hybrid", "er", "raar", "wf", "poisson")
NOISE_MODELS = ("amplitude", "poisson", "gaussian")
DEFAULT_ITERATIONS = {"hybrid": 500, "er": 500, "raar": 500, "wf": 2000, "poisson": 200}
HYBRID_RAAR_ITERATIONS = 25


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


def _sumsq(d: np.ndarray) -> float:
    """Sum of squares of a 1-D real array without BLAS.

    np.dot goes through the threaded BLAS, which on a shared 2-core machine
    was seen to take 8 ms instead of 2 us for 16k doubles; einsum's own loop
    is single-threaded and predictable.
    """
    return float(np.einsum("i,i->", d, d))


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
    """Fastest single-threaded FFT backend for a chunk (measured via FFTPlan)."""
    from . import fft as _fft

    key = (tuple(shape), np.dtype(dtype).str, "single")
    if key not in _fft._CHOICE_CACHE:
        rng = np.random.default_rng(0)
        buf = (rng.standard_normal(shape) + 1j * rng.standard_normal(shape)).astype(dtype)
        times = {b: _fft._time_backend(b, buf, 3) for b in ("numpy", "scipy-1")}
        _fft._CHOICE_CACHE[key] = min(times, key=times.get)
    return _fft._CHOICE_CACHE[key]


def _choose_threads(ws: "Workspace") -> int:
    from . import fft as _fft

    cores = _fft._cpu_workers()
    K = ws.shape[0]
    if cores < 2 or K < 2 or int(np.prod(ws.shape)) < _THREAD_MEASURE_MIN_ELEMENTS:
        return 1
    key = (tuple(ws.shape), ws.dtype.str, cores)
    if key in _THREAD_CHOICE:
        return _THREAD_CHOICE[key]
    rng = np.random.default_rng(0)
    H, W = ws.shape[1:]
    x = (rng.standard_normal((H, W)) + 1j * rng.standard_normal((H, W))).astype(ws.dtype)
    saved = ws.sqrty.copy(), ws.norm_sqrty
    ws.sqrty[...] = 1.0
    ws.norm_sqrty = float(np.sqrt(ws.sqrty.size))
    times = {}
    for n in (1, min(cores, K)):
        ws._set_threads(n)
        _er_step(ws, x)
        best = np.inf
        for _ in range(3):
            t0 = time.perf_counter()
            _er_step(ws, x)
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
    iteration. ``set_intensities`` swaps the data in place (the incremental
    engine uses this to warm-start without reallocating).
    """

    def __init__(self, masks: np.ndarray, dtype=np.complex64, fft_backend: str = "auto", threads: int | str = "auto"):
        self.dtype = check_dtype(dtype)
        self.real_dtype = np.float32 if self.dtype == np.complex64 else np.float64
        m = np.asarray(masks)
        self.shape = m.shape
        self.masks = m.astype(self.dtype)
        w = np.sum(np.abs(m.astype(np.complex128)) ** 2, axis=0)
        self.weight = w
        self.weight_r = w.astype(self.real_dtype)
        self.lit = w > 0
        inv_w = np.where(self.lit, 1.0 / np.where(self.lit, w, 1.0), 0.0)
        self.masks_conj_w = (np.conj(m) * inv_w).astype(self.dtype)
        self.mean_weight = float(w.mean())
        self.plan = FFTPlan(self.shape, self.dtype, fft_backend)
        self.Z = np.empty(self.shape, self.dtype)
        self.R = np.empty(self.shape, self.real_dtype)
        self.D = np.empty(self.shape, self.real_dtype)
        self.sqrty = np.zeros(self.shape, self.real_dtype)
        self.y = np.zeros(self.shape, self.real_dtype)
        self.norm_sqrty = 1.0
        self.tiny = self.real_dtype(np.finfo(self.real_dtype).tiny * 1e3)
        self._set_threads(threads, fft_backend)

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
        if threads == 1:
            self.chunk_plans = [self.plan]
        else:
            backend = fft_backend if fft_backend in ("numpy", "scipy-1") else None
            self.chunk_plans = [
                FFTPlan((c.stop - c.start,) + tuple(self.shape[1:]), self.dtype,
                        backend or _single_thread_backend((c.stop - c.start,) + tuple(self.shape[1:]), self.dtype))
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
        np.multiply(z, self.masks_conj_w, out=z)
        return z.sum(axis=0)

    def magnitude_project(self, z: np.ndarray, out: np.ndarray, want_residual: bool) -> float:
        """out = sqrt(y) * z/|z|; return the relative amplitude residual of z (or nan)."""
        R = self.R
        np.abs(z, out=R)
        res = float("nan")
        if want_residual:
            D = self.D
            np.subtract(self.sqrty, R, out=D)
            d = D.reshape(-1)
            res = float(np.sqrt(_sumsq(d))) / self.norm_sqrty
        R += self.tiny  # avoids 0/0; cheaper than np.maximum
        np.divide(self.sqrty, R, out=R)
        np.multiply(z, R, out=out)
        return res

    def residual_of(self, x: np.ndarray) -> float:
        z = self.apply(x, self.Z)
        np.abs(z, out=self.R)
        np.subtract(self.sqrty, self.R, out=self.D)
        d = self.D.reshape(-1)
        return float(np.sqrt(_sumsq(d))) / self.norm_sqrty


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


def spectral_initialization(ws: Workspace, iterations: int = 50, seed: int = 0) -> np.ndarray:
    """Leading eigenvector of sum_k A_k^* diag(y_k) A_k by power iteration, scaled.

    The scale makes sum_k ||A_k x0||^2 equal the measured total sum(y).
    (Candès, Li, Soltanolkotabi 2015, Wirtinger flow, Algorithm 1.)
    """
    rng = np.random.default_rng(seed)
    H, W = ws.shape[1:]
    v = (rng.standard_normal((H, W)) + 1j * rng.standard_normal((H, W))).astype(ws.dtype)
    v *= ws.lit
    v /= _norm(v)
    Z = ws.Z
    for _ in range(iterations):
        ws.apply(v, Z)
        np.multiply(Z, ws.y, out=Z)
        v = ws.pseudo_inverse(Z)
        v *= ws.weight_r
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
    def __init__(self, tol: float, stall_tol: float, window: int = 20):
        self.tol, self.stall_tol, self.window = tol, stall_tol, window
        self.reason = ""

    def done(self, residuals: list) -> bool:
        r = residuals[-1]
        if not np.isfinite(r):
            return False
        if r <= self.tol:
            self.reason = "tolerance"
            return True
        if self.stall_tol > 0 and len(residuals) > self.window:
            prev = residuals[-1 - self.window]
            if prev - r <= self.stall_tol * prev:
                self.reason = "stalled"
                return True
        return False


def _er_step(ws, x):
    """One error-reduction step; returns (new x, relative residual of the old x)."""
    masks, mcw, Z, R, D, sqrty, tiny = ws.masks, ws.masks_conj_w, ws.Z, ws.R, ws.D, ws.sqrty, ws.tiny

    def chunk(c, plan):
        Zc, Rc, Dc, sy = Z[c], R[c], D[c], sqrty[c]
        np.multiply(masks[c], x, out=Zc)
        plan.forward(Zc)
        np.abs(Zc, out=Rc)
        np.subtract(sy, Rc, out=Dc)
        ss = _sumsq(Dc.reshape(-1))
        Rc += tiny  # avoids 0/0; cheaper than np.maximum
        np.divide(sy, Rc, out=Rc)
        Zc *= Rc
        plan.inverse(Zc)
        Zc *= mcw[c]
        return Zc.sum(axis=0), ss

    parts = ws.map_chunks(chunk)
    xn = parts[0][0]
    for p in parts[1:]:
        xn += p[0]
    return xn, float(np.sqrt(sum(p[1] for p in parts))) / ws.norm_sqrty


def _run_er(ws, x, n, cons, residuals, stopper, deadline, truth, errors):
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


class _RAARState:
    def __init__(self, ws):
        self.T = np.empty(ws.shape, ws.dtype)
        self.Zl = np.empty(ws.shape, ws.dtype)


def _raar_estimate(ws, st):
    """x = (A^*A)^{-1} A^* P_M(Z), the estimate carried by the lifted iterate."""
    ws.magnitude_project(st.Zl, ws.Z, False)
    return ws.pseudo_inverse(ws.Z)


def _run_raar(ws, x, n, cons, residuals, stopper, deadline, truth, errors, beta=0.9, state=None):
    """RAAR in the lifted Fourier space, fused to 7 complex buffer passes per iteration.

    With P = P_M(Z) = r*Z (r = sqrt(y)/|Z|) the update
    Z <- beta (Z + P_R(2P - Z)) + (1 - 2 beta) P is computed as
    Z <- Z * (beta + (1 - 2 beta) r) + A(beta * x_s),  x_s = (A^*A)^{-1} A^* (Z (2r - 1)).
    """
    st = state or _RAARState(ws)
    Zl, T = st.Zl, st.T
    R, D, sqrty, tiny, masks, mcw = ws.R, ws.D, ws.sqrty, ws.tiny, ws.masks, ws.masks_conj_w
    ws.apply(x, Zl)
    a, b = 1.0 - 2.0 * beta, beta

    def phase1(c, plan):
        Zc, Rc, Dc, Tc, sy = Zl[c], R[c], D[c], T[c], sqrty[c]
        np.abs(Zc, out=Rc)
        np.subtract(sy, Rc, out=Dc)
        ss = _sumsq(Dc.reshape(-1))
        Rc += tiny
        np.divide(sy, Rc, out=Rc)
        np.subtract(Rc, 0.5, out=Dc)
        np.multiply(Zc, Dc, out=Tc)  # (2P - Z) / 2
        plan.inverse(Tc)
        Tc *= mcw[c]
        return Tc.sum(axis=0), ss

    def phase2(c, plan):
        Zc, Rc, Tc = Zl[c], R[c], T[c]
        Rc *= a
        Rc += b
        Zc *= Rc
        np.multiply(masks[c], xs, out=Tc)
        plan.forward(Tc)
        Zc += Tc
        return None

    it = 0
    for it in range(1, n + 1):
        parts = ws.map_chunks(phase1)
        xs = parts[0][0]
        for p in parts[1:]:
            xs += p[0]
        residuals.append(float(np.sqrt(sum(p[1] for p in parts))) / ws.norm_sqrty)
        xs *= 2.0
        if cons.active:
            cons(xs)
        xs *= beta
        ws.map_chunks(phase2)
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


def _run_hybrid(ws, x, n, cons, residuals, stopper, deadline, truth, errors, beta=0.9,
                raar_iterations=HYBRID_RAAR_ITERATIONS):
    n1 = min(n, raar_iterations)
    x, it1 = _run_raar(ws, x, n1, cons, residuals, stopper, deadline, truth, errors, beta=beta)
    if it1 < n1 or n1 == n or (deadline is not None and time.perf_counter() >= deadline):
        return x, it1
    x, it2 = _run_er(ws, x, n - n1, cons, residuals, stopper, deadline, truth, errors)
    return x, it1 + it2


def _run_wf(ws, x, n, cons, residuals, stopper, deadline, truth, errors, t0=0, x0_norm2=None, mu_max=0.2,
            tau0=330.0):
    """Wirtinger flow on f = sum (|Ax|^2 - y)^2, step mu_t n / (mean(w) ||x0||^2).

    Safeguard (ours, not in the paper): whenever the loss rises, the step
    scale is halved for the rest of the run, so the published schedule
    cannot diverge on hard objects.
    """
    Z, R = ws.Z, ws.R
    H, W = ws.shape[1:]
    npix = H * W
    if x0_norm2 is None:
        x0_norm2 = _norm(x) ** 2
    damping = 1.0
    f_prev = np.inf
    masks, mcw, y, sqrty = ws.masks, ws.masks_conj_w, ws.y, ws.sqrty

    def chunk(c, plan):
        Zc, Rc, Dc = Z[c], R[c], ws.D[c]
        np.multiply(masks[c], x, out=Zc)
        plan.forward(Zc)
        np.abs(Zc, out=Rc)
        np.subtract(sqrty[c], Rc, out=Dc)
        ss = _sumsq(Dc.reshape(-1))
        np.square(Rc, out=Rc)
        Rc -= y[c]
        f = _sumsq(Rc.reshape(-1))
        Zc *= Rc
        plan.inverse(Zc)
        Zc *= mcw[c]
        return Zc.sum(axis=0), ss, f

    it = 0
    for it in range(1, n + 1):
        parts = ws.map_chunks(chunk)
        g = parts[0][0]
        for p in parts[1:]:
            g += p[0]
        residuals.append(float(np.sqrt(sum(p[1] for p in parts))) / ws.norm_sqrty)
        f = sum(p[2] for p in parts)
        if f > f_prev:
            damping *= 0.5
        f_prev = f
        g *= ws.weight_r  # A^* z = w * (A^*A)^{-1} A^* z
        mu = min(1.0 - np.exp(-(t0 + it) / tau0), mu_max) * damping
        x = x - (mu * npix / (ws.mean_weight * x0_norm2)) * g
        if cons.active:
            cons(x)
        if truth is not None:
            errors.append(relative_error(truth, x))
        if stopper.done(residuals) or (deadline is not None and time.perf_counter() >= deadline):
            break
    return x, it


def _run_poisson(ws, x, n, cons, residuals, stopper, deadline, truth, errors, floor_fraction=1e-12):
    """L-BFGS on the Poisson negative log-likelihood (float64 internally)."""
    from scipy.optimize import minimize

    K, H, W = ws.shape
    masks = ws.masks.astype(np.complex128)
    masks_c = np.conj(masks)
    y = ws.y.astype(np.float64)
    plan = FFTPlan(ws.shape, np.complex128)
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

    res = minimize(fun, v0, jac=True, method="L-BFGS-B", bounds=bounds, callback=callback,
                   options={"maxiter": n, "maxcor": 20, "ftol": 1e-15, "gtol": 1e-12 * max(mean_y, 1e-30)})
    stopper.reason = "converged" if res.success else str(res.message)
    xr = unpack(res.x)
    if sup is not None:
        xr = xr * sup
    return xr.astype(ws.dtype), max(count["n"], int(res.nit))


def solve(intensities, masks, *, method: str = "auto", iterations: int | None = None, x0=None,
          noise_model: str = "amplitude", support=None, nonnegative: bool = False, dtype=np.complex128,
          tol: float | None = None, stall_tol: float = 0.0, time_budget_s: float | None = None,
          beta: float = 0.9, init_iterations: int = 50, er_warmup: int = 100, truth=None, seed: int = 0,
          fft_backend: str = "auto") -> SolveResult:
    """Recover x from y_k = |F(m_k x)|^2.

    Parameters
    ----------
    intensities : (K, H, W) real, photon counts (negative values, e.g. after
        dark subtraction, are clamped to 0).
    masks : (K, H, W) complex mask family.
    method : "auto" ("hybrid"; "poisson" when noise_model="poisson", "wf"
        when noise_model="gaussian"), "hybrid", "er", "raar", "wf",
        "poisson" (see the module docstring).
    iterations : maximum iterations (defaults per method: er/raar 500,
        wf 2000, poisson 200 L-BFGS steps).
    x0 : starting estimate (H, W); default the spectral initialization.
    noise_model : "amplitude" (default; least squares on sqrt(y), near-ML for
        Poisson and Gaussian-in-amplitude noise), "poisson" (selects the
        Poisson-likelihood method under "auto"), "gaussian" (Gaussian
        intensity noise: selects Wirtinger flow under "auto").
    support, nonnegative : optional constraints.
    dtype : complex128 (default here, for accuracy) or complex64 (fast path).
    tol : stop when the relative amplitude residual falls below this
        (default: 1e-14 for complex128, 1e-7 for complex64).
    stall_tol : if > 0, stop when the residual improves by less than this
        fraction over 20 iterations (useful on noisy data).
    time_budget_s : wall-clock cap on the iterations.
    truth : optional true object; then ``result.errors`` tracks the
        relative error per iteration (costs time; for tests and benchmarks).
    """
    t_start = time.perf_counter()
    if method not in METHODS:
        raise ReconstructionInputError(f"unknown method {method!r}; choose one of {METHODS}.")
    if noise_model not in NOISE_MODELS:
        raise ReconstructionInputError(f"unknown noise_model {noise_model!r}; choose one of {NOISE_MODELS}.")
    if method == "auto":
        method = {"poisson": "poisson", "gaussian": "wf"}.get(noise_model, "hybrid")
    dt = check_dtype(dtype)
    m = check_masks(masks)
    y = check_intensities(intensities, m.shape)
    ws = Workspace(m, dt, fft_backend)
    ws.set_intensities(y)
    cons = _Constraints(support, nonnegative, m.shape[1:], dt)
    if iterations is None:
        iterations = DEFAULT_ITERATIONS[method]
    if int(iterations) < 0:
        raise ReconstructionInputError(f"iterations must be >= 0; got {iterations}.")
    if tol is None:
        tol = 1e-14 if dt == np.complex128 else 1e-7
    if x0 is None:
        x = spectral_initialization(ws, init_iterations, seed)
    else:
        x = check_object(x0, m.shape[1:], name="x0").astype(dt)
    if cons.active:
        cons(x)
    truth_arr = None if truth is None else check_object(truth, m.shape[1:], name="truth")
    residuals: list[float] = []
    errors: list[float] = []
    stopper = _Stopper(tol, stall_tol)
    deadline = None if time_budget_s is None else t_start + float(time_budget_s)
    args = (ws, x, int(iterations), cons, residuals, stopper, deadline, truth_arr, errors)
    if method == "hybrid":
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
        x, it = _run_poisson(*args)
    x = np.asarray(x, dtype=dt)
    x *= ws.lit
    if not np.all(np.isfinite(x)):
        raise FloatingPointError(f"solver {method!r} diverged (non-finite estimate); try method='er'.")
    converged = stopper.reason in ("tolerance", "converged")
    return SolveResult(estimate=x, residuals=np.asarray(residuals), method=method, iterations=it,
                       converged=converged, elapsed_s=time.perf_counter() - t_start,
                       errors=np.asarray(errors) if truth is not None else None,
                       stop_reason=stopper.reason or "iterations")
