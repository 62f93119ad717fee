"""Camera conformance kit: does a camera driver keep the ``maskrun.drivers.Camera`` contract?

Run it on any installed driver from the command line::

    maskrun check-camera example-pattern --setting bit_depth=12

or from Python / a third-party package's own tests::

    from maskrun.drivers.conformance import assert_conformant

    def test_my_camera_keeps_the_contract():
        assert_conformant("my-camera", {"serial": "sim"})

``run_conformance`` returns one ``CheckResult`` per check (status pass / fail / skip and a
detail line); ``print_results`` prints them as a table. Each check builds a fresh camera,
opens it, does its work and closes it, so one failure does not spoil the next check.

The checks (the contract in ``maskrun.drivers.base``):

* ``close without open``: ``close()`` on a camera never opened is safe.
* ``open/close twice``: open, close, open, close, close again.
* ``close after failed open``: with ``failing_settings`` (settings that make ``open`` fail,
  e.g. a missing device) ``open`` raises a DeviceError and ``close`` is then safe. Skipped
  when no such settings are given.
* ``frame format``: a frame's pixels are 2-D, of shape ``frame_shape``, of an unsigned
  integer type wide enough for ``bit_depth``, no value above ``max_dn``; the frame carries
  an int id, a finite positive time stamp and exposure, JSON-serialisable metadata.
* ``exposure``: two exposures set are read back (within 5 %, cameras round to their clock);
  a negative or NaN exposure raises DeviceMisconfigured; the limits the driver reports
  (``exposure_range_s``) are what its setter takes: the ends are accepted, a tenth of the
  shortest and ten times the longest (when reported) raise DeviceMisconfigured.
* ``software trigger``: the mode reads back; five trigger + grab cycles give frames whose
  ids advance by at least one each.
* ``hardware trigger``: the mode can be set and read back, then set back to software;
  skipped (with the driver's reason) when the driver refuses it with DeviceMisconfigured.
* ``roi``: a centred sub-ROI is read back and frames come in its shape; an ROI outside the
  sensor raises DeviceMisconfigured; the full ROI can be restored.
* ``timeout``: with a long exposure and a grab timeout five times shorter, ``grab`` raises
  DeviceTimeout within the timeout (plus ``timing_slack_s``), and the next grab with a long
  enough timeout delivers a new frame. Skipped when the driver delivers a frame anyway
  (a free-running or replaying camera that does not wait for the exposure).
* ``grab after close``: ``grab`` on a closed camera raises a DeviceError, not another
  exception and not a frame.
"""

from __future__ import annotations

import contextlib
import json
import math
import time
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from typing import Any, Literal

import numpy as np

from .base import BenchContext, Camera, Frame, TriggerMode
from .errors import DeviceError, DeviceMisconfigured, DeviceTimeout

__all__ = [
    "CHECK_NAMES",
    "CheckResult",
    "ConformanceFailed",
    "assert_conformant",
    "print_results",
    "run_conformance",
]

Status = Literal["pass", "fail", "skip"]


@dataclass
class CheckResult:
    """Outcome of one check: ``status`` is 'pass', 'fail' or 'skip'; ``detail`` says what was seen or why."""

    name: str
    status: Status
    detail: str
    elapsed_s: float = 0.0

    @property
    def passed(self) -> bool:
        return self.status != "fail"


class ConformanceFailed(AssertionError):
    """Raised by ``assert_conformant``; ``results`` holds every check."""

    def __init__(self, driver: str, results: list[CheckResult]):
        self.results = results
        failed = [r for r in results if r.status == "fail"]
        lines = "\n".join(f"  {r.name}: {r.detail}" for r in failed)
        super().__init__(f"camera {driver!r} failed {len(failed)} of {len(results)} conformance checks:\n{lines}")


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


def _factory_for(name: str, settings: dict[str, Any] | None, context: BenchContext | None) -> CameraFactory:
    from .registry import build_driver

    def build() -> Camera:
        return build_driver("camera", name, dict(settings or {}), context or BenchContext())

    return build


