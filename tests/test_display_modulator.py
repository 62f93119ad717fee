"""The `display` modulator under a real X server (Xvfb with two screens): after every show the
test reads that screen back (GetImage of the root window) and compares it exactly with the grey
image it computes itself from the mask, the response table, the correction and the mapping."""

from __future__ import annotations

import json
import os
import time

import numpy as np
import pytest
from hypothesis import given, settings, strategies as st

from maskrun.drivers import BenchContext, DeviceDisconnected, DeviceMisconfigured
from maskrun.drivers.display_images import check_mask_family
from maskrun.drivers.display_modulator import choose_screen
from maskrun.drivers.modulator_profile import ModulatorProfile, linear_profile
from maskrun.drivers.registry import build_driver
from maskrun.reconstruct.masks import binary_amplitude_masks, quantized_phase_masks, random_phase_masks
from xvfbhelp import expected_phase_image, screenshot, xvfb_server

pytest.importorskip("Xlib")

WAVELENGTH_M = 633e-9
SCREEN1 = (600, 800)  # rows, cols of X screen 1


@pytest.fixture(scope="module")
def xserver():
    with xvfb_server("640x480x24", "800x600x24") as (display, _proc):
        yield display


def _driver(display, tmp_path, **settings):
    settings = {"x_display": display, "settle_s": 0.0, **settings}
    return build_driver("modulator", "display", settings, BenchContext(config_dir=str(tmp_path), wavelength_m=WAVELENGTH_M))


def _grey_shot(display, x_screen=1, shape=SCREEN1):
    rgb = screenshot(display, x_screen, 0, 0, shape[1], shape[0])
    # every pixel must be grey (R = G = B): the grey level goes out unchanged on all three channels
    assert np.array_equal(rgb[..., 0], rgb[..., 1]) and np.array_equal(rgb[..., 1], rgb[..., 2])
    return rgb[..., 0]


def test_grey_for_phase_is_the_nearest_table_level():
    # the table lookup the driver relies on, checked by brute force away from the decision
    # boundaries (the lookup bins the circle in 4096 steps)
    prof = linear_profile(200, WAVELENGTH_M)  # 2 pi at grey 200: levels 200..255 wrap past 2 pi
    phases = np.random.default_rng(3).uniform(-10, 10, 20000)
    table = np.mod(prof.phase, 2 * np.pi)
    dist = np.abs(np.angle(np.exp(1j * (phases[:, None] - table[None, :]))))
    best = prof.grey[np.argmin(dist, axis=1)]
    srt = np.sort(dist, axis=1)
    clear = srt[:, 1] - srt[:, 0] > 2 * (2 * np.pi / 4096)
    got = prof.grey_for_phase(phases)
    # several grey levels can carry the same phase modulo 2 pi; compare the phases they give
    assert np.allclose(np.mod(prof.phase_of_grey(got[clear]), 2 * np.pi), np.mod(prof.phase_of_grey(best[clear]), 2 * np.pi))


def test_screens_are_listed_and_an_unknown_screen_is_refused(xserver, tmp_path):
    mod = _driver(xserver, tmp_path, screen="HDMI-7")
    with pytest.raises(DeviceMisconfigured) as err:
        mod.open()
    text = str(err.value)
    # both X screens of the server are listed, by index, label and geometry
    assert "no screen 'HDMI-7'" in text and "0: 0/screen  640x480+0+0" in text and "1: 1/screen  800x600+0+0" in text
    # the other ways of naming a screen, against the list the X server gave
    mod = _driver(xserver, tmp_path, screen="800x600+0+0")
    mod.open()
    try:
        assert mod.screen["x_screen"] == 1 and (mod.screen["width"], mod.screen["height"]) == (800, 600)
        listed = mod.screens
    finally:
        mod.close()
    for spec in (5, "3/screen", "1024x768+0+0", None, "screen"):
        with pytest.raises(DeviceMisconfigured, match="800x600"):
            choose_screen(spec, listed)
    for spec in ("1/screen", 1, "1", "1/800x600+0+0"):
        assert choose_screen(spec, listed)["index"] == 1


