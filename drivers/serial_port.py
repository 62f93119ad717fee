"""Line-protocol transport over a serial port (pyserial), shared by the serial drivers.

``LinePort`` sends one command line and reads one reply line, and turns
every way this can go wrong into a typed device error within the timeout:

* no reply (or no terminator) before the timeout  -> DeviceTimeout
* port missing, busy, unplugged or I/O error        -> DeviceDisconnected (names the port)
* reply not ASCII/decodable or not the expected form -> DeviceFault (garbled)
* reply matches the device's error form ("ERR ...")   -> DeviceFault with the device's reason

It never blocks longer than the timeout: reads are done in short slices.
Stale bytes (for example a late reply to a command that timed out) are
discarded before each command.
"""

from __future__ import annotations

import codecs
import errno
import os
import re
import string
import termios
import time

import serial
from pydantic import BaseModel, ConfigDict, Field, field_validator

from .base import DriverSettings
from .errors import DeviceDisconnected, DeviceFault, DeviceTimeout

__all__ = ["LinePort", "LineCommand", "SerialLineSettings", "template_fields", "require_fields"]

_READ_SLICE_S = 0.02
#: everything a lost line can raise (pyserial wraps most, but not termios calls)
_LINE_ERRORS = (serial.SerialException, OSError, termios.error)


