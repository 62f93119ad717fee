"""The frame writer thread (daemon.acquire.frame_writer): order, back-pressure without loss, flush at every
complete frame set and on a timer, durability before announcement, write errors raised in the caller,
and a SIGKILL that loses no complete (durable) set. Real HDF5 files, real threads and processes;
the one-pass conversion (daemon.acquire.frame_convert) and the preview against numpy's own functions."""

import subprocess
import sys
import textwrap
import threading
import time

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from maskrun.daemon.record.checks import Response, downsample_preview
from maskrun.daemon.acquire.frame_convert import electrons_shifted, shifted
from maskrun.daemon.acquire.frame_writer import FrameWriter
from maskrun.daemon.record.runfile import RunFile
from maskrun.daemon.record.store import RunHeader, RunStore, StoreError, frame_info_record

K, SHAPE = 3, (8, 6)


def _store(path):
    h = RunHeader("t", "", {}, SHAPE, np.ones((K, *SHAPE), complex), np.dtype(np.uint16), 6e-7, 12)
    return RunStore.create(path, h)


def _frames(n, seed=0):
    rng = np.random.default_rng(seed)
    return [rng.integers(0, 4096, SHAPE, dtype=np.uint16) for _ in range(n)]


def _info(i):
    return frame_info_record(pass_index=i // K, set_index=i // K, mask_index=i % K, frame_id=i + 1)


def _reader_counts(path):
    """(frames, complete sets) a reader in another process sees now (SWMR)."""
    code = textwrap.dedent(f"""
        from maskrun.daemon.record.runfile import RunFile
        with RunFile({str(path)!r}) as rf:
            print(rf.frame_count, len(rf.complete_sets()))
    """)
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=60)
    assert out.returncode == 0, out.stderr
    return tuple(int(v) for v in out.stdout.split())