def test_phase_masks_reach_the_screen_exactly(xserver, tmp_path):
    rng = np.random.default_rng(5)
    masks = quantized_phase_masks(3, (24, 20), levels=8, seed=2)
    # a measured-looking non-linear response: 2 pi at grey 230, sub-linear curve
    g = np.arange(256)
    prof = ModulatorProfile(wavelength_m=WAVELENGTH_M, grey_levels=g.tolist(),
                            phase_rad=(2 * np.pi * (g / 230.0) ** 1.15).tolist(), measured=True, method="test")
    prof.save(tmp_path / "slm.json")
    correction = rng.uniform(0, 2 * np.pi, SCREEN1)
    np.save(tmp_path / "corr.npy", correction)
    # a ramp period whose phases never land exactly on an edge of the table lookup's phase bins
    # (12.5 px would, every 25 px), so the test's own sums cannot round to the other side of one
    settings = dict(screen=1, profile="slm.json", correction="corr.npy", blaze_period_px=[0.0, 12.31],
                    superpixel_px=[4, 3], offset_px=[100, 200], active_region_px=[90, 210, 80, 50], outside_grey=17,
                    readback_check=True, presented_log="shown.jsonl")
    mod = _driver(xserver, tmp_path, **settings)
    mod.check_masks("quantized_phase", masks)
    mod.open()
    try:
        mod.load(masks)
        for k in (2, 0, 1, 2):
            mod.show(k)
            shot = _grey_shot(xserver)
            want = expected_phase_image(masks[k], prof, SCREEN1, (4, 3), (100, 200), (90, 210, 80, 50), 17,
                                         correction, (0.0, 12.31))
            assert np.array_equal(shot, want), f"mask {k}: {np.count_nonzero(shot != want)} pixels differ"
            assert mod.ready()
        # the active region is clipped to the mask's footprint (rows 100..195, cols 210..259)
        assert mod.mapping.active_region_px == (100, 210, 70, 50)
        log = [json.loads(line) for line in (tmp_path / "shown.jsonl").read_text().splitlines()]
        assert [e["index"] for e in log] == [2, 0, 1, 2] and all(e["mode"] in ("copy", "flip") for e in log)
        assert [e["serial"] for e in log] == sorted(e["serial"] for e in log)
        assert all(e["sha256"] == mod.image_sha256[e["index"]] for e in log)
        rec = mod.describe()
        assert rec["response"]["measured"] and rec["response"]["phase_rad"] == prof.phase_rad
        assert rec["mapping"]["superpixel_px"] == [4, 3] and rec["correction"]["path"].endswith("corr.npy")
    finally:
        mod.close()


