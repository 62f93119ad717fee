"""Fault matrix: every fault the simulators can inject, the documented reaction, a safe shutter.

Faults come from the simulators' own injection (camera faults in [camera.settings] faults,
firmware faults on the pseudo-terminal controllers, the interlock of the simulated optics).
Every run here also watches the simulated optics: the shutter must never open while the
interlock is open, and must be closed when the run is over.
"""

import io
import os
import signal
import threading
import time

import numpy as np
import pytest
import zmq
from rich.console import Console

from benchcfg import small_bench_text
from maskrun.daemon.acquire.bench import build_bench
from maskrun.daemon.config import parse_config
from maskrun.daemon.acquire.foreground import RunRequest, run_foreground
from maskrun.daemon.record.runfile import RunFile
from maskrun.daemon.safety.safety import make_acknowledgement
from maskrun.daemon.acquire.sequencer import RunControl, RunPlan, State
from maskrun.daemon.acquire.session import execute_run
from maskrun.daemon.record.stream import Subscriber
from maskrun.daemon.record.store import (
    FLAG_AFTER_PAUSE,
    FLAG_EXPOSURE_SHORTENED,
    FLAG_ID_GAP,
    FLAG_MODULATOR_RETRIED,
    FLAG_RECONNECTED,
    FLAG_RETAKEN,
    FLAG_SATURATED,
    FLAG_TIMEOUT_RETRIED,
)

FAST_RECOVERY = """
[recovery]
retries = 2
backoff_initial_s = 0.01
backoff_factor = 2.0
backoff_max_s = 0.05
reconnect_attempts = 3
pause_timeout_s = 20
"""


def bench_text(*, camera_faults="", modulator_faults="", safety_faults="", passes=2, extra="", rate_factor=1.0):
    text = small_bench_text(grid=32, sensor=48, masks=4, passes=passes, darks=1,
                            extra_camera="real_time = false\n" + (f"faults = [{camera_faults}]" if camera_faults else ""),
                            extra=FAST_RECOVERY + extra)
    text = text.replace("[reconstruction]", "[reconstruction]\nenabled = false", 1)
    text = text.replace('grab_timeout_s = 2.0', 'grab_timeout_s = 0.05', 1)
    # short reply timeouts so that a missing reply costs little
    text = text.replace('port = "sim:modulator"', 'port = "sim:modulator"\ntimeout_s = 0.3\nreconnect_timeout_s = 0.5', 1)
    text = text.replace('port = "sim:safety"', 'port = "sim:safety"\ntimeout_s = 1.0\nreconnect_timeout_s = 0.5', 1)
    text = text.replace("[simulation.firmware.modulator]\nsettle_s = 0.02",
                        "[simulation.firmware.modulator]\nsettle_s = 0.02\n"
                        + (f"faults = [{modulator_faults}]" if modulator_faults else ""), 1)
    text = text.replace("[simulation.firmware.safety]",
                        "[simulation.firmware.safety]\n" + (f"faults = [{safety_faults}]" if safety_faults else ""), 1)
    if rate_factor != 1.0:
        import re

        m = re.search(r"photon_rate_per_s = ([0-9.e+]+)", text)
        text = text.replace(m.group(0), f"photon_rate_per_s = {float(m.group(1)) * rate_factor:.6g}", 1)
    return text


class SafetyWatch:
    """Listens to the simulated optics: records any moment the shutter opens while the interlock is open."""

    def __init__(self, optics):
        self.optics = optics
        self.violations = []
        self.opened = 0
        optics.subscribe(self._on_change)

    def _on_change(self, name, value):
        if name == "shutter_open" and value:
            self.opened += 1
            if not self.optics.interlock_closed:
                self.violations.append(time.time())


