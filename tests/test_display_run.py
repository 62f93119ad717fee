"""Whole runs with the `display` modulator under Xvfb (simulated camera and safety box): the
device screen follows the mask order (every presented image read back from the X server and
logged), the run file records the response and mapping, a lost display pauses the run with the
shutter closed, and a mask family the device cannot impose is refused when the config is read."""

from __future__ import annotations

import hashlib
import io
import json
import threading
import time

import h5py
import numpy as np
import pytest
from rich.console import Console

from benchcfg import small_bench_text
from maskrun.daemon.acquire.bench import build_bench
from maskrun.daemon.config import ConfigError, parse_config
from maskrun.daemon.masks import make_masks
from maskrun.daemon.acquire.foreground import RunRequest, run_foreground
from maskrun.daemon.record.runfile import RunFile
from maskrun.drivers.modulator_profile import linear_profile
from xvfbhelp import expected_phase_image, xvfb_server

pytest.importorskip("Xlib")

DEMO_MODULATOR = ('driver = "serial-line"\n\n[modulator.settings]\nport = "sim:modulator"      # the simulated '
                  'controller started below; a real one is e.g. /dev/ttyUSB0\nsettle_s = 0.02')


def display_bench_text(display: str, tmp_path, *, family="quantized_phase", settings="", passes=2, recovery=""):
    text = small_bench_text(masks=4, passes=passes, darks=1)
    assert DEMO_MODULATOR in text
    text = text.replace(DEMO_MODULATOR, f'driver = "display"\n\n[modulator.settings]\nx_display = "{display}"\n'
                        f'screen = "1/screen"\nsettle_s = 0.01\nsuperpixel_px = [3, 3]\nreadback_check = true\n'
                        f'presented_log = "{tmp_path / "presented.jsonl"}"\n{settings}')
    text = text.replace('family = "octanary"', f'family = "{family}"\nlevels = 8')
    text = text.replace('[simulation.firmware.modulator]\nsettle_s = 0.02\n', '')
    text = text.replace('mode = "accumulate"', 'enabled = false\nmode = "accumulate"')
    if recovery:
        text = text.replace("[checks]", f"[recovery]\n{recovery}\n\n[checks]")
    return text


def _console():
    return Console(file=io.StringIO(), width=120)


@pytest.fixture
def xserver():
    with xvfb_server("320x240x24", "400x300x24") as (display, proc):
        yield display, proc


def _presented(tmp_path):
    return [json.loads(line) for line in (tmp_path / "presented.jsonl").read_text().splitlines()]


def test_a_whole_run_shows_the_masks_in_order_and_records_response_and_mapping(xserver, tmp_path):
    display, _ = xserver
    cfg = parse_config(display_bench_text(display, tmp_path, settings="grey_levels_per_2pi = 230\n"
                                          "blaze_period_px = [0, 7.31]"), str(tmp_path / "bench.toml"))
    summary = run_foreground(cfg, RunRequest(acknowledge_unattended=True, output_dir=str(tmp_path)), _console())
    assert summary.state.value == "finished", summary.message
    with RunFile(summary.output_path) as rf:
        info = rf.frame_info()
        attrs = rf.attrs
    # the masks the bench built (complex128), which the file stores as complex64
    masks = make_masks("quantized_phase", 4, (32, 32), cfg.masks.seed, 8)
    with h5py.File(summary.output_path, "r") as f:
        assert np.allclose(f["/entry/masks"][...], masks, atol=1e-6)
    assert info["mask_index"].tolist() == [0, 1, 2, 3] * 2
    # the expected screen of each mask, computed here from the stored mask, the nominal linear response
    # at the laser's wavelength, the ramp and a centred 3 x 3 superpixel mapping
    prof = linear_profile(230, 632.8e-9)
    r0, c0 = (300 - 96) // 2, (400 - 96) // 2
    want = [hashlib.sha256(expected_phase_image(m, prof, (300, 400), (3, 3), (r0, c0), (r0, c0, 96, 96), 0,
                                                blaze=(0, 7.31)).tobytes()).hexdigest() for m in masks]
    shown = _presented(tmp_path)
    # one presentation per frame, in the order of the frames in the file, each read back from the X server
    assert [e["index"] for e in shown] == info["mask_index"].tolist()
    assert [e["sha256"] for e in shown] == [want[k] for k in info["mask_index"]]
    # every frame was requested after its mask was presented
    assert all(e["time_s"] <= t for e, t in zip(shown, info["t_request_s"] + 1.0))
    rec = json.loads(attrs["modulator_json"])
    assert rec["driver"] == "display" and rec["screen"]["label"] == "1/screen"
    assert rec["response"]["source"] == "linear, 230 grey levels per 2 pi"
    assert np.allclose(rec["response"]["phase_rad"], prof.phase_rad)
    assert rec["mapping"] == {"screen_shape": [300, 400], "mask_shape": [32, 32], "superpixel_px": [3, 3],
                              "offset_px": [r0, c0], "active_region_px": [r0, c0, 96, 96], "outside_grey": 0}


