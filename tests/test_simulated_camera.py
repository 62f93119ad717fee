"""The simulated camera: EMVA 1288 linear behaviour, geometry, triggering, faults."""

from __future__ import annotations

import time

import numpy as np
import pytest
from hypothesis import given, settings as hsettings
from hypothesis import strategies as st

from maskrun.drivers import BenchContext, DeviceDisconnected, DeviceFault, DeviceMisconfigured, DeviceTimeout
from maskrun.simulators.camera import SimulatedCamera
from maskrun.simulators.modulator import SimulatedModulator
from maskrun.simulators.optics import SimulatedOptics


def _camera(context=None, **settings):
    base = {"sensor_shape": (64, 64), "real_time": False}
    base.update(settings)
    return SimulatedCamera(SimulatedCamera.Settings(**base), context)


def _optics(grid=(16, 16), sensor=(24, 24), k=3, rate=1e7):
    rng = np.random.default_rng(5)
    sample = np.exp(1j * rng.random(grid))
    masks = np.exp(2j * np.pi * rng.random((k, *grid)))
    return SimulatedOptics(sample, masks, rate, sensor)


def _pair_stats(cam, exposure_s):
    """EMVA 1288 temporal statistics from two frames: mean, and variance var(A - B) / 2."""
    cam.exposure_s = exposure_s
    a = cam.grab(1.0).pixels.astype(np.float64)
    b = cam.grab(1.0).pixels.astype(np.float64)
    return 0.5 * (a.mean() + b.mean()), np.var(a - b) / 2


@pytest.mark.parametrize("gain", [1.0, 3.0])
def test_photon_transfer_matches_the_emva_linear_model(gain):
    # EMVA Standard 1288 Release 4.0 Linear (2021), sec. 2 (model) and the photon transfer method:
    # mu_y - mu_y.dark = K eta mu_p;  sigma_y^2 - sigma_y.dark^2 = K (mu_y - mu_y.dark);
    # temporal variance from two frames, sigma_y^2 = var(y_A - y_B) / 2; dark noise
    # sigma_d = sqrt(sigma_y.dark^2 - sigma_q^2) / K with sigma_q^2 = 1/12 DN^2.
    noise = dict(quantum_efficiency=0.55, gain_dn_per_e=0.2, read_noise_e=4.0, dark_current_e_per_s=10.0,
                 offset_dn=120.0, bit_depth=14, full_well_e=30000.0, gain=gain, seed=3)
    rate = 2e5  # photons per pixel per second
    # 128 x 128 pixels: each variance is then known to about 1 % (tolerances below: 3 %)
    bright = _camera(standalone_photon_rate_per_s=rate, sensor_shape=(128, 128), **noise)
    dark = _camera(standalone_photon_rate_per_s=0.0, sensor_shape=(128, 128), **{**noise, "seed": 4})
    k_true = 0.2 * gain
    signal, variance = [], []
    with bright, dark:
        for exposure_s in np.linspace(0.002, 0.04, 7):
            mu, var = _pair_stats(bright, exposure_s)
            mu_dark, var_dark = _pair_stats(dark, exposure_s)
            assert mu - mu_dark == pytest.approx(k_true * 0.55 * rate * exposure_s, rel=0.01)
            signal.append(mu - mu_dark)
            variance.append(var - var_dark)
        slope = np.polyfit(signal, variance, 1)[0]
        assert slope == pytest.approx(k_true, rel=0.03)
        # dark noise at a short exposure equals the read noise (dark current negligible: 10 e/s * 1e-4 s)
        _, var_dark = _pair_stats(dark, 1e-4)
        sigma_d = np.sqrt(var_dark - 1 / 12) / k_true
        assert sigma_d == pytest.approx(4.0, rel=0.03)
    assert bright.noise_model.gain_dn_per_e == pytest.approx(k_true)


def test_frames_are_deterministic_given_the_seed():
    a, b, c = _camera(seed=7), _camera(seed=7), _camera(seed=8)
    with a, b, c:
        fa, fb, fc = a.grab(1.0), b.grab(1.0), c.grab(1.0)
    np.testing.assert_array_equal(fa.pixels, fb.pixels)
    assert not np.array_equal(fa.pixels, fc.pixels)
    assert fa.pixels.dtype == np.uint16 and fa.pixels.shape == (64, 64)


