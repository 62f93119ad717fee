"""The driver registry: entry points, broken drivers, settings validation, descriptions."""

from __future__ import annotations

import sys
import textwrap

import pytest

from maskrun.drivers import BenchContext, Camera, DriverSettingsError, Modulator, SafetyBox, UnknownDriver
from maskrun.drivers.registry import (
    DriverUnavailable,
    broken_drivers,
    build_driver,
    describe_drivers,
    installed_drivers,
    load_driver,
)
from maskrun.drivers.serial_modulator import SerialLineModulator
from maskrun.simulators.camera import SimulatedCamera
from maskrun.simulators.modulator import SimulatedModulator
from maskrun.simulators.safety_box import SimulatedSafetyBox


@pytest.fixture
def extra_distribution(tmp_path, monkeypatch):
    """A real (unpacked) distribution on sys.path registering good and broken drivers."""
    dist = tmp_path / "maskrun_regtest-0.1.dist-info"
    dist.mkdir()
    (dist / "METADATA").write_text("Metadata-Version: 2.1\nName: maskrun-regtest\nVersion: 0.1\n")
    (dist / "entry_points.txt").write_text(textwrap.dedent("""
        [maskrun.cameras]
        regtest-good = maskrun_regtest_mod:ExtraCamera
        regtest-missing = maskrun_regtest_absent:Camera
        regtest-not-a-camera = maskrun_regtest_mod:NotACamera
        regtest-needs-sdk = maskrun_regtest_sdk:VendorCamera
        regtest-abstract = maskrun_regtest_mod:HalfCamera

        [maskrun.modulators]
        simulated = maskrun_regtest_mod:ShadowModulator
    """))
    (tmp_path / "maskrun_regtest_mod.py").write_text(textwrap.dedent('''
        from maskrun.drivers import Camera
        from maskrun.simulators.camera import SimulatedCamera
        from maskrun.simulators.modulator import SimulatedModulator

        class ExtraCamera(SimulatedCamera):
            """A third-party camera for the registry test.

            More text.
            """

        class NotACamera:
            pass

        class HalfCamera(Camera):
            """Forgot to implement most methods."""
            def open(self): pass
            def close(self): pass

        class ShadowModulator(SimulatedModulator):
            pass
    '''))
    (tmp_path / "maskrun_regtest_sdk.py").write_text("import maskrun_regtest_vendor_sdk_not_installed\n")
    monkeypatch.setattr(sys, "path", [*sys.path, str(tmp_path)])
    yield
    for name in ("maskrun_regtest_mod", "maskrun_regtest_sdk"):
        sys.modules.pop(name, None)


def test_built_in_drivers_are_installed():
    cams, mods, boxes = installed_drivers("camera"), installed_drivers("modulator"), installed_drivers("safety")
    assert cams["simulated"] is SimulatedCamera
    assert mods["simulated"] is SimulatedModulator and mods["serial-line"] is SerialLineModulator
    assert boxes["simulated"] is SimulatedSafetyBox
    assert all(issubclass(c, Camera) for c in cams.values())
    assert all(issubclass(c, Modulator) for c in mods.values())
    assert all(issubclass(c, SafetyBox) for c in boxes.values())


def test_broken_entry_points_are_skipped_and_explained(extra_distribution):
    cams = installed_drivers("camera")
    assert "regtest-good" in cams and "simulated" in cams
    assert not {"regtest-missing", "regtest-not-a-camera", "regtest-needs-sdk", "regtest-abstract"} & set(cams)
    broken = broken_drivers("camera")
    assert "No module named 'maskrun_regtest_absent'" in broken["regtest-missing"]
    assert "not a subclass of maskrun.drivers.Camera" in broken["regtest-not-a-camera"]
    assert "maskrun_regtest_vendor_sdk_not_installed" in broken["regtest-needs-sdk"]
    assert "does not implement" in broken["regtest-abstract"] and "grab" in broken["regtest-abstract"]


def test_load_driver_errors(extra_distribution):
    with pytest.raises(UnknownDriver, match="no camera driver named 'nope'; installed camera drivers: .*simulated"):
        load_driver("camera", "nope")
    with pytest.raises(DriverUnavailable, match="'regtest-needs-sdk' is registered .* cannot be loaded") as err:
        load_driver("camera", "regtest-needs-sdk")
    assert isinstance(err.value, UnknownDriver) and "simulated" in str(err.value)
    assert load_driver("camera", "regtest-good").__name__ == "ExtraCamera"
    # the first registration of a name wins: the project's own simulated modulator
    assert load_driver("modulator", "simulated") is SimulatedModulator
    with pytest.raises(ValueError, match="unknown driver kind 'laser'"):
        installed_drivers("laser")


def test_describe_lists_schemas_and_unavailable_drivers(extra_distribution):
    rows = {d.name: d for d in describe_drivers("camera")}
    assert rows["regtest-good"].summary == "A third-party camera for the registry test."
    assert "exposure_s" in rows["simulated"].schema["properties"]
    assert rows["regtest-missing"].summary.startswith("unavailable:") and rows["regtest-missing"].schema == {}
    names = [d.name for d in describe_drivers("camera")]
    assert names == sorted(names)
    for kind in ("modulator", "safety"):
        for d in describe_drivers(kind):
            assert d.schema.get("type") == "object" and d.summary


def test_build_driver_validates_settings_with_key_paths():
    cam = build_driver("camera", "simulated", {"exposure_s": 0.02, "sensor_shape": [32, 48]}, BenchContext())
    assert isinstance(cam, SimulatedCamera) and cam.exposure_s == 0.02 and cam.sensor_shape == (32, 48)
    with pytest.raises(DriverSettingsError) as err:
        build_driver("camera", "simulated", {"exposure_s": -1, "exposur_s": 1, "faults": [{"kind": "melt", "at_frame": 1}]})
    problems = dict(err.value.problems)
    assert "greater than 0" in problems["settings.exposure_s"]
    assert problems["settings.exposur_s"].startswith("unknown setting; known settings here:")
    assert "exposure_s" in problems["settings.exposur_s"]
    assert "'timeout'" in problems["settings.faults.0.kind"]
    assert str(err.value).startswith("camera driver 'simulated' settings: ")
    with pytest.raises(DriverSettingsError) as err:
        build_driver("camera", "simulated", {"offset_dn": 5000, "bit_depth": 12})
    assert "offset_dn must be in [0, 4095)" in dict(err.value.problems)["settings"]
    with pytest.raises(DriverSettingsError) as err:
        build_driver("modulator", "serial-line", {"commands": {"show": {"send": "SHOW {idx}", "expect": "OK"}}})
    assert "unknown placeholder" in dict(err.value.problems)["settings.commands"]
    with pytest.raises(DriverSettingsError) as err:
        build_driver("safety", "serial-line", {"commands": {"interlock": {"send": "I?", "expect": "I ("}}},
                     path_prefix="safety.settings")
    assert "not a valid regular expression" in dict(err.value.problems)["safety.settings.commands.interlock.expect"]
    with pytest.raises(UnknownDriver):
        build_driver("safety", "laser-curtain", {})
