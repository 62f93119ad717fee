"""Safety box (interlock chain + beam shutter) driven over a serial line protocol.

Like the serial modulator, every command and expected reply is a setting
(defaults match the simulated safety box in ``simulators.firmware``).

Guaranteed close: ``close()`` closes the shutter before it releases the port
(reconnecting once if the line was lost); leaving a ``with`` block for any
reason closes the shutter. If the shutter cannot be confirmed closed,
``close()`` raises DeviceFault telling the operator to close it by hand,
unless another exception is already propagating out of the ``with`` block,
in which case it is logged and the original exception continues.
"""

from __future__ import annotations

import logging

from pydantic import BaseModel, ConfigDict, Field, model_validator

from .base import SafetyBox
from .errors import DeviceDisconnected, DeviceError, DeviceFault
from .serial_port import LineCommand, LinePort, SerialLineSettings, require_fields

__all__ = ["SerialSafetyBox", "SafetyCommands"]

log = logging.getLogger(__name__)


class SafetyCommands(BaseModel):
    """The safety box's commands (no placeholders).

    identify: sent on open (None: skip). interlock: reply group ``state`` compared with
    ``interlock_closed_value``. shutter_state: group ``state`` compared with ``shutter_open_value``.
    open_shutter / close_shutter: their acknowledgements (give them a timeout_s longer than the
    shutter travel time). watchdog: arms the box's own watchdog with ``{seconds}`` (sent on open
    when the ``watchdog_s`` setting is above 0; None: the box has none).
    """

    model_config = ConfigDict(extra="forbid")

    identify: LineCommand | None = LineCommand(send="ID?", expect=r"ID (?P<ident>.+)")
    interlock: LineCommand = LineCommand(send="INTERLOCK?", expect=r"INTERLOCK (?P<state>\S+)")
    shutter_state: LineCommand = LineCommand(send="SHUTTER?", expect=r"SHUTTER (?P<state>\S+)")
    open_shutter: LineCommand = LineCommand(send="SHUTTER OPEN", expect=r"OK SHUTTER OPEN")
    close_shutter: LineCommand = LineCommand(send="SHUTTER CLOSE", expect=r"OK SHUTTER CLOSED")
    watchdog: LineCommand | None = LineCommand(send="WATCHDOG {seconds}", expect=r"OK WATCHDOG \S+")

    @model_validator(mode="after")
    def _placeholders(self):
        if self.identify is not None:
            require_fields(self.identify, "identify", set())
        require_fields(self.interlock, "interlock", set(), {"state"})
        require_fields(self.shutter_state, "shutter_state", set(), {"state"})
        require_fields(self.open_shutter, "open_shutter", set())
        require_fields(self.close_shutter, "close_shutter", set())
        if self.watchdog is not None:
            require_fields(self.watchdog, "watchdog", {"seconds"})
        return self


