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

import json
import os
import threading
import time
import warnings
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import scipy.fft as _sfft

try:  # FFTW: a dependency where pyfftw has wheels (pyproject marker); numpy/scipy otherwise
    import pyfftw as _pyfftw
except ImportError:  # pragma: no cover - depends on the platform
    _pyfftw = None
try:  # optional, never a dependency: used only if installed and it passes the correctness check
    import mkl_fft as _mkl_fft
except ImportError:
    _mkl_fft = None

__all__ = ["FFTPlan", "PropagatorPlan", "chosen_backends", "time_one_fft", "set_max_workers", "available_backends",
           "check_backend", "aligned_empty", "wisdom_path", "BackendIncorrect"]

_BACKENDS = ("numpy", "scipy-1", "scipy-all", "fftw-1", "fftw-all", "mkl")
_CHOICE_CACHE: dict[tuple, str] = {}
_CHECKED: dict[tuple, str] = {}  # (backend, shape, dtype, unitary) -> "" (correct) or what was wrong
_MEASURE_MIN_ELEMENTS = 64 * 64
_RANK_ROUNDS = 7
_MAX_WORKERS: int | None = None
_LOCK = threading.RLock()
_ALIGN = 64


class BackendIncorrect(RuntimeError):
    """A backend asked for by name gave wrong transforms on this shape (see the message)."""


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


def available_backends() -> tuple[str, ...]:
    """Backends installed here (not yet checked for correctness)."""
    out = ["numpy", "scipy-1", "scipy-all"]
    if _pyfftw is not None:
        out += ["fftw-1", "fftw-all"]
    if _mkl_fft is not None:
        out.append("mkl")
    return tuple(out)


def aligned_empty(shape, dtype) -> np.ndarray:
    """An uninitialised C-contiguous array whose data start on a 64-byte boundary (FFTW's SIMD plans want it)."""
    dtype = np.dtype(dtype)
    n = int(np.prod(shape)) * dtype.itemsize
    raw = np.empty(n + _ALIGN, np.uint8)
    off = (-raw.ctypes.data) % _ALIGN
    return raw[off:off + n].view(dtype).reshape(shape)


# --- cache on disk: FFTW wisdom and the backend ranking ---------------------------------------
def _cache_dir() -> Path:
    d = os.environ.get("MASKRUN_FFT_CACHE")
    if d:
        return Path(d)
    base = os.environ.get("XDG_CACHE_HOME") or str(Path.home() / ".cache")
    return Path(base) / "maskrun"


def wisdom_path() -> Path:
    """Where the FFTW wisdom is kept (``$MASKRUN_FFT_CACHE`` or ``~/.cache/maskrun``)."""
    return _cache_dir() / "fftw-wisdom.json"


def _ranking_path() -> Path:
    return _cache_dir() / "fft-ranking.json"


def _versions() -> str:
    import scipy

    parts = [f"numpy {np.__version__}", f"scipy {scipy.__version__}"]
    if _pyfftw is not None:
        parts.append(f"pyfftw {_pyfftw.__version__}")
    if _mkl_fft is not None:
        parts.append(f"mkl_fft {getattr(_mkl_fft, '__version__', '?')}")
    return "; ".join(parts)


def _read_json(path: Path) -> dict:
    try:
        return json.loads(path.read_text())
    except (OSError, ValueError):
        return {}


def _write_json(path: Path, obj: dict) -> None:
    """Atomic write; a cache that cannot be written is only a cache (silently skipped)."""
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        tmp = path.with_name(f".{path.name}.{os.getpid()}.{threading.get_ident()}")
        tmp.write_text(json.dumps(obj))
        os.replace(tmp, path)
    except OSError:
        pass


_WISDOM_LOADED = False


def _load_wisdom() -> None:
    global _WISDOM_LOADED
    if _WISDOM_LOADED or _pyfftw is None:
        return
    _WISDOM_LOADED = True
    w = _read_json(wisdom_path())
    if w.get("versions") == _versions() and isinstance(w.get("wisdom"), list):
        try:
            _pyfftw.import_wisdom(tuple(bytes.fromhex(s) for s in w["wisdom"]))
        except (ValueError, TypeError):
            pass


def _save_wisdom() -> None:
    if _pyfftw is None:
        return
    _write_json(wisdom_path(), {"versions": _versions(), "wisdom": [b.hex() for b in _pyfftw.export_wisdom()]})


