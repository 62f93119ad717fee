"""Every display tells the same truth as the file (run_state): a service run with overrides (passes,
exposure, dark frames) that raises a warning (too few dark frames) and is paused by the interlock opened
mid-run, then resumed; `status` (text and JSON), `watch` rendered to text, `view`'s model, the stream,
the foreground summary and the report are compared with the run file read with plain h5py. Real daemon
in a subprocess, real sockets on loopback, real HDF5 files, pty firmware, a worker process."""

from __future__ import annotations

import io
import re
import subprocess
import time

import h5py
import numpy as np
import pytest
from rich.console import Console

from maskrun.daemon.service.client import ServiceClient
from maskrun.daemon.record.stream import Subscriber
from maskrun.daemon.show.view_model import LiveViewState
from maskrun.daemon.show.watch import WATCH_TOPICS, WatchModel, render
from servicehelp import MASKRUN, Daemon, service_config_text

PASSES, EXPOSURE_S, DARKS = 10, 0.003, 1  # overrides; the config says 2 passes, 0.002 s, 2 dark frames


def _plain(renderable) -> str:
    c = Console(file=io.StringIO(), width=160, color_system=None)
    c.print(renderable)
    return c.file.getvalue()


def _file_truth(path) -> dict:
    """The run as the file records it, read with plain h5py (not through maskrun's readers)."""
    with h5py.File(path, "r", swmr=True) as f:
        e = f["entry"]
        info, ei = e["frame_info"][...], e["estimate_info"][...]
        kinds = [k.decode() for k in e["events"]["kind"]]
        messages = [m.decode() for m in e["events"]["message"]]
        return {"exposure_s": float(info["exposure_s"][-1]), "frames": len(info), "darks": len(e["darks"]),
                "sets": len(set(info["set_index"].tolist())), "true_error": float(ei["true_error"][-1]),
                "reported": float(ei["error_reported"][-1]), "predicted": float(ei["error_predicted"][-1]),
                "kinds": kinds, "messages": messages, "flags": info["flags"]}


@pytest.fixture(scope="module")
def run(tmp_path_factory):
    d = Daemon(tmp_path_factory.mktemp("svc-truth"), service_config_text(passes=2, darks=2, exposure_s=0.002,
                                                                           ))
    d.wait_ready()
    import zmq

    ctx = zmq.Context()
    sub = Subscriber(ctx, d.stream, WATCH_TOPICS + ("frame",), hwm=10000)
    time.sleep(0.3)
    watch, view = WatchModel(), LiveViewState()
    seen = {"status_during": [], "safety_while_open": [], "alerts": [], "estimate_meta": None}

    def pump(until, timeout_s=60.0):
        t_end = time.monotonic() + timeout_s
        while time.monotonic() < t_end:
            msg = sub.receive(timeout_s=0.05)
            if msg is not None:
                watch.ingest(msg)
                view.ingest(msg)
                if msg.header.topic == "alert":
                    seen["alerts"].append(dict(msg.header.meta))
                if msg.header.topic == "estimate":
                    seen["estimate_meta"] = dict(msg.header.meta)
            if until():
                return
        raise AssertionError("timed out")

    with ServiceClient(d.control, timeout_s=10) as c:
        c.acknowledge("test operator", "pytest")
        r = c.start(passes=PASSES, exposure_s=EXPOSURE_S, dark_frames=DARKS, name="truth")
        # mid-run: status and watch show the run's exposure, not the next run's
        pump(lambda: (watch.status.get("run") or {}).get("frames_done", 0) >= 6 * 2)
        st = c.status()
        seen["status_during"].append(st)
        seen["watch_during"] = _plain(render(watch))
        # the interlock opens mid-run: never shown closed while it is open
        c.simulate("open_interlock")
        c.wait_state("paused", timeout_s=30)
        seen["status_text_during"] = subprocess.run([MASKRUN, "status", "--address", d.control], capture_output=True,
                                                    text=True, timeout=30).stdout
        t_end = time.monotonic() + 2.5
        while time.monotonic() < t_end:
            seen["safety_while_open"].append(c.status()["safety"])
            time.sleep(0.1)
        seen["status_text_paused"] = subprocess.run([MASKRUN, "status", "--address", d.control],
                                                    capture_output=True, text=True, timeout=30).stdout
        c.simulate("close_interlock")
        t_end = time.monotonic() + 10
        while c.status()["safety"]["interlock_closed"] is not True and time.monotonic() < t_end:
            time.sleep(0.1)
        seen["safety_closed_again"] = c.status()["safety"]
        seen["resume_reply"] = subprocess.run([MASKRUN, "resume", "--address", d.control], capture_output=True,
                                              text=True, timeout=30).stdout
        st = c.wait_idle(timeout_s=120)
        pump(lambda: watch.status.get("state") == "idle" and bool(watch.status.get("last_run")), timeout_s=20)
        seen["status_after"] = c.status()
        seen["watch_after"] = _plain(render(watch))
        seen["status_text_after"] = subprocess.run([MASKRUN, "status", "--address", d.control], capture_output=True,
                                                   text=True, timeout=30).stdout
    path = d.folder / r["output_path"]
    yield {"path": path, "seen": seen, "watch": watch, "view": view, "daemon": d}
    sub.close()
    ctx.term()
    assert d.stop() == 0, d.output()


