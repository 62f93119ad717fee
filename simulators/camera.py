"""Simulated camera: the simulated bench's light through a linear (EMVA 1288) noise model.

Photons come from ``context.optics.expected_photons(exposure_s)`` (the shown mask's
diffraction pattern while the shutter is open, nothing while it is closed) or, when
the camera runs on its own (no optics, e.g. in the conformance kit), from a uniform
illumination of ``standalone_photon_rate_per_s`` photons per pixel per second. The
photons are turned into digital numbers by ``maskrun.simulators.camera_model.CameraNoiseModel``
(photon shot noise, photo-response non-uniformity, dark current, hot pixels, read noise, gain, offset, full well,
quantisation, ADC clipping). Frames are deterministic for a given ``seed``.

Acquisition:
* software trigger: ``trigger()`` starts an exposure with the optics as they are at that
  moment; ``grab()`` returns it. ``grab()`` with no exposure pending starts one itself.
* hardware trigger: ``grab()`` waits for a pulse on the optics trigger line
  (``optics.wait_trigger``), then exposes. Latched pulses are cleared when the mode is set.
* ``real_time`` (default True): a frame is ready ``exposure_s + readout_latency_s`` after its
  trigger and ``grab`` waits for it; False delivers at once (fast tests, compressed soak runs).
* ``noise_rendering``: ``"exact"`` (default) draws every frame through
  ``CameraNoiseModel.render`` (Poisson shot and dark noise, Gaussian read noise): about 60 ms
  per megapixel. ``"fast"`` renders in well under 5 ms per megapixel, so the simulated bench
  can run 1 MP at 100 frames/s: the mean and spread of every pixel are computed once per light
  (mask shown, shutter, exposure, gain, ROI), and each frame is mean + spread x a window of a
  bank of normal values drawn once (``camera_model.render_fast``, ``fast_noise_bank``). Mean
  and variance follow the same EMVA 1288 linear relations as the exact mode; the shot noise
  is Gaussian instead of Poisson (higher moments differ, noticeable only at a few electrons),
  and frames are windows of one bank (independent at each pixel, not as whole images). The
  frame is rendered before the wait for the end of the exposure, so it is ready on time.

Frame ids start at 1 and advance by one per frame read out.

Injected faults (``faults``: list of {kind, at_frame, count}); ``at_frame`` counts calls of
``grab`` from 1, and calls at_frame .. at_frame+count-1 are affected:

* ``timeout``: no frame arrives; ``grab`` waits its whole ``timeout_s`` and raises DeviceTimeout
  (the frame id does not advance).

Each ``grab`` stands for one exposure: under a ``timeout`` or ``stale`` fault the exposure
started by the preceding ``trigger()`` is lost, so a retake (trigger + grab) sees the optics
as they are at the retake.
* ``dropped``: one frame is lost inside the camera: the frame delivered skips one id.
* ``stale``: the previous frame is delivered again, same pixels, id and timestamp.
* ``disconnect``: DeviceDisconnected; every later call raises it too until the camera is
  closed and opened again (a reconnect).
* ``corrupted``: the frame fails the camera's integrity check: DeviceFault is raised and the
  frame id is used up (the next good frame shows a gap of one id).

Rendering (exact, fast, binning) and the noise model from the settings: ``camera_render``.
"""

from __future__ import annotations

import math
import threading
import time
from typing import Literal

import numpy as np
from pydantic import BaseModel, ConfigDict, Field, field_validator, model_validator

from .camera_model import CameraNoiseModel
from .camera_model import fast_levels as _fast_levels  # noqa: F401
from .camera_model import fast_noise_bank as _fast_noise_bank  # noqa: F401
from .camera_model import render_fast as _render_fast  # noqa: F401
from .camera_render import SimulatedCameraRendering, _noise_model_from

from maskrun.drivers.base import Camera, DriverSettings, Frame, TriggerMode, checked_roi
from maskrun.drivers.errors import DeviceDisconnected, DeviceFault, DeviceMisconfigured, DeviceTimeout

__all__ = ["SimulatedCamera", "CameraFault"]

_DEFAULT_MODEL = CameraNoiseModel()


class CameraFault(BaseModel):
    """One injected camera fault: kind, at_frame (1-based grab call), count (consecutive grabs)."""

    model_config = ConfigDict(extra="forbid")

    kind: Literal["timeout", "dropped", "stale", "disconnect", "corrupted"]
    at_frame: int = Field(ge=1)
    count: int = Field(default=1, ge=1)


