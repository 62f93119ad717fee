"""The live view: its data model, phase unwrapping, and the real window under a virtual X server.

The headless test runs `maskrun view ADDRESS` as a user would, in its own
process on an Xvfb display, against a live stream: two real runs of a simulated
bench published over loopback ZeroMQ, the sample changed in between with
``bench.optics.set_sample``. Screenshots are taken from the X server (not from
the view itself) and compared for content.
"""

from __future__ import annotations

import json
import os
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
import zmq
from benchcfg import small_bench

from maskrun.daemon.show.figures import PHASE_CMAP, colormap_lut, phase_for_display, unwrap_phase_ls
from maskrun.daemon.record.stream import Publisher, Subscriber
from maskrun.daemon.show.view import normalise_address
from maskrun.daemon.show.view_model import LiveViewState

MASKRUN = str(Path(sys.executable).with_name("maskrun"))


# ----------------------------------------------------------------------------- model, no GUI
@pytest.fixture
def ctx():
    c = zmq.Context()
    yield c
    c.term()


def _joined(ctx, pub, topics=("frame", "estimate", "status", "frameset", "alert")):
    sub = Subscriber(ctx, pub.address, topics)
    for _ in range(200):  # PUB/SUB joins asynchronously: send until one arrives
        pub.publish("event", {})
        pub.publish("status", {"state": "idle"})
        if sub.receive(0.02) is not None:
            break
    while sub.receive(0.05) is not None:
        pass
    return sub


def test_model_follows_a_real_stream(ctx):
    pub = Publisher(ctx, "tcp://127.0.0.1:0", hwm=100)
    sub = _joined(ctx, pub)
    state = LiveViewState()
    frame = np.full((16, 16), 200, np.uint16)
    frame[3, 4] = 4095  # one pixel at full scale
    pub.publish("status", {"state": "acquiring", "passes": 3, "masks": 6, "photons_total": 1.0e6})
    for k in range(3):
        pub.publish("frame", {"pass_index": 1, "mask_index": k, "max_dn": 4095, "photons": 2.0e5,
                              "saturated_fraction": 1 / 256, "flags": []}, frame)
    est = (np.ones((8, 8)) * np.exp(1j * 0.3)).astype(np.complex64)
    pub.publish("estimate", {"pass_index": 1, "passes_used": 2, "residual": 0.02, "error_estimate": 0.01,
                             "true_error": float("nan")}, est)
    pub.publish("alert", {"kind": "check", "level": "warning", "message": "pass 1 mask 2: too few photons"})
    t = 100.0
    for i in range(6):
        msg = sub.receive(2.0)
        assert msg is not None
        state.ingest(msg, now=t + 0.1 * i)
    assert state.received["frame"] == 3 and state.received["estimate"] == 1
    # dose: the published total plus the frames received since
    assert state.photons_total == pytest.approx(1.0e6 + 3 * 2.0e5)
    img, sat = state.frame_image()
    assert sat.sum() == 1 and sat[3, 4]
    assert img[3, 4] == pytest.approx(np.log10(4095), rel=1e-6) and img[0, 0] == pytest.approx(np.log10(200), rel=1e-6)
    phase, levels = state.phase_image()
    assert levels == (-np.pi, np.pi) and np.allclose(phase, 0.0, atol=1e-6)  # global phase removed
    text = state.status_text(now=t + 0.6)
    for part in ("state: acquiring", "pass 2/3", "mask 3/6", "dose 1.6e+06 photons", "saturated 0.39%"):
        assert part in text, (part, text)
    assert "too few photons" in state.alert_text()
    x, y = state.history_arrays()["residual"]
    assert list(x) == [2.0] and list(y) == [0.02]
    assert state.history_arrays()["true_error"][0].size == 0  # NaN (no known sample) is not drawn
    sub.close()
    pub.close()


def test_fps_is_measured_from_arrival_times_and_goes_to_zero_when_frames_stop():
    from maskrun.daemon.record.stream import StreamHeader, StreamMessage

    state = LiveViewState()
    f = np.zeros((4, 4), np.uint16)
    for i in range(21):  # 21 frames 0.05 s apart: 20 intervals in 1 s
        h = StreamHeader(topic="frame", seq=i, global_seq=i, t_s=0.0, dtype="<u2", shape=[4, 4], meta={})
        state.ingest(StreamMessage(h, f, 0), now=10.0 + 0.05 * i)
    assert state.fps(now=11.0) == pytest.approx(20.0)
    assert state.fps(now=20.0) == 0.0
    assert "no data for 9 s" in state.status_text(now=20.0)


