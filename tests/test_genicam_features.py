"""The genicam driver's feature layer on a real GenApi node map: the genicam binding loads our own
camera description (tests/genicam_test_camera.xml, SFNC names) and evaluates it against a register
port implemented here, so every value the driver sets is checked in the camera's registers.

Outside facts: GenICam Standard Features Naming Convention (SFNC) 2.7, EMVA 2022: ExposureTime is
in microseconds (section 'ExposureTime'), TriggerSelector/TriggerMode/TriggerSource/TriggerSoftware
start one frame per software trigger (section 'Acquisition Control'), Width/OffsetX follow their
Inc (section 'Image Format Control'); GenApi's own range and increment checks (the standard's
reference implementation in the genicam wheel) refuse what the description forbids.
"""

import struct
from pathlib import Path

import pytest
from hypothesis import given
from hypothesis import strategies as st

genapi = pytest.importorskip("genicam.genapi", reason="the genicam extra is not installed")

from maskrun.drivers.errors import DeviceDisconnected, DeviceMisconfigured  # noqa: E402
from maskrun.drivers.genicam_features import Features  # noqa: E402
from maskrun.drivers.genicam_roi import AxisLimits, RoiRefused, plan_roi  # noqa: E402

XML = (Path(__file__).parent / "genicam_test_camera.xml").read_text()

# register addresses of genicam_test_camera.xml
WIDTH, HEIGHT, OFFSET_X, OFFSET_Y, BINNING, PIXEL_FORMAT = 0x100, 0x104, 0x108, 0x10C, 0x110, 0x114
EXPOSURE, EXPOSURE_AUTO = 0x200, 0x208
TRIG_SELECTOR, TRIG_MODE, TRIG_SOURCE, TRIG_ACTIVATION, TRIG_SOFTWARE = 0x300, 0x304, 0x308, 0x30C, 0x310
TEMPERATURE = 0x500


class RegisterCamera(genapi.AbstractPort):
    """The camera side: a register file; writing TriggerSoftware counts one exposure and self-clears."""

    def __init__(self):
        super().__init__()
        self.mem = bytearray(0x1000)
        self.triggers = 0
        for address, value in ((WIDTH, 1280), (HEIGHT, 1024), (PIXEL_FORMAT, 0x01080001), (BINNING, 1),
                               (EXPOSURE_AUTO, 2), (TRIG_MODE, 0)):
            self.mem[address:address + 4] = struct.pack("<I", value)
        self.mem[EXPOSURE:EXPOSURE + 8] = struct.pack("<d", 5000.0)
        self.mem[TEMPERATURE:TEMPERATURE + 4] = struct.pack("<f", 41.5)

    def u32(self, address):
        return struct.unpack("<I", self.mem[address:address + 4])[0]

    def read(self, address, length):
        return bytes(self.mem[address:address + length])

    def write(self, address, value):
        value = bytes(value)
        if address == TRIG_SOFTWARE:
            self.triggers += struct.unpack("<I", value)[0] == 1 and self.u32(TRIG_MODE) == 1
            return  # self-clearing: reads back 0, so the command is done
        self.mem[address:address + len(value)] = value

    def get_access_mode(self):
        return genapi.EAccessMode.RW


@pytest.fixture
def camera():
    node_map = genapi.NodeMap()
    node_map.load_xml_from_string(XML)
    port = RegisterCamera()
    node_map.connect(port, "Device")
    yield Features(node_map), port
    node_map.disconnect()


def test_exposure_in_seconds_is_written_as_microseconds(camera):
    features, port = camera
    assert features.exposure_s() == pytest.approx(5000e-6)
    used = features.set_exposure_s(0.002)
    # SFNC: ExposureTime in us -> the register holds 2000.0
    assert struct.unpack("<d", port.mem[EXPOSURE:EXPOSURE + 8])[0] == pytest.approx(2000.0)
    assert used == pytest.approx(0.002)
    assert port.u32(EXPOSURE_AUTO) == 0  # automatic exposure switched off before a manual one


def test_exposure_follows_the_camera_step_and_refuses_outside_its_limits(camera):
    features, port = camera
    assert features.set_exposure_s(1234e-6) == pytest.approx(1230e-6)  # steps of 10 us from 10 us
    before = bytes(port.mem[EXPOSURE:EXPOSURE + 8])
    with pytest.raises(DeviceMisconfigured, match=r"exposure 5e-06 s is outside.*1e-05 s to 1 s") as err:
        features.set_exposure_s(5e-6)
    assert "ExposureTime 10 to 1e+06 us" in str(err.value)
    with pytest.raises(DeviceMisconfigured, match="outside"):
        features.set_exposure_s(2.0)
    assert bytes(port.mem[EXPOSURE:EXPOSURE + 8]) == before  # nothing written for a refused value


def test_integer_steps_refused_with_the_nearest_valid_value(camera):
    features, port = camera
    assert features.set_int("Width", 640, "the region of interest") == 640 and port.u32(WIDTH) == 640
    with pytest.raises(DeviceMisconfigured, match=r"Width = 650 .*Width 64..1280 in steps of 16\); nearest valid: 656"):
        features.set_int("Width", 650, "the region of interest")
    assert port.u32(WIDTH) == 640