# --- FFTW plans ---------------------------------------------------------------------------------
@dataclass
class _FFTWPlans:
    """Forward and backward FFTW plans for one (shape, dtype, threads), in place, made once."""

    shape: tuple
    dtype: np.dtype
    threads: int
    plans: dict = field(default_factory=dict)
    # A pyfftw plan holds its arrays: update_arrays + execute from two threads at once would
    # transform one thread's buffer into the other's (seen as wrong solver results when two chunks
    # of the same shape shared one plan). Each FFTPlan owns its plans; the lock guards the rest.
    lock: threading.Lock = field(default_factory=threading.Lock)

    def _plan(self, inverse: bool, aligned: bool):
        key = (inverse, aligned)
        p = self.plans.get(key)
        if p is None:
            with _LOCK:
                _load_wisdom()
                scratch = aligned_empty(self.shape, self.dtype) if aligned else self._misaligned()
                flags = ("FFTW_MEASURE", "FFTW_DESTROY_INPUT") + (() if aligned else ("FFTW_UNALIGNED",))
                p = _pyfftw.FFTW(scratch, scratch, axes=(-2, -1),
                                 direction="FFTW_BACKWARD" if inverse else "FFTW_FORWARD",
                                 flags=flags, threads=self.threads, planning_timelimit=10.0)
                self.plans[key] = p
                _save_wisdom()
        return p

    def _misaligned(self) -> np.ndarray:
        n = int(np.prod(self.shape))
        raw = aligned_empty((n + 1,), self.dtype)
        return raw[1:].reshape(self.shape)

    def run(self, buf: np.ndarray, inverse: bool) -> None:
        aligned = buf.ctypes.data % _ALIGN == 0
        p = self._plan(inverse, aligned)
        with self.lock:
            p.update_arrays(buf, buf)
            p.execute()


_FFTW_PLANS: dict[tuple, _FFTWPlans] = {}


def _fftw_plans(shape, dtype, threads) -> _FFTWPlans:
    key = (tuple(shape), np.dtype(dtype).str, threads)
    with _LOCK:
        if key not in _FFTW_PLANS:
            _FFTW_PLANS[key] = _FFTWPlans(tuple(shape), np.dtype(dtype), threads)
        return _FFTW_PLANS[key]


# --- the transforms -----------------------------------------------------------------------------
def _same_buffer(a: np.ndarray, b: np.ndarray) -> bool:
    """True when a and b are the same memory with the same layout (cheap pointer check)."""
    return (a.__array_interface__["data"][0] == b.__array_interface__["data"][0]
            and a.shape == b.shape and a.strides == b.strides and a.dtype == b.dtype)


def _norm(inverse: bool, unitary: bool) -> str:
    # unitary: "ortho" both ways; unnormalised: forward "backward" (no factor), inverse "forward" (no factor)
    return "ortho" if unitary else ("forward" if inverse else "backward")


def _run(backend: str, buf: np.ndarray, inverse: bool, unitary: bool = True, fftw=None) -> np.ndarray:
    """Transform ``buf`` over its last two axes in place; return the result array."""
    norm = _norm(inverse, unitary)
    if backend in ("fftw-1", "fftw-all"):
        if fftw is None:
            fftw = _fftw_plans(buf.shape, buf.dtype, 1 if backend == "fftw-1" else _cpu_workers())
        fftw.run(buf, inverse)
        if unitary:
            buf *= buf.real.dtype.type(1.0 / np.sqrt(buf.shape[-1] * buf.shape[-2]))
        return buf
    if backend == "numpy":
        # numpy's ``out=`` aliasing the input gives wrong inverse transforms
        # (seen with numpy 2.4), so transform out of place and copy back.
        f = np.fft.ifft2 if inverse else np.fft.fft2
        buf[...] = f(buf, norm=norm)
        return buf
    if backend == "mkl":
        f = _mkl_fft.ifft2 if inverse else _mkl_fft.fft2
        buf[...] = f(buf, axes=(-2, -1), norm=norm)
        return buf
    workers = 1 if backend == "scipy-1" else _cpu_workers()
    f = _sfft.ifft2 if inverse else _sfft.fft2
    out = f(buf, norm=norm, overwrite_x=True, workers=workers)
    # With overwrite_x scipy usually transforms in place and returns a *view* of buf (a new
    # array object over the same memory): copy back only when the result really lives elsewhere,
    # else the self-copy costs a full extra pass over the K frames per transform.
    if not _same_buffer(out, buf):
        buf[...] = out
    return buf