def test_unwrapping_matches_a_reference_library_and_the_known_phase():
    from skimage.restoration import unwrap_phase

    y, x = np.mgrid[0:96, 0:128] / 32.0
    true = 3.0 * x + 2.0 * np.sin(1.5 * y) + 0.4 * x * y  # spans about 14 rad, smooth
    wrapped = np.angle(np.exp(1j * true))
    mine = unwrap_phase_ls(wrapped).astype(np.float64)
    # reference: scikit-image's unwrap_phase (Herraez et al., "Fast two-dimensional phase-unwrapping algorithm
    # based on sorting by reliability following a noncontinuous path", Applied Optics 41(35), 2002)
    ref = unwrap_phase(wrapped)
    assert np.ptp((mine - mine.mean()) - (ref - ref.mean())) < 1e-6
    assert np.ptp(mine - true) < 1e-6  # equal to the true phase up to one constant
    assert np.allclose(unwrap_phase_ls(np.zeros((5, 7))), 0.0)


@pytest.mark.parametrize(("given", "expected"), [
    ("5560", "tcp://127.0.0.1:5560"), ("bench-pc:5560", "tcp://bench-pc:5560"),
    ("tcp://10.1.2.3:7000", "tcp://10.1.2.3:7000"), ("ipc:///tmp/s", "ipc:///tmp/s")])
def test_addresses_are_normalised(given, expected):
    assert normalise_address(given) == expected


def test_bad_address_and_missing_extra_give_one_line_errors(tmp_path):
    r = subprocess.run([MASKRUN, "view", "not an address"], capture_output=True, text=True, timeout=60)
    assert r.returncode == 2 and "tcp://HOST:PORT" in r.stderr and "Traceback" not in r.stderr
    # hide PySide6: the view must say which extra to install
    block = tmp_path / "block"
    (block / "PySide6").mkdir(parents=True)
    (block / "PySide6" / "__init__.py").write_text("raise ImportError('PySide6 hidden for this test')\n")
    env = {**os.environ, "PYTHONPATH": str(block), "DISPLAY": ":0"}
    r = subprocess.run([MASKRUN, "view", "5560"], capture_output=True, text=True, env=env, timeout=60)
    assert r.returncode == 2 and "Traceback" not in r.stderr
    assert "pip install 'maskrun[view]'" in " ".join(r.stderr.split())


# ----------------------------------------------------------------------------- the real window
GRAB = """
import sys
from PySide6.QtGui import QGuiApplication
app = QGuiApplication(["grab"])
ok = app.primaryScreen().grabWindow(0).save(sys.argv[1], "PNG")
sys.exit(0 if ok else 1)
"""


