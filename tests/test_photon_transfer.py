"""Photon transfer (EMVA 1288) analysis, the calibration driver and camera profiles.

Outside reference: EMVA Standard 1288, Release 4.0 Linear (2021): the linear camera model
(sec. 2), the two-frame temporal variance sigma_y^2 = var(y_A - y_B)/2, the photon transfer
sigma_y^2 - sigma_y.dark^2 = K (mu_y - mu_y.dark) fitted over 0-70 % of saturation, the
saturation point at the variance peak and the dark noise of the model,
sigma_y.dark^2 = K^2 sigma_d^2 + 1/12 DN^2.
The checks compare the EMVA estimates with the simulated camera's known constants:
gain within 2 %, read noise within 5 %, saturation capacity within 5 % (tolerances of
the project brief; the variance of a variance estimate from N pixels is ~ sqrt(2/N)).
"""

from __future__ import annotations

import json

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from maskrun.daemon.calibrate.calibration import CalibrationAborted, default_exposure_series, measure_photon_transfer
from maskrun.daemon.calibrate.camera_profile import (
    CameraProfile,
    ProfileError,
    ProfileMismatch,
    check_profile_matches,
)
from maskrun.daemon.calibrate.photon_transfer import (
    LightTooWeak,
    SaturatedFromStart,
    TooFewSteps,
    analyse_photon_transfer,
    plot_photon_transfer,
    step_statistics,
)
from maskrun.drivers.base import BenchContext
from maskrun.simulators.camera import SimulatedCamera
from maskrun.simulators.safety_box import SimulatedSafetyBox
from maskrun.simulators.camera_model import CameraNoiseModel
from maskrun.simulators.optics import SimulatedOptics

SHAPE = (128, 128)


def simulate_series(model, exposures_s, rate_photons_per_pixel_per_s, shape=SHAPE, seed=0, response=None):
    """Photon transfer series straight from the noise model (uniform light)."""
    rng = np.random.default_rng(seed)
    dark = np.zeros(shape)
    steps = []
    for t in exposures_s:
        mu_p = rate_photons_per_pixel_per_s * t
        photons = np.full(shape, mu_p if response is None else response(mu_p))
        bright = [model.render(photons, t, rng) for _ in range(2)]
        darks = [model.render(dark, t, rng) for _ in range(2)]
        steps.append(step_statistics(t, bright, darks, photons_per_pixel=mu_p, max_dn=model.max_dn))
    return steps


def test_emva_estimates_match_the_simulated_camera():
    model = CameraNoiseModel(gain_dn_per_e=0.25, read_noise_e=3.0, full_well_e=15000.0, quantum_efficiency=0.6,
                             dark_current_e_per_s=5.0)
    rate = 25000.0  # photons/pixel/s: the well fills at 15000 / 0.6 / 25000 = 1 s
    steps = simulate_series(model, np.linspace(0.02, 1.4, 50), rate)
    r = analyse_photon_transfer(steps, max_dn=model.max_dn)
    assert r.gain_dn_per_e == pytest.approx(0.25, rel=0.02)
    # sigma_d without quantisation noise is the read noise (+ 5 e-/s * t dark electrons, extrapolated to t=0).
    assert r.read_noise_e == pytest.approx(3.0, rel=0.05)
    # EMVA 1288 R4.0 Linear sec. 2: sigma_y.dark^2 = K^2 sigma_d^2 + 1/12 DN^2, so sigma_d is the read noise
    # (one definition of dark noise in maskrun); the measured sigma_y.dark in DN includes the quantisation noise.
    assert r.dark_noise_e == pytest.approx(3.0, rel=0.05) and r.dark_noise_e == r.read_noise_e
    assert r.dark_noise_dn == pytest.approx(np.sqrt(0.25**2 * 9 + 1 / 12), rel=0.05)
    assert r.within_range and r.range_warnings == []
    assert r.saturation_capacity_e == pytest.approx(15000.0, rel=0.05)
    assert r.quantum_efficiency == pytest.approx(0.6, rel=0.02)
    assert r.offset_dn == pytest.approx(100.0, abs=0.5)
    assert r.linearity_error_pct < 0.3
    assert r.linearity_axis == "photons_per_pixel"
    assert 10 <= r.gain_fit_steps <= 40
    # The fit range is 0-70 % of the saturation signal.
    assert np.all(r.signal_dn[r.in_gain_fit] <= 0.7 * r.saturation_signal_dn)