def check_backend(backend: str, shape, dtype, unitary: bool = True) -> str:
    """Check one backend against numpy.fft in complex128 on a random batch of ``shape``.

    Returns "" when both directions agree (relative error below 1e-4 in single and 1e-10 in
    double precision), else a description of what was wrong. Kept per process.
    """
    dtype = np.dtype(dtype)
    key = (backend, tuple(shape), dtype.str, bool(unitary))
    if key in _CHECKED:
        return _CHECKED[key]
    rng = np.random.default_rng(12345)
    a = (rng.standard_normal(shape) + 1j * rng.standard_normal(shape)).astype(dtype)
    ref = a.astype(np.complex128)
    tol = 1e-4 if dtype == np.complex64 else 1e-10
    problem = ""
    try:
        for inverse in (False, True):
            b = a.copy()
            out = _run(backend, b, inverse, unitary)
            want = (np.fft.ifft2 if inverse else np.fft.fft2)(ref, norm=_norm(inverse, unitary))
            err = float(np.linalg.norm(out - want) / np.linalg.norm(want))
            if out.dtype != dtype or out.shape != tuple(shape):
                problem = f"{'inverse' if inverse else 'forward'} gave {out.dtype} {out.shape}"
            elif not err < tol:
                ratio = float(np.linalg.norm(out) / np.linalg.norm(want))
                problem = (f"{'inverse' if inverse else 'forward'} differs from numpy.fft by {err:.3g} "
                           f"(relative; norm ratio {ratio:.6g})")
            if problem:
                break
    except Exception as exc:  # a backend that fails on this shape is simply not used
        problem = f"{type(exc).__name__}: {exc}"
    _CHECKED[key] = problem
    return problem


def _time_backend(backend: str, buf: np.ndarray, repeats: int, unitary: bool = True) -> float:
    _run(backend, buf, False, unitary)
    best = np.inf
    for _ in range(repeats):
        t0 = time.perf_counter()
        _run(backend, buf, False, unitary)
        _run(backend, buf, True, unitary)
        best = min(best, time.perf_counter() - t0)
    return best


def rank_backends(shape, dtype, candidates, unitary: bool = True, rounds: int = _RANK_ROUNDS) -> dict[str, float]:
    """Seconds for one forward + inverse transform of ``shape`` per candidate (minimum over
    ``rounds`` interleaved rounds; every candidate warmed up, i.e. planned, first)."""
    rng = np.random.default_rng(0)
    buf = aligned_empty(shape, dtype)
    buf[...] = (rng.standard_normal(shape) + 1j * rng.standard_normal(shape)).astype(dtype)
    scale = 1.0 if unitary else 1.0 / np.sqrt(shape[-1] * shape[-2])
    for b in candidates:
        _run(b, buf, False, unitary)
        _run(b, buf, True, unitary)
        buf *= scale * scale
    best = {b: np.inf for b in candidates}
    for _ in range(rounds):
        for b in candidates:
            t0 = time.perf_counter()
            _run(b, buf, False, unitary)
            _run(b, buf, True, unitary)
            best[b] = min(best[b], time.perf_counter() - t0)
            buf *= scale * scale  # keep the values bounded
    return best


def _choose(shape: tuple[int, ...], dtype: np.dtype, unitary: bool = True, single_thread: bool = False) -> str:
    workers = 1 if single_thread else _cpu_workers()
    key = (tuple(shape), np.dtype(dtype).str, workers)
    with _LOCK:
        if key in _CHOICE_CACHE:
            return _CHOICE_CACHE[key]
        if int(np.prod(shape)) < _MEASURE_MIN_ELEMENTS:
            _CHOICE_CACHE[key] = "numpy"
            return "numpy"
        disk_key = f"{'x'.join(map(str, shape))} {np.dtype(dtype).name} workers={workers}"
        stored = _read_json(_ranking_path())
        entry = stored.get(disk_key) if stored.get("versions") == _versions() else None
        choice = None
        if entry and entry.get("choice") in available_backends():
            if not check_backend(entry["choice"], shape, dtype, unitary):
                choice = entry["choice"]
        if choice is None:
            candidates = [b for b in available_backends() if not b.endswith("-all") or workers > 1]
            if workers == 1:
                candidates = [b for b in candidates if not b.endswith("-all")]
            good = []
            for b in candidates:
                problem = check_backend(b, shape, dtype, unitary)
                if problem:
                    warnings.warn(f"FFT backend {b} refused for {shape} {np.dtype(dtype).name}: {problem}",
                                  RuntimeWarning, stacklevel=3)
                else:
                    good.append(b)
            times = rank_backends(shape, dtype, good, unitary)
            choice = min(times, key=times.get)
            if stored.get("versions") != _versions():
                stored = {"versions": _versions()}
            stored[disk_key] = {"choice": choice, "seconds": {b: float(t) for b, t in times.items()}}
            _write_json(_ranking_path(), stored)
        _CHOICE_CACHE[key] = choice
        return choice


def chosen_backends() -> dict[tuple, str]:
    """The backend chosen so far for each (shape, dtype, workers) (a copy)."""
    return dict(_CHOICE_CACHE)


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
