"""Camera conformance kit: does a camera driver keep the ``maskrun.drivers.Camera`` contract?

Run it on any installed driver from the command line::

    maskrun check-camera example-pattern --setting bit_depth=12

or from Python / a third-party package's own tests::

    from maskrun.drivers.conformance import assert_conformant

    def test_my_camera_keeps_the_contract():
        assert_conformant("my-camera", {"serial": "sim"})

``run_conformance`` returns one ``CheckResult`` per check (status pass / fail / skip and a
detail line); ``print_results`` prints them as a table. The checks themselves are in
``conformance_checks``. Each check builds a fresh camera,
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

import time
from dataclasses import dataclass
from typing import Any, Literal

from .base import BenchContext, Camera, Frame, TriggerMode  # noqa: F401
from .errors import DeviceError, DeviceMisconfigured, DeviceTimeout  # noqa: F401

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


from .conformance_checks import _CHECKS, CHECK_NAMES, CameraFactory, _expect, _Fail, _Kit, _Skip  # noqa: E402,F401


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
