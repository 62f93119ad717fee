"""The display modulator's link to its X child process (``display_x11``): starting it, reading its
JSON-line replies and its error output, and one request with its answer, a lost display raised as
``DeviceDisconnected``. A mixin of ``display_modulator.DisplayModulator``, which holds the state."""
from __future__ import annotations

import json
import os
import queue
import subprocess
import sys
import threading
import time

from .errors import DeviceDisconnected, DeviceMisconfigured, DeviceTimeout


class DisplayLink:
    """The child-process link of ``DisplayModulator`` (see the module docstring)."""

    def _spawn(self) -> None:
        try:
            import Xlib  # noqa: F401
        except ImportError:
            raise DeviceMisconfigured("the display modulator needs python-xlib", device="modulator",
                                      hint="pip install 'maskrun[display]'") from None
        env = dict(os.environ)
        if self.settings.x_display:
            env["DISPLAY"] = self.settings.x_display
        if not env.get("DISPLAY"):
            raise DeviceDisconnected("no X display: DISPLAY is not set and x_display is not given", device="modulator",
                                     hint="set [modulator.settings] x_display (e.g. ':0') or run where DISPLAY is set")
        self._replies = queue.Queue()
        self._lost = None
        self._proc = subprocess.Popen([sys.executable, "-m", "maskrun.drivers.display_x11"], stdin=subprocess.PIPE,
                                      stdout=subprocess.PIPE, stderr=subprocess.PIPE, env=env, text=True, bufsize=1)
        threading.Thread(target=self._read_stdout, args=(self._proc,), daemon=True, name="display-replies").start()
        threading.Thread(target=self._read_stderr, args=(self._proc,), daemon=True, name="display-stderr").start()

    def _read_stdout(self, proc) -> None:
        for line in proc.stdout:
            try:
                msg = json.loads(line)
            except json.JSONDecodeError:
                self._stderr.append(line.rstrip())
                continue
            if "lost" in msg:
                self._lost = msg["lost"]
            self._replies.put(msg)
        self._replies.put(None)  # end of the child's output

    def _read_stderr(self, proc) -> None:
        for line in proc.stderr:
            self._stderr.append(line.rstrip())

    def _disconnected(self, why: str) -> DeviceDisconnected:
        tail = "; ".join(list(self._stderr)[-3:])
        return DeviceDisconnected(f"{why}{' (' + tail + ')' if tail and 'lost' not in why else ''}", device="modulator",
                                  hint="check that the modulator's screen is connected and switched on and that the "
                                  "X server runs; the run reconnects or pauses with the shutter closed")

    def _wait(self, want_id: int | None, timeout_s: float, what: str) -> dict:
        t_end = time.monotonic() + timeout_s
        while True:
            left = t_end - time.monotonic()
            if left <= 0:
                raise DeviceTimeout(f"{what}: no answer from the X server within {timeout_s:g} s", device="modulator",
                                    hint="check the X server and the modulator's screen")
            try:
                msg = self._replies.get(timeout=left)
            except queue.Empty:
                continue
            if msg is None:
                self._replies.put(None)
                raise self._disconnected(f"{what}: the display link ended: {self._lost or 'the display process exited'}")
            if "lost" in msg:
                raise self._disconnected(f"{what}: display lost: {msg['lost']}")
            if want_id is None or msg.get("id") == want_id:
                return msg

    def _request(self, timeout_s: float, what: str, **req) -> dict:
        if self._lost:
            raise self._disconnected(f"{what}: display lost: {self._lost}")
        if self._proc is None or self._proc.poll() is not None:
            raise self._disconnected(f"{what}: the display is not open")
        self._next_id += 1
        req["id"] = self._next_id
        try:
            self._proc.stdin.write(json.dumps(req) + "\n")
            self._proc.stdin.flush()
        except (BrokenPipeError, OSError, ValueError):
            raise self._disconnected(f"{what}: the display process is gone") from None
        try:
            msg = self._wait(self._next_id, timeout_s, what)
        except DeviceTimeout:
            # a display process that does not answer is replaced: the next request finds the device not
            # open (DeviceDisconnected), and the sequencer's reconnect opens a new window
            self._kill()
            raise
        if "error" in msg:
            raise DeviceMisconfigured(f"{what}: {msg['error']}", device="modulator")
        return msg
