"""The fused solver kernels (maskrun.reconstruct.kernels): compiled and numpy paths agree.

The reference for every kernel is the same arithmetic written with numpy's own ufuncs
(np.abs, np.divide, np.multiply, np.sum): a general-purpose reference library, and the
code path used when numba is missing.
Source: Harris et al., "Array programming with NumPy", Nature 585, 2020 (the library whose
ufuncs serve as the reference here).
"""
import os
import subprocess
import sys

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from maskrun.reconstruct import forward, kernels, octanary_masks, relative_error, solve

pytestmark = pytest.mark.skipif(not kernels.accelerated(), reason="numba kernels unavailable here")

DTYPES = [(np.complex64, 2e-6), (np.complex128, 1e-13)]


def random_case(rng, shape, dtype, scale=1.0):
    rdt = np.float32 if dtype == np.complex64 else np.float64
    z = ((rng.standard_normal(shape) + 1j * rng.standard_normal(shape)) * scale).astype(dtype)
    sy = (np.abs(rng.standard_normal(shape)) * scale).astype(rdt)
    return z, sy, rdt


def both(fn_name, *arrays_and_scalars):
    """Run kernel ``fn_name`` compiled and as its numpy twin on copies; return both outcomes."""
    out = []
    for jit in (True, False):
        args = [a.copy() if isinstance(a, np.ndarray) else a for a in arrays_and_scalars]
        kernels.use_jit(jit)
        try:
            ret = getattr(kernels, fn_name)(*args)
        finally:
            kernels.use_jit(None)
        out.append((ret, args))
    return out


@pytest.mark.parametrize("dtype,rtol", DTYPES)
@settings(deadline=None)
@given(k=st.integers(1, 4), h=st.integers(1, 9), w=st.integers(1, 17), seed=st.integers(0, 2**16),
       log_scale=st.floats(-6, 6))
def test_amplitude_project_matches_numpy(dtype, rtol, k, h, w, seed, log_scale):
    rng = np.random.default_rng(seed)
    z, sy, rdt = random_case(rng, (k, h, w), dtype, 10.0**log_scale)
    tiny = rdt(np.finfo(rdt).tiny * 1e3)
    (ss_j, (zj, *_)), (ss_n, (zn, *_)) = both("amplitude_project", z, sy, tiny)
    assert ss_j == pytest.approx(ss_n, rel=50 * rtol)
    np.testing.assert_allclose(zj, zn, rtol=rtol, atol=0)
    # the projection has the measured magnitudes (numpy's abs as the reference)
    np.testing.assert_allclose(np.abs(zj), sy, rtol=5 * rtol, atol=0)


@pytest.mark.parametrize("dtype,rtol", DTYPES)
@settings(deadline=None)
@given(k=st.integers(1, 9), n=st.integers(1, 300), seed=st.integers(0, 2**16))
def test_conj_mask_sum_matches_numpy(dtype, rtol, k, n, seed):
    rng = np.random.default_rng(seed)
    z, _, _ = random_case(rng, (k, n), dtype)
    m, _, _ = random_case(rng, (k, n), dtype)
    out = np.empty(n, dtype)
    (_, (zj, _, oj)), (_, (_, _, on)) = both("conj_mask_sum", z, m, out)
    np.testing.assert_allclose(oj, on, rtol=10 * rtol, atol=10 * rtol * np.abs(on).max())
    np.testing.assert_array_equal(zj, z)  # z is left unchanged


