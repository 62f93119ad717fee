"""The planner asks for the photons of the Cramér-Rao bound for the configured masks at every grid
size, never for a saturating exposure, and `maskrun plan` runs on a bench without [simulation].

Outside check: the Poisson Fisher information J = sum_i (d mu_i)(d mu_i)^T / mu_i (Kay,
Fundamentals of Statistical Signal Processing: Estimation Theory, 1993, ch. 3), computed here by
central finite differences of the forward model mu = |F(m_k x)|^2 written with numpy's FFT (not
maskrun's forward or its analytic derivative), and inverted on the complement of the global-phase
direction (the error is measured after global-phase alignment).
"""

from __future__ import annotations

import os
import shutil
import subprocess
import sys

import numpy as np
import pytest

from maskrun.daemon.calibrate.budget import PlanError, plan_photons, representative_object
from maskrun.daemon.config import demo_config_text
from maskrun.daemon.masks import make_masks

MASKRUN = shutil.which("maskrun", path=os.path.dirname(sys.executable)) or "maskrun"


def finite_difference_unit(x: np.ndarray, masks: np.ndarray, step: float = 1e-6) -> float:
    """photons * (CRB relative error)^2 from a finite-difference Fisher information."""
    n = x.size

    def mu(theta):
        field = (theta[:n] + 1j * theta[n:]).reshape(x.shape)
        return (np.abs(np.fft.fft2(masks * field)) ** 2).ravel()

    theta0 = np.concatenate([x.real.ravel(), x.imag.ravel()])
    mu0 = mu(theta0)
    jac = np.empty((mu0.size, 2 * n))
    for j in range(2 * n):
        e = np.zeros(2 * n)
        e[j] = step
        jac[:, j] = (mu(theta0 + e) - mu(theta0 - e)) / (2 * step)
    fisher = jac.T @ (jac / mu0[:, None])
    evals, evecs = np.linalg.eigh(fisher)
    phase = np.concatenate([-x.imag.ravel(), x.real.ravel()])
    phase /= np.linalg.norm(phase)
    drop = int(np.argmax(np.abs(evecs.T @ phase)))  # the global-phase direction (null)
    assert evals[drop] < 1e-6 * evals.max()
    total_mse = float(np.sum(1.0 / np.delete(evals, drop)))
    return mu0.sum() * total_mse / float(np.sum(np.abs(x) ** 2))


@pytest.mark.parametrize("family, count", [("octanary", 8), ("octanary", 4), ("random_phase", 6),
                                           ("binary_amplitude", 12)])
@pytest.mark.parametrize("shape", [(8, 8), (10, 12)])
def test_planner_photons_match_an_independent_fisher_information(family, count, shape):
    target = 0.05
    plan = plan_photons(shape, count, target_relative_error=target, mask_family=family, mask_seed=5, seed=2)
    x = representative_object(shape, seed=2)
    masks = make_masks(family, count, shape, seed=5)
    expected = finite_difference_unit(x, masks) / target**2
    assert plan.method == "crb" and family.replace("_", "-") in plan.method_note
    assert plan.photons_total == pytest.approx(expected, rel=0.05)


@pytest.mark.parametrize("family, count", [("octanary", 8), ("random_phase", 6), ("binary_amplitude", 12)])
@pytest.mark.parametrize("shape", [(24, 24), (32, 32)])
def test_matrix_free_bound_agrees_with_the_dense_one(family, count, shape):
    kw = dict(target_relative_error=0.05, mask_family=family, mask_seed=1)
    dense = plan_photons(shape, count, estimator="dense", **kw)
    free = plan_photons(shape, count, estimator="matrix_free", **kw)
    assert "matrix-free" in free.method_note and "dense" in dense.method_note
    assert free.photons_total == pytest.approx(dense.photons_total, rel=0.05)


def test_no_step_in_photons_across_the_dense_limit():
    # issue 16: the old rule asked for fewer photons on 33 x 33 than on 32 x 32
    a = plan_photons((32, 32), 8, target_relative_error=0.05)
    b = plan_photons((33, 33), 8, target_relative_error=0.05)
    assert b.photons_total > a.photons_total
    assert b.photons_total / (33 * 33) == pytest.approx(a.photons_total / (32 * 32), rel=0.05)
    # 64 x 64 and 128 x 128 ask for the bound, not one photon per pixel per unit error
    for n in (64, 128):
        big = plan_photons((n, n), 8, target_relative_error=0.05)
        assert big.photons_total / (n * n) == pytest.approx(a.photons_total / (32 * 32), rel=0.05)
        assert big.photons_total > 1.2 * n * n / 0.05**2


