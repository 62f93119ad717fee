"""What the safety box last said, and when: the only source of the safety fields a display shows.

``RecordingSafetyBox`` wraps the bench's safety box. Every ``interlock_closed()`` and
``shutter_is_open()`` call (by the run's sequencer before and after every frame, by the align loop,
by the service while idle) goes to the box as before and its answer is recorded with the time it was
read. A command (``open_shutter``/``close_shutter``) is recorded as a command, never as a reading:
a shutter told to close has not been read closed.

``SafetyReadings.snapshot(now)`` gives, per field, the value read, its age in seconds and where it
came from; a reading older than ``max_age_s`` (or a failed read) is reported as unknown (None) with
its age and the last value seen, never inferred from the run's state.
"""

from __future__ import annotations

import threading
import time
from dataclasses import dataclass


@dataclass
class Reading:
    value: bool | None = None  # None: never read, or the last read failed
    t_s: float | None = None  # time.monotonic() of the reading
    error: str = ""


class SafetyReadings:
    def __init__(self):
        self._lock = threading.Lock()
        self.interlock = Reading()
        self.shutter = Reading()
        self.last_command = ""
        self.last_command_t_s: float | None = None

    def record(self, name: str, value: bool | None, error: str = "") -> None:
        with self._lock:
            setattr(self, name, Reading(value, time.monotonic(), error))

    def command(self, what: str) -> None:
        with self._lock:
            self.last_command, self.last_command_t_s = what, time.monotonic()

    def snapshot(self, max_age_s: float, now_s: float | None = None) -> dict:
        """{'interlock_closed': bool|None, 'interlock_age_s', 'interlock_last', 'shutter_open', ...}."""
        now = time.monotonic() if now_s is None else now_s
        out = {}
        with self._lock:
            for name, key in (("interlock", "interlock_closed"), ("shutter", "shutter_open")):
                r: Reading = getattr(self, name)
                age = None if r.t_s is None else max(now - r.t_s, 0.0)
                fresh = age is not None and age <= max_age_s and not r.error
                out[key] = r.value if fresh else None
                out[f"{name}_age_s"] = age
                out[f"{name}_last_read"] = r.value
                if r.error:
                    out[f"{name}_error"] = r.error
            out["last_command"] = self.last_command
        return out


class RecordingSafetyBox:
    """The bench's safety box, with every reading recorded in ``readings`` (all else passes through)."""

    def __init__(self, box, readings: SafetyReadings):
        self._box = box
        self.readings = readings

    def interlock_closed(self) -> bool:
        return self._read("interlock", self._box.interlock_closed)

    def shutter_is_open(self) -> bool:
        return self._read("shutter", self._box.shutter_is_open)

    def _read(self, name: str, fn) -> bool:
        try:
            value = bool(fn())
        except Exception as exc:
            self.readings.record(name, None, f"{type(exc).__name__}: {exc}")
            raise
        self.readings.record(name, value)
        return value

    def open_shutter(self, *a, **k):
        return self._command("open shutter", self._box.open_shutter, a, k)

    def close_shutter(self, *a, **k):
        return self._command("close shutter", self._box.close_shutter, a, k)

    def _command(self, what: str, fn, a, k):
        """Send the command, then read the shutter back: a command is not a reading, so the reading
        from before it is dropped, and the box is asked what it did."""
        self.readings.command(what)
        self.readings.record("shutter", None, f"not read since the command to {what}")
        result = fn(*a, **k)
        try:
            self.shutter_is_open()
        except Exception:
            pass  # recorded as a failed reading: shown as unknown
        return result

    def __getattr__(self, name):
        return getattr(self._box, name)


def safety_text(safety: dict) -> tuple[str, str]:
    """('closed (read 0.1 s ago)' | 'OPEN (...)' | 'UNKNOWN (last read 12 s ago: OPEN)', same for the shutter)."""
    def one(prefix: str, key: str, yes: str, no: str) -> str:
        value, age, last = safety.get(key), safety.get(f"{prefix}_age_s"), safety.get(f"{prefix}_last_read")
        if value is not None:
            return f"{yes if value else no} (read {age:.1f} s ago)" if age is not None else (yes if value else no)
        if age is None:
            return "UNKNOWN (never read)"
        seen = {True: yes, False: no, None: "read failed"}[last]
        return f"UNKNOWN (last read {age:.0f} s ago: {seen})"

    return (one("interlock", "interlock_closed", "closed", "OPEN"), one("shutter", "shutter_open", "OPEN", "closed"))
