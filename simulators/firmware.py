"""Firmware simulators speaking a line protocol on real pseudo-terminals.

``start_firmware("modulator" | "safety", optics)`` opens a pseudo-terminal
pair, puts it in raw mode, and serves the device's protocol from a daemon
thread on the controller side. Drivers open the terminal side through a
STABLE path (a symlink in a private temporary folder), so an unplug/replug
(which makes a new pseudo-terminal) re-points the symlink and a driver
reconnects by reopening the same path, as with a udev name for a USB adapter.

Protocol (our own): plain ASCII lines ending in ``\\n`` (a trailing ``\\r`` is
ignored). Every command gets exactly one reply line; errors are
``ERR <reason>``.

Modulator controller (masks are stored in the controller; the host selects them):

    ID?             -> ID sim-modulator 1.0
    COUNT <K>       -> OK COUNT <K>        (ERR if K < 1 or more than the stored masks)
    COUNT?          -> COUNT <K>
    SHOW <k>        -> OK SHOW <k>         (sets optics.shown_mask = k; ERR if out of range)
    READY?          -> READY 1 | READY 0   (1 once settle_s has passed since the last SHOW)
    TRIGOUT <0|1>   -> OK TRIGOUT <0|1>    (pulse the trigger line when a mask has settled; on at start)

Safety box (interlock chain and beam shutter):

    ID?             -> ID sim-safety 1.0
    INTERLOCK?      -> INTERLOCK CLOSED | INTERLOCK OPEN
    SHUTTER?        -> SHUTTER OPEN | SHUTTER CLOSED
    SHUTTER OPEN    -> OK SHUTTER OPEN     (ERR interlock open, if it is; takes settle_s)
    SHUTTER CLOSE   -> OK SHUTTER CLOSED   (always accepted)
    WATCHDOG <s>    -> OK WATCHDOG <s>     (0 = off; ERR if negative or not a number)
    WATCHDOG?       -> WATCHDOG <s> TRIPS <n>
    TRIPS?          -> TRIPS INTERLOCK <a> WATCHDOG <b> LINK <c> LAST <reason> <epoch s>
                       (times the box closed the shutter by itself, and the last one: reason
                       interlock | watchdog | link | none, wall-clock time of that close)

The safety box is fail-safe: if the interlock opens while the shutter is
open it closes the shutter by itself at once (hardware interlock), and when
its host link is lost (unplug, stop) it closes the shutter too. With the
watchdog armed, a shutter left open while the host sends no command for
``s`` seconds (a hung or frozen host program) is closed by the box itself;
every command counts as a sign of life.

Link loss: in-process (the default) the simulator keeps its own handle on the terminal
side, so only an unplug is a link loss. Run as its own process (``firmware_process``,
``detect_hangup=True``) it lets go of the terminal side once the host has sent its first
command; when the host's last handle closes (the host program exited or was killed) the
pseudo-terminal hangs up and the box closes the shutter at once, as a box does when its
host link drops. It serves the host again when a program reopens the port.

Faults (``FirmwareFault`` or plain dicts), counted over command lines received
since the start (1 = first command):

    no_reply  at_command n, count c: commands n .. n+c-1 get no reply (they still act)
    garbled   at_command n, count c: their replies arrive with every byte's high bit set
              (like a baud-rate mismatch) but still end in \\n
    unplug    at_command n, duration_s d: the device vanishes before acting on command n
              (pseudo-terminal closed, symlink removed), then comes back after d seconds
"""

from __future__ import annotations

import errno
import fcntl
import logging
import os
import select
import shutil
import tempfile
import threading
import time
import tty
from typing import Iterable, Literal

from pydantic import BaseModel, ConfigDict, Field

from .firmware_protocols import _PROTOCOLS

__all__ = ["FirmwareFault", "FirmwareHandle", "start_firmware", "FIRMWARE_KINDS"]

log = logging.getLogger(__name__)

FIRMWARE_KINDS = ("modulator", "safety")


class FirmwareFault(BaseModel):
    """One injected firmware fault (see the module docstring)."""

    model_config = ConfigDict(extra="forbid")

    kind: Literal["no_reply", "garbled", "unplug"]
    at_command: int = Field(ge=1, description="1-based index of the command line that triggers the fault")
    count: int = Field(default=1, ge=1, description="how many consecutive commands are affected (no_reply, garbled)")
    duration_s: float = Field(default=1.0, ge=0.0, description="how long the device stays unplugged (unplug)")




def _garble(reply: bytes) -> bytes:
    return bytes(b | 0x80 for b in reply)


