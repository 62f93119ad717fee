"""Align mode on the real daemon (subprocess, loopback sockets): free-running frames, live figures checked
against a reference library, saturated pixels highlighted, and a follow-mode phase estimate that follows a
change of the (simulated) sample."""

from __future__ import annotations

import io
import time

import numpy as np
import pytest
import zmq
from rich.console import Console
from scipy import ndimage

from maskrun.daemon.service.client import RequestRefused, ServiceClient
from maskrun.daemon.record.stream import Subscriber
from maskrun.daemon.show.watch import SATURATED_RGB, WatchModel, render
from maskrun.reconstruct import relative_error
from servicehelp import Daemon, service_config_text

OFFSET_DN = 100.0  # [response] offset_dn of the bench config: the align dark level before any dark frames


@pytest.fixture(scope="module")
def daemon(tmp_path_factory):
    d = Daemon(tmp_path_factory.mktemp("svc-align"), service_config_text(passes=2, exposure_s=0.002)).wait_ready()
    yield d
    assert d.stop() == 0, d.output()


@pytest.fixture(scope="module")
def client(daemon):
    with ServiceClient(daemon.control, timeout_s=10) as c:
        c.acknowledge("align tester")
        yield c


@pytest.fixture
def sub(daemon):
    ctx = zmq.Context()
    s = Subscriber(ctx, daemon.stream, ("frame", "preview", "check", "estimate", "frameset", "alert", "event"), hwm=1000)
    time.sleep(0.3)  # let the subscription reach the publisher
    yield s
    s.close()
    ctx.term()


def collect(sub, until, timeout_s: float = 15.0):
    """Receive messages until ``until(msg)`` is true; returns the message."""
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        msg = sub.receive(timeout_s=0.5)
        if msg is not None and until(msg):
            return msg
    raise TimeoutError("the stream did not deliver the expected message")


def test_align_figures_match_a_reference_computation(client, sub):
    client.align_start()  # cycle all masks
    try:
        frames: dict[int, np.ndarray] = {}
        checked = 0
        deadline = time.monotonic() + 15
        while checked < 5 and time.monotonic() < deadline:
            msg = sub.receive(timeout_s=0.5)
            if msg is None or msg.header.meta.get("mode") != "align":
                continue
            meta = msg.header.meta
            if msg.header.topic == "frame":
                frames[meta["frame_id"]] = msg.array.copy()
            elif msg.header.topic == "check" and meta["frame_id"] in frames:
                pixels = frames[meta["frame_id"]]
                signal = np.maximum(pixels.astype(np.float64) - OFFSET_DN, 0.0)
                # reference: scipy.ndimage.center_of_mass (SciPy reference library) of the dark-subtracted frame
                ref_r, ref_c = ndimage.center_of_mass(signal)
                assert meta["centroid_rc"] == pytest.approx([ref_r, ref_c], abs=1e-3)
                assert meta["total_counts_dn"] == pytest.approx(signal.sum(), rel=1e-5)
                assert meta["peak_dn"] == int(pixels.max())
                assert meta["saturated_pixels"] == int(np.count_nonzero(pixels >= meta["saturation_dn"]))
                checked += 1
        assert checked == 5
        time.sleep(0.6)  # the frame rate is measured over half-second windows
        st = client.status()
        assert st["state"] == "align" and st["safety"]["shutter_open"] is True
        assert st["align"]["frames"] > 5 and st["align"]["fps"] > 0
        # wrong-state requests during align mode
        with pytest.raises(RequestRefused, match="stop align mode first"):
            client.start()
        with pytest.raises(RequestRefused, match="nothing to resume"):
            client.resume()
    finally:
        client.stop()
        client.wait_idle(10)
    assert client.status()["safety"]["shutter_open"] is False


def test_follow_mode_phase_estimate_follows_a_change_of_the_sample(client, sub):
    client.align_start(iterations=40)
    try:
        def newest_estimate(after_set: int):
            deadline = time.monotonic() + 20
            best = None
            while time.monotonic() < deadline:
                msg = collect(sub, lambda m: m.header.topic == "estimate", 20)
                if msg.header.meta["set_index"] >= after_set:
                    best = msg
                    if msg.header.meta["true_error"] < 0.05:
                        return msg
            return best

        before = newest_estimate(3)
        assert before.header.meta["mode"] == "align"
        assert before.header.meta["true_error"] < 0.05
        est_before = before.array.astype(np.complex128)
        shift = (5, 3)
        client.simulate("shift_sample", shift)
        # frame sets that started after the shift: wait for the next frameset plus one more cycle
        fs = collect(sub, lambda m: m.header.topic == "frameset")
        after = newest_estimate(fs.header.meta["set_index"] + 2)
        est_after = after.array.astype(np.complex128)
        # the estimate moved with the sample: close to the shifted old estimate, far from the old one
        assert relative_error(np.roll(est_before, shift, axis=(0, 1)), est_after) < 0.08
        assert relative_error(est_before, est_after) > 0.3
        assert after.header.meta["true_error"] < 0.05
    finally:
        client.stop()
        client.wait_idle(10)
        client.simulate("reset_sample")


def test_held_mask_highlights_saturated_pixels_and_watch_draws_them_red(client, sub):
    client.set_exposure(0.05)  # 25x the photons: the bright speckles clip at the 12-bit maximum
    client.align_start(mask=2)
    try:
        msg = collect(sub, lambda m: m.header.topic == "preview" and m.header.meta.get("mode") == "align"
                      and m.header.meta["saturated_pixels"] > 0)
        meta = msg.header.meta
        assert meta["mask_index"] == 2 and meta["saturated_preview"]
        model = WatchModel()
        model.ingest(msg)
        out = io.StringIO()
        Console(file=out, force_terminal=True, color_system="truecolor", width=120).print(render(model))
        r, g, b = SATURATED_RGB
        assert f"38;2;{r};{g};{b}" in out.getvalue() or f"48;2;{r};{g};{b}" in out.getvalue()
        # one mask held: no phase estimate (a single pattern does not determine the phase)
        time.sleep(0.5)
        assert client.status()["align"]["estimates"] == 0
        # the exposure can change while aligning
        client.set_exposure(0.002)
        collect(sub, lambda m: m.header.topic == "check" and m.header.meta.get("exposure_s") == 0.002)
    finally:
        client.stop()
        client.wait_idle(10)


def test_interlock_opening_ends_align_mode_with_the_shutter_closed(client, sub):
    client.align_start()
    client.wait_state("align", 5)
    collect(sub, lambda m: m.header.topic == "frame")
    client.simulate("open_interlock")
    try:
        alert = collect(sub, lambda m: m.header.topic == "alert" and m.header.meta.get("kind") == "align_end")
        assert "interlock" in alert.header.meta["message"]
        st = client.wait_idle(10)
        assert st["safety"]["shutter_open"] is False
        with pytest.raises(RequestRefused, match="interlock reads OPEN"):
            client.align_start()
    finally:
        client.simulate("close_interlock")
