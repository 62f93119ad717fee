"""Device interfaces: camera, modulator and safety box.

A driver is a small class implementing one of these. Settings come from the
bench config as a table; each driver declares a pydantic model ``Settings``
(unknown keys rejected) and receives the validated instance. Drivers never
import the daemon.

Units: seconds (``_s``), metres (``_m``), digital numbers (``_dn``).
"""

from __future__ import annotations

import abc
import dataclasses
import enum
from typing import Any, ClassVar

import numpy as np
from pydantic import BaseModel, ConfigDict


class DriverSettings(BaseModel):
    """Base of every driver's settings model: unknown keys are rejected."""

    model_config = ConfigDict(extra="forbid")


@dataclasses.dataclass
class Frame:
    """One camera frame as delivered by a driver.

    pixels: 2-D array in camera digital numbers (uint8/uint16), after ROI and binning.
    frame_id: the camera's own frame counter; must advance by at least 1 per new frame.
    timestamp_s: time the exposure ended, seconds since the epoch (time.time()).
    exposure_s: exposure actually used, seconds.
    metadata: the camera's own extra metadata (temperature, gain, ...), JSON-serialisable.
    """

    pixels: np.ndarray
    frame_id: int
    timestamp_s: float
    exposure_s: float
    metadata: dict[str, Any] = dataclasses.field(default_factory=dict)


class TriggerMode(str, enum.Enum):
    software = "software"
    hardware = "hardware"


@dataclasses.dataclass
class BenchContext:
    """What the bench builder hands to every driver besides its settings.

    optics: the simulated optical bench (simulators.optics.SimulatedOptics) when
        the bench is simulated, else None. Simulated drivers read and drive it.
    ports: names of simulated serial devices mapped to their pseudo-terminal paths
        (e.g. {'modulator': '/dev/pts/5'}); a driver setting port = 'sim:modulator'
        resolves through it.
    config_dir: folder of the bench config, for resolving relative file paths.
    wavelength_m: the laser's wavelength, metres (None when not known).
    modulator_profile: the ``drivers.modulator_profile.ModulatorProfile`` named by
        ``[modulator] profile`` (grey level -> phase), or None. A modulator that turns
        phases into grey levels uses it when its own settings name no response table,
        so the device and the mask builder quantize through the same table.
    """

    optics: Any = None
    ports: dict[str, str] = dataclasses.field(default_factory=dict)
    config_dir: str = "."
    wavelength_m: float | None = None  # the laser's ([laser] wavelength_m), for drivers whose response depends on it
    modulator_profile: Any = None

    def resolve_port(self, port: str) -> str:
        if port.startswith("sim:"):
            name = port[4:]
            if name not in self.ports:
                from .errors import DeviceMisconfigured

                raise DeviceMisconfigured(
                    f"port {port!r} names a simulated device that this bench does not start "
                    f"(started: {', '.join(self.ports) or 'none'})",
                    device="serial",
                    hint="add it under [simulation.firmware] or give a real port such as /dev/ttyUSB0",
                )
            return self.ports[name]
        return port


def checked_roi(value, sensor_shape: tuple[int, int], *, what: str = "sensor",
                hint: str = "give row0 + rows <= sensor rows and col0 + cols <= sensor cols") -> tuple[int, int, int, int]:
    """Validate a region of interest (row0, col0, rows, cols) against ``sensor_shape``.

    Returns it as a tuple of ints; raises DeviceMisconfigured naming the problem. Drivers call
    this from their ``roi`` setter so every camera refuses a bad ROI the same way.
    """
    from .errors import DeviceMisconfigured

    try:
        roi = tuple(int(v) for v in value)
        if len(roi) != 4:
            raise ValueError
    except (TypeError, ValueError):
        raise DeviceMisconfigured(f"roi must be (row0, col0, rows, cols), got {value!r}", device="camera") from None
    r0, c0, rows, cols = roi
    sr, sc = sensor_shape
    if r0 < 0 or c0 < 0 or rows < 1 or cols < 1 or r0 + rows > sr or c0 + cols > sc:
        raise DeviceMisconfigured(f"roi {roi} does not fit the {sr} x {sc} {what}", device="camera", hint=hint)
    return roi


class Device(abc.ABC):
    """Common life cycle: construct (no I/O), open(), close(); usable as a context manager."""

    Settings: ClassVar[type[DriverSettings]] = DriverSettings
    kind: ClassVar[str] = "device"

    def __init__(self, settings: DriverSettings, context: BenchContext | None = None):
        self.settings = settings
        self.context = context or BenchContext()

    @abc.abstractmethod
    def open(self) -> None: ...

    @abc.abstractmethod
    def close(self) -> None:
        """Release the device. Must be safe to call twice and after a failed open."""

    def __enter__(self):
        self.open()
        return self

    def __exit__(self, *exc):
        self.close()
        return False