def test_adc_limited_camera_saturates_at_the_adc():
    # Full well larger than the ADC range: saturation is where the ADC clips.
    model = CameraNoiseModel(gain_dn_per_e=0.5, full_well_e=20000.0, offset_dn=95.0, read_noise_e=2.0)
    adc_limit_e = (model.max_dn - 95.0) / 0.5  # 8000 e-
    rate = adc_limit_e / 0.6  # saturates at 1 s
    r = analyse_photon_transfer(simulate_series(model, np.linspace(0.025, 1.5, 60), rate), max_dn=model.max_dn)
    assert r.gain_dn_per_e == pytest.approx(0.5, rel=0.02)
    assert r.saturation_capacity_e == pytest.approx(adc_limit_e, rel=0.05)
    assert r.clipped_fraction[-1] > 0.99


@settings(max_examples=6, deadline=None)
@given(gain=st.floats(0.1, 2.0), read=st.floats(1.0, 12.0), full_well=st.floats(10000.0, 40000.0))
def test_gain_is_recovered_over_a_range_of_cameras(gain, read, full_well):
    bits = 16  # enough ADC range for every drawn camera
    model = CameraNoiseModel(gain_dn_per_e=gain, read_noise_e=read, full_well_e=full_well, bit_depth=bits)
    rate = model.saturation_electrons / model.quantum_efficiency
    # Steps of 1.5 % of saturation. The variance of a clipped signal peaks about 2-3 shot-noise sigma
    # below the well (derived: var(min(X, c)) for X ~ N(mu, mu) peaks near c - 3 sqrt(c)), i.e. within
    # 3 % for wells above 10000 e-; smaller wells would need a looser tolerance. The variance estimate
    # itself scatters by sqrt(2/N) (1.1 % for 128 x 128 pixels), which may move the peak by a step.
    r = analyse_photon_transfer(simulate_series(model, np.linspace(0.015, 1.35, 90), rate, shape=(128, 128)))
    assert r.gain_dn_per_e == pytest.approx(gain, rel=0.03)
    # The variance peak sits up to ~3-4 shot-noise sigma below the well (see above), plus one step
    # and the scatter of the variance estimate: allow that bias below, 3 % above.
    well = model.saturation_electrons
    low = 1.0 - (4.0 / np.sqrt(well) + 0.03)
    assert low * well <= r.saturation_capacity_e <= 1.03 * well


def test_linearity_error_sees_a_nonlinear_response():
    model = CameraNoiseModel()
    exposures = np.linspace(0.02, 1.4, 50)
    linear = analyse_photon_transfer(simulate_series(model, exposures, 25000.0))
    # A response that compresses by up to ~8 % before saturation.
    bent = analyse_photon_transfer(
        simulate_series(model, exposures, 25000.0, response=lambda p: p * (1 - 2.0e-6 * p) if p < 30000 else p * 0.94)
    )
    assert linear.linearity_error_pct < 0.3
    assert bent.linearity_error_pct > 1.0
    assert bent.linearity_error_min_pct < 0 < bent.linearity_error_max_pct


def test_light_too_weak_says_how_long_and_that_advice_works():
    model = CameraNoiseModel()
    rate = 25000.0
    with pytest.raises(LightTooWeak, match="raise the exposure range to at least") as info:
        analyse_photon_transfer(simulate_series(model, np.linspace(0.01, 0.5, 20), rate), max_dn=model.max_dn)
    assert len(info.value.steps) == 20  # the measured steps are kept
    needed = float(str(info.value).split("at least ")[1].split(" s")[0])
    assert needed > 1.0  # the well fills at 1 s
    # Following the advice saturates the camera and the analysis succeeds.
    r = analyse_photon_transfer(simulate_series(model, np.linspace(needed / 50, needed, 50), rate))
    assert r.saturation_capacity_e == pytest.approx(15000.0, rel=0.05)


def test_no_light_at_all_says_check_the_shutter():
    model = CameraNoiseModel()
    with pytest.raises(LightTooWeak, match="check that the shutter opens"):
        analyse_photon_transfer(simulate_series(model, np.linspace(0.01, 0.5, 10), 0.0), max_dn=model.max_dn)


