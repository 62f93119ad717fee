"""The replay camera: plays back a real HDF5 run file (written by RunStore, and one recorded by a
real run on the simulated bench) in order, with the recorded metadata."""

import io
import time

import h5py
import numpy as np
import pytest
from rich.console import Console

from benchcfg import small_bench
from maskrun.daemon.config import load_config
from maskrun.daemon.acquire.foreground import RunRequest, run_foreground
from maskrun.daemon.record.runfile import RunFile
from maskrun.daemon.record.store import FRAME_INFO_DTYPE, RunHeader, RunStore
from maskrun.drivers import BenchContext, DeviceDisconnected, DeviceMisconfigured, DeviceTimeout
from maskrun.drivers.conformance import assert_conformant
from maskrun.drivers.registry import build_driver

H, W = 6, 8
T0 = 1.7e9


def _info(**fields):
    rec = np.zeros((), dtype=FRAME_INFO_DTYPE)
    for k, v in fields.items():
        rec[k] = v
    return rec


def write_run(path, *, frames=5, darks=2, gap_s=0.05, first_id=10):
    """A small run file: darks first (ids first_id..), then frames; pixel value = 100 * id + row."""
    header = RunHeader(run_name="replay-test", config_toml="", safety_acknowledgement={}, grid_shape=(H, W),
                       masks=np.ones((3, H, W), np.complex64), frame_dtype=np.uint16, laser_wavelength_m=633e-9,
                       camera_bit_depth=12)
    store = RunStore.create(path, header)
    fid, t = first_id, T0
    rows = np.arange(H)[:, None] * np.ones((1, W), int)
    for d in range(darks):
        store.append_dark((100 * fid + rows).astype(np.uint16),
                          _info(pass_index=-1, set_index=-1, mask_index=-1, frame_id=fid, t_frame_s=t, exposure_s=0.004))
        fid, t = fid + 1, t + gap_s
    for i in range(frames):
        store.append_frame((100 * fid + rows).astype(np.uint16),
                           _info(pass_index=i // 3, set_index=i // 3, mask_index=i % 3, frame_id=fid, t_frame_s=t,
                                 exposure_s=0.002 * (i + 1), flags=i))
        fid, t = fid + 1, t + gap_s
    store.close()
    return path


def replay(path, **settings):
    return build_driver("camera", "replay", {"path": str(path), **settings})


@pytest.fixture
def run_path(tmp_path):
    return write_run(tmp_path / "run.h5")


