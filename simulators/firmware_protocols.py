"""The command interpreters of the simulated devices (protocol in ``simulators.firmware``).

``_ModulatorProtocol`` and ``_SafetyProtocol`` turn one command line into one reply and run
the devices' timers (settle, trigger pulse, watchdog); ``simulators.firmware`` serves them on a
pseudo-terminal, in a thread or in a process of its own (``firmware_process``).
"""

from __future__ import annotations

import logging
import time

log = logging.getLogger("maskrun.simulators.firmware")


class _Protocol:
    """Command interpreter of one device kind. ``handle(line) -> reply``; ``tick(now)`` runs timers."""

    ident = "ID sim-device 1.0"

    def __init__(self, optics, settle_s: float):
        self.optics = optics
        self.settle_s = float(settle_s)

    def handle(self, line: str) -> str:
        words = line.split()
        if not words:
            return "ERR empty command"
        if line == "ID?":
            return self.ident
        return self.command(words)

    def command(self, words: list[str]) -> str:  # pragma: no cover - overridden
        return f"ERR unknown command {words[0]}"

    def next_deadline(self) -> float | None:
        return None

    def tick(self, now: float) -> None:
        pass

    def link_lost(self) -> bool:
        """The host link dropped; True when the device made itself safe because of it (shutter closed)."""
        return False

    def close(self) -> None:
        pass


class _ModulatorProtocol(_Protocol):
    ident = "ID sim-modulator 1.0"

    def __init__(self, optics, settle_s):
        super().__init__(optics, settle_s)
        self.count = optics.mask_count
        self.shown_at = -float("inf")
        self.trigger_out = True
        self.trigger_due: float | None = None

    def command(self, words):
        cmd, args = words[0], words[1:]
        if cmd == "COUNT?" and not args:
            return f"COUNT {self.count}"
        if cmd == "COUNT" and len(args) == 1:
            try:
                k = int(args[0])
            except ValueError:
                return f"ERR count must be a whole number, got {args[0]}"
            stored = self.optics.mask_count
            if not 1 <= k <= stored:
                return f"ERR count {k} outside 1..{stored} (masks stored in the controller)"
            self.count = k
            return f"OK COUNT {k}"
        if cmd == "SHOW" and len(args) == 1:
            try:
                k = int(args[0])
            except ValueError:
                return f"ERR mask index must be a whole number, got {args[0]}"
            if not 0 <= k < self.count:
                return f"ERR mask {k} outside 0..{self.count - 1}"
            self.optics.shown_mask = k
            self.shown_at = time.monotonic()
            if self.trigger_out:
                self.trigger_due = self.shown_at + self.settle_s
            return f"OK SHOW {k}"
        if cmd == "READY?" and not args:
            return "READY 1" if time.monotonic() - self.shown_at >= self.settle_s else "READY 0"
        if cmd == "TRIGOUT" and len(args) == 1 and args[0] in ("0", "1"):
            self.trigger_out = args[0] == "1"
            if not self.trigger_out:
                self.trigger_due = None
            return f"OK TRIGOUT {args[0]}"
        return f"ERR unknown command {' '.join(words)}"

    def next_deadline(self):
        return self.trigger_due

    def tick(self, now):
        if self.trigger_due is not None and now >= self.trigger_due:
            self.trigger_due = None
            self.optics.fire_trigger()


class _SafetyProtocol(_Protocol):
    ident = "ID sim-safety 1.0"

    def __init__(self, optics, settle_s):
        super().__init__(optics, settle_s)
        self.trips = 0
        self.watchdog_s = 0.0
        self.watchdog_trips = 0
        self.link_trips = 0
        self.last_trip = ("none", 0.0)
        self.last_command_s = time.monotonic()
        self._unsubscribe = optics.subscribe(self._on_optics_change)

    def handle(self, line: str) -> str:
        self.last_command_s = time.monotonic()  # any command is a sign of life for the watchdog
        return super().handle(line)

    def next_deadline(self):
        if self.watchdog_s > 0 and self.optics.shutter_open:
            return self.last_command_s + self.watchdog_s
        return None

    def tick(self, now):
        if self.watchdog_s > 0 and self.optics.shutter_open and now - self.last_command_s >= self.watchdog_s:
            self.optics.shutter_open = False
            self.watchdog_trips += 1
            self.last_trip = ("watchdog", time.time())
            log.warning("simulated safety box: no command for %.3g s with the shutter open; watchdog closed it",
                        now - self.last_command_s)

    def _on_optics_change(self, name, value):
        # Hardware interlock: opening the chain closes the shutter at once.
        if name == "interlock_closed" and not value and self.optics.shutter_open:
            self.optics.shutter_open = False
            self.trips += 1
            self.last_trip = ("interlock", time.time())

    def command(self, words):
        line = " ".join(words)
        if line == "INTERLOCK?":
            return "INTERLOCK CLOSED" if self.optics.interlock_closed else "INTERLOCK OPEN"
        if line == "SHUTTER?":
            return "SHUTTER OPEN" if self.optics.shutter_open else "SHUTTER CLOSED"
        if line == "SHUTTER OPEN":
            if not self.optics.interlock_closed:
                return "ERR interlock open"
            if self.settle_s > 0:
                time.sleep(self.settle_s)
            if not self.optics.interlock_closed:  # opened while the shutter moved
                return "ERR interlock open"
            self.optics.shutter_open = True
            if not self.optics.interlock_closed:  # opened in the same instant: the hardware wins
                self.optics.shutter_open = False
                return "ERR interlock open"
            return "OK SHUTTER OPEN"
        if line == "SHUTTER CLOSE":
            self.optics.shutter_open = False
            return "OK SHUTTER CLOSED"
        if line == "WATCHDOG?":
            return f"WATCHDOG {self.watchdog_s:g} TRIPS {self.watchdog_trips}"
        if line == "TRIPS?":
            reason, t = self.last_trip
            return (f"TRIPS INTERLOCK {self.trips} WATCHDOG {self.watchdog_trips} LINK {self.link_trips} "
                    f"LAST {reason} {t:.3f}")
        if words[0] == "WATCHDOG" and len(words) == 2:
            try:
                seconds = float(words[1])
            except ValueError:
                seconds = float("nan")
            if not seconds >= 0 or seconds == float("inf"):
                return f"ERR watchdog must be 0 (off) or a positive number of seconds, got {words[1]}"
            self.watchdog_s = seconds
            return f"OK WATCHDOG {seconds:g}"
        return f"ERR unknown command {line}"

    def link_lost(self):
        was_open = self.optics.shutter_open
        if was_open:
            self.link_trips += 1
            self.last_trip = ("link", time.time())
        self.optics.shutter_open = False
        return was_open

    def close(self):
        self.optics.shutter_open = False
        self._unsubscribe()


_PROTOCOLS = {"modulator": _ModulatorProtocol, "safety": _SafetyProtocol}
