"""Video capture camera: a USB/V4L2 video device (or a video file) read through OpenCV.

OpenCV is an optional extra: ``pip install 'maskrun[video]'`` (opencv-python-headless).
It is imported only when the camera is opened, so the driver is listed by
``maskrun drivers`` without it; opening without it raises DeviceMisconfigured naming the extra.

Such cameras deliver 8-bit frames in colour; the driver turns each into one 2-D uint8
array (``channel``: luma = 0.299 R + 0.587 G + 0.114 B, ITU-R BT.601 weights, or one
colour channel). They free-run: ``trigger()`` does nothing and ``grab`` returns the next
frame the device delivers. The ROI is cut in software from the delivered frame.

Exposure: ``exposure_control = "none"`` keeps the setting only for the record (the device
stays on its own automatic exposure). ``"v4l2"`` switches the device to manual exposure
and sends the exposure in the V4L2 unit of 100 microseconds (exposure_absolute), which is
what OpenCV's V4L2 back end passes through (from memory; devices differ, so read the
result back with ``maskrun check-camera usb-video``).

``device`` is a device index (0 = /dev/video0), a device path, or a video file path
(useful to test a config: the file plays through once; its end raises DeviceTimeout).
"""

from __future__ import annotations

import math
import threading
import time
from concurrent.futures import Future
from typing import Literal

import numpy as np
from pydantic import Field

from .base import Camera, DriverSettings, Frame, checked_roi
from .errors import DeviceDisconnected, DeviceMisconfigured, DeviceTimeout

__all__ = ["VideoCaptureCamera", "import_cv2"]

_EXTRA_HINT = "install the optional extra: pip install 'maskrun[video]' (it brings opencv-python-headless)"


def import_cv2():
    """Import OpenCV or raise DeviceMisconfigured naming the extra that provides it."""
    try:
        import cv2  # noqa: PLC0415 - optional dependency, imported on use
    except ImportError as exc:
        raise DeviceMisconfigured(f"the usb-video camera needs OpenCV, which is not installed ({exc})",
                                  device="camera", hint=_EXTRA_HINT) from None
    return cv2


