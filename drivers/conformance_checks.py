"""The camera contract checks of the conformance kit, one method each on ``_Kit`` (built around a
camera factory), and their names in the order they run. The runner and the report are in
``conformance``; what each check promises is listed in its module docstring."""
from __future__ import annotations

import contextlib
import json
import math
import time
from collections.abc import Callable, Iterator
from dataclasses import dataclass

import numpy as np

from .base import Camera, Frame, TriggerMode
from .errors import DeviceError, DeviceMisconfigured, DeviceTimeout


class _Skip(Exception):
    """A check cannot run on this driver; the message says why."""


class _Fail(Exception):
    """A check found a broken promise; the message says which."""


def _expect(condition: bool, message: str) -> None:
    if not condition:
        raise _Fail(message)


CameraFactory = Callable[[], Camera]


@dataclass
class _Kit:
    factory: CameraFactory
    failing_factory: CameraFactory | None
    grab_timeout_s: float
    timing_slack_s: float

    @contextlib.contextmanager
    def opened(self) -> Iterator[Camera]:
        cam = self.factory()
        try:
            cam.open()
            yield cam
        finally:
            cam.close()

    def grab(self, cam: Camera) -> Frame:
        cam.trigger()
        frame = cam.grab(self.grab_timeout_s)
        _expect(isinstance(frame, Frame), f"grab returned {type(frame).__name__}, not a maskrun.drivers.Frame")
        return frame

    # ------------------------------------------------------------------ checks
    def check_close_without_open(self) -> str:
        cam = self.factory()
        cam.close()
        cam.close()
        return "close() twice on a camera never opened: no error"

    def check_open_close_twice(self) -> str:
        cam = self.factory()
        try:
            for _ in range(2):
                cam.open()
                frame = self.grab(cam)
                cam.close()
            cam.close()
        finally:
            cam.close()
        return f"opened, grabbed (last frame id {frame.frame_id}) and closed twice, closed once more"

    def check_close_after_failed_open(self) -> str:
        if self.failing_factory is None:
            raise _Skip("no failing settings given (settings that make open() fail, e.g. a missing device)")
        cam = self.failing_factory()
        try:
            cam.open()
        except DeviceError as exc:
            reason = f"{type(exc).__name__}: {exc.detail}"
        else:
            cam.close()
            raise _Fail("open() succeeded with the failing settings; expected a DeviceError")
        cam.close()
        cam.close()
        return f"open() raised {reason}; close() after it was safe"

    def check_frame_format(self) -> str:
        with self.opened() as cam:
            frame = self.grab(cam)
            px = frame.pixels
            shape = tuple(cam.frame_shape)
            bits = int(cam.bit_depth)
            _expect(isinstance(px, np.ndarray), f"pixels is {type(px).__name__}, not a numpy array")
            _expect(px.ndim == 2, f"pixels has {px.ndim} dimensions, expected 2")
            _expect(tuple(px.shape) == shape, f"pixels shape {px.shape} differs from frame_shape {shape}")
            _expect(px.dtype.kind == "u", f"pixels dtype {px.dtype} is not an unsigned integer type")
            _expect(1 <= bits <= 8 * px.dtype.itemsize,
                    f"bit_depth {bits} does not fit the {px.dtype} pixels ({8 * px.dtype.itemsize} bits)")
            _expect(int(cam.max_dn) == (1 << bits) - 1, f"max_dn {cam.max_dn} is not 2**bit_depth - 1")
            peak = int(px.max()) if px.size else 0
            _expect(peak <= cam.max_dn, f"a pixel holds {peak}, above max_dn {cam.max_dn}")
            _expect(isinstance(frame.frame_id, (int, np.integer)), f"frame_id {frame.frame_id!r} is not an integer")
            _expect(math.isfinite(frame.timestamp_s) and frame.timestamp_s > 0,
                    f"timestamp_s {frame.timestamp_s!r} is not a positive time (seconds since the epoch)")
            _expect(math.isfinite(frame.exposure_s) and frame.exposure_s > 0,
                    f"exposure_s {frame.exposure_s!r} is not a positive number of seconds")
            try:
                json.dumps(frame.metadata)
            except (TypeError, ValueError) as exc:
                raise _Fail(f"metadata is not JSON-serialisable ({exc})") from None
        return f"{shape[0]} x {shape[1]} {px.dtype}, {bits}-bit, peak {peak} DN, id {frame.frame_id}"

    def check_exposure(self) -> str:
        with self.opened() as cam:
            start = float(cam.exposure_s)
            _expect(math.isfinite(start) and start > 0, f"exposure_s reads {start!r} after open")
            seen = []
            other = start / 2
            try:
                cam.exposure_s = other
            except DeviceMisconfigured:  # start is the shortest exposure: go longer instead
                other = start * 2
            for value in (other, start):
                cam.exposure_s = value
                back = float(cam.exposure_s)
                _expect(abs(back - value) <= 0.05 * value, f"set exposure {value:g} s, read back {back:g} s")
                seen.append(f"{value:g}->{back:g}")
            self.grab(cam)
            for bad in (-1.0, float("nan")):
                try:
                    cam.exposure_s = bad
                except DeviceMisconfigured:
                    continue
                except Exception as exc:  # noqa: BLE001 - a wrong error type is the finding
                    raise _Fail(f"exposure {bad} raised {type(exc).__name__}, expected DeviceMisconfigured") from None
                raise _Fail(f"exposure {bad} s was accepted (reads back {cam.exposure_s!r}); expected DeviceMisconfigured")
            lo, hi = (float(v) for v in cam.exposure_range_s)
            _expect(0 <= lo <= hi, f"exposure_range_s ({lo:g}, {hi:g}) is not 0 <= shortest <= longest")
            limits = [(v, True) for v in (lo, hi) if 0 < v < math.inf]
            limits += [(lo / 10, False)] if lo > 0 else []
            limits += [(hi * 10, False)] if hi < math.inf else []
            for value, accepted in limits:
                try:
                    cam.exposure_s = value
                    ok = True
                except DeviceMisconfigured:
                    ok = False
                _expect(ok == accepted, f"exposure {value:g} s was {'refused' if accepted else 'accepted'} although "
                        f"exposure_range_s reports ({lo:g}, {hi:g}) s")
            cam.exposure_s = start
        return f"set/read back {', '.join(seen)} s; -1 and NaN refused; range ({lo:g}, {hi:g}) s agrees with the setter"

    def check_software_trigger(self) -> str:
        with self.opened() as cam:
            cam.trigger_mode = TriggerMode.software
            _expect(TriggerMode(cam.trigger_mode) is TriggerMode.software,
                    f"trigger_mode reads {cam.trigger_mode!r} after setting software")
            ids = [int(self.grab(cam).frame_id) for _ in range(5)]
        steps = np.diff(ids)
        _expect(bool(np.all(steps >= 1)), f"frame ids did not advance: {ids}")
        return f"5 frames, ids {ids}"

    def check_hardware_trigger(self) -> str:
        with self.opened() as cam:
            try:
                cam.trigger_mode = TriggerMode.hardware
            except DeviceMisconfigured as exc:
                raise _Skip(f"driver refuses hardware trigger here: {exc.detail}") from None
            mode = TriggerMode(cam.trigger_mode)
            cam.trigger_mode = TriggerMode.software
            _expect(mode is TriggerMode.hardware, f"trigger_mode reads {mode.value} after setting hardware")
            _expect(TriggerMode(cam.trigger_mode) is TriggerMode.software, "could not set software trigger back")
            self.grab(cam)
        return "hardware mode set and read back, software restored (no trigger source here: frames not tested)"

    def check_roi(self) -> str:
        with self.opened() as cam:
            sr, sc = (int(v) for v in cam.sensor_shape)
            full = tuple(int(v) for v in cam.roi)
            rows, cols = max(1, sr // 2), max(1, sc // 2)
            sub = ((sr - rows) // 2, (sc - cols) // 2, rows, cols)
            cam.roi = sub
            back = tuple(int(v) for v in cam.roi)
            _expect(back == sub, f"set roi {sub}, read back {back}")
            b = int(cam.binning)
            want = (rows // b, cols // b)
            _expect(tuple(cam.frame_shape) == want, f"frame_shape {cam.frame_shape} for roi {sub}, expected {want}")
            frame = self.grab(cam)
            _expect(tuple(frame.pixels.shape) == want, f"frame shape {frame.pixels.shape} for roi {sub}, expected {want}")
            bad = (0, 0, sr + 1, sc)
            try:
                cam.roi = bad
            except DeviceMisconfigured:
                pass
            except Exception as exc:  # noqa: BLE001
                raise _Fail(f"roi {bad} outside the sensor raised {type(exc).__name__}, expected DeviceMisconfigured") from None
            else:
                raise _Fail(f"roi {bad} outside the {sr} x {sc} sensor was accepted")
            cam.roi = (0, 0, sr, sc)
            frame = self.grab(cam)
            _expect(tuple(frame.pixels.shape) == (sr // b, sc // b), "frames after restoring the full roi have the wrong shape")
        return f"sensor {sr} x {sc} (roi at open {full}); sub-roi {sub} -> frames {want}; outside roi refused"

    def check_timeout(self) -> str:
        with self.opened() as cam:
            normal = float(cam.exposure_s)
            last_id = int(self.grab(cam).frame_id)
            long_exposure = None
            for value in (0.5, 0.25, 0.1):
                try:
                    cam.exposure_s = value
                except DeviceMisconfigured:
                    continue
                long_exposure = value
                break
            if long_exposure is None:
                raise _Skip("driver accepts no exposure of 0.1 s or longer, so a timeout cannot be forced")
            timeout = long_exposure / 5
            cam.trigger()
            t0 = time.monotonic()
            try:
                frame = cam.grab(timeout)
            except DeviceTimeout:
                took = time.monotonic() - t0
                _expect(took <= timeout + self.timing_slack_s,
                        f"DeviceTimeout came after {took:.3f} s, timeout was {timeout:g} s")
            else:
                raise _Skip(f"a frame (id {frame.frame_id}) arrived within {timeout:g} s although the exposure is "
                            f"{long_exposure:g} s: the driver does not wait for the exposure, so no timeout can be forced")
            cam.exposure_s = normal
            frame = cam.grab(max(self.grab_timeout_s, 2 * long_exposure + 1.0))
            _expect(int(frame.frame_id) > last_id,
                    f"after the timeout the frame id {frame.frame_id} did not advance past {last_id}")
        return f"exposure {long_exposure:g} s, timeout {timeout:g} s: DeviceTimeout after {took:.3f} s; recovered"

    def check_grab_after_close(self) -> str:
        cam = self.factory()
        cam.open()
        self.grab(cam)
        cam.close()
        try:
            frame = cam.grab(min(self.grab_timeout_s, 1.0))
        except DeviceError as exc:
            return f"{type(exc).__name__}: {exc.detail}"
        except Exception as exc:  # noqa: BLE001
            raise _Fail(f"grab after close raised {type(exc).__name__}: {exc}, expected a DeviceError") from None
        raise _Fail(f"grab after close returned a frame (id {frame.frame_id}); expected a DeviceError")


#: (check name, method name) in the order they run
_CHECKS = [
    ("close without open", "check_close_without_open"),
    ("open/close twice", "check_open_close_twice"),
    ("close after failed open", "check_close_after_failed_open"),
    ("frame format", "check_frame_format"),
    ("exposure", "check_exposure"),
    ("software trigger", "check_software_trigger"),
    ("hardware trigger", "check_hardware_trigger"),
    ("roi", "check_roi"),
    ("timeout", "check_timeout"),
    ("grab after close", "check_grab_after_close"),
]
CHECK_NAMES = [name for name, _ in _CHECKS]