class FirmwareHandle:
    """A running firmware simulator.

    port: stable path (symlink) to open with a serial driver.
    commands_seen: command lines received so far.
    unplug(): the device vanishes (pty closed, symlink removed); replug() brings it back
    on a new pty behind the same path. stop(): end the thread and remove the folder.
    """

    def __init__(self, kind: str, optics, faults: Iterable = (), settle_s: float = 0.0, name: str | None = None,
                 detect_hangup: bool = False, port_dir: str | None = None):
        if kind not in _PROTOCOLS:
            raise ValueError(f"unknown firmware kind {kind!r}; choose one of {', '.join(FIRMWARE_KINDS)}")
        self.kind = kind
        self.name = name or kind
        self.faults = [
            f if isinstance(f, FirmwareFault)
            else FirmwareFault.model_validate(f.model_dump() if isinstance(f, BaseModel) else dict(f))
            for f in faults
        ]
        self._protocol = _PROTOCOLS[kind](optics, settle_s)
        self._dir = tempfile.mkdtemp(prefix=f"maskrun-{self.name}-", dir=port_dir)
        self._detect_hangup = detect_hangup
        self._host_seen = False  # detect_hangup: the host sent a command, so our own slave handle is let go
        self.link_down = False  # detect_hangup: the host's last handle on the terminal closed
        self.port = os.path.join(self._dir, self.name)
        self._lock = threading.Lock()
        self._commands_seen = 0
        self._master: int | None = None
        self._slave: int | None = None
        self._slave_path: str | None = None
        self._replug_at: float | None = None
        self._requests: list[tuple[str, threading.Event]] = []
        self._wake_r, self._wake_w = os.pipe()
        os.set_blocking(self._wake_r, False)
        self._stopping = False
        self._buffer = b""
        self._plug()
        self._thread = threading.Thread(target=self._run, name=f"firmware-{self.name}", daemon=True)
        self._thread.start()

    # ----------------------------------------------------------- public
    @property
    def commands_seen(self) -> int:
        with self._lock:
            return self._commands_seen

    @property
    def host_link_up(self) -> bool:
        """detect_hangup: a host has sent a command and still has the port open."""
        return self._host_seen and not self.link_down

    @property
    def plugged(self) -> bool:
        return self._master is not None

    @property
    def device_path(self) -> str | None:
        """The current /dev/pts/N behind ``port`` (None while unplugged)."""
        return self._slave_path

    def unplug(self) -> None:
        """Make the device vanish until ``replug`` (waits until done)."""
        self._request("unplug")

    def replug(self) -> None:
        """Bring the device back on a new pseudo-terminal behind the same ``port`` path."""
        self._request("replug")

    def stop(self) -> None:
        """Stop the firmware thread, close the pty and remove the folder. Safe to call twice."""
        if self._stopping:
            return
        self._stopping = True
        self._wake()
        self._thread.join(timeout=5)
        self._protocol.close()
        self._unplug()
        for fd in (self._wake_r, self._wake_w):
            try:
                os.close(fd)
            except OSError:
                pass
        shutil.rmtree(self._dir, ignore_errors=True)

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.stop()
        return False

    def __repr__(self):
        return f"<FirmwareHandle {self.kind} port={self.port} plugged={self.plugged}>"

    # ---------------------------------------------------------- pty life
    def _plug(self) -> None:
        master, slave = os.openpty()
        tty.setraw(slave)
        tty.setraw(master)
        os.set_blocking(master, False)
        fcntl.fcntl(master, fcntl.F_SETFD, fcntl.FD_CLOEXEC)
        self._master, self._slave = master, slave
        self._slave_path = os.ttyname(slave)
        self._host_seen = self.link_down = False
        self._buffer = b""
        tmp = self.port + ".new"
        try:
            os.unlink(tmp)
        except FileNotFoundError:
            pass
        os.symlink(self._slave_path, tmp)
        os.replace(tmp, self.port)

    def _unplug(self) -> None:
        try:
            os.unlink(self.port)
        except FileNotFoundError:
            pass
        for fd in (self._master, self._slave):
            if fd is not None:
                try:
                    os.close(fd)
                except OSError:
                    pass
        if self._master is not None:
            self._protocol.link_lost()
        self._master = self._slave = self._slave_path = None

    def _request(self, what: str) -> None:
        if self._stopping:
            raise RuntimeError(f"firmware {self.name} is stopped")
        done = threading.Event()
        with self._lock:
            self._requests.append((what, done))
        self._wake()
        if not done.wait(timeout=5):
            raise RuntimeError(f"firmware {self.name} did not handle {what} within 5 s")

    def _wake(self) -> None:
        try:
            os.write(self._wake_w, b"x")
        except OSError:
            pass

    # -------------------------------------------------------------- loop
    def _run(self) -> None:
        while not self._stopping:
            try:
                self._step()
            except Exception:  # noqa: BLE001 - keep the device alive; the log says what happened
                log.exception("firmware %s: unexpected error in its loop", self.name)
                time.sleep(0.05)

    def _step(self) -> None:
        """One turn of the device loop: wait for input or a timer, then serve it."""
        now = time.monotonic()
        deadlines = [d for d in (self._protocol.next_deadline(), self._replug_at) if d is not None]
        timeout = max(0.0, min(deadlines) - now) if deadlines else 0.5
        if self.link_down:
            timeout = min(timeout, 0.01)  # a hung-up master is always readable (EIO): look every 10 ms instead
        fds = [self._wake_r] + ([self._master] if self._master is not None and not self.link_down else [])
        try:
            readable, _, _ = select.select(fds, [], [], timeout)
        except (OSError, ValueError):
            readable = []
        if self._stopping:
            return
        if self._wake_r in readable:
            try:
                os.read(self._wake_r, 4096)
            except OSError:
                pass
        self._serve_requests()
        now = time.monotonic()
        if self._replug_at is not None and now >= self._replug_at:
            self._replug_at = None
            if self._master is None:
                self._plug()
        self._protocol.tick(now)
        if self._master is not None and (self._master in readable or self.link_down):
            self._read_commands()

    def _serve_requests(self) -> None:
        with self._lock:
            requests, self._requests = self._requests, []
        for what, done in requests:
            if what == "unplug" and self._master is not None:
                self._unplug()
                self._replug_at = None
            elif what == "replug" and self._master is None:
                self._replug_at = None
                self._plug()
            done.set()

    def _read_commands(self) -> None:
        try:
            data = os.read(self._master, 4096)
        except BlockingIOError:
            if self.link_down:  # a program has the terminal open again: the link is back
                self.link_down = False
                log.info("firmware %s: host link back", self.name)
            return
        except OSError as exc:
            if exc.errno == errno.EIO:
                if self._detect_hangup and self._host_seen and not self.link_down:
                    self.link_down = True  # the host's last handle closed: the link dropped
                    if self._protocol.link_lost():
                        log.warning("firmware %s: host link lost with the shutter open; shutter closed", self.name)
                    else:
                        log.info("firmware %s: host link closed", self.name)
                return
            raise
        if self.link_down:
            self.link_down = False
        if self._detect_hangup and not self._host_seen and data:
            self._host_seen = True
            if self._slave is not None:  # from now on a hang-up of the host side is seen as EIO
                os.close(self._slave)
                self._slave = None
        self._buffer += data
        while b"\n" in self._buffer and self._master is not None:
            raw, self._buffer = self._buffer.split(b"\n", 1)
            with self._lock:
                self._commands_seen += 1
                n = self._commands_seen
            fault = self._fault_for(n)
            if fault is not None and fault.kind == "unplug":
                self._unplug()
                self._replug_at = time.monotonic() + fault.duration_s
                return
            line = raw.decode("ascii", errors="replace").strip()
            try:
                reply = self._protocol.handle(line).encode("ascii", errors="replace")
            except Exception as exc:  # noqa: BLE001 - a firmware bug must not kill the device thread
                log.exception("firmware %s failed on %r", self.name, line)
                reply = f"ERR internal fault: {type(exc).__name__}".encode("ascii", errors="replace")
            if fault is not None and fault.kind == "no_reply":
                continue
            if fault is not None and fault.kind == "garbled":
                reply = _garble(reply)
            self._write(reply + b"\n")

    def _fault_for(self, n: int) -> FirmwareFault | None:
        for fault in self.faults:
            span = 1 if fault.kind == "unplug" else fault.count
            if fault.at_command <= n < fault.at_command + span:
                return fault
        return None

    def _write(self, data: bytes) -> None:
        try:
            os.write(self._master, data)
        except (BlockingIOError, OSError):
            pass  # output buffer full or link gone: the reply is lost, as on a real line


def start_firmware(kind: str, optics, *, faults=(), settle_s: float = 0.0, name: str | None = None,
                   detect_hangup: bool = False, port_dir: str | None = None) -> FirmwareHandle:
    """Start a firmware simulator of ``kind`` ('modulator' or 'safety') bound to ``optics``.

    faults: FirmwareFault models or dicts {kind, at_command, count, duration_s}.
    settle_s: modulator settle time (READY? turns 1 and the trigger fires after it) or
    shutter travel time of the safety box.
    name: name of the symlink (default: the kind). Returns the running FirmwareHandle.
    """
    return FirmwareHandle(kind, optics, faults=faults, settle_s=settle_s, name=name, detect_hangup=detect_hangup,
                          port_dir=port_dir)
