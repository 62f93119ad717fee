"""Serial line drivers (LinePort, SerialLineModulator, SerialSafetyBox) against firmware on real ptys."""

from __future__ import annotations

import os
import select
import threading
import time
import tomllib
import tty

import numpy as np
import pytest

from maskrun.drivers import BenchContext, DeviceDisconnected, DeviceFault, DeviceMisconfigured, DeviceTimeout
from maskrun.drivers.registry import build_driver
from maskrun.drivers.serial_modulator import SerialLineModulator
from maskrun.drivers.serial_port import LinePort
from maskrun.drivers.serial_safety import SerialSafetyBox
from maskrun.simulators.optics import SimulatedOptics


@pytest.fixture
def optics():
    rng = np.random.default_rng(2)
    return SimulatedOptics(np.ones((8, 8)), np.exp(2j * np.pi * rng.random((4, 8, 8))), 1e6, (8, 8))


def _timed(fn):
    t0 = time.monotonic()
    try:
        fn()
    finally:
        _timed.elapsed = time.monotonic() - t0


# ------------------------------------------------------------------ LinePort


def test_missing_port_is_named(tmp_path):
    path = str(tmp_path / "ttyNOTHERE")
    with pytest.raises(DeviceDisconnected, match=f"serial port {path} does not exist"):
        LinePort(path, device="modulator").open()


def test_busy_port_is_named(optics, firmware):
    fw = firmware("modulator", optics)
    with LinePort(fw.port) as first:
        with pytest.raises(DeviceDisconnected, match=f"serial port {fw.port} is busy") as err:
            LinePort(fw.port).open()
        assert "close the other program" in str(err.value)
        assert first.query("ID?", r"ID (?P<ident>.+)", 1.0)["ident"] == "sim-modulator 1.0"


def test_query_timeout_is_typed_and_bounded(optics, firmware):
    fw = firmware("modulator", optics, faults=[{"kind": "no_reply", "at_command": 1}])
    with LinePort(fw.port, device="modulator") as port:
        with pytest.raises(DeviceTimeout, match=r"no reply to 'READY\?'.*within 0.3 s"):
            _timed(lambda: port.query("READY?", r"READY (\d)", 0.3))
        assert 0.3 <= _timed.elapsed < 0.6
        assert port.query("READY?", r"READY (\d)", 1.0).group(1) == "1"


def test_garbled_reply_is_a_device_fault_within_the_timeout(optics, firmware):
    fw = firmware("safety", optics, faults=[{"kind": "garbled", "at_command": 1}])
    with LinePort(fw.port, device="safety box") as port:
        with pytest.raises(DeviceFault, match="garbled reply to 'INTERLOCK\\?'"):
            _timed(lambda: port.query("INTERLOCK?", r"INTERLOCK (\w+)", 1.0))
        assert _timed.elapsed < 1.0


def test_error_reply_and_unexpected_reply(optics, firmware):
    fw = firmware("modulator", optics)
    with LinePort(fw.port, device="modulator") as port:
        with pytest.raises(DeviceFault, match="refused 'SHOW 9': mask 9 outside 0..3"):
            port.query("SHOW 9", r"OK SHOW \d+", 1.0)
        with pytest.raises(DeviceFault, match="unexpected reply to 'ID\\?'.*expected /OK/"):
            port.query("ID?", r"OK", 1.0)


def test_unplug_gives_disconnected_then_reconnect(optics, firmware):
    fw = firmware("modulator", optics)
    port = LinePort(fw.port, device="modulator")
    port.open()
    fw.unplug()
    with pytest.raises(DeviceDisconnected, match=f"lost serial port {fw.port}"):
        _timed(lambda: port.query("ID?", r"ID .+", 1.0))
    assert _timed.elapsed < 1.0
    with pytest.raises(DeviceDisconnected, match="does not exist"):
        port.reconnect(timeout_s=0.1)  # still unplugged
    threading.Timer(0.2, fw.replug).start()
    port.reconnect(timeout_s=3.0)
    assert port.query("ID?", r"ID (.+)", 1.0).group(1) == "sim-modulator 1.0"
    port.close()
    port.close()


def test_unplug_fault_mid_command(optics, firmware):
    fw = firmware("modulator", optics, faults=[{"kind": "unplug", "at_command": 2, "duration_s": 0.3}])
    with LinePort(fw.port, device="modulator") as port:
        port.query("ID?", r"ID .+", 1.0)
        with pytest.raises((DeviceDisconnected, DeviceTimeout)):
            _timed(lambda: port.query("SHOW 1", r"OK SHOW 1", 1.0))
        assert _timed.elapsed <= 1.2
        port.reconnect(timeout_s=3.0)
        assert port.query("SHOW 1", r"OK SHOW (\d)", 1.0).group(1) == "1"


# ----------------------------------------------------------------- modulator


