"""The camera conformance kit: it passes the built-in cameras, it catches broken drivers
(each broken promise fails its own check), and the `check-camera` / `drivers` verbs."""

import io
import json
import subprocess
import sys
import time

import numpy as np
import pytest
from rich.console import Console

from benchcfg import small_bench
from maskrun.daemon.commands import cli
from maskrun.daemon.acquire.bench import build_bench
from maskrun.drivers import DeviceTimeout, Frame
from maskrun.drivers.conformance import (
    CHECK_NAMES,
    ConformanceFailed,
    assert_conformant,
    print_results,
    run_conformance,
)
from maskrun.drivers.errors import DriverSettingsError, UnknownDriver
from maskrun.drivers.registry import build_driver

maskrun_example_camera = pytest.importorskip(
    "maskrun_example_camera", reason="example plugin not installed: pip install -e tests/plugin_example")
PatternCamera = maskrun_example_camera.PatternCamera


# ------------------------------------------------------------------ built-in cameras pass


def test_simulated_camera_alone_keeps_the_contract():
    results = assert_conformant("simulated", {"sensor_shape": [32, 40]})
    status = {r.name: r.status for r in results}
    assert [r.name for r in results] == CHECK_NAMES
    assert status["timeout"] == "pass"  # real-time simulation: a timeout shorter than the exposure is forced
    assert status["hardware trigger"] == "skip"  # alone it has no trigger line


def test_simulated_camera_on_the_simulated_bench_keeps_the_contract_including_hardware_trigger():
    bench = build_bench(small_bench(grid=16, sensor=24, masks=4))
    try:
        def camera():
            return build_driver("camera", "simulated", {}, bench.context)

        def mismatched():  # a sensor that differs from the bench's: open() refuses it
            return build_driver("camera", "simulated", {"sensor_shape": [20, 20]}, bench.context)

        results = assert_conformant(camera, failing_factory=mismatched)
    finally:
        bench.close()
    status = {r.name: r.status for r in results}
    assert status["hardware trigger"] == "pass" and status["close after failed open"] == "pass"


# The kit on the other built-in cameras: replay in test_replay_camera.py (on a recorded run), usb-video in
# test_video_camera.py (on a video file), the example plugin in test_plugin_example.py.


# ------------------------------------------------------------------ broken drivers are caught


class NoAdvance(PatternCamera):
    """Frame ids do not advance."""

    def grab(self, timeout_s):
        frame = super().grab(timeout_s)
        frame.frame_id = 7
        return frame


class RoiIgnored(PatternCamera):
    """The ROI is read back but frames stay full size."""

    def _read_sensor(self):
        roi, self._roi = self._roi, (0, 0, *self.sensor_shape)
        try:
            return super()._read_sensor()
        finally:
            self._roi = roi


class ExposureRounded(PatternCamera):
    """Reads back a very different exposure than was set."""

    @property
    def exposure_s(self):
        return round(self._exposure_s, 1) or 0.1

    @exposure_s.setter
    def exposure_s(self, value):
        PatternCamera.exposure_s.fset(self, value)


class AcceptsNegativeExposure(PatternCamera):
    @property
    def exposure_s(self):
        return self._exposure_s

    @exposure_s.setter
    def exposure_s(self, value):
        self._exposure_s = float(value)


class RangeNotWhatTheSetterTakes(PatternCamera):
    @property
    def exposure_range_s(self):
        return (1e-3, 1.0)  # reports a minimum of 1 ms, but its setter takes any positive exposure


class CloseFailsWhenNotOpen(PatternCamera):
    def close(self):
        if not self._open:
            raise RuntimeError("not open")
        super().close()


class LateTimeout(PatternCamera):
    """Waits three times the timeout before raising it."""

    def grab(self, timeout_s):
        if self._exposure_s + self.settings.frame_time_s > timeout_s:
            time.sleep(3 * timeout_s + 0.6)
            raise DeviceTimeout("late", device="camera")
        return super().grab(timeout_s)


class GrabsWhenClosed(PatternCamera):
    def grab(self, timeout_s):
        self._open = True
        return super().grab(timeout_s)


class OverRange(PatternCamera):
    """Claims 8 bits but delivers larger values."""

    @property
    def bit_depth(self):
        return 8

    def _read_sensor(self):
        return super()._read_sensor() + 300


class WrongType(PatternCamera):
    def grab(self, timeout_s):
        frame = super().grab(timeout_s)
        return Frame(frame.pixels.astype(np.float32), frame.frame_id, frame.timestamp_s, frame.exposure_s)