def test_a_closed_window_reconnects_and_a_lost_server_pauses_with_the_shutter_closed(xserver, tmp_path):
    from Xlib import display as xdisplay

    display, proc = xserver
    cfg = parse_config(display_bench_text(display, tmp_path, passes=40,
                                          recovery="reconnect_attempts = 2\nbackoff_initial_s = 0.05\n"
                                          "pause_timeout_s = 1.0"), str(tmp_path / "bench.toml"))
    log = tmp_path / "presented.jsonl"

    def saboteur():
        def wait_lines(n):
            while not log.exists() or len(log.read_text().splitlines()) < n:
                time.sleep(0.02)
        wait_lines(3)
        d = xdisplay.Display(display)  # another client closes the modulator's window
        for w in d.screen(1).root.query_tree().children:
            if w.get_wm_name() == "maskrun modulator":
                w.destroy()
        d.sync()
        d.close()
        wait_lines(12)
        proc.terminate()  # the X server goes away: no reconnect can work

    t = threading.Thread(target=saboteur, daemon=True)
    t.start()
    summary = run_foreground(cfg, RunRequest(acknowledge_unattended=True, output_dir=str(tmp_path)), _console())
    t.join(10)
    assert summary.state.value in ("stopped", "fault"), summary.message
    with RunFile(summary.output_path) as rf:
        events = rf.events()
        info = rf.frame_info()
    kinds = [e["kind"] for e in events]
    assert "modulator_disconnect" in kinds and "modulator_reconnected" in kinds
    # after the server went: reconnects fail, the run pauses (shutter closed) and stops by itself
    paused = [e for e in events if e["kind"] == "paused"]
    assert paused and "modulator lost" in paused[-1]["message"] and "shutter closed" in paused[-1]["message"]
    assert kinds.index("modulator_reconnected") < kinds.index("paused")
    # nothing taken is lost: every frame shown before the loss is in the file
    assert info.size >= 11
    shown = _presented(tmp_path)
    assert [e["index"] for e in shown][:info.size] == info["mask_index"].tolist()[:len(shown)]


def test_a_family_the_device_cannot_impose_is_refused_when_the_config_is_read(tmp_path):
    # no X server needed: the refusal comes when the bench is built, before any device opens
    for family, can in (("octanary", "random_phase, quantized_phase, file"),
                        ("binary_amplitude", "random_phase, quantized_phase, file")):
        cfg = parse_config(display_bench_text(":99", tmp_path, family=family), "bench.toml")
        with pytest.raises(ConfigError) as err:
            build_bench(cfg)
        assert err.value.problems[0][0] == "masks.family"
        assert f"can impose: {can}" in str(err.value) and family in str(err.value)
    cfg = parse_config(display_bench_text(":99", tmp_path, family="random_phase",
                                          settings='device = "binary_amplitude"'), "bench.toml")
    with pytest.raises(ConfigError, match="can impose: binary_amplitude, file"):
        build_bench(cfg)
    # a measured response at another wavelength is refused too, saying why
    from maskrun.drivers.modulator_profile import linear_profile as lp

    lp(250, 532e-9).save(tmp_path / "green.json")
    cfg = parse_config(display_bench_text(":99", tmp_path, settings=f'profile = "{tmp_path / "green.json"}"'),
                       "bench.toml")
    with pytest.raises(ConfigError, match="532.0 nm, the laser is 632.8 nm"):
        build_bench(cfg)


def test_the_example_display_slm_bench_is_valid():
    # configs/display-slm.toml: the display modulator's settings validate and its mask family is one
    # a phase SLM can impose (the camera is the genicam driver, which may not be installed here)
    from pathlib import Path

    from maskrun.daemon.config import load_config
    from maskrun.daemon.masks import make_masks
    from maskrun.drivers import BenchContext
    from maskrun.drivers.registry import build_driver

    path = Path(__file__).resolve().parents[1] / "configs" / "display-slm.toml"
    cfg = load_config(path)
    assert cfg.simulation is None and cfg.camera.driver == "genicam" and cfg.modulator.driver == "display"
    mod = build_driver("modulator", "display", dict(cfg.modulator.settings),
                       BenchContext(config_dir=str(path.parent), wavelength_m=cfg.laser.wavelength_m))
    masks = make_masks(cfg.masks.family, cfg.masks.count, tuple(cfg.grid.shape), cfg.masks.seed, cfg.masks.levels)
    mod.check_masks(cfg.masks.family, masks)
    assert mod.settings.superpixel_px[0] * cfg.grid.shape[0] == 512
