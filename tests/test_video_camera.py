"""The OpenCV video camera: without OpenCV it says which extra to install; with OpenCV it plays a
real (lossless) video file written here; a real video device is used only where one exists."""

import glob
import os
import subprocess
import sys
import threading
import time

import numpy as np
import pytest

from maskrun.drivers import DeviceDisconnected, DeviceMisconfigured, DeviceTimeout
from maskrun.drivers.conformance import assert_conformant
from maskrun.drivers.registry import build_driver, installed_drivers

BGR = (10, 100, 200)  # blue, green, red of the test frames (OpenCV order)


def test_listed_and_built_without_importing_opencv():
    # the module must not import cv2 at import time, so the driver is listed where OpenCV is absent
    code = ("import sys; sys.modules['cv2'] = None\n"
            "from maskrun.drivers.registry import installed_drivers, build_driver\n"
            "assert 'usb-video' in installed_drivers('camera')\n"
            "cam = build_driver('camera', 'usb-video', {'device': 3})\n"
            "try:\n    cam.open()\nexcept Exception as exc:\n    print(type(exc).__name__, exc)\n"
            "cam.close()\n")
    proc = subprocess.run([sys.executable, "-P", "-c", code], capture_output=True, text=True, timeout=60)
    assert proc.returncode == 0, proc.stderr
    assert proc.stdout.startswith("DeviceMisconfigured") and "maskrun[video]" in proc.stdout


def test_missing_opencv_names_the_extra(monkeypatch):
    monkeypatch.setitem(sys.modules, "cv2", None)  # as if OpenCV were not installed
    cam = build_driver("camera", "usb-video", {})
    with pytest.raises(DeviceMisconfigured, match=r"maskrun\[video\]"):
        cam.open()
    cam.close()


def test_settings_are_checked():
    assert "usb-video" in installed_drivers("camera")
    with pytest.raises(Exception, match="channel"):
        build_driver("camera", "usb-video", {"channel": "purple"})


# ------------------------------------------------------------------ with OpenCV


@pytest.fixture
def clip(tmp_path):
    cv2 = pytest.importorskip("cv2", reason="OpenCV not installed (optional extra: pip install 'maskrun[video]')")
    path = tmp_path / "clip.avi"
    writer = cv2.VideoWriter(str(path), cv2.VideoWriter_fourcc(*"FFV1"), 10, (40, 30), True)
    if not writer.isOpened():
        pytest.skip("this OpenCV build cannot write FFV1 video")
    for i in range(6):
        img = np.empty((30, 40, 3), np.uint8)
        img[...] = BGR
        img[0, 0] = (i, i, i)  # frame number in the corner
        writer.write(img)
    writer.release()
    return path


@pytest.mark.parametrize(("channel", "expected"), [
    # ITU-R Recommendation BT.601 luma: Y = 0.299 R + 0.587 G + 0.114 B
    ("luma", round(0.299 * 200 + 0.587 * 100 + 0.114 * 10)),
    ("red", 200), ("green", 100), ("blue", 10),
])
def test_frames_become_one_channel_uint8(clip, channel, expected):
    with build_driver("camera", "usb-video", {"device": str(clip), "channel": channel}) as cam:
        assert cam.sensor_shape == (30, 40) and cam.bit_depth == 8
        frame = cam.grab(2.0)
    assert frame.pixels.dtype == np.uint8 and frame.pixels.shape == (30, 40)
    assert frame.pixels[10, 10] == expected


def test_file_plays_in_order_then_ends_with_a_timeout(clip):
    with build_driver("camera", "usb-video", {"device": str(clip)}) as cam:
        cam.roi = (0, 0, 2, 3)
        frames = [cam.grab(2.0) for _ in range(6)]
        with pytest.raises(DeviceTimeout, match="no more frames"):
            cam.grab(2.0)
    assert [f.frame_id for f in frames] == [1, 2, 3, 4, 5, 6]
    assert [int(f.pixels[0, 0]) for f in frames] == [0, 1, 2, 3, 4, 5]
    assert frames[0].pixels.shape == (2, 3)