class SimulatedCamera(SimulatedCameraRendering, Camera):
    """A camera simulated from the bench's optics with an EMVA 1288 linear noise model."""

    class Settings(DriverSettings):
        """Simulated camera settings (units in the names)."""

        sensor_shape: tuple[int, int] | None = Field(
            default=None, description="sensor (rows, cols); default: the simulated bench's sensor, or 256 x 256 alone")
        quantum_efficiency: float = Field(default=_DEFAULT_MODEL.quantum_efficiency, description="fraction of photons converted to electrons")
        gain_dn_per_e: float = Field(default=_DEFAULT_MODEL.gain_dn_per_e, description="system gain K at gain 1, DN per electron")
        read_noise_e: float = Field(default=_DEFAULT_MODEL.read_noise_e, description="read noise, electrons rms")
        dark_current_e_per_s: float = Field(default=_DEFAULT_MODEL.dark_current_e_per_s, description="mean dark electrons per pixel per second")
        offset_dn: float = Field(default=_DEFAULT_MODEL.offset_dn, description="black level, DN")
        bit_depth: int = Field(default=_DEFAULT_MODEL.bit_depth, description="ADC bits (frames are uint8 up to 8, else uint16)")
        full_well_e: float = Field(default=_DEFAULT_MODEL.full_well_e, description="electrons a pixel holds")
        hot_pixel_fraction: float = Field(default=_DEFAULT_MODEL.hot_pixel_fraction, description="fraction of pixels with a high dark current")
        hot_pixel_dark_current_e_per_s: float = Field(default=_DEFAULT_MODEL.hot_pixel_dark_current_e_per_s, description="dark current of hot pixels, electrons per second")
        prnu_fraction: float = Field(default=_DEFAULT_MODEL.prnu_fraction, description="photo-response non-uniformity (EMVA 1288 PRNU): per-pixel response spread, std / mean")
        exposure_s: float = Field(default=0.01, gt=0, description="exposure at start, seconds")
        min_exposure_s: float = Field(default=1e-5, gt=0, description="shortest exposure the camera accepts, s")
        max_exposure_s: float = Field(default=10.0, gt=0, description="longest exposure the camera accepts, s")
        gain: float = Field(default=1.0, description="analog gain factor at start (multiplies gain_dn_per_e)")
        max_gain: float = Field(default=16.0, ge=1.0, description="largest analog gain factor")
        readout_latency_s: float = Field(default=0.0, ge=0, description="time from the end of the exposure to the frame, s")
        real_time: bool = Field(default=True, description="wait exposure + readout before a frame is ready")
        noise_rendering: Literal["exact", "fast"] = Field(
            default="exact", description="'exact' (Poisson, ~60 ms per megapixel) or 'fast' (Gaussian shot noise "
            "with the same mean and variance from a precomputed bank, < 5 ms per megapixel)")
        seed: int = Field(default=0, description="random seed of the noise and the hot pixel positions")
        standalone_photon_rate_per_s: float = Field(
            default=1000.0, ge=0, description="photons per pixel per second when there is no simulated bench")
        sensor_temperature_c: float = Field(default=20.0, description="sensor temperature reported in the frame metadata, deg C")
        faults: list[CameraFault] = Field(default_factory=list, description="injected faults: {kind, at_frame, count}")

        @field_validator("sensor_shape")
        @classmethod
        def _positive_shape(cls, value):
            if value is not None and (value[0] < 1 or value[1] < 1):
                raise ValueError(f"sensor_shape must be two positive sizes [rows, cols], got {list(value)}")
            return value

        @model_validator(mode="after")
        def _noise_model_valid(self):
            try:
                _noise_model_from(self, 1.0)
            except ValueError as exc:
                raise ValueError(str(exc)) from None
            if self.min_exposure_s > self.max_exposure_s:
                raise ValueError("min_exposure_s must not exceed max_exposure_s")
            if not self.min_exposure_s <= self.exposure_s <= self.max_exposure_s:
                raise ValueError(
                    f"exposure_s {self.exposure_s} outside [{self.min_exposure_s}, {self.max_exposure_s}] s")
            if not 1.0 <= self.gain <= self.max_gain:
                raise ValueError(f"gain {self.gain} outside [1, {self.max_gain}]")
            return self

    def __init__(self, settings, context=None):
        super().__init__(settings, context)
        s = self.settings
        optics = self.context.optics
        if s.sensor_shape is not None:
            self._sensor_shape = (int(s.sensor_shape[0]), int(s.sensor_shape[1]))
        elif optics is not None:
            self._sensor_shape = tuple(optics.sensor_shape)
        else:
            self._sensor_shape = (256, 256)
        self._roi = (0, 0) + self._sensor_shape
        self._binning = 1
        self._exposure_s = float(s.exposure_s)
        self._gain = float(s.gain)
        self._trigger_mode = TriggerMode.software
        self.noise_model = _noise_model_from(s, self._gain)
        self._hot_full = self.noise_model.hot_pixel_mask(self._sensor_shape, s.seed)
        self._prnu_full = self.noise_model.prnu_gain_map(self._sensor_shape, s.seed)
        self._rng = np.random.default_rng(s.seed)
        self._photons = np.zeros(self._sensor_shape, dtype=np.float64)
        self._pending: list[tuple[float, float, np.ndarray, dict]] = []  # (t_trigger, exposure, photons, sim)
        self._lock = threading.RLock()
        self._is_open = False
        self._disconnected = False
        self._frame_id = 0
        self._grab_count = 0
        self._last_frame: Frame | None = None
        self._faults = list(s.faults)
        self._fast_levels: dict = {}  # light key -> (mean_dn, sd_dn, top, pattern kept alive)
        self._fast_bank: np.ndarray | None = None

    # ---------------------------------------------------------- life cycle
    def open(self) -> None:
        optics = self.context.optics
        if optics is not None and tuple(optics.sensor_shape) != self._sensor_shape:
            raise DeviceMisconfigured(
                f"sensor_shape {list(self._sensor_shape)} differs from the simulated bench's sensor "
                f"{list(optics.sensor_shape)}",
                device="camera", hint="remove sensor_shape from the camera settings or make the two agree")
        with self._lock:
            self._is_open = True
            self._disconnected = False
            self._pending.clear()

    def close(self) -> None:
        with self._lock:
            self._is_open = False
            self._pending.clear()

    # --------------------------------------------------- geometry / format
    @property
    def sensor_shape(self) -> tuple[int, int]:
        return self._sensor_shape

    @property
    def roi(self) -> tuple[int, int, int, int]:
        return self._roi

    @roi.setter
    def roi(self, value) -> None:
        r0, c0, rows, cols = checked_roi(value, self._sensor_shape)
        if rows < self._binning or cols < self._binning:
            raise DeviceMisconfigured(f"roi {rows} x {cols} is smaller than the binning {self._binning}",
                                      device="camera")
        with self._lock:
            self._roi = (r0, c0, rows, cols)

    @property
    def binning(self) -> int:
        return self._binning

    @binning.setter
    def binning(self, value: int) -> None:
        b = int(value)
        if b < 1 or b > 8 or b != value:
            raise DeviceMisconfigured(f"binning {value!r} not supported (whole numbers 1..8)", device="camera")
        _, _, rows, cols = self._roi
        if b > rows or b > cols:
            raise DeviceMisconfigured(f"binning {b} larger than the roi {rows} x {cols}", device="camera")
        with self._lock:
            self._binning = b

    @property
    def bit_depth(self) -> int:
        return int(self.noise_model.bit_depth)

    @property
    def prnu_gain_map(self) -> np.ndarray | None:
        """The sensor's per-pixel response factors (full sensor, float32, mean 1), None without PRNU."""
        return None if self._prnu_full is None else self._prnu_full.copy()

    # --------------------------------------------------------- acquisition
    @property
    def exposure_range_s(self) -> tuple[float, float]:
        return (float(self.settings.min_exposure_s), float(self.settings.max_exposure_s))

    @property
    def exposure_s(self) -> float:
        return self._exposure_s

    @exposure_s.setter
    def exposure_s(self, value: float) -> None:
        s = self.settings
        value = float(value)
        if not math.isfinite(value) or not s.min_exposure_s <= value <= s.max_exposure_s:
            raise DeviceMisconfigured(
                f"exposure {value} s outside [{s.min_exposure_s}, {s.max_exposure_s}] s", device="camera",
                hint="choose an exposure within the camera's range (min_exposure_s / max_exposure_s)")
        self._exposure_s = value

    @property
    def gain(self) -> float:
        return self._gain

    @gain.setter
    def gain(self, value: float) -> None:
        value = float(value)
        if not math.isfinite(value) or not 1.0 <= value <= self.settings.max_gain:
            raise DeviceMisconfigured(f"gain {value} outside [1, {self.settings.max_gain}]", device="camera")
        with self._lock:
            self._gain = value
            self.noise_model = _noise_model_from(self.settings, value)

    @property
    def trigger_mode(self) -> TriggerMode:
        return self._trigger_mode

    @trigger_mode.setter
    def trigger_mode(self, value) -> None:
        try:
            mode = TriggerMode(value)
        except ValueError:
            raise DeviceMisconfigured(f"unknown trigger mode {value!r} (software or hardware)", device="camera") from None
        if mode is TriggerMode.hardware:
            if self.context.optics is None:
                raise DeviceMisconfigured("hardware trigger needs the simulated bench's trigger line",
                                          device="camera", hint="use trigger_mode software when running alone")
            self.context.optics.clear_triggers()
        with self._lock:
            self._trigger_mode = mode
            self._pending.clear()

    def _check_open(self) -> None:
        if self._disconnected:
            raise DeviceDisconnected("the simulated camera link is down", device="camera",
                                     hint="close and reopen the camera (reconnect)")
        if not self._is_open:
            raise DeviceDisconnected("the camera is not open", device="camera", hint="open the camera first")

    def _start_exposure(self) -> None:
        """Snapshot the light for one exposure starting now."""
        optics = self.context.optics
        exposure = self._exposure_s
        if self.settings.noise_rendering == "fast":
            pattern = None if optics is None else optics.light_now()
            sim = {} if optics is None else {"sim_shown_mask": optics.shown_mask, "sim_shutter_open": optics.shutter_open}
            self._pending.append((time.monotonic(), exposure, ("fast", pattern), sim))
            return
        if optics is None:
            photons = np.full(self._sensor_shape, self.settings.standalone_photon_rate_per_s * exposure)
            sim = {}
        else:
            photons = optics.expected_photons(exposure, out=self._photons).copy()
            sim = {"sim_shown_mask": optics.shown_mask, "sim_shutter_open": optics.shutter_open}
        self._pending.append((time.monotonic(), exposure, photons, sim))

    def trigger(self) -> None:
        """Software trigger: start one exposure now (ignored in hardware trigger mode)."""
        with self._lock:
            self._check_open()
            if self._trigger_mode is TriggerMode.software:
                if len(self._pending) >= 8:
                    raise DeviceFault("8 exposures triggered and not read out", device="camera",
                                      hint="grab each frame before triggering the next")
                self._start_exposure()

    def _fault_now(self) -> CameraFault | None:
        n = self._grab_count
        for fault in self._faults:
            if fault.at_frame <= n < fault.at_frame + fault.count:
                return fault
        return None

    def grab(self, timeout_s: float) -> Frame:
        """Return the next frame; DeviceTimeout if none within ``timeout_s`` seconds."""
        timeout_s = max(0.0, float(timeout_s))
        t_call = time.monotonic()
        with self._lock:
            self._check_open()
            self._grab_count += 1
            fault = self._fault_now()
            if fault is not None and fault.kind == "disconnect":
                self._disconnected = True
                self._pending.clear()
                self._faults.remove(fault)  # a reconnect restores the link
                self._check_open()
            lost = fault is not None and (fault.kind == "timeout" or (fault.kind == "stale" and self._last_frame))
            if lost and self._pending:
                self._pending.pop(0)  # the exposure this grab stood for is lost
        if fault is not None and fault.kind == "timeout":
            time.sleep(timeout_s)
            raise DeviceTimeout(f"no frame within {timeout_s:g} s (injected timeout at grab {self._grab_count})",
                                device="camera")
        if fault is not None and fault.kind == "stale" and self._last_frame is not None:
            return self._last_frame

        if self._trigger_mode is TriggerMode.hardware:
            if not self.context.optics.wait_trigger(timeout_s):
                raise DeviceTimeout(f"no hardware trigger within {timeout_s:g} s", device="camera",
                                    hint="check that the modulator sends its trigger (trigger output on) "
                                         "and the trigger wiring")
            with self._lock:
                self._start_exposure()
        with self._lock:
            if not self._pending:
                self._start_exposure()
            t_trigger, exposure, photons, sim = self._pending.pop(0)
            if isinstance(photons, tuple):  # fast rendering: before the wait, so the frame is ready on time
                pixels = self._render_fast(photons[1], exposure)
        if self.settings.real_time:
            ready_at = t_trigger + exposure + self.settings.readout_latency_s
            if ready_at - t_call > timeout_s:
                time.sleep(max(0.0, t_call + timeout_s - time.monotonic()))
                raise DeviceTimeout(
                    f"frame needs {exposure + self.settings.readout_latency_s:g} s (exposure + readout) but the "
                    f"timeout is {timeout_s:g} s", device="camera",
                    hint="give a grab timeout longer than the exposure plus the readout latency")
            time.sleep(max(0.0, ready_at - time.monotonic()))
        with self._lock:
            if not isinstance(photons, tuple):
                pixels = self._render(photons, exposure)
            self._frame_id += 2 if (fault is not None and fault.kind == "dropped") else 1
            if fault is not None and fault.kind == "corrupted":
                raise DeviceFault(f"frame {self._frame_id} failed its integrity check (corrupted in transfer)",
                                  device="camera", hint="check the camera cable; the frame is lost")
            frame = Frame(
                pixels=pixels,
                frame_id=self._frame_id,
                timestamp_s=time.time(),
                exposure_s=exposure,
                metadata={
                    "sensor_temperature_c": float(self.settings.sensor_temperature_c),
                    "gain": self._gain,
                    "gain_dn_per_e": float(self.noise_model.gain_dn_per_e),
                    "offset_dn": float(self.noise_model.offset_dn) * self._binning ** 2,
                    "bit_depth": self.bit_depth,
                    "roi": list(self._roi),
                    "binning": self._binning,
                    "trigger_mode": self._trigger_mode.value,
                    **sim,
                },
            )
            self._last_frame = frame
            return frame
