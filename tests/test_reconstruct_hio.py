"""HIO with a support for one far-field pattern: recovery, shrink-wrap, oversampling check, the
ambiguities (shift, twin, global phase) and error reduction's stagnation on the same data."""
import warnings

import numpy as np
import pytest
from skimage import data as skdata
from skimage.transform import resize

from maskrun.reconstruct import IncrementalEngine, NotUniquelySolvableWarning, octanary_masks, solve
from maskrun.reconstruct import solvers as S
from maskrun.reconstruct.ambiguities import align_ambiguities, relative_error_modulo_ambiguities, twin
from maskrun.reconstruct.hio import HIOSettings, run_hio
from maskrun.reconstruct.support import (UndersampledSupportWarning, autocorrelation, check_oversampling,
                                         reduced_support, support_extent)

N, OBJ = 64, 32  # grid and object size: oversampled 2x per axis


def camera(n: int = OBJ) -> np.ndarray:
    """scikit-image's bundled 'camera' photograph, resized, in [0, 1]."""
    return resize(skdata.camera().astype(float) / 255.0, (n, n), anti_aliasing=True)


def placed(obj: np.ndarray) -> np.ndarray:
    x = np.zeros((N, N), obj.dtype)
    x[16:16 + OBJ, 16:16 + OBJ] = obj
    return x


TRIANGLE = np.tri(OBJ, dtype=bool)  # lower triangle: not centrosymmetric
ONE = np.ones((1, N, N), np.complex128)  # no modulator: the plain far-field pattern


def pattern(x: np.ndarray) -> np.ndarray:
    return np.abs(np.fft.fft2(x, norm="ortho")) ** 2


def test_box_support_real_nonnegative_hio_recovers_and_error_reduction_stagnates():
    # Fienup 1982 (Appl. Opt. 21, 2758), figs. 4-6 and section 4: error reduction on one pattern with
    # a support and non-negativity decreases its error fast at first and then stagnates far from the
    # solution; HIO (beta ~ 0.9) reaches it. The box support is centrosymmetric (twin-prone).
    x = placed(camera())
    box = x > 0
    assert box.sum() == OBJ * OBJ  # the photograph has no exact zeros: the support is the full box
    y = pattern(x)[None]
    r = solve(y, ONE, method="hio", support=box, nonnegative=True)
    assert r.method == "hio" and r.estimate.dtype == np.complex128
    assert relative_error_modulo_ambiguities(x, r.estimate) <= 1e-3
    assert np.all(r.estimate[~box] == 0) and np.all(r.estimate.imag == 0) and np.all(r.estimate.real >= 0)
    # error reduction on the same data, same constraints, same budget, same kind of start (random
    # phases on the measured magnitudes)
    ws = S.Workspace(ONE, np.complex128)
    ws.set_intensities(y)
    from maskrun.reconstruct.hio import _random_start

    x0 = _random_start(ws, box, np.random.default_rng(0))
    er = solve(y, ONE, method="er", support=box, nonnegative=True, x0=x0, iterations=r.iterations, tol=0)
    er_err = relative_error_modulo_ambiguities(x, er.estimate)
    assert er_err > 30 * 1e-3  # far from the object
    late = er.residuals[-2000:]
    assert late[-1] > 0.9 * late[0]  # and no longer improving: stagnation, not slow convergence
    assert er.residual > 1e3 * r.residual


def test_non_centrosymmetric_support_real_nonnegative():
    x = placed(camera() * TRIANGLE)
    support = placed(TRIANGLE)
    r = solve(pattern(x)[None], ONE, method="hio", support=support, nonnegative=True, seed=1)
    assert relative_error_modulo_ambiguities(x, r.estimate) <= 1e-3


def test_complex_object_with_known_support():
    # complex field: amplitude the 'camera' photograph, phase from the 'moon' photograph (0..pi/2),
    # inside a triangle; support only (no non-negativity: the field is complex). Fienup, JOSA A 4, 118
    # (1987), from memory: a support that is not centrosymmetric (a triangle) lets HIO recover
    # complex-valued objects.
    ph = resize(skdata.moon().astype(float) / 255.0, (OBJ, OBJ), anti_aliasing=True)
    x = placed(camera() * TRIANGLE * np.exp(0.5j * np.pi * ph))
    r = solve(pattern(x)[None], ONE, method="hio", support=placed(TRIANGLE))
    assert relative_error_modulo_ambiguities(x, r.estimate) <= 1e-3


def test_shrinkwrap_from_the_autocorrelation_finds_the_support():
    # No support given: start from the autocorrelation, refine by shrink-wrap (Marchesini et al. 2003).
    # The object stands out from the empty background (a pedestal under the photograph).
    x = placed((0.3 + camera()) * TRIANGLE)
    r = solve(pattern(x)[None], ONE, method="hio", nonnegative=True)
    assert relative_error_modulo_ambiguities(x, r.estimate) <= 1e-3
    assert r.stop_reason in ("iterations", "tolerance", "precision floor")


def test_hio_with_a_few_masks_and_a_support():
    # "one or more patterns": with K = 2 octanary masks the same update runs on the lifted projection.
    x = placed(camera() * TRIANGLE)
    m = octanary_masks(2, (N, N), seed=3)
    y = np.abs(np.fft.fft2(m * x, norm="ortho")) ** 2
    r = solve(y, m, method="hio", support=placed(TRIANGLE), nonnegative=True, iterations=3000)
    from maskrun.reconstruct import relative_error

    assert relative_error(x, r.estimate) <= 1e-3  # masks fix shift and twin: global phase only


