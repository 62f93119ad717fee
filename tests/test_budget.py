"""Photon budget planner against measured reconstruction errors on simulated Poisson data.

Outside references: the Poisson Cramér-Rao bound (Kay, Fundamentals of Statistical Signal
Processing: Estimation Theory, 1993, ch. 3) and the shot-noise rule relative error ~
sqrt(pixels / photons) (common practice, no source); the octanary masks of Candès, Li,
Soltanolkotabi, "Phase retrieval from coded diffraction patterns" (2015). The measured
error of an actual reconstruction from Poisson-noisy data must lie within a factor of 2
of the plan's prediction at three dose levels.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from maskrun.daemon.calibrate.budget import (
    PlanError,
    PlanInfeasible,
    plan_photons,
    predict_relative_error,
    representative_object,
    speckle_peak_to_mean,
)
from maskrun.daemon.calibrate.camera_profile import CameraProfile
from maskrun.daemon.safety.dose import photon_energy_j
from maskrun.reconstruct import forward, octanary_masks, relative_error, solve


def measured_error(shape, mask_count, photons_total, seed):
    """Reconstruct from Poisson data with ``photons_total`` expected detected photons."""
    rng = np.random.default_rng(seed)
    x = representative_object(shape, seed=100 + seed)
    masks = octanary_masks(mask_count, shape, seed=seed)
    mu = forward(x, masks)
    scale = photons_total / mu.sum()
    y = rng.poisson(scale * mu).astype(float)
    result = solve(y, masks)
    return relative_error(np.sqrt(scale) * x, result.estimate), float(y.sum())


@pytest.mark.parametrize("photons", [1e5, 1e6, 1e7])
def test_crb_plan_matches_measured_error_on_a_small_grid(photons):
    shape, k = (32, 32), 8
    errors = [measured_error(shape, k, photons, seed) for seed in (1, 2)]
    measured = float(np.sqrt(np.mean([e * e for e, _ in errors])))
    detected = float(np.mean([p for _, p in errors]))
    predicted = predict_relative_error(shape, k, detected)  # auto: the CRB for 32 x 32
    assert predicted / 2 <= measured <= 2 * predicted
    plan = plan_photons(shape, k, target_relative_error=measured)
    assert plan.method == "crb"
    assert detected / 4 <= plan.photons_total <= 4 * detected  # factor 2 in error = 4 in photons


def test_bound_plan_matches_measured_error_on_a_larger_grid():
    shape, k, photons = (64, 64), 8, 4e6
    measured, detected = measured_error(shape, k, photons, seed=3)
    predicted = predict_relative_error(shape, k, detected)  # auto: the matrix-free bound beyond 32 x 32
    rule = math.sqrt(64 * 64 / detected)
    assert predicted > rule  # the bound asks for more than one photon per pixel (1.33 for K = 8)
    assert predicted / 2 <= measured <= 2 * predicted


def test_crb_and_shot_noise_rule_agree_on_the_order_of_magnitude():
    for shape in ((16, 16), (24, 24)):
        crb = plan_photons(shape, 8, target_relative_error=0.05, method="crb")
        rule = plan_photons(shape, 8, target_relative_error=0.05, method="shot_noise")
        assert rule.photons_total == pytest.approx(shape[0] * shape[1] / 0.05**2)
        assert 0.5 < crb.photons_total / rule.photons_total < 2.0


def test_photons_scale_as_inverse_square_of_the_precision():
    a = plan_photons((128, 128), 6, target_phase_precision_rad=0.1)
    b = plan_photons((128, 128), 6, target_phase_precision_rad=0.01)
    assert b.photons_total == pytest.approx(100 * a.photons_total)
    assert a.method == "crb" and "matrix-free" in a.method_note
    assert a.target_relative_error == a.target_phase_precision_rad == 0.1


def test_saturation_ceiling_splits_into_passes():
    shape, k = (128, 128), 8
    profile = CameraProfile(gain_dn_per_e=0.25, offset_dn=100, dark_noise_e=3.0, saturation_capacity_e=15000.0,
                            quantum_efficiency=0.6, linearity_error_pct=0.1, bit_depth=12, frame_shape=shape,
                            camera_driver="simulated")
    plan = plan_photons(shape, k, target_relative_error=0.002, profile=profile, photon_rate_per_s=1e9)
    ceiling = 0.85 * 15000.0 * shape[0] * shape[1] / plan.peak_to_mean_ratio
    one_set = plan.photons_total / k
    assert plan.passes == math.ceil(one_set / ceiling)
    assert plan.passes > 1
    assert plan.photons_per_pixel_peak <= 0.85 * 15000.0 * (1 + 1e-9)
    assert any("saturation comes first" in w for w in plan.warnings)
    # exposure = detected photons per frame / (rate * QE)
    assert plan.exposure_per_frame_s == pytest.approx(plan.photons_per_frame / (1e9 * 0.6))
    assert plan.total_exposure_s == pytest.approx(plan.exposure_per_frame_s * k * plan.passes)
    assert plan.incident_photons_at_camera == pytest.approx(plan.photons_total / 0.6)


def test_speckle_peak_is_the_harmonic_number():
    # Expected maximum of n iid unit exponentials is H_n (order statistics, from memory); check by sampling.
    rng = np.random.default_rng(0)
    samples = rng.exponential(size=(400, 4096)).max(axis=1).mean()
    assert speckle_peak_to_mean(4096) == pytest.approx(samples, rel=0.03)
    assert speckle_peak_to_mean(3) == pytest.approx(1 + 1 / 2 + 1 / 3)


def test_dose_limit_hit_first_says_so_with_the_numbers():
    area, wavelength = 1e-8, 632.8e-9
    plan = plan_photons((256, 256), 8, target_phase_precision_rad=0.01, quantum_efficiency=0.5, method="shot_noise",
                        optical_transmission=0.5, wavelength_m=wavelength, illuminated_area_m2=area,
                        max_energy_per_area_j_per_m2=0.01)
    assert not plan.feasible
    needed_on_sample = 256 * 256 / 0.01**2 / 0.5 / 0.5
    assert plan.photons_on_sample == pytest.approx(needed_on_sample)
    assert plan.energy_per_area_j_per_m2 == pytest.approx(needed_on_sample * photon_energy_j(wavelength) / area)
    allowed_detected = 0.01 * area / photon_energy_j(wavelength) * 0.5 * 0.5
    assert plan.achievable_relative_error == pytest.approx(math.sqrt(256 * 256 / allowed_detected))
    assert "the dose limit is hit first" in plan.infeasible_reason
    assert f"{plan.energy_per_area_j_per_m2:.3g} J/m^2" in plan.infeasible_reason
    assert "limit of 0.01 J/m^2" in plan.infeasible_reason
    with pytest.raises(PlanInfeasible, match="best is a relative error of"):
        plan.raise_if_infeasible()
    # Planning for the achievable error lands exactly on the limit and is feasible.
    ok = plan_photons((256, 256), 8, target_relative_error=plan.achievable_relative_error * 1.001,
                      quantum_efficiency=0.5, optical_transmission=0.5, wavelength_m=wavelength, method="shot_noise",
                      illuminated_area_m2=area, max_energy_per_area_j_per_m2=0.01)
    assert ok.feasible and ok.energy_per_area_j_per_m2 <= 0.01


def test_laser_power_gives_exposure():
    plan = plan_photons((128, 128), 4, target_relative_error=0.05, laser_power_w=1e-9, wavelength_m=1064e-9,
                        quantum_efficiency=0.4, optical_transmission=0.8)
    rate = 1e-9 / photon_energy_j(1064e-9) * 0.8
    assert plan.exposure_per_frame_s == pytest.approx(plan.photons_per_frame / (rate * 0.4))
    assert not any("quantum efficiency unknown" in w for w in plan.warnings)
    unknown_qe = plan_photons((128, 128), 4, target_relative_error=0.05)
    assert any("quantum efficiency unknown: assumed 1" in w for w in unknown_qe.warnings)


@pytest.mark.parametrize(
    "kwargs, message",
    [
        (dict(), "give exactly one target"),
        (dict(target_phase_precision_rad=0.1, target_relative_error=0.1), "give exactly one target"),
        (dict(target_relative_error=1.5), "must be < 1"),
        (dict(target_phase_precision_rad=-0.1), "target_phase_precision_rad must be a finite number > 0"),
        (dict(target_relative_error=0.1, estimator="guess"), "estimator must be"),
        (dict(target_relative_error=0.1, bit_depth=8, gain_dn_per_e=1.0, offset_dn=300), "offset_dn must lie"),
        (dict(target_relative_error=0.1, method="magic"), "method must be"),
        (dict(target_relative_error=0.1, max_energy_per_area_j_per_m2=1.0), "needs wavelength_m"),
        (dict(target_relative_error=0.1, laser_power_w=1.0), "needs wavelength_m"),
    ],
)
def test_bad_plan_requests(kwargs, message):
    with pytest.raises(PlanError, match=message):
        plan_photons((64, 64), 8, **kwargs)
