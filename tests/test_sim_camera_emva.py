"""The simulated camera *driver* (settings -> frames through open/trigger/grab) measured the way
EMVA 1288 measures a real camera: its photon transfer slope must equal the configured system
gain (including the analog gain factor and binning) and its dark noise the configured read noise.

Outside reference: EMVA Standard 1288, Release 4.0 Linear (2021):
* section 2 (mathematical model of a single pixel): mu_y = mu_y.dark + K eta mu_p and
  sigma_y^2 = K^2 (sigma_d^2 + mu_e) + sigma_q^2, sigma_q^2 = 1/12 DN^2, so
  sigma_y^2 - sigma_y.dark^2 = K (mu_y - mu_y.dark)  (the photon transfer line, slope K);
* section 6 (measurement): temporal variance from two frames taken at the same light,
  sigma_y^2 = var(y_A - y_B) / 2, which removes fixed-pattern noise; the light may be
  varied through the exposure time.
The camera model itself is tested in test_camera_model.py; this file tests the driver that
wraps it (its settings, its gain and binning handling, its frame path), with both its
exact and its fast noise rendering.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from maskrun.drivers.registry import build_driver

PHOTON_RATE_PER_S = 2.0e5  # uniform light on every pixel when the camera runs alone
SETTINGS = dict(
    sensor_shape=[256, 256],
    quantum_efficiency=0.6,
    gain_dn_per_e=0.25,
    read_noise_e=4.0,
    dark_current_e_per_s=0.0,
    offset_dn=100.0,
    bit_depth=14,
    full_well_e=30000.0,
    hot_pixel_fraction=0.0,
    real_time=False,  # frames at once: the statistics do not need the wall clock
    seed=5,
)


_MODE = {"noise_rendering": "exact"}


@pytest.fixture(autouse=True, params=["exact", "fast"])
def noise_rendering(request):
    """Every test runs on both renderings: the fast one (Gaussian shot noise from a bank) must keep
    the same EMVA 1288 linear relations as the exact one (Poisson)."""
    _MODE["noise_rendering"] = request.param
    yield request.param
    _MODE["noise_rendering"] = "exact"


def camera(**overrides):
    return build_driver("camera", "simulated", {**SETTINGS, **_MODE, **overrides})


def pair_stats(cam, exposure_s):
    """EMVA 1288 R4.0 Linear sec. 6: mean of two frames and temporal variance var(y_A - y_B) / 2, DN and DN^2."""
    cam.exposure_s = exposure_s
    a = cam.grab(1.0)
    b = cam.grab(1.0)
    assert a.exposure_s == b.exposure_s == pytest.approx(exposure_s)
    ya, yb = a.pixels.astype(np.float64), b.pixels.astype(np.float64)
    assert ya.max() < cam.max_dn and ya.min() > 0  # no clipping: the linear range
    return 0.5 * (ya.mean() + yb.mean()), np.var(ya - yb) / 2.0


@pytest.mark.parametrize(("analog_gain", "binning"), [(1.0, 1), (2.0, 1), (1.0, 2)])
def test_photon_transfer_slope_equals_the_configured_gain(analog_gain, binning):
    with camera(standalone_photon_rate_per_s=PHOTON_RATE_PER_S) as cam:
        cam.gain = analog_gain
        cam.binning = binning
        k_expected = SETTINGS["gain_dn_per_e"] * analog_gain  # K = data-sheet gain x analog gain factor
        with camera(standalone_photon_rate_per_s=0.0) as dark_cam:  # same camera, shutter closed
            dark_cam.gain = analog_gain
            dark_cam.binning = binning
            mean_dark, var_dark = pair_stats(dark_cam, 0.001)
        xs, ys, mu_p = [], [], []
        for exposure_s in (0.001, 0.0025, 0.005, 0.0075, 0.01):
            mean, var = pair_stats(cam, exposure_s)
            xs.append(mean - mean_dark)
            ys.append(var - var_dark)
            mu_p.append(PHOTON_RATE_PER_S * exposure_s * binning**2)
    # EMVA 1288 R4.0 Linear sec. 2: sigma_y^2 - sigma_y.dark^2 = K (mu_y - mu_y.dark)
    slope, intercept = np.polyfit(xs, ys, 1)
    assert slope == pytest.approx(k_expected, rel=0.04)
    assert abs(intercept) < 0.02 * max(ys)
    # EMVA 1288 R4.0 Linear sec. 2: mu_y - mu_y.dark = K eta mu_p (responsivity R = K eta)
    responsivity = np.polyfit(mu_p, xs, 1)[0]
    assert responsivity == pytest.approx(k_expected * SETTINGS["quantum_efficiency"], rel=0.01)


@pytest.mark.parametrize("read_noise_e", [2.0, 6.0])
def test_dark_noise_equals_the_configured_read_noise(read_noise_e):
    with camera(standalone_photon_rate_per_s=0.0, read_noise_e=read_noise_e) as cam:
        mean, var = pair_stats(cam, 0.001)
    k = SETTINGS["gain_dn_per_e"]
    # EMVA 1288 R4.0 Linear sec. 2: sigma_y.dark^2 = K^2 sigma_d^2 + sigma_q^2, sigma_q^2 = 1/12 DN^2;
    # with no dark current sigma_d is the read noise.
    sigma_d_e = math.sqrt(max(var - 1 / 12, 0.0)) / k
    assert sigma_d_e == pytest.approx(read_noise_e, rel=0.03)
    assert mean == pytest.approx(SETTINGS["offset_dn"], abs=0.05)  # mu_y.dark = offset without dark current


def test_dark_current_adds_to_dark_signal_and_dark_noise():
    dark_current = 2000.0  # e-/s, large so one second-scale exposure shows it clearly
    with camera(standalone_photon_rate_per_s=0.0, dark_current_e_per_s=dark_current) as cam:
        mean_short, var_short = pair_stats(cam, 0.001)
        mean_long, var_long = pair_stats(cam, 0.5)
    k = SETTINGS["gain_dn_per_e"]
    # EMVA 1288 R4.0 Linear sec. 2: mu_y.dark = offset + K mu_d with mu_d = dark_current * t, and the
    # dark electrons are Poisson, so sigma_d^2 = read^2 + dark_current * t.
    assert mean_long - mean_short == pytest.approx(k * dark_current * (0.5 - 0.001), rel=0.01)
    expected_var = k**2 * (SETTINGS["read_noise_e"] ** 2 + dark_current * 0.5) + 1 / 12
    assert var_long == pytest.approx(expected_var, rel=0.04)
    assert var_long > 2 * var_short