@pytest.mark.parametrize("dtype,rtol", DTYPES)
@settings(deadline=None)
@given(k=st.integers(1, 9), n=st.integers(1, 5000), seed=st.integers(0, 2**16))
def test_backproject_remask_matches_numpy(dtype, rtol, k, n, seed):
    # n up to 5000 crosses the kernel's 2048-pixel blocks
    rng = np.random.default_rng(seed)
    z, inv_w, rdt = random_case(rng, (k, n), dtype)
    inv_w = np.ascontiguousarray(inv_w[0])  # one weight per pixel
    m, _, _ = random_case(rng, (k, n), dtype)
    out = np.empty(n, dtype)
    (_, (zj, _, _, _, oj)), (_, (zn, _, _, _, on)) = both("backproject_remask", z, m, inv_w, 1.8, out)
    np.testing.assert_allclose(oj, on, rtol=10 * rtol, atol=10 * rtol * np.abs(on).max())
    np.testing.assert_allclose(zj, zn, rtol=10 * rtol, atol=10 * rtol * np.abs(zn).max())
    # numpy's own sum as the reference, and z now holds each mask times the result
    ref = 1.8 * inv_w * np.sum(z.astype(np.complex128) * np.conj(m), axis=0)
    np.testing.assert_allclose(oj, ref, rtol=10 * rtol, atol=10 * rtol * np.abs(ref).max())
    np.testing.assert_allclose(zj, m * oj, rtol=10 * rtol, atol=10 * rtol * np.abs(zj).max())


@pytest.mark.parametrize("dtype,rtol", DTYPES)
def test_raar_kernels_match_numpy(dtype, rtol):
    rng = np.random.default_rng(3)
    z, sy, rdt = random_case(rng, (3, 16, 20), dtype)
    tiny = rdt(np.finfo(rdt).tiny * 1e3)
    t = np.empty_like(z)
    (ss_j, (_, _, _, tj)), (ss_n, (_, _, _, tn)) = both("raar_reflect", z, sy, tiny, t)
    assert ss_j == pytest.approx(ss_n, rel=50 * rtol)
    np.testing.assert_allclose(tj, tn, rtol=rtol, atol=rtol * np.abs(tn).max())
    (ss_j, (zj, _, _, tj, *_)), (ss_n, (zn, _, _, tn2, *_)) = both("raar_update", z, sy, tiny, tn, -0.8, 0.9)
    assert ss_j == pytest.approx(ss_n, rel=50 * rtol)
    np.testing.assert_allclose(zj, zn, rtol=10 * rtol, atol=10 * rtol * np.abs(zn).max())
    np.testing.assert_allclose(tj, tn2, rtol=10 * rtol, atol=10 * rtol * np.abs(tn2).max())


@pytest.mark.parametrize("dtype,rtol", DTYPES)
def test_intensity_gradient_matches_numpy(dtype, rtol):
    rng = np.random.default_rng(4)
    z, sy, _ = random_case(rng, (2, 8, 8), dtype)
    y = sy * sy
    ((ss_j, f_j), (zj, *_)), ((ss_n, f_n), (zn, *_)) = both("intensity_gradient", z, y)
    assert ss_j == pytest.approx(ss_n, rel=50 * rtol) and f_j == pytest.approx(f_n, rel=50 * rtol)
    np.testing.assert_allclose(zj, zn, rtol=10 * rtol, atol=10 * rtol * np.abs(zn).max())


@pytest.mark.parametrize("jit", [True, False])
def test_zero_field_stays_finite_and_nan_propagates(jit):
    sy = np.ones((2, 4, 4), np.float32)
    tiny = np.float32(np.finfo(np.float32).tiny * 1e3)
    kernels.use_jit(jit)
    try:
        z = np.zeros((2, 4, 4), np.complex64)
        ss = kernels.amplitude_project(z, sy, tiny)
        assert ss == pytest.approx(32.0) and np.all(z == 0)  # 0 / (0 + tiny): no NaN from a dark pixel
        z = np.ones((2, 4, 4), np.complex64)
        z[1, 2, 3] = np.nan
        ss = kernels.amplitude_project(z, sy, tiny)
        assert np.isnan(ss) and np.isnan(z[1, 2, 3])  # a NaN is reported, never hidden
    finally:
        kernels.use_jit(None)


