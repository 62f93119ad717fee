"""Dose limits of maskrun.reconstruct: Poisson Cramér-Rao bound and the shot-noise rule."""
import numpy as np
import pytest
from skimage import data as skdata
from skimage.transform import resize

from maskrun.reconstruct.bounds import poisson_crb_matrix_free

from maskrun.reconstruct import (
    ReconstructionInputError,
    align_global_phase,
    forward,
    octanary_masks,
    poisson_crb,
    relative_error_bound,
    shot_noise_relative_error,
    solve,
)


@pytest.mark.parametrize("a", [0.5, 3.0, 40.0])
def test_one_pixel_crb_is_one_quarter(a):
    # Kay, Fundamentals of Statistical Signal Processing: Estimation Theory (1993), ch. 3:
    # one Poisson intensity I = a^2 has Fisher information (dI/da)^2 / I = 4, so var(a_hat) >= 1/4,
    # whatever a is.
    crb = poisson_crb(np.array([[a + 0j]]), np.ones((1, 1, 1)))
    assert crb.variance_real[0, 0] == pytest.approx(0.25, rel=1e-12)
    assert crb.total_mse == pytest.approx(0.25, rel=1e-12)  # the phase direction is projected out
    assert crb.photons == pytest.approx(a * a)
    assert crb.identifiable


def test_one_pixel_crb_scales_with_dose_and_mask_energy():
    # Same closed form (Kay 1993, ch. 3): K independent Poisson counts with means s |m_k|^2 a^2
    # give J = 4 s sum_k |m_k|^2, so var(a_hat) >= 1 / (4 s sum_k |m_k|^2).
    m = np.array([1.0, 0.5j, -2.0]).reshape(3, 1, 1)
    s = 7.0
    crb = poisson_crb(np.array([[1.3 + 0j]]), m, photon_scale=s)
    assert crb.total_mse == pytest.approx(1 / (4 * s * np.sum(np.abs(m) ** 2)), rel=1e-12)
    # a complex pixel: the bound holds for the modulus, in the direction of x
    x = np.array([[2.0 * np.exp(0.7j)]])
    crb2 = poisson_crb(x, np.ones((1, 1, 1)))
    assert crb2.total_mse == pytest.approx(0.25, rel=1e-12)
    ratio = crb2.variance_imag[0, 0] / crb2.variance_real[0, 0]
    assert ratio == pytest.approx(np.tan(0.7) ** 2, rel=1e-9)


def test_global_phase_direction_is_projected_out():
    rng = np.random.default_rng(1)
    x = rng.standard_normal((5, 5)) + 1j * rng.standard_normal((5, 5))
    m = octanary_masks(4, x.shape, seed=1)
    crb = poisson_crb(x, m, photon_scale=100.0)
    u = np.concatenate([-x.imag.ravel(), x.real.ravel()])
    assert np.linalg.norm(crb.covariance @ u) < 1e-9 * np.linalg.norm(crb.covariance) * np.linalg.norm(u)
    # the bound falls as 1/dose
    crb2 = poisson_crb(x, m, photon_scale=400.0)
    assert crb2.total_mse == pytest.approx(crb.total_mse / 4, rel=1e-9)
    assert np.all(crb.per_parameter_variance >= -1e-12)


def test_crb_matches_shot_noise_rule_in_order_of_magnitude():
    rng = np.random.default_rng(2)
    x = rng.standard_normal((8, 8)) + 1j * rng.standard_normal((8, 8))
    m = octanary_masks(8, x.shape, seed=2)
    crb = poisson_crb(x, m, photon_scale=1000.0)
    rule = shot_noise_relative_error(x.size, crb.photons)
    assert 0.5 * rule < crb.relative_error < 2 * rule


def test_poisson_estimator_reaches_the_bound():
    # The target: MSE within 2x of the Cramér-Rao bound for the Poisson method at
    # ~1e3 photons per pixel. Small object from scikit-image's bundled 'camera' image.
    n, K = 8, 8
    amp = resize(skdata.camera().astype(float) / 255.0, (n, n), anti_aliasing=True) + 0.1
    x = amp * np.exp(1j * np.linspace(0, 1, n * n).reshape(n, n))
    m = octanary_masks(K, x.shape, seed=3)
    y0 = forward(x, m)
    scale = 1e3 / y0.mean()
    xs = x * np.sqrt(scale)
    crb = poisson_crb(xs, m)
    rng = np.random.default_rng(0)
    sq = []
    for _ in range(40):
        y = rng.poisson(y0 * scale)
        est = solve(y, m, noise_model="poisson").estimate
        sq.append(np.sum(np.abs(xs - align_global_phase(xs, est)) ** 2))
    ratio = np.mean(sq) / crb.total_mse
    # 40 trials: the MSE estimate itself scatters by ~ sqrt(2/ (40 * dof)) << 0.5
    assert 0.7 < ratio < 2.0


def test_size_limit_and_bad_input():
    x = np.ones((40, 40), complex)
    m = octanary_masks(2, x.shape)
    with pytest.raises(ValueError, match="1024 pixels"):
        poisson_crb(x, m)
    with pytest.raises(ReconstructionInputError, match="all-zero"):
        poisson_crb(np.zeros((2, 2)), np.ones((1, 2, 2)))
    with pytest.raises(ReconstructionInputError, match="photon_scale"):
        poisson_crb(np.ones((2, 2)), np.ones((1, 2, 2)), photon_scale=-1)
    # K = 1 with several pixels is not identifiable: infinite bound, flagged
    crb = poisson_crb(np.array([[1.0, 2.0], [0.5, 1j]]), np.ones((1, 2, 2)))
    assert not crb.identifiable and crb.total_mse == np.inf


def test_shot_noise_rule_and_relative_error_bound():
    # common practice, no source: relative error ~ sqrt(pixels / photons)
    assert shot_noise_relative_error(10_000, 1e8) == pytest.approx(0.01)
    assert shot_noise_relative_error(4, 0) == np.inf
    with pytest.raises(ReconstructionInputError):
        shot_noise_relative_error(0, 10)
    with pytest.raises(ReconstructionInputError):
        shot_noise_relative_error(10, -1)
    with pytest.raises(ReconstructionInputError):
        shot_noise_relative_error(10, np.nan)
    rng = np.random.default_rng(4)
    small = rng.standard_normal((6, 6)) + 0j
    ms = octanary_masks(6, small.shape, seed=4)
    assert relative_error_bound(small, ms, 50.0) == pytest.approx(poisson_crb(small, ms, 50.0).relative_error)
    # beyond the dense limit: the matrix-free estimate of the same bound, which asks for more than
    # the shot-noise rule's one photon per pixel
    big = np.exp(1j * rng.uniform(0, 2 * np.pi, (40, 40)))
    mb = octanary_masks(8, big.shape, seed=4)
    photons = 3.0 * forward(big, mb).sum()
    bound = relative_error_bound(big, mb, 3.0)
    assert bound == pytest.approx(poisson_crb_matrix_free(big, mb, 3.0).relative_error)
    assert bound > np.sqrt(big.size / photons)
