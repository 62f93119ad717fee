"""The run file as NeXus (format version 2), and version 1 files still read by inspect, report, resume
and reconstruct.

The checks follow the NeXus standard of the NIAC (NeXus International Advisory Committee), "NeXus: a
common data format for neutron, x-ray and muon science": the base class definitions NXentry, NXdata,
NXinstrument, NXsource, NXdetector, NXsample, NXcollection, NXuser (punx validates against the
NXDL file set v2018.5 it bundles) and the NeXus manual's default-plot rules (NXdata base class and
"NeXus Data Rules", NIAC 2014 method: root ``@default`` -> NXentry ``@default`` -> NXdata ``@signal``,
``@axes``, ``@AXISNAME_indices``; NeXus manual 2024).
"""

import io
import json
import shutil
import signal
import subprocess
import sys
import textwrap
from pathlib import Path

import h5py
import numpy as np
import pytest
from rich.console import Console

from benchcfg import small_bench
from maskrun.daemon.commands import cli
from maskrun.daemon.acquire.foreground import RunRequest, run_foreground
from maskrun.daemon.acquire.recovery import needs_repair, repair_run_file, resume_point
from maskrun.daemon.record.runfile import RunFile
from maskrun.daemon.record.store import FORMAT_VERSION, RunHeader, RunStore, StoreError

V1_FILE = Path(__file__).parent / "data" / "run-v1.h5"  # written by the code before NeXus (tests/data/README.md)


def _console():
    return Console(file=io.StringIO(), width=200)


@pytest.fixture(scope="module")
def demo_run(tmp_path_factory):
    """A finished run of the demo bench (shrunk: tests/benchcfg.py), with live reconstruction."""
    out = tmp_path_factory.mktemp("nexus")
    summary = run_foreground(small_bench(passes=2), RunRequest(acknowledge_unattended=True, output_dir=str(out)),
                             _console())
    assert summary.state.value == "finished", summary.message
    return Path(summary.output_path)


def _punx_findings(path):
    punx_validate = pytest.importorskip("punx.validate")
    v = punx_validate.Data_File_Validator()  # the NXDL definitions punx bundles (v2018.5): no network
    try:
        v.validate(str(path))
        return [(f.h5_address, str(f.status), f.test_name, f.comment) for f in v.validations], \
            v.manager.nxdl_file_set.ref
    finally:
        v.close()


def test_demo_run_file_validates_as_nexus_with_a_default_plot(demo_run):
    findings, ref = _punx_findings(demo_run)
    errors = [f for f in findings if f[1] == "ERROR"]
    assert errors == [], errors
    # NeXus manual, default plot (NIAC 2014): root@default -> NXentry@default -> NXdata@signal
    plot = [f for f in findings if f[2] == "NeXus default plot"]
    assert plot and plot[0][1] == "OK" and "/entry/reconstruction" in plot[0][3], plot
    assert ref == "v2018.5"
    warnings = [f for f in findings if f[1] == "WARN"]
    # the only warnings: punx warns about every item inside an NXcollection (the modulator)
    assert all(f[0].startswith("/entry/instrument/modulator") for f in warnings), warnings

    from nexusformat.nexus import nxload

    root = nxload(str(demo_run))
    try:
        data = root.plottable_data  # what NeXus readers plot: follows @default (NeXus manual, NXdata)
        assert data is not None and data.nxpath == "/entry/reconstruction"
        signal_ = data.nxsignal
        assert signal_ is not None and signal_.nxname == "amplitude" and signal_.shape == (32, 32)
        assert np.all(np.isfinite(signal_.nxdata)) and signal_.nxdata.max() > 0
        assert [a.nxname for a in data.nxaxes] == ["y", "x"]
        assert [s.nxname for s in data.nxauxiliary_signals] == ["phase"]
        assert root.entry.data.nxsignal.shape[0] == 2 * 6  # the frames, as an NXdata too
    finally:
        root.nxfile.close()