@pytest.mark.parametrize(
    ("cls", "failing_check"),
    [
        (NoAdvance, "software trigger"),
        (RoiIgnored, "roi"),
        (ExposureRounded, "exposure"),
        (AcceptsNegativeExposure, "exposure"),
        (RangeNotWhatTheSetterTakes, "exposure"),
        (CloseFailsWhenNotOpen, "close without open"),
        (LateTimeout, "timeout"),
        (GrabsWhenClosed, "grab after close"),
        (OverRange, "frame format"),
        (WrongType, "frame format"),
    ],
)
def test_each_broken_promise_fails_its_check(cls, failing_check):
    def factory():
        return cls(cls.Settings(sensor_shape=(16, 16), frame_time_s=0.0))

    results = run_conformance(factory, grab_timeout_s=1.0, timing_slack_s=0.3)
    status = {r.name: r for r in results}
    assert status[failing_check].status == "fail", status[failing_check]
    assert status[failing_check].detail  # says what was wrong
    with pytest.raises(ConformanceFailed, match=failing_check):
        assert_conformant(factory, grab_timeout_s=1.0, timing_slack_s=0.3, only=[failing_check])


def test_the_unbroken_example_passes_with_the_same_kit_settings():
    # the control for the test above: the same base class without the injected bug passes
    def factory():
        return PatternCamera(PatternCamera.Settings(sensor_shape=(16, 16), frame_time_s=0.0))

    assert_conformant(factory, grab_timeout_s=1.0, timing_slack_s=0.3)


def test_failed_open_that_does_not_fail_is_reported():
    results = run_conformance("example-pattern", failing_settings={"device_index": 0}, only=["close after failed open"])
    assert results[0].status == "fail" and "succeeded" in results[0].detail


def test_bad_name_or_settings_are_bad_input_not_a_failed_check():
    with pytest.raises(UnknownDriver, match="installed camera drivers: .*simulated"):
        run_conformance("no-such-camera")
    with pytest.raises(DriverSettingsError, match="bit_depth"):
        run_conformance("simulated", {"bit_depth": "abc"})
    with pytest.raises(ValueError, match="unknown conformance checks"):
        run_conformance("simulated", only=["speed"])


def test_results_print_as_a_table():
    results = run_conformance("example-pattern", only=["frame format", "roi"])
    buf = io.StringIO()
    print_results(results, Console(file=buf, width=120), title="example")
    text = buf.getvalue()
    assert "frame format" in text and "PASS" in text and "2 passed, 0 failed, 0 skipped" in text


# ------------------------------------------------------------------ command line


def test_check_camera_exits_zero_when_all_pass(capsys):
    assert cli.main(["check-camera", "example-pattern", "--setting", "bit_depth=12",
                     "--setting", "sensor_shape=[16, 24]", "--failing-setting", "device_index=2"]) == 0
    out = capsys.readouterr().out
    assert "9 passed, 0 failed, 1 skipped" in out and "16 x 24 uint16, 12-bit" in out


def test_check_camera_exits_one_when_a_check_fails(capsys):
    # every fresh camera loses its link at the first grab: the checks that grab fail
    code = cli.main(["check-camera", "simulated", "--setting", 'faults=[{kind = "disconnect", at_frame = 1}]'])
    assert code == 1
    assert "FAIL" in capsys.readouterr().out


def test_check_camera_wrong_setting_type_is_one_line_naming_the_setting(capsys):
    code = cli.main(["check-camera", "simulated", "--setting", "bit_depth=abc"])
    captured = capsys.readouterr()
    assert code != 0
    lines = [line for line in captured.err.splitlines() if line.strip()]
    assert len(lines) == 1 and "bit_depth" in lines[0] and "abc" in lines[0]
    assert "Traceback" not in captured.err and captured.out == ""


def test_check_camera_unknown_driver_lists_the_installed_ones(capsys):
    code = cli.main(["check-camera", "no-such-camera"])
    err = capsys.readouterr().err
    assert code != 0
    for name in ("example-pattern", "replay", "simulated", "usb-video"):
        assert name in err


def test_check_camera_setting_without_equals_sign(capsys):
    assert cli.main(["check-camera", "simulated", "--setting", "bit_depth"]) != 0
    assert "KEY=VALUE" in capsys.readouterr().err


def test_drivers_lists_every_kind_with_settings(capsys):
    assert cli.main(["drivers"]) == 0
    out = capsys.readouterr().out
    for word in ("Cameras", "Modulators", "Safety boxes", "example-pattern", "replay", "simulated", "serial-line",
                 "usb-video", "include_darks", "read_noise_e", "(required)"):
        assert word in out, word
    assert cli.main(["drivers", "--json", "--kind", "camera"]) == 0
    data = json.loads(capsys.readouterr().out)
    replay = {d["name"]: d for d in data["camera"]}["replay"]
    assert replay["settings_schema"]["required"] == ["path"]


def test_the_installed_command_runs_the_kit():
    proc = subprocess.run([sys.executable, "-P", "-m", "maskrun.daemon.commands.cli", "check-camera", "example-pattern"],
                          capture_output=True, text=True, timeout=60)
    assert proc.returncode == 0, proc.stderr
    assert "0 failed" in proc.stdout
