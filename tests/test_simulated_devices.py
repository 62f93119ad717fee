"""In-process simulated modulator and safety box on the simulated bench."""

from __future__ import annotations

import time

import numpy as np
import pytest

from maskrun.drivers import BenchContext, DeviceDisconnected, DeviceFault, DeviceMisconfigured
from maskrun.simulators.modulator import SimulatedModulator
from maskrun.simulators.safety_box import SimulatedSafetyBox
from maskrun.simulators.optics import SimulatedOptics


@pytest.fixture
def optics():
    rng = np.random.default_rng(9)
    return SimulatedOptics(np.ones((8, 8)), np.exp(2j * np.pi * rng.random((3, 8, 8))), 1e6, (10, 10))


def test_modulator_shows_masks_and_settles(optics):
    mod = SimulatedModulator(SimulatedModulator.Settings(settle_s=0.05), BenchContext(optics=optics))
    with pytest.raises(DeviceDisconnected):
        mod.show(0)
    with mod:
        with pytest.raises(DeviceMisconfigured, match="no masks loaded"):
            mod.show(0)
        mod.load(optics.masks)
        mod.show(1)
        assert optics.shown_mask == 1 and not mod.ready()
        assert optics.wait_trigger(1.0)
        assert mod.ready()
        with pytest.raises(DeviceMisconfigured, match="mask 3 outside 0..2"):
            mod.show(3)
        with pytest.raises(DeviceMisconfigured, match="simulated bench's grid is 8 x 8"):
            mod.load(np.ones((3, 4, 4)))


def test_modulator_load_replaces_the_bench_masks(optics):
    with SimulatedModulator(SimulatedModulator.Settings(), BenchContext(optics=optics)) as mod:
        new = np.ones((5, 8, 8), complex)
        mod.load(new)
        assert optics.mask_count == 5
        mod.show(4)
        assert optics.shown_mask == 4


def test_modulator_alone_keeps_its_own_state():
    with SimulatedModulator(SimulatedModulator.Settings(settle_s=0.0), BenchContext()) as mod:
        mod.load(np.ones((2, 4, 4)))
        mod.show(1)
        assert mod.shown == 1 and mod.ready()


def test_safety_box_interlock_and_guaranteed_close(optics):
    box = SimulatedSafetyBox(SimulatedSafetyBox.Settings(), BenchContext(optics=optics))
    with pytest.raises(ValueError):
        with box:
            optics.interlock_closed = False
            with pytest.raises(DeviceFault, match="interlock is open"):
                box.open_shutter()
            assert not optics.shutter_open
            optics.interlock_closed = True
            box.open_shutter()
            assert box.shutter_is_open() and optics.shutter_open
            optics.interlock_closed = False  # hardware interlock
            assert not optics.shutter_open and box.trips == 1
            optics.interlock_closed = True
            box.open_shutter()
            raise ValueError("something else failed")
    assert not optics.shutter_open
    box.close()
    box.close_shutter()  # safe at any time


def test_safety_box_shutter_travel(optics):
    with SimulatedSafetyBox(SimulatedSafetyBox.Settings(shutter_travel_s=0.05), BenchContext(optics=optics)) as box:
        t0 = time.monotonic()
        box.open_shutter()
        assert time.monotonic() - t0 >= 0.05 and optics.shutter_open


def test_safety_box_alone():
    with SimulatedSafetyBox(SimulatedSafetyBox.Settings(), BenchContext()) as box:
        assert box.interlock_closed() and not box.shutter_is_open()
        box.open_shutter()
        assert box.shutter_is_open()
    assert not box._state.shutter_open