def test_demo_run_file_layout_links_units_and_times(demo_run):
    with h5py.File(demo_run, "r") as f:
        e = f["entry"]
        assert f.attrs["format_version"] == FORMAT_VERSION == 2 and e.attrs["format_version"] == 2
        assert f.attrs["default"] == "entry" and e.attrs["default"] == "reconstruction"
        # frames never copied: one HDF5 object under three names (hard links, NeXus @target)
        frames = e["frames"]
        for alias in ("data/data", "instrument/detector/data"):
            assert e[alias].id == frames.id
        assert h5py.h5o.get_info(frames.id).rc == 3 and frames.attrs["target"] == "/entry/frames"
        assert e["instrument/modulator/masks"].id == e["masks"].id
        assert e["sample/simulated_field"].id == e["truth"].id
        # units on the physical fields
        units = {"frames": "counts", "darks": "counts", "refused": "counts", "estimates": "sqrt(photons/s)",
                 "truth": "sqrt(photons/s)", "reconstruction/amplitude": "sqrt(photons/s)",
                 "reconstruction/phase": "rad", "instrument/source/wavelength": "m",
                 "instrument/source/power": "W", "instrument/detector/count_time": "s",
                 "instrument/detector/system_gain": "ADU/e-", "instrument/detector/conversion_gain": "e-/ADU",
                 "instrument/detector/saturation_value": "counts", "instrument/modulator/settle_time": "s"}
        for path, unit in units.items():
            assert e[path].attrs["units"] == unit, path
        assert json.loads(e["frame_info"].attrs["field_units"])["exposure_s"] == "s"
        src = e["instrument/source"]
        assert src["laser_class"][()].decode() == "3R" and src["power"][()] == pytest.approx(0.004)
        assert src["type"][()].decode() == "Optical Laser"
        det = e["instrument/detector"]
        assert det["bit_depth_readout"][()] == 12 and det["system_gain"][()] == pytest.approx(0.3)
        assert e["instrument/modulator/driver"][()].decode() == "serial-line"
        assert e["sample/name"][()].decode() == "phase_target"
        start, end = e["start_time"][()].decode(), e["end_time"][()].decode()
        assert start.endswith("Z") and end.endswith("Z") and start <= end
        # the latest reconstruction is the last stored estimate
        last = e["estimates"][-1]
        np.testing.assert_allclose(e["reconstruction/amplitude"][...], np.abs(last), rtol=1e-6)
        assert e["reconstruction/estimate_index"][()] == e["estimates"].shape[0] - 1
    with RunFile(demo_run) as rf:
        assert rf.format_version == 2 and rf.is_nexus and rf.end_time() == end
        amp, _ = rf.latest_reconstruction()
        assert amp.shape == (32, 32)


def _bare_header(**kw):
    return RunHeader("t", "[run]\nname='t'\n", {"who": "tester"}, (8, 8), np.ones((2, 8, 8), complex),
                     np.dtype(np.uint16), 632.8e-9, 12, **kw)


def test_unknown_safety_values_stay_unknown(tmp_path):
    path = tmp_path / "u.h5"
    RunStore.create(path, _bare_header(live_reconstruction=False)).close()
    with h5py.File(path, "r") as f:
        src = f["entry/instrument/source"]
        assert src["power"][()].decode() == "unknown" and "units" not in src["power"].attrs
        assert src["laser_class"][()].decode() == "unknown"
        assert f["entry/instrument/detector/description"][()].decode() == "unknown"
        assert "x_pixel_size" not in f["entry/instrument/detector"]  # pixel size not known: not written
        assert f["entry"].attrs["default"] == "data" and "reconstruction" not in f["entry"]
    findings, _ = _punx_findings(path)
    assert [f for f in findings if f[1] == "ERROR"] == []
    # a source below 180 nm is no laser of IEC 60825-1: no source type is guessed
    x = tmp_path / "x.h5"
    h = _bare_header(source={"power_w": 1e-3, "laser_class": "none (outside IEC 60825-1: radiation protection)"})
    h.laser_wavelength_m = 1.5e-10
    RunStore.create(x, h).close()
    with h5py.File(x, "r") as f:
        assert "type" not in f["entry/instrument/source"]
        assert f["entry/instrument/source/probe"][()].decode() == "x-ray"


KILLED_WRITER = textwrap.dedent("""
    import os, signal, sys, numpy as np
    from maskrun.daemon.record.store import RunStore, RunHeader, frame_info_record, estimate_info_record
    h = RunHeader('w', '[run]\\nname="w"\\n', {}, (8, 8), np.ones((2, 8, 8), complex), np.dtype(np.uint16), 6e-7, 12)
    st = RunStore.create(sys.argv[1], h)
    for i in range(6):
        st.append_frame(np.full((8, 8), i, np.uint16), frame_info_record(pass_index=i // 2, set_index=i // 2,
                        mask_index=i % 2, frame_id=i + 1, attempts=1))
    st.append_estimate(np.full((8, 8), 2j), estimate_info_record(pass_index=2, passes_used=3))
    st.flush()
    os.kill(os.getpid(), signal.SIGKILL)
""")


