"""The numba bodies of the fused solver kernels (``kernels``): their definition, compiled per dtype
at first call and cached on disk, and the warm-up that compiles both precisions on tiny arrays.
Imported only when the compiled kernels are asked for; the numpy twins and the choice between
them are in ``kernels``."""
from __future__ import annotations

import numpy as np


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