def test_status_and_watch_show_the_exposure_the_run_uses(run):
    st = run["seen"]["status_during"][0]
    assert st["exposure_s"] == EXPOSURE_S and st["run"]["exposure_s"] == EXPOSURE_S
    assert st["run"]["passes"] == PASSES and st["run"]["dark_frames"] == DARKS
    assert f"exposure {EXPOSURE_S:g} s (this run)" in run["seen"]["watch_during"]
    assert f"exposure {EXPOSURE_S:g} s (this run)" in run["seen"]["status_text_during"]
    assert _file_truth(run["path"])["exposure_s"] == EXPOSURE_S


def test_the_dark_frame_warning_reaches_the_stream_watch_and_view(run):
    truth = _file_truth(run["path"])
    assert "dark_frames_few" in truth["kinds"]
    warning = truth["messages"][truth["kinds"].index("dark_frames_few")][:200]
    # the file keeps the first 240 bytes of a message (store.EVENT_MESSAGE_BYTES)
    assert any(a["kind"] == "dark_frames_few" and a["message"].startswith(warning) for a in run["seen"]["alerts"])
    assert any(k == "dark_frames_few" and m.startswith(warning) for _, k, m in run["watch"].run_warnings)
    assert "dark_frames_few" in run["seen"]["watch_during"]
    assert any(k == "dark_frames_few" and m.startswith(warning) for _, k, m in run["view"].run_warnings)
    assert "dark_frames_few" in run["view"].alert_text()
    assert any(w["kind"] == "dark_frames_few" for w in run["seen"]["status_after"]["last_run"]["warnings"])


def test_the_interlock_is_never_shown_closed_while_it_is_open(run):
    readings = run["seen"]["safety_while_open"]
    assert readings and all(s["interlock_closed"] is not True for s in readings)
    # read from the box while paused (not inferred): OPEN with a fresh age, the source says so
    assert any(s["interlock_closed"] is False and s["interlock_age_s"] < 2.0 for s in readings)
    assert all(s["shutter_open"] is not True for s in readings)
    assert "read from the safety box" in readings[-1]["source"]
    assert "interlock: OPEN (read" in run["seen"]["status_text_paused"]
    again = run["seen"]["safety_closed_again"]
    assert again["interlock_closed"] is True and again["interlock_age_s"] < 2.0


def test_alerts_are_time_stamped_and_cleared_when_they_no_longer_hold(run):
    after = run["seen"]["status_after"]
    assert after["state"] == "idle" and after["recent_alerts"] == []  # the run's alerts moved to its outcome
    assert "alert" not in run["seen"]["status_text_after"]
    assert all(isinstance(w["t_s"], float) for w in after["last_run"]["warnings"])
    assert "Resumed" in run["seen"]["resume_reply"] and "{" not in run["seen"]["resume_reply"]  # a sentence


def test_after_the_run_every_display_shows_the_files_figures(run):
    truth = _file_truth(run["path"])
    last = run["seen"]["status_after"]["last_run"]
    assert truth["sets"] == PASSES and truth["darks"] == DARKS
    assert last["exposure_s"] == truth["exposure_s"] and last["passes"] == PASSES
    assert last["outcome"] == f"Finished: {PASSES} of {PASSES} frame sets complete."
    assert last["precision"]["reported"] == pytest.approx(truth["reported"])
    assert last["true_error"] == pytest.approx(truth["true_error"])
    for text in (run["seen"]["watch_after"], run["seen"]["status_text_after"]):
        assert f"{truth['true_error']:.2%}" in text  # the true error where a truth exists (item 4)
        assert f"{truth['reported']:.2%}" in text and f"{truth['predicted']:.2%}" in text
        assert "Finished:" in text and "stopped stopped" not in text
    # the stream's estimate message carries the same precision the file stores
    meta = run["seen"]["estimate_meta"]
    assert meta["precision"]["reported"] == pytest.approx(truth["reported"])
    # the view's model: the same headline
    assert f"{truth['reported']:.2%}" in run["view"].status_text()


