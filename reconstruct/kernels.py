"""Fused elementwise kernels for the solvers' hot loops.

Between its two batched FFTs an iteration makes several passes over the K
frames (magnitude, residual, ratio, scale, conjugate-mask multiply, sum over
K). Each numpy ufunc is one pass through memory, and at 256x256, K = 8 those
passes cost almost half as much as the FFTs themselves. The kernels here do
the same arithmetic in one pass each, compiled by numba (a general-purpose
JIT compiler for numerical Python; no compiler is needed on the machine) when
they are first asked for, i.e. when the first solver ``Workspace`` of a
process is made, and cached on disk.

Every kernel has a numpy twin with the same arithmetic, used when numba is
missing or ``MASKRUN_JIT=0`` is set (``ACCELERATED`` tells which is active).
The tests check the two agree.

Arrays are C-contiguous; complex arrays are handled through their real view
(interleaved re, im), which is what lets the compiler vectorise the loops.
The compiled kernels accumulate sums in float64. Division by |z| is guarded by adding
``tiny`` (a small positive number) to |z|, as the numpy path does.

Kernels
-------
``amplitude_project(z, sqrty, tiny)``
    z <- sqrty * z / (|z| + tiny) in place; returns sum (sqrty - |z|)^2.
``conj_mask_sum(z, mcw, out)``
    out = sum_k z[k] * mcw[k] (z and mcw (K, H, W), out (H, W)).
``backproject_remask(z, masks, inv_w, scale, out)``
    out = scale * inv_w * sum_k z[k] * conj(masks[k]), then z[k] <- masks[k] * out: the
    conjugate-mask sum of one iteration and the mask multiply of the next in one pass (it needs
    every mask at a pixel, so it runs when the masks are not split over threads).
``raar_reflect(z, sqrty, tiny, t)``
    t = z * (r - 1/2) with r = sqrty / (|z| + tiny); returns sum (sqrty - |z|)^2.
``raar_update(z, sqrty, tiny, t, a, b)``
    z <- z * (a r + b) + t in place, r as above (recomputed from z: cheaper than storing it),
    then ``raar_reflect`` of the new z into t, in the same pass; returns its residual.
``intensity_gradient(z, y)``
    z <- z * (|z|^2 - y) in place; returns (sum (sqrt(y) - |z|)^2, sum (|z|^2 - y)^2).

The numba bodies are in ``kernels_numba``; this module holds the numpy twins and the choice.
"""
from __future__ import annotations

import os
import threading
import warnings

import numpy as np

from .kernels_numba import _define, _warm_up  # noqa: F401  (reachable as kernels._define, kernels._warm_up)

__all__ = [
    "ACCELERATED",
    "amplitude_project",
    "conj_mask_sum",
    "backproject_remask",
    "raar_reflect",
    "raar_update",
    "intensity_gradient",
    "use_jit",
    "accelerated",
    "description",
]


def _flat(a: np.ndarray) -> np.ndarray:
    """A 1-D view of a C-contiguous array (never a copy: a copy would lose in-place writes)."""
    if not a.flags.c_contiguous:
        raise ValueError("kernels need C-contiguous arrays")
    return a.reshape(-1)


def _real_view(a: np.ndarray) -> np.ndarray:
    """Interleaved (re, im) 1-D real view of a C-contiguous complex array."""
    return _flat(a).view(a.real.dtype)


# --- numpy twins: the reference arithmetic --------------------------------------------------------
# (sums of squares with einsum in the working precision: np.dot would go through the threaded
# BLAS, seen to stall for milliseconds on this kind of machine, and einsum with dtype=float64
# first copies its inputs)

def _sumsq(d: np.ndarray) -> float:
    d = d.reshape(-1)
    return float(np.einsum("i,i->", d, d))


def _np_amplitude_project(z, sqrty, tiny):
    r = np.abs(z)
    d = sqrty - r
    ss = _sumsq(d)
    r += tiny
    np.divide(sqrty, r, out=r)
    z *= r
    return ss


def _np_conj_mask_sum(z, mcw, out):
    np.sum(z * mcw, axis=0, out=out)
    return out


def _np_backproject_remask(z, masks, inv_w, scale, out):
    np.sum(z * np.conj(masks), axis=0, out=out)
    out *= inv_w * scale
    np.multiply(masks, out, out=z)
    return out


def _np_raar_reflect(z, sqrty, tiny, t):
    r = np.abs(z)
    d = sqrty - r
    ss = _sumsq(d)
    r += tiny
    np.divide(sqrty, r, out=r)
    np.subtract(r, 0.5, out=d)
    np.multiply(z, d, out=t)
    return ss


def _np_raar_update(z, sqrty, tiny, t, a, b):
    r = np.abs(z)
    r += tiny
    np.divide(sqrty, r, out=r)
    z *= a * r + b
    z += t
    return _np_raar_reflect(z, sqrty, tiny, t)


def _np_intensity_gradient(z, y):
    r = np.abs(z)
    d = np.sqrt(y) - r
    ss = _sumsq(d)
    np.square(r, out=r)
    r -= y
    f = _sumsq(r)
    z *= r
    return ss, f