def test_roi_and_binning_sum_pixels():
    plain, binned = _camera(seed=2, standalone_photon_rate_per_s=5e4), _camera(seed=2, standalone_photon_rate_per_s=5e4)
    with plain, binned:
        plain.roi = (4, 8, 32, 30)
        binned.roi = (4, 8, 32, 30)
        binned.binning = 2
        assert binned.frame_shape == (16, 15)
        one, two = plain.grab(1.0).pixels, binned.grab(1.0)
    expected = one.astype(np.uint32).reshape(16, 2, 15, 2).sum(axis=(1, 3))
    np.testing.assert_array_equal(two.pixels, np.minimum(expected, 4095))
    assert two.metadata["binning"] == 2 and two.metadata["roi"] == [4, 8, 32, 30]


def test_bad_geometry_and_exposure_are_misconfigured():
    cam = _camera()
    with pytest.raises(DeviceMisconfigured, match="does not fit the 64 x 64 sensor"):
        cam.roi = (40, 0, 30, 10)
    with pytest.raises(DeviceMisconfigured, match="binning 3.5"):
        cam.binning = 3.5
    with pytest.raises(DeviceMisconfigured, match=r"exposure 20.0 s outside"):
        cam.exposure_s = 20.0
    with pytest.raises(DeviceMisconfigured, match="gain 0.5"):
        cam.gain = 0.5
    with pytest.raises(DeviceMisconfigured, match="hardware trigger needs"):
        cam.trigger_mode = "hardware"


def test_clipping_at_the_adc_maximum():
    with _camera(standalone_photon_rate_per_s=1e9, bit_depth=10, gain_dn_per_e=1.0) as cam:
        frame = cam.grab(1.0)
    assert cam.max_dn == 1023 and frame.pixels.max() == 1023 and (frame.pixels == 1023).all()


def test_frames_follow_the_optics():
    optics = _optics()
    optics.shutter_open = True
    optics.shown_mask = 1
    cam = _camera(BenchContext(optics=optics), sensor_shape=None, read_noise_e=0.0, dark_current_e_per_s=0.0,
                  full_well_e=1e9, bit_depth=16, gain_dn_per_e=0.05, exposure_s=0.1)
    with cam:
        assert cam.sensor_shape == (24, 24)
        frames = np.stack([cam.grab(1.0).pixels.astype(float) for _ in range(8)])
        meta = cam.grab(1.0).metadata
        expected = cam.noise_model.mean_dn(optics.expected_photons(0.1), 0.1)
        # the mean frame follows the expected pattern (shot noise only)
        assert np.corrcoef(frames.mean(0).ravel(), expected.ravel())[0, 1] > 0.99
        photons = (frames.mean(0) - 100.0).sum() / (0.05 * 0.6)
        assert photons == pytest.approx(1e7 * 0.1, rel=0.01)
        optics.shutter_open = False
        dark = cam.grab(1.0).pixels
        assert abs(dark.astype(float).mean() - 100.0) < 0.5
    assert meta["sim_shown_mask"] == 1 and meta["sim_shutter_open"] is True
    assert meta["sensor_temperature_c"] == 20.0


def test_sensor_shape_must_match_the_bench():
    with pytest.raises(DeviceMisconfigured, match=r"sensor_shape \[64, 64\] differs.*\[24, 24\]"):
        _camera(BenchContext(optics=_optics())).open()


def test_software_trigger_snapshots_the_optics_at_trigger_time():
    optics = _optics()
    optics.shutter_open = True
    cam = _camera(BenchContext(optics=optics), sensor_shape=None)
    with cam:
        optics.shown_mask = 0
        cam.trigger()
        optics.shown_mask = 2  # changes after the exposure started do not reach that frame
        assert cam.grab(1.0).metadata["sim_shown_mask"] == 0
        assert cam.grab(1.0).metadata["sim_shown_mask"] == 2  # grab with nothing pending exposes now


def test_hardware_trigger_from_the_modulator():
    optics = _optics()
    optics.shutter_open = True
    ctx = BenchContext(optics=optics)
    cam = _camera(ctx, sensor_shape=None)
    mod = SimulatedModulator(SimulatedModulator.Settings(settle_s=0.02), ctx)
    with cam, mod:
        mod.load(optics.masks)
        optics.fire_trigger()  # a stale pulse from before arming is cleared
        cam.trigger_mode = "hardware"
        t0 = time.monotonic()
        with pytest.raises(DeviceTimeout, match="no hardware trigger within 0.1 s"):
            cam.grab(0.1)
        assert 0.1 <= time.monotonic() - t0 < 0.5
        for k in (2, 0, 1):
            mod.show(k)
            frame = cam.grab(1.0)
            assert frame.metadata["sim_shown_mask"] == k and frame.metadata["trigger_mode"] == "hardware"
            assert mod.ready()


