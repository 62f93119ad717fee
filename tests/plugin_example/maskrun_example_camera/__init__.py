"""A complete, tiny camera driver: a camera that delivers a moving test pattern.

This is the worked example of docs/devices.md ("Adding a camera"). A real driver
replaces the body of ``_read_sensor`` with a call into the vendor's library.
"""

from __future__ import annotations

import time

import numpy as np
from pydantic import Field

from maskrun.drivers import Camera, DeviceDisconnected, DeviceMisconfigured, DeviceTimeout, DriverSettings, Frame


class PatternCamera(Camera):
    """Test-pattern camera: a bright disk that moves one pixel per frame on a dim background."""

    class Settings(DriverSettings):
        sensor_shape: tuple[int, int] = Field((64, 64), description="rows, cols")
        bit_depth: int = Field(10, ge=8, le=16, description="bits per pixel of the delivered frames")
        frame_time_s: float = Field(0.001, ge=0, description="readout time added to the exposure")
        device_index: int = Field(0, ge=0, description="which camera to open; this example has one, at index 0")

    def __init__(self, settings, context=None):
        super().__init__(settings, context)
        self._open = False
        self._exposure_s = 0.01
        self._roi = (0, 0, *self.settings.sensor_shape)
        self._frame_id = 0

    def open(self) -> None:
        # A real driver connects to the device here and raises a DeviceError if it cannot.
        if self.settings.device_index != 0:
            raise DeviceDisconnected(f"no camera at index {self.settings.device_index}", device="camera",
                                     hint="check the cable, or set device_index = 0")
        self._open = True

    def close(self) -> None:
        self._open = False

    @property
    def sensor_shape(self):
        return tuple(self.settings.sensor_shape)

    @property
    def roi(self):
        return self._roi

    @roi.setter
    def roi(self, value):
        r0, c0, rows, cols = (int(v) for v in value)
        R, C = self.sensor_shape
        if r0 < 0 or c0 < 0 or rows < 1 or cols < 1 or r0 + rows > R or c0 + cols > C:
            raise DeviceMisconfigured(f"ROI {value} does not fit the {R}x{C} sensor", device="camera")
        self._roi = (r0, c0, rows, cols)

    @property
    def bit_depth(self):
        return self.settings.bit_depth

    @property
    def exposure_s(self):
        return self._exposure_s

    @exposure_s.setter
    def exposure_s(self, value):
        if not 0 < value <= 10:  # also refuses NaN
            raise DeviceMisconfigured(f"exposure {value} s outside 0..10 s", device="camera")
        self._exposure_s = float(value)

    def grab(self, timeout_s: float) -> Frame:
        if not self._open:
            raise DeviceDisconnected("the camera is not open", device="camera", hint="open the camera first")
        wait = self._exposure_s + self.settings.frame_time_s
        if wait > timeout_s:
            time.sleep(timeout_s)
            raise DeviceTimeout(f"no frame within {timeout_s} s", device="camera")
        time.sleep(wait)
        self._frame_id += 1
        return Frame(self._read_sensor(), self._frame_id, time.time(), self._exposure_s, {"pattern": "disk"})

    def _read_sensor(self) -> np.ndarray:
        R, C = self.sensor_shape
        y, x = np.mgrid[0:R, 0:C]
        cy, cx = R / 2, (self._frame_id % C)
        level = min((1 << self.bit_depth) - 1, int(2000 * self._exposure_s / 0.01))
        img = np.where((y - cy) ** 2 + (x - cx) ** 2 < (R / 8) ** 2, level, 10).astype(np.uint16)
        r0, c0, rows, cols = self._roi
        return img[r0 : r0 + rows, c0 : c0 + cols].copy()