def test_the_configured_mask_family_is_used():
    octa = plan_photons((16, 16), 8, target_relative_error=0.05, mask_family="octanary")
    binary = plan_photons((16, 16), 8, target_relative_error=0.05, mask_family="binary_amplitude")
    assert binary.photons_total != pytest.approx(octa.photons_total, rel=0.02)
    assert "binary-amplitude" in binary.method_note


def test_the_adc_range_gives_the_saturation_capacity_and_no_frame_saturates():
    # demo camera: 12 bits, offset 100 DN, gain 0.3 DN/e-: (4095 - 100) / 0.3 = 13316.7 e- (hand computation)
    plan = plan_photons((128, 128), 8, target_relative_error=0.001, bit_depth=12, offset_dn=100.0,
                        gain_dn_per_e=0.3, quantum_efficiency=0.6, photon_rate_per_s=2.2e9)
    assert plan.saturation_capacity_e == pytest.approx(13316.67, rel=1e-4)
    assert "from the ADC range" in plan.saturation_note
    assert plan.passes > 100  # issue 16: the old plan recommended one pass at ~100x the full well
    assert plan.photons_per_pixel_peak <= 0.85 * 13316.67 * (1 + 1e-9)
    assert any("full well may be lower" in w for w in plan.warnings)


def _bench_without_simulation(tmp_path, *, drop_bit_depth=False):
    text = demo_config_text()
    text = text[: text.index("\n[simulation]\n")]
    if drop_bit_depth:
        text = text.replace("bit_depth = 12\n", "")
    path = tmp_path / "bench.toml"
    path.write_text(text)
    return path


def _plan(*args):
    return subprocess.run([MASKRUN, "plan", *args], capture_output=True, text=True, timeout=120,
                          stdin=subprocess.DEVNULL)


def test_plan_runs_on_a_bench_without_simulation(tmp_path):
    # issue 16: TypeError "got multiple values for keyword argument 'wavelength_m'"
    res = _plan(str(_bench_without_simulation(tmp_path)), "--phase-precision", "0.05")
    assert res.returncode == 0, res.stderr + res.stdout
    assert "Traceback" not in res.stderr
    assert "from the laser power" in res.stdout and "Cramér-Rao bound" in res.stdout
    assert "from the ADC range" in res.stdout


def test_plan_refuses_without_any_saturation_capacity(tmp_path):
    res = _plan(str(_bench_without_simulation(tmp_path, drop_bit_depth=True)), "--relative-error", "0.001")
    assert res.returncode != 0 and "Traceback" not in res.stderr
    assert "saturation capacity is unknown" in res.stderr + res.stdout
    assert "bit_depth" in res.stderr + res.stdout


def test_demo_plan_never_saturates(tmp_path):
    path = tmp_path / "demo.toml"
    path.write_text(demo_config_text())
    res = _plan(str(path), "--relative-error", "0.001")
    assert res.returncode == 0, res.stderr + res.stdout
    assert "saturation comes first" in res.stdout.replace("\n", " ")


def test_nearly_singular_masks_are_refused_not_understated():
    with pytest.raises(PlanError, match="more masks"):
        plan_photons((48, 48), 2, target_relative_error=0.05)


@pytest.mark.parametrize("name", ["genicam-camera.toml", "display-slm.toml"])
def test_plan_runs_on_the_shipped_real_bench_configs(name):
    # the shipped configs of real benches (no [simulation], no camera profile, no [response] bit_depth):
    # the ADC bits come from the GenICam pixel format (Mono12: 12 bits per pixel, GenICam Pixel Format
    # Naming Convention 2.x, the Mono12 entry — from memory); and the laser's whole power on the camera
    # would need an exposure far below what cameras offer, which the plan says with the attenuation needed
    from importlib import resources

    path = resources.files("maskrun.configs").joinpath(name)
    res = _plan(str(path), "--relative-error", "0.02")
    out = " ".join(res.stdout.split())  # the console wraps lines
    assert res.returncode == 0, res.stderr + res.stdout
    assert "ADC range, no camera profile: (2^12 - 1 - 100 DN)" in out
    assert "shorter than most cameras can expose" in out and "neutral density of about OD 4." in out
