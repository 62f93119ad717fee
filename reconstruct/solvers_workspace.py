"""The solvers' workspace: masks, data and preallocated buffers for one problem size, the split of
the K masks over threads (measured once per shape and kept) and the thread pool that runs the chunks.

The thread choice and the single-threaded FFT backend (``_choose_threads``, ``_single_thread_backend``,
``_THREAD_CHOICE``) live here and are looked up in this module at call time, so a test or benchmark
that replaces them here reaches every workspace (``solvers`` only re-exports them).
"""
from __future__ import annotations

import time

import numpy as np

from . import kernels
from .fft import FFTPlan, PropagatorPlan, aligned_empty
from .solvers_constraints import _Constraints
from .solvers_er import _run_er
from .solvers_stopping import _Stopper
from .validation import check_dtype

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
    """Threads for this workspace's masks: 1, or one per core when a measured ER iteration says so."""
    from . import fft as _fft

    thread_choice = _THREAD_CHOICE

    cores = _fft._cpu_workers()
    K = ws.shape[0]
    if cores < 2 or K < 2 or int(np.prod(ws.shape)) < _THREAD_MEASURE_MIN_ELEMENTS:
        return 1
    key = (tuple(ws.shape), ws.dtype.str, cores, ws.transfer is not None)
    if key in thread_choice:
        return thread_choice[key]
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
    thread_choice[key] = choice
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
