"""Crash safety: SIGKILL a foreground `maskrun run` / `maskrun resume` at random moments, then check
the file and resume it to the end.

The simulated camera is deterministic for its seed and its frame id counts the frames it read out
since it was opened, so the expected pixels of any stored frame are those of the frame with the
same id in one uninterrupted run of the same config (regenerated here, in this process). Each
chain: `maskrun run`, killed; then `maskrun resume`, killed again, several times; then a final
resume that must finish. After every kill: the file opens, every complete frame set is
bit-identical to the simulator's frames, nothing stored before an earlier kill changed.
"""

import io
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
from rich.console import Console

from benchcfg import small_bench_text
from maskrun.daemon.config import parse_config
from maskrun.daemon.foreground import RunRequest, resume_foreground, run_foreground
from maskrun.daemon.runfile import RunFile
from maskrun.daemon.store import FLAG_AFTER_RESUME

PASSES, MASKS, DARKS = 40, 4, 1
MASKRUN = str(Path(sys.executable).parent / "maskrun")


def _config_text() -> str:
    text = small_bench_text(grid=32, sensor=48, masks=MASKS, passes=PASSES, darks=DARKS,
                            extra_camera="real_time = false")
    return text.replace("[reconstruction]", "[reconstruction]\nenabled = false", 1)


@pytest.fixture(scope="module")
def reference(tmp_path_factory):
    """Frames of one uninterrupted run, by camera frame id (darks and bright frames)."""
    d = tmp_path_factory.mktemp("reference")
    cfg = parse_config(_config_text(), str(d / "k.toml"))
    summary = run_foreground(cfg, RunRequest(acknowledge_unattended=True, output_dir=str(d), name="ref"),
                             Console(file=io.StringIO()))
    assert summary.state.value == "finished", summary.message
    by_id = {}
    with RunFile(summary.output_path) as rf:
        for row, px in zip(rf.dark_info(), rf.darks()):
            by_id[int(row["frame_id"])] = px
        info = rf.frame_info()
        frames = rf.frames()
        for row, px in zip(info, frames):
            by_id[int(row["frame_id"])] = px
        assert rf.refused_count == 0 and np.all(info["attempts"] == 1)  # no retakes: ids map 1:1 to draws
    return by_id


def _run_starts(log: Path) -> int:
    try:
        return log.read_text().count(" run_start ")
    except FileNotFoundError:
        return 0


def _seen_by_reader(folder: Path, h5_glob: str) -> tuple[int, int]:
    """(frames, complete sets) a concurrent SWMR reader sees right now (0, 0 if there is no file yet)."""
    files = sorted(folder.glob(h5_glob))
    if not files:
        return 0, 0
    try:
        with RunFile(files[0]) as rf:
            return rf.frame_count, len(rf.complete_sets())
    except Exception:
        return 0, 0  # still being created


def _kill_after(cmd, folder: Path, log_glob: str, delay_s: float, from_start: bool):
    """Start cmd; SIGKILL it delay_s after its run started (or after process start).

    Returns (run file, (frames, complete sets) a reader saw just before the kill)."""
    before = {p: _run_starts(p) for p in folder.glob(log_glob)}
    proc = subprocess.Popen(cmd, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, cwd=folder)
    t0 = time.monotonic()
    try:
        if not from_start:
            while time.monotonic() - t0 < 30:
                logs = list(folder.glob(log_glob))
                if any(_run_starts(p) > before.get(p, 0) for p in logs):
                    break
                if proc.poll() is not None:
                    raise AssertionError(f"the run ended before it started: {proc.stderr.read().decode()[-2000:]}")
                time.sleep(0.005)
        time.sleep(delay_s)
        seen = _seen_by_reader(folder, log_glob.replace(".log", ".h5"))
    finally:
        proc.send_signal(signal.SIGKILL)
        proc.wait(timeout=30)
        proc.stderr.close()
    files = sorted(folder.glob(log_glob.replace(".log", ".h5")))
    return (files[0] if files else None), seen


