"""Typed device errors.

Every error a driver raises is one of these, so the sequencer can react by
kind (retry a timeout, reconnect after a disconnect, stop on a fault) and the
user reads a message that says what to check.
"""

from __future__ import annotations


class DeviceError(Exception):
    """Base class of all device errors. ``device`` names the device (e.g. 'camera')."""

    hint = "check the device and its settings"

    def __init__(self, message: str, *, device: str = "device", hint: str | None = None):
        self.device = device
        self.detail = message
        if hint is not None:
            self.hint = hint
        super().__init__(f"{device}: {message} ({self.hint})")


class DeviceTimeout(DeviceError):
    """The device did not answer or deliver within its timeout."""

    hint = "check the cable, the trigger wiring and that the exposure is shorter than the timeout"


class DeviceDisconnected(DeviceError):
    """The device vanished (unplugged, port closed, power lost)."""

    hint = "check that the device is powered and plugged in, then reconnect"


class DeviceMisconfigured(DeviceError):
    """A setting is out of range or not supported by this device."""

    hint = "check the device's settings in the bench config ('maskrun drivers' lists each driver's settings)"


class DeviceFault(DeviceError):
    """The device reported a fault or delivered corrupted data."""

    hint = "check the device's own status display or log; power-cycle it if the fault persists"


class UnknownDriver(LookupError):
    """No installed driver has the requested name."""

    def __init__(self, kind: str, name: str, installed: list[str]):
        self.kind, self.name, self.installed = kind, name, installed
        names = ", ".join(sorted(installed)) or "(none)"
        super().__init__(f"no {kind} driver named {name!r}; installed {kind} drivers: {names}")


class DriverSettingsError(ValueError):
    """Driver settings from the config failed validation. ``problems`` holds (key path, message)."""

    def __init__(self, kind: str, name: str, problems: list[tuple[str, str]]):
        self.kind, self.name, self.problems = kind, name, problems
        lines = "; ".join(f"{path}: {msg}" for path, msg in problems)
        super().__init__(f"{kind} driver {name!r} settings: {lines}")
