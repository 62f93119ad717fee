"""`maskrun report`: the run's story from real run files (simulated bench, injected faults, a cut-off file)."""

from __future__ import annotations

import base64
import re
import subprocess
import sys
import time
from pathlib import Path

import h5py
import numpy as np
import pytest
from benchcfg import small_bench_text

from maskrun.daemon.config import parse_config
from maskrun.daemon.show.report import read_story, write_report
from maskrun.daemon.record.store import FLAG_NAMES

MASKRUN = str(Path(sys.executable).with_name("maskrun"))


def _run(tmp_path, name, *, faults="", passes=3, log_extra=None):
    import zmq

    from maskrun.daemon.acquire.bench import build_bench
    from maskrun.daemon.safety.safety import make_acknowledgement
    from maskrun.daemon.acquire.sequencer import RunPlan
    from maskrun.daemon.acquire.session import execute_run

    text = small_bench_text(grid=32, sensor=40, masks=6, passes=passes, darks=1, extra_camera=faults)
    text = text.replace("grab_timeout_s = 2.0", "grab_timeout_s = 0.2")
    cfg = parse_config(text, f"{name}.toml")
    bench = build_bench(cfg)
    ctx = zmq.Context()
    path = tmp_path / f"{name}.h5"
    try:
        bench.open()
        ack = make_acknowledgement(cfg.laser, who="test operator", how="test")
        plan = RunPlan(passes=passes, dark_frames=1, exposure_s=cfg.camera.exposure_s, output_path=path)
        summary = execute_run(bench, plan, ack, publisher=None, zmq_context=ctx, run_name=name)
    finally:
        bench.close()
        ctx.term()
    return path, summary


