"""Batched unitary 2-D FFTs with a measured choice of backend.

The hot loops of every solver are K forward and K inverse 2-D FFTs over the
last two axes of a (K, H, W) buffer. ``FFTPlan`` runs them in place and picks,
by timing on the actual shape and dtype, the fastest of

* ``numpy.fft`` (pocketfft; out of place plus a copy back, because an
  ``out=`` aliasing the input was found to give wrong inverse transforms;
  single precision is kept single in numpy >= 2), and
* ``scipy.fft`` with ``workers=1`` and with ``workers=os.cpu_count()``.

The choice is measured once per (shape, dtype) per process and cached
(``chosen_backends()`` shows it). Very small transforms skip the measurement
and use numpy. All transforms use ``norm="ortho"`` (unitary) and no fftshift.
"""
from __future__ import annotations

import os
import time
from dataclasses import dataclass

import numpy as np
import scipy.fft as _sfft

__all__ = ["FFTPlan", "PropagatorPlan", "chosen_backends", "time_one_fft", "set_max_workers"]

_BACKENDS = ("numpy", "scipy-1", "scipy-all")
_CHOICE_CACHE: dict[tuple, str] = {}
_MEASURE_MIN_ELEMENTS = 64 * 64
_MAX_WORKERS: int | None = None


def set_max_workers(n: int | None) -> None:
    """Cap the FFT threads (None: all cores). Clears the cached backend choices.

    Use 1 to measure or run on one core (e.g. a worker sharing the machine
    with acquisition).
    """
    global _MAX_WORKERS
    if n is not None and int(n) < 1:
        raise ValueError(f"max workers must be >= 1 or None; got {n}.")
    _MAX_WORKERS = None if n is None else int(n)
    _CHOICE_CACHE.clear()


def _cpu_workers() -> int:
    try:
        n = max(1, len(os.sched_getaffinity(0)))
    except AttributeError:  # pragma: no cover - non-Linux
        n = max(1, os.cpu_count() or 1)
    return n if _MAX_WORKERS is None else min(n, _MAX_WORKERS)


def _same_buffer(a: np.ndarray, b: np.ndarray) -> bool:
    """True when a and b are the same memory with the same layout (cheap pointer check)."""
    return (a.__array_interface__["data"][0] == b.__array_interface__["data"][0]
            and a.shape == b.shape and a.strides == b.strides and a.dtype == b.dtype)


def _run(backend: str, buf: np.ndarray, inverse: bool) -> np.ndarray:
    """Transform ``buf`` over its last two axes in place; return the result array."""
    if backend == "numpy":
        # numpy's ``out=`` aliasing the input gives wrong inverse transforms
        # (seen with numpy 2.4), so transform out of place and copy back.
        f = np.fft.ifft2 if inverse else np.fft.fft2
        buf[...] = f(buf, norm="ortho")
        return buf
    workers = 1 if backend == "scipy-1" else _cpu_workers()
    if backend == "scipy-all" and workers == 1:
        backend = "scipy-1"
    f = _sfft.ifft2 if inverse else _sfft.fft2
    out = f(buf, norm="ortho", overwrite_x=True, workers=workers)
    # With overwrite_x scipy usually transforms in place and returns a *view* of buf (a new
    # array object over the same memory): copy back only when the result really lives elsewhere,
    # else the self-copy costs a full extra pass over the K frames per transform.
    if not _same_buffer(out, buf):
        buf[...] = out
    return buf


def _time_backend(backend: str, buf: np.ndarray, repeats: int) -> float:
    _run(backend, buf, False)
    best = np.inf
    for _ in range(repeats):
        t0 = time.perf_counter()
        _run(backend, buf, False)
        _run(backend, buf, True)
        best = min(best, time.perf_counter() - t0)
    return best


def _choose(shape: tuple[int, ...], dtype: np.dtype) -> str:
    key = (tuple(shape), np.dtype(dtype).str)
    if key in _CHOICE_CACHE:
        return _CHOICE_CACHE[key]
    if int(np.prod(shape)) < _MEASURE_MIN_ELEMENTS:
        choice = "numpy"
    else:
        rng = np.random.default_rng(0)
        buf = (rng.standard_normal(shape) + 1j * rng.standard_normal(shape)).astype(dtype)
        candidates = ["numpy", "scipy-1"] + (["scipy-all"] if _cpu_workers() > 1 else [])
        times = {b: _time_backend(b, buf, 3) for b in candidates}
        choice = min(times, key=times.get)
    _CHOICE_CACHE[key] = choice
    return choice


def chosen_backends() -> dict[tuple, str]:
    """The backend chosen so far for each (shape, dtype) (a copy)."""
    return dict(_CHOICE_CACHE)


@dataclass
class FFTPlan:
    """In-place batched unitary FFT over the last two axes.

    Parameters
    ----------
    shape : the full buffer shape, e.g. (K, H, W).
    dtype : complex64 or complex128.
    backend : "auto" (measure and cache), "numpy", "scipy-1" or "scipy-all".
    """

    shape: tuple
    dtype: np.dtype
    backend: str = "auto"

    def __post_init__(self):
        self.shape = tuple(int(s) for s in self.shape)
        self.dtype = np.dtype(self.dtype)
        if self.backend == "auto":
            self.backend = _choose(self.shape, self.dtype)
        elif self.backend not in _BACKENDS:
            raise ValueError(f"unknown FFT backend {self.backend!r}; choose one of {_BACKENDS} or 'auto'.")

    def forward(self, buf: np.ndarray) -> np.ndarray:
        """Unitary forward DFT of ``buf`` in place (returns ``buf``)."""
        return _run(self.backend, buf, False)

    def inverse(self, buf: np.ndarray) -> np.ndarray:
        """Unitary inverse DFT of ``buf`` in place (returns ``buf``)."""
        return _run(self.backend, buf, True)


def time_one_fft(shape: tuple[int, int], dtype, *, repeats: int = 20, batch: int = 8, backend: str = "auto") -> float:
    """Seconds for one unitary 2-D FFT of ``shape`` in ``dtype`` (median, batched).

    This is the "FFT unit" used by the benchmark: a batch of ``batch`` images
    is transformed with the same backend choice the solvers use, and the time
    is divided by the batch size.
    """
    full = (batch,) + tuple(shape)
    plan = FFTPlan(full, np.dtype(dtype), backend)
    rng = np.random.default_rng(1)
    buf = (rng.standard_normal(full) + 1j * rng.standard_normal(full)).astype(dtype)
    plan.forward(buf)
    times = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        plan.forward(buf)
        times.append(time.perf_counter() - t0)
        buf *= 1e-3  # keep values bounded
    return float(np.median(times)) / batch


class PropagatorPlan:
    """A unitary propagator F^-1 diag(h) F (|h| = 1) with the FFTPlan interface.

    ``forward`` applies the propagator, ``inverse`` its adjoint (= inverse),
    both in place over the last two axes. Used for near-field measurements.
    """

    def __init__(self, plan: FFTPlan, transfer: np.ndarray):
        self.plan = plan
        self.backend = plan.backend
        self.h = np.asarray(transfer).astype(plan.dtype)
        self.h_conj = np.conj(self.h)

    def forward(self, buf: np.ndarray) -> np.ndarray:
        self.plan.forward(buf)
        buf *= self.h
        return self.plan.inverse(buf)

    def inverse(self, buf: np.ndarray) -> np.ndarray:
        self.plan.forward(buf)
        buf *= self.h_conj
        return self.plan.inverse(buf)
