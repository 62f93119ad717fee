"""The service's stream with the real daemon (subprocess, loopback): message format and sequence numbers,
`maskrun watch` rendering a live run into a string console, and a slow subscriber that does not slow
acquisition (it loses stream messages instead; the run file keeps every frame)."""

from __future__ import annotations

import io
import time

import numpy as np
import pytest
import zmq
from rich.console import Console

from maskrun.daemon.service.client import ServiceClient
from maskrun.daemon.record.runfile import RunFile
from maskrun.daemon.record.stream import SCHEMA_VERSION, Subscriber
from maskrun.daemon.show.watch import UPPER_HALF_BLOCK, WatchModel, render, run_watch
from servicehelp import Daemon, service_config_text

K = 4


@pytest.fixture(scope="module")
def daemon(tmp_path_factory):
    # 256 x 256 frames (128 KiB) without live reconstruction, so a stalled subscriber quickly exceeds the
    # socket buffers; preview_hwm = 2 queued messages per subscriber
    text = service_config_text(grid=256, sensor=272, masks=K, passes=2, darks=1, recon=False, preview_hwm=2)
    d = Daemon(tmp_path_factory.mktemp("svc-stream"), text).wait_ready()
    yield d
    assert d.stop() == 0, d.output()


@pytest.fixture(scope="module")
def client(daemon):
    with ServiceClient(daemon.control, timeout_s=10) as c:
        c.acknowledge("stream tester")
        yield c


def _run(client, passes: int, name: str) -> dict:
    client.start(passes=passes, name=name, dark_frames=0)
    return client.wait_idle(60)["last_run"]


def test_stream_messages_carry_schema_dtype_shape_and_sequence_numbers(client, daemon):
    ctx = zmq.Context()
    sub = Subscriber(ctx, daemon.stream, ("frame", "preview", "status"), hwm=10_000)
    deadline = time.monotonic() + 20  # subscribed once the periodic status arrives: no frame can be missed
    while sub.receive(timeout_s=0.5) is None and time.monotonic() < deadline:
        pass
    try:
        client.start(passes=2, name="format", dark_frames=0)
        frames, previews, status = [], [], []
        deadline = time.monotonic() + 30
        while time.monotonic() < deadline and len(frames) < 2 * K:
            msg = sub.receive(timeout_s=0.5)
            if msg is None:
                continue
            # ZeroMQ subscriptions match prefixes: "frame" also brings "frameset"
            {"frame": frames, "preview": previews, "status": status}.get(msg.header.topic, []).append(msg)
        client.wait_idle(30)
        assert len(frames) == 2 * K
        for m in frames:
            assert m.header.schema_version == SCHEMA_VERSION
            assert m.array.dtype == np.uint16 and m.array.shape == (256, 256)
            assert np.dtype(m.header.dtype) == np.uint16 and m.header.shape == [256, 256]
        # per-topic sequence numbers increase by one (this subscriber kept up: no gaps)
        seqs = [m.header.seq for m in frames]
        assert seqs == list(range(seqs[0], seqs[0] + len(seqs)))
        assert sub.gaps.get("frame", 0) == 0
        # previews are downsampled (block means) to at most 128 pixels a side
        assert previews and previews[0].array.shape == (128, 128) and previews[0].array.dtype == np.float32
        assert any(m.header.meta.get("source") == "service" for m in status)
    finally:
        sub.close()
        ctx.term()


def test_watch_renders_a_live_run_into_a_string_console(client, daemon):
    ctx = zmq.Context()
    from maskrun.daemon.show.watch import WATCH_TOPICS

    sub = Subscriber(ctx, daemon.stream, WATCH_TOPICS, hwm=100)
    time.sleep(0.3)
    model = WatchModel()
    try:
        client.start(passes=30, name="watched", dark_frames=0)
        deadline = time.monotonic() + 20
        while time.monotonic() < deadline and not (model.preview is not None and (model.status.get("run") or {})
                                                   .get("frames_done", 0) > 0):
            msg = sub.receive(timeout_s=0.5)
            if msg is not None:
                model.ingest(msg)
        out = io.StringIO()
        console = Console(file=out, force_terminal=True, color_system="truecolor", width=120)
        console.print(render(model))
        text = out.getvalue()
        assert UPPER_HALF_BLOCK in text and "\x1b[38;2;" in text and "48;2;" in text  # 24-bit colour half blocks
        plain = Console(file=io.StringIO(), width=120, color_system=None)
        plain.print(render(model))
        ptext = plain.file.getvalue()
        for words in ("state:", "ETA", "fps", "photons / frame", "saturation", "dose", "residual",
                      "precision", "latest frame", "phase estimate", "recent alerts"):
            assert words in ptext, words
        # the whole watch loop (rich Live) against the live stream for a second
        live_out = io.StringIO()
        watched = run_watch(daemon.stream, Console(file=live_out, force_terminal=True, color_system="truecolor",
                                                   width=120), duration_s=1.0, refresh_hz=4)
        assert watched.messages > 0 and UPPER_HALF_BLOCK in live_out.getvalue()
    finally:
        client.stop()
        client.wait_idle(30)
        sub.close()
        ctx.term()