def test_kernels_also_compile_without_the_disk_cache():
    # the path taken when numba finds no writable cache folder (read-only install, no writable home)
    fresh = kernels._define(cache=False)
    kernels._warm_up(fresh)
    z = np.full((1, 3), 3 + 4j, np.complex64)
    ss = fresh[0](z.reshape(-1).view(np.float32), np.full(3, 10.0, np.float32), np.float32(1e-30))
    assert ss == pytest.approx(3 * 25.0) and np.allclose(z, 10 * (3 + 4j) / 5)


def test_non_contiguous_input_is_refused_not_copied():
    z = np.ones((2, 8, 8), np.complex64)[:, ::2]
    with pytest.raises(ValueError, match="C-contiguous"):
        kernels.amplitude_project(z, np.ones(z.shape, np.float32), 1e-30)


def test_solvers_agree_with_and_without_the_compiled_kernels():
    rng = np.random.default_rng(5)
    x = rng.standard_normal((24, 24)) + 1j * rng.standard_normal((24, 24))
    m = octanary_masks(6, x.shape, seed=2)
    y = forward(x, m)
    for method in ("er", "raar", "wf"):
        kernels.use_jit(False)
        try:
            ref = solve(y, m, method=method, iterations=40, dtype=np.complex128, seed=0)
        finally:
            kernels.use_jit(None)
        r = solve(y, m, method=method, iterations=40, dtype=np.complex128, seed=0)
        assert relative_error(ref.estimate, r.estimate) < 1e-9, method
        np.testing.assert_allclose(r.residuals, ref.residuals, rtol=1e-8)


@pytest.mark.parametrize("near_field", [False, True])
def test_single_chunk_fused_loops_match_the_chunked_loops(near_field):
    """ER and RAAR fuse the conjugate-mask sum with the next mask multiply when the masks are not
    split over threads and no constraint acts; both ways give the same iterates to rounding."""
    from maskrun.reconstruct import NearField, forward_near_field
    from maskrun.reconstruct import solvers as S

    rng = np.random.default_rng(6)
    x = rng.standard_normal((32, 32)) + 1j * rng.standard_normal((32, 32))
    m = octanary_masks(6, x.shape, seed=3)
    prop = NearField(wavelength_m=633e-9, pixel_pitch_m=8e-6, distance_m=2e-3) if near_field else None
    ws = S.Workspace(m, np.complex128, threads=1, propagation=prop)
    ws.set_intensities(forward(x, m) if prop is None else forward_near_field(x, m, prop))
    never = S._Constraints(None, False, x.shape, np.complex128)
    x0 = x * 1.05 + 0.05
    for runner in (S._run_er, S._run_raar):
        fused_res, split_res = [], []
        fused, _ = runner(ws, x0, 30, never, fused_res, S._Stopper(-1.0, 0.0), None, None, [])
        ws._set_threads(2)  # the chunked loops (two mask chunks)
        try:
            split, _ = runner(ws, x0, 30, never, split_res, S._Stopper(-1.0, 0.0), None, None, [])
        finally:
            ws._set_threads(1)
        assert relative_error(split, fused) < 1e-12, runner.__name__
        np.testing.assert_allclose(fused_res, split_res, rtol=1e-10)


def test_maskrun_jit_0_selects_the_numpy_path_in_a_real_process():
    code = ("import numpy as np; from maskrun.reconstruct import kernels, solve, forward, octanary_masks;"
            "m = octanary_masks(6, (16, 16), seed=1); x = np.exp(1j * np.arange(256.).reshape(16, 16) / 50);"
            "r = solve(forward(x, m), m, iterations=300);"
            "print(kernels.accelerated(), r.residuals[-1] < 1e-5)")
    out = subprocess.run([sys.executable, "-P", "-c", code], capture_output=True, text=True, timeout=120,
                         env={**os.environ, "MASKRUN_JIT": "0"})
    assert out.returncode == 0, out.stderr
    assert out.stdout.split() == ["False", "True"]