def test_single_pattern_warnings():
    x = placed(camera())
    y = pattern(x)[None]
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        solve(y, ONE, method="hio", support=x > 0, nonnegative=True, iterations=50)  # no warning
    with pytest.warns(NotUniquelySolvableWarning, match="hio"):
        solve(y, ONE, method="raar", iterations=5)
    assert S.default_method(1) == "hio"
    # oversampling: a support over half the grid in a direction warns (Miao, Sayre, Chapman 1998)
    wide = np.zeros((N, N), bool)
    wide[10:20, 0:40] = True
    assert support_extent(wide) == (10, 40)
    with pytest.warns(UndersampledSupportWarning, match="half the grid"):
        check_oversampling(wide)
    with pytest.warns(UndersampledSupportWarning):
        solve(y, ONE, method="hio", support=wide, iterations=5)
    # a support wrapping around the periodic edge is measured on the circle
    wrapped = np.zeros((N, N), bool)
    wrapped[:, :5] = wrapped[:, -5:] = True
    wrapped[10:20] = False
    assert support_extent(wrapped)[1] == 10


def test_ambiguities_are_invisible_in_the_pattern_and_removed_by_the_metric():
    rng = np.random.default_rng(0)
    x = placed(rng.random((OBJ, OBJ)) * np.exp(1j * rng.random((OBJ, OBJ))))
    other = np.exp(0.7j) * np.roll(twin(x), (3, -5), axis=(0, 1))
    # Outside checks, DFT theorems (Bracewell, "The Fourier Transform and Its Applications", 3rd ed.
    # 2000, ch. 6): conjugation with reversal conjugates the transform; a shift multiplies it by a
    # linear phase; so the modulus (the pattern) is unchanged.
    np.testing.assert_allclose(np.fft.fft2(twin(x)), np.conj(np.fft.fft2(x)), atol=1e-10)
    np.testing.assert_allclose(pattern(other), pattern(x), atol=1e-10)
    assert relative_error_modulo_ambiguities(x, other) < 1e-12
    _, how = align_ambiguities(x, other)
    assert how["twin"] and how["shift"] == (3, -5)  # the roll that aligns the twin of the estimate
    assert relative_error_modulo_ambiguities(x, x + 0.01 * rng.standard_normal(x.shape)) > 1e-3


def test_autocorrelation_is_the_inverse_transform_of_the_pattern():
    # Wiener-Khinchin theorem (Bracewell 2000, ch. 6, autocorrelation theorem): circular
    # autocorrelation by direct summation on a small grid.
    rng = np.random.default_rng(1)
    x = rng.random((8, 8))
    direct = np.array([[np.sum(x * np.roll(x, (a, b), axis=(0, 1))) for b in range(8)] for a in range(8)])
    ac = autocorrelation(pattern(x))
    np.testing.assert_allclose(ac / ac.max(), direct / direct.max(), rtol=1e-10)


def test_twin_remedy_support_is_not_centrosymmetric_and_stagnation_is_handled():
    box = placed(np.ones((OBJ, OBJ), bool))
    red = reduced_support(box)
    assert red.sum() < box.sum() and np.all(box[red])
    # no shift maps the reduced support's point reflection onto itself (it is not centrosymmetric)
    refl = twin(red.astype(float)).real > 0.5
    assert all(not np.array_equal(np.roll(refl, (a, b), axis=(0, 1)), red) for a in range(N) for b in range(N))
    # an object that shrink-wrap cannot isolate (a photograph with near-black parts, no support given):
    # HIO stagnates; the twin remedy and restarts run, and the best attempt is returned
    x = placed(camera() * TRIANGLE)
    ws = S.Workspace(ONE, np.complex128)
    ws.set_intensities(pattern(x)[None])
    out = run_hio(ws, None, 6000, None, True, [], S._Stopper(1e-12, 0.0), None, None, [], HIOSettings(), seed=0)
    assert out.twin_remedies >= 1 and out.attempts >= 2
    assert out.residual == pytest.approx(ws.residual_of(out.estimate))


def test_engine_runs_hio_for_one_pattern():
    x = placed(camera())
    eng = IncrementalEngine(ONE, support=x > 0, nonnegative=True, iterations_per_update=4000)
    u = eng.update(pattern(x)[None])
    assert relative_error_modulo_ambiguities(x, u.estimate) <= 1e-3


@pytest.mark.parametrize("dtype", [np.complex64, np.complex128])
@pytest.mark.parametrize("nonnegative", [True, False])
def test_fused_hio_update_matches_its_numpy_twin(dtype, nonnegative):
    from maskrun.reconstruct import kernels
    from maskrun.reconstruct.hio_kernels import _np_hio_update, hio_update

    if not kernels.accelerated():
        pytest.skip("numba kernels not in use here")
    rng = np.random.default_rng(3)
    rdt = np.float32 if dtype == np.complex64 else np.float64
    p = (rng.standard_normal((16, 16)) + 1j * rng.standard_normal((16, 16))).astype(dtype)
    x = (rng.standard_normal((16, 16)) + 1j * rng.standard_normal((16, 16))).astype(dtype)
    sup = (rng.random((16, 16)) > 0.5).astype(rdt)
    w = rng.random((16, 16)).astype(rdt)
    x1, x2 = x.copy(), x.copy()
    e1 = hio_update(p, x1, sup, w, 0.9, nonnegative)
    e2 = _np_hio_update(p, x2, sup, w, 0.9, nonnegative)
    tol = 1e-5 if dtype == np.complex64 else 1e-12
    np.testing.assert_allclose(x1, x2, rtol=tol, atol=tol)
    assert e1 == pytest.approx(e2, rel=tol)