class VideoCaptureCamera(Camera):
    """A USB/V4L2 video camera or a video file read through OpenCV (optional extra 'video'), 8-bit."""

    class Settings(DriverSettings):
        """Video capture settings."""

        device: int | str = Field(default=0, description="device index (0 = /dev/video0), device path or video file")
        width: int | None = Field(default=None, ge=1, description="requested frame width in pixels (device default if unset)")
        height: int | None = Field(default=None, ge=1, description="requested frame height in pixels")
        channel: Literal["luma", "red", "green", "blue"] = Field(
            default="luma", description="how a colour frame becomes one 2-D frame")
        exposure_s: float = Field(default=0.01, gt=0, description="exposure at start, seconds")
        exposure_control: Literal["none", "v4l2"] = Field(
            default="none", description="'none': record the exposure only; 'v4l2': send it in 100 us units")
        open_timeout_s: float = Field(default=5.0, gt=0, description="time allowed for the first frame at open")

    def __init__(self, settings, context=None):
        super().__init__(settings, context)
        self._cap = None
        self._cv2 = None
        self._lock = threading.RLock()
        self._shape: tuple[int, int] | None = None
        self._roi: tuple[int, int, int, int] | None = None
        self._exposure_s = float(self.settings.exposure_s)
        self._frame_id = 0
        self._pending: Future | None = None  # a read still running after a timeout
        self._first: np.ndarray | None = None  # the frame read at open, delivered first

    # ------------------------------------------------------------------ life cycle
    def _source(self):
        device = self.settings.device
        if isinstance(device, str) and device.isdigit():
            return int(device)
        return device

    def open(self) -> None:
        cv2 = import_cv2()
        with self._lock:
            if self._cap is not None:
                return
            source = self._source()
            cap = cv2.VideoCapture(source)
            if not cap.isOpened():
                cap.release()
                raise DeviceDisconnected(f"cannot open video device {source!r}", device="camera",
                                         hint="check that the camera is plugged in and not used by another program, "
                                         "and the 'device' setting (index, /dev/videoN or a video file)")
            s = self.settings
            if s.width is not None:
                cap.set(cv2.CAP_PROP_FRAME_WIDTH, s.width)
            if s.height is not None:
                cap.set(cv2.CAP_PROP_FRAME_HEIGHT, s.height)
            self._cap, self._cv2 = cap, cv2
            self._pending = None
        try:
            first = self._read(s.open_timeout_s)
        except Exception:
            self.close()
            raise
        with self._lock:
            self._first = first
            self._shape = (int(first.shape[0]), int(first.shape[1]))
            if self._roi is None:
                self._roi = (0, 0, *self._shape)
            elif not self._fits(self._roi):
                roi = self._roi
                self._roi = None
                self.close()
                raise DeviceMisconfigured(
                    f"roi {roi} set before open does not fit the {self._shape[0]} x {self._shape[1]} frames the "
                    "device delivers", device="camera", hint="set width/height, or set the roi after opening")
        try:
            self._send_exposure()
        except Exception:
            self.close()
            raise

    def close(self) -> None:
        with self._lock:
            cap, self._cap = self._cap, None
            self._first = None
        if cap is None:
            return
        pending, self._pending = self._pending, None
        if pending is not None and not pending.done():
            # a read that timed out is still running: give it open_timeout_s to finish before releasing
            try:
                pending.result(timeout=self.settings.open_timeout_s)
            except Exception:  # noqa: BLE001 - its outcome no longer matters
                pass
        if pending is not None and not pending.done():
            return  # the device is hung inside read(); releasing it under that read could crash the process
        try:
            cap.release()
        except Exception:  # noqa: BLE001 - closing must not fail
            pass

    # ------------------------------------------------------------------ reading
    def _to_2d(self, image: np.ndarray) -> np.ndarray:
        if image.ndim == 2:
            return image
        if image.shape[2] == 1:
            return image[:, :, 0]
        # OpenCV delivers BGR order
        ch = self.settings.channel
        if ch == "luma":  # ITU-R BT.601 luma weights (ITU-R Recommendation BT.601)
            b, g, r = (image[:, :, i].astype(np.float32) for i in range(3))
            y = 0.299 * r + 0.587 * g + 0.114 * b
            return np.clip(np.rint(y), 0, 255).astype(np.uint8)
        return np.ascontiguousarray(image[:, :, {"blue": 0, "green": 1, "red": 2}[ch]])

    def _read(self, timeout_s: float) -> np.ndarray:
        """One frame from the device, 2-D uint8; DeviceTimeout if none within timeout_s."""
        cap = self._cap
        if cap is None:
            raise DeviceDisconnected("the video camera is not open", device="camera", hint="open the camera first")
        fut = self._pending
        if fut is None:
            fut = Future()

            def work():
                try:
                    ok, image = cap.read()
                    fut.set_result((ok, image))
                except BaseException as exc:  # noqa: BLE001 - handed to the caller
                    fut.set_exception(exc)

            threading.Thread(target=work, name="video-read", daemon=True).start()
        try:
            ok, image = fut.result(timeout=timeout_s)
        except TimeoutError:
            self._pending = fut  # the read goes on; the next grab picks up its frame
            raise DeviceTimeout(f"no video frame within {timeout_s:g} s", device="camera") from None
        self._pending = None
        if not ok or image is None:
            if isinstance(self._source(), str) and not str(self._source()).startswith("/dev/"):
                raise DeviceTimeout(f"video file {self._source()} has no more frames", device="camera",
                                    hint="the file has played through; stop the run or use a longer file")
            raise DeviceDisconnected("the video device delivered no frame (unplugged or stopped?)", device="camera")
        image = np.asarray(image)
        if image.dtype != np.uint8:
            raise DeviceMisconfigured(f"video frames of type {image.dtype} are not supported (8-bit only)",
                                      device="camera")
        return self._to_2d(image)

    def grab(self, timeout_s: float) -> Frame:
        timeout_s = max(0.0, float(timeout_s))
        with self._lock:
            if self._first is not None:
                image, self._first = self._first, None
            else:
                image = self._read(timeout_s)
            self._frame_id += 1
            r0, c0, rows, cols = self.roi
            pixels = np.ascontiguousarray(image[r0 : r0 + rows, c0 : c0 + cols])
            meta = {"device": str(self.settings.device), "roi": list(self.roi), "bit_depth": 8,
                    "exposure_control": self.settings.exposure_control}
            return Frame(pixels, self._frame_id, time.time(), self._exposure_s, meta)

    # ------------------------------------------------------------------ geometry / format
    def _fits(self, roi) -> bool:
        r0, c0, rows, cols = roi
        sr, sc = self.sensor_shape
        return r0 >= 0 and c0 >= 0 and rows >= 1 and cols >= 1 and r0 + rows <= sr and c0 + cols <= sc

    @property
    def sensor_shape(self) -> tuple[int, int]:
        """Delivered frame size; before open(), the requested size (or 480 x 640 if none was given)."""
        if self._shape is not None:
            return self._shape
        return (self.settings.height or 480, self.settings.width or 640)

    @property
    def roi(self) -> tuple[int, int, int, int]:
        if self._roi is None:
            return (0, 0, *self.sensor_shape)
        return self._roi

    @roi.setter
    def roi(self, value) -> None:
        self._roi = checked_roi(value, self.sensor_shape, what="video frame",
                                hint="give row0 + rows <= frame rows and col0 + cols <= frame cols")

    @property
    def bit_depth(self) -> int:
        return 8

    # ------------------------------------------------------------------ exposure
    @property
    def exposure_s(self) -> float:
        return self._exposure_s

    @exposure_s.setter
    def exposure_s(self, value: float) -> None:
        value = float(value)
        if not math.isfinite(value) or value <= 0 or value > 10.0:
            raise DeviceMisconfigured(f"exposure {value} s outside (0, 10] s", device="camera")
        self._exposure_s = value
        with self._lock:
            if self._cap is not None:
                self._send_exposure()

    def _send_exposure(self) -> None:
        if self.settings.exposure_control != "v4l2" or self._cap is None:
            return
        cv2 = self._cv2
        # V4L2 manual exposure: auto-exposure menu value 1 = manual; exposure_absolute in 100 us (from memory)
        self._cap.set(cv2.CAP_PROP_AUTO_EXPOSURE, 1)
        if not self._cap.set(cv2.CAP_PROP_EXPOSURE, max(1.0, round(self._exposure_s / 100e-6))):
            raise DeviceMisconfigured(f"the video device refused exposure {self._exposure_s:g} s", device="camera",
                                      hint="set exposure_control = 'none' for devices without manual exposure")
