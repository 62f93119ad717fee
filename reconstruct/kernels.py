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
"""
from __future__ import annotations

import os
import threading
import warnings

import numpy as np

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


# --- compiled kernels ------------------------------------------------------------------------------

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


def _warm_up(k) -> None:
    """Compile (or load from the disk cache) both precisions now, on tiny arrays.

    So the cost (about 1.5 s the first time on a machine, a fraction of that from the cache)
    is paid when a solver workspace is made, not inside the first iteration or a chunk thread.
    """
    for rdt in (np.float32, np.float64):
        cdt = np.complex64 if rdt == np.float32 else np.complex128
        z = np.ones((1, 2), cdt)
        t = np.ones((1, 2), cdt)
        sy = np.ones(2, rdt)
        zf, tf = z.reshape(-1).view(rdt), t.reshape(-1).view(rdt)
        one = rdt(1.0)
        k[0](zf, sy, one)
        k[1](z, t, np.empty(2, cdt))
        k[2](zf, sy, one, one, tf)
        k[3](zf, sy, one, one, tf, one, one)
        k[4](zf, sy)
        k[5](z, t, sy, one, np.empty(2, cdt))


def _define(cache: bool = True):
    """Define the numba kernels (compiled per dtype at first call; cached on disk if ``cache``)."""
    import numba

    # reassoc lets the sums vectorise; contract allows fused multiply-add. No assumptions about
    # NaN or infinity (they must propagate so the callers can report them), no approximate
    # functions. error_model="numpy": division follows IEEE rules instead of raising, which is
    # also what lets the loops vectorise.
    jit = numba.njit(fastmath={"reassoc", "contract"}, nogil=True, error_model="numpy", cache=cache)

    @jit
    def project(zf, sy, tiny):
        ss = 0.0
        for i in range(sy.shape[0]):
            re = zf[2 * i]
            im = zf[2 * i + 1]
            a = np.sqrt(re * re + im * im)
            d = sy[i] - a
            ss += d * d
            q = sy[i] / (a + tiny)
            zf[2 * i] = re * q
            zf[2 * i + 1] = im * q
        return ss

    @jit
    def cms(z, m, out):
        K, N = z.shape
        for i in range(N):
            out[i] = z[0, i] * m[0, i]
        for k in range(1, K):
            for i in range(N):
                out[i] += z[k, i] * m[k, i]

    @jit
    def _acc_first(acc, z, m):
        for j in range(acc.shape[0]):
            acc[j] = z[j] * np.conj(m[j])

    @jit
    def _acc_add(acc, z, m):
        for j in range(acc.shape[0]):
            acc[j] += z[j] * np.conj(m[j])

    @jit
    def _scale_out(acc, w, scale, x):
        for j in range(acc.shape[0]):
            v = acc[j] * (w[j] * scale)
            acc[j] = v
            x[j] = v

    @jit
    def _remask(z, m, acc):
        for j in range(acc.shape[0]):
            z[j] = m[j] * acc[j]

    @jit
    def backproject(z, m, w, scale, x):
        # pixel blocks small enough that the accumulator and the block of every mask stay in
        # cache between the sum over masks and the multiply that follows
        K, N = z.shape
        B = 2048
        acc = np.empty(B, z.dtype)
        for s in range(0, N, B):
            e = min(N, s + B)
            a = acc[:e - s]
            _acc_first(a, z[0, s:e], m[0, s:e])
            for k in range(1, K):
                _acc_add(a, z[k, s:e], m[k, s:e])
            _scale_out(a, w[s:e], scale, x[s:e])
            for k in range(K):
                _remask(z[k, s:e], m[k, s:e], a)

    @jit
    def _reflection(re, im, syi, tiny, half):
        # for one pixel: the squared residual (sqrt(y) - |z|)^2 and the factor r - 1/2 of the
        # reflection t = z (r - 1/2), r = sqrt(y) / (|z| + tiny)
        a = np.sqrt(re * re + im * im)
        d = syi - a
        return d * d, syi / (a + tiny) - half

    @jit
    def reflect(zf, sy, tiny, half, tf):
        ss = 0.0
        for i in range(sy.shape[0]):
            re = zf[2 * i]
            im = zf[2 * i + 1]
            d2, h = _reflection(re, im, sy[i], tiny, half)
            ss += d2
            tf[2 * i] = re * h
            tf[2 * i + 1] = im * h
        return ss

    @jit
    def update(zf, sy, tiny, half, tf, a, b):
        ss = 0.0
        for i in range(sy.shape[0]):
            re = zf[2 * i]
            im = zf[2 * i + 1]
            s = a * (sy[i] / (np.sqrt(re * re + im * im) + tiny)) + b
            re = re * s + tf[2 * i]
            im = im * s + tf[2 * i + 1]
            zf[2 * i] = re
            zf[2 * i + 1] = im
            d2, h = _reflection(re, im, sy[i], tiny, half)
            ss += d2
            tf[2 * i] = re * h
            tf[2 * i + 1] = im * h
        return ss

    @jit
    def igrad(zf, y):
        ss = 0.0
        f = 0.0
        for i in range(y.shape[0]):
            re = zf[2 * i]
            im = zf[2 * i + 1]
            p = re * re + im * im
            d = np.sqrt(y[i]) - np.sqrt(p)  # sqrt(y) again rather than reading a stored copy
            ss += d * d
            e = p - y[i]
            f += e * e
            zf[2 * i] = re * e
            zf[2 * i + 1] = im * e
        return ss, f

    return project, cms, reflect, update, igrad, backproject


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
