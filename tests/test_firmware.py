"""Firmware simulators on real pseudo-terminals, driven with pyserial."""

from __future__ import annotations

import os
import time

import numpy as np
import pytest
import serial

from maskrun.simulators.firmware import FirmwareFault, start_firmware
from maskrun.simulators.optics import SimulatedOptics


@pytest.fixture
def optics():
    rng = np.random.default_rng(1)
    return SimulatedOptics(np.ones((8, 8)), np.exp(2j * np.pi * rng.random((4, 8, 8))), 1e6, (8, 8))


def _open(path):
    return serial.Serial(path, 115200, timeout=0.5)


def _ask(port, line):
    port.write((line + "\n").encode("ascii"))
    return port.readline()


def test_modulator_protocol(optics, firmware):
    fw = firmware("modulator", optics, settle_s=0.1)
    assert os.path.islink(fw.port) and os.readlink(fw.port).startswith("/dev/pts/")
    with _open(fw.port) as port:
        assert _ask(port, "ID?") == b"ID sim-modulator 1.0\n"
        assert _ask(port, "COUNT 5") == b"ERR count 5 outside 1..4 (masks stored in the controller)\n"
        assert _ask(port, "COUNT 3") == b"OK COUNT 3\n"
        assert _ask(port, "SHOW 3") == b"ERR mask 3 outside 0..2\n"
        t_show = time.monotonic()
        assert _ask(port, "SHOW 2") == b"OK SHOW 2\n"
        assert optics.shown_mask == 2
        assert _ask(port, "READY?") == b"READY 0\n"
        assert optics.wait_trigger(2.0)  # the trigger pulse comes after the settle time
        assert time.monotonic() - t_show >= 0.1
        assert _ask(port, "READY?") == b"READY 1\n"
        assert _ask(port, "TRIGOUT 0") == b"OK TRIGOUT 0\n"
        assert _ask(port, "SHOW 1") == b"OK SHOW 1\n"
        assert not optics.wait_trigger(0.2)
        assert _ask(port, "FLY") == b"ERR unknown command FLY\n"
        assert _ask(port, "SHOW x") == b"ERR mask index must be a whole number, got x\n"
        assert _ask(port, "") == b"ERR empty command\n"
        port.write(b"COUNT?\r\n")  # CR LF line endings are accepted too
        assert port.readline() == b"COUNT 3\n"
    assert fw.commands_seen == 13


def test_safety_protocol_and_interlock_refusal(optics, firmware):
    fw = firmware("safety", optics)
    with _open(fw.port) as port:
        assert _ask(port, "ID?") == b"ID sim-safety 1.0\n"
        assert _ask(port, "SHUTTER?") == b"SHUTTER CLOSED\n"
        optics.interlock_closed = False
        assert _ask(port, "INTERLOCK?") == b"INTERLOCK OPEN\n"
        assert _ask(port, "SHUTTER OPEN") == b"ERR interlock open\n"
        assert not optics.shutter_open
        optics.interlock_closed = True
        assert _ask(port, "INTERLOCK?") == b"INTERLOCK CLOSED\n"
        assert _ask(port, "SHUTTER OPEN") == b"OK SHUTTER OPEN\n"
        assert optics.shutter_open
        assert _ask(port, "SHUTTER CLOSE") == b"OK SHUTTER CLOSED\n"
        assert not optics.shutter_open


def test_hardware_interlock_closes_the_shutter_by_itself(optics, firmware):
    fw = firmware("safety", optics)
    with _open(fw.port) as port:
        assert _ask(port, "SHUTTER OPEN") == b"OK SHUTTER OPEN\n"
        optics.interlock_closed = False  # a door opens: no command from the host needed
        assert not optics.shutter_open
        assert _ask(port, "SHUTTER?") == b"SHUTTER CLOSED\n"


def test_safety_link_loss_closes_the_shutter(optics, firmware):
    fw = firmware("safety", optics)
    with _open(fw.port) as port:
        assert _ask(port, "SHUTTER OPEN") == b"OK SHUTTER OPEN\n"
    fw.unplug()
    assert not optics.shutter_open


def test_no_reply_fault(optics, firmware):
    fw = firmware("modulator", optics, faults=[{"kind": "no_reply", "at_command": 2, "count": 2}])
    with _open(fw.port) as port:
        assert _ask(port, "ID?") == b"ID sim-modulator 1.0\n"
        t0 = time.monotonic()
        assert _ask(port, "SHOW 1") == b""  # nothing within pyserial's 0.5 s timeout
        assert time.monotonic() - t0 >= 0.45
        assert optics.shown_mask == 1  # the command still acted
        assert _ask(port, "READY?") == b""
        assert _ask(port, "READY?") == b"READY 1\n"


def test_garbled_fault(optics, firmware):
    fw = firmware("safety", optics, faults=[FirmwareFault(kind="garbled", at_command=1)])
    with _open(fw.port) as port:
        reply = _ask(port, "INTERLOCK?")
        assert reply.endswith(b"\n") and all(b >= 0x80 for b in reply[:-1])
        with pytest.raises(UnicodeDecodeError):
            reply[:-1].decode("ascii")
        assert _ask(port, "INTERLOCK?") == b"INTERLOCK CLOSED\n"


def test_unplug_fault_then_automatic_replug(optics, firmware):
    fw = firmware("modulator", optics, faults=[{"kind": "unplug", "at_command": 2, "duration_s": 0.3}])
    with _open(fw.port) as port:
        assert _ask(port, "ID?") == b"ID sim-modulator 1.0\n"
        port.write(b"SHOW 1\n")
        deadline = time.monotonic() + 2
        while fw.plugged and time.monotonic() < deadline:
            time.sleep(0.01)
        assert not fw.plugged and not os.path.lexists(fw.port)
        with pytest.raises(serial.SerialException):
            port.write(b"ID?\n")
            port.readline()
    assert optics.shown_mask is None  # unplugged before acting on the command
    deadline = time.monotonic() + 3
    while not os.path.exists(fw.port) and time.monotonic() < deadline:
        time.sleep(0.02)
    assert fw.plugged
    with _open(fw.port) as port:
        assert _ask(port, "ID?") == b"ID sim-modulator 1.0\n"
    assert fw.commands_seen == 3


def test_manual_unplug_replug_repoints_the_symlink(optics, firmware):
    fw = firmware("safety", optics, name="box")
    assert os.path.basename(fw.port) == "box"
    port = _open(fw.port)
    fw.unplug()
    assert not os.path.lexists(fw.port)
    with pytest.raises(serial.SerialException):
        port.write(b"ID?\n")
        port.readline()
    port.close()
    fw.replug()
    assert os.path.islink(fw.port) and os.readlink(fw.port) == fw.device_path
    with _open(fw.port) as port:
        assert _ask(port, "ID?") == b"ID sim-safety 1.0\n"
    folder = os.path.dirname(fw.port)
    fw.stop()
    fw.stop()  # safe twice
    assert not os.path.exists(folder)


def test_bad_kind_and_fault_are_rejected(optics):
    with pytest.raises(ValueError, match="unknown firmware kind 'laser'"):
        start_firmware("laser", optics)
    with pytest.raises(ValueError, match="at_command"):
        start_firmware("modulator", optics, faults=[{"kind": "no_reply", "at_command": 0}])
