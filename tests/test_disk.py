"""Disk planning and a full disk: refusal before the run, a safe stop before the disk is full, and a
real ENOSPC (on a 2 MB tmpfs mounted for the test; skipped with the reason if mounting is refused)."""

import errno
import io
import os
import shutil
import subprocess

import numpy as np
import pytest
from rich.console import Console

from maskrun.daemon.config import parse_config
from maskrun.daemon.acquire.disk import DiskGuard, DiskSpaceError, expected_run_bytes, free_bytes, series_passes
from maskrun.daemon.acquire.foreground import RunRequest, run_foreground
from maskrun.daemon.acquire.recovery import needs_repair
from maskrun.daemon.record.runfile import RunFile
from maskrun.daemon.acquire.sequencer import State
from maskrun.daemon.record.store import RunStore, StoreWriteError, frame_info_record

from test_faults import bench_text, run_bench
from test_store import _header


def _console():
    return Console(file=io.StringIO(), width=200)


@pytest.fixture
def tiny_disk(tmp_path):
    """A 2 MB tmpfs: a real filesystem that fills up."""
    mnt = tmp_path / "tiny"
    mnt.mkdir()
    r = subprocess.run(["mount", "-t", "tmpfs", "-o", "size=2m", "tmpfs", str(mnt)], capture_output=True, text=True)
    if r.returncode != 0:
        pytest.skip(f"cannot mount a tmpfs here (needs root / CAP_SYS_ADMIN): {r.stderr.strip()}")
    try:
        yield mnt
    finally:
        subprocess.run(["umount", "-l", str(mnt)], capture_output=True)


def _fill(folder, leave_bytes: int) -> None:
    """Write a ballast file until only ``leave_bytes`` are free (another writer filling the disk)."""
    want = free_bytes(folder) - leave_bytes
    if want <= 0:
        return
    with open(folder / "ballast.bin", "ab") as fh:
        try:
            fh.write(b"\0" * want)
            fh.flush()
        except OSError as exc:
            assert exc.errno == errno.ENOSPC


def test_expected_size_matches_a_real_file(tmp_path):
    """The plan's size estimate is an upper bound of the real file, and not wildly above it."""
    summary, _ = run_bench(tmp_path, bench_text(passes=6))
    real = os.path.getsize(summary.output_path)
    est = expected_run_bytes(grid_shape=(32, 32), mask_count=4, passes=6, dark_frames=1, estimates=False,
                             truth=True).bytes_total
    assert real <= est <= 4 * real, (real, est)


def test_expected_size_counts_the_flat_field():
    """A camera profile's flat map is stored in the file as (H, W) float32: 4 bytes per pixel more."""
    args = dict(grid_shape=(32, 48), mask_count=4, passes=6, dark_frames=1)
    without = expected_run_bytes(**args).bytes_total
    assert expected_run_bytes(**args, flat_field=True).bytes_total - without == 32 * 48 * 4


def test_run_is_refused_when_the_real_free_space_is_below_the_reserve(tmp_path):
    free_mb = shutil.disk_usage(tmp_path).free / 2**20
    text = bench_text().replace("[run]\n", f"[run]\nmin_free_disk_mb = {free_mb + 1024:.0f}\n", 1)
    cfg = parse_config(text, str(tmp_path / "b.toml"))
    with pytest.raises(DiskSpaceError, match="not enough free disk.*min_free_disk_mb"):
        run_foreground(cfg, RunRequest(acknowledge_unattended=True, output_dir=str(tmp_path / "out")), _console())
    assert not (tmp_path / "out").exists() or not list((tmp_path / "out").iterdir())  # nothing written


def test_time_series_plan_and_warning(tiny_disk):
    assert series_passes(600, 12 * 3600) == 72 and series_passes(600, 601) == 2
    # a run that fits but uses more than half of what may be used: warned, and the warning is logged
    text = bench_text(passes=4).replace("[run]\n", "[run]\nmin_free_disk_mb = 1.3\n", 1)
    cfg = parse_config(text, str(tiny_disk / "b.toml"))
    console = Console(file=io.StringIO(), width=300)
    summary = run_foreground(cfg, RunRequest(acknowledge_unattended=True, output_dir=str(tiny_disk)), console)
    assert summary.state == State.finished, summary.message
    out = console.file.getvalue()
    assert "Expected: expected file size" in out and "ETA" in out and "Warning" in out
    with RunFile(summary.output_path) as rf:
        assert any(e["kind"] == "disk_warning" for e in rf.events())


def test_run_stops_safely_before_the_disk_is_full(tiny_disk):
    text = bench_text(passes=6).replace("[run]\n", "[run]\nmin_free_disk_mb = 0.5\n", 1)
    filled = {}

    def observer(p, bench, control):
        if p.frames_done == 5 and not filled:
            filled["frames"] = p.frames_done
            _fill(tiny_disk, leave_bytes=400 * 1024)  # below the 0.5 MB reserve

    summary, _ = run_bench(tiny_disk, text, observer=observer)
    assert summary.state == State.stopped and "before the disk is full" in summary.message
    # the pipelined loop had started frame 6 (its disk check passed) before frame 5 was reported and the
    # disk filled: that exposure is finished and kept (inside the guard's two-frame margin); frame 7 is not taken
    assert summary.frames == 6
    with RunFile(summary.output_path) as rf:
        assert rf.frame_count == 6 and len(rf.complete_sets()) == 1
        assert rf.last_end() is not None and "stopped" in rf.last_end()["message"]
        assert any(e["kind"] == "disk_low" for e in rf.events())
    assert "disk_low" in (tiny_disk / "run.log").read_text()