@pytest.fixture(scope="module")
def faulty_run(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("report")
    faults = ('faults = [{kind = "stale", at_frame = 4, count = 1}, {kind = "timeout", at_frame = 9, count = 1}, '
              '{kind = "dropped", at_frame = 13, count = 1}]')
    path, summary = _run(tmp, "faulty", faults=faults)
    assert summary.state.value == "finished"
    return path


def test_story_agrees_with_the_file_read_directly(faulty_run):
    s = read_story(faulty_run)
    # the same numbers read with plain h5py, independently of RunFile/read_story
    with h5py.File(faulty_run, "r") as f:
        info = f["entry/frame_info"][...]
        ev = f["entry/events"][...]
        n_est = f["entry/estimates"].shape[0]
    assert len(s.frame_info) == len(info) == 18 and s.complete_sets == 3 and len(s.estimate_info) == n_est == 3
    for bit, name in FLAG_NAMES.items():
        assert s.flag_counts.get(name, 0) == int(np.count_nonzero(info["flags"] & bit))
    assert s.flag_counts.get("retaken", 0) >= 1 and s.flag_counts.get("timeout_retried", 0) == 1
    assert s.flag_counts.get("frame_id_gap", 0) == 1
    levels = [e.decode() for e in ev["level"]]
    assert len(s.warnings) == sum(lv in ("warning", "error") for lv in levels)
    kinds = {e["kind"] for e in s.warnings}
    assert {"stale_frame", "camera_timeout"} <= kinds and any("drop" in k or "gap" in k for k in kinds), kinds
    assert s.outcome == "finished" and s.acknowledgement["who"] == "test operator"
    assert s.t0_s <= float(info["t_request_s"].min())


def test_report_png_and_html_tell_the_story(faulty_run, tmp_path):
    files = write_report(faulty_run, tmp_path / "out")
    assert files.png.name == "faulty.report.png" and files.html.name == "faulty.report.html"
    import matplotlib.image

    img = matplotlib.image.imread(str(files.png))
    assert img.shape[0] > 1000 and img.shape[1] > 1200  # legible size
    assert img[..., :3].std() > 0.1  # not blank
    page = files.html.read_text()
    # the PNG is embedded byte for byte, so the page can travel alone
    b64 = re.search(r"data:image/png;base64,([A-Za-z0-9+/=]+)", page).group(1)
    assert base64.b64decode(b64) == files.png.read_bytes()
    assert "Outcome: finished" in page
    for text in ("stale_frame", "camera_timeout", "frame_id_gap", "test operator", "[camera]", "Notice as shown",
                 "laser safety officer"):
        assert text in page, text
    # one row per estimate in the per-pass table
    table = page.split("<h2>Reconstruction per pass</h2>")[1].split("</table>")[0]
    assert table.count("<tr>") == 1 + 3


def test_cut_off_run_and_hostile_text_are_reported_safely(tmp_path):
    from maskrun.daemon.acquire.bench import build_bench
    from maskrun.daemon.safety.safety import make_acknowledgement
    from maskrun.daemon.acquire.session import run_header
    from maskrun.daemon.record.store import RunStore, frame_info_record

    cfg = parse_config(small_bench_text(grid=32, sensor=40, masks=6), "cut.toml")
    bench = build_bench(cfg)
    ack = make_acknowledgement(cfg.laser, who="<b>mallory</b>", how="test")
    path = tmp_path / "cut.h5"
    store = RunStore.create(path, run_header(bench, ack, "cut"))
    store.log("run_start", "run start: <script>alert(1)</script>")
    frame = np.full((32, 32), 4095, np.uint16)  # every pixel at full scale
    t0 = time.time()
    for k in range(2):  # two frames of a set of six, then the writer "dies" (no run_end)
        store.append_frame(frame, frame_info_record(pass_index=0, set_index=0, mask_index=k, frame_id=k + 1,
                                                    t_request_s=t0 + k, t_frame_s=t0 + k, exposure_s=0.01,
                                                    saturated_fraction=1.0, peak_dn=4095, photons=0.0, flags=1))
    store.flush()
    store.close()
    files = write_report(path, tmp_path)
    s = files.story
    assert s.outcome.startswith("incomplete") and s.complete_sets == 0 and s.last_estimate is None
    assert s.flag_counts == {"saturated": 2}
    page = files.html.read_text()
    assert "<script>alert(1)</script>" not in page and "&lt;script&gt;" in page
    assert "<b>mallory</b>" not in page and "&lt;b&gt;mallory&lt;/b&gt;" in page
    assert "Outcome: incomplete" in page
    import matplotlib.image

    img = (matplotlib.image.imread(str(files.png))[..., :3] * 255).round().astype(int)
    # saturated pixels are drawn in the marking colour (magenta) in the last-frame panel
    magenta = (img[..., 0] > 240) & (img[..., 1] < 15) & (img[..., 2] > 240)
    assert magenta.sum() > 1000


def test_report_command_on_the_demo_run(tmp_path):
    r = subprocess.run([MASKRUN, "demo", "--acknowledge-safety", "--output-dir", str(tmp_path), "--no-figure",
                        "--passes", "2"], capture_output=True, text=True, timeout=120)
    assert r.returncode == 0, r.stderr
    run_file = next(tmp_path.glob("*.h5"))
    r = subprocess.run([MASKRUN, "report", str(run_file)], capture_output=True, text=True, timeout=120)
    assert r.returncode == 0, r.stderr
    out = " ".join(r.stdout.split())
    assert "finished" in out and "16 frames" in out and "2 complete frame sets" in out
    assert run_file.with_suffix(".report.png").exists() and run_file.with_suffix(".report.html").exists()
    r = subprocess.run([MASKRUN, "report", str(tmp_path / "nope.h5")], capture_output=True, text=True, timeout=60)
    assert r.returncode == 2 and "no such file" in r.stderr and "Traceback" not in r.stderr
    not_a_run = tmp_path / "other.h5"
    with h5py.File(not_a_run, "w") as f:
        f["x"] = 1
    r = subprocess.run([MASKRUN, "report", str(not_a_run)], capture_output=True, text=True, timeout=60)
    assert r.returncode == 2 and "not a maskrun run file" in r.stderr and "Traceback" not in r.stderr