def test_serial_modulator_on_simulated_firmware(optics, firmware):
    fw = firmware("modulator", optics, settle_s=0.05)
    ctx = BenchContext(optics=optics, ports={"modulator": fw.port})
    mod = build_driver("modulator", "serial-line", {"port": "sim:modulator", "settle_s": 0.05}, ctx)
    assert isinstance(mod, SerialLineModulator)
    with mod:
        assert mod.identity == "sim-modulator 1.0"
        mod.load(np.ones((3, 8, 8), complex))
        mod.show(2)
        assert optics.shown_mask == 2
        assert mod.settle_s == 0.05
        assert not mod.ready()
        time.sleep(0.06)
        assert mod.ready()
        with pytest.raises(DeviceMisconfigured, match="mask 3 outside 0..2"):
            mod.show(3)
    mod.close()  # safe twice


def test_serial_modulator_reconnects_and_restores_the_count(optics, firmware):
    fw = firmware("modulator", optics)
    ctx = BenchContext(optics=optics, ports={"modulator": fw.port})
    with build_driver("modulator", "serial-line", {}, ctx) as mod:
        mod.load(np.ones((2, 8, 8)))
        fw.unplug()
        with pytest.raises(DeviceDisconnected):
            mod.show(1)
        fw.replug()
        mod.reconnect()
        mod.show(1)
        assert optics.shown_mask == 1
    assert fw.commands_seen >= 5


def test_unknown_sim_port_is_misconfigured():
    mod = build_driver("modulator", "serial-line", {"port": "sim:wheel"}, BenchContext(ports={"modulator": "/x"}))
    with pytest.raises(DeviceMisconfigured, match="sim:wheel.*started: modulator"):
        mod.open()


class _OtherController:
    """A controller with a different protocol (CR LF lines, other words), served on a real pty."""

    def __init__(self):
        self.master, slave = os.openpty()
        tty.setraw(slave)
        self.slave = slave
        self.path = os.ttyname(slave)
        self.pattern = 0
        self.stop = False
        self.thread = threading.Thread(target=self._run, daemon=True)
        self.thread.start()

    def _run(self):
        buf = b""
        while not self.stop:
            r, _, _ = select.select([self.master], [], [], 0.05)
            if not r:
                continue
            buf += os.read(self.master, 1024)
            while b"\r\n" in buf:
                line, buf = buf.split(b"\r\n", 1)
                words = line.decode().split()
                if words == ["*IDN"]:
                    reply = "WHEEL,7"
                elif words[:1] == ["PAT"] and len(words) == 2:
                    self.pattern = int(words[1])
                    reply = f"PAT={self.pattern}"
                elif words == ["STAT"]:
                    reply = "STAT:IDLE"
                elif words[:1] == ["NPAT"]:
                    reply = f"NPAT={words[1]}"
                else:
                    reply = "?BAD"
                os.write(self.master, reply.encode() + b"\r\n")

    def close(self):
        self.stop = True
        self.thread.join()
        os.close(self.master)
        os.close(self.slave)


def test_a_new_controller_is_driven_from_settings_alone():
    ctl = _OtherController()
    try:
        config = tomllib.loads(
            f"""
            [modulator.settings]
            port = "{ctl.path}"
            baud = 9600
            terminator = "\\r\\n"
            error_reply = '^\\?(?P<reason>.*)$'
            ready_value = "IDLE"
            [modulator.settings.commands]
            identify = {{ send = "*IDN", expect = 'WHEEL,(?P<ident>\\d+)' }}
            set_count = {{ send = "NPAT {{count}}", expect = 'NPAT=(?P<count>\\d+)' }}
            show = {{ send = "PAT {{index}}", expect = 'PAT=(?P<index>\\d+)', timeout_s = 0.5 }}
            ready = {{ send = "STAT", expect = 'STAT:(?P<ready>\\w+)' }}
            """
        )
        with build_driver("modulator", "serial-line", config["modulator"]["settings"], BenchContext()) as mod:
            assert mod.identity == "7"
            mod.load(np.ones((5, 4, 4)))
            mod.show(4)
            assert ctl.pattern == 4
            assert mod.ready()
    finally:
        ctl.close()


# --------------------------------------------------------------- safety box


def test_serial_safety_interlock_refusal(optics, firmware):
    fw = firmware("safety", optics)
    ctx = BenchContext(optics=optics, ports={"safety": fw.port})
    with build_driver("safety", "serial-line", {}, ctx) as box:
        optics.interlock_closed = False
        assert not box.interlock_closed()
        with pytest.raises(DeviceFault, match="interlock is open"):
            box.open_shutter()
        assert not optics.shutter_open and not box.shutter_is_open()
        optics.interlock_closed = True
        box.open_shutter()
        assert optics.shutter_open and box.shutter_is_open()
        optics.interlock_closed = False  # the hardware interlock closes it
        assert not box.shutter_is_open()