def test_the_report_shows_overrides_every_acknowledgement_and_the_precision(run):
    from maskrun.daemon.show.report import write_report

    truth = _file_truth(run["path"])
    files = write_report(run["path"])
    page = files.html.read_text()
    assert "incident photons in total" in page and "photons detected" not in page
    assert re.search(rf"<td>exposure_s</td><td>{EXPOSURE_S}</td><td>0.002</td>", page)
    assert re.search(rf"<td>passes</td><td>{PASSES}</td><td>2</td>", page)
    assert re.search(rf"<td>dark_frames</td><td>{DARKS}</td><td>2</td>", page)
    assert f"{truth['reported']:.2%}" in page and f"{truth['true_error']:.2%}" in page


def test_stream_flags_are_the_files_bitmask(run):
    from maskrun.daemon.record.store import flag_names

    truth = _file_truth(run["path"])
    meta = run["view"].frame_meta
    assert isinstance(meta["flags"], int) and meta["flag_names"] == flag_names(meta["flags"])
    assert int(truth["flags"][-1]) == meta["flags"]
    assert int(np.bitwise_or.reduce(truth["flags"])) & 1024  # the interlock pause is flagged in the file



def test_a_resumed_run_tells_every_acknowledgement_and_its_outcome_alike(tmp_path):
    """Foreground: stopped after 2 of 4 sets with overrides, resumed; the summary, the report and the file's
    account agree; the report lists both safety acknowledgements and explains after_resume as a resume."""
    from benchcfg import small_bench_text
    from maskrun.daemon.acquire.foreground import RunRequest, print_summary, resume_foreground
    from maskrun.daemon.show.report import FLAG_EXPLANATIONS, write_report
    from maskrun.daemon.record.run_state import state_from_file
    from maskrun.daemon.acquire.sequencer import State
    from test_faults import run_bench

    text = small_bench_text(masks=4, passes=2, darks=1, recon_iterations=20)

    def observer(p, bench, control):
        if p.frames_done == 2 * 4:
            control.request_stop("stopped by the test after two frame sets")

    summary, _ = run_bench(tmp_path, text.replace("passes = 2", "passes = 4"), observer=observer)
    assert summary.state == State.stopped
    mid = state_from_file(summary.output_path)
    assert mid.outcome.startswith("Stopped by the test after two frame sets after 2 of 4 frame sets")
    console = Console(file=io.StringIO(), width=140)
    resumed = resume_foreground(summary.output_path, RunRequest(acknowledge_unattended=True, figure=False), console)
    assert resumed.state == State.finished, resumed.message
    out = console.file.getvalue()
    assert "computing the last estimates" in out  # a line while the last estimate is computed (item 8)
    st = state_from_file(summary.output_path)
    assert st.resumed and st.outcome == "Finished: 4 of 4 frame sets complete." and len(st.acknowledgements) == 2
    with h5py.File(summary.output_path, "r", swmr=True) as f:
        kinds = [k.decode() for k in f["entry/events"]["kind"]]
        true_last = float(f["entry/estimate_info"]["true_error"][-1])
    assert kinds.count("safety_ack") == 2
    c = Console(file=io.StringIO(), width=160)
    print_summary(resumed, c)
    table = c.file.getvalue()
    assert "Finished: 4 of 4 frame sets complete." in table and f"{true_last:.2%}" in table
    # the session's own counts are named as such beside the file's (4 sets in the file, 2 of them now)
    assert "4 in the file (2 in this session, 2 before the resume)" in table
    assert f"{resumed.frames} in this session" in table
    page = write_report(summary.output_path).html.read_text()
    assert "All 2 acknowledgement(s)" in page and page.count("laser-safety") >= 2
    assert "resumed" in FLAG_EXPLANATIONS["after_resume"] and "pause" not in FLAG_EXPLANATIONS["after_resume"]


def test_client_replies_and_outcomes_read_as_sentences():
    from maskrun.daemon.service.client import reply_sentence
    from maskrun.daemon.record.run_state import mask_label, outcome_sentence, pass_label

    assert reply_sentence("stop", {"stopping": "run", "output_path": "runs/a.h5"}).startswith("Stopping the run")
    assert reply_sentence("pause", {"pausing": True, "note": "x"}).startswith("Pausing:")
    assert "{" not in reply_sentence("shutdown", {"shutting_down": True, "was": "idle"})
    text = outcome_sentence("stopped", "run stopped: stopped by a control request; 3 complete frame sets kept; "
                            "continue with: maskrun resume a.h5", 3, 12)
    assert text == "Stopped by a control request after 3 of 12 frame sets; continue with 'maskrun resume FILE'."
    assert outcome_sentence("fault", "run fault: camera unplugged; 0 complete frame sets kept", 0, 4).startswith(
        "Fault (camera unplugged) after 0 of 4")
    # one numbering convention: counted from 1 where people read it
    assert pass_label(3, 12) == "pass 4/12" and mask_label(7, 8) == "mask 8/8" and pass_label(-1) == ""
