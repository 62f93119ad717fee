"""The sequencer end to end on the simulated bench: pty firmware, real ZeroMQ, real HDF5, a worker process."""

import io

import h5py
import numpy as np
import pytest
from rich.console import Console

from benchcfg import small_bench
from maskrun.daemon.acquire.foreground import RunRequest, run_foreground
from maskrun.daemon.record.runfile import RunFile
from maskrun.daemon.safety.safety import SafetyNotAcknowledged
from maskrun.daemon.record.store import FLAG_RETAKEN


def _console():
    return Console(file=io.StringIO(), width=120)


def test_full_run_writes_checks_stores_and_reconstructs(tmp_path):
    cfg = small_bench(passes=3)
    summary = run_foreground(cfg, RunRequest(acknowledge_unattended=True, output_dir=str(tmp_path)), _console())
    assert summary.state.value == "finished", summary.message
    assert summary.frames == 3 * 6 and summary.darks == 2 and summary.passes_complete == 3
    with RunFile(summary.output_path) as rf:
        assert rf.frame_count == 18
        info = rf.frame_info()
        assert info["mask_index"].tolist() == list(range(6)) * 3
        assert np.all(np.diff(info["frame_id"]) > 0)  # frame ids advance
        assert np.all(info["t_frame_s"] >= info["t_request_s"])
        assert len(rf.complete_sets()) == 3
        assert rf.estimate_count >= 1
        einfo = rf.estimate_info()
        # the truth is stored and the estimate improves as frame sets accumulate
        assert rf.truth() is not None
        assert einfo["true_error"][-1] < 0.05
        assert rf.finished()
        kinds = [e["kind"] for e in rf.events()]
        assert kinds[0] == "safety_ack" and "run_start" in kinds and kinds[-1] == "run_end"
        # dark frames are taken with the shutter closed: only offset + dark current + read noise
        darks = rf.darks()
        assert abs(darks.mean() - 100.0) < 5.0
        # bright frames carry many photons
        assert info["photons"].min() > 1e4


def test_stale_frame_is_refused_and_retaken(tmp_path):
    cfg = small_bench(passes=1, extra_camera='faults = [{kind = "stale", at_frame = 5, count = 1}]')
    summary = run_foreground(cfg, RunRequest(acknowledge_unattended=True, output_dir=str(tmp_path)), _console())
    assert summary.state.value == "finished", summary.message
    assert summary.rejected == 1
    with RunFile(summary.output_path) as rf:
        info = rf.frame_info()
        ids = np.concatenate([rf.dark_info()["frame_id"], info["frame_id"]])
        assert len(set(ids.tolist())) == len(ids)  # no frame stored twice
        assert np.count_nonzero(info["flags"] & FLAG_RETAKEN) == 1
        assert any(e["kind"] == "stale_frame" for e in rf.events())


def test_safety_acknowledgement_is_required(tmp_path):
    cfg = small_bench(passes=1)

    class NoTerminal(io.StringIO):
        def isatty(self):
            return False

    import sys

    old = sys.stdin
    sys.stdin = NoTerminal("")
    try:
        with pytest.raises(SafetyNotAcknowledged, match="--acknowledge-safety"):
            run_foreground(cfg, RunRequest(acknowledge_unattended=False, output_dir=str(tmp_path)), _console())
    finally:
        sys.stdin = old
    assert list(tmp_path.iterdir()) == []  # nothing started, no file


def test_acknowledgement_is_recorded_in_the_file(tmp_path):
    cfg = small_bench(passes=1)
    summary = run_foreground(cfg, RunRequest(acknowledge_unattended=True, output_dir=str(tmp_path)), _console())
    with h5py.File(summary.output_path, "r") as f:
        import json

        ack = json.loads(f["entry"].attrs["safety_acknowledgement"])
    assert ack["how"] == "command-line option --acknowledge-safety"
    assert ack["laser_class"] == "3R" and ack["wavelength_m"] == pytest.approx(632.8e-9)
    assert ack["who"] and ack["when_utc"].endswith("Z")
    assert any("laser safety officer" in line for line in ack["notice"])


def test_open_interlock_keeps_the_shutter_closed(tmp_path):
    import zmq

    from maskrun.daemon.acquire.bench import build_bench
    from maskrun.daemon.safety.safety import make_acknowledgement
    from maskrun.daemon.acquire.sequencer import RunPlan
    from maskrun.daemon.acquire.session import execute_run

    cfg = small_bench(passes=1)
    bench = build_bench(cfg)
    shutter_history = []
    bench.optics.subscribe(lambda name, value: shutter_history.append(value) if name == "shutter_open" else None)
    bench.optics.interlock_closed = False  # the enclosure door is open
    ctx = zmq.Context()
    try:
        bench.open()
        ack = make_acknowledgement(cfg.laser, who="tester", how="test")
        plan = RunPlan(passes=1, dark_frames=1, exposure_s=cfg.camera.exposure_s, output_path=tmp_path / "r.h5")
        summary = execute_run(bench, plan, ack, publisher=None, zmq_context=ctx)
    finally:
        bench.close()
        ctx.term()
    assert summary.state.value == "fault"
    assert "interlock" in summary.message.lower()
    assert True not in shutter_history  # the shutter never opened
    with RunFile(tmp_path / "r.h5") as rf:
        assert rf.frame_count == 0 and rf.dark_count == 1  # darks need no beam; nothing else was taken
        assert any("interlock" in e["message"].lower() for e in rf.events() if e["kind"] == "run_end")
