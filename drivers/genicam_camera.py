"""GenICam camera: any GigE Vision, USB3 Vision, CoaXPress or Camera Link camera through its
maker's GenTL producer, driven by the standard feature names (SFNC).

Optional extra ``genicam`` (``harvesters`` on the official ``genicam`` binding); imported on
open, so ``maskrun drivers`` lists the driver without it. Finding the producer and the camera:
``genicam_discovery``; features and units: ``genicam_features``; ROI steps: ``genicam_roi``;
pixel formats: ``genicam_pixels``; trigger and frame delivery: ``genicam_delivery``.

Trigger: ``software`` (``TriggerSoftware`` once per frame: the frame follows the mask),
``hardware`` (frame start on ``trigger_line``, for benches where the modulator triggers the
camera), or ``free-running`` for cameras without a trigger: each ``trigger()`` drops the frames
already delivered and ``grab`` then drops ``free_running_skip_frames`` more, so the frame
returned began exposing after the mask was in place (slower; refused with 0 skipped frames).

Frame ids and time stamps are the camera's (``BUFFER_INFO_FRAMEID``, ``TIMESTAMP_NS`` put on
the host clock at each acquisition start) when the producer gives them, else counted and
stamped on the host; ``metadata['frame_id_source']`` / ``['timestamp_source']`` say which.
Ids keep advancing across acquisition restarts (ROI change, reopen). Free-running, the ids count
the frames kept (the skipped frames would otherwise read as drops); the camera's own id is in
``metadata['camera_frame_id']``.
"""

from __future__ import annotations

import contextlib
import math
import threading
import time
from typing import Literal

from pydantic import Field, field_validator

from .base import Camera, DriverSettings, Frame, TriggerMode, checked_roi
from .errors import DeviceDisconnected, DeviceMisconfigured, DeviceTimeout
from .genicam_discovery import (
    CameraInfo,
    camera_infos,
    check_producer_loads,
    choose_camera,
    find_producers,
    import_harvesters,
)
from .genicam_features import Features, IntRange
from .genicam_delivery import _STATUS_PERIOD_S, GenicamDelivery, _as_device_error, _line  # noqa: F401
from .genicam_frames import FrameCounter, buffer_pixels, buffer_value  # noqa: F401
from .genicam_pixels import MONO_FORMATS, MONO_PREFERENCE, UnsupportedPixelFormat, layout_for
from .genicam_roi import AxisLimits, RoiRefused, plan_roi

__all__ = ["GenicamCamera"]

