"""Angular-spectrum propagation of maskrun.reconstruct against the Gaussian-beam formula."""
import warnings

import numpy as np
import pytest

from maskrun.reconstruct import (
    AliasingWarning,
    ReconstructionInputError,
    angular_spectrum,
    angular_spectrum_max_distance_m,
)


def _second_moment_radius(field, dx):
    """Beam radius w from the intensity second moment: w^2 = 4 <r^2> / 2 per axis pair.

    For a Gaussian intensity exp(-2 r^2 / w^2), <x^2> = w^2 / 4 (Siegman, Lasers, 1986, ch. 17).
    """
    I = np.abs(field) ** 2
    n = field.shape[0]
    c = (np.arange(n) - n // 2) * dx
    X, Y = np.meshgrid(c, c, indexing="ij")
    x2 = np.sum(I * X**2) / I.sum()
    return 2 * np.sqrt(x2)


@pytest.mark.parametrize("distance_m", [0.0, 0.02, 0.05, 0.1])
def test_gaussian_beam_waist_follows_w_of_z(distance_m):
    # Siegman, Lasers (1986), ch. 17; Goodman, Introduction to Fourier Optics, 3rd ed. (2005), ch. 3-4:
    # w(z) = w0 sqrt(1 + (z/zR)^2), zR = pi w0^2 / lambda.
    lam = 633e-9
    dx = 4e-6
    n = 512
    w0 = 60e-6
    c = (np.arange(n) - n // 2) * dx
    X, Y = np.meshgrid(c, c, indexing="ij")
    u0 = np.exp(-(X**2 + Y**2) / w0**2)
    zr = np.pi * w0**2 / lam
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # these distances are within the sampling limit
        u = angular_spectrum(u0, lam, dx, distance_m)
    w_expected = w0 * np.sqrt(1 + (distance_m / zr) ** 2)
    assert abs(_second_moment_radius(u, dx) - w_expected) / w_expected < 2e-3
    # on-axis intensity falls as (w0/w)^2
    assert abs(abs(u[n // 2, n // 2]) ** 2 - (w0 / w_expected) ** 2) < 2e-3
    # energy conserved (all components propagate at this sampling)
    np.testing.assert_allclose(np.sum(np.abs(u) ** 2), np.sum(np.abs(u0) ** 2), rtol=1e-10)


def test_back_propagation_inverts_forward():
    rng = np.random.default_rng(1)
    u0 = rng.standard_normal((64, 64)) + 1j * rng.standard_normal((64, 64))
    lam, dx, z = 500e-9, 5e-6, 1e-3
    # a random field fills the window and the whole band, so it wraps (and is warned about);
    # circular propagation is still exactly invertible
    with pytest.warns(AliasingWarning):
        u1 = angular_spectrum(u0, lam, dx, z)
    u2 = angular_spectrum(u1, lam, dx, -z, check_sampling=False)
    np.testing.assert_allclose(u2, u0, atol=1e-10)


def test_aliasing_warning_when_light_leaves_the_window():
    lam, dx, n = 633e-9, 4e-6, 64
    zmax = angular_spectrum_max_distance_m((n, n), lam, dx)
    assert zmax == pytest.approx(n * dx**2 / lam)
    c = (np.arange(n) - n // 2) * dx
    X, Y = np.meshgrid(c, c, indexing="ij")
    w0 = 3 * dx  # small spot: wide angular spectrum
    u0 = np.exp(-(X**2 + Y**2) / w0**2)
    zr = np.pi * w0**2 / lam
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        angular_spectrum(u0, lam, dx, zr)  # w(zR) = sqrt(2) w0: stays well inside
        angular_spectrum(np.ones((n, n), complex), lam, dx, 10 * zmax)  # a plane wave never spreads
    # far beyond: w(z) ~ w0 z / zR exceeds the 256 um window, so the result wraps around
    z_far = 20 * zr
    assert w0 * np.sqrt(1 + 20**2) > n * dx / 2
    with pytest.warns(AliasingWarning, match="aliases"):
        angular_spectrum(u0, lam, dx, z_far)


def test_bad_optical_parameters_are_rejected():
    u0 = np.ones((8, 8), complex)
    with pytest.raises(ReconstructionInputError, match="positive"):
        angular_spectrum(u0, -1e-6, 1e-6, 1e-3)
    with pytest.raises(ReconstructionInputError, match="metres"):
        angular_spectrum(u0, 633e-9, 5.0, 1e-3)
    with pytest.raises(ReconstructionInputError, match="NaN"):
        angular_spectrum(np.full((8, 8), np.nan), 633e-9, 1e-6, 1e-3)


def test_near_field_reconstruction_recovers_object():
    from maskrun.reconstruct import IncrementalEngine, NearField, forward_near_field, octanary_masks, relative_error, solve

    rng = np.random.default_rng(3)
    x = rng.standard_normal((32, 32)) + 1j * rng.standard_normal((32, 32))
    m = octanary_masks(6, x.shape, seed=3)
    nf = NearField(wavelength_m=633e-9, pixel_pitch_m=8e-6, distance_m=2e-3)
    y = forward_near_field(x, m, nf)
    # forward model: each frame is |angular_spectrum(m_k x)|^2
    ref = np.abs(angular_spectrum(m[2] * x, 633e-9, 8e-6, 2e-3, check_sampling=False)) ** 2
    np.testing.assert_allclose(y[2], ref, rtol=1e-10, atol=1e-12)
    r = solve(y, m, propagation=nf, dtype=np.complex128)
    assert relative_error(x, r.estimate) < 1e-9
    eng = IncrementalEngine(m, propagation=nf, iterations_per_update=150)
    assert relative_error(x, eng.update(y).estimate) < 1e-4
    with pytest.raises(ReconstructionInputError, match="evanescent"):
        solve(y, m, propagation=NearField(633e-9, 0.3e-6, 1e-6))