def test_blazed_ramp_moves_the_light_to_the_first_order(xserver, tmp_path):
    # a flat mask plus a ramp of period 8 px along the columns: the far field (FFT of exp(i phase)
    # of what the screen shows) has its peak at 1/8 cycles per pixel, the first order, and almost
    # nothing left in the zero order (Fourier shift theorem: J. W. Goodman, Introduction to
    # Fourier Optics, 3rd ed., 2005, sec. 2.1.3; section number from memory)
    masks = np.ones((1, 64, 64), dtype=complex)
    mod = _driver(xserver, tmp_path, screen=1, grey_levels_per_2pi=256, blaze_period_px=[0, 8], offset_px=[0, 0])
    mod.open()
    try:
        mod.load(masks)
        mod.show(0)
        shot = _grey_shot(xserver)[:64, :64].astype(float)
    finally:
        mod.close()
    field = np.exp(2j * np.pi * shot / 256)
    far = np.abs(np.fft.fft2(field)) ** 2
    peak = np.unravel_index(np.argmax(far), far.shape)
    assert peak == (0, 64 // 8)
    assert far[0, 0] < 1e-6 * far.sum() and far[peak] > 0.99 * far.sum()


def test_binary_masks_become_on_off_levels(xserver, tmp_path):
    masks = binary_amplitude_masks(2, (16, 16), seed=4)
    mod = _driver(xserver, tmp_path, screen="0/640x480+0+0", device="binary_amplitude", on_grey=200, off_grey=30,
                  outside_grey=5, superpixel_px=[2, 2])
    mod.open()
    try:
        mod.load(masks)
        for k in (1, 0):
            mod.show(k)
            shot = _grey_shot(xserver, 0, (480, 640))
            want = np.full((480, 640), 5, np.uint8)
            big = np.kron(masks[k].real, np.ones((2, 2)))
            r0, c0 = (480 - 32) // 2, (640 - 32) // 2  # centred by default
            want[r0:r0 + 32, c0:c0 + 32] = np.where(big > 0.5, 200, 30)
            assert np.array_equal(shot, want)
    finally:
        mod.close()


def test_wrong_masks_and_families_are_refused(xserver, tmp_path):
    mod = _driver(xserver, tmp_path, screen=1, superpixel_px=[10, 10])
    mod.open()
    try:
        with pytest.raises(DeviceMisconfigured, match="does not fit the 600 x 800 screen"):
            mod.load(random_phase_masks(2, (64, 64)))  # 640 x 640 device pixels
        with pytest.raises(DeviceMisconfigured, match=r"shape \(K, H, W\)"):
            mod.load(np.ones((8, 8)))
        with pytest.raises(DeviceMisconfigured, match="no masks loaded"):
            mod.show(0)
        mod.load(random_phase_masks(2, (8, 8)))
        with pytest.raises(DeviceMisconfigured, match="outside 0..1"):
            mod.show(2)
    finally:
        mod.close()
    with pytest.raises(DeviceMisconfigured, match="octanary.*can impose: random_phase, quantized_phase, file"):
        check_mask_family("phase", "octanary")
    with pytest.raises(DeviceMisconfigured, match="can impose: binary_amplitude, file"):
        check_mask_family("binary_amplitude", "random_phase")
    with pytest.raises(DeviceMisconfigured, match="not phase-only"):
        check_mask_family("phase", "file", np.full((1, 4, 4), 0.5 + 0j))
    check_mask_family("binary_amplitude", "file", binary_amplitude_masks(2, (4, 4)))


def test_display_lost_raises_the_disconnect_error(tmp_path):
    from Xlib import display as xdisplay

    with xvfb_server("320x240x24", "320x240x24") as (display, proc):
        mod = _driver(display, tmp_path, screen=1)
        mod.open()
        mod.load(random_phase_masks(2, (8, 8)))
        mod.show(0)
        # another X client closes the modulator's window
        d = xdisplay.Display(display)
        root = d.screen(1).root
        ours = [w for w in root.query_tree().children if w.get_wm_name() == "maskrun modulator"]
        assert len(ours) == 1
        ours[0].destroy()
        d.sync()
        d.close()
        with pytest.raises(DeviceDisconnected, match="modulator window was (closed|taken off the screen)"):
            _show_until_lost(mod)
        # reopening (what the sequencer's reconnect does) gives a new window
        mod.open()
        mod.load(random_phase_masks(2, (8, 8)))
        mod.show(1)
        # the X server stops (the screen goes away)
        proc.terminate()
        proc.wait(10)
        with pytest.raises(DeviceDisconnected):
            _show_until_lost(mod)
        with pytest.raises(DeviceDisconnected):
            mod.open()
        mod.close()


def test_a_stuck_x_server_times_out_and_the_display_is_reopened(tmp_path):
    import signal

    from maskrun.drivers import DeviceTimeout

    with xvfb_server("320x240x24") as (display, proc):
        mod = _driver(display, tmp_path, screen=0, present_timeout_s=0.5)
        mod.open()
        mod.load(random_phase_masks(2, (8, 8)))
        mod.show(0)
        os.kill(proc.pid, signal.SIGSTOP)  # the X server stops answering
        try:
            t0 = time.monotonic()
            with pytest.raises(DeviceTimeout, match="no answer from the X server within 0.5 s"):
                mod.show(1)
            assert time.monotonic() - t0 < 3.0
        finally:
            os.kill(proc.pid, signal.SIGCONT)
        # the unresponsive display process was replaced: the next show asks for a reconnect
        with pytest.raises(DeviceDisconnected, match="not open"):
            mod.show(1)
        mod.open()
        mod.load(random_phase_masks(2, (8, 8)))
        mod.show(1)
        assert list(mod.presented)[-1]["index"] == 1
        mod.close()


def _show_until_lost(mod, timeout_s=10.0):
    """Show masks until the driver notices the loss (it is reported asynchronously by the X server)."""
    t_end = time.monotonic() + timeout_s
    while time.monotonic() < t_end:
        mod.show(0)
        time.sleep(0.05)
    raise AssertionError("the display loss was never reported")


def test_screens_verb_lists_what_the_driver_accepts(xserver):
    import shutil
    import subprocess
    import sys
    from pathlib import Path

    exe = shutil.which("maskrun") or str(Path(sys.executable).with_name("maskrun"))
    r = subprocess.run([exe, "screens", "--display", xserver, "--json"], capture_output=True, text=True, timeout=60)
    assert r.returncode == 0, r.stderr
    screens = json.loads(r.stdout)
    assert [(s["index"], s["label"], s["width"], s["height"]) for s in screens] == [(0, "0/screen", 640, 480),
                                                                                   (1, "1/screen", 800, 600)]
    r = subprocess.run([exe, "screens", "--display", ":9999"], capture_output=True, text=True, timeout=60)
    assert r.returncode == 2 and "cannot connect to X display :9999" in r.stderr and "Traceback" not in r.stderr


@given(sr=st.integers(1, 4), sc=st.integers(1, 4), dr=st.integers(0, 12), dc=st.integers(0, 12),
       a=st.tuples(st.integers(0, 40), st.integers(0, 40), st.integers(1, 50), st.integers(1, 50)),
       outside=st.integers(0, 255), per2pi=st.sampled_from([256, 230, 200]))
@settings(max_examples=40, deadline=None)
def test_the_mapping_matches_the_tests_own_placement(sr, sc, dr, dc, a, outside, per2pi):
    from maskrun.drivers.display_images import make_mapping, phase_images

    screen = (60, 70)
    masks = quantized_phase_masks(2, (9, 7), levels=8, seed=sr * 10 + sc)
    try:
        mapping = make_mapping(screen, (9, 7), (sr, sc), (dr, dc), a, outside)
    except DeviceMisconfigured:
        # refused only when the active region leaves the screen or misses the mask's footprint
        inside = a[0] + a[2] <= 60 and a[1] + a[3] <= 70
        overlap = (a[0] < dr + 9 * sr and dr < a[0] + a[2] and a[1] < dc + 7 * sc and dc < a[1] + a[3])
        assert not (inside and overlap)
        return
    prof = linear_profile(per2pi, WAVELENGTH_M)
    got = phase_images(masks, mapping, prof)
    for k in range(2):
        want = expected_phase_image(masks[k], prof, screen, (sr, sc), (dr, dc), a, outside)
        assert np.array_equal(got[k], want)


def test_a_window_over_the_modulator_is_pushed_under_or_refused(xserver, tmp_path):
    from Xlib import X, display as xdisplay
    from Xlib.ext import screensaver  # noqa: F401  (MIT-SCREEN-SAVER requests)

    from maskrun.drivers import DeviceFault

    masks = random_phase_masks(2, (16, 16), seed=1)
    mod = _driver(xserver, tmp_path, screen=1, readback_check=True)
    mod.open()
    d = xdisplay.Display(xserver)
    try:
        mod.load(masks)
        mod.show(0)
        # a pop-up (override-redirect, like a notification) appears over the modulator's image
        root = d.screen(1).root
        popup = root.create_window(300, 250, 200, 100, 0, d.screen(1).root_depth, X.InputOutput, X.CopyFromParent,
                                   override_redirect=True, background_pixel=0xFF0000)
        popup.map()
        d.sync()
        time.sleep(0.2)
        # the next show raises the modulator's window above it again and the screen is exact
        mod.show(1)
        assert np.array_equal(_grey_shot(xserver), mod.images[1])
        # the show counted as activity: the X server's idle time (screen saver, power saving) was reset
        idle_ms = root.screensaver_query_info().idle
        assert idle_ms < 1000
    finally:
        mod.close()
    # a window the modulator cannot get above (a compositing manager's overlay window, always on top)
    # is refused with covered_check
    from Xlib.ext import composite  # noqa: F401

    mod = _driver(xserver, tmp_path, screen=1, covered_check=True)
    mod.open()
    try:
        mod.load(masks)
        mod.show(0)
        d2 = xdisplay.Display(xserver)
        overlay = d2.screen(1).root.composite_get_overlay_window().overlay_window
        d2.sync()
        with pytest.raises(DeviceFault, match="another window covers part of the modulator's screen"):
            t_end = time.monotonic() + 5.0
            while time.monotonic() < t_end:  # the visibility change reaches the display process asynchronously
                mod.show(1)
        d2.close()  # the overlay goes with its client: no longer covered, shows go through again
        t_end = time.monotonic() + 5.0
        while True:
            try:
                mod.show(1)
                break
            except DeviceFault:
                assert time.monotonic() < t_end, "still reported covered after the overlay was released"
                time.sleep(0.05)
        assert overlay is not None
    finally:
        mod.close()
        d.close()


def test_a_raw_grey_image_reaches_the_screen_and_the_masks_come_back(xserver, tmp_path):
    # the calibration path ('maskrun measure-response'): raw grey levels, mapped like a mask but with no
    # response table, correction or ramp; the next show(k) shows mask k again. The response here comes
    # from the bench's [modulator] profile (BenchContext.modulator_profile), not the driver's settings.
    masks = quantized_phase_masks(2, (24, 20), levels=8, seed=4)
    g = np.arange(256)
    prof = ModulatorProfile(wavelength_m=WAVELENGTH_M, grey_levels=g.tolist(),
                            phase_rad=(2 * np.pi * (g / 210.0) ** 1.2).tolist(), measured=True, method="test")
    ctx = BenchContext(config_dir=str(tmp_path), wavelength_m=WAVELENGTH_M, modulator_profile=prof)
    mod = build_driver("modulator", "display", {"x_display": xserver, "settle_s": 0.0, "screen": 1,
                                                "superpixel_px": [2, 3], "offset_px": [50, 60], "outside_grey": 9,
                                                "readback_check": True}, ctx)
    mod.open()
    try:
        mod.load(masks)
        grey = np.random.default_rng(8).integers(0, 256, (24, 20))
        mod.show_grey(grey)
        shot = _grey_shot(xserver)
        want = np.full(SCREEN1, 9, dtype=np.uint8)
        want[50:50 + 48, 60:60 + 60] = np.repeat(np.repeat(grey, 2, axis=0), 3, axis=1)
        assert np.array_equal(shot, want), f"{np.count_nonzero(shot != want)} pixels differ"
        assert mod.shown is None  # no mask is on the device now
        mod.show(1)
        want = expected_phase_image(masks[1], prof, SCREEN1, (2, 3), (50, 60), (50, 60, 48, 60), 9, None, (0.0, 0.0))
        assert np.array_equal(_grey_shot(xserver), want)
        assert mod.describe()["response"]["source"] == "[modulator] profile of the bench config"
        with pytest.raises(DeviceMisconfigured, match="0..255"):
            mod.show_grey(np.full((24, 20), 300))
        with pytest.raises(DeviceMisconfigured, match="shape"):
            mod.show_grey(np.zeros((20, 24), dtype=int))
    finally:
        mod.close()