def run_bench(tmp_path, text, *, observer=None, helper=None, control=None):
    """Run the config in this process; ``helper(control, bench, state)`` runs in a thread during the run."""
    cfg = parse_config(text, str(tmp_path / "bench.toml"))
    bench = build_bench(cfg)
    watch = SafetyWatch(bench.optics)
    control = control or RunControl()
    state = {"state": None, "frames": 0}

    def obs(p):
        state["state"], state["frames"], state["message"] = p.state, p.frames_done, p.message
        if observer is not None:
            observer(p, bench, control)

    ctx = zmq.Context()
    stop_helper = threading.Event()
    thread = None
    try:
        bench.open()
        if helper is not None:
            thread = threading.Thread(target=helper, args=(control, bench, state, stop_helper), daemon=True)
            thread.start()
        ack = make_acknowledgement(cfg.laser, who="tester", how="test")
        plan = RunPlan(passes=cfg.run.passes, dark_frames=cfg.run.dark_frames, exposure_s=cfg.camera.exposure_s,
                       output_path=tmp_path / "run.h5")
        summary = execute_run(bench, plan, ack, publisher=None, zmq_context=ctx, control=control, observer=obs)
    finally:
        stop_helper.set()
        if thread is not None:
            thread.join(5)
        shutter_after = bench.optics.shutter_open
        bench.close()
        ctx.term()
    assert watch.violations == [], "the shutter opened while the interlock was open"
    assert shutter_after is False, "the shutter was left open"
    return summary, watch


def resume_when_paused(control, bench, state, stop):
    """The operator: whenever the run pauses, resume it (after checking the shutter is closed)."""
    while not stop.is_set():
        if state["state"] == State.paused:
            assert bench.optics.shutter_open is False
            time.sleep(0.05)
            control.resume()
            time.sleep(0.05)
        time.sleep(0.01)


def events(path=None, kind=None):
    with RunFile(path) as rf:
        ev = rf.events()
    return [e for e in ev if kind is None or e["kind"] == kind]


def test_camera_timeout_is_retried_with_backoff(tmp_path):
    summary, _ = run_bench(tmp_path, bench_text(camera_faults='{kind = "timeout", at_frame = 4, count = 2}'))
    assert summary.state == State.finished, summary.message
    assert summary.faults["camera_timeout"] == 2 and summary.recovered >= 1 and summary.pauses == 0
    with RunFile(summary.output_path) as rf:
        info = rf.frame_info()
        assert np.count_nonzero(info["flags"] & FLAG_TIMEOUT_RETRIED) == 1
        assert info["attempts"].max() == 3
        assert len(rf.complete_sets()) == 2
    msgs = [e["message"] for e in events(summary.output_path, "camera_timeout")]
    assert "retrying in 0.01 s" in msgs[0] and "retrying in 0.02 s" in msgs[1]  # backoff doubles


def test_camera_timeout_beyond_the_retries_pauses_and_alerts(tmp_path):
    # 2 retries: 3 failed grabs pause the run; the operator resumes; 3 more fail, pause again; then frames come
    summary, _ = run_bench(tmp_path, bench_text(camera_faults='{kind = "timeout", at_frame = 4, count = 6}'),
                           helper=resume_when_paused)
    assert summary.state == State.finished, summary.message
    assert summary.pauses == 2
    paused = events(summary.output_path, "paused")
    assert len(paused) == 2 and all(e["level"] == "error" for e in paused)  # an alert, not a note
    assert "camera gave no good frame" in paused[0]["message"] and "shutter closed" in paused[0]["message"]
    with RunFile(summary.output_path) as rf:
        assert np.count_nonzero(rf.frame_info()["flags"] & FLAG_AFTER_PAUSE) == 1
        assert len(rf.complete_sets()) == 2


def test_pause_not_resumed_stops_safely_after_the_pause_timeout(tmp_path):
    text = bench_text(camera_faults='{kind = "timeout", at_frame = 3, count = 50}').replace(
        "pause_timeout_s = 20", "pause_timeout_s = 0.3")
    summary, _ = run_bench(tmp_path, text)
    assert summary.state == State.stopped and "without a resume" in summary.message
    ends = events(summary.output_path, "run_end")
    assert "maskrun resume" in ends[-1]["message"]