def test_roi_outside_the_frame_and_bad_exposure_are_refused(clip):
    with build_driver("camera", "usb-video", {"device": str(clip)}) as cam:
        with pytest.raises(DeviceMisconfigured, match="30 x 40"):
            cam.roi = (0, 0, 31, 40)
        with pytest.raises(DeviceMisconfigured):
            cam.exposure_s = -1


def test_missing_device_is_a_clear_error_and_close_is_safe(tmp_path):
    pytest.importorskip("cv2", reason="OpenCV not installed (optional extra: pip install 'maskrun[video]')")
    cam = build_driver("camera", "usb-video", {"device": str(tmp_path / "none.avi")})
    with pytest.raises(DeviceDisconnected, match="cannot open video device"):
        cam.open()
    cam.close()
    cam.close()


def test_video_file_keeps_the_camera_contract(clip, tmp_path):
    # the conformance kit's checks each open a fresh camera; 6 frames per opening are enough
    assert_conformant("usb-video", {"device": str(clip)}, failing_settings={"device": str(tmp_path / "none.avi")})


# ------------------------------------------------------------------ a real device, where one exists


@pytest.mark.hardware
def test_real_video_device_keeps_the_camera_contract():
    pytest.importorskip("cv2", reason="OpenCV not installed (optional extra: pip install 'maskrun[video]')")
    devices = sorted(glob.glob("/dev/video*"))
    if not devices:
        pytest.skip("no video device (/dev/video*) on this machine")
    assert_conformant("usb-video", {"device": devices[0]})


def test_a_stalled_source_times_out_within_the_timeout_and_recovers(tmp_path):
    # A real stalled stream: motion-JPEG through a named pipe whose writer pauses after some frames.
    cv2 = pytest.importorskip("cv2", reason="OpenCV not installed (optional extra: pip install 'maskrun[video]')")
    fifo = tmp_path / "stream.mjpeg"
    os.mkfifo(fifo)
    rng = np.random.default_rng(0)
    # noisy frames compress badly, so the reader's format probing is done after a few of them
    jpegs = [cv2.imencode(".jpg", rng.integers(0, 256, (480, 640, 3), dtype=np.uint8),
                          [cv2.IMWRITE_JPEG_QUALITY, 100])[1].tobytes() for _ in range(14)]
    resume = threading.Event()

    def writer():
        try:
            with open(fifo, "wb") as f:
                for b in jpegs[:12]:
                    f.write(b)
                f.flush()
                resume.wait(timeout=10.0)
                for b in jpegs[12:]:
                    f.write(b)
        except BrokenPipeError:
            pass  # the camera closed the stream: expected at the end

    t = threading.Thread(target=writer, daemon=True)
    t.start()
    cam = build_driver("camera", "usb-video", {"device": str(fifo)})
    try:
        cam.open()
        last_id = 0
        for _ in range(13):
            t0 = time.monotonic()
            try:
                last_id = cam.grab(0.3).frame_id
            except DeviceTimeout as exc:
                took = time.monotonic() - t0
                assert "no video frame within 0.3 s" in str(exc)
                break
        else:
            pytest.fail("the stalled stream never timed out")
        assert 0.25 < took < 0.8
        resume.set()
        frame = cam.grab(5.0)
        assert frame.frame_id == last_id + 1 and frame.pixels.shape == (480, 640)
    finally:
        resume.set()
        cam.close()
        t.join(timeout=10)


def test_roi_set_before_open_must_fit_the_delivered_frames(clip):
    cam = build_driver("camera", "usb-video", {"device": str(clip), "width": 200, "height": 100})
    cam.roi = (0, 0, 50, 100)  # fits the requested size, not the 30 x 40 frames the file delivers
    with pytest.raises(DeviceMisconfigured, match="does not fit the 30 x 40 frames"):
        cam.open()
    cam.close()
    cam.roi = (0, 0, 30, 40)
    with cam:
        assert cam.grab(2.0).pixels.shape == (30, 40)
