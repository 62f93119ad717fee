"""In-process simulated safety box (interlock + beam shutter) on the simulated bench.

Reads the interlock from ``context.optics.interlock_closed`` and moves
``optics.shutter_open``. Like the firmware version it is fail-safe: the moment the
interlock opens, the shutter closes by itself (hardware interlock); ``close()`` and
leaving a ``with`` block close the shutter. Without a simulated bench it keeps its own
state (interlock closed, shutter closed at start).
"""

from __future__ import annotations

import time
from types import SimpleNamespace

from pydantic import Field

from maskrun.drivers.base import DriverSettings, SafetyBox
from maskrun.drivers.errors import DeviceDisconnected, DeviceFault

__all__ = ["SimulatedSafetyBox"]


class SimulatedSafetyBox(SafetyBox):
    """A safety box simulated in-process on the simulated bench."""

    class Settings(DriverSettings):
        shutter_travel_s: float = Field(default=0.0, ge=0, description="time the shutter takes to open, s")

    def __init__(self, settings, context=None):
        super().__init__(settings, context)
        self._state = self.context.optics or SimpleNamespace(interlock_closed=True, shutter_open=False)
        self._unsubscribe = None
        self._is_open = False
        self.trips = 0

    def open(self) -> None:
        if self._is_open:
            return
        if hasattr(self._state, "subscribe"):
            self._unsubscribe = self._state.subscribe(self._on_change)
        self._is_open = True

    def _on_change(self, name, value) -> None:
        if name == "interlock_closed" and not value and self._state.shutter_open:
            self._state.shutter_open = False
            self.trips += 1

    def close(self) -> None:
        """Close the shutter and detach. Safe to call twice and after a failed open."""
        self._state.shutter_open = False
        unsubscribe, self._unsubscribe = self._unsubscribe, None
        if unsubscribe is not None:
            unsubscribe()
        self._is_open = False

    def _check_open(self) -> None:
        if not self._is_open:
            raise DeviceDisconnected("the simulated safety box is not open", device="safety box",
                                     hint="open the safety box first")

    def interlock_closed(self) -> bool:
        self._check_open()
        return bool(self._state.interlock_closed)

    def shutter_is_open(self) -> bool:
        self._check_open()
        return bool(self._state.shutter_open)

    def open_shutter(self) -> None:
        self._check_open()
        if not self._state.interlock_closed:
            raise DeviceFault("refused to open the shutter: the interlock is open", device="safety box",
                              hint="close the doors / complete the interlock chain, then try again")
        if self.settings.shutter_travel_s > 0:
            time.sleep(self.settings.shutter_travel_s)
            if not self._state.interlock_closed:
                raise DeviceFault("the interlock opened while the shutter was opening; shutter stays closed",
                                  device="safety box", hint="close the interlock chain, then try again")
        self._state.shutter_open = True
        if not self._state.interlock_closed:  # opened in the same instant: the hardware wins
            self._state.shutter_open = False
            raise DeviceFault("the interlock opened as the shutter opened; shutter closed again",
                              device="safety box", hint="close the interlock chain, then try again")

    def close_shutter(self) -> None:
        self._state.shutter_open = False