def test_modulator_without_acknowledgement_is_retried(tmp_path):
    # commands: ID?, COUNT, then SHOW per frame: the 2nd SHOW gets no reply twice
    summary, _ = run_bench(tmp_path, bench_text(modulator_faults='{kind = "no_reply", at_command = 4, count = 2}'))
    assert summary.state == State.finished, summary.message
    assert summary.faults["modulator_no_ack"] == 2
    with RunFile(summary.output_path) as rf:
        info = rf.frame_info()
        assert np.count_nonzero(info["flags"] & FLAG_MODULATOR_RETRIED) == 1
        assert info["mask_index"].tolist() == list(range(4)) * 2


def test_modulator_garbled_replies_beyond_the_retries_pause(tmp_path):
    summary, _ = run_bench(tmp_path, bench_text(modulator_faults='{kind = "garbled", at_command = 4, count = 4}'),
                           helper=resume_when_paused)
    assert summary.state == State.finished, summary.message
    assert summary.faults["modulator_bad_reply"] == 4 and summary.pauses == 1
    assert "modulator does not answer" in events(summary.output_path, "paused")[0]["message"]


@pytest.mark.parametrize("device", ["modulator", "safety"])
def test_serial_unplug_is_reconnected(tmp_path, device):
    fault = '{kind = "unplug", at_command = 6, duration_s = 0.3}'
    kw = {"modulator_faults": fault} if device == "modulator" else {"safety_faults": fault}
    summary, _ = run_bench(tmp_path, bench_text(**kw))
    assert summary.state == State.finished, summary.message
    assert summary.faults[f"{device}_disconnect"] >= 1
    assert events(summary.output_path, f"{device}_reconnected")
    with RunFile(summary.output_path) as rf:
        info = rf.frame_info()
        assert np.count_nonzero(info["flags"] & FLAG_RECONNECTED) >= 1
        assert len(rf.complete_sets()) == 2
        assert info["photons"].min() > 1e4  # no frame was taken with the shutter closed by the unplug


def test_camera_disconnect_is_reconnected(tmp_path):
    summary, _ = run_bench(tmp_path, bench_text(camera_faults='{kind = "disconnect", at_frame = 5}'))
    assert summary.state == State.finished, summary.message
    assert summary.faults["camera_disconnect"] == 1
    assert events(summary.output_path, "camera_reconnected")
    with RunFile(summary.output_path) as rf:
        assert np.count_nonzero(rf.frame_info()["flags"] & FLAG_RECONNECTED) == 1


def test_stale_frame_is_refused_and_retaken(tmp_path):
    summary, _ = run_bench(tmp_path, bench_text(camera_faults='{kind = "stale", at_frame = 4, count = 1}'))
    assert summary.state == State.finished and summary.rejected == 1
    with RunFile(summary.output_path) as rf:
        info = rf.frame_info()
        assert len(set(info["frame_id"].tolist())) == len(info)  # the stale copy was not stored
        assert np.count_nonzero(info["flags"] & FLAG_RETAKEN) == 1


def test_dropped_frame_is_kept_aside_and_retaken(tmp_path):
    summary, _ = run_bench(tmp_path, bench_text(camera_faults='{kind = "dropped", at_frame = 4, count = 1}'))
    assert summary.state == State.finished, summary.message
    assert summary.faults["frame_dropped"] == 1 and summary.refused == 1
    with RunFile(summary.output_path) as rf:
        refused = rf.refused_info()
        assert len(refused) == 1 and refused["flags"][0] & FLAG_ID_GAP
        info = rf.frame_info()
        ids = info["frame_id"].tolist()
        gap_id = int(refused["frame_id"][0])
        assert gap_id not in ids and gap_id + 1 in ids  # refused, and the retake follows it
        assert np.all(np.diff(info["frame_id"]) > 0)
        assert info["mask_index"].tolist() == list(range(4)) * 2
        assert len(rf.complete_sets()) == 2


