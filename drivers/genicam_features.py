"""The camera's features by their standard names (GenICam SFNC), on a GenApi node map.

``Features(node_map)`` works on any ``genicam.genapi.NodeMap``: the remote device's node map
from a GenTL producer, or one loaded from a camera description XML (the tests do that). It
converts units (``ExposureTime`` is in microseconds per SFNC, the driver speaks seconds),
checks ranges and increments before writing, and names the feature in every error:

* a feature the camera lacks -> DeviceMisconfigured naming it and what it was needed for;
* a value out of range -> DeviceMisconfigured with the camera's limits;
* an integer off the camera's step (ROI, binning) -> DeviceMisconfigured with the nearest valid.
"""

from __future__ import annotations

import functools
import math
from dataclasses import dataclass
from typing import Any

from .errors import DeviceDisconnected, DeviceError, DeviceMisconfigured

__all__ = ["Features", "IntRange", "nearest_step"]

#: values copied into frame metadata when the camera has them (SFNC names): its status and what it uses
STATUS_FEATURES = ("DeviceTemperature", "SensorTemperature", "DeviceTemperatureStatus", "Gain", "BlackLevel")
#: unit text of a float feature -> seconds per unit (SFNC gives ExposureTime in us)
_TIME_UNITS = {"us": 1e-6, "µs": 1e-6, "\u00b5s": 1e-6, "ms": 1e-3, "s": 1.0, "ns": 1e-9}


_FREE_RUN = ("set trigger = \"hardware\" with trigger_line if the camera has trigger lines, or trigger = "
             "\"free-running\" (frames are then kept only after free_running_skip_frames more frames)")
#: what to do when the camera lacks a feature the config needs
_MISSING_HINTS = {
    "ExposureTime": "set exposure_control = \"none\" in [camera.settings] (the camera keeps its own exposure and "
                    "the value is only recorded)",
    "TriggerMode": _FREE_RUN, "TriggerSource": _FREE_RUN, "TriggerSoftware": _FREE_RUN,
}


@dataclass(frozen=True)
class IntRange:
    """An integer feature's valid values: min, min + inc, ... up to max."""

    name: str
    min: int
    max: int
    inc: int

    def valid(self, value: int) -> bool:
        return self.min <= value <= self.max and (value - self.min) % self.inc == 0

    def describe(self) -> str:
        return f"{self.name} {self.min}..{self.max}" + (f" in steps of {self.inc}" if self.inc > 1 else "")


def nearest_step(value: int, rng: IntRange, *, upward: bool | None = None) -> int:
    """The valid value of ``rng`` nearest ``value`` (``upward``: the smallest valid >= value, or
    the largest valid <= value for False), clamped to the range."""
    span = (rng.max - rng.min) // rng.inc
    k = (value - rng.min) / rng.inc
    k = math.ceil(k) if upward else math.floor(k) if upward is False else round(k)
    return rng.min + rng.inc * min(max(k, 0), span)


def _guarded(method):
    """Turn any exception but a DeviceError raised inside ``method`` into the device error it means."""

    @functools.wraps(method)
    def wrapper(self, *args, **kwargs):
        try:
            return method(self, *args, **kwargs)
        except DeviceError:
            raise
        except Exception as exc:  # noqa: BLE001 - GenApi, GenTL and the port raise their own types
            subject = f" {args[0]}" if args and isinstance(args[0], str) else ""
            raise self._refusal(exc, f"{method.__name__.strip('_').replace('_', ' ')}{subject}") from None

    return wrapper


