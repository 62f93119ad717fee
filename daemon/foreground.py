"""A whole run in the foreground: `maskrun demo` and `maskrun run CONFIG`.

Order of work, chosen so that bad input costs nothing:
1. the config is validated and the bench constructed (driver settings checked) — no file yet;
2. the output folder is checked for writing;
3. the laser-safety notice is shown and acknowledged;
4. the run file is created (with the acknowledgement), devices opened, the run sequenced;
5. whatever happens, the shutter is closed, the file flushed and closed, the worker stopped.
"""

from __future__ import annotations

import os
import signal
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import zmq
from rich.console import Console
from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeElapsedColumn
from rich.table import Table

from .bench import build_bench
from .config import BenchConfig
from .safety import acknowledge
from .sequencer import RunControl, RunPlan, RunSummary
from .session import execute_run
from .store import StoreError
from .stream import Publisher


@dataclass
class RunRequest:
    acknowledge_unattended: bool = False
    output_dir: str | None = None
    passes: int | None = None
    exposure_s: float | None = None
    name: str | None = None
    figure: bool = True


def output_path_for(cfg: BenchConfig, req: RunRequest) -> Path:
    base = Path(req.output_dir or cfg.run.output_dir)  # relative paths: from the current folder
    stamp = time.strftime("%Y%m%d-%H%M%S")
    return base / f"{req.name or cfg.run.name}-{stamp}.h5"


def check_output_folder(path: Path) -> None:
    folder = path.parent
    probe = folder
    while not probe.exists():
        probe = probe.parent
    if not probe.is_dir() or not os.access(probe, os.W_OK):
        raise StoreError(f"{folder}: output folder is not writable; set [run] output_dir or --output-dir to a folder you can write")


def run_foreground(cfg: BenchConfig, req: RunRequest, console: Console) -> RunSummary:
    bench = build_bench(cfg)  # ConfigError here: nothing created yet
    try:
        out = output_path_for(cfg, req)
        check_output_folder(out)
        ack = acknowledge(cfg.laser, console, unattended=req.acknowledge_unattended, operator=cfg.run.operator)
        return _run(cfg, req, bench, out, ack, console)
    finally:
        bench.close()


def _run(cfg, req, bench, out: Path, ack, console: Console) -> RunSummary:
    passes = req.passes or cfg.run.passes
    exposure = req.exposure_s or cfg.camera.exposure_s
    plan = RunPlan(passes=passes, dark_frames=cfg.run.dark_frames, exposure_s=exposure, output_path=out)
    bench.open()
    ctx = zmq.Context()
    pub = None
    control = RunControl()
    old_handlers = {}

    def _on_signal(signum, _frame):
        control.request_stop(f"interrupted by {signal.Signals(signum).name}")

    try:
        for sig in (signal.SIGINT, signal.SIGTERM):
            old_handlers[sig] = signal.signal(sig, _on_signal)
        pub = Publisher(ctx, cfg.stream.publish_address, hwm=cfg.stream.preview_hwm)
        console.print(f"Run file: [bold]{out}[/]")
        console.print(f"Live stream: {pub.address}")
        with Progress(
            TextColumn("[bold]{task.description}"),
            BarColumn(bar_width=24),
            MofNCompleteColumn(),
            TimeElapsedColumn(),
            TextColumn("{task.fields[detail]}"),
            console=console,
            transient=False,
        ) as progress:
            task = progress.add_task("frames", total=plan.passes * bench.masks.shape[0], detail="")

            def observer(p):
                detail = p.state.value
                if p.pass_index >= 0:
                    detail += f" pass {p.pass_index + 1}/{plan.passes}"
                if np.isfinite(p.estimate_true_error):
                    detail += f" error {p.estimate_true_error:.2%}"
                elif np.isfinite(p.estimate_error_estimate):
                    detail += f" est. error {p.estimate_error_estimate:.2%}"
                progress.update(task, completed=p.frames_done, detail=detail)

            summary = execute_run(bench, plan, ack, publisher=pub, zmq_context=ctx, control=control,
                                  observer=observer, run_name=req.name or cfg.run.name)
    finally:
        for sig, h in old_handlers.items():
            signal.signal(sig, h)
        bench.close()
        if pub is not None:
            pub.close()
        ctx.term()
    return summary


def print_summary(summary: RunSummary, console: Console) -> None:
    t = Table(title="Run summary", show_header=False)
    t.add_column(style="bold")
    t.add_column()
    t.add_row("outcome", summary.state.value + (f" ({summary.message})" if summary.message else ""))
    t.add_row("frame sets complete", str(summary.passes_complete))
    t.add_row("frames taken", f"{summary.frames} (+ {summary.darks} dark)")
    t.add_row("frames refused", f"{summary.rejected} (stale or repeated frame ids, retaken)")
    t.add_row("frames flagged", f"{summary.flagged} ({summary.saturated_frames} over the saturation limit)")
    t.add_row("photons per frame", f"{summary.photons_per_frame_mean:.3g} (incident, dark-subtracted)")
    t.add_row("estimates", str(summary.estimates))
    if np.isfinite(summary.final_true_error):
        t.add_row("reconstruction error vs truth", f"{summary.final_true_error:.2%}")
    if np.isfinite(summary.final_error_estimate):
        t.add_row("predicted error (photon count)", f"{summary.final_error_estimate:.2%}")
    if np.isfinite(summary.final_residual):
        t.add_row("data residual", f"{summary.final_residual:.3g}")
    t.add_row("wall time", f"{summary.wall_s:.1f} s")
    t.add_row("run file", str(summary.output_path))
    console.print(t)