def test_corrupted_frame_is_retaken_and_the_expected_gap_accepted(tmp_path):
    summary, _ = run_bench(tmp_path, bench_text(camera_faults='{kind = "corrupted", at_frame = 4, count = 1}'))
    assert summary.state == State.finished, summary.message
    assert summary.faults["camera_fault"] == 1 and summary.refused == 0
    with RunFile(summary.output_path) as rf:
        info = rf.frame_info()
        gap = info["flags"] & FLAG_ID_GAP
        assert np.count_nonzero(gap) == 1 and np.count_nonzero(info["flags"] & FLAG_RETAKEN) == 1


def test_interlock_opening_pauses_until_closed_and_resumed(tmp_path):
    opened = threading.Event()

    def observer(p, bench, control):
        if p.frames_done == 3 and not opened.is_set():
            opened.set()
            bench.optics.interlock_closed = False  # someone opens the enclosure door

    def operator(control, bench, state, stop):
        while state["state"] != State.paused and not stop.is_set():
            time.sleep(0.01)
        assert bench.optics.shutter_open is False
        control.resume()  # too early: the door is still open
        time.sleep(0.5)
        assert state["state"] == State.paused and bench.optics.shutter_open is False
        bench.optics.interlock_closed = True  # door closed
        time.sleep(0.2)
        assert state["state"] == State.paused  # closing the door alone does not restart the beam
        control.resume()

    summary, watch = run_bench(tmp_path, bench_text(), observer=observer, helper=operator)
    assert summary.state == State.finished, summary.message
    assert summary.faults["interlock_open"] >= 1 and summary.pauses >= 1
    assert events(summary.output_path, "resume_refused")
    assert events(summary.output_path, "resumed")
    assert watch.opened >= 2  # opened again after the pause, never while the interlock was open
    with RunFile(summary.output_path) as rf:
        assert len(rf.complete_sets()) == 2
        assert rf.frame_info()["photons"].min() > 1e4  # no dark frame slipped into a set


def test_saturation_flag_keeps_flagged_frames(tmp_path):
    summary, _ = run_bench(tmp_path, bench_text(rate_factor=30, passes=1))
    assert summary.state == State.finished
    with RunFile(summary.output_path) as rf:
        assert np.all(rf.frame_info()["flags"] & FLAG_SATURATED)


def test_saturation_shorten_retakes_with_a_shorter_exposure(tmp_path):
    text = bench_text(rate_factor=30, passes=1).replace('saturation_action = "flag"', 'saturation_action = "shorten"')
    summary, _ = run_bench(tmp_path, text)
    assert summary.state == State.finished, summary.message
    with RunFile(summary.output_path) as rf:
        info, refused = rf.frame_info(), rf.refused_info()
        assert len(refused) >= 1 and np.all(refused["flags"] & FLAG_SATURATED)
        assert not np.any(info["flags"] & FLAG_SATURATED)  # the kept frames are below the limit
        assert info["flags"][0] & FLAG_EXPOSURE_SHORTENED
        assert np.all(info["exposure_s"] < 0.002) and np.all(info["exposure_s"] == info["exposure_s"][0])
        assert len(rf.complete_sets()) == 1


def test_saturation_stop_keeps_the_frame_and_stops(tmp_path):
    text = bench_text(rate_factor=30).replace('saturation_action = "flag"', 'saturation_action = "stop"')
    summary, _ = run_bench(tmp_path, text)
    assert summary.state == State.stopped and "saturat" in summary.message
    with RunFile(summary.output_path) as rf:
        assert rf.frame_count == 1 and rf.frame_info()["flags"][0] & FLAG_SATURATED


def test_cumulative_dose_limit_stops_before_it_is_passed(tmp_path):
    probe, _ = run_bench(tmp_path / "probe", bench_text(passes=1))
    per_frame = probe.photons_per_frame_mean
    limit = 5.5 * per_frame
    summary, _ = run_bench(tmp_path, bench_text().replace(
        "saturation_action = \"flag\"", f"saturation_action = \"flag\"\nmax_dose_photons = {limit:.6g}"))
    assert summary.state == State.stopped and "dose limit" in summary.message
    with RunFile(summary.output_path) as rf:
        photons = rf.frame_info()["photons"]
        assert photons.sum() <= limit and rf.frame_count == 5
    assert events(summary.output_path, "dose_limit")


