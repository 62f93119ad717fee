"""The FFT backends themselves: which are installed, the process caches of the backend choice and of
the correctness checks, the thread cap, and the in-place transform each backend runs.

The caches (``_CHOICE_CACHE``, ``_CHECKED``) and ``_mkl_fft`` are looked up in this module at call
time, so a test that replaces them here reaches every plan; ``fft`` re-exports the public names.
"""
from __future__ import annotations

import os

import numpy as np
import scipy.fft as _sfft

from .fft_fftw import _fftw_plans, _pyfftw

try:  # optional, never a dependency: used only if installed and it passes the correctness check
    import mkl_fft as _mkl_fft
except ImportError:
    _mkl_fft = None


_BACKENDS = ("numpy", "scipy-1", "scipy-all", "fftw-1", "fftw-all", "mkl")
_CHOICE_CACHE: dict[tuple, str] = {}
_CHECKED: dict[tuple, str] = {}  # (backend, shape, dtype, unitary) -> "" (correct) or what was wrong
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


def available_backends() -> tuple[str, ...]:
    """Backends installed here (not yet checked for correctness)."""
    out = ["numpy", "scipy-1", "scipy-all"]
    if _pyfftw is not None:
        out += ["fftw-1", "fftw-all"]
    if _mkl_fft is not None:
        out.append("mkl")
    return tuple(out)


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