@pytest.fixture
def xvfb():
    """A virtual X server on a free display number (Xvfb picks it and reports it on a pipe)."""
    exe = shutil.which("Xvfb")
    if exe is None:
        if os.environ.get("CI"):
            pytest.fail("Xvfb is not installed: .ci/run must install it (apt-get install xvfb)")
        pytest.skip("Xvfb not installed (apt-get install xvfb)")
    r, w = os.pipe()
    proc = subprocess.Popen([exe, "-displayfd", str(w), "-screen", "0", "1400x900x24", "-nolisten", "tcp"],
                            pass_fds=(w,), stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    os.close(w)
    with os.fdopen(r) as f:
        display = ":" + f.readline().strip()
    yield display
    proc.terminate()
    proc.wait(10)


def _grab(display, path):
    env = {**os.environ, "DISPLAY": display, "QT_QPA_PLATFORM": "xcb"}
    subprocess.run([sys.executable, "-c", GRAB, str(path)], env=env, check=True, timeout=60, capture_output=True)
    import matplotlib.image

    return (matplotlib.image.imread(str(path))[..., :3] * 255).astype(np.float64)


def _crop(img, rect, inset=0.04):
    x, y, w, h = rect
    dx, dy = int(w * inset), int(h * inset)
    return img[y + dy : y + h - dy, x + dx : x + w - dx]


def _wait_state(path, cond, timeout_s=30.0):
    t_end = time.monotonic() + timeout_s
    doc = None
    while time.monotonic() < t_end:
        try:
            doc = json.loads(Path(path).read_text())
            if cond(doc):
                return doc
        except (FileNotFoundError, json.JSONDecodeError):
            pass
        time.sleep(0.1)
    raise AssertionError(f"view state never satisfied the condition; last state: {doc}")


def _expected_phase_gray(truth, shape_px):
    """The known sample's phase as the view colours it (twilight LUT), grey levels, sampled to the crop size."""
    lut = colormap_lut(PHASE_CMAP).astype(np.float64)
    ph = phase_for_display(truth)
    idx = np.clip(((ph + np.pi) / (2 * np.pi) * 255).round().astype(int), 0, 255)
    gray = lut[idx].mean(axis=-1)
    rows = (np.arange(shape_px[0]) + 0.5) * truth.shape[0] / shape_px[0]
    cols = (np.arange(shape_px[1]) + 0.5) * truth.shape[1] / shape_px[1]
    return gray[rows.astype(int)[:, None], cols.astype(int)[None, :]]


def _corr(a, b):
    """Correlation coefficient of the inner 90% of two equal-size images (panel borders left out)."""
    m0, m1 = int(0.05 * a.shape[0]), int(0.05 * a.shape[1])
    a, b = a[m0 : a.shape[0] - m0, m1 : a.shape[1] - m1], b[m0 : b.shape[0] - m0, m1 : b.shape[1] - m1]
    a, b = a - a.mean(), b - b.mean()
    return float((a * b).sum() / np.sqrt((a * a).sum() * (b * b).sum()))


def test_view_window_shows_the_live_stream_under_xvfb(xvfb, tmp_path):
    from maskrun.daemon.acquire.bench import build_bench
    from maskrun.daemon.safety.safety import make_acknowledgement
    from maskrun.daemon.acquire.sequencer import RunPlan
    from maskrun.daemon.acquire.session import execute_run

    cfg = small_bench(grid=64, sensor=64, masks=6, passes=3, darks=1, recon_iterations=80)
    bench = build_bench(cfg)
    ctx = zmq.Context()
    pub = Publisher(ctx, "tcp://127.0.0.1:0", hwm=50)
    state_file = tmp_path / "view.json"
    env = {**os.environ, "DISPLAY": xvfb, "QT_QPA_PLATFORM": "xcb"}
    view = subprocess.Popen([MASKRUN, "view", pub.address, "--size", "1300x820", "--state-file", str(state_file)],
                            env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    try:
        bench.open()
        ack = make_acknowledgement(cfg.laser, who="tester", how="test")
        # wait for the window, then until the view has joined the stream
        _wait_state(state_file, lambda d: d["renders"] > 0)
        t_end = time.monotonic() + 20
        while time.monotonic() < t_end:
            pub.publish("status", {"state": "idle"})
            time.sleep(0.1)
            doc = json.loads(state_file.read_text())
            if doc["received"].get("status"):
                break
        truths = {}
        shots = {}
        for name in ("A", "B"):
            if name == "B":  # a different sample: the test plate turned by 90 degrees
                bench.optics.set_sample(np.rot90(bench.optics.sample))
                bench.truth = bench.optics.truth_field()
            truths[name] = bench.truth.copy()
            plan = RunPlan(passes=3, dark_frames=1, exposure_s=cfg.camera.exposure_s,
                           output_path=tmp_path / f"{name}.h5")
            summary = execute_run(bench, plan, ack, publisher=pub, zmq_context=ctx, run_name=name)
            assert summary.state.value == "finished"
            want = 3 if name == "A" else 6
            doc = _wait_state(state_file, lambda d: d["received"].get("estimate", 0) >= want)
            r0 = doc["renders"]
            doc = _wait_state(state_file, lambda d: d["renders"] > r0 + 2)  # drawn after the last estimate
            shots[name] = (_grab(xvfb, tmp_path / f"screen_{name}.png"), doc["panels"])
    finally:
        bench.close()
        view.send_signal(signal.SIGTERM)
        out, err = view.communicate(timeout=30)
        pub.close()
        ctx.term()
    assert view.returncode == 0 and "Fatal" not in err and "Traceback" not in err, err

    img_a, panels = shots["A"]
    img_b, panels_b = shots["B"]
    assert panels == panels_b
    frame = _crop(img_a, panels["frame"])
    assert frame.shape[0] > 100 and frame.shape[1] > 100, panels  # the panel has a sensible size
    # the frame panel is not blank: many colours, real contrast
    assert frame.std() > 10
    assert len(np.unique(frame.reshape(-1, 3), axis=0)) > 50
    # the phase panel shows the sample that is on the bench, and changes when the sample changes
    ph_a = _crop(img_a, panels["phase"], inset=0.0).mean(axis=-1)
    ph_b = _crop(img_b, panels["phase"], inset=0.0).mean(axis=-1)
    assert np.mean(np.abs(ph_a - ph_b)) > 5.0
    exp_a = _expected_phase_gray(truths["A"], ph_a.shape)
    exp_b = _expected_phase_gray(truths["B"], ph_b.shape)
    c_aa, c_bb, c_ab = _corr(ph_a, exp_a), _corr(ph_b, exp_b), _corr(ph_a, exp_b)
    assert c_aa > 0.9 and c_bb > 0.9, (c_aa, c_bb)  # measured 0.97 / 0.97
    assert c_ab < 0.5, c_ab  # the old sample does not match the new picture (measured 0.07)


def _message(topic, meta, array=None, seq=0):
    from maskrun.daemon.record.stream import StreamHeader, StreamMessage

    h = StreamHeader(topic=topic, seq=seq, global_seq=seq, t_s=0.0, dtype=array.dtype.str if array is not None else "",
                     shape=list(array.shape) if array is not None else [], meta=meta)
    return StreamMessage(h, array, 0)


def test_service_status_and_align_frames_fill_the_status_line():
    state = LiveViewState()
    # the periodic status of `maskrun serve` (fields as in service.Service.status())
    state.ingest(_message("status", {"source": "service", "state": "acquiring", "masks": 8, "max_dn": 4095,
                                     "saturation_level": 0.9, "run": {"passes": 5, "pass_index": 2},
                                     "safety": {"shutter_open": True, "interlock_closed": True},
                                     "dose": {"photons_total": 2.5e9, "energy_j": 7.8e-10}}), now=1.0)
    frame = np.array([[3685, 3686], [100, 4095]], np.uint16)  # 0.9 * 4095 = 3685.5
    state.ingest(_message("frame", {"mode": "align", "mask_index": 1, "peak_dn": 4095, "centroid_rc": [0.7, 0.9],
                                    "saturated_fraction": 0.5, "max_dn": 4095}, frame), now=1.1)
    _, sat = state.frame_image()
    assert sat.tolist() == [[False, True], [False, True]]  # the service's saturation level, not full scale
    text = state.status_text(now=1.2)
    for part in ("state: acquiring", "shutter OPEN", "pass 3/5", "mask 2/8", "dose 2.5e+09 photons (7.8e-10 J)",
                 "peak 4095 DN", "centroid row 0.7, col 0.9", "saturated 50.00%"):
        assert part in text, (part, text)


def test_phase_unwrapping_toggle_changes_levels_and_values():
    y, x = np.mgrid[0:32, 0:48]
    ramp = 0.5 * x  # 23.5 rad across: wraps several times
    state = LiveViewState()
    state.ingest(_message("estimate", {"pass_index": 0}, np.exp(1j * ramp).astype(np.complex64)), now=0.0)
    wrapped, levels = state.phase_image()
    assert levels == (-np.pi, np.pi) and wrapped.min() >= -np.pi - 1e-6 and wrapped.max() <= np.pi + 1e-6
    state.unwrap = True
    unwrapped, levels = state.phase_image()
    assert levels[1] - levels[0] == pytest.approx(23.5, abs=1e-3)
    assert np.ptp(unwrapped - ramp) < 1e-4


def test_axis_helpers_pick_readable_values():
    from maskrun.daemon.show.view import log_ticks, nice_ceiling

    assert [nice_ceiling(x) for x in (0.0, 1.0, 1.05, 687.3, 0.0031)] == [1.0, 1.0, 1.2, 800.0, 0.004]
    assert [t[1] for t in log_ticks(0.002, 0.1)] == ["0.002", "0.005", "0.01", "0.02", "0.05", "0.1"]
    assert [t[1] for t in log_ticks(0.007, 0.013)] == ["0.006", "0.007", "0.008", "0.009", "0.01"]
    ticks = log_ticks(1e-9, 1.0)
    assert len(ticks) <= 7 and all(abs(p - np.log10(float(lab))) < 1e-12 for p, lab in ticks)