def test_stop_request_finishes_the_frame_closes_the_shutter_and_the_file(tmp_path):
    def observer(p, bench, control):
        if p.frames_done == 3:
            control.request_stop("interrupted by SIGTERM")

    summary, _ = run_bench(tmp_path, bench_text(passes=3), observer=observer)
    assert summary.state == State.stopped and summary.frames == 3
    with RunFile(summary.output_path) as rf:
        assert rf.frame_count == 3
        end = rf.last_end()
        assert "SIGTERM" in end["message"] and "maskrun resume" in end["message"]
    import h5py

    with h5py.File(summary.output_path, "r+"):  # closed cleanly: opens for writing without repair
        pass


def _console():
    return Console(file=io.StringIO(), width=200)


def test_foreground_signals_sigterm_stops_and_sigusr1_resumes(tmp_path):
    """The real signal path of a foreground run: SIGUSR1 resumes a pause, SIGTERM stops cleanly.

    The operator thread stops the run only after a frame set has arrived on the live stream
    (a real ZeroMQ subscriber), so the test does not depend on how fast this machine is."""
    import socket

    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
    address = f"tcp://127.0.0.1:{port}"
    text = bench_text(camera_faults='{kind = "timeout", at_frame = 3, count = 3}', passes=400,
                      extra=f'[stream]\npublish_address = "{address}"\n')
    cfg = parse_config(text, str(tmp_path / "bench.toml"))
    out = tmp_path / "out"
    ctx = zmq.Context()
    sub = Subscriber(ctx, address, topics=("frameset",))
    seen_sets = []

    def operator():
        log = None
        deadline = time.monotonic() + 30
        while time.monotonic() < deadline:
            logs = list(out.glob("*.log")) if out.exists() else []
            if logs and " paused " in logs[0].read_text():
                log = logs[0]
                break
            time.sleep(0.02)
        assert log is not None
        os.kill(os.getpid(), signal.SIGUSR1)  # resume
        while not seen_sets and time.monotonic() < deadline:
            msg = sub.receive(timeout_s=0.1)
            if msg is not None:
                seen_sets.append(msg.header)
        os.kill(os.getpid(), signal.SIGTERM)  # stop

    t = threading.Thread(target=operator, daemon=True)
    t.start()
    summary = run_foreground(cfg, RunRequest(acknowledge_unattended=True, output_dir=str(out)), _console())
    t.join(5)
    sub.close()
    ctx.term()
    assert seen_sets, "no frame set was published after the resume"
    assert summary.state == State.stopped and "SIGTERM" in summary.message
    assert summary.pauses == 1 and 0 < summary.passes_complete < 400
    with RunFile(summary.output_path) as rf:
        kinds = [e["kind"] for e in rf.events()]
        assert "paused" in kinds and "resumed" in kinds and kinds[-1] == "run_end"
    assert signal.getsignal(signal.SIGTERM) is not None  # handlers restored


def _wait_until_the_shutter_opened(out, extra_s: float = 0.3) -> None:
    """Wait for a run in another process to log its shutter opening in ``out``, then a little more."""
    deadline = time.monotonic() + 30
    while time.monotonic() < deadline:
        logs = list(out.glob("*.log")) if out.exists() else []
        if logs and " shutter " in logs[0].read_text():
            break
        time.sleep(0.02)
    time.sleep(extra_s)


def _assert_stopped_cleanly_by(out, signal_name: str) -> None:
    """The run file in ``out`` was closed cleanly (opens for writing without repair) and says who stopped it."""
    import h5py

    run = next(out.glob("*.h5"))
    with h5py.File(run, "r+"):
        pass
    with RunFile(run) as rf:
        assert rf.last_end()["message"].startswith(f"run stopped: interrupted by {signal_name}")
        assert rf.frame_count >= 1