class Camera(Device):
    """A camera. Pixel values are digital numbers; conversion to photons is the daemon's job."""

    kind = "camera"

    # --- geometry and format -------------------------------------------------
    @property
    @abc.abstractmethod
    def sensor_shape(self) -> tuple[int, int]:
        """Full sensor size (rows, columns) before ROI and binning."""

    @property
    @abc.abstractmethod
    def roi(self) -> tuple[int, int, int, int]:
        """Region of interest (row0, col0, rows, cols) in sensor pixels."""

    @roi.setter
    @abc.abstractmethod
    def roi(self, value: tuple[int, int, int, int]) -> None: ...

    @property
    def binning(self) -> int:
        return 1

    @binning.setter
    def binning(self, value: int) -> None:
        if value != 1:
            from .errors import DeviceMisconfigured

            raise DeviceMisconfigured(f"binning {value} not supported", device=self.kind)

    @property
    @abc.abstractmethod
    def bit_depth(self) -> int:
        """Bits per pixel of the delivered frames (e.g. 12 delivered in uint16)."""

    @property
    def max_dn(self) -> int:
        """Largest pixel value the ADC can deliver (clipped pixels sit here)."""
        return (1 << self.bit_depth) - 1

    @property
    def frame_shape(self) -> tuple[int, int]:
        r0, c0, rows, cols = self.roi
        b = self.binning
        return rows // b, cols // b

    # --- acquisition ---------------------------------------------------------
    @property
    @abc.abstractmethod
    def exposure_s(self) -> float: ...

    @exposure_s.setter
    @abc.abstractmethod
    def exposure_s(self, value: float) -> None: ...

    @property
    def exposure_range_s(self) -> tuple[float, float]:
        """(shortest, longest) exposure the camera accepts, seconds, as the device reports it.

        The daemon checks every exposure against it before anything is written (config read,
        'set_exposure', 'start'). Drivers that know their limits override it; the default
        (0, inf) means "not reported" (the setter is then the only check)."""
        return (0.0, float("inf"))

    @property
    def gain(self) -> float:
        """Analog gain setting in the camera's own units (1.0 = default)."""
        return 1.0

    @gain.setter
    def gain(self, value: float) -> None:
        if value != 1.0:
            from .errors import DeviceMisconfigured

            raise DeviceMisconfigured(f"gain {value} not supported", device=self.kind)

    @property
    def trigger_mode(self) -> TriggerMode:
        return TriggerMode.software

    @trigger_mode.setter
    def trigger_mode(self, value: TriggerMode) -> None:
        if TriggerMode(value) != TriggerMode.software:
            from .errors import DeviceMisconfigured

            raise DeviceMisconfigured(f"trigger mode {value} not supported", device=self.kind)

    def trigger(self) -> None:
        """Start one exposure (software trigger). Free-running cameras may ignore it."""

    @abc.abstractmethod
    def grab(self, timeout_s: float) -> Frame:
        """Return the next frame; raise DeviceTimeout if none arrives within timeout_s."""


class Modulator(Device):
    """Shows one of K masks (phase SLM, DMD, mask wheel)."""

    kind = "modulator"

    @abc.abstractmethod
    def load(self, masks: np.ndarray) -> None:
        """Load the mask set (K, H, W) complex; masks are then addressed by index."""

    @abc.abstractmethod
    def show(self, index: int) -> None:
        """Show mask ``index``; return once the device acknowledged (raise DeviceTimeout if not)."""

    @property
    @abc.abstractmethod
    def settle_s(self) -> float:
        """Time to wait after the acknowledgement before the mask is stable, seconds."""

    @abc.abstractmethod
    def ready(self) -> bool:
        """True when the device reports the shown mask is in place."""

    def check_masks(self, family: str, masks: np.ndarray) -> None:
        """Raise DeviceMisconfigured when this device cannot impose the mask family ``family`` (or these
        masks), naming the families it can; called when the bench is built from the config. Default: any."""

    def show_grey(self, grey: np.ndarray) -> None:
        """Show a raw grey-level image instead of a mask (calibration: the phase-response measurement).

        ``grey``: integer array (H, W) in mask pixels (the grid of the loaded masks), the levels the
        device accepts. It is mapped to device pixels exactly as a mask is (superpixel size, offset,
        active region, fixed level outside), but with NO response table, wavefront correction or
        phase ramp: the device shows these levels. Returns once acknowledged, like ``show``; then
        wait ``settle_s``. The next ``show(k)`` shows mask k again.

        Optional: the default refuses (DeviceMisconfigured) for devices that cannot show arbitrary
        images (a mask wheel, a serial controller with stored patterns).
        """
        from .errors import DeviceMisconfigured

        raise DeviceMisconfigured(f"the {type(self).__name__} modulator cannot show arbitrary grey images",
                                  device="modulator",
                                  hint="measure the response with a modulator that can (the 'display' or "
                                  "'simulated' driver)")


class SafetyBox(Device):
    """Laser interlock and beam shutter.

    Closed interlock = safe (doors shut, chain complete). The shutter may only
    open while the interlock reads closed. ``close`` (the device) must also close
    the shutter, and ``close_shutter`` must be safe to call at any time.
    """

    kind = "safety"

    @abc.abstractmethod
    def interlock_closed(self) -> bool: ...

    @abc.abstractmethod
    def shutter_is_open(self) -> bool: ...

    @abc.abstractmethod
    def open_shutter(self) -> None:
        """Open the beam shutter; refuse (DeviceFault) if the interlock is open."""

    @abc.abstractmethod
    def close_shutter(self) -> None: ...
