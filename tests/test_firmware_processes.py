"""The simulated safety box and modulator controller as their own processes
(``[simulation] firmware_processes = true``): killing or freezing maskrun is seen by the box.

- SIGKILL of `maskrun serve` with the shutter open: the box closes it at once (the host link
  dropped: the pseudo-terminal hung up);
- SIGSTOP: the box's watchdog closes it within the watchdog period.

The shutter state is read from the box's own process, over its own port, after maskrun is gone or
frozen. Real parts: `maskrun serve` and the firmware processes, real pseudo-terminals, signals.
"""

from __future__ import annotations

import os
import shutil
import signal
import time
from pathlib import Path

import pytest

from maskrun.daemon.service.client import ServiceClient
from servicehelp import Daemon, service_config_text

WATCHDOG_S = 1.0


def _config(watchdog_s: float) -> str:
    text = service_config_text(recon=False, passes=100000, masks=4)
    text = text.replace("\n[simulation]\n", "\n[simulation]\nfirmware_processes = true\n", 1)
    assert "watchdog_s = 5.0" in text
    text = text.replace("watchdog_s = 5.0", f"watchdog_s = {watchdog_s}", 1)
    assert "grab_timeout_s = 2.0" in text
    return text.replace("grab_timeout_s = 2.0", "grab_timeout_s = 0.5", 1)


def _ask(port: str, command: str, timeout_s: float = 2.0) -> str:
    """One command over the box's pseudo-terminal, opened by hand (no lock: the frozen daemon holds
    the driver's exclusive lock on it, but not the terminal itself)."""
    import select
    import tty

    fd = os.open(port, os.O_RDWR | os.O_NOCTTY)
    try:
        tty.setraw(fd)
        os.write(fd, command.encode() + b"\n")
        buf = b""
        deadline = time.monotonic() + timeout_s
        while b"\n" not in buf:
            left = deadline - time.monotonic()
            assert left > 0, f"no reply to {command!r} from the box (got {buf!r})"
            if select.select([fd], [], [], left)[0]:
                buf += os.read(fd, 4096)
        return buf.split(b"\n", 1)[0].decode().strip()
    finally:
        os.close(fd)


def _trips(reply: str) -> dict:
    w = reply.split()  # TRIPS INTERLOCK a WATCHDOG b LINK c LAST reason t
    return {"interlock": int(w[2]), "watchdog": int(w[4]), "link": int(w[6]), "last": w[8], "t_s": float(w[9])}


@pytest.fixture
def running_daemon(tmp_path, request):
    d = Daemon(tmp_path / "d", _config(request.param)).wait_ready()
    import json

    fw = {f["name"]: f for f in json.loads(d.ready_file.read_text())["firmware"]}
    assert set(fw) == {"modulator", "safety"} and all(f["pid"] for f in fw.values())
    assert all(f["pid"] != d.proc.pid for f in fw.values())  # their own processes
    with ServiceClient(d.control, timeout_s=10) as c:
        c.acknowledge("A. Operator")
        c.start(name="long")
        c.wait_state("acquiring", timeout_s=30)
    time.sleep(0.3)  # mid-run: the shutter is open between frames of a pass
    try:
        yield d, fw
    finally:
        if d.proc.poll() is None:
            d.proc.send_signal(signal.SIGKILL)
            d.proc.wait(30)
        for f in fw.values():  # the firmware processes outlive the killed daemon: end them by their pid
            try:
                os.kill(f["pid"], signal.SIGTERM)
            except ProcessLookupError:
                pass
        time.sleep(0.3)
        shutil.rmtree(Path(fw["safety"]["port"]).parent.parent, ignore_errors=True)


def _shutter_open_in_shared_state(fw) -> bool:
    from maskrun.simulators.shared_state import SharedBenchState

    state = SharedBenchState(Path(fw["safety"]["port"]).parent.parent / "bench-state")
    try:
        return state.shutter_open
    finally:
        state.close()