class GenicamCamera(GenicamDelivery, Camera):
    """Any GenICam camera (GigE Vision, USB3 Vision, CoaXPress, Camera Link) through its maker's GenTL producer."""

    class Settings(DriverSettings):
        """GenICam camera settings (feature names in the descriptions are the SFNC ones)."""

        producer: str | list[str] | None = Field(
            default=None, description="GenTL producer .cti file(s) or folder(s); default: $GENICAM_GENTL64_PATH; "
            "'sim:viky' = the simulated producer in the genicam wheel")
        device: str | None = Field(default=None, description="serial number, user-defined name or device id; "
                                   "may be left out when exactly one camera is present")

        @field_validator("device", mode="before")
        @classmethod
        def _device_as_text(cls, value):
            return str(value) if isinstance(value, int) and not isinstance(value, bool) else value
        pixel_format: str | None = Field(default=None, description="PixelFormat (Mono8, Mono12, Mono12p, ...); "
                                         "default: the camera's mono format, else its deepest mono format")
        luminance: bool = Field(default=False, description="accept colour formats and deliver luminance "
                                "(BT.601 weights) instead of refusing them")
        exposure_control: Literal["camera", "none"] = Field(
            default="camera", description="'camera': set ExposureTime; 'none': the camera keeps its own "
            "exposure, the value is only recorded (for cameras without ExposureTime)")
        gain: float | None = Field(default=None, description="Gain in the camera's unit (dB per SFNC); unset: leave it")
        black_level: float | None = Field(default=None, description="BlackLevel in the camera's unit; unset: leave it")
        binning: int = Field(default=1, ge=1, le=16, description="BinningHorizontal = BinningVertical")
        trigger: Literal["software", "hardware", "free-running"] = Field(
            default="software", description="how a frame follows the mask (see the driver's documentation)")
        trigger_line: str = Field(default="Line0", description="TriggerSource for the hardware trigger (Line0, Line1, ...)")
        trigger_activation: Literal["RisingEdge", "FallingEdge"] = Field(default="RisingEdge",
                                                                       description="TriggerActivation for hardware")
        free_running_skip_frames: int = Field(default=2, ge=0, le=100, description="free-running: frames dropped "
                                              "after each trigger so the frame kept started after the mask")
        frame_rate_hz: float | None = Field(default=None, gt=0, description="AcquisitionFrameRate (free-running "
                                            "cameras); unset: leave it")
        host_crop: bool = Field(default=False, description="when the camera cannot take the ROI (its steps, no "
                                "offsets), read the smallest window it takes and crop on the host")
        buffers: int = Field(default=4, ge=2, le=64, description="frame buffers queued at the producer")

    def __init__(self, settings, context=None):
        super().__init__(settings, context)
        self._lock = threading.RLock()
        self._harvester = None
        self._acquirer = None
        self._features: Features | None = None
        self._info: CameraInfo | None = None
        self._producer = ""
        self._layout = None
        self._sensor: tuple[int, int] | None = None
        self._roi: tuple[int, int, int, int] | None = None
        self._plan = None
        self._exposure_s = 0.01
        self._trigger = settings.trigger
        self._skip = 0
        self._counter = FrameCounter()
        self._status: dict = {}
        self._status_t = -math.inf
        if settings.trigger == "free-running" and settings.free_running_skip_frames < 1:
            raise DeviceMisconfigured("trigger = 'free-running' with free_running_skip_frames = 0 would deliver "
                                      "frames exposed before the mask was in place", device="camera",
                                      hint="use software or hardware trigger, or skip at least 1 frame")

    # ------------------------------------------------------------------ life cycle
    def open(self) -> None:
        with self._lock:
            if self._acquirer is not None:
                return
            try:
                self._connect()
                self._configure()
                self._start()
            except BaseException:
                self.close()
                raise

    def _connect(self) -> None:
        from genicam.gentl import GenericException as GenTLError

        producers = find_producers(self.settings.producer)
        Harvester = import_harvesters()
        for cti in producers:
            check_producer_loads(cti)
        h = Harvester()
        self._harvester = h
        for cti in producers:
            h.add_file(str(cti))
        try:
            h.update()
        except GenTLError as exc:
            raise DeviceDisconnected(f"the GenTL producer(s) {', '.join(map(str, producers))} failed to list "
                                     f"cameras: {_line(exc)}", device="camera") from None
        cams = camera_infos(h)
        index = choose_camera(cams, self.settings.device)
        self._info = cams[index]
        self._producer = ", ".join(str(p) for p in producers)
        try:
            self._acquirer = h.create(index)
        except GenTLError as exc:
            raise DeviceDisconnected(f"cannot open camera {self._info.serial or self._info.id}: {_line(exc)}",
                                     device="camera", hint="another program may be using it: close it, or power-"
                                     "cycle the camera") from None
        self._acquirer.num_buffers = self.settings.buffers
        self._features = Features(self._acquirer.remote_device.node_map)

    def _configure(self) -> None:
        f, s = self._features, self.settings
        self._stop()
        self._layout = self._choose_format()
        if f.writable("BinningHorizontal"):  # the sensor size is read unbinned
            f.set_int("BinningHorizontal", 1, "binning")
            if f.writable("BinningVertical"):
                f.set_int("BinningVertical", 1, "binning")
        elif s.binning != 1:
            f.node("BinningHorizontal", f"binning {s.binning}")  # names the missing feature
        self._sensor = self._read_sensor()
        if s.binning != 1:
            f.set_int("BinningHorizontal", s.binning, f"binning {s.binning}")
            f.set_int("BinningVertical", s.binning, f"binning {s.binning}")
        if s.gain is not None:
            f.set_if_present("GainAuto", "Off")
            f.set_float("Gain", s.gain, "gain")
        if s.black_level is not None:
            f.set_if_present("BlackLevelAuto", "Off")
            f.set_float("BlackLevel", s.black_level, "black level")
        if s.frame_rate_hz is not None:
            if f.has("AcquisitionFrameRateEnable"):
                f.node("AcquisitionFrameRateEnable", "the frame rate").value = True
            f.set_float("AcquisitionFrameRate", s.frame_rate_hz, "the frame rate", unit=" Hz")
        if s.exposure_control == "camera":
            self._exposure_s = f.exposure_s()
        self._apply_trigger(self._trigger)
        roi, self._roi = self._roi, None
        self._set_roi(roi if roi is not None else (0, 0, *self._sensor))

    def _choose_format(self):
        f, s = self._features, self.settings
        offered = f.enum_options("PixelFormat")
        name = s.pixel_format
        if name is None:
            current = str(f.get("PixelFormat", "the pixel format"))
            mono = [m for m in MONO_PREFERENCE if m in offered]
            name = current if current in MONO_FORMATS else mono[0] if mono else current
        try:
            layout = layout_for(name, luminance=s.luminance)
        except UnsupportedPixelFormat as exc:
            readable = [m for m in offered if m in MONO_FORMATS]
            mono_hint = f"set pixel_format to one of {', '.join(readable)}, or " if readable else ""
            raise DeviceMisconfigured(f"{exc}; the camera offers {', '.join(offered)}", device="camera",
                                      hint=f"{mono_hint}set luminance = true to accept colour as luminance") from None
        f.set_enum("PixelFormat", name, "the pixel format")
        return layout

    def _read_sensor(self) -> tuple[int, int]:
        f = self._features
        for off in ("OffsetX", "OffsetY"):
            if f.writable(off):
                f.set_int(off, 0, "the region of interest")
        for wname, hname in (("WidthMax", "HeightMax"), ("SensorWidth", "SensorHeight")):
            if f.has(wname) and f.has(hname):
                return int(f.get(hname)), int(f.get(wname))
        return f.int_range("Height", "the image size").max, f.int_range("Width", "the image size").max

    def close(self) -> None:
        with self._lock:
            ia, h = self._acquirer, self._harvester
            self._acquirer = self._harvester = self._features = None
            self._plan = None
        if ia is not None:
            with contextlib.suppress(Exception):
                ia.stop()
            with contextlib.suppress(Exception):
                ia.destroy()
        if h is not None:
            with contextlib.suppress(Exception):
                h.reset()

    def _start(self) -> None:
        try:
            self._acquirer.start()
        except Exception as exc:  # noqa: BLE001 - GenTL errors at start: the link or the settings
            raise _as_device_error(exc, "starting acquisition") from None
        self._counter.restart()  # the camera may restart its counter and clock: rebase on the next frame

    def _stop(self) -> None:
        if self._acquirer is not None and self._acquirer.is_acquiring():
            self._acquirer.stop()

    def _require_open(self):
        if self._acquirer is None:
            raise DeviceDisconnected("the GenICam camera is not open", device="camera", hint="open the camera first")
        return self._acquirer

    # ------------------------------------------------------------------ trigger

    # ------------------------------------------------------------------ geometry / format
    @property
    def sensor_shape(self) -> tuple[int, int]:
        """Full sensor (rows, cols); before open() the camera is opened briefly to read it."""
        if self._sensor is None:
            with self._lock:
                if self._acquirer is None:
                    try:
                        self.open()
                    finally:
                        self.close()
        return self._sensor

    def _axes(self) -> tuple[AxisLimits, AxisLimits]:
        f, b = self._features, self.settings.binning
        axes = []
        for size, off, full in (("Height", "OffsetY", self._sensor[0] // b), ("Width", "OffsetX", self._sensor[1] // b)):
            if f.writable(off):
                f.set_int(off, 0, "the region of interest")
            rng = f.int_range(size, "the region of interest")
            rng = IntRange(size, rng.min, min(rng.max, full), rng.inc)
            inc = f.int_range(off, "the region of interest").inc if f.writable(off) else None
            axes.append(AxisLimits(rng, inc, full))
        return axes[0], axes[1]

    @property
    def roi(self) -> tuple[int, int, int, int]:
        if self._roi is None:
            return (0, 0, *self._sensor) if self._sensor else (0, 0, 0, 0)
        return self._roi

    @roi.setter
    def roi(self, value) -> None:
        with self._lock:
            if self._acquirer is None:
                if self._sensor is not None:
                    value = checked_roi(value, self._sensor, what="camera sensor")
                self._roi = tuple(int(v) for v in value)  # checked against the camera at open
                return
            self._stop()
            try:
                self._set_roi(value)
            finally:
                self._start()

    def _set_roi(self, value) -> None:
        roi = checked_roi(value, self._sensor, what="camera sensor")
        rows_ax, cols_ax = self._axes()
        try:
            plan = plan_roi(roi, self.settings.binning, rows_ax, cols_ax, host_crop=self.settings.host_crop)
        except RoiRefused as exc:
            raise DeviceMisconfigured(str(exc), device="camera", hint="change the [grid] shape to a size the camera "
                                      "takes, or set host_crop = true in [camera.settings] to crop on the host") from None
        f = self._features
        y, x, h, w = plan.camera
        f.set_int("Width", w, "the region of interest")
        f.set_int("Height", h, "the region of interest")
        if cols_ax.offset_inc is not None:
            f.set_int("OffsetX", x, "the region of interest")
        if rows_ax.offset_inc is not None:
            f.set_int("OffsetY", y, "the region of interest")
        self._plan, self._roi = plan, roi

    @property
    def binning(self) -> int:
        return self.settings.binning

    @binning.setter
    def binning(self, value: int) -> None:
        if int(value) != self.settings.binning:
            raise DeviceMisconfigured(f"binning {value}: this camera's binning is set by the binning setting "
                                      f"({self.settings.binning})", device="camera", hint="change binning in [camera.settings]")

    @property
    def bit_depth(self) -> int:
        if self._layout is None:
            self.sensor_shape  # noqa: B018 - opens briefly to learn the format
        return self._layout.bit_depth if self._layout is not None else 8

    # ------------------------------------------------------------------ exposure and gain
    @property
    def exposure_s(self) -> float:
        return self._exposure_s

    @exposure_s.setter
    def exposure_s(self, value: float) -> None:
        value = float(value)
        if not math.isfinite(value) or value <= 0:
            raise DeviceMisconfigured(f"exposure {value} s is not a positive number of seconds", device="camera")
        with self._lock:
            if self.settings.exposure_control == "camera" and self._features is not None:
                self._exposure_s = self._features.set_exposure_s(value)
            else:
                self._exposure_s = value

    @property
    def gain(self) -> float:
        if self._features is not None and self._features.has("Gain"):
            return float(self._features.get("Gain"))
        return 1.0 if self.settings.gain is None else float(self.settings.gain)

    @gain.setter
    def gain(self, value: float) -> None:
        with self._lock:
            f = self._features
            if f is None:
                raise DeviceDisconnected("the GenICam camera is not open", device="camera")
            f.set_if_present("GainAuto", "Off")
            f.set_float("Gain", float(value), "gain")
