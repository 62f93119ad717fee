"""Start the simulated devices' firmware as their own processes (``[simulation] firmware_processes``).

Each firmware runs ``python -m maskrun.simulators.firmware_process KIND`` on its own
pseudo-terminal; the bench's optics keep the shutter, interlock, shown mask and trigger line in
a shared state file (``simulators.shared_state``) that the processes read and change. The
group is stopped with ``stop()`` (SIGTERM, then SIGKILL after 5 s) when the bench closes; if
maskrun itself is killed, the processes stay up (the box has closed its shutter: link loss) and
exit by themselves a minute after nobody has their port open.
"""

from __future__ import annotations

import json
import os
import select
import shutil
import subprocess
import sys
import tempfile
import time

from maskrun.daemon.config import ConfigError


class FirmwareProcesses:
    def __init__(self, folder: str, state, procs: dict[str, subprocess.Popen], ports: dict[str, str]):
        self.folder = folder
        self.state = state
        self.procs = procs
        self.ports = ports
        self.name = "firmware processes"
        self.port = ""

    def info(self) -> list[dict]:
        return [{"name": n, "port": self.ports.get(n, ""), "pid": p.pid} for n, p in self.procs.items()]

    def stop(self) -> None:
        for p in self.procs.values():
            if p.poll() is None:
                p.terminate()
        for p in self.procs.values():
            try:
                p.wait(5)
            except subprocess.TimeoutExpired:
                p.kill()
                p.wait(5)
            if p.stdout is not None:
                p.stdout.close()
        self.procs.clear()
        self.state.close()
        shutil.rmtree(self.folder, ignore_errors=True)


def _ready_line(proc: subprocess.Popen, timeout_s: float) -> dict:
    deadline = time.monotonic() + timeout_s
    buf = b""
    fd = proc.stdout.fileno()
    while b"\n" not in buf:
        left = deadline - time.monotonic()
        if left <= 0 or proc.poll() is not None:
            raise RuntimeError(f"firmware process {proc.pid} did not start (exit code {proc.poll()})")
        if select.select([fd], [], [], left)[0]:
            chunk = os.read(fd, 4096)
            if not chunk:
                continue
            buf += chunk
    return json.loads(buf.split(b"\n", 1)[0])


def start_firmware_processes(firmware_cfg: dict, optics, mask_count: int, timeout_s: float = 20.0) -> FirmwareProcesses:
    from maskrun.simulators.shared_state import SharedBenchState

    folder = tempfile.mkdtemp(prefix="maskrun-bench-")
    state_path = os.path.join(folder, "bench-state")
    state = SharedBenchState(state_path, create=True)
    optics.attach_shared(state)
    procs: dict[str, subprocess.Popen] = {}
    ports: dict[str, str] = {}
    group = FirmwareProcesses(folder, state, procs, ports)
    try:
        for name, fw in firmware_cfg.items():
            cmd = [sys.executable, "-P", "-m", "maskrun.simulators.firmware_process", name, "--state", state_path,
                   "--mask-count", str(mask_count), "--settle-s", repr(float(fw.settle_s)),
                   "--faults", json.dumps(list(fw.faults)), "--name", name, "--port-dir", folder]
            procs[name] = subprocess.Popen(cmd, stdout=subprocess.PIPE, stdin=subprocess.DEVNULL,
                                           start_new_session=True)  # its own session: Ctrl-C on maskrun is not its
        for name, proc in procs.items():
            ports[name] = _ready_line(proc, timeout_s)["port"]
    except Exception as exc:
        group.stop()
        raise ConfigError("[simulation]", [("simulation.firmware_processes", f"could not start the firmware "
                                            f"processes: {exc}")]) from None
    return group