class LinePort:
    """One serial line speaking a command/reply line protocol.

    path: device path (already resolved, e.g. /dev/ttyUSB0 or a simulator symlink).
    baud: line speed. terminator: reply/command line ending (e.g. "\\n" or "\\r\\n").
    encoding: text encoding of the protocol (ASCII for most controllers).
    error_regex: replies matching it are device errors; a group named ``reason`` is quoted.
    device: name used in error messages (e.g. 'modulator').
    """

    def __init__(self, path: str, *, baud: int = 115200, terminator: str = "\n", encoding: str = "ascii",
                 error_regex: str | None = r"^ERR (?P<reason>.*)$", device: str = "serial",
                 write_timeout_s: float = 1.0):
        if not terminator:
            raise ValueError("terminator must not be empty")
        self.path = path
        self.baud = int(baud)
        self.terminator = terminator
        self._term_bytes = terminator.encode(encoding)
        self.encoding = encoding
        self.error_regex = re.compile(error_regex) if error_regex else None
        self.device = device
        self.write_timeout_s = float(write_timeout_s)
        self._serial: serial.Serial | None = None

    # ------------------------------------------------------------ life cycle
    @property
    def is_open(self) -> bool:
        return self._serial is not None and self._serial.is_open

    def open(self) -> None:
        """Open the port (exclusively). Raises DeviceDisconnected naming the port if it is missing or busy."""
        if self.is_open:
            return
        if not os.path.exists(self.path):
            raise DeviceDisconnected(
                f"serial port {self.path} does not exist",
                device=self.device,
                hint=f"check that the {self.device} is plugged in and powered, and that the port path is right",
            )
        try:
            port = serial.Serial(self.path, self.baud, timeout=_READ_SLICE_S,
                                 write_timeout=self.write_timeout_s, exclusive=True)
        except serial.SerialException as exc:
            raise self._open_error(exc) from exc
        except (OSError, termios.error) as exc:  # pragma: no cover - pyserial wraps most of these
            raise self._open_error(exc) from exc
        self._serial = port
        self._discard_input()

    def _open_error(self, exc: Exception) -> DeviceDisconnected:
        text = str(exc)
        err = getattr(exc, "errno", None)
        if "lock" in text.lower() or err in (errno.EBUSY, errno.EAGAIN, errno.EWOULDBLOCK):
            return DeviceDisconnected(
                f"serial port {self.path} is busy (another program holds it open): {text}",
                device=self.device,
                hint=f"close the other program (or the other maskrun bench) that uses {self.path}",
            )
        if err == errno.ENOENT or "No such file" in text:
            return DeviceDisconnected(
                f"serial port {self.path} does not exist",
                device=self.device,
                hint=f"check that the {self.device} is plugged in and the port path is right",
            )
        if err == errno.EACCES or "Permission denied" in text:
            return DeviceDisconnected(
                f"no permission to open serial port {self.path}",
                device=self.device,
                hint="add your user to the group that owns the port (often 'dialout') and log in again",
            )
        return DeviceDisconnected(f"could not open serial port {self.path}: {text}", device=self.device)

    def close(self) -> None:
        """Close the port. Safe to call twice."""
        port, self._serial = self._serial, None
        if port is not None:
            try:
                port.close()
            except _LINE_ERRORS:
                pass

    def reconnect(self, timeout_s: float = 2.0) -> None:
        """Close and reopen the same path, retrying until ``timeout_s`` (the device may be re-enumerating)."""
        self.close()
        deadline = time.monotonic() + max(0.0, timeout_s)
        while True:
            try:
                self.open()
                return
            except DeviceDisconnected:
                if time.monotonic() >= deadline:
                    raise
                time.sleep(0.05)

    def __enter__(self):
        self.open()
        return self

    def __exit__(self, *exc):
        self.close()
        return False

    # ------------------------------------------------------------------ I/O
    def _require_open(self) -> serial.Serial:
        if self._serial is None:
            raise DeviceDisconnected(f"serial port {self.path} is not open", device=self.device,
                                     hint="open the device first (or reconnect after an unplug)")
        return self._serial

    def _lost(self, exc: Exception) -> DeviceDisconnected:
        self.close()
        return DeviceDisconnected(f"lost serial port {self.path}: {exc}", device=self.device)

    def _discard_input(self) -> None:
        port = self._require_open()
        try:
            port.reset_input_buffer()
        except _LINE_ERRORS as exc:
            raise self._lost(exc) from exc

    def send(self, line: str) -> None:
        """Write one command line (the terminator is appended)."""
        port = self._require_open()
        try:
            data = (line + self.terminator).encode(self.encoding)
        except UnicodeEncodeError as exc:
            raise ValueError(f"command {line!r} cannot be sent in {self.encoding}") from exc
        try:
            port.write(data)
            port.flush()
        except serial.SerialTimeoutException as exc:
            raise DeviceTimeout(f"could not send {line!r} to {self.path} within {self.write_timeout_s} s",
                                device=self.device) from exc
        except _LINE_ERRORS as exc:
            raise self._lost(exc) from exc

    def read_line(self, timeout_s: float, *, command: str = "") -> str:
        """Read one reply line (without terminator) within ``timeout_s``."""
        port = self._require_open()
        deadline = time.monotonic() + max(0.0, float(timeout_s))
        buffer = bytearray()
        while True:
            try:
                chunk = port.read(max(1, port.in_waiting))
            except _LINE_ERRORS as exc:
                raise self._lost(exc) from exc
            if chunk:
                buffer += chunk
                end = buffer.find(self._term_bytes)
                if end >= 0:
                    raw = bytes(buffer[:end])
                    break
            if time.monotonic() >= deadline:
                what = f"reply to {command!r}" if command else "a reply"
                got = f" (partial: {bytes(buffer)!r})" if buffer else ""
                raise DeviceTimeout(f"no {what} from {self.path} within {timeout_s:g} s{got}", device=self.device)
        try:
            text = raw.decode(self.encoding)
        except UnicodeDecodeError as exc:
            raise DeviceFault(
                f"garbled reply to {command!r} from {self.path}: {raw[:40]!r} is not {self.encoding} text",
                device=self.device,
                hint="check the baud rate and the cable; power-cycle the device if it persists",
            ) from exc
        text = text.rstrip("\r")
        if not text.isprintable():
            raise DeviceFault(f"garbled reply to {command!r} from {self.path}: {text[:40]!r}", device=self.device,
                              hint="check the baud rate and the cable")
        return text

    def query(self, line: str, expect_regex: str | re.Pattern, timeout_s: float) -> re.Match:
        """Send ``line``, read one reply and return its full match against ``expect_regex``.

        Raises DeviceTimeout (no reply in time), DeviceDisconnected (port lost),
        DeviceFault (device error reply, or a reply not of the expected form).
        """
        pattern = re.compile(expect_regex) if isinstance(expect_regex, str) else expect_regex
        self._discard_input()
        self.send(line)
        reply = self.read_line(timeout_s, command=line)
        match = pattern.fullmatch(reply)
        if match is not None:
            return match
        if self.error_regex is not None:
            err = self.error_regex.match(reply)
            if err is not None:
                reason = err.groupdict().get("reason") or reply
                raise DeviceFault(f"refused {line!r}: {reason}", device=self.device,
                                  hint="read the reason; fix the cause on the device or in the settings")
        raise DeviceFault(
            f"unexpected reply to {line!r} from {self.path}: {reply[:60]!r} (expected /{pattern.pattern}/)",
            device=self.device,
            hint="check that the driver's command and reply settings match this controller and the baud rate",
        )


