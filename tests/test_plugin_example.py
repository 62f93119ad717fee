"""The example third-party camera package (tests/plugin_example, installed into the test environment)
is found by name, keeps the camera contract, and runs a bench when a config names it."""

import io

import numpy as np
import pytest
from rich.console import Console

from maskrun.daemon.acquire.bench import build_bench
from maskrun.daemon.config import ConfigError, parse_config
from maskrun.daemon.acquire.foreground import RunRequest, run_foreground
from maskrun.daemon.record.runfile import RunFile
from maskrun.drivers.conformance import assert_conformant
from maskrun.drivers.registry import describe_drivers, installed_drivers

maskrun_example_camera = pytest.importorskip(
    "maskrun_example_camera", reason="example plugin not installed: pip install -e tests/plugin_example")


def plugin_bench_text(camera_settings='sensor_shape = [24, 24]\nbit_depth = 12', passes=1):
    """A bench with the example camera and in-process simulated modulator and safety box (no optics)."""
    return f"""
[run]
name = "plugin"
passes = {passes}
dark_frames = 1
operator = "test"

[laser]
description = "helium-neon laser, 632.8 nm (bench with the example camera)"
laser_class = "3R"
wavelength_m = 632.8e-9
power_w = 0.004

[grid]
shape = [16, 16]

[masks]
family = "octanary"
count = 4
seed = 7

[camera]
driver = "example-pattern"
exposure_s = 0.002
grab_timeout_s = 1.0

[camera.settings]
{camera_settings}

[response]
gain_dn_per_e = 0.3
offset_dn = 10.0
quantum_efficiency = 0.6

[modulator]
driver = "simulated"

[safety]
driver = "simulated"

[checks]
min_photons_per_frame = 1.0
"""


def test_the_plugin_is_found_by_name_without_changing_maskrun():
    assert installed_drivers("camera")["example-pattern"] is maskrun_example_camera.PatternCamera
    (desc,) = [d for d in describe_drivers("camera") if d.name == "example-pattern"]
    assert desc.summary.startswith("Test-pattern camera")
    assert set(desc.schema["properties"]) >= {"sensor_shape", "bit_depth", "device_index"}


def test_the_plugin_keeps_the_camera_contract():
    results = assert_conformant("example-pattern", {"bit_depth": 12}, failing_settings={"device_index": 1})
    status = {r.name: r.status for r in results}
    assert status["close after failed open"] == "pass" and status["timeout"] == "pass"
    assert status["hardware trigger"] == "skip"


def test_a_config_naming_the_plugin_builds_a_bench_that_takes_frames():
    cfg = parse_config(plugin_bench_text(), "plugin-bench.toml")
    bench = build_bench(cfg)
    assert isinstance(bench.camera, maskrun_example_camera.PatternCamera)
    assert not bench.simulated  # no optics: only the drivers run
    with bench:
        assert bench.camera.roi == (4, 4, 16, 16)  # the grid-sized ROI, centred on the 24 x 24 sensor
        assert not bench.safety.shutter_is_open()  # opening the bench closed the shutter
        frames = []
        for k in range(4):
            bench.modulator.show(k)
            bench.camera.trigger()
            frames.append(bench.camera.grab(cfg.camera.grab_timeout_s))
    assert [f.pixels.shape for f in frames] == [(16, 16)] * 4
    assert np.all(np.diff([f.frame_id for f in frames]) == 1)
    assert all(f.exposure_s == pytest.approx(0.002) for f in frames)


def test_a_whole_run_with_the_plugin_camera(tmp_path):
    cfg = parse_config(plugin_bench_text(passes=2), "plugin-bench.toml")
    summary = run_foreground(cfg, RunRequest(acknowledge_unattended=True, output_dir=str(tmp_path), figure=False),
                             Console(file=io.StringIO()))
    assert summary.state.value == "finished", summary.message
    assert summary.frames == 8 and summary.darks == 1
    with RunFile(summary.output_path) as rf:
        assert rf.frames().shape == (8, 16, 16)
        assert np.all(np.diff(rf.frame_info()["frame_id"]) > 0)


def test_a_bad_plugin_setting_in_the_config_names_the_key():
    with pytest.raises(ConfigError) as err:
        build_bench(parse_config(plugin_bench_text('bit_depth = "twelve"'), "plugin-bench.toml"))
    assert "camera.settings.bit_depth" in str(err.value)
    with pytest.raises(ConfigError) as err:
        build_bench(parse_config(plugin_bench_text("exposure = 0.1"), "plugin-bench.toml"))
    assert "camera.settings.exposure" in str(err.value) and "device_index" in str(err.value)  # lists known ones