def test_disk_full_during_a_write_stops_safely_and_keeps_the_flushed_frames(tiny_disk):
    """Another writer fills the disk completely between the free-space check and the frame write."""
    # frames of 8 KiB (64 x 64 uint16), larger than any space HDF5 already holds free inside the file, so the
    # next frame's write needs new room on the disk (with 2 KiB frames it could land in allocated space)
    text = (bench_text(passes=6).replace("[run]\n", "[run]\nmin_free_disk_mb = 0\n", 1)
            .replace("shape = [32, 32]", "shape = [64, 64]", 1).replace("sensor_shape = [48, 48]", "sensor_shape = [80, 80]", 1))
    state = {"armed": False, "done": False}

    def observer(p, bench, control):
        if p.frames_done == 6 and not state["armed"]:
            state["armed"] = True

            def on_optics(name, value):  # the modulator shows the next mask: after the check, before the write
                if name == "shown_mask" and state["armed"] and not state["done"]:
                    state["done"] = True
                    _fill(tiny_disk, leave_bytes=0)

            bench.optics.subscribe(on_optics)

    summary, _ = run_bench(tiny_disk, text, observer=observer)
    assert state["done"]
    assert summary.state == State.stopped, summary.message
    assert "disk is full" in summary.message
    (tiny_disk / "ballast.bin").unlink()
    with RunFile(summary.output_path) as rf:
        # the promise: no complete frame set lost. The first set was flushed before the disk filled; the set in
        # progress (frames 5 and 6, not yet flushed) could not reach the disk and is cut from the file, so no
        # set looks complete with frames that were never written
        assert rf.frame_count >= 4 and len(rf.complete_sets()) >= 1
        assert rf.frame_info()["mask_index"][:4].tolist() == [0, 1, 2, 3]
        assert all(rf.frame(r).max() > 0 for r in range(rf.frame_count))
        # the frames still in flight when the failure was reported cannot be written on a full disk; no more
        assert summary.frames <= rf.frame_count + 4 + 2
    assert "disk_full" in (tiny_disk / "run.log").read_text()
    # the emergency reserve beside the file was given up, so HDF5 could still close the file cleanly
    assert not needs_repair(summary.output_path) and not (tiny_disk / "run.h5.space").exists()
    with RunFile(summary.output_path) as rf:
        assert "disk is full" in rf.last_end()["message"]


def test_store_level_enospc_is_a_typed_error_and_earlier_frames_survive(tiny_disk):
    path = tiny_disk / "run.h5"
    st = RunStore.create(path, _header(k=3, shape=(64, 64), truth=False))
    rng = np.random.default_rng(3)
    written = []
    _fill(tiny_disk, leave_bytes=40 * 1024)
    with pytest.raises(StoreWriteError) as info:
        for i in range(200):
            px = rng.integers(0, 4096, (64, 64), dtype=np.uint16)
            st.append_frame(px, frame_info_record(pass_index=i // 3, set_index=i // 3, mask_index=i % 3,
                                                  frame_id=i + 1, attempts=1))
            st.flush()
            written.append(px)
    assert info.value.disk_full and "maskrun resume" in str(info.value)
    try:
        st.close()
    except StoreWriteError:
        pass
    assert len(written) >= 1
    (tiny_disk / "ballast.bin").unlink()
    with RunFile(path) as rf:
        assert rf.frame_count >= len(written) - 1
        for i in range(min(rf.frame_count, len(written))):
            np.testing.assert_array_equal(rf.frame(i), written[i])


def test_guard_reads_the_disk_rarely_with_room_and_before_every_frame_near_the_limit(tiny_disk):
    """The guard costs one statvfs per ``recheck_s`` while there is room, yet still stops in time when
    another writer fills the disk: near the limit it reads the real free space before every frame."""
    now = [0.0]
    frame = 4096
    roomy = DiskGuard(tiny_disk, reserve_bytes=0, bytes_per_frame=frame, recheck_s=0.5, plenty_bytes=256 * 1024,
                      clock=lambda: now[0])
    for _ in range(50):
        roomy.check()
    assert roomy.readings == 1  # 50 frames inside 0.5 s, far from the limit: one real reading
    now[0] += 0.6
    roomy.check()
    assert roomy.readings == 2  # the interval passed: read again
    # Another writer leaves just above the limit: every check must read, and the stop comes in time.
    tight = DiskGuard(tiny_disk, reserve_bytes=0, bytes_per_frame=frame, recheck_s=3600.0, plenty_bytes=256 * 1024,
                      clock=lambda: now[0])
    _fill(tiny_disk, tight.limit_bytes + 128 * 1024)
    tight.check()
    tight.check()
    assert tight.readings == 2
    _fill(tiny_disk, tight.limit_bytes // 2)
    with pytest.raises(DiskSpaceError, match="free disk down to"):
        tight.check()
