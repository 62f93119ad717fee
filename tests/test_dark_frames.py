"""Dark frames: too few of them put a fixed noise pattern into every frame set that accumulation
cannot average away; the plan warns, and the physics is checked on the simulated bench."""

import io

import numpy as np
from rich.console import Console

from benchcfg import small_bench_text
from maskrun.daemon.calibrate.budget import dark_frame_advice
from maskrun.daemon.config import parse_config
from maskrun.daemon.acquire.foreground import RunRequest, run_foreground
from maskrun.daemon.offline.reprocess import live_frame_sets
from maskrun.daemon.record.runfile import RunFile
from maskrun.reconstruct import relative_error, solve

PASSES = 24


def test_advice_only_when_it_matters():
    assert dark_frame_advice(4, 60, accumulating=True).startswith("4 dark frame(s) for 60 frame sets")
    assert "take about 60 dark frames" in dark_frame_advice(4, 60, accumulating=True)
    assert dark_frame_advice(60, 60, accumulating=True) == ""  # as many as sets
    assert dark_frame_advice(0, 60, accumulating=True) == ""  # no darks: a constant offset, no noise added
    assert dark_frame_advice(4, 6, accumulating=True) == ""  # a few sets: the dark noise is not what limits
    assert dark_frame_advice(4, 60, accumulating=False) == ""  # follow mode does not accumulate


def _accumulated_error(tmp_path, darks: int) -> tuple[float, str]:
    text = small_bench_text(grid=32, sensor=48, masks=4, passes=PASSES, darks=darks, extra_camera="real_time = false")
    out = io.StringIO()
    cfg = parse_config(text, str(tmp_path / f"d{darks}.toml"))
    summary = run_foreground(cfg, RunRequest(acknowledge_unattended=True, output_dir=str(tmp_path / f"d{darks}"),
                                             figure=False), Console(file=out, width=300))
    assert summary.state.value == "finished", summary.message
    mean = sum(y.astype(np.float64) for y in live_frame_sets(summary.output_path)) / PASSES
    with RunFile(summary.output_path) as rf:
        truth, masks = rf.truth(), rf.masks()
        scale = 1 / np.sqrt(rf.response_attrs()["quantum_efficiency"] * rf.frame_info()["exposure_s"][-1])
        logged = [e["kind"] for e in rf.events()]
    est = solve(mean, masks, method="poisson", dtype=np.complex128).estimate * scale
    assert ("dark_frames_few" in logged) == (darks < PASSES)
    return relative_error(truth, est), out.getvalue()


def test_too_few_dark_frames_limit_an_accumulated_estimate_and_the_plan_says_so(tmp_path):
    """Simulated camera with 3 e- read noise, ~800 e- per pixel: the mean of 1 dark frame carries 3 e- of
    per-pixel noise into all 24 sets, the mean of 24 dark frames 0.6 e- (read noise / sqrt(N), common
    practice, no source); the accumulated estimate is clearly worse with the single dark frame."""
    few, printed = _accumulated_error(tmp_path, 1)
    assert "Warning: 1 dark frame(s) for 24 frame sets" in printed and "take about 24 dark frames" in printed
    enough, printed = _accumulated_error(tmp_path, PASSES)
    assert "dark frame(s) for" not in printed
    assert enough < 0.8 * few, (few, enough)


def test_inspect_prints_event_messages_verbatim(tmp_path, capsys, monkeypatch):
    """Event messages are plain text: the dark-frame advice names the config table '[run]', which a
    terminal markup parser would swallow; `maskrun inspect` must print it as written."""
    from maskrun.daemon.commands import cli

    monkeypatch.setenv("COLUMNS", "400")
    text = small_bench_text(grid=16, sensor=24, masks=2, passes=PASSES, darks=1, extra_camera="real_time = false")
    cfg = parse_config(text, str(tmp_path / "b.toml"))
    summary = run_foreground(cfg, RunRequest(acknowledge_unattended=True, output_dir=str(tmp_path), figure=False),
                             Console(file=io.StringIO(), width=300))
    assert summary.state.value == "finished", summary.message
    assert cli.main(["inspect", str(summary.output_path)]) == 0
    out = capsys.readouterr().out
    assert "([run] dark_frames or --dark-frames" in out
