"""The service driven through its control socket: the real daemon in a subprocess, real sockets on loopback,
real HDF5 run files, pty firmware and a reconstruction worker process."""

from __future__ import annotations

import subprocess
import time

import numpy as np
import pytest

from maskrun.daemon.service.client import RequestRefused, ServiceClient
from maskrun.daemon.record.runfile import RunFile
from servicehelp import MASKRUN, Daemon, service_config_text

K = 6  # masks in the small bench


@pytest.fixture(scope="module")
def daemon(tmp_path_factory):
    d = Daemon(tmp_path_factory.mktemp("svc-control"), service_config_text(passes=2, exposure_s=0.002)).wait_ready()
    yield d
    code = d.stop()
    assert code == 0, d.output()


@pytest.fixture
def client(daemon):
    with ServiceClient(daemon.control, timeout_s=10) as c:
        yield c


def refused(fn, *args, **kw) -> RequestRefused:
    with pytest.raises(RequestRefused) as info:
        fn(*args, **kw)
    return info.value


def test_starts_idle_with_shutter_closed_and_refuses_start_before_acknowledgement(client):
    st = client.status()
    assert st["state"] == "idle"
    assert st["safety"]["shutter_open"] is False and st["safety"]["interlock_closed"] is True
    if not st["safety"]["acknowledged"]:
        err = refused(client.start)
        assert "not been acknowledged" in err.error and err.state == "idle"
        err = refused(client.align_start)
        assert "not been acknowledged" in err.error
    notice = client.notice()
    assert any("Interlock" in line for line in notice["notice"])


def test_requests_in_the_wrong_state_say_what_and_why(client):
    for fn, words in ((client.pause, "nothing to pause"), (client.resume, "nothing to resume"),
                      (client.stop, "nothing to stop"), (client.align_stop, "align mode is not on")):
        err = refused(fn)
        assert words in err.error and err.state == "idle"


def test_full_run_driven_by_the_client_with_pause_and_resume(client, daemon):
    client.acknowledge("test operator", "pytest")
    r = client.start(passes=6, name="clientrun")
    assert r["frames_total"] == 6 * K
    # a second start while the first runs is refused, with the state
    err = refused(client.start)
    assert "cannot start a run while the service is" in err.error and err.state != "idle"
    err = refused(client.set_exposure, 0.01)
    assert "fixed for a run" in err.error
    client.pause("checking the beam")
    st = client.wait_state("paused", timeout_s=20)
    assert st["run"]["frames_done"] < 6 * K
    err = refused(client.start)
    assert err.state == "paused"
    client.resume()
    st = client.wait_idle(timeout_s=60)
    last = st["last_run"]
    assert last["state"] == "finished", last
    assert last["frames"] == 6 * K and last["passes_complete"] == 6
    path = daemon.folder / last["output_path"]
    with RunFile(path) as rf:
        assert rf.frame_count == 6 * K
        info = rf.frame_info()
        assert info["mask_index"].tolist() == list(range(K)) * 6
        assert np.all(np.diff(info["frame_id"]) > 0)
        # every frame was exposed with the shutter open, also those after the pause (>= 1e4 photons each)
        assert info["photons"].min() > 1e4
        assert rf.safety_acknowledgement["who"] == "test operator"
        kinds = [e["kind"] for e in rf.events()]
        assert "paused" in kinds and "resumed" in kinds
        assert rf.estimate_count >= 1
        assert rf.estimate_info()["true_error"][-1] < 0.05
    assert client.status()["safety"]["shutter_open"] is False


def _start_and_take_frames(client, name: str, passes: int, frames: int = 3) -> None:
    """Acknowledge, start a run and wait until it has taken ``frames`` frames."""
    client.acknowledge("test operator")
    client.start(passes=passes, name=name)
    client.wait_state("acquiring", timeout_s=20)
    deadline = time.monotonic() + 20
    while client.status()["run"]["frames_done"] < frames and time.monotonic() < deadline:
        time.sleep(0.05)


def test_stop_keeps_what_was_taken(client, daemon):
    _start_and_take_frames(client, "stopped", passes=200)
    client.stop("enough")
    st = client.wait_idle(timeout_s=30)
    last = st["last_run"]
    assert last["state"] == "stopped" and "enough" in last["message"]
    with RunFile(daemon.folder / last["output_path"]) as rf:
        assert 0 < rf.frame_count < 200 * K
        assert rf.frame_count == last["frames"]


def test_interlock_open_refuses_start_and_align_with_the_reason(client):
    client.acknowledge("test operator")
    client.simulate("open_interlock")
    try:
        for fn in (client.start, client.align_start):
            err = refused(fn)
            assert "interlock reads OPEN" in err.error and err.state == "idle"
        assert client.status()["safety"]["interlock_closed"] is False
    finally:
        client.simulate("close_interlock")
    assert client.status()["safety"]["interlock_closed"] is True


