"""Tests of the linear camera noise model against EMVA 1288.

Outside reference for the expected values: EMVA Standard 1288, Release 4.0 Linear (2021),
section 2 "Mathematical model of a single pixel" (mean: mu_y = mu_y.dark + K*eta*mu_p;
variance: sigma_y^2 = K^2 (sigma_d^2 + mu_e) + sigma_q^2 with sigma_q^2 = 1/12 DN^2) and
the temporal variance estimator from two frames, sigma_y^2 = var(y_A - y_B) / 2 (section 6).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from maskrun.simulators.camera_model import CameraNoiseModel

SHAPE = (256, 256)
EXPOSURE_S = 0.02


def temporal_variance_dn2(model, photons, exposure_s, rng):
    """EMVA 1288 R4.0 Linear sec. 6: sigma_y^2 = var(y_A - y_B) / 2 from two frames."""
    a = model.render(photons, exposure_s, rng).astype(np.float64)
    b = model.render(photons, exposure_s, rng).astype(np.float64)
    return 0.5 * (a.mean() + b.mean()), np.var(a - b) / 2.0


def test_mean_follows_emva_linear_model():
    model = CameraNoiseModel()
    rng = np.random.default_rng(11)
    for mu_p in (0.0, 500.0, 5000.0, 15000.0):
        mean, _ = temporal_variance_dn2(model, np.full(SHAPE, mu_p), EXPOSURE_S, rng)
        # EMVA 1288 R4.0 Linear, sec. 2: mu_y = mu_y.dark + K * eta * mu_p
        expected = model.offset_dn + model.gain_dn_per_e * (
            model.quantum_efficiency * mu_p + model.dark_current_e_per_s * EXPOSURE_S
        )
        assert mean == pytest.approx(expected, abs=0.05 + 1e-4 * expected)


def test_photon_transfer_slope_equals_gain():
    model = CameraNoiseModel(gain_dn_per_e=0.37, read_noise_e=4.0)
    rng = np.random.default_rng(12)
    mean_dark, var_dark = temporal_variance_dn2(model, np.zeros(SHAPE), EXPOSURE_S, rng)
    xs, ys = [], []
    for mu_p in (1000.0, 3000.0, 6000.0, 10000.0, 14000.0):
        mean, var = temporal_variance_dn2(model, np.full(SHAPE, mu_p), EXPOSURE_S, rng)
        xs.append(mean - mean_dark)
        ys.append(var - var_dark)
    # EMVA 1288 R4.0 Linear, sec. 2: sigma_y^2 - sigma_y.dark^2 = K (mu_y - mu_y.dark)
    slope = np.polyfit(xs, ys, 1)[0]
    assert slope == pytest.approx(model.gain_dn_per_e, rel=0.02)


@pytest.mark.parametrize("exposure_s", [0.001, 0.5, 4.0])
def test_dark_temporal_noise(exposure_s):
    model = CameraNoiseModel(gain_dn_per_e=0.5, read_noise_e=5.0, dark_current_e_per_s=10.0)
    _, var = temporal_variance_dn2(model, np.zeros(SHAPE), exposure_s, np.random.default_rng(3))
    # EMVA 1288 R4.0 Linear, sec. 2: sigma_y.dark^2 = K^2 sigma_d^2 + sigma_q^2,
    # sigma_d^2 = read^2 + dark electrons (Poisson), sigma_q^2 = 1/12 DN^2 (uniform rounding).
    expected = model.gain_dn_per_e**2 * (model.read_noise_e**2 + model.dark_current_e_per_s * exposure_s) + 1 / 12
    assert var == pytest.approx(expected, rel=0.03)
    assert model.dark_noise_e(exposure_s) == pytest.approx(
        math.sqrt(model.read_noise_e**2 + model.dark_current_e_per_s * exposure_s)
    )


def test_full_well_clips_signal_and_kills_shot_noise():
    model = CameraNoiseModel(read_noise_e=2.0)
    frame = model.render(np.full(SHAPE, 1e6), EXPOSURE_S, np.random.default_rng(4)).astype(float)
    expected = model.offset_dn + model.gain_dn_per_e * model.full_well_e
    assert frame.mean() == pytest.approx(expected, abs=0.1)
    # Only read noise and rounding remain once the well is full.
    assert frame.std() < 2 * math.sqrt((model.gain_dn_per_e * 2.0) ** 2 + 1 / 12)
    assert model.saturation_electrons == model.full_well_e


def test_adc_clips_at_max_dn():
    model = CameraNoiseModel(gain_dn_per_e=1.0, bit_depth=10, offset_dn=50.0, full_well_e=30000.0)
    assert model.max_dn == 1023
    frame = model.render(np.full(SHAPE, 1e5), EXPOSURE_S, np.random.default_rng(5))
    assert frame.dtype == np.uint16
    assert (frame == 1023).all()
    assert model.saturation_electrons == pytest.approx((1023 - 50) / 1.0)


def test_eight_bit_camera_gives_uint8():
    model = CameraNoiseModel(bit_depth=8, offset_dn=10.0, gain_dn_per_e=0.02)
    frame = model.render(np.full((8, 8), 100.0), 0.01, np.random.default_rng(0))
    assert frame.dtype == np.uint8


def test_out_buffer_is_reused_and_seeded_frames_repeat():
    model = CameraNoiseModel()
    photons = np.random.default_rng(0).uniform(0, 20000, size=(64, 48)).astype(np.float32)
    out = np.empty((64, 48), dtype=np.uint16)
    result = model.render(photons, 0.1, np.random.default_rng(99), out=out)
    assert result is out
    again = model.render(photons, 0.1, np.random.default_rng(99))
    np.testing.assert_array_equal(out, again)
    with pytest.raises(ValueError, match="out must have shape"):
        model.render(photons, 0.1, np.random.default_rng(1), out=np.empty((64, 48), np.uint8))


def test_hot_pixels_are_fixed_and_bright_in_the_dark():
    model = CameraNoiseModel(hot_pixel_fraction=0.01, hot_pixel_dark_current_e_per_s=4000.0)
    mask = model.hot_pixel_mask(SHAPE, seed=7)
    assert mask.sum() == round(0.01 * SHAPE[0] * SHAPE[1])
    np.testing.assert_array_equal(mask, model.hot_pixel_mask(SHAPE, seed=7))
    assert not np.array_equal(mask, model.hot_pixel_mask(SHAPE, seed=8))
    frame = model.render(np.zeros(SHAPE), 1.0, np.random.default_rng(1), hot_pixels=mask).astype(float)
    hot_mean = frame[mask].mean()
    expected_hot = model.offset_dn + model.gain_dn_per_e * 4000.0
    assert hot_mean == pytest.approx(expected_hot, rel=0.01)
    assert frame[~mask].mean() == pytest.approx(model.offset_dn + model.gain_dn_per_e * 5.0, abs=0.05)
    with pytest.raises(ValueError, match="hot_pixels mask shape"):
        model.render(np.zeros((4, 4)), 1.0, np.random.default_rng(1), hot_pixels=mask)


@pytest.mark.parametrize(
    "field, value",
    [
        ("quantum_efficiency", 0.0),
        ("quantum_efficiency", 1.5),
        ("gain_dn_per_e", 0.0),
        ("read_noise_e", -1.0),
        ("dark_current_e_per_s", -0.1),
        ("offset_dn", 5000.0),
        ("offset_dn", float("nan")),
        ("bit_depth", 17),
        ("bit_depth", 12.5),
        ("full_well_e", 0.0),
        ("hot_pixel_fraction", 1.2),
        ("hot_pixel_dark_current_e_per_s", -5.0),
    ],
)
def test_bad_parameters_name_the_field(field, value):
    with pytest.raises(ValueError, match=field):
        CameraNoiseModel(**{field: value})


def test_bad_render_input_is_refused():
    model = CameraNoiseModel()
    rng = np.random.default_rng(0)
    with pytest.raises(ValueError, match="photons must be finite and >= 0"):
        model.render(np.array([[1.0, -2.0]]), 0.1, rng)
    with pytest.raises(ValueError, match="exposure_s"):
        model.render(np.ones((2, 2)), -0.1, rng)


@settings(max_examples=40, deadline=None)
@given(
    gain=st.floats(0.01, 20.0),
    bits=st.integers(6, 16),
    read=st.floats(0.0, 50.0),
    level=st.floats(0.0, 1e7),
    qe=st.floats(0.01, 1.0),
)
def test_output_always_inside_adc_range(gain, bits, read, level, qe):
    model = CameraNoiseModel(
        gain_dn_per_e=gain, bit_depth=bits, read_noise_e=read, quantum_efficiency=qe, offset_dn=min(10.0, 2**bits - 2)
    )
    frame = model.render(np.full((8, 8), level), 0.01, np.random.default_rng(0))
    assert frame.dtype == (np.uint8 if bits <= 8 else np.uint16)
    assert int(frame.max()) <= model.max_dn