def test_sigint_to_a_foreground_run_process_stops_it_cleanly(tmp_path):
    """`maskrun run` in its own process: SIGINT -> frame finished, shutter closed, file closed, and it says so."""
    import subprocess
    import sys
    from pathlib import Path

    cfg_path = tmp_path / "b.toml"
    cfg_path.write_text(bench_text(passes=500))
    out = tmp_path / "out"
    proc = subprocess.Popen([str(Path(sys.executable).parent / "maskrun"), "run", str(cfg_path), "--acknowledge-safety",
                             "--output-dir", str(out), "--no-figure"], stdout=subprocess.PIPE, stderr=subprocess.STDOUT,
                            text=True, env={**os.environ, "COLUMNS": "250"})
    _wait_until_the_shutter_opened(out)
    proc.send_signal(signal.SIGINT)
    text, _ = proc.communicate(timeout=30)
    assert proc.returncode == 1, text
    assert "interrupted by SIGINT" in text and "Shutter closed" in text and "maskrun resume" in text
    _assert_stopped_cleanly_by(out, "SIGINT")


def test_closing_the_terminal_of_a_foreground_run_stops_it_cleanly(tmp_path):
    """`maskrun run` on a real pseudo-terminal; the terminal is closed (the kernel sends SIGHUP, as for
    a closed window or a dropped ssh session): the run stops, the shutter is closed, the file is closed."""
    import fcntl
    import subprocess
    import sys
    import termios
    from pathlib import Path

    cfg_path = tmp_path / "b.toml"
    cfg_path.write_text(bench_text(passes=500))
    out = tmp_path / "out"
    master, slave = os.openpty()

    def controlling_terminal():  # a new session whose controlling terminal is the pty
        os.setsid()
        fcntl.ioctl(0, termios.TIOCSCTTY, 0)

    proc = subprocess.Popen([str(Path(sys.executable).parent / "maskrun"), "run", str(cfg_path),
                             "--acknowledge-safety", "--output-dir", str(out), "--no-figure"],
                            stdin=slave, stdout=slave, stderr=slave, preexec_fn=controlling_terminal,
                            env={**os.environ, "COLUMNS": "200"})
    os.close(slave)
    seen = []

    def drain():  # a terminal that is read, so that the run never blocks on its output
        try:
            while chunk := os.read(master, 65536):
                seen.append(chunk)
        except OSError:
            pass

    threading.Thread(target=drain, daemon=True).start()
    _wait_until_the_shutter_opened(out)
    os.close(master)  # hang up
    assert proc.wait(timeout=30) != 0
    _assert_stopped_cleanly_by(out, "SIGHUP")


def test_a_hung_run_has_its_shutter_closed_by_the_safety_box_watchdog(tmp_path):
    """The sequencer thread hangs for 1.2 s mid-pass with the shutter open (here: a blocking observer);
    the safety box's watchdog (0.4 s) closes the shutter by itself; when the program comes back the
    run carries on, reopens the shutter before the next frame and finishes with every frame lit."""
    text = bench_text(passes=3)
    assert "watchdog_s = 5.0" in text
    text = text.replace("watchdog_s = 5.0", "watchdog_s = 0.4", 1)
    changes = []
    hung = {}

    def observer(p, bench, control):
        if not hung and p.frames_done == 3:
            bench.optics.subscribe(lambda name, value: changes.append((time.monotonic(), name, value)))
            assert bench.optics.shutter_open
            hung["from"] = time.monotonic()
            time.sleep(1.2)  # the program hangs with the beam on
            hung["to"] = time.monotonic()
            hung["shutter_after"] = bench.optics.shutter_open

    summary, watch = run_bench(tmp_path, text, observer=observer)
    assert summary.state == State.finished, summary.message
    closed_during_hang = [t for t, name, value in changes
                          if name == "shutter_open" and not value and hung["from"] < t < hung["to"]]
    assert closed_during_hang and hung["shutter_after"] is False
    assert 0.35 <= closed_during_hang[0] - hung["from"] < 1.2  # not before the watchdog period (load may delay it)
    with RunFile(summary.output_path) as rf:
        assert len(rf.complete_sets()) == 3
        assert rf.frame_info()["photons"].min() > 1e4  # every kept frame was taken with the shutter open
    assert not watch.violations