def test_saturated_from_the_first_step():
    model = CameraNoiseModel()
    with pytest.raises(SaturatedFromStart, match="lower the light or the shortest exposure"):
        analyse_photon_transfer(simulate_series(model, np.linspace(0.5, 2.0, 12), 250000.0), max_dn=model.max_dn)


def test_too_few_steps():
    model = CameraNoiseModel()
    with pytest.raises(TooFewSteps, match="at least 5"):
        analyse_photon_transfer(simulate_series(model, [0.1, 1.0, 2.0], 25000.0))


def test_plot_is_written(tmp_path):
    model = CameraNoiseModel()
    r = analyse_photon_transfer(simulate_series(model, np.linspace(0.02, 1.4, 30), 25000.0, shape=(32, 32)))
    path = plot_photon_transfer(r, tmp_path / "ptc.png")
    data = path.read_bytes()
    assert data[:8] == b"\x89PNG\r\n\x1a\n"
    import matplotlib.image

    image = matplotlib.image.imread(path)
    assert image.shape[0] > 300 and image.shape[1] > 1000
    assert image[..., :3].std() > 0.05  # not blank


# ------------------------------------------------------------------ calibration on the simulated bench
def uniform_bench(shape=(64, 64), photons_per_pixel_per_s=25000.0, **camera_settings):
    """Simulated bench lit uniformly: a point source in the sample plane has a flat far field
    (|DFT of a delta|^2 is constant; Goodman, Introduction to Fourier Optics, 2005, ch. 4)."""
    sample = np.zeros(shape, complex)
    sample[0, 0] = 1.0
    optics = SimulatedOptics(sample, np.ones((1, *shape), complex), photons_per_pixel_per_s * shape[0] * shape[1],
                             shape)
    context = BenchContext(optics=optics)
    camera = SimulatedCamera(SimulatedCamera.Settings(real_time=False, seed=3, **camera_settings), context)
    safety = SimulatedSafetyBox(SimulatedSafetyBox.Settings(), context)
    camera.open()
    safety.open()
    return optics, camera, safety


def test_measure_photon_transfer_on_the_simulated_camera(tmp_path):
    optics, camera, safety = uniform_bench()
    calls = []
    exposures = default_exposure_series(camera, longest_s=1.5, steps=50)
    assert exposures[0] == pytest.approx(0.03) and exposures[-1] == pytest.approx(1.5)
    assert np.allclose(np.diff(exposures), 0.03)
    r = measure_photon_transfer(camera, safety, exposures, progress=lambda *a: calls.append(a),
                                photons_per_pixel_per_s=25000.0)
    assert not optics.shutter_open
    assert calls[-1][0] == calls[-1][1] == 200
    assert r.gain_dn_per_e == pytest.approx(0.25, rel=0.02)
    assert r.read_noise_e == pytest.approx(3.0, rel=0.05)
    assert r.saturation_capacity_e == pytest.approx(15000.0, rel=0.05)
    assert r.quantum_efficiency == pytest.approx(0.6, rel=0.02)

    profile = CameraProfile.from_result(r, camera, driver_name="simulated", wavelength_m=632.8e-9)
    path = profile.save(tmp_path / "camera.json")
    loaded = CameraProfile.load(path)
    assert loaded == profile
    assert json.loads(path.read_text())["gain_dn_per_e"] == pytest.approx(r.gain_dn_per_e)
    check_profile_matches(loaded, camera, driver_name="simulated")


def test_probe_finds_a_series_that_saturates():
    optics, camera, safety = uniform_bench(exposure_s=0.05)
    exposures = default_exposure_series(camera, safety)
    assert not optics.shutter_open
    assert len(exposures) == 50
    # Signal would reach the ADC maximum at (4095 - 100) / 0.25 / 0.6 / 25000 = 1.07 s; x1.3 overshoot.
    assert exposures[-1] == pytest.approx(1.3 * (4095 - 100) / 0.25 / 0.6 / 25000.0, rel=0.05)
    r = measure_photon_transfer(camera, safety, exposures)
    assert r.saturation_capacity_e == pytest.approx(15000.0, rel=0.05)
    assert r.linearity_axis == "exposure_s"


