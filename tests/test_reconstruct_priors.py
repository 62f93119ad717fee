"""Total-variation prior in the Poisson method: gradient, deviance, discrepancy weight, low-dose table."""
import numpy as np
import pytest

from maskrun.reconstruct import ReconstructionInputError, octanary_masks, relative_error, solve
from maskrun.reconstruct.priors import expected_deviance, poisson_deviance, tv, tv_gradient


def test_tv_gradient_matches_finite_differences():
    # common practice, no source: a central finite difference checks an analytic gradient
    rng = np.random.default_rng(0)
    x = rng.standard_normal((6, 7)) + 1j * rng.standard_normal((6, 7))
    eps = 0.1
    f, g = tv_gradient(x.copy(), eps)
    assert f == pytest.approx(tv(x, eps))
    h = 1e-6
    for (i, j) in [(0, 0), (3, 4), (5, 6)]:
        for unit, part in ((1.0, g.real), (1j, g.imag)):
            d = np.zeros_like(x)
            d[i, j] = unit * h
            fd = (tv(x + d, eps) - tv(x - d, eps)) / (2 * h)
            assert fd == pytest.approx(part[i, j], rel=1e-6, abs=1e-8)
    # Rudin, Osher, Fatemi 1992: TV of a piecewise-constant image is the jump times the edge length
    step = np.zeros((8, 8))
    step[:, 4:] = 2.0
    assert tv(step) == pytest.approx(2 * 2.0 * 8)  # two edges on the periodic grid, 8 pixels long, jump 2


def test_expected_deviance_of_poisson_data():
    # McCullagh and Nelder, "Generalized Linear Models", 2nd ed. (1989), section 6.2 (from memory):
    # the expected deviance of one Poisson count is 1 + 1/(6 mu) + O(mu^-2) for large mu; for small
    # mu only y = 0, 1 matter: 2 mu - 2 mu^2 log(mu) ... -> 2 mu. And a Monte Carlo draw agrees.
    assert expected_deviance(200.0) == pytest.approx(1 + 1 / 1200, rel=2e-3)
    assert expected_deviance(1e-5) == pytest.approx(2e-5, rel=1e-3)
    rng = np.random.default_rng(1)
    for mu in (0.3, 1.0, 3.0, 10.0):
        y = rng.poisson(mu, 400_000)
        mc = poisson_deviance(y, np.full(y.shape, mu)) / y.size
        assert expected_deviance(mu) == pytest.approx(mc, rel=0.01), mu


def low_dose_case(photons_per_pixel: float, n: int = 64, K: int = 8, seed: int = 0):
    """The simulated bench's sample (the etched phase plate) and octanary masks, the detected
    photons drawn from the bench's far-field patterns: mean photons_per_pixel per pixel per mask."""
    from maskrun.simulators.optics import SimulatedOptics
    from maskrun.simulators.sample import phase_target

    m = octanary_masks(K, (n, n), seed=7)
    optics = SimulatedOptics(phase_target((n, n)).field, m, 1.0, (n, n))
    x = optics.truth_field()
    p = np.abs(np.fft.fft2(m * x, norm="ortho")) ** 2
    scale = photons_per_pixel / p.mean()
    y = np.random.default_rng(seed).poisson(p * scale).astype(np.float64)
    return y, m, x * np.sqrt(scale)


@pytest.mark.slow
def test_low_dose_table_tv_lowers_the_error():
    # The check: at 1 and 3 detected photons/pixel/mask (K = 8) the prior lowers the error of
    # the unregularised Poisson estimate; at 10 it does not raise it by more than 10 %.
    table = {}
    for dose in (1, 3, 10):
        y, m, truth = low_dose_case(dose)
        plain = relative_error(truth, solve(y, m, method="poisson").estimate)
        r = solve(y, m, prior="tv")
        table[dose] = (plain, relative_error(truth, r.estimate))
        assert r.method == "poisson" and np.all(np.isfinite(r.estimate))
    print("photons/pixel/mask: (Poisson, Poisson + TV)", table)
    assert table[1][1] < table[1][0] and table[3][1] < table[3][0]
    assert table[10][1] <= 1.1 * table[10][0]
    # the unregularised error falls with dose roughly as the shot-noise rule 1/sqrt(photons)
    assert table[1][0] > table[3][0] > table[10][0]


def test_given_weight_and_bad_input():
    y, m, truth = low_dose_case(3, n=32)
    r0 = solve(y, m, prior="tv", prior_weight=0.0)
    plain = solve(y, m, method="poisson")
    assert relative_error(truth, r0.estimate) == pytest.approx(relative_error(truth, plain.estimate), rel=0.05)
    big = solve(y, m, prior="tv", prior_weight=1e3)  # far too strong: flattens the field
    assert tv(big.estimate) < 0.5 * tv(r0.estimate)
    with pytest.raises(ReconstructionInputError, match="prior"):
        solve(y, m, prior="sparsity")
    with pytest.raises(ReconstructionInputError, match="poisson"):
        solve(y, m, method="er", prior="tv")
    with pytest.raises(ReconstructionInputError, match="prior_weight"):
        solve(y, m, prior="tv", prior_weight=-1.0)
