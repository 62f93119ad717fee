"""A firmware simulator as its own process: ``python -m maskrun.simulators.firmware_process``
(or ``maskrun firmware KIND --state FILE``).

The device (safety box or modulator controller, ``simulators.firmware``) serves its line
protocol on a pseudo-terminal from this process, not from maskrun's, so killing or freezing
maskrun is something the device observes, as real hardware would:

- maskrun killed (SIGKILL, crash): its handle on the terminal closes, the terminal hangs up,
  and the safety box closes the shutter at once (link loss);
- maskrun frozen (SIGSTOP, a hung driver): no more commands, and the box's watchdog closes the
  shutter within the watchdog period.

The light path stays in maskrun's process (the simulated camera); the physical state that the
two sides share (shutter, interlock, shown mask, trigger pulses) lives in a small memory-mapped
file (``shared_state``). On start the process prints one JSON line on stdout:
``{"kind", "name", "port", "pid"}``; it runs until SIGTERM/SIGINT, or until the process that
started it is gone and no program has had the port open for ``--orphan-timeout-s``.
"""

from __future__ import annotations

import argparse
import json
import os
import signal
import sys
import threading
import time

from .firmware import FIRMWARE_KINDS, start_firmware
from .shared_state import SharedBenchState


class SharedOpticsView:
    """What the firmware protocols need of the optics, backed by the shared state file.

    Changes made by another process (the interlock, moved by maskrun's 'simulate' request) are
    seen by a watcher thread polling every millisecond, which calls the subscribers, so the
    safety box's hardware interlock closes the shutter within about a millisecond."""

    def __init__(self, state: SharedBenchState, mask_count: int, poll_s: float = 0.001):
        self._state = state
        self.mask_count = int(mask_count)
        self._listeners: list = []
        self._lock = threading.Lock()
        self._stop = threading.Event()
        self._poll_s = poll_s
        self._thread = threading.Thread(target=self._watch, name="shared-state-watch", daemon=True)
        self._thread.start()

    @property
    def shutter_open(self) -> bool:
        return self._state.shutter_open

    @shutter_open.setter
    def shutter_open(self, value: bool) -> None:
        self._state.shutter_open = bool(value)

    @property
    def interlock_closed(self) -> bool:
        return self._state.interlock_closed

    @property
    def shown_mask(self):
        return self._state.shown_mask

    @shown_mask.setter
    def shown_mask(self, value) -> None:
        self._state.shown_mask = value

    def fire_trigger(self) -> None:
        self._state.fire_trigger()

    def subscribe(self, listener):
        with self._lock:
            self._listeners.append(listener)

        def unsubscribe():
            with self._lock:
                if listener in self._listeners:
                    self._listeners.remove(listener)

        return unsubscribe

    def _watch(self) -> None:
        last = self._state.interlock_closed
        while not self._stop.wait(self._poll_s):
            now = self._state.interlock_closed
            if now != last:
                last = now
                with self._lock:
                    listeners = list(self._listeners)
                for listener in listeners:
                    listener("interlock_closed", now)

    def close(self) -> None:
        self._stop.set()


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("kind", choices=FIRMWARE_KINDS)
    p.add_argument("--state", required=True, help="shared state file (made by the bench; see shared_state)")
    p.add_argument("--mask-count", type=int, default=1, help="masks stored in the modulator controller")
    p.add_argument("--settle-s", type=float, default=0.0, help="modulator settle time / shutter travel time, s")
    p.add_argument("--faults", default="[]", help="injected faults, JSON list (see simulators.firmware)")
    p.add_argument("--name", help="name of the port symlink (default: the kind)")
    p.add_argument("--port-dir", help="folder for the port symlink's private folder (default: the temp folder)")
    p.add_argument("--orphan-timeout-s", type=float, default=60.0,
                   help="exit this long after the starting process is gone and nobody has the port open")


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(prog="maskrun firmware", description=__doc__.split("\n\n")[0])
    add_arguments(p)
    return serve(p.parse_args(argv))


def serve(args) -> int:
    """Run one firmware until SIGTERM/SIGINT/SIGHUP (or orphaned, see the module docstring)."""
    state = SharedBenchState(args.state)
    optics = SharedOpticsView(state, args.mask_count)
    handle = start_firmware(args.kind, optics, faults=json.loads(args.faults), settle_s=args.settle_s,
                            name=args.name, detect_hangup=True, port_dir=args.port_dir)
    stop = threading.Event()
    for sig in (signal.SIGTERM, signal.SIGINT, signal.SIGHUP):
        signal.signal(sig, lambda *_: stop.set())
    parent = os.getppid()
    print(json.dumps({"kind": args.kind, "name": handle.name, "port": handle.port, "pid": os.getpid()}), flush=True)
    orphan_since = None
    try:
        while not stop.wait(0.2):
            orphaned = os.getppid() != parent
            if orphaned and not handle.host_link_up:
                orphan_since = orphan_since or time.monotonic()
                if time.monotonic() - orphan_since > args.orphan_timeout_s:
                    break
            else:
                orphan_since = None
    finally:
        handle.stop()  # the safety box closes its shutter when it stops
        optics.close()
        state.close()
    return 0


if __name__ == "__main__":
    sys.exit(main())