# --- compiled kernels (their numba bodies: kernels_numba.py) ---------------------------------------

def _compile():
    """The compiled kernels (made once per process)."""
    global _COMPILED
    if _COMPILED is None:
        try:
            kernels = _define(cache=True)
            _warm_up(kernels)
        except (RuntimeError, OSError):
            # numba finds no writable place for its cache (a read-only install and no writable home
            # folder): compile in memory, once per process, rather than fall back to numpy
            kernels = _define(cache=False)
            _warm_up(kernels)
        _COMPILED = kernels
    return _COMPILED


_JIT = None  # the kernels in use: the compiled ones, or False for the numpy twins
_COMPILED = None  # the compiled kernels once made (kept when use_jit switches them off)
_JIT_LOCK = threading.Lock()


def _jit():
    global _JIT
    if _JIT is not None:
        return _JIT
    with _JIT_LOCK:  # chunk threads may ask at the same moment
        if _JIT is not None:
            return _JIT
        if os.environ.get("MASKRUN_JIT", "1").strip().lower() in ("0", "no", "false", "off"):
            _JIT = False
        else:
            try:
                _JIT = _compile()
            except Exception as e:  # numba missing or broken: the numpy path is correct, only slower
                warnings.warn(f"maskrun: numba kernels unavailable ({e}); using the slower numpy path.",
                              RuntimeWarning, stacklevel=3)
                _JIT = False
        return _JIT


def use_jit(enabled: bool | None) -> None:
    """Force the numba kernels on (True), off (False), or back to the default (None). For tests."""
    global _JIT
    with _JIT_LOCK:
        _JIT = None
        if enabled is False:
            _JIT = False
        elif enabled:
            _JIT = _compile()


def accelerated() -> bool:
    """True when the compiled kernels are in use."""
    return bool(_jit())


def description() -> str:
    """Which kernels run here, for provenance: "numba <version>" or "numpy"."""
    if not accelerated():
        return "numpy"
    import numba

    return f"numba {numba.__version__}"


def __getattr__(name):  # ACCELERATED is evaluated lazily so importing this module stays cheap
    if name == "ACCELERATED":
        return accelerated()
    raise AttributeError(name)


def amplitude_project(z: np.ndarray, sqrty: np.ndarray, tiny) -> float:
    """z <- sqrty * z / (|z| + tiny) in place; return sum (sqrty - |z|)^2 (float64)."""
    k = _jit()
    if not k:
        return _np_amplitude_project(z, sqrty, tiny)
    return float(k[0](_real_view(z), _flat(sqrty), sqrty.dtype.type(tiny)))


def conj_mask_sum(z: np.ndarray, mcw: np.ndarray, out: np.ndarray) -> np.ndarray:
    """out = sum over the first axis of z * mcw; return out. z is left unchanged."""
    k = _jit()
    if not k:
        return _np_conj_mask_sum(z, mcw, out)
    K = z.shape[0]
    k[1](z.reshape(K, -1), mcw.reshape(K, -1), _flat(out))
    return out


def backproject_remask(z: np.ndarray, masks: np.ndarray, inv_w: np.ndarray, scale: float,
                       out: np.ndarray) -> np.ndarray:
    """out = scale * inv_w * sum_k z[k] conj(masks[k]); then z[k] <- masks[k] * out. Returns out."""
    k = _jit()
    if not k:
        return _np_backproject_remask(z, masks, inv_w, scale, out)
    K = z.shape[0]
    k[5](z.reshape(K, -1), masks.reshape(K, -1), _flat(inv_w), inv_w.dtype.type(scale), _flat(out))
    return out


def raar_reflect(z, sqrty, tiny, t) -> float:
    """t = z * (r - 1/2), r = sqrty / (|z| + tiny); return sum (sqrty - |z|)^2."""
    k = _jit()
    if not k:
        return _np_raar_reflect(z, sqrty, tiny, t)
    rt = sqrty.dtype.type
    return float(k[2](_real_view(z), _flat(sqrty), rt(tiny), rt(0.5), _real_view(t)))


def raar_update(z, sqrty, tiny, t, a: float, b: float) -> float:
    """z <- z * (a r + b) + t in place (r = sqrty / (|z| + tiny)); then t = raar_reflect(new z).

    Returns the residual sum (sqrty - |new z|)^2.
    """
    k = _jit()
    if not k:
        return _np_raar_update(z, sqrty, tiny, t, a, b)
    rt = sqrty.dtype.type
    return float(k[3](_real_view(z), _flat(sqrty), rt(tiny), rt(0.5), _real_view(t), rt(a), rt(b)))


def intensity_gradient(z, y) -> tuple[float, float]:
    """z <- z * (|z|^2 - y) in place; return (sum (sqrt(y) - |z|)^2, sum (|z|^2 - y)^2)."""
    k = _jit()
    if not k:
        return _np_intensity_gradient(z, y)
    ss, f = k[4](_real_view(z), _flat(y))
    return float(ss), float(f)