def test_frames_written_in_order_and_sets_durable_before_they_are_reported(tmp_path):
    path = tmp_path / "run.h5"
    store = _store(path)
    frames = _frames(4 * K)
    w = FrameWriter(store, max_queue=4, flush_interval_s=30.0)  # no timer flush inside this test
    rows = [w.submit(px, _info(i), set_end=(i // K) if i % K == K - 1 else None) for i, px in enumerate(frames)]
    assert rows == list(range(4 * K))
    assert w.wait_durable(30.0)
    assert w.durable_sets() == [0, 1, 2, 3]
    assert _reader_counts(path) == (4 * K, 4)  # durable = flushed: another process sees every set
    w.close()
    store.close()
    with RunFile(path) as rf:
        for i, px in enumerate(frames):
            np.testing.assert_array_equal(rf.frame(i), px)
        assert list(rf.frame_info()["frame_id"]) == list(range(1, 4 * K + 1))


def test_full_queue_holds_the_caller_back_and_loses_nothing(tmp_path):
    path = tmp_path / "run.h5"
    store = _store(path)
    gate = threading.Event()
    original = store.append_frame

    def slow_append(px, info):  # the disk stalls until the gate opens
        gate.wait(30)
        return original(px, info)

    store.append_frame = slow_append
    w = FrameWriter(store, max_queue=2, flush_interval_s=30.0)
    frames = _frames(6, seed=3)
    done = threading.Event()

    def producer():
        for i, px in enumerate(frames):
            w.submit(px, _info(i))
        done.set()

    t = threading.Thread(target=producer)
    t.start()
    time.sleep(0.3)
    assert not done.is_set()  # back-pressure: the producer waits for room
    assert w.queued == 2
    gate.set()
    t.join(30)
    assert done.is_set()
    w.close()
    assert w.stats.queue_high_water == 2 and w.stats.frames_written == 6 and w.stats.waited_s_total > 0.2
    store.close()
    with RunFile(path) as rf:
        assert rf.frame_count == 6
        for i, px in enumerate(frames):
            np.testing.assert_array_equal(rf.frame(i), px)


def test_a_set_in_progress_is_flushed_on_the_timer(tmp_path):
    path = tmp_path / "run.h5"
    store = _store(path)
    w = FrameWriter(store, max_queue=8, flush_interval_s=0.2)
    for i, px in enumerate(_frames(2)):  # two frames of a set of three: no set end
        w.submit(px, _info(i))
    deadline = time.monotonic() + 20
    while w.stats.flushes < 1 and time.monotonic() < deadline:
        time.sleep(0.05)
    assert _reader_counts(path) == (2, 0)
    w.close()
    store.close()


def test_a_write_error_in_the_thread_is_raised_to_the_caller(tmp_path):
    store = _store(tmp_path / "run.h5")
    w = FrameWriter(store, max_queue=4)
    w.submit(np.zeros((3, 3), np.uint16), _info(0))  # wrong shape: the store refuses it, in the thread
    with pytest.raises(StoreError, match="does not match"):
        for i in range(100):
            w.submit(_frames(1)[0], _info(i + 1))
            time.sleep(0.02)
    with pytest.raises(StoreError):
        w.close()
    store.close()


def test_sigkill_loses_no_durable_set(tmp_path):
    """Kill the writing process right after a set was reported durable: every reported set is in the file."""
    path = tmp_path / "run.h5"
    code = textwrap.dedent(f"""
        import os, signal, sys, numpy as np
        from maskrun.daemon.record.store import RunStore, RunHeader, frame_info_record
        from maskrun.daemon.acquire.frame_writer import FrameWriter
        h = RunHeader('t', '', {{}}, {SHAPE}, np.ones(({K},) + {SHAPE}, complex), np.dtype(np.uint16), 6e-7, 12)
        st = RunStore.create({str(path)!r}, h)
        w = FrameWriter(st, max_queue=4, flush_interval_s=60.0)
        rng = np.random.default_rng(0)
        reported = []
        for i in range({5 * K} + 1):  # five sets and the first frame of a sixth
            w.submit(rng.integers(0, 4096, {SHAPE}, dtype=np.uint16),
                     frame_info_record(pass_index=i // {K}, set_index=i // {K}, mask_index=i % {K}, frame_id=i + 1),
                     set_end=(i // {K}) if i % {K} == {K} - 1 else None)
            reported += w.durable_sets()
        w.wait_durable(30)
        reported += w.durable_sets()
        print(" ".join(map(str, reported)), flush=True)
        os.kill(os.getpid(), signal.SIGKILL)
    """)
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=60)
    reported = [int(v) for v in out.stdout.split()]
    assert reported == [0, 1, 2, 3, 4], out.stderr
    rng = np.random.default_rng(0)
    expected = [rng.integers(0, 4096, SHAPE, dtype=np.uint16) for _ in range(5 * K)]
    with RunFile(path) as rf:
        assert [s.set_index for s in rf.complete_sets()] == reported
        for i in range(5 * K):
            np.testing.assert_array_equal(rf.frame(i), expected[i])


@settings(max_examples=30, deadline=None)
@given(rows=st.integers(1, 17), cols=st.integers(1, 17), flat=st.booleans(), dark_map=st.booleans(),
       seed=st.integers(0, 2**16))
def test_one_pass_conversion_equals_electrons_then_numpy_ifftshift(rows, cols, flat, dark_map, seed):
    # Reference: numpy.fft.ifftshift (numpy's own implementation of the shift) applied after
    # Response.electrons, bit for bit.
    rng = np.random.default_rng(seed)
    px = rng.integers(0, 65535, (rows, cols)).astype(np.uint16)
    dark = (rng.random((rows, cols)) * 200).astype(np.float32) if dark_map else 101.5
    ff = (0.9 + 0.2 * rng.random((rows, cols))).astype(np.float32) if flat else None
    resp = Response(gain_dn_per_e=0.3, offset_dn=100.0, quantum_efficiency=0.6)
    out = np.empty((rows, cols), np.float32)
    got = electrons_shifted(px, dark, resp.gain_dn_per_e, None if ff is None else shifted(ff), out)
    np.testing.assert_array_equal(got, np.fft.ifftshift(resp.electrons(px, dark, ff)))


@pytest.mark.parametrize("shape", [(1024, 1024), (160, 150), (7, 300)])
def test_preview_is_the_block_mean(shape):
    # Reference: the block mean as numpy computes it over a 4-D view (common practice, no source).
    px = np.random.default_rng(1).integers(0, 65535, shape).astype(np.uint16)
    got = downsample_preview(px)
    rows, cols = shape
    f = max(1, int(np.ceil(max(rows, cols) / 128)))
    r, c = rows // f * f, cols // f * f
    want = px[:r, :c].astype(np.float64).reshape(r // f, f, c // f, f).mean(axis=(1, 3))
    np.testing.assert_allclose(got, want, rtol=1e-6)
