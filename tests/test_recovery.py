"""Repair of crashed run files, resume refusals, `maskrun inspect` on growing and finished files,
and time-series runs."""

import hashlib
import io
import signal
import subprocess
import sys
import textwrap
import time

import h5py
import numpy as np
import pytest
from rich.console import Console

from maskrun.daemon.commands import cli
from maskrun.daemon.config import parse_config
from maskrun.daemon.acquire.foreground import RunRequest, run_foreground
from maskrun.daemon.acquire.recovery import ResumeError, needs_repair, repair_run_file, resume_point
from maskrun.daemon.record.runfile import RunFile
from maskrun.daemon.acquire.sequencer import State

from test_disk import _fill, tiny_disk  # noqa: F401  (fixture)
from test_faults import bench_text, run_bench

WRITER = textwrap.dedent("""
    import os, signal, socket, sys, time, numpy as np
    from maskrun.daemon.record.store import RunStore, RunHeader, frame_info_record
    path, frames, then = sys.argv[1], int(sys.argv[2]), sys.argv[3]
    h = RunHeader('w', '[run]\\nname="w"\\n', {}, (16, 16), np.ones((2, 16, 16), complex), np.dtype(np.uint16), 6e-7, 12)
    st = RunStore.create(path, h)
    st.log('writer', f'pid {os.getpid()} on {socket.gethostname()}')
    rng = np.random.default_rng(9)
    for i in range(frames):
        st.append_frame(rng.integers(0, 4096, (16, 16), dtype=np.uint16),
                        frame_info_record(pass_index=i // 2, set_index=i // 2, mask_index=i % 2, frame_id=i + 1,
                                          t_request_s=time.time(), t_frame_s=time.time(), attempts=1))
        st.flush()
    print('ready', flush=True)
    if then == 'kill':
        os.kill(os.getpid(), signal.SIGKILL)
    elif then == 'finish-later':
        time.sleep(1.0)
        st.log('run_end', 'run finished: 2 complete frame sets')
        st.close()
    else:
        time.sleep(30)
""")


def _writer(path, frames, then):
    proc = subprocess.Popen([sys.executable, "-c", WRITER, str(path), str(frames), then], stdout=subprocess.PIPE,
                            text=True)
    assert proc.stdout.readline().strip() == "ready"
    return proc


def _expected(frames):
    rng = np.random.default_rng(9)
    return [rng.integers(0, 4096, (16, 16), dtype=np.uint16) for _ in range(frames)]


def _sha(path):
    return hashlib.sha256(path.read_bytes()).hexdigest()


def test_repair_makes_a_killed_file_writable_and_keeps_every_frame(tmp_path):
    path = tmp_path / "k.h5"
    _writer(path, 5, "kill").wait(30)
    with pytest.raises(OSError, match="already open for write"):  # what HDF5 says before the repair
        h5py.File(path, "r+")
    assert needs_repair(path)
    report = repair_run_file(path)
    assert report.frames == 5 and not (tmp_path / "k.h5.repair-tmp").exists()
    assert not needs_repair(path)
    with RunFile(path) as rf:
        for i, px in enumerate(_expected(5)):
            np.testing.assert_array_equal(rf.frame(i), px)
        assert [s.pass_index for s in rf.complete_sets()] == [0, 1]
        assert rf.entry["frames"].chunks == (1, 16, 16) and rf.entry["frames"].maxshape[0] is None


def test_repair_refuses_without_room_for_the_copy_and_leaves_the_original(tiny_disk):  # noqa: F811
    path = tiny_disk / "k.h5"
    _writer(path, 40, "kill").wait(30)
    before = _sha(path)
    _fill(tiny_disk, leave_bytes=16 * 1024)
    from maskrun.daemon.acquire.disk import DiskSpaceError

    with pytest.raises(DiskSpaceError, match="needs room for a copy"):
        repair_run_file(path)
    assert _sha(path) == before and not (tiny_disk / "k.h5.repair-tmp").exists()


def test_resume_refuses_a_live_writer_and_a_finished_run(tmp_path):
    path = tmp_path / "live.h5"
    proc = _writer(path, 3, "sleep")
    try:
        with pytest.raises(ResumeError, match=f"still being written by process {proc.pid}"):
            resume_point(path)
    finally:
        proc.send_signal(signal.SIGKILL)
        proc.wait(30)
    summary, _ = run_bench(tmp_path, bench_text(passes=1))
    with pytest.raises(ResumeError, match="finished"):
        resume_point(summary.output_path)
    assert cli.main(["resume", str(summary.output_path), "--acknowledge-safety"]) == 2  # one-line error