# --------------------------------------------------------------------------- settings pieces


def template_fields(template: str) -> set[str]:
    """Names of the ``{placeholders}`` in a command template."""
    return {name for _, name, _, _ in string.Formatter().parse(template) if name}


class LineCommand(BaseModel):
    """One command of a line protocol: what to send and the reply to expect.

    send: the command line without terminator; ``{placeholders}`` are filled by the driver
        (e.g. ``SHOW {index}``).
    expect: regular expression the whole reply must match; named groups carry values back
        (e.g. ``OK SHOW (?P<index>\\d+)``).
    timeout_s: reply timeout for this command; None uses the driver's ``timeout_s``.
    """

    model_config = ConfigDict(extra="forbid")

    send: str = Field(min_length=1)
    expect: str
    timeout_s: float | None = Field(default=None, gt=0)

    @field_validator("expect")
    @classmethod
    def _regex_compiles(cls, value: str) -> str:
        try:
            re.compile(value)
        except re.error as exc:
            raise ValueError(f"not a valid regular expression ({exc}): {value!r}") from None
        return value

    @field_validator("send")
    @classmethod
    def _template_parses(cls, value: str) -> str:
        try:
            template_fields(value)
        except ValueError as exc:
            raise ValueError(f"bad command template {value!r} ({exc}); write literal braces as {{{{ }}}}") from None
        return value


class SerialLineSettings(DriverSettings):
    """Settings shared by the serial line-protocol drivers.

    port: device path, or 'sim:<name>' for a simulated controller of this bench.
    baud: line speed, bits per second. terminator: line ending of commands and replies.
    encoding: text encoding. timeout_s: default reply timeout, seconds.
    error_reply: regex of the controller's error replies (group ``reason`` is quoted in messages).
    reconnect_timeout_s: how long ``reconnect()`` keeps retrying to reopen the port.
    """

    port: str = Field(description="device path (e.g. /dev/ttyUSB0) or 'sim:<name>' for a simulated controller")
    baud: int = Field(default=115200, gt=0, description="line speed, bits per second")
    terminator: str = Field(default="\n", min_length=1, description="line ending of commands and replies")
    encoding: str = Field(default="ascii", description="text encoding of the protocol")
    timeout_s: float = Field(default=1.0, gt=0, description="reply timeout, seconds (per command override: timeout_s)")
    error_reply: str = Field(default=r"^ERR (?P<reason>.*)$", description="regex of error replies; group 'reason' is quoted")
    reconnect_timeout_s: float = Field(default=2.0, ge=0, description="how long reconnect() retries to reopen the port, s")

    @field_validator("error_reply")
    @classmethod
    def _error_regex_compiles(cls, value: str) -> str:
        try:
            re.compile(value)
        except re.error as exc:
            raise ValueError(f"not a valid regular expression ({exc}): {value!r}") from None
        return value

    @field_validator("encoding")
    @classmethod
    def _known_encoding(cls, value: str) -> str:
        try:
            codecs.lookup(value)
        except LookupError:
            raise ValueError(f"unknown text encoding {value!r} (try 'ascii' or 'latin-1')") from None
        return value


def require_fields(command: LineCommand, name: str, fields: set[str], groups: set[str] = frozenset()) -> None:
    """Raise ValueError if ``command`` uses placeholders outside ``fields`` or lacks reply ``groups``."""
    unknown = template_fields(command.send) - fields
    if unknown:
        allowed = ", ".join("{" + f + "}" for f in sorted(fields)) or "none"
        raise ValueError(f"{name}.send uses unknown placeholder(s) {sorted(unknown)}; allowed: {allowed}")
    missing = set(groups) - set(re.compile(command.expect).groupindex)
    if missing:
        raise ValueError(f"{name}.expect must have the named group(s) {sorted(missing)}, e.g. (?P<{sorted(missing)[0]}>...)")