def test_shutter_closes_when_the_camera_fails():
    optics, camera, safety = uniform_bench(faults=[{"kind": "disconnect", "at_frame": 150}])
    with pytest.raises(CalibrationAborted, match="stopped after") as info:
        measure_photon_transfer(camera, safety, np.linspace(0.03, 1.5, 50))
    assert not optics.shutter_open
    assert 0 < len(info.value.steps) < 50  # bright steps taken before the fault are kept


def test_interlock_opening_mid_series_stops_the_calibration():
    optics, camera, safety = uniform_bench()

    def open_doors(done, total, what):
        if done >= 120:
            optics.interlock_closed = False

    with pytest.raises(CalibrationAborted, match="shutter closed during the bright frames"):
        measure_photon_transfer(camera, safety, np.linspace(0.03, 1.5, 50), progress=open_doors)
    assert not optics.shutter_open


def test_interlock_open_from_the_start_refuses_to_open_the_shutter():
    optics, camera, safety = uniform_bench()
    optics.interlock_closed = False
    with pytest.raises(CalibrationAborted, match="interlock is open"):
        measure_photon_transfer(camera, safety, np.linspace(0.03, 1.5, 10))
    assert not optics.shutter_open


def test_bad_calibration_requests():
    optics, camera, safety = uniform_bench()
    with pytest.raises(ValueError, match="frames_per_step"):
        measure_photon_transfer(camera, safety, [0.1, 0.2], frames_per_step=1)
    with pytest.raises(ValueError, match="> 0 seconds"):
        measure_photon_transfer(camera, safety, [0.1, -0.2])
    with pytest.raises(ValueError, match="give longest_s, or a safety_box"):
        default_exposure_series(camera)


# ------------------------------------------------------------------ profiles
def make_profile(**overrides):
    values = dict(gain_dn_per_e=0.25, offset_dn=100.0, dark_noise_e=3.2, saturation_capacity_e=15000.0,
                  quantum_efficiency=0.6, linearity_error_pct=0.1, bit_depth=12, frame_shape=(64, 64),
                  camera_driver="simulated", camera_serial=None)
    values.update(overrides)
    return CameraProfile(**values)


def test_profile_mismatches_are_refused():
    _, camera, _ = uniform_bench()
    check_profile_matches(make_profile(), camera)
    with pytest.raises(ProfileMismatch, match=r"frame shape \(32, 32\) in the profile, \(64, 64\) on the camera"):
        check_profile_matches(make_profile(frame_shape=(32, 32)), camera)
    with pytest.raises(ProfileMismatch, match="bit depth 16 in the profile, 12 on the camera"):
        check_profile_matches(make_profile(bit_depth=16), camera)
    camera.serial = "SN-0002"  # a driver that reports a serial number
    with pytest.raises(ProfileMismatch, match="serial 'SN-0001' in the profile, 'SN-0002' on the camera"):
        check_profile_matches(make_profile(camera_serial="SN-0001"), camera)
    camera.gain = 2.0
    with pytest.raises(ProfileMismatch, match="camera gain setting 1 in the profile, 2 now"):
        check_profile_matches(make_profile(camera_serial="SN-0002"), camera)
    with pytest.raises(ProfileMismatch, match="driver 'simulated' in the profile, 'other' now"):
        check_profile_matches(make_profile(camera_serial="SN-0002", camera_gain_setting=2.0), camera,
                              driver_name="other")


def test_profile_files_that_are_wrong_say_so(tmp_path):
    with pytest.raises(ProfileError, match="does not exist; run 'maskrun calibrate'"):
        CameraProfile.load(tmp_path / "missing.json")
    bad = tmp_path / "bad.json"
    bad.write_text("{not json")
    with pytest.raises(ProfileError, match="not readable JSON"):
        CameraProfile.load(bad)
    data = make_profile().model_dump(mode="json")
    data["gain_dn_per_e"] = -1
    data["colour"] = "blue"
    bad.write_text(json.dumps(data))
    with pytest.raises(ProfileError, match="gain_dn_per_e") as info:
        CameraProfile.load(bad)
    assert "colour" in str(info.value)
    data = make_profile().model_dump(mode="json")
    data["schema_version"] = 99
    bad.write_text(json.dumps(data))
    with pytest.raises(ProfileError, match="schema version 99"):
        CameraProfile.load(bad)