def test_inspect_growing_killed_and_finished_files(tmp_path, capsys, monkeypatch):
    monkeypatch.setenv("COLUMNS", "250")
    path = tmp_path / "grow.h5"
    proc = _writer(path, 4, "sleep")
    try:
        assert cli.main(["inspect", str(path)]) == 0
        out = capsys.readouterr().out
        assert f"running (writer pid {proc.pid})" in out and "2 complete" in out
    finally:
        proc.send_signal(signal.SIGKILL)
        proc.wait(30)
    assert cli.main(["inspect", str(path)]) == 0
    assert "killed or lost power" in capsys.readouterr().out
    follow = tmp_path / "follow.h5"
    proc = _writer(follow, 4, "finish-later")
    t0 = time.monotonic()
    assert cli.main(["inspect", str(follow), "--follow", "--interval-s", "0.1"]) == 0
    out = capsys.readouterr().out
    assert "run ended" in out and "finished" in out and time.monotonic() - t0 < 10
    proc.wait(30)


def test_time_series_repeats_the_set_every_interval_with_the_shutter_closed_between(tmp_path):
    text = bench_text().replace("[run]\n", "[run]\ninterval_s = 0.4\nduration_s = 1.0\n", 1)
    cfg = parse_config(text, str(tmp_path / "b.toml"))
    console = Console(file=io.StringIO(), width=300)
    summary = run_foreground(cfg, RunRequest(acknowledge_unattended=True, output_dir=str(tmp_path)), console)
    assert summary.state == State.finished, summary.message
    assert summary.passes_complete == 3  # t = 0, 0.4, 0.8 < 1.0
    out = console.file.getvalue()
    assert "3 frame sets x 4 masks" in out and "one every 0.4 s" in out and "ETA" in out
    with RunFile(summary.output_path) as rf:
        info = rf.frame_info()
        starts = [info["t_request_s"][s.rows].min() for s in rf.complete_sets()]
        assert np.all(np.diff(starts) >= 0.4 - 0.02)
        kinds = [e["kind"] for e in rf.events()]
        assert kinds.count("interval_wait") == 2
        assert kinds.count("shutter") == 3  # closed during each wait, opened again for each set
        assert rf.run_plan == {"passes": 3, "dark_frames": 1, "exposure_s": 0.002, "interval_s": 0.4}


def test_resumed_run_live_estimate_continues_from_the_sets_already_in_the_file(tmp_path):
    """Stop a run with live reconstruction after 2 of 5 frame sets, resume it: the first estimate after
    the resume averages 3 sets, and every live estimate used the same detected photons as an offline
    cumulative reconstruction of the finished file (so the preloaded sets were converted like live ones)."""
    from maskrun.daemon.acquire.foreground import resume_foreground
    from maskrun.daemon.offline.reprocess import InProcessRunner, ReprocessOptions, read_results, reprocess_runs

    from benchcfg import small_bench_text

    masks = 4
    text = small_bench_text(masks=masks, passes=5, darks=1, extra_camera="real_time = false", recon_iterations=20)

    def observer(p, bench, control):
        if p.frames_done == 2 * masks:
            control.request_stop("stopped by the test after two frame sets")

    summary, _ = run_bench(tmp_path, text, observer=observer)
    assert summary.state == State.stopped and summary.passes_complete == 2
    path = summary.output_path
    with RunFile(path) as rf:  # a stop still keeps the estimates of the sets already taken
        assert rf.estimate_info()["passes_used"].tolist() == [1, 2]
    resumed = resume_foreground(path, RunRequest(acknowledge_unattended=True, figure=False),
                                Console(file=io.StringIO()))
    assert resumed.state == State.finished, resumed.message
    with RunFile(path) as rf:
        live = rf.estimate_info()
        preload = [e["message"] for e in rf.events() if e["kind"] == "recon_preload"]
    assert preload and "2 frame set(s)" in preload[0]
    assert sorted(live["passes_used"].tolist()) == [1, 2, 3, 4, 5]
    (tmp_path / "offline").mkdir()
    (rep,) = reprocess_runs([path], ReprocessOptions(iterations=5, mode="cumulative"), InProcessRunner(),
                            output_dir=tmp_path / "offline")
    _, offline, _ = read_results(rep.results_path)
    for row in offline:
        (match,) = live[live["pass_index"] == row["pass_index"]]
        assert match["passes_used"] == row["passes_used"]
        assert np.isclose(match["photons"], row["photons"], rtol=1e-6), (row["pass_index"], match["photons"], row["photons"])
