"""Trigger and frame delivery of the GenICam camera driver: the trigger modes (software, hardware,
free-running with skipped frames), fetching and requeueing GenTL buffers, and the frame with its
metadata. A mixin of ``genicam_camera.GenicamCamera``, which holds the state it uses (the acquirer,
features, layout, ROI plan, frame counter, lock)."""
from __future__ import annotations

import contextlib
import time

from .base import Frame, TriggerMode
from .errors import DeviceDisconnected, DeviceMisconfigured, DeviceTimeout
from .genicam_frames import buffer_pixels, buffer_value

_STATUS_PERIOD_S = 1.0  # read-only status values (temperature) are read at most this often


class GenicamDelivery:
    """Trigger and frame delivery for ``GenicamCamera`` (see the module docstring)."""

    def _apply_trigger(self, mode: str) -> None:
        f, s = self._features, self.settings
        if mode == "software":
            f.set_trigger("Software")
        elif mode == "hardware":
            f.set_trigger(s.trigger_line, s.trigger_activation)
        else:
            f.trigger_off()
        self._trigger = mode

    @property
    def trigger_mode(self) -> TriggerMode:
        return TriggerMode.hardware if self._trigger == "hardware" else TriggerMode.software

    @trigger_mode.setter
    def trigger_mode(self, value) -> None:
        value = TriggerMode(value)
        if value is self.trigger_mode:
            return
        with self._lock:
            if value is TriggerMode.software:
                want = "free-running" if self.settings.trigger == "free-running" else "software"
            else:
                want = "hardware"
            if self._acquirer is None:
                self._trigger = want
                return
            self._stop()
            try:
                self._apply_trigger(want)
            finally:
                self._start()

    def trigger(self) -> None:
        with self._lock:
            ia = self._require_open()
            if self._trigger == "hardware":
                return
            self._drain(ia)  # a frame waiting now was exposed before this mask: never hand it out
            if self._trigger == "software":
                self._features.software_trigger()
            else:
                self._skip = self.settings.free_running_skip_frames

    def _drain(self, ia) -> None:
        while True:
            buf = self._fetch(ia, 0.001)
            if buf is None:
                return
            buf.parent.queue_buffer(buf)

    # ------------------------------------------------------------------ frames
    def _fetch(self, ia, timeout_s: float):
        from genicam.gentl import GenericException as GenTLError

        try:
            return ia.try_fetch(timeout=max(timeout_s, 1e-4), is_raw=True)
        except GenTLError as exc:
            raise DeviceDisconnected(f"the camera stopped delivering ({_line(exc)})", device="camera") from None

    def grab(self, timeout_s: float) -> Frame:
        deadline = time.monotonic() + max(0.0, float(timeout_s))
        with self._lock:
            ia = self._require_open()
            while True:
                buf = self._fetch(ia, deadline - time.monotonic())
                if buf is None and time.monotonic() < deadline - 1e-3:
                    continue  # an incomplete buffer (dropped by the consumer) came back early: keep waiting
                if buf is None:
                    raise DeviceTimeout(f"no frame within {timeout_s:g} s ({self._trigger} trigger)", device="camera")
                host_t = time.time()
                if self._skip > 0:
                    self._skip -= 1
                    buf.parent.queue_buffer(buf)
                    continue
                try:
                    return self._frame(buf, host_t)
                finally:
                    with contextlib.suppress(Exception):
                        buf.parent.queue_buffer(buf)

    def _frame(self, buf, host_t: float) -> Frame:
        layout, plan = self._layout, self._plan
        pixels = buffer_pixels(buf, layout, self._features, plan.camera, plan.crop)
        cam_id = buffer_value(buf, "frame_id")
        frame_id, id_source = self._counter.frame_id(cam_id, count_kept=self._trigger == "free-running")
        ts_ns = buffer_value(buf, "timestamp_ns")
        stamp, ts_source = self._counter.timestamp_s(ts_ns, host_t)
        meta = {
            "camera": f"{self._info.vendor} {self._info.model}", "serial": self._info.serial, "device_id": self._info.id,
            "producer": self._producer, "pixel_format": layout.name, "bit_depth": layout.bit_depth,
            "frame_id_source": id_source, "camera_frame_id": None if cam_id is None else int(cam_id),
            "timestamp_source": ts_source, "trigger": self._trigger, "roi_read_by_camera": list(plan.camera),
            "host_crop": not plan.exact, "binning": self.settings.binning,
            "exposure_source": "ExposureTime" if self.settings.exposure_control == "camera" else
            "recorded only (exposure_control = none: the camera keeps its own exposure)",
        }
        if ts_ns is not None:
            meta["camera_timestamp_ns"] = int(ts_ns)
        if time.monotonic() - self._status_t >= _STATUS_PERIOD_S:
            with contextlib.suppress(Exception):
                self._status = self._features.status_values()
            self._status_t = time.monotonic()
        meta.update(self._status)
        return Frame(pixels, frame_id, stamp, self._exposure_s, meta)


def _line(exc: Exception) -> str:
    text = str(exc).strip()
    return text.splitlines()[0] if text else type(exc).__name__


def _as_device_error(exc: Exception, what: str):
    from genicam.gentl import GenericException as GenTLError

    if isinstance(exc, GenTLError):
        return DeviceDisconnected(f"{what} failed: {_line(exc)}", device="camera")
    return DeviceMisconfigured(f"{what} failed: {_line(exc)}", device="camera")
