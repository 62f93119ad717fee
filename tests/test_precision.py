"""The precision estimate without a truth (reconstruct.precision): its parts against outside results,
then a small version of bench/precision_matrix.py through the real pipeline."""

import sys
from pathlib import Path

import numpy as np
import pytest

from maskrun.reconstruct import octanary_masks, relative_error, solve
from maskrun.reconstruct.precision import MISFIT_CHI2_DOF, NoiseModel, estimate_precision

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "bench"))


def _field(n, seed=0):
    rng = np.random.default_rng(seed)
    yy, xx = np.mgrid[:n, :n] / n
    return (1.0 + 0.3 * np.cos(2 * np.pi * xx)) * np.exp(1j * (1.2 * np.sin(2 * np.pi * yy) + 0.1 * rng.normal(size=(n, n))))


def _estimate(y_mean, masks, sets, photons, noise=None):
    res = solve(y_mean, masks, dtype=np.complex128, iterations=400)
    x = res.estimate
    model = np.abs(np.fft.fft2(masks * x, norm="ortho")) ** 2
    w = np.sum(np.abs(masks) ** 2, axis=0)
    return x, estimate_precision(model, y_mean, sets=sets, photons=photons, pixels=x.size, lit_pixels=int((w > 0).sum()),
                                 mean_weight=float(w.mean()), field_norm_sq=float(np.sum(np.abs(x) ** 2)), noise=noise)


def test_square_root_of_poisson_counts_has_variance_one_quarter():
    # Anscombe, "The transformation of Poisson, binomial and negative-binomial data", Biometrika 35 (1948)
    # 246: var(sqrt(y)) -> 1/4 for Poisson y of large mean. The estimate's amplitude-noise rule
    # v / (4 mu + 2 sqrt(v)) gives the same for v = mu (1/4 at mu >> 1).
    rng = np.random.default_rng(1)
    for mu in (50.0, 400.0):
        sampled = float(np.var(np.sqrt(rng.poisson(mu, 400_000))))
        rule = mu / (4 * mu + 2 * np.sqrt(mu))
        assert sampled == pytest.approx(0.25, rel=0.03)
        assert rule == pytest.approx(sampled, rel=0.1)


def test_poisson_data_the_data_estimate_tracks_the_true_error_and_chi2_is_one():
    n, k = 32, 8
    x0 = _field(n) * 30.0  # about 1e3 photons per pixel per mask
    masks = octanary_masks(k, (n, n), seed=2)
    mu = np.abs(np.fft.fft2(masks * x0, norm="ortho")) ** 2
    rng = np.random.default_rng(3)
    for sets in (1, 8):
        y = np.mean([rng.poisson(mu) for _ in range(sets)], axis=0)
        x, p = _estimate(y, masks, sets, float(y.sum() * sets), NoiseModel(read_noise_e=0.0, response_spread=0.0))
        true = relative_error(x0, x)
        # the shot-noise rule sqrt(N / photons) (common practice, no source) and the data agree with the truth
        assert 1 / 1.5 < p.data / true < 1.5, (sets, p.data, true)
        assert 1 / 1.5 < p.shot / true < 1.5
        # chi^2 per degree of freedom of a model that explains the data: about 1 (Seber & Lee, Linear
        # Regression Analysis, 2003, sec. 3.3: E[RSS] = sigma^2 (M - p))
        assert 0.8 < p.chi2_dof < 1.3, p.chi2_dof
        assert not p.misfit


def test_a_fixed_pixel_response_pattern_is_a_floor_the_data_estimate_sees():
    n, k = 32, 8
    x0 = _field(n, 4) * 30.0
    masks = octanary_masks(k, (n, n), seed=5)
    mu = np.abs(np.fft.fft2(masks * x0, norm="ortho")) ** 2
    rng = np.random.default_rng(6)
    gain = 1.0 + 0.02 * rng.standard_normal((n, n))  # 2 % PRNU, not divided out
    sets = 16
    y = np.mean([rng.poisson(mu * gain) for _ in range(sets)], axis=0)
    x, unknown = _estimate(y, masks, sets, float(y.sum() * sets), NoiseModel(read_noise_e=0.0))
    _, known = _estimate(y, masks, sets, float(y.sum() * sets), NoiseModel(read_noise_e=0.0, response_spread=0.02))
    true = relative_error(x0, x)
    assert unknown.shot < true / 1.5  # the photon count alone is overconfident here
    assert 1 / 1.5 < unknown.data / true < 1.5 and 1 / 1.5 < unknown.reported / true < 1.5
    assert "response" in unknown.unknown and unknown.chi2_dof > 1.5  # unexplained scatter shows in chi^2
    assert known.dominant == "response" and "flat field" in known.advice
    assert 1 / 1.5 < known.predicted / true < 1.5 and known.chi2_dof < unknown.chi2_dof


def test_wrong_masks_give_the_misfit_warning_not_a_small_number():
    from maskrun.reconstruct.masks import shift_masks

    n, k = 32, 8
    x0 = _field(n, 7) * 30.0
    masks = octanary_masks(k, (n, n), seed=8)
    shown = shift_masks(masks, (0.5, 0.0))  # the modulator half a pixel off; the solver assumes the design
    mu = np.abs(np.fft.fft2(shown * x0, norm="ortho")) ** 2
    y = np.random.default_rng(9).poisson(mu).astype(float)
    x, p = _estimate(y, masks, 1, float(y.sum()), NoiseModel(read_noise_e=0.0, response_spread=0.0))
    assert p.misfit and p.chi2_dof > MISFIT_CHI2_DOF and p.dominant == "misfit"
    assert "registration" in p.advice
    assert p.reported > 5 * p.shot  # not a confident small number


@pytest.mark.slow
def test_small_precision_matrix_through_the_real_pipeline(tmp_path):
    """A small bench/precision_matrix.py: real runs (pty firmware, worker process, run file), 32 x 32."""
    from precision_matrix import Condition, run_condition

    rows = [run_condition(c, grid=32, passes=6, folder=tmp_path / f"c{i}") for i, c in enumerate([
        Condition("few darks (2)", darks=2),
        Condition("PRNU unknown, no flat", darks=8, datasheet_prnu=False),
        Condition("low photons", darks=8, photons=1 / 16),
        Condition("misregistered 0.5 px", darks=8, offset_px=(0.5, 0), expect_misfit=True),
    ])]
    for r in rows:
        assert r["ok"], r
    assert rows[-1]["misfit_sets"] == "3/3"