def test_frames_come_in_order_with_their_recorded_metadata(run_path):
    cam = replay(run_path)
    assert cam.sensor_shape == (H, W)  # known before open (the bench builder asks)
    assert cam.bit_depth == 12
    with cam:
        frames = [cam.grab(1.0) for _ in range(5)]
    ids = [f.frame_id for f in frames]
    assert ids == [12, 13, 14, 15, 16]  # darks (10, 11) are left out by default
    for i, f in enumerate(frames):
        assert f.pixels.dtype == np.uint16 and f.pixels.shape == (H, W)
        assert f.pixels[3, 0] == 100 * f.frame_id + 3
        assert f.exposure_s == pytest.approx(0.002 * (i + 1))
        assert f.timestamp_s == pytest.approx(T0 + (i + 2) * 0.05)
        m = f.metadata
        assert (m["pass_index"], m["set_index"], m["mask_index"]) == (i // 3, i // 3, i % 3)
        assert m["dark"] is False and m["replay_row"] == i and m["recorded_flags"] == i and m["loop"] == 0


def test_end_of_file_raises_a_timeout_that_says_so(run_path):
    with replay(run_path) as cam:
        for _ in range(5):
            cam.grab(1.0)
        with pytest.raises(DeviceTimeout, match="no more frames") as err:
            cam.grab(1.0)
        assert "loop" in str(err.value)  # says what to do
        with pytest.raises(DeviceTimeout):
            cam.grab(1.0)


def test_darks_are_played_where_they_were_taken(run_path):
    with replay(run_path, include_darks=True) as cam:
        frames = [cam.grab(1.0) for _ in range(7)]
    assert [f.frame_id for f in frames] == list(range(10, 17))
    assert [f.metadata["dark"] for f in frames] == [True, True] + [False] * 5
    assert frames[0].metadata["mask_index"] == -1 and frames[0].exposure_s == pytest.approx(0.004)


def test_loop_keeps_ids_and_timestamps_advancing(run_path):
    with replay(run_path, loop=True) as cam:
        frames = [cam.grab(1.0) for _ in range(12)]
    ids = np.array([f.frame_id for f in frames])
    stamps = np.array([f.timestamp_s for f in frames])
    assert np.all(np.diff(ids) >= 1) and np.all(np.diff(stamps) > 0)
    assert [f.metadata["loop"] for f in frames] == [0] * 5 + [1] * 5 + [2] * 2
    assert [f.metadata["recorded_frame_id"] for f in frames[5:10]] == [12, 13, 14, 15, 16]
    np.testing.assert_array_equal(frames[5].pixels, frames[0].pixels)


def test_sequential_ids(run_path):
    with replay(run_path, include_darks=True, frame_ids="sequential") as cam:
        assert [cam.grab(1.0).frame_id for _ in range(4)] == [1, 2, 3, 4]


def test_sub_roi_cuts_the_stored_frames_and_a_larger_roi_is_refused(run_path):
    with replay(run_path) as cam:
        cam.roi = (2, 3, 3, 4)
        assert cam.frame_shape == (3, 4)
        f = cam.grab(1.0)
        assert f.pixels.shape == (3, 4)
        np.testing.assert_array_equal(f.pixels[:, 0], 100 * f.frame_id + np.arange(2, 5))
        with pytest.raises(DeviceMisconfigured, match="does not fit the 6 x 8 recorded frames"):
            cam.roi = (0, 0, H + 1, W)
        with pytest.raises(DeviceMisconfigured):
            cam.roi = (5, 0, 2, W)


def test_recorded_pace_keeps_the_gaps_and_times_out_early(tmp_path):
    path = write_run(tmp_path / "slow.h5", frames=3, darks=0, gap_s=0.3)
    with replay(path, pace="recorded") as cam:
        t0 = time.monotonic()
        first = cam.grab(1.0)
        assert time.monotonic() - t0 < 0.2  # the first frame at once
        with pytest.raises(DeviceTimeout, match="due in"):
            cam.grab(0.05)  # the next frame is 0.3 s away
        second = cam.grab(1.0)
        took = time.monotonic() - t0
        assert second.frame_id == first.frame_id + 1  # the frame stayed next in line
        assert 0.25 < took < 0.8
    # a long pause in the recording is shortened to max_gap_s
    path = write_run(tmp_path / "pause.h5", frames=2, darks=0, gap_s=100.0)
    with replay(path, pace="recorded", max_gap_s=0.1) as cam:
        cam.grab(1.0)
        t0 = time.monotonic()
        cam.grab(1.0)
        assert time.monotonic() - t0 < 0.5


def test_growing_or_crashed_file_uses_the_rows_present_in_both_datasets(run_path):
    # a crash may leave /entry/frames one row longer than /entry/frame_info
    with h5py.File(run_path, "a", libver="latest") as f:
        ds = f["entry/frames"]
        ds.resize(ds.shape[0] + 1, axis=0)
    with replay(run_path) as cam:
        assert cam.frames_left == 5


def test_bad_files_give_clear_errors(tmp_path):
    missing = replay(tmp_path / "nope.h5")
    with pytest.raises(DeviceMisconfigured, match="does not exist"):
        missing.open()
    missing.close()  # safe after a failed open
    with pytest.raises(DeviceMisconfigured, match="does not exist"):
        _ = missing.sensor_shape
    other = tmp_path / "other.h5"
    with h5py.File(other, "w") as f:
        f["x"] = np.zeros(3)
    with pytest.raises(DeviceMisconfigured, match="not a maskrun run file"):
        replay(other).open()
    text = tmp_path / "text.h5"
    text.write_text("not hdf5")
    with pytest.raises(DeviceMisconfigured, match="not a readable HDF5"):
        replay(text).open()
    empty = write_run(tmp_path / "empty.h5", frames=0, darks=2)
    with pytest.raises(DeviceMisconfigured, match="holds no frames"):
        replay(empty).open()
    with replay(empty, include_darks=True) as cam:  # its darks can still be played
        assert cam.grab(1.0).metadata["dark"] is True


def test_relative_path_starts_at_the_config_folder(run_path):
    cam = build_driver("camera", "replay", {"path": run_path.name}, BenchContext(config_dir=str(run_path.parent)))
    with cam:
        assert cam.grab(1.0).frame_id == 12


def test_grab_when_closed_and_exposure_setting(run_path):
    cam = replay(run_path)
    with pytest.raises(DeviceDisconnected):
        cam.grab(0.1)
    cam.exposure_s = 0.25
    assert cam.exposure_s == 0.25
    with pytest.raises(DeviceMisconfigured):
        cam.exposure_s = 0.0


# ------------------------------------------------------------------ a real recorded run


@pytest.fixture(scope="module")
def recorded_run(tmp_path_factory):
    out = tmp_path_factory.mktemp("recorded")
    cfg = small_bench(grid=16, sensor=24, masks=4, passes=2, darks=2)
    summary = run_foreground(cfg, RunRequest(acknowledge_unattended=True, output_dir=str(out), figure=False),
                             Console(file=io.StringIO()))
    assert summary.state.value == "finished", summary.message
    return summary.output_path


def test_replay_of_a_recorded_run_gives_back_the_stored_frames(recorded_run):
    with RunFile(recorded_run) as rf:
        stored, info = rf.frames(), rf.frame_info()
        darks = rf.darks()
    with replay(recorded_run, include_darks=True) as cam:
        got = [cam.grab(1.0) for _ in range(len(darks) + len(stored))]
        with pytest.raises(DeviceTimeout):
            cam.grab(0.5)
    assert [g.metadata["dark"] for g in got] == [True] * len(darks) + [False] * len(stored)
    for g, want, rec in zip(got[len(darks):], stored, info):
        np.testing.assert_array_equal(g.pixels, want)
        assert g.frame_id == rec["frame_id"] and g.metadata["mask_index"] == rec["mask_index"]
        assert g.timestamp_s == rec["t_frame_s"] and g.exposure_s == rec["exposure_s"]


def test_replay_keeps_the_camera_contract(recorded_run):
    results = assert_conformant("replay", {"path": str(recorded_run), "loop": True},
                                failing_settings={"path": str(recorded_run) + ".missing"})
    status = {r.name: r.status for r in results}
    assert status["close after failed open"] == "pass"
    assert status["hardware trigger"] == "skip"  # replays are software-triggered


def test_a_recorded_run_replayed_through_the_whole_daemon_stores_the_same_frames(recorded_run, tmp_path):
    # the use case: rerun the checks and the reconstruction on frames taken earlier, no bench needed
    text = f"""
[run]
name = "replayed"
passes = 2
dark_frames = 2
operator = "test"
[laser]
description = "helium-neon laser (replayed run)"
laser_class = "3R"
wavelength_m = 632.8e-9
power_w = 0.004
[grid]
shape = [16, 16]
[masks]
family = "octanary"
count = 4
seed = 7
[camera]
driver = "replay"
exposure_s = 0.002
[camera.settings]
path = "{recorded_run.name}"
include_darks = true
[response]
gain_dn_per_e = 0.3
offset_dn = 100.0
quantum_efficiency = 0.6
[modulator]
driver = "simulated"
[safety]
driver = "simulated"
[checks]
min_photons_per_frame = 1.0e3
"""
    cfg_path = recorded_run.parent / "replay.toml"
    cfg_path.write_text(text)
    cfg = load_config(cfg_path)
    summary = run_foreground(cfg, RunRequest(acknowledge_unattended=True, output_dir=str(tmp_path), figure=False),
                             Console(file=io.StringIO()))
    assert summary.state.value == "finished", summary.message
    assert summary.frames == 8 and summary.darks == 2 and summary.rejected == 0
    with RunFile(recorded_run) as old, RunFile(summary.output_path) as new:
        np.testing.assert_array_equal(new.frames(), old.frames())
        np.testing.assert_array_equal(new.darks(), old.darks())
        np.testing.assert_array_equal(new.frame_info()["frame_id"], old.frame_info()["frame_id"])
        assert new.estimate_count >= 1 and new.estimate_info()["residual"][-1] < 0.1


def test_the_layout_the_driver_reads_matches_the_writer():
    # drivers may not import the daemon, so the replay camera keeps its own copy of the format name
    from maskrun.daemon.record.store import FORMAT_NAME
    from maskrun.drivers.replay_camera import RUN_FILE_FORMAT

    assert RUN_FILE_FORMAT == FORMAT_NAME