class SerialSafetyBox(SafetyBox):
    """Interlock and beam shutter controller speaking a text line protocol.

    Settings: port, baud, terminator, encoding, timeout_s, error_reply, reconnect_timeout_s
    (see SerialLineSettings), interlock_closed_value ("CLOSED"), shutter_open_value ("OPEN"),
    watchdog_s (0: off), commands (SafetyCommands).

    Watchdog: with ``watchdog_s`` > 0 the box is told on open (and after a reconnect) to close
    the shutter by itself when the host has sent no command for that long while the shutter is
    open, which covers a host program that hangs or freezes with the beam on. A run sends a
    command before every frame, so ``watchdog_s`` must be longer than the longest exposure plus
    the camera's grab timeout and the modulator's settle time (checked when the bench is built).
    """

    class Settings(SerialLineSettings):
        port: str = "sim:safety"
        interlock_closed_value: str = "CLOSED"
        shutter_open_value: str = "OPEN"
        watchdog_s: float = Field(0.0, ge=0, description="close the shutter if the host is silent this long "
                                  "with it open (0: off; needs commands.watchdog)")
        commands: SafetyCommands = SafetyCommands()

        @model_validator(mode="after")
        def _watchdog_command(self):
            if self.watchdog_s > 0 and self.commands.watchdog is None:
                raise ValueError("watchdog_s > 0 needs commands.watchdog (the box's command to arm it)")
            return self

    def __init__(self, settings, context=None):
        super().__init__(settings, context)
        self._port: LinePort | None = None
        self._opened = False
        self.identity: str | None = None

    # ---------------------------------------------------------- life cycle
    def open(self) -> None:
        if self._port is not None and self._port.is_open:
            return
        s = self.settings
        path = self.context.resolve_port(s.port)
        self._port = LinePort(path, baud=s.baud, terminator=s.terminator, encoding=s.encoding,
                              error_regex=s.error_reply, device="safety box")
        try:
            self._port.open()
            self._identify()
        except Exception:
            port, self._port = self._port, None
            port.close()
            raise
        self._opened = True

    def reconnect(self) -> None:
        """Reopen the same port after an unplug (retrying up to reconnect_timeout_s)."""
        if self._port is None:
            self.open()
            return
        self._port.reconnect(self.settings.reconnect_timeout_s)
        self._identify()
        self._opened = True

    def close(self) -> None:
        """Close the shutter, then release the port. Safe to call twice and after a failed open."""
        self._close(raise_on_failure=True)

    def _close(self, raise_on_failure: bool) -> None:
        if not self._opened:
            return
        failure: DeviceError | None = None
        try:
            try:
                self.close_shutter()
            except DeviceDisconnected:
                self.reconnect()
                self.close_shutter()
        except DeviceError as exc:
            failure = exc
        finally:
            self._opened = False
            port, self._port = self._port, None
            if port is not None:
                port.close()
        if failure is not None:
            message = f"could not confirm the shutter closed while closing the safety box: {failure.detail}"
            hint = "close the beam shutter or switch the laser off by hand, then check the safety box"
            if raise_on_failure:
                raise DeviceFault(message, device="safety box", hint=hint) from failure
            log.error("%s (%s)", message, hint)

    def __exit__(self, exc_type, exc, tb):
        self._close(raise_on_failure=exc_type is None)
        return False

    # ------------------------------------------------------------ commands
    def _query(self, command: LineCommand):
        if self._port is None or not self._port.is_open:
            raise DeviceDisconnected("the safety box port is not open", device="safety box",
                                     hint="open the safety box (or reconnect after an unplug)")
        return self._port.query(command.send, command.expect, command.timeout_s or self.settings.timeout_s)

    def _identify(self) -> None:
        command = self.settings.commands.identify
        if command is not None:
            match = self._query(command)
            self.identity = match.groupdict().get("ident") or match.group(0)
        self._arm_watchdog()

    def _arm_watchdog(self) -> None:
        """Arm the box's watchdog (on open and after every reconnect: the box may have restarted)."""
        command = self.settings.commands.watchdog
        if self.settings.watchdog_s > 0 and command is not None:
            line = command.send.format(seconds=f"{self.settings.watchdog_s:g}")
            self._port.query(line, command.expect, command.timeout_s or self.settings.timeout_s)

    @property
    def watchdog_s(self) -> float:
        """The box's watchdog period in seconds (0: off)."""
        return float(self.settings.watchdog_s)

    def interlock_closed(self) -> bool:
        return self._query(self.settings.commands.interlock).group("state") == self.settings.interlock_closed_value

    def shutter_is_open(self) -> bool:
        return self._query(self.settings.commands.shutter_state).group("state") == self.settings.shutter_open_value

    def open_shutter(self) -> None:
        if not self.interlock_closed():
            raise DeviceFault("refused to open the shutter: the interlock is open", device="safety box",
                              hint="close the doors / complete the interlock chain, then try again")
        self._query(self.settings.commands.open_shutter)

    def close_shutter(self) -> None:
        self._query(self.settings.commands.close_shutter)