def test_a_stalled_subscriber_does_not_slow_acquisition(client, daemon):
    passes = 15
    baseline = _run(client, passes, "baseline")
    assert baseline["state"] == "finished"

    ctx = zmq.Context()
    stalled = ctx.socket(zmq.SUB)
    stalled.setsockopt(zmq.RCVHWM, 1)
    stalled.setsockopt(zmq.RCVBUF, 4096)  # a tiny kernel buffer too: it fills after a frame or two
    stalled.setsockopt(zmq.SUBSCRIBE, b"")
    stalled.connect(daemon.stream)
    time.sleep(0.3)
    try:
        slow = _run(client, passes, "with_stalled_subscriber")  # the subscriber reads nothing meanwhile
        assert slow["state"] == "finished"
        # acquisition went on at its own pace
        assert slow["wall_s"] < 2.0 * baseline["wall_s"] + 1.0, (slow["wall_s"], baseline["wall_s"])
        with RunFile(daemon.folder / slow["output_path"]) as rf:
            assert rf.frame_count == passes * K  # the file drops nothing
            t = rf.frame_info()["t_frame_s"]
            assert np.max(np.diff(t)) < 1.0  # no stall between frames
        # ... and the stalled subscriber lost messages (documented drop policy) instead of holding the run
        from maskrun.daemon.record.stream import decode_message

        seen = []
        drain_until = time.monotonic() + 1.5  # status messages keep coming: drain for a bounded time
        while time.monotonic() < drain_until and stalled.poll(300):
            header, _ = decode_message(stalled.recv_multipart())
            if header.topic == "frame":
                seen.append(header.seq)
        frames_published = passes * K
        assert len(seen) < frames_published / 2, (len(seen), slow["wall_s"], baseline["wall_s"])
    finally:
        stalled.close(0)
        ctx.term()


def test_terminal_image_helpers_agree_with_reference_implementations():
    import colorsys

    from skimage.measure import block_reduce

    from maskrun.daemon.show.watch import phase_rgb, shrink

    rng = np.random.default_rng(5)
    field_ = rng.normal(size=(6, 7)) + 1j * rng.normal(size=(6, 7))
    rgb = phase_rgb(field_)
    amp = np.abs(field_)
    for (r, c) in [(0, 0), (2, 3), (5, 6), (4, 1)]:
        # reference: the standard library's HSV -> RGB (colorsys); hue = phase turn, value = sqrt(amplitude / max)
        hue = (np.angle(field_[r, c]) + np.pi) / (2 * np.pi)
        ref = np.array(colorsys.hsv_to_rgb(hue % 1.0, 1.0, np.sqrt(amp[r, c] / amp.max()))) * 255
        assert np.all(np.abs(rgb[r, c].astype(float) - ref) <= 1.0)
    img = rng.random((64, 96)).astype(np.float32)
    # reference: scikit-image block_reduce (block means / maxima over 4 x 4 blocks)
    assert np.allclose(shrink(img, 24, 16, "mean"), block_reduce(img, (4, 4), np.mean), atol=1e-6)
    assert np.array_equal(shrink(img, 24, 16, "max"), block_reduce(img, (4, 4), np.max))


def test_watch_says_when_the_service_has_gone_silent(tmp_path):
    """A service killed mid-run leaves a dashboard that would show 'acquiring, shutter OPEN' for ever;
    once no message has come for 5 status periods (at least 3 s) the dashboard says so in red."""
    import signal

    d = Daemon(tmp_path / "svc-silent", service_config_text(passes=500, exposure_s=0.002)).wait_ready()
    ctx = zmq.Context()
    sub = Subscriber(ctx, d.stream, ("status",), hwm=100)
    model = WatchModel()

    def listen(seconds):
        end = time.monotonic() + seconds
        while time.monotonic() < end:
            msg = sub.receive(timeout_s=0.1)
            if msg is not None:
                model.ingest(msg)

    def text():
        out = Console(file=io.StringIO(), width=200, color_system=None)
        out.print(render(model))
        return out.file.getvalue()

    try:
        with ServiceClient(d.control, timeout_s=10) as c:
            c.acknowledge("test operator")
            c.start(passes=500, name="silent")
            c.wait_state("acquiring", timeout_s=20)
        listen(1.0)
        assert model.status.get("state") == "acquiring" and model.status_interval_s == pytest.approx(0.2)
        assert "NO MESSAGES" not in text()
        d.proc.send_signal(signal.SIGKILL)
        d.proc.wait(timeout=10)
        listen(3.5)
        shown = text()
        assert "NO MESSAGES FOR" in shown and "maskrun status" in shown
        assert "state: acquiring" in shown  # the last seen, under the warning
    finally:
        sub.close()
        ctx.term()
        d.stop()