def _check_file(path: Path, reference: dict, earlier: dict, seen=(0, 0)) -> dict:
    """Every complete set bit-identical to the simulator's frames; earlier rows unchanged; whatever a reader
    saw before the kill is still there. Returns the complete sets' rows {row: (pass, mask, frame id)}."""
    kept = {}
    with RunFile(path) as rf:
        assert rf.frame_count >= seen[0] and len(rf.complete_sets()) >= seen[1], (rf.frame_count, seen)
        info = rf.frame_info()
        sets = rf.complete_sets()
        for s in sets:
            for r in s.rows:
                fid = int(info["frame_id"][r])
                px = rf.frame(int(r))
                np.testing.assert_array_equal(px, reference[fid], err_msg=f"frame id {fid} (row {r}) differs")
                kept[int(r)] = (int(info["pass_index"][r]), int(info["mask_index"][r]), fid)
        for row, (p, m, fid) in earlier.items():  # what was complete before stays, bit for bit
            assert row < rf.frame_count, f"row {row} lost"
            assert (int(info["pass_index"][row]), int(info["mask_index"][row]), int(info["frame_id"][row])) == (p, m, fid)
            np.testing.assert_array_equal(rf.frame(row), reference[fid])
        for row, px in zip(rf.dark_info(), rf.darks()):
            np.testing.assert_array_equal(px, reference[int(row["frame_id"])])
        kept["_mid_set"] = rf.frame_count % MASKS != 0 or any(
            len(np.flatnonzero(info["set_index"] == s)) != MASKS for s in np.unique(info["set_index"]))
    return kept


def test_sigkill_at_random_moments_loses_at_most_the_frame_set_in_progress(tmp_path, reference):
    rng = np.random.default_rng(int(os.environ.get("MASKRUN_KILL_SEED", "20261202")))
    cfg_path = tmp_path / "k.toml"
    cfg_path.write_text(_config_text())
    kills = mid_set = 0
    chains = 4
    for c in range(chains):
        folder = tmp_path / f"chain{c}"
        folder.mkdir()
        name = f"c{c}"
        run_cmd = [MASKRUN, "run", str(cfg_path), "--acknowledge-safety", "--output-dir", str(folder),
                   "--name", name, "--no-figure"]
        path, seen = _kill_after(run_cmd, folder, f"{name}-*.log", float(rng.uniform(0.0, 0.4)), from_start=False)
        kills += 1
        assert path is not None and path.exists()
        earlier = {}
        for session in range(4):
            kept = _check_file(path, reference, earlier, seen)
            mid_set += kept.pop("_mid_set")
            earlier = kept
            # one kill per chain at a random moment after process start (imports, repair, creation, run)
            from_start = session == 2
            delay = float(rng.uniform(0.3, 1.5)) if from_start else float(rng.uniform(0.0, 0.4))
            _, seen = _kill_after([MASKRUN, "resume", str(path), "--acknowledge-safety", "--no-figure"], folder,
                                  f"{name}-*.log", delay, from_start=from_start)
            kills += 1
            assert not list(folder.glob("*.repair-tmp")) or session == 2  # only a kill inside a repair leaves one
        kept = _check_file(path, reference, earlier, seen)
        kept.pop("_mid_set")
        # the final resume (in this process) completes the run
        summary = resume_foreground(path, RunRequest(acknowledge_unattended=True), Console(file=io.StringIO()))
        assert summary.state.value == "finished", summary.message
        with RunFile(path) as rf:
            assert rf.finished()
            done = sorted({s.pass_index for s in rf.complete_sets()})
            assert done == list(range(PASSES)), f"passes missing: {sorted(set(range(PASSES)) - set(done))}"
            ev = rf.events()
            assert sum(e["kind"] == "resume" for e in ev) >= 1
            info = rf.frame_info()
            assert np.any(info["flags"] & FLAG_AFTER_RESUME)
            for row, (p, m, fid) in kept.items():  # still intact after the final resume appended to the file
                np.testing.assert_array_equal(rf.frame(row), reference[fid])
        assert not list(folder.glob("*.repair-tmp"))
    assert kills >= 20
    assert mid_set >= 3, "too few kills landed inside a frame set to show mid-write safety"
