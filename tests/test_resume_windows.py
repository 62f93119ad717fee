"""Resume in the kill windows the random kill tests rarely hit: after the last frame (before the
end record), and with another process holding the run file open as an h5py SWMR reader.

Real parts: `maskrun run` / `maskrun resume` / `maskrun inspect` subprocesses, SIGKILL, HDF5 files
read with plain h5py (the way an outside program reads them).
"""

import os
import signal
import socket
import subprocess
import sys
import time
from pathlib import Path

import h5py
import numpy as np
import pytest

from benchcfg import small_bench_text
from maskrun.daemon.record.runfile import RunFile

MASKRUN = str(Path(sys.executable).parent / "maskrun")
MASKS, PASSES = 3, 4


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _config(tmp_path: Path, *, worker: bool, passes: int = PASSES) -> Path:
    text = small_bench_text(grid=32, sensor=48, masks=MASKS, passes=passes, darks=1, recon_iterations=20,
                            extra_camera="real_time = false")
    if not worker:  # no worker ever connects: the run waits for its estimates after the last frame (up to 30 s)
        text = text.replace("[reconstruction]", f"[reconstruction]\nlocal_worker = false\n"
                            f"worker_address = \"tcp://127.0.0.1:{_free_port()}\"", 1)
    p = tmp_path / "bench.toml"
    p.write_text(text)
    return p


def _events(path: Path) -> list[str]:
    with RunFile(path) as rf:
        return [e["kind"] for e in rf.events()]