def test_real_time_frames_take_the_exposure_and_readout():
    cam = _camera(real_time=True, exposure_s=0.05, readout_latency_s=0.02)
    with cam:
        t0 = time.monotonic()
        frame = cam.grab(1.0)
        assert time.monotonic() - t0 >= 0.07
        assert frame.exposure_s == 0.05 and abs(frame.timestamp_s - time.time()) < 1
        t0 = time.monotonic()
        with pytest.raises(DeviceTimeout, match="exposure plus the readout latency"):
            cam.grab(0.03)
        assert 0.03 <= time.monotonic() - t0 < 0.3


def test_dropped_stale_and_corrupted_frames():
    faults = [{"kind": "dropped", "at_frame": 2}, {"kind": "stale", "at_frame": 3, "count": 2},
              {"kind": "corrupted", "at_frame": 6}]
    with _camera(faults=faults) as cam:
        f1 = cam.grab(1.0)
        f2 = cam.grab(1.0)
        f3 = cam.grab(1.0)
        f4 = cam.grab(1.0)
        f5 = cam.grab(1.0)
        with pytest.raises(DeviceFault, match="frame 5 failed its integrity check"):
            cam.grab(1.0)
        f7 = cam.grab(1.0)
        ids = [f.frame_id for f in (f1, f2, f3, f4, f5, f7)]
    assert ids == [1, 3, 3, 3, 4, 6]  # 2 dropped, 5 lost to corruption
    assert f3 is f2 and f4 is f2  # stale: the same frame again
    assert not np.array_equal(f5.pixels, f2.pixels)


def test_timeout_fault_waits_the_timeout_and_loses_the_exposure():
    optics = _optics()
    optics.shutter_open = True
    cam = _camera(BenchContext(optics=optics), sensor_shape=None, faults=[{"kind": "timeout", "at_frame": 2}])
    with cam:
        optics.shown_mask = 0
        cam.trigger()
        assert cam.grab(1.0).frame_id == 1
        optics.shown_mask = 1
        cam.trigger()
        t0 = time.monotonic()
        with pytest.raises(DeviceTimeout, match="no frame within 0.2 s"):
            cam.grab(0.2)
        assert 0.2 <= time.monotonic() - t0 < 0.6
        optics.shown_mask = 2  # the retake sees the optics as they are now, not the lost exposure
        cam.trigger()
        frame = cam.grab(1.0)
        assert frame.frame_id == 2 and frame.metadata["sim_shown_mask"] == 2
        cam.trigger()
        optics.shown_mask = 0
        assert cam.grab(1.0).metadata["sim_shown_mask"] == 2  # nothing stale left in the queue


def test_disconnect_persists_until_reopened():
    with _camera(faults=[{"kind": "disconnect", "at_frame": 2}]) as cam:
        cam.grab(1.0)
        with pytest.raises(DeviceDisconnected, match="link is down"):
            cam.grab(1.0)
        with pytest.raises(DeviceDisconnected):
            cam.trigger()
        cam.close()
        cam.open()
        assert cam.grab(1.0).frame_id == 2
    with pytest.raises(DeviceDisconnected, match="not open"):
        cam.grab(1.0)


def test_hot_pixels_stay_put():
    settings = dict(hot_pixel_fraction=0.01, hot_pixel_dark_current_e_per_s=2000.0, standalone_photon_rate_per_s=0.0,
                    exposure_s=1.0, gain_dn_per_e=0.25, offset_dn=100.0, seed=21)
    a, b = _camera(**settings), _camera(**settings)
    with a, b:
        hot = [cam.grab(2.0).pixels > 100 + 0.25 * 1000 for cam in (a, a, b)]
    assert hot[0].sum() == round(0.01 * 64 * 64)
    np.testing.assert_array_equal(hot[0], hot[1])
    np.testing.assert_array_equal(hot[0], hot[2])


@hsettings(max_examples=25, deadline=None)
@given(r0=st.integers(0, 30), c0=st.integers(0, 30), rows=st.integers(1, 34), cols=st.integers(1, 34),
       binning=st.integers(1, 4))