def run_conformance(
    camera: str | CameraFactory,
    settings: dict[str, Any] | None = None,
    *,
    failing_settings: dict[str, Any] | None = None,
    failing_factory: CameraFactory | None = None,
    context: BenchContext | None = None,
    grab_timeout_s: float = 5.0,
    timing_slack_s: float = 0.5,
    only: list[str] | None = None,
) -> list[CheckResult]:
    """Run the camera contract checks; return one CheckResult per check, in CHECK_NAMES order.

    camera: an installed driver name (built through the registry with ``settings`` and
        ``context``), or a factory returning a new, unopened Camera on each call (``settings``
        and ``context`` are then unused).
    failing_settings: settings merged over ``settings`` that make ``open()`` fail (for the
        'close after failed open' check), when ``camera`` is a driver name.
    failing_factory: the same for a factory: returns a camera whose ``open()`` fails.
    grab_timeout_s: timeout of ordinary grabs, seconds. timing_slack_s: how late a forced
        DeviceTimeout may come, seconds (a shared machine needs some).
    only: run only these checks (names from CHECK_NAMES).

    A bad driver name or bad settings raise UnknownDriver / DriverSettingsError at once
    (that is bad input, not a broken driver).
    """
    if isinstance(camera, str):
        factory = _factory_for(camera, settings, context)
        factory()  # bad name or settings: raise now, with the registry's message
        if failing_settings is not None:
            failing_factory = _factory_for(camera, {**(settings or {}), **failing_settings}, context)
            failing_factory()
    else:
        if failing_settings is not None:
            raise ValueError("failing_settings needs a driver name; with a camera factory give failing_factory")
        factory = camera
    if only is not None:
        unknown = sorted(set(only) - set(CHECK_NAMES))
        if unknown:
            raise ValueError(f"unknown conformance checks {unknown}; checks are: {', '.join(CHECK_NAMES)}")
    kit = _Kit(factory, failing_factory, float(grab_timeout_s), float(timing_slack_s))
    results = []
    for name, method in _CHECKS:
        if only is not None and name not in only:
            continue
        t0 = time.monotonic()
        try:
            detail = getattr(kit, method)()
            status: Status = "pass"
        except _Skip as exc:
            status, detail = "skip", str(exc)
        except _Fail as exc:
            status, detail = "fail", str(exc)
        except Exception as exc:  # noqa: BLE001 - any other exception is a failed check, reported
            status, detail = "fail", f"unexpected {type(exc).__name__}: {exc}"
        results.append(CheckResult(name, status, detail, time.monotonic() - t0))
    return results


def print_results(results: list[CheckResult], console=None, title: str = "camera conformance") -> None:
    """Print the results as a table (rich): check, PASS/FAIL/SKIP, seconds, detail; then a count line."""
    from rich.console import Console
    from rich.markup import escape
    from rich.table import Table

    console = console or Console()
    table = Table(title=title, show_lines=False)
    table.add_column("check")
    table.add_column("result")
    table.add_column("s", justify="right")
    table.add_column("detail", overflow="fold")
    style = {"pass": "[green]PASS[/]", "fail": "[bold red]FAIL[/]", "skip": "[yellow]SKIP[/]"}
    for r in results:
        table.add_row(r.name, style[r.status], f"{r.elapsed_s:.2f}", escape(r.detail))
    console.print(table)
    counts = {s: sum(r.status == s for r in results) for s in ("pass", "fail", "skip")}
    console.print(f"{counts['pass']} passed, {counts['fail']} failed, {counts['skip']} skipped")


def assert_conformant(
    camera: str | CameraFactory,
    settings: dict[str, Any] | None = None,
    **kwargs,
) -> list[CheckResult]:
    """Run the kit (arguments as ``run_conformance``) and raise ConformanceFailed listing every failed check.

    Returns the results (skips included) so a test can also assert which checks were skipped.
    """
    results = run_conformance(camera, settings, **kwargs)
    if any(r.status == "fail" for r in results):
        raise ConformanceFailed(camera if isinstance(camera, str) else getattr(camera, "__name__", "camera"), results)
    return results
