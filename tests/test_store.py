"""The run file: layout, crash safety and reading while writing."""

import json
import subprocess
import sys
import textwrap

import h5py
import numpy as np
import pytest

from maskrun.daemon.record.runfile import RunFile
from maskrun.daemon.record.store import (
    FLAG_SATURATED,
    RunHeader,
    RunStore,
    StoreError,
    estimate_info_record,
    frame_info_record,
)


def _header(k=3, shape=(8, 6), truth=True):
    rng = np.random.default_rng(0)
    masks = np.exp(1j * rng.uniform(0, 2 * np.pi, (k, *shape)))
    return RunHeader(
        run_name="t",
        config_toml="[run]\nname='t'\n",
        safety_acknowledgement={"who": "tester", "how": "test"},
        grid_shape=shape,
        masks=masks,
        frame_dtype=np.dtype(np.uint16),
        laser_wavelength_m=632.8e-9,
        camera_bit_depth=12,
        truth=np.ones(shape, complex) if truth else None,
    )


def _write_sets(store, sets, k=3, shape=(8, 6), seed=1):
    rng = np.random.default_rng(seed)
    frames = []
    for s in range(sets):
        for m in range(k):
            px = rng.integers(0, 4096, shape, dtype=np.uint16)
            store.append_frame(px, frame_info_record(pass_index=s, set_index=s, mask_index=m, frame_id=s * k + m,
                                                     flags=FLAG_SATURATED if m == 1 else 0))
            frames.append(px)
    return frames


def test_layout_read_back_with_plain_h5py(tmp_path):
    path = tmp_path / "run.h5"
    with RunStore.create(path, _header()) as st:
        frames = _write_sets(st, 2)
        st.append_dark(np.zeros((8, 6), np.uint16), frame_info_record(pass_index=-1, set_index=-1, mask_index=-1))
        st.append_estimate(np.full((8, 6), 1 + 1j), estimate_info_record(pass_index=1, passes_used=2, residual=0.1))
        st.log("run_end", "run finished: 2 complete frame sets")
    # A separate reader: plain h5py and the documented layout, no maskrun code.
    with h5py.File(path, "r") as f:
        e = f["entry"]
        assert f.attrs["format"] == "maskrun-run" and e.attrs["NX_class"] == "NXentry"
        assert e["frames"].shape == (6, 8, 6) and e["frames"].chunks == (1, 8, 6)
        np.testing.assert_array_equal(e["frames"][4], frames[4])
        assert e["frame_info"]["mask_index"].tolist() == [0, 1, 2, 0, 1, 2]
        assert e["frame_info"]["flags"][1] == FLAG_SATURATED
        assert e["masks"].shape == (3, 8, 6) and e["masks"].dtype == np.complex64
        assert e["darks"].shape == (1, 8, 6)
        assert e["estimates"].shape == (1, 8, 6)
        assert json.loads(e.attrs["safety_acknowledgement"])["who"] == "tester"
        assert e["events"][0]["kind"] == b"run_end"
        assert e.attrs["config_toml"].startswith("[run]")


def test_refuses_to_overwrite(tmp_path):
    path = tmp_path / "run.h5"
    RunStore.create(path, _header()).close()
    with pytest.raises(StoreError, match="exists already"):
        RunStore.create(path, _header())


def test_unusable_output_folder_is_a_clear_error(tmp_path):
    # A regular file where the folder should be: fails for every user, root included.
    blocker = tmp_path / "not-a-folder"
    blocker.write_text("")
    with pytest.raises(StoreError, match="cannot create the output folder"):
        RunStore.create(blocker / "sub" / "run.h5", _header())
    assert not (blocker / "sub").exists()


def test_complete_sets_ignore_a_partial_set(tmp_path):
    path = tmp_path / "run.h5"
    with RunStore.create(path, _header()) as st:
        _write_sets(st, 2)
        st.append_frame(np.zeros((8, 6), np.uint16), frame_info_record(pass_index=2, set_index=2, mask_index=0))
    with RunFile(path) as rf:
        sets = rf.complete_sets()
        assert [s.pass_index for s in sets] == [0, 1]
        assert rf.frame_count == 7


def test_reader_sees_frames_while_the_writer_is_open(tmp_path):
    path = tmp_path / "run.h5"
    st = RunStore.create(path, _header())
    _write_sets(st, 1)
    st.flush()
    code = textwrap.dedent(f"""
        from maskrun.daemon.record.runfile import RunFile
        with RunFile({str(path)!r}) as rf:
            print(rf.frame_count, len(rf.complete_sets()))
    """)
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=60)
    assert out.returncode == 0, out.stderr
    assert out.stdout.split() == ["3", "1"]
    st.close()


def test_file_survives_sigkill_of_the_writer(tmp_path):
    """Kill the writing process outright; every flushed frame must read back bit-identical."""
    path = tmp_path / "run.h5"
    code = textwrap.dedent(f"""
        import os, signal, numpy as np
        from maskrun.daemon.record.store import RunStore, RunHeader, frame_info_record
        h = RunHeader('t', '', {{}}, (8, 6), np.ones((3, 8, 6), complex), np.dtype(np.uint16), 6e-7, 12)
        st = RunStore.create({str(path)!r}, h)
        rng = np.random.default_rng(5)
        for i in range(7):
            st.append_frame(rng.integers(0, 4096, (8, 6), dtype=np.uint16),
                            frame_info_record(pass_index=i // 3, set_index=i // 3, mask_index=i % 3, frame_id=i))
            st.flush()
        os.kill(os.getpid(), signal.SIGKILL)
    """)
    subprocess.run([sys.executable, "-c", code], timeout=60)
    rng = np.random.default_rng(5)
    expected = [rng.integers(0, 4096, (8, 6), dtype=np.uint16) for _ in range(7)]
    with RunFile(path) as rf:
        assert rf.frame_count == 7
        for i in range(7):
            np.testing.assert_array_equal(rf.frame(i), expected[i])
        assert [s.pass_index for s in rf.complete_sets()] == [0, 1]


def test_not_a_run_file(tmp_path):
    p = tmp_path / "other.h5"
    with h5py.File(p, "w") as f:
        f["x"] = 1
    with pytest.raises(StoreError, match="not a maskrun run file"):
        RunFile(p)


def test_a_reader_waiting_for_the_file_never_sees_it_before_swmr_and_never_breaks_the_creation(tmp_path):
    """A viewer polling for a new run file (as `maskrun inspect --follow` does) opens it the moment it
    appears. The file is made under a hidden name and gets its own name only in SWMR mode, so the
    reader always finds the whole layout, and its lock never makes switching SWMR on fail (which
    ended a run with a traceback before)."""
    import threading

    import h5py

    paths = [tmp_path / f"run-{i}.h5" for i in range(12)]
    seen, problems, done = [], [], threading.Event()

    def reader():
        while not done.is_set():
            for p in paths:
                if p in seen or not p.exists():
                    continue
                try:
                    with h5py.File(p, "r", swmr=True) as f:
                        assert "entry" in f and f.attrs["file_name"] == p.name
                    seen.append(p)
                except Exception as exc:  # noqa: BLE001 - every failure is what the test looks for
                    problems.append(f"{p.name}: {exc!r}")

    t = threading.Thread(target=reader, daemon=True)
    t.start()
    try:
        for p in paths:
            RunStore.create(p, _header()).close()
    finally:
        done.set()
        t.join(10)
    assert problems == []
    assert not list(tmp_path.glob(".*.creating"))
    assert len(seen) >= 1