def test_frame_shape_follows_roi_and_binning(r0, c0, rows, cols, binning):
    cam = _camera(sensor_shape=(64, 64))
    with cam:
        cam.roi = (r0, c0, rows, cols)
        if binning > min(rows, cols):
            with pytest.raises(DeviceMisconfigured):
                cam.binning = binning
            return
        cam.binning = binning
        frame = cam.grab(1.0)
    assert frame.pixels.shape == cam.frame_shape == (rows // binning, cols // binning)
    assert frame.pixels.max() <= cam.max_dn


def test_fast_rendering_follows_the_light_on_the_bench_like_the_exact_one():
    # The fast mode computes the mean image once per light and must place it as the exact mode does:
    # the mean over many frames of each rendering estimates offset + K (eta mu_p + dark) per pixel
    # (EMVA 1288 R4.0 Linear, sec. 2, mu_y = mu_y.dark + K eta mu_p), and the per-pixel temporal
    # variance is K^2 (read^2 + mu_e) + 1/12 (same section) in both.
    optics = _optics(rate=4e6)
    mod = SimulatedModulator(SimulatedModulator.Settings(), BenchContext(optics=optics))
    mod.open()
    mod.load(optics.masks)
    optics.shutter_open = True
    noise = dict(quantum_efficiency=0.6, gain_dn_per_e=0.25, read_noise_e=3.0, dark_current_e_per_s=5.0,
                 offset_dn=100.0, bit_depth=16, full_well_e=1e6, seed=9, sensor_shape=(24, 24))
    means, variances = {}, {}
    for mode in ("exact", "fast"):
        cam = _camera(BenchContext(optics=optics), noise_rendering=mode, **noise)
        with cam:
            cam.exposure_s = 0.01
            for k in (0, 2):
                mod.show(k)
                frames = np.stack([cam.grab(1.0).pixels.astype(np.float64) for _ in range(400)])
                means[mode, k] = frames.mean(axis=0)
                variances[mode, k] = frames.var(axis=0, ddof=1)
    model_mean = {}
    for k in (0, 2):
        mod.show(k)
        mu_e = 0.6 * optics.expected_photons(0.01) + 0.05
        expected_var = 0.25 ** 2 * (9.0 + mu_e) + 1 / 12
        model_mean[k] = 100.0 + 0.25 * mu_e
        for mode in ("exact", "fast"):
            se = np.sqrt(expected_var / 400)
            assert np.max(np.abs(means[mode, k] - model_mean[k]) / se) < 5.0, (mode, k)
            assert np.median(variances[mode, k] / expected_var) == pytest.approx(1.0, abs=0.05), (mode, k)
    assert np.abs(means["fast", 0] - means["fast", 2]).max() > 10  # the light of each mask, not one cached image


def test_fast_rendering_is_seeded_and_its_frames_are_independent_at_each_pixel():
    def frames(seed, n=6):
        with _camera(noise_rendering="fast", standalone_photon_rate_per_s=1e5, sensor_shape=(128, 128),
                     seed=seed, bit_depth=16, full_well_e=1e6) as cam:
            return [cam.grab(1.0).pixels.astype(np.float64) for _ in range(n)]

    a, b = frames(1), frames(1)
    assert all(np.array_equal(x, y) for x, y in zip(a, b))
    c = frames(2)
    assert not np.array_equal(a[0], c[0])
    # temporal noise of one pixel in two frames: uncorrelated (correlation of the differences to the mean)
    d = [x - 100.0 - 0.25 * 0.6 * 1e5 * 0.01 for x in a]
    for i in range(len(d) - 1):
        r = np.corrcoef(d[i].ravel(), d[i + 1].ravel())[0, 1]
        assert abs(r) < 0.03  # 16384 pixels: the standard error of r is 0.008


def test_fast_rendering_delivers_at_the_exposure_rate_in_real_time():
    with _camera(noise_rendering="fast", real_time=True, standalone_photon_rate_per_s=1e5,
                 sensor_shape=(512, 512)) as cam:
        cam.exposure_s = 0.01
        cam.grab(1.0)
        t0 = time.monotonic()
        for _ in range(20):
            cam.trigger()
            cam.grab(1.0)
        per_frame = (time.monotonic() - t0) / 20
    assert per_frame >= 0.01  # never faster than the exposure