def test_serial_safety_guaranteed_close(optics, firmware):
    fw = firmware("safety", optics)
    ctx = BenchContext(optics=optics, ports={"safety": fw.port})
    box = SerialSafetyBox(SerialSafetyBox.Settings(), ctx)
    with pytest.raises(RuntimeError, match="boom"):
        with box:
            box.open_shutter()
            assert optics.shutter_open
            raise RuntimeError("boom")
    assert not optics.shutter_open
    box.open()
    box.open_shutter()
    box.close()
    assert not optics.shutter_open
    box.close()  # safe twice
    seen = fw.commands_seen
    box.close()
    assert fw.commands_seen == seen


def test_serial_safety_close_after_failed_open_is_safe(tmp_path):
    box = SerialSafetyBox(SerialSafetyBox.Settings(port=str(tmp_path / "nothing")), BenchContext())
    with pytest.raises(DeviceDisconnected):
        box.open()
    box.close()


def test_serial_safety_close_reconnects_after_a_replug(optics, firmware):
    fw = firmware("safety", optics)
    ctx = BenchContext(optics=optics, ports={"safety": fw.port})
    box = SerialSafetyBox(SerialSafetyBox.Settings(), ctx)
    box.open()
    fw.unplug()
    fw.replug()
    seen = fw.commands_seen
    box.close()  # the line was lost; close reconnects and sends the close command
    assert fw.commands_seen >= seen + 2


def test_serial_safety_close_reports_an_unconfirmed_shutter(optics, firmware):
    fw = firmware("safety", optics)
    ctx = BenchContext(optics=optics, ports={"safety": fw.port})
    box = SerialSafetyBox(SerialSafetyBox.Settings(reconnect_timeout_s=0.1), ctx)
    box.open()
    fw.unplug()
    with pytest.raises(DeviceFault, match="could not confirm the shutter closed") as err:
        box.close()
    assert "by hand" in str(err.value)
    # inside a with block, the original error is kept
    fw.replug()
    box = SerialSafetyBox(SerialSafetyBox.Settings(reconnect_timeout_s=0.1), ctx)
    with pytest.raises(KeyError):
        with box:
            fw.unplug()
            raise KeyError("original")


def test_serial_safety_fault_surfaces_as_timeout(optics, firmware):
    fw = firmware("safety", optics, faults=[{"kind": "no_reply", "at_command": 2}])
    ctx = BenchContext(optics=optics, ports={"safety": fw.port})
    with build_driver("safety", "serial-line", {"timeout_s": 0.2}, ctx) as box:
        with pytest.raises(DeviceTimeout):
            _timed(box.interlock_closed)
        assert _timed.elapsed < 0.5
        assert box.interlock_closed()


def test_safety_box_watchdog_closes_the_shutter_when_the_host_falls_silent(optics, firmware):
    """The box's own watchdog, armed by the driver on open: commands keep the shutter open; silence
    with the shutter open (a hung host program) closes it, and the box counts the trip."""
    fw = firmware("safety", optics)
    ctx = BenchContext(optics=optics, ports={"safety": fw.port})
    box = SerialSafetyBox(SerialSafetyBox.Settings(watchdog_s=0.4), ctx)
    with box:
        box.open_shutter()
        for _ in range(8):  # 0.8 s of a host that keeps talking: twice the watchdog period
            time.sleep(0.1)
            assert box.interlock_closed()
        assert optics.shutter_open
        time.sleep(0.8)  # the host falls silent with the shutter open
        assert not optics.shutter_open
        # the box's own trip counter, read over the driver's line
        assert box._port.query("WATCHDOG?", r"WATCHDOG 0.4 TRIPS (?P<n>\d+)", 1.0)["n"] == "1"
        box.open_shutter()  # a live host can open it again
        assert optics.shutter_open
    assert not optics.shutter_open


def test_safety_box_watchdog_settings_are_checked(optics, firmware):
    fw = firmware("safety", optics)
    with pytest.raises(ValueError, match="watchdog_s > 0 needs commands.watchdog"):
        SerialSafetyBox.Settings(watchdog_s=1.0, commands={"watchdog": None})
    with pytest.raises(ValueError, match="watchdog.send uses unknown placeholder"):
        SerialSafetyBox.Settings(commands={"watchdog": {"send": "WD {period}", "expect": "OK"}})
    with LinePort(fw.port, device="safety box") as port:  # the firmware refuses nonsense
        for bad in ("-1", "soon", "inf"):
            with pytest.raises(DeviceFault, match="watchdog must be 0 .off. or a positive number of seconds"):
                port.query(f"WATCHDOG {bad}", r"OK WATCHDOG \S+", 1.0)
        assert port.query("WATCHDOG 0", r"OK WATCHDOG (?P<s>\S+)", 1.0)["s"] == "0"
