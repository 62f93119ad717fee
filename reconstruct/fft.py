"""Batched 2-D FFTs with a checked, measured and kept choice of backend.

The hot loops of every solver are K forward and K inverse 2-D FFTs over the
last two axes of a (K, H, W) buffer. ``FFTPlan`` runs them in place with one of

* ``fftw-1`` / ``fftw-all``: FFTW through ``pyfftw`` (a dependency where its
  wheels exist), planned once per plan (``FFTW_MEASURE``; the plans' wisdom is
  kept on disk, see ``wisdom_path``), one thread or all cores;
* ``mkl``: ``mkl_fft``, only when it is installed (not a dependency);
* ``numpy`` (pocketfft; out of place plus a copy back, because an ``out=``
  aliasing the input was found to give wrong inverse transforms);
* ``scipy-1`` / ``scipy-all``: ``scipy.fft`` with one worker or all cores.

Scaling. ``FFTPlan(..., unitary=True)`` (the default) gives the unitary DFT
(numpy's ``norm="ortho"``). ``unitary=False`` gives both directions
*unnormalised* (forward as numpy's default, inverse without the 1/N), i.e.
``scale = sqrt(H W)`` times the unitary transforms. FFTW has no scaling of its
own: the unitary one would cost a separate pass over the K frames per
transform, so the solvers ask for ``unitary=False`` and fold ``1/scale`` into
the mask arrays they multiply with anyway (``solvers.Workspace``).

Choice. For ``backend="auto"`` every installed candidate is first checked for
correctness against ``numpy.fft`` in complex128 on a random batch of the same
shape (both directions, the plan's own scaling; a batched ``mkl_fft``
``fft2(norm="ortho")`` was seen to scale by 1/sqrt(K N) instead of 1/sqrt(N),
which this check refuses). The candidates that pass are then timed in
interleaved rounds (each round times every candidate once, so a burst of load
on a shared machine hits them all), ranked by their minimum, and the choice is
kept: in this process (``chosen_backends()``) and on disk beside the wisdom, so
the next process on this machine does not measure again under a different
load. Very small transforms skip the measurement and use numpy.
"""
from __future__ import annotations

import time
from dataclasses import dataclass

import numpy as np

__all__ = ["FFTPlan", "PropagatorPlan", "chosen_backends", "time_one_fft", "set_max_workers", "available_backends",
           "check_backend", "aligned_empty", "wisdom_path", "BackendIncorrect"]

# the backends and their caches live in fft_backends.py, the FFTW plans and the on-disk cache in
# fft_fftw.py, the backend choice in fft_choice.py; every public name stays reachable as fft.<name>
from .fft_backends import (  # noqa: E402,F401
    _BACKENDS,
    _CHECKED,
    _CHOICE_CACHE,
    _MEASURE_MIN_ELEMENTS,
    _cpu_workers,
    _mkl_fft,
    _norm,
    _run,
    _same_buffer,
    available_backends,
    set_max_workers,
)
from .fft_fftw import (  # noqa: E402,F401
    _ALIGN,
    _FFTW_PLANS,
    _LOCK,
    _FFTWPlans,
    _cache_dir,
    _fftw_plans,
    _load_wisdom,
    _pyfftw,
    _read_json,
    _ranking_path,
    _save_wisdom,
    _versions,
    _write_json,
    aligned_empty,
    wisdom_path,
)
from .fft_choice import _RANK_ROUNDS, _choose, _time_backend, check_backend, chosen_backends, rank_backends  # noqa: E402,F401


class BackendIncorrect(RuntimeError):
    """A backend asked for by name gave wrong transforms on this shape (see the message)."""


@dataclass
class FFTPlan:
    """In-place batched 2-D FFT over the last two axes.

    Parameters
    ----------
    shape : the full buffer shape, e.g. (K, H, W).
    dtype : complex64 or complex128.
    backend : "auto" (checked, measured and kept), or one of ``_BACKENDS`` (checked for
        correctness on first use all the same: a wrong one raises ``BackendIncorrect``).
    unitary : True for the unitary DFT; False for unnormalised transforms in both directions
        (``scale`` = sqrt(H W) times the unitary ones; the caller folds ``1/scale`` in).
    single_thread : with "auto", choose among the one-thread backends only.
    """

    shape: tuple
    dtype: np.dtype
    backend: str = "auto"
    unitary: bool = True
    single_thread: bool = False

    def __post_init__(self):
        self.shape = tuple(int(s) for s in self.shape)
        self.dtype = np.dtype(self.dtype)
        if self.backend == "auto":
            self.backend = _choose(self.shape, self.dtype, self.unitary, self.single_thread)
        elif self.backend not in _BACKENDS:
            raise ValueError(f"unknown FFT backend {self.backend!r}; choose one of {_BACKENDS} or 'auto'.")
        elif self.backend not in available_backends():
            raise ValueError(f"FFT backend {self.backend!r} is not installed here; installed: {available_backends()}.")
        else:
            problem = check_backend(self.backend, self.shape, self.dtype, self.unitary)
            if problem:
                raise BackendIncorrect(f"FFT backend {self.backend} gives wrong transforms for {self.shape} "
                                       f"{self.dtype.name}: {problem}; use backend='auto' or another one.")
        self.scale = 1.0 if self.unitary else float(np.sqrt(self.shape[-1] * self.shape[-2]))
        self._fftw = None
        if self.backend.startswith("fftw"):
            # plans of its own, never shared with another FFTPlan that may run in another thread
            self._fftw = _FFTWPlans(self.shape, self.dtype, 1 if self.backend == "fftw-1" else _cpu_workers())

    def forward(self, buf: np.ndarray) -> np.ndarray:
        """Forward DFT of ``buf`` in place (returns ``buf``); ``scale`` x the unitary one."""
        return _run(self.backend, buf, False, self.unitary, self._fftw)

    def inverse(self, buf: np.ndarray) -> np.ndarray:
        """Inverse DFT of ``buf`` in place (returns ``buf``); ``scale`` x the unitary one."""
        return _run(self.backend, buf, True, self.unitary, self._fftw)


def time_one_fft(shape: tuple[int, int], dtype, *, repeats: int = 20, batch: int = 8, backend: str = "auto") -> float:
    """Seconds for one unitary 2-D FFT of ``shape`` in ``dtype`` (median, batched).

    This is the "FFT unit" used by the benchmark: a batch of ``batch`` images
    is transformed with the same backend choice the solvers use, and the time
    is divided by the batch size.
    """
    full = (batch,) + tuple(shape)
    plan = FFTPlan(full, np.dtype(dtype), backend)
    rng = np.random.default_rng(1)
    buf = aligned_empty(full, dtype)
    buf[...] = (rng.standard_normal(full) + 1j * rng.standard_normal(full)).astype(dtype)
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
    both in place over the last two axes. Over an unnormalised plan the
    transfer function carries 1/scale, so the result is ``scale`` x the
    propagator, as the plan's own transforms are (``scale`` is the plan's).
    """

    def __init__(self, plan: FFTPlan, transfer: np.ndarray):
        self.plan = plan
        self.backend = plan.backend
        self.scale = plan.scale
        self.h = (np.asarray(transfer) / plan.scale).astype(plan.dtype)
        self.h_conj = np.conj(self.h)

    def forward(self, buf: np.ndarray) -> np.ndarray:
        self.plan.forward(buf)
        buf *= self.h
        return self.plan.inverse(buf)

    def inverse(self, buf: np.ndarray) -> np.ndarray:
        self.plan.forward(buf)
        buf *= self.h_conj
        return self.plan.inverse(buf)