def test_software_trigger_sets_frame_start_and_reaches_the_camera(camera):
    features, port = camera
    features.set_trigger("Software")
    assert (port.u32(TRIG_SELECTOR), port.u32(TRIG_MODE), port.u32(TRIG_SOURCE)) == (0, 1, 0)
    for _ in range(3):
        features.software_trigger()
    assert port.triggers == 3
    features.set_trigger("Line1", "FallingEdge")
    assert (port.u32(TRIG_MODE), port.u32(TRIG_SOURCE), port.u32(TRIG_ACTIVATION)) == (1, 2, 1)
    with pytest.raises(DeviceMisconfigured, match="TriggerSource = 'Line7' is not offered.*Software, Line0, Line1"):
        features.set_trigger("Line7")
    features.trigger_off()
    assert port.u32(TRIG_MODE) == 0


def test_a_feature_the_camera_lacks_is_named(camera):
    features, _ = camera
    assert not features.has("Gain") and features.has("BlackLevel")
    with pytest.raises(DeviceMisconfigured, match=r"the camera has no Gain feature \(needed for gain\)"):
        features.set_float("Gain", 6.0, "gain")
    assert features.set_float("BlackLevel", 12.0, "black level") == pytest.approx(12.0)


def test_read_only_status_values_go_to_the_metadata(camera):
    features, _ = camera
    assert features.status_values() == {"DeviceTemperature": pytest.approx(41.5), "BlackLevel": 0.0}


def test_pixel_format_codes_map_to_their_names(camera):
    features, port = camera
    features.set_enum("PixelFormat", "Mono12p", "the pixel format")
    assert port.u32(PIXEL_FORMAT) == 0x010C0047  # PFNC code of Mono12p (PFNC 2.1, table of formats)
    assert features.enum_symbol_of("PixelFormat", 0x01100007) == "Mono16"
    with pytest.raises(DeviceMisconfigured, match="PixelFormat = 'Mono10p' is not offered"):
        features.set_enum("PixelFormat", "Mono10p", "the pixel format")


def _axes(features):
    def axis(size, off, full):
        return AxisLimits(features.int_range(size, "roi"), features.int_range(off, "roi").inc, full)

    return axis("Height", "OffsetY", 1024), axis("Width", "OffsetX", 1280)


def test_roi_plan_on_the_camera_steps(camera):
    features, _ = camera
    rows, cols = _axes(features)
    plan = plan_roi((100, 200, 128, 256), 1, rows, cols, host_crop=False)
    assert plan.exact and plan.camera == (100, 200, 128, 256)
    with pytest.raises(RoiRefused) as err:
        plan_roi((101, 203, 100, 100), 1, rows, cols, host_crop=False)
    # width steps of 16 from 64 -> 96; OffsetX steps of 8 placed to keep the centre (253 -> 256, not 248)
    assert err.value.nearest == (100, 208, 100, 96)
    assert "Width 64..1280 in steps of 16" in str(err.value)
    crop = plan_roi((101, 203, 100, 100), 1, rows, cols, host_crop=True)
    assert crop.camera == (100, 200, 102, 112) and crop.crop == (1, 3, 100, 100)


@given(st.integers(0, 1023), st.integers(0, 1279), st.integers(1, 1024), st.integers(1, 1280))
def test_every_roi_that_fits_is_taken_exactly_or_covered_or_refused_with_a_valid_nearest(r0, c0, h, w):
    node_map = genapi.NodeMap()
    node_map.load_xml_from_string(XML)
    node_map.connect(RegisterCamera(), "Device")
    rows, cols = _axes(Features(node_map))
    h, w = min(h, 1024 - r0), min(w, 1280 - c0)
    plan = plan_roi((r0, c0, h, w), 1, rows, cols, host_crop=True)
    y, x, ch, cw = plan.camera
    assert rows.size.valid(ch) and cols.size.valid(cw) and y % 2 == 0 and x % 8 == 0
    assert y <= r0 and x <= c0 and y + ch >= r0 + h and x + cw >= c0 + w and y + ch <= 1024 and x + cw <= 1280
    try:
        exact = plan_roi((r0, c0, h, w), 1, rows, cols, host_crop=False)
    except RoiRefused as err:
        nr0, nc0, nh, nw = err.nearest
        # the nearest it names is one the camera takes
        assert plan_roi(err.nearest, 1, rows, cols, host_crop=False).exact
        assert nr0 + nh <= 1024 and nc0 + nw <= 1280
    else:
        assert exact.camera == (r0, c0, h, w)


class UnpluggedCamera(RegisterCamera):
    """The same registers behind a link that can be cut: every access then fails as a transport error."""

    cut = False

    def read(self, address, length):
        if self.cut:
            raise OSError("link lost")
        return super().read(address, length)

    def write(self, address, value):
        if self.cut:
            raise OSError("link lost")
        super().write(address, value)


def test_a_camera_gone_mid_run_is_a_disconnect_not_a_refusal():
    node_map = genapi.NodeMap()
    node_map.load_xml_from_string(XML)
    port = UnpluggedCamera()
    node_map.connect(port, "Device")
    features = Features(node_map)
    features.set_trigger("Software")
    features.software_trigger()
    port.cut = True
    with pytest.raises(DeviceDisconnected, match="did not answer while the command TriggerSoftware"):
        features.software_trigger()
    with pytest.raises(DeviceDisconnected, match="did not answer"):
        features.set_exposure_s(0.01)
    port.cut = False  # plugged back: the same node map works again
    features.software_trigger()
    assert port.triggers == 2