class Features:
    """Typed access to one camera's GenApi node map, errors naming the SFNC feature."""

    def __init__(self, node_map, device: str = "camera"):
        self.node_map = node_map
        self.device = device

    # ------------------------------------------------------------------ nodes
    def _raw(self, name: str):
        try:
            node = self.node_map.get_node(name)
        except Exception:  # noqa: BLE001 - GenApi raises LogicalErrorException for a missing node
            return None
        return node

    @_guarded
    def has(self, name: str) -> bool:
        """True when the camera implements ``name`` and it can be used now."""
        from genicam import genapi

        node = self._raw(name)
        return node is not None and genapi.is_implemented(node) and genapi.is_available(node)

    @_guarded
    def writable(self, name: str) -> bool:
        from genicam import genapi

        return self.has(name) and genapi.is_writable(self._raw(name))

    def node(self, name: str, needed_for: str):
        """The node, or DeviceMisconfigured saying the camera lacks it and what needed it."""
        if not self.has(name):
            raise DeviceMisconfigured(
                f"the camera has no {name} feature (needed for {needed_for})", device=self.device,
                hint=_MISSING_HINTS.get(name, f"remove {needed_for} from the camera settings, or use a camera "
                                        f"that has {name} (the maker's documentation lists its features)"))
        return self._raw(name)

    def _refusal(self, exc: Exception, what: str) -> DeviceError:
        """A failed feature access as a device error: a transport error (the port's own exception, a
        GenTL error, an OS error) means the camera is gone; GenApi's own exceptions mean it refused."""
        from genicam import genapi

        if isinstance(exc, genapi.GenericException) and not isinstance(exc, genapi.TimeoutException):
            return DeviceMisconfigured(f"the camera refused {what}: {_first_line(exc)}", device=self.device)
        return DeviceDisconnected(f"the camera did not answer while {what} ({_first_line(exc)})", device=self.device)

    def _write(self, node, name: str, value) -> None:
        try:
            node.value = value
        except Exception as exc:  # noqa: BLE001 - GenApi's own message names the limit it hit
            raise self._refusal(exc, f"{name} = {value!r}") from None

    # ------------------------------------------------------------------ typed access
    @_guarded
    def get(self, name: str, needed_for: str = "reading it") -> Any:
        node = self.node(name, needed_for)
        try:
            return node.value
        except Exception as exc:  # noqa: BLE001
            raise self._refusal(exc, f"reading {name}") from None

    @_guarded
    def int_range(self, name: str, needed_for: str) -> IntRange:
        node = self.node(name, needed_for)
        inc = int(node.inc) if hasattr(node, "inc") else 1
        return IntRange(name, int(node.min), int(node.max), max(1, inc))

    @_guarded
    def set_int(self, name: str, value: int, needed_for: str) -> int:
        rng = self.int_range(name, needed_for)
        value = int(value)
        if not rng.valid(value):
            raise DeviceMisconfigured(
                f"{name} = {value} is not a value the camera takes ({rng.describe()}); nearest valid: "
                f"{nearest_step(value, rng)}", device=self.device)
        node = self.node(name, needed_for)
        self._write(node, name, value)
        return int(node.value)

    @_guarded
    def float_limits(self, name: str, needed_for: str) -> tuple[float, float]:
        node = self.node(name, needed_for)
        return float(node.min), float(node.max)

    @_guarded
    def set_float(self, name: str, value: float, needed_for: str, *, scale: float = 1.0, unit: str = "") -> float:
        """Write ``value`` (in the driver's unit; camera value = value / scale); read back in the driver's unit."""
        node = self.node(name, needed_for)
        raw = float(value) / scale
        lo, hi = float(node.min), float(node.max)
        if not math.isfinite(raw) or raw < lo or raw > hi:
            raise DeviceMisconfigured(
                f"{needed_for} {value:g}{unit} is outside what the camera takes: {lo * scale:g}{unit} to "
                f"{hi * scale:g}{unit} ({name} {lo:g} to {hi:g} {_unit(node)})".rstrip(), device=self.device,
                hint=f"choose a value between {lo * scale:g}{unit} and {hi * scale:g}{unit}")
        if getattr(node, "has_inc", None) and node.has_inc():
            inc = float(node.inc)
            raw = lo + round((raw - lo) / inc) * inc
        self._write(node, name, min(max(raw, lo), hi))
        return float(node.value) * scale

    @_guarded
    def set_enum(self, name: str, symbol: str, needed_for: str) -> None:
        node = self.node(name, needed_for)
        options = self.enum_options(name)
        if symbol not in options:
            raise DeviceMisconfigured(f"{name} = {symbol!r} is not offered by the camera (it offers: "
                                      f"{', '.join(options) or 'nothing'})", device=self.device,
                                      hint=f"choose one of {', '.join(options)}")
        if node.value != symbol:
            self._write(node, name, symbol)

    @_guarded
    def enum_options(self, name: str) -> list[str]:
        """Symbols of the enumeration entries the camera offers now."""
        from genicam import genapi

        node = self._raw(name)
        if node is None or not self.has(name):
            return []
        out = []
        for entry in node.entries:
            if genapi.is_available(entry):
                out.append(entry.symbolic)
        return out

    def enum_symbol_of(self, name: str, value: int) -> str | None:
        """The symbol whose integer value is ``value`` (pixel format codes in buffers), None if none."""
        node = self._raw(name)
        if node is None:
            return None
        for entry in node.entries:
            if int(entry.value) == int(value):
                return entry.symbolic
        return None

    @_guarded
    def execute(self, name: str, needed_for: str) -> None:
        node = self.node(name, needed_for)
        try:
            node.execute()
        except Exception as exc:  # noqa: BLE001
            raise self._refusal(exc, f"the command {name}") from None

    @_guarded
    def set_if_present(self, name: str, symbol: str) -> bool:
        """Set an enumeration when the camera has it and offers ``symbol`` (auto modes off); True if set."""
        if self.writable(name) and symbol in self.enum_options(name):
            self.set_enum(name, symbol, f"{name} = {symbol}")
            return True
        return False

    # ------------------------------------------------------------------ exposure
    def _exposure_scale(self) -> float:
        node = self.node("ExposureTime", "the exposure")
        return _TIME_UNITS.get(_unit(node), 1e-6)  # SFNC: microseconds when the camera gives no unit

    @_guarded
    def exposure_s(self) -> float:
        return float(self.get("ExposureTime", "the exposure")) * self._exposure_scale()

    @_guarded
    def set_exposure_s(self, exposure_s: float) -> float:
        """Write the exposure (seconds) as ExposureTime (camera's unit, us per SFNC); return what it uses."""
        self.set_if_present("ExposureAuto", "Off")
        self.set_if_present("ExposureMode", "Timed")
        return self.set_float("ExposureTime", exposure_s, "the exposure", scale=self._exposure_scale(), unit=" s")

    # ------------------------------------------------------------------ trigger
    @_guarded
    def set_trigger(self, source: str, activation: str | None = None) -> None:
        """Frame start on ``source`` ('Software' or a line such as 'Line0')."""
        what = "the software trigger" if source == "Software" else f"the hardware trigger on {source}"
        if self.has("TriggerSelector") and "FrameStart" in self.enum_options("TriggerSelector"):
            self.set_enum("TriggerSelector", "FrameStart", what)
        self.set_if_present("AcquisitionMode", "Continuous")
        self.set_enum("TriggerMode", "On", what)
        self.set_enum("TriggerSource", source, what)
        if activation is not None:
            self.set_enum("TriggerActivation", activation, what)
        if source == "Software":
            self.node("TriggerSoftware", what)

    @_guarded
    def trigger_off(self) -> None:
        if self.writable("TriggerMode") and "Off" in self.enum_options("TriggerMode"):
            self.set_enum("TriggerMode", "Off", "free running")

    @_guarded
    def software_trigger(self) -> None:
        self.execute("TriggerSoftware", "the software trigger")

    # ------------------------------------------------------------------ read-only status
    def status_values(self) -> dict[str, Any]:
        out: dict[str, Any] = {}
        for name in STATUS_FEATURES:
            from genicam import genapi

            node = self._raw(name)
            if node is None or not self.has(name) or not genapi.is_readable(node):
                continue
            try:
                value = node.value
            except Exception:  # noqa: BLE001 - a status value that cannot be read is left out, not guessed
                continue
            out[name] = value if isinstance(value, (int, float, str, bool)) else str(value)
        return out


def _unit(node) -> str:
    try:
        return str(node.unit or "").strip()
    except Exception:  # noqa: BLE001
        return ""


def _first_line(exc: Exception) -> str:
    text = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
    return text.split(" : ")[0]
