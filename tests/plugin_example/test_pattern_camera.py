"""The example package's own test: the conformance kit from maskrun checks the driver.

A third-party camera package copies this file: one call runs every contract check and
fails with a list of the broken promises.
"""

from maskrun.drivers.conformance import assert_conformant


def test_pattern_camera_keeps_the_camera_contract():
    results = assert_conformant(
        "example-pattern",                       # the entry point name from pyproject.toml
        {"sensor_shape": [32, 48], "bit_depth": 12},
        failing_settings={"device_index": 5},    # settings under which open() must fail cleanly
    )
    assert {r.name for r in results if r.status == "skip"} == {"hardware trigger"}