def kill_after_last_frame(cfg: Path, folder: Path, name: str, total_frames: int, timeout_s: float = 60) -> Path:
    """Start `maskrun run`; SIGKILL it as soon as a reader sees every frame but no end record."""
    proc = subprocess.Popen([MASKRUN, "run", str(cfg), "--acknowledge-safety", "--output-dir", str(folder),
                             "--name", name, "--no-figure"], stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    deadline = time.monotonic() + timeout_s
    try:
        while time.monotonic() < deadline:
            files = sorted(folder.glob(f"{name}-*.h5"))
            if files:
                try:
                    with RunFile(files[0]) as rf:
                        if rf.frame_count >= total_frames:
                            assert rf.last_end() is None, "the run ended before the kill"
                            break
                except AssertionError:
                    raise
                except Exception:
                    pass  # still being created
            assert proc.poll() is None, proc.stderr.read().decode()[-2000:]
            time.sleep(0.005)
        else:
            raise AssertionError("the run never reached its last frame")
    finally:
        proc.send_signal(signal.SIGKILL)
        proc.wait(30)
        proc.stderr.close()
    return files[0]


def test_a_run_killed_after_its_last_frame_is_finished_by_resume_and_inspect_agrees(tmp_path):
    cfg = _config(tmp_path, worker=False)
    path = kill_after_last_frame(cfg, tmp_path, "late", PASSES * MASKS)
    space = path.with_name(path.name + ".space")
    assert space.exists()
    with pytest.raises(OSError):  # flagged open for writing: a plain reader is refused
        h5py.File(path, "r").close()
    out = subprocess.run([MASKRUN, "inspect", str(path)], capture_output=True, text=True, timeout=60,
                         env=dict(os.environ, COLUMNS="300"))
    assert out.returncode == 0, out.stderr
    assert "all 4 frame sets are in the file; finish it with 'maskrun resume" in out.stdout, out.stdout

    out = subprocess.run([MASKRUN, "resume", str(path), "--no-figure"], capture_output=True, text=True, timeout=120,
                         stdin=subprocess.DEVNULL)  # no --acknowledge-safety: no light, so no notice is needed
    assert out.returncode == 0, out.stdout + out.stderr
    assert "Finishing" in out.stdout and "4 missing estimate(s)" in out.stdout
    assert not space.exists()
    with h5py.File(path, "r") as f:  # write flag cleared: a plain (non-SWMR) reader opens it
        e = f["entry"]
        assert e["estimates"].shape[0] == PASSES
        assert list(e["estimate_info"]["pass_index"]) == list(range(PASSES))
        assert np.all(np.isfinite(e["estimate_info"]["true_error"]))
    with RunFile(path) as rf:
        assert rf.finished() and len(rf.complete_sets()) == PASSES
    out = subprocess.run([MASKRUN, "inspect", str(path)], capture_output=True, text=True, timeout=60,
                         env=dict(os.environ, COLUMNS="300"))
    assert "run finished" in out.stdout and "finish it with" not in out.stdout and "continue with" not in out.stdout
    out = subprocess.run([MASKRUN, "resume", str(path)], capture_output=True, text=True, timeout=60)
    assert out.returncode == 2 and "nothing to resume" in out.stderr  # now they agree: finished


def test_finishing_adds_only_the_estimates_still_missing(tmp_path):
    """Killed with a local worker: some estimates are in, the rest are added in pass order."""
    cfg = _config(tmp_path, worker=True, passes=6)
    path = kill_after_last_frame(cfg, tmp_path, "part", 6 * MASKS)
    with RunFile(path) as rf:
        before = rf.estimate_count
        old = rf.estimates()[:before] if before else None
    from maskrun.daemon.config import parse_config
    from maskrun.daemon.acquire.finish import finish_run_file
    from maskrun.daemon.acquire.recovery import resume_point

    point = resume_point(path)
    assert point.finish_only
    summary = finish_run_file(point, parse_config(point.config_text, str(path)), log=lambda m: None)
    assert summary.state.value == "finished" and summary.estimates == 6 - before
    with RunFile(path) as rf:
        assert rf.estimate_count == 6 and rf.finished()
        assert list(rf.estimate_info()["pass_index"]) == list(range(6))
        if old is not None:
            np.testing.assert_array_equal(rf.estimates()[:before], old)  # the live ones are kept as they were


@pytest.mark.parametrize("window", ["mid-run", "after-last-frame"])
def test_resume_while_an_h5py_reader_holds_the_file_with_swmr(tmp_path, window):
    cfg = _config(tmp_path, worker=window == "mid-run")
    if window == "after-last-frame":
        path = kill_after_last_frame(cfg, tmp_path, "held", PASSES * MASKS)
    else:
        path = kill_after_last_frame(cfg, tmp_path, "held", MASKS + 1)  # inside the second frame set
    reader = h5py.File(path, "r", libver="latest", swmr=True)  # a viewer left open
    try:
        seen_frames = reader["entry/frames"].shape[0]
        seen_first = reader["entry/frames"][0].copy()
        out = subprocess.run([MASKRUN, "resume", str(path), "--acknowledge-safety", "--no-figure"],
                             capture_output=True, text=True, timeout=120)
        assert out.returncode == 0, out.stdout + out.stderr
        assert "unable to lock" not in out.stdout + out.stderr
        # the reader is still on the old inode: it sees the file as it was when the writer died
        reader["entry/frames"].refresh()
        assert reader["entry/frames"].shape[0] == seen_frames
        np.testing.assert_array_equal(reader["entry/frames"][0], seen_first)
    finally:
        reader.close()
    with RunFile(path) as rf:  # reopening the path shows the resumed, finished run
        assert rf.finished() and sorted(s.pass_index for s in rf.complete_sets()) == list(range(PASSES))
        np.testing.assert_array_equal(rf.frame(0), seen_first)
        assert "repaired" in [e["kind"] for e in rf.events()]


def _complete_frames(path: Path) -> dict:
    """{(pass, mask): frame bytes} of the complete frame sets in the file."""
    out = {}
    with RunFile(path) as rf:
        info = rf.frame_info()
        for s in rf.complete_sets():
            for r in s.rows:
                out[(s.pass_index, int(info["mask_index"][r]))] = rf.frame(int(r)).tobytes()
    return out


@pytest.mark.soak
def test_twenty_seeded_kills_in_every_window_lose_no_complete_set(tmp_path):
    """20 trials, seeded: a random mid-run kill, a kill after the last frame, or a kill then a resume with
    an h5py SWMR reader holding the file. Counts complete sets lost and resume failures (both must be 0).
    Run: pytest -m soak tests/test_resume_windows.py -s"""
    rng = np.random.default_rng(int(os.environ.get("MASKRUN_KILL_SEED", "2020")))
    passes = 5
    lost = failures = sets_kept = 0
    windows = {"random": 0, "after-last-frame": 0, "reader": 0}
    for trial in range(20):
        folder = tmp_path / f"t{trial}"
        folder.mkdir()
        window = ("random", "after-last-frame", "reader")[trial % 3]
        windows[window] += 1
        cfg = _config(folder, worker=bool(rng.integers(0, 2)) or window != "after-last-frame", passes=passes)
        target = passes * MASKS if window == "after-last-frame" else int(rng.integers(1, passes * MASKS))
        path = kill_after_last_frame(cfg, folder, f"t{trial}", target)
        before = _complete_frames(path)
        reader = h5py.File(path, "r", libver="latest", swmr=True) if window == "reader" else None
        try:
            out = subprocess.run([MASKRUN, "resume", str(path), "--acknowledge-safety", "--no-figure"],
                                 capture_output=True, text=True, timeout=180)
        finally:
            if reader is not None:
                reader.close()
        after = _complete_frames(path)
        with RunFile(path) as rf:
            ok = out.returncode == 0 and rf.finished() and sorted({p for p, _ in after}) == list(range(passes))
        failures += not ok
        lost += len({p for (p, m), b in before.items() if after.get((p, m)) != b})
        sets_kept += len({p for p, _ in before})
        assert ok, f"trial {trial} ({window}): {out.stdout[-1500:]} {out.stderr[-1500:]}"
    print(f"\nkill series: 20 trials {windows}; {sets_kept} complete sets in the killed files, {lost} lost; "
          f"{failures} resume failures")
    assert lost == 0 and failures == 0