def test_interlock_opening_during_a_run_pauses_it_and_resume_waits_for_the_interlock(client, daemon):
    client.acknowledge("test operator")
    r = client.start(passes=200, name="interlock")
    client.wait_state("acquiring", timeout_s=20)
    client.simulate("open_interlock")
    try:
        st = client.wait_state("paused", timeout_s=20)
        assert st["safety"]["shutter_open"] is False
        assert any("interlock" in a["message"].lower() for a in st["recent_alerts"])
        err = refused(client.resume)
        assert "interlock reads OPEN" in err.error and err.state == "paused"
    finally:
        client.simulate("close_interlock")
    before = client.status()["run"]["frames_done"]
    client.resume()
    client.wait_state("acquiring", timeout_s=20)
    deadline = time.monotonic() + 20  # frames taken after the resume (a loaded machine may need a while)
    while client.status()["run"]["frames_done"] <= before and time.monotonic() < deadline:
        time.sleep(0.05)
    client.stop("done")
    last = client.wait_idle(timeout_s=30)["last_run"]
    assert last["state"] == "stopped"
    with RunFile(daemon.folder / r["output_path"]) as rf:
        photons = rf.frame_info()["photons"]
        assert photons.size > 0, "no frame was taken after the resume"
        assert photons.min() > 1e4  # no frame was taken in the dark


def test_a_dead_reconstruction_worker_is_replaced_before_the_next_run(client, daemon):
    import os
    import signal

    pid = client.status()["reconstruction"]["worker_pid"]
    os.kill(pid, signal.SIGKILL)  # the worker process of the daemon this test module started
    deadline = time.monotonic() + 10
    while client.status()["reconstruction"]["worker_alive"] and time.monotonic() < deadline:
        time.sleep(0.05)
    client.acknowledge("test operator")
    client.start(passes=2, name="newworker")
    last = client.wait_idle(timeout_s=60)["last_run"]
    assert last["state"] == "finished" and last["estimates"] >= 1
    rec = client.status()["reconstruction"]
    assert rec["worker_alive"] and rec["worker_pid"] != pid


def test_dark_frames_and_exposure_while_idle(client):
    client.set_exposure(0.004)
    darks = client.take_darks(4)
    assert darks["count"] == 4 and darks["exposure_s"] == 0.004
    # shutter closed: only the camera offset (100 DN in the bench config) plus dark current
    assert abs(darks["mean_dn"] - 100.0) < 3.0
    assert client.status()["exposure_s"] == 0.004
    # an exposure the safety box's watchdog (5 s in the bench config) would cut short is refused
    err = refused(client.set_exposure, 4.0)
    assert "watchdog_s" in err.error and "make watchdog_s longer" in err.error
    client.acknowledge("test operator")
    err = refused(client.start, exposure_s=4.0)
    assert "watchdog_s" in err.error and err.state == "idle"
    assert client.status()["exposure_s"] == 0.004
    client.set_exposure(0.002)


def test_output_path_rules(client, daemon):
    client.acknowledge("test operator")
    existing = daemon.folder / "exists.h5"
    existing.write_bytes(b"")
    err = refused(client.start, output_path=str(existing))
    assert "already exists" in err.error
    err = refused(client.start, output_path=str(daemon.folder / "run.txt"))
    assert ".h5" in err.error


def test_client_verbs_on_the_command_line(daemon):
    def maskrun(*args):
        return subprocess.run([MASKRUN, *args, "--address", daemon.control],
                              capture_output=True, text=True, timeout=60)

    out = maskrun("status")
    assert out.returncode == 0 and "state: idle" in out.stdout
    out = maskrun("pause")
    assert out.returncode == 2 and "nothing to pause" in out.stderr
    out = maskrun("resume")  # no run file: the daemon's paused run
    assert out.returncode == 2 and "nothing to resume" in out.stderr
    out = maskrun("start", "--passes", "1", "--wait", "--name", "cli")
    assert out.returncode == 0, out.stderr
    assert "Run finished" in out.stdout


def test_start_is_refused_up_front_when_the_disk_cannot_hold_the_run(tmp_path):
    # a reserve larger than any disk: the run cannot fit, so the daemon refuses before writing anything
    text = service_config_text(passes=2, exposure_s=0.002).replace("[run]\n", "[run]\nmin_free_disk_mb = 1.0e12\n", 1)
    d = Daemon(tmp_path / "svc-disk", text).wait_ready()
    try:
        with ServiceClient(d.control, timeout_s=10) as c:
            c.acknowledge("test operator")
            err = refused(c.start, output_dir=str(tmp_path / "runs"))
            assert "free" in err.error and err.state == "idle"
            assert c.status()["state"] == "idle"
        assert not (tmp_path / "runs").exists() or not any((tmp_path / "runs").iterdir())
    finally:
        assert d.stop() == 0, d.output()


def test_sighup_shuts_the_service_down_safely_mid_run(tmp_path):
    """A hang-up (the terminal that started `maskrun serve` closed) stops the run in progress, closes
    the shutter and the file, and ends the service with exit code 0."""
    import signal

    import h5py

    d = Daemon(tmp_path / "svc-hup", service_config_text(passes=500, exposure_s=0.002)).wait_ready()
    try:
        with ServiceClient(d.control, timeout_s=10) as c:
            _start_and_take_frames(c, "hup", passes=500)
        d.proc.send_signal(signal.SIGHUP)
        assert d.proc.wait(timeout=30) == 0, d.output()
        assert "shutter closed" in d.output()
    finally:
        d.stop()
    (run,) = list((d.folder / "runs").glob("hup-*.h5"))
    with h5py.File(run, "r+"):  # closed cleanly: no repair needed
        pass
    with RunFile(run) as rf:
        assert "stopped" in rf.last_end()["message"] and rf.frame_count >= 3
