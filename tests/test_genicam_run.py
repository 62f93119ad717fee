"""A whole run with the genicam camera on the genicam wheel's simulated GenTL producer, the in-process
simulated modulator and safety box, and no [simulation] table (the light is the camera's): frames
stored, reconstruction attempted; and the camera lost mid-run and reconnected with no frame lost.

The config is configs/genicam-camera.toml as shipped, with only its [camera.settings] table (and the
run size) changed for the simulated producer, as docs/cameras-genicam.md tells a user to do.
"""

import io
from importlib import resources

import numpy as np
import pytest
from rich.console import Console

pytest.importorskip("harvesters.core", reason="the genicam extra is not installed")

from maskrun.daemon.config import parse_config  # noqa: E402
from maskrun.daemon.acquire.foreground import RunRequest, run_foreground  # noqa: E402
from maskrun.daemon.record.runfile import RunFile  # noqa: E402
from maskrun.drivers.genicam_camera import GenicamCamera  # noqa: E402
from maskrun.drivers.genicam_discovery import simulated_producer_path  # noqa: E402

if simulated_producer_path() is None:
    pytest.skip("the genicam wheel ships no viky.cti on this platform", allow_module_level=True)

SIMULATED_PRODUCER_SETTINGS = """[camera.settings]
producer = "sim:viky"
device = "1"
exposure_control = "none"
trigger = "free-running"
free_running_skip_frames = 1
frame_rate_hz = 100.0
host_crop = true

"""


def shipped_config_for_the_test_producer(dark_frames: int) -> str:
    text = resources.files("maskrun.configs").joinpath("genicam-camera.toml").read_text()
    start, end = text.index("[camera.settings]"), text.index("[response]")
    text = text[:start] + SIMULATED_PRODUCER_SETTINGS + text[end:]
    for old, new in (("shape = [128, 128]", "shape = [32, 32]"), ("count = 8", "count = 4"),
                     ("passes = 3", "passes = 2"), ("dark_frames = 4", f"dark_frames = {dark_frames}"),
                     ("iterations_per_update = 100", "iterations_per_update = 20"),
                     ("min_photons_per_frame = 1.0e6", "min_photons_per_frame = 1.0")):
        assert old in text, old
        text = text.replace(old, new, 1)
    assert "\n[simulation]" not in text
    return text


def run(tmp_path, dark_frames=0, reconstruction=True):
    text = shipped_config_for_the_test_producer(dark_frames)
    if not reconstruction:
        text = text.replace("[reconstruction]\n", "[reconstruction]\nenabled = false\n", 1)
    cfg = parse_config(text, str(tmp_path / "genicam-bench.toml"))
    console = Console(file=io.StringIO(), width=120)
    summary = run_foreground(cfg, RunRequest(acknowledge_unattended=True, output_dir=str(tmp_path), figure=False),
                             console)
    return summary, console.file.getvalue()


def test_a_whole_run_with_the_genicam_camera(tmp_path):
    summary, _ = run(tmp_path)
    assert summary.state.value == "finished", summary.message
    assert summary.frames == 8
    with RunFile(summary.output_path) as rf:
        frames = rf.frames()
        assert frames.shape == (8, 32, 32) and frames.dtype == np.uint8
        assert np.all(np.diff(rf.frame_info()["frame_id"]) > 0)
        # the test producer's Mono8 image is white (255) with a small black ball: frames at full scale
        assert frames.max() == 255
        assert rf.estimate_count >= 1  # the live reconstruction ran on them


def test_with_dark_frames_the_test_producer_gives_no_signal(tmp_path):
    # the camera does not see the simulated shutter: darks equal frames, so the dark-subtracted frames are 0
    # (the live reconstruction would skip every set as 'no signal'; it is switched off here to keep this short)
    summary, _ = run(tmp_path, dark_frames=2, reconstruction=False)
    assert summary.state.value == "finished" and summary.frames == 8 and summary.darks == 2
    with RunFile(summary.output_path) as rf:
        frames, darks = rf.frames().astype(np.float32), rf.darks().astype(np.float32)
    signal = frames - darks.mean(axis=0)
    assert frames.shape == (8, 32, 32) and np.abs(signal).max() <= 255  # the small moving ball at most
    assert np.mean(signal == 0) > 0.9


def test_the_camera_lost_mid_run_is_reconnected_and_no_frame_is_lost(tmp_path, monkeypatch):
    # the cable is pulled right after the third frame is grabbed, between two grabs: the device module is
    # closed under the camera's lock, so the next grab meets a real GenTL error from the producer
    real_grab = GenicamCamera.grab
    grabbed = {"n": 0, "unplugged": False}

    def grab_then_unplug_after_three_frames(self, timeout_s):
        frame = real_grab(self, timeout_s)
        grabbed["n"] += 1
        if grabbed["n"] == 3 and not grabbed["unplugged"]:
            grabbed["unplugged"] = True
            with self._lock:
                self._acquirer.device.module.close()
        return frame

    monkeypatch.setattr(GenicamCamera, "grab", grab_then_unplug_after_three_frames)
    summary, _ = run(tmp_path)
    assert grabbed["unplugged"]
    assert summary.state.value == "finished", summary.message
    assert summary.frames == 8
    with RunFile(summary.output_path) as rf:
        kinds = [e["kind"] for e in rf.events()]
        assert "camera_disconnect" in kinds and "camera_reconnected" in kinds
        assert rf.frames().shape == (8, 32, 32)
