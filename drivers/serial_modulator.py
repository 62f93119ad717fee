"""Modulator driven over a serial line protocol, entirely described by its settings.

Every command, expected reply (regular expression), the terminator, baud rate
and timeouts are settings, so a new controller that selects stored masks by
number over a text protocol can be driven from the bench config alone:

```toml
[modulator]
driver = "serial-line"
[modulator.settings]
port = "/dev/ttyUSB0"
baud = 9600
terminator = "\\r\\n"
settle_s = 0.03
[modulator.settings.commands.show]
send = "PAT {index}"
expect = 'PAT=(?P<index>\\d+)'
```

Defaults match the simulated controller (``simulators.firmware``). The masks
themselves are stored in the controller; ``load`` tells it how many are in
use (``set_count``, optional) and checks nothing else.
"""

from __future__ import annotations

import numpy as np
from pydantic import BaseModel, ConfigDict, Field, model_validator

from .base import Modulator
from .errors import DeviceDisconnected, DeviceFault, DeviceMisconfigured
from .serial_port import LineCommand, LinePort, SerialLineSettings, require_fields, template_fields

__all__ = ["SerialLineModulator", "ModulatorCommands"]


class ModulatorCommands(BaseModel):
    """The modulator's commands. Placeholders: set_count uses {count}, show uses {index}.

    identify: sent on open (None: skip); group ``ident`` (if any) is kept as ``identity``.
    set_count: tells the controller how many masks are in use (None: skip).
    show: selects a mask; a group ``index`` in the reply is checked against the request.
    ready: asks whether the shown mask is in place; group ``ready`` compared with ``ready_value``.
    """

    model_config = ConfigDict(extra="forbid")

    identify: LineCommand | None = LineCommand(send="ID?", expect=r"ID (?P<ident>.+)")
    set_count: LineCommand | None = LineCommand(send="COUNT {count}", expect=r"OK COUNT (?P<count>\d+)")
    show: LineCommand = LineCommand(send="SHOW {index}", expect=r"OK SHOW (?P<index>\d+)")
    ready: LineCommand = LineCommand(send="READY?", expect=r"READY (?P<ready>\S+)")

    @model_validator(mode="after")
    def _placeholders(self):
        if self.identify is not None:
            require_fields(self.identify, "identify", set())
        if self.set_count is not None:
            require_fields(self.set_count, "set_count", {"count"})
        require_fields(self.show, "show", {"index"})
        if "index" not in template_fields(self.show.send):
            raise ValueError("show.send must contain {index} (the mask number to show)")
        require_fields(self.ready, "ready", set(), {"ready"})
        return self


class SerialLineModulator(Modulator):
    """Modulator (SLM, DMD, mask wheel) whose controller selects stored masks over a text line protocol.

    Settings: port, baud, terminator, encoding, timeout_s, error_reply, reconnect_timeout_s
    (see SerialLineSettings), settle_s (wait after the acknowledgement, seconds),
    ready_value (value of the ``ready`` group meaning "in place"), commands (ModulatorCommands).
    """

    class Settings(SerialLineSettings):
        port: str = "sim:modulator"
        settle_s: float = Field(default=0.0, ge=0, description="time after the acknowledgement before the mask is stable, s")
        ready_value: str = "1"
        commands: ModulatorCommands = ModulatorCommands()

    def __init__(self, settings, context=None):
        super().__init__(settings, context)
        self._port: LinePort | None = None
        self.identity: str | None = None
        self.mask_count: int | None = None
        self.shown: int | None = None

    # ---------------------------------------------------------- life cycle
    def open(self) -> None:
        if self._port is not None and self._port.is_open:
            return
        s = self.settings
        path = self.context.resolve_port(s.port)
        self._port = LinePort(path, baud=s.baud, terminator=s.terminator, encoding=s.encoding,
                              error_regex=s.error_reply, device="modulator")
        try:
            self._port.open()
            self._identify()
        except Exception:
            self.close()
            raise

    def close(self) -> None:
        port, self._port = self._port, None
        if port is not None:
            port.close()

    def reconnect(self) -> None:
        """Reopen the same port after an unplug (retrying up to reconnect_timeout_s) and restore the mask count."""
        s = self.settings
        if self._port is None:
            self.open()
        else:
            self._port.reconnect(s.reconnect_timeout_s)
            self._identify()
        if self.mask_count is not None and s.commands.set_count is not None:
            self._query(s.commands.set_count, count=self.mask_count)

    # ------------------------------------------------------------ commands
    def _query(self, command: LineCommand, **values):
        if self._port is None or not self._port.is_open:
            raise DeviceDisconnected("the modulator port is not open", device="modulator",
                                     hint="open the modulator (or reconnect after an unplug)")
        line = command.send.format(**values)
        return self._port.query(line, command.expect, command.timeout_s or self.settings.timeout_s)

    def _identify(self) -> None:
        command = self.settings.commands.identify
        if command is None:
            return
        match = self._query(command)
        self.identity = match.groupdict().get("ident") or match.group(0)

    def load(self, masks: np.ndarray) -> None:
        masks = np.asarray(masks)
        if masks.ndim != 3 or masks.shape[0] < 1:
            raise DeviceMisconfigured(f"mask set must have shape (K, H, W) with K >= 1, got {masks.shape}",
                                      device="modulator", hint="check the mask family settings of the run")
        count = int(masks.shape[0])
        command = self.settings.commands.set_count
        if command is not None:
            match = self._query(command, count=count)
            echoed = match.groupdict().get("count")
            if echoed is not None and int(echoed) != count:
                raise DeviceFault(f"asked for {count} masks, controller set {echoed}", device="modulator")
        self.mask_count = count

    def show(self, index: int) -> None:
        index = int(index)
        if self.mask_count is not None and not 0 <= index < self.mask_count:
            raise DeviceMisconfigured(f"mask {index} outside 0..{self.mask_count - 1}", device="modulator",
                                      hint="the run asked for a mask that was not loaded")
        match = self._query(self.settings.commands.show, index=index)
        echoed = match.groupdict().get("index")
        if echoed is not None and int(echoed) != index:
            raise DeviceFault(f"asked to show mask {index}, controller acknowledged {echoed}", device="modulator")
        self.shown = index

    @property
    def settle_s(self) -> float:
        return float(self.settings.settle_s)

    def ready(self) -> bool:
        match = self._query(self.settings.commands.ready)
        return match.group("ready") == self.settings.ready_value