@pytest.mark.parametrize("running_daemon", [0.0], indirect=True)
def test_sigkill_of_maskrun_with_the_shutter_open_makes_the_box_close_it_at_once(running_daemon):
    d, fw = running_daemon
    deadline = time.monotonic() + 10
    while not _shutter_open_in_shared_state(fw):  # the light path: shutter open during the pass
        assert time.monotonic() < deadline, "the shutter never opened"
        time.sleep(0.001)
    t_kill = time.time()
    d.proc.send_signal(signal.SIGKILL)
    d.proc.wait(30)
    time.sleep(0.2)
    assert _ask(fw["safety"]["port"], "SHUTTER?") == "SHUTTER CLOSED"  # asked of the box's own process
    trips = _trips(_ask(fw["safety"]["port"], "TRIPS?"))
    assert trips["link"] == 1 and trips["last"] == "link", trips
    delay = trips["t_s"] - t_kill
    print(f"\nbox closed the shutter {delay * 1000:.0f} ms after SIGKILL of maskrun (link loss)")
    assert -0.01 < delay < 0.2
    assert os.kill(fw["safety"]["pid"], 0) is None  # the box is still running


@pytest.mark.parametrize("running_daemon", [WATCHDOG_S], indirect=True)
def test_sigstop_of_maskrun_makes_the_box_close_the_shutter_within_the_watchdog_period(running_daemon):
    d, fw = running_daemon
    deadline = time.monotonic() + 10
    while not _shutter_open_in_shared_state(fw):
        assert time.monotonic() < deadline, "the shutter never opened"
        time.sleep(0.001)
    t_stop = time.time()
    d.proc.send_signal(signal.SIGSTOP)
    try:
        time.sleep(WATCHDOG_S + 0.5)
        assert not _shutter_open_in_shared_state(fw)
        trips = _trips(_ask(fw["safety"]["port"], "TRIPS?"))  # the frozen host reads nothing: the reply is ours
        assert trips["watchdog"] == 1 and trips["last"] == "watchdog", trips
        assert _ask(fw["safety"]["port"], "SHUTTER?") == "SHUTTER CLOSED"
        delay = trips["t_s"] - t_stop
        print(f"\nbox closed the shutter {delay:.2f} s after SIGSTOP of maskrun (watchdog {WATCHDOG_S:g} s)")
        assert 0 < delay <= WATCHDOG_S + 0.05
    finally:
        d.proc.send_signal(signal.SIGKILL)
        d.proc.send_signal(signal.SIGCONT)


@pytest.mark.parametrize("running_daemon", [0.0], indirect=True)
def test_the_interlock_opened_mid_run_is_seen_by_the_box_process_which_closes_the_shutter(running_daemon):
    """maskrun's 'simulate open_interlock' moves the doors; the box, in its own process, closes its shutter
    (the hardware interlock) and the run pauses; afterwards the box's own count says so."""
    d, fw = running_daemon
    with ServiceClient(d.control, timeout_s=10) as c:
        deadline = time.monotonic() + 10
        while not _shutter_open_in_shared_state(fw):
            assert time.monotonic() < deadline, "the shutter never opened"
            time.sleep(0.001)
        c.simulate("open_interlock")
        t_open = time.monotonic()
        while _shutter_open_in_shared_state(fw):
            assert time.monotonic() - t_open < 0.5, "the box did not close the shutter"
            time.sleep(0.0005)
        closed_after_s = time.monotonic() - t_open
        c.wait_state("paused", timeout_s=20)
        c.stop("done")
        c.wait_idle(timeout_s=30)
    d.proc.send_signal(signal.SIGKILL)  # so the test can ask the box itself (no driver on the port)
    d.proc.wait(30)
    trips = _trips(_ask(fw["safety"]["port"], "TRIPS?"))
    print(f"\nbox closed the shutter {closed_after_s * 1000:.1f} ms after the interlock opened; {trips}")
    assert closed_after_s < 0.05  # the box's own reaction (its watcher polls every ms), or maskrun's, both fast
    assert _ask(fw["safety"]["port"], "SHUTTER?") == "SHUTTER CLOSED"
    assert _ask(fw["safety"]["port"], "INTERLOCK?") == "INTERLOCK OPEN"