def test_killed_file_keeps_its_nexus_links_through_the_repair(tmp_path):
    path = tmp_path / "k.h5"
    proc = subprocess.run([sys.executable, "-c", KILLED_WRITER, str(path)], timeout=60)
    assert proc.returncode == -signal.SIGKILL
    with RunFile(path) as rf:  # readable as it was left
        assert rf.frame_count == 6 and rf.end_time() is not None
        amp, phase = rf.latest_reconstruction()
        np.testing.assert_allclose(amp, 2.0)
        np.testing.assert_allclose(phase, np.pi / 2, rtol=1e-6)
    assert needs_repair(path)
    repair_run_file(path)
    with h5py.File(path, "r") as f:
        e = f["entry"]
        assert e["data/data"].id == e["frames"].id and h5py.h5o.get_info(e["frames"].id).rc == 3
        assert e["frames"].shape[0] == 6 and e["frames"][5].max() == 5
    store = RunStore.reopen(path, text_log=False)  # the copy goes back into SWMR mode and grows
    store.append_frame(np.full((8, 8), 9, np.uint16), np.zeros((), store._frame_info.dtype))
    store.close()
    with h5py.File(path, "r") as f:
        assert f["entry/data/data"].shape[0] == 7


# --- version 1 files --------------------------------------------------------------------------------


@pytest.fixture
def v1_file(tmp_path):
    dst = tmp_path / V1_FILE.name
    shutil.copy(V1_FILE, dst)
    return dst


def test_v1_file_opens_in_inspect_and_reconstruct(v1_file, tmp_path, capsys, monkeypatch):
    monkeypatch.setenv("COLUMNS", "250")
    with RunFile(v1_file) as rf:
        assert rf.format_version == 1 and not rf.is_nexus and rf.end_time() is None
        assert len(rf.complete_sets()) == 2 and rf.latest_reconstruction()[0].shape == (16, 16)
    assert cli.main(["inspect", str(v1_file)]) == 0
    out = capsys.readouterr().out
    assert "version 1" in out and "2 complete" in out
    assert cli.main(["reconstruct", str(v1_file), "--iterations", "5", "--workers", "1", "--method", "er",
                     "--output-dir", str(tmp_path)]) == 0
    assert "2 estimates" in capsys.readouterr().out


def test_v1_file_opens_in_report(v1_file):
    maskrun = str(Path(sys.executable).parent / "maskrun")
    r = subprocess.run([maskrun, "report", str(v1_file)], capture_output=True, text=True, timeout=120)
    assert r.returncode == 0, r.stderr
    assert "finished" in " ".join(r.stdout.split())
    assert v1_file.with_suffix(".report.html").exists()


def _as_stopped_after_one_set(path):
    """Turn the finished v1 fixture into a v1 run stopped after its first frame set (as an older maskrun left it)."""
    with h5py.File(path, "a") as f:
        e = f["entry"]
        for name in ("frames", "frame_info"):
            e[name].resize(4, axis=0)
        for name in ("estimates", "estimate_info"):
            e[name].resize(1, axis=0)
        ev = e["events"][...]
        keep = [r for r in ev if r["kind"] != b"run_end"]
        for r in keep:
            if r["kind"] == b"writer":  # the writer that logged itself is long gone (not on this host)
                r["message"] = b"pid 1 on fixture-host"
        stop = np.array([(float(ev["t_s"].max()), b"warning", b"run_end",
                          b"run stopped: stop requested; 1 complete frame sets kept; resume with 'maskrun resume'")],
                        dtype=ev.dtype)
        rows = np.concatenate([np.array(keep, dtype=ev.dtype), stop])
        e["events"].resize(len(rows), axis=0)
        e["events"][...] = rows


def test_v1_file_resumes_to_the_end_and_stays_version_1(v1_file, capsys):
    _as_stopped_after_one_set(v1_file)
    point = resume_point(v1_file)
    assert point.first_pass == 1 and point.passes == 2
    assert cli.main(["resume", str(v1_file), "--acknowledge-safety", "--no-figure"]) == 0, capsys.readouterr()
    with RunFile(v1_file) as rf:
        assert rf.finished() and len(rf.complete_sets()) == 2
        assert rf.format_version == 1 and "instrument" not in rf.entry  # appended to, not rewritten
        assert rf.estimate_count >= 2


def test_a_newer_format_version_is_refused_clearly(v1_file):
    with h5py.File(v1_file, "a") as f:
        f.attrs["format_version"] = 99
    with pytest.raises(StoreError, match="format version 99"):
        RunFile(v1_file)

