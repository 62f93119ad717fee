"""A whole run in the foreground: `maskrun demo` and `maskrun run CONFIG`.

Order of work, chosen so that bad input costs nothing:
1. the config is validated and the bench constructed (driver settings checked) — no file yet;
2. the output folder is checked for writing;
3. the laser-safety notice is shown and acknowledged;
4. the run file is created (with the acknowledgement), devices opened, the run sequenced;
5. whatever happens, the shutter is closed, the file flushed and closed, the worker stopped.

Signals: SIGINT / SIGTERM / SIGHUP (the terminal closed) ask the run to stop (the frame in
progress is finished or its wait abandoned, the shutter closed, the file flushed and closed,
and the summary says so); SIGUSR1 resumes a paused run (``kill -USR1 <pid>``, printed when the
run pauses). A paused foreground run that nobody resumes stops by itself after
``[recovery] pause_timeout_s`` and can be continued later with ``maskrun resume RUN.h5``.

``resume_foreground(path, ...)`` continues a stopped or crashed run from its last complete
frame set, with the config stored in the file (see daemon.acquire.recovery).
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
from rich.markup import escape
from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeElapsedColumn
from rich.table import Table

from maskrun.daemon.acquire.bench import build_bench
from maskrun.daemon.config import BenchConfig
from maskrun.daemon.safety.safety import acknowledge
from maskrun.daemon.acquire.disk import MB, estimate_duration_s, series_passes
from maskrun.daemon.acquire.sequencer import RunControl, RunPlan, RunSummary
from maskrun.daemon.acquire.session import dark_advice, execute_run, plan_run_disk
from maskrun.daemon.record.store import StoreError
from maskrun.daemon.record.stream import Publisher


@dataclass
class RunRequest:
    acknowledge_unattended: bool = False
    output_dir: str | None = None
    passes: int | None = None
    exposure_s: float | None = None
    name: str | None = None
    dark_frames: int | None = None
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


def plan_for(cfg: BenchConfig, req: RunRequest, out: Path) -> RunPlan:
    """The run plan from the config and the command line (a time series sets passes from its duration)."""
    passes = req.passes or cfg.run.passes
    if cfg.run.duration_s is not None and not req.passes:
        passes = series_passes(cfg.run.interval_s, cfg.run.duration_s)
    exposure = req.exposure_s or cfg.camera.exposure_s
    darks = cfg.run.dark_frames if req.dark_frames is None else req.dark_frames
    return RunPlan(passes=passes, dark_frames=darks, exposure_s=exposure, output_path=out,
                   interval_s=cfg.run.interval_s)


def describe_plan(bench, plan: RunPlan) -> list[str]:
    """Lines shown before the run starts: frames, expected size and free disk, duration and ETA."""
    cfg = bench.config
    k = bench.masks.shape[0]
    todo = plan.passes - plan.first_pass
    readout = float(cfg.camera.settings.get("readout_latency_s", 0.0) or 0.0)
    if cfg.camera.settings.get("real_time") is False:
        readout = 0.0
    duration = estimate_duration_s(passes=todo, mask_count=k, dark_frames=plan.dark_frames, exposure_s=plan.exposure_s,
                                   settle_s=bench.modulator.settle_s, readout_s=readout, interval_s=plan.interval_s)
    disk = plan_run_disk(bench, plan)  # DiskSpaceError: refused before anything is written
    eta = time.strftime("%Y-%m-%d %H:%M", time.localtime(time.time() + duration))
    series = f", one every {plan.interval_s:g} s" if plan.interval_s else ""
    lines = [f"Plan: {todo} frame sets x {k} masks = {todo * k} frames (+ {plan.dark_frames} dark){series}, "
             f"exposure {plan.exposure_s:g} s",
             f"Expected: {disk.describe()}; duration about {_hms(duration)}, ETA {eta}"]
    if disk.warning:
        lines.append(f"[yellow]Warning:[/] {escape(disk.warning)}")
    darks = dark_advice(bench, plan)
    if darks:
        lines.append(f"[yellow]Warning:[/] {escape(darks)}")
    return lines


from maskrun.daemon.record.run_state import pass_label, precision_headline  # noqa: E402  (one wording for every display)


def _hms(seconds: float) -> str:
    seconds = int(round(seconds))
    return f"{seconds // 3600:d} h {seconds % 3600 // 60:02d} min" if seconds >= 3600 else f"{seconds // 60:d} min {seconds % 60:02d} s"


def _check_stream(cfg: BenchConfig) -> None:
    """A foreground run has no keys: its stream must be on loopback unless [stream] curve = 'off' (ConfigError)."""
    from maskrun.daemon.config import ConfigError
    from maskrun.daemon.security import InsecureBinding, check_stream_binding

    try:
        check_stream_binding(cfg.stream.publish_address, None, cfg.stream.curve)
    except InsecureBinding as exc:
        raise ConfigError(cfg.source_path, [("stream.publish_address", f"{exc} (a foreground run has no keys; "
                                             "'maskrun serve' uses the [service] keys)")]) from None


def run_foreground(cfg: BenchConfig, req: RunRequest, console: Console) -> RunSummary:
    bench = build_bench(cfg)  # ConfigError here: nothing created yet
    try:
        own = [f for f in bench.firmware_info() if f.get("pid")]
        if own:
            console.print("Simulated devices in their own processes: " + ", ".join(
                f"{f['name']} pid {f['pid']} on {escape(f['port'])}" for f in own))
        out = output_path_for(cfg, req)
        check_output_folder(out)
        _check_stream(cfg)
        plan = plan_for(cfg, req, out)
        for line in describe_plan(bench, plan):
            console.print(line)
        ack = acknowledge(cfg.laser, console, unattended=req.acknowledge_unattended, operator=cfg.run.operator)
        return _run(cfg, req, bench, plan, ack, console)
    finally:
        bench.close()


def resume_foreground(path: str | Path, req: RunRequest, console: Console) -> RunSummary:
    """Continue a stopped or crashed run file (same config, same file, the gap recorded)."""
    from maskrun.daemon.config import parse_config
    from maskrun.daemon.acquire.recovery import needs_repair, repair_run_file, resume_point

    path = Path(path)
    point = resume_point(path)  # ResumeError: finished, still being written, nothing to do
    cfg = parse_config(point.config_text, str(path))
    if point.finish_only:  # every frame set is in: no bench, no light, no notice (daemon.acquire.finish)
        from maskrun.daemon.acquire.finish import finish_run_file

        console.print(f"Finishing [bold]{escape(str(path))}[/]: all {point.passes} frame sets are in the file; "
                      f"{escape(point.note())}")
        return finish_run_file(point, cfg, log=lambda m: console.print(escape(m)))
    _check_stream(cfg)
    bench = build_bench(cfg)
    try:
        plan = RunPlan(passes=point.passes, dark_frames=point.dark_frames, exposure_s=point.exposure_s,
                       output_path=path, interval_s=point.interval_s, first_pass=point.first_pass,
                       first_set_index=point.first_set_index, resumed=True, dose_photons_before=point.dose_photons)
        console.print(f"Resuming [bold]{escape(str(path))}[/]: {escape(point.note())}")
        for line in describe_plan(bench, plan):
            console.print(line)
        ack = acknowledge(cfg.laser, console, unattended=req.acknowledge_unattended, operator=cfg.run.operator)
        extra = ()
        if needs_repair(path):
            report = repair_run_file(path, int(cfg.run.min_free_disk_mb * MB))
            console.print(report.describe())
            extra = (("repaired", report.describe(), "info"),)
        return _run(cfg, req, bench, plan, ack, console, append=True, resume_note=point.note(),
                    run_name=point.run_name, extra_events=extra)
    finally:
        bench.close()


def _run(cfg, req, bench, plan: RunPlan, ack, console: Console, *, append: bool = False, resume_note: str = "",
         run_name: str | None = None, extra_events: tuple = ()) -> RunSummary:
    out = plan.output_path
    bench.open()
    ctx = zmq.Context()
    pub = None
    control = RunControl()
    control.resume_hint = f"kill -USR1 {os.getpid()} (after fixing the cause)"
    old_handlers = {}

    def _on_signal(signum, _frame):
        control.request_stop(f"interrupted by {signal.Signals(signum).name}")

    def _on_resume(_signum, _frame):
        control.resume()

    try:
        for sig in (signal.SIGINT, signal.SIGTERM, signal.SIGHUP):  # SIGHUP: the terminal closed
            old_handlers[sig] = signal.signal(sig, _on_signal)
        old_handlers[signal.SIGUSR1] = signal.signal(signal.SIGUSR1, _on_resume)
        pub = Publisher(ctx, cfg.stream.publish_address, hwm=cfg.stream.preview_hwm, curve=cfg.stream.curve)
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
            task = progress.add_task("frames", total=(plan.passes - plan.first_pass) * bench.masks.shape[0], detail="")
            last_state = [None]

            def observer(p):
                if p.state != last_state[0]:
                    last_state[0] = p.state
                    if p.state.value == "paused":
                        progress.console.print(f"[bold red]PAUSED[/] {time.strftime('%H:%M:%S')}: {escape(p.message)}")
                    elif p.state.value == "acquiring" and p.message.startswith("resumed"):
                        progress.console.print(f"[bold green]RESUMED[/] {time.strftime('%H:%M:%S')}: {escape(p.message)}")
                    elif p.state.value == "finishing":
                        progress.console.print(f"{time.strftime('%H:%M:%S')} all frames taken, shutter closed; "
                                               "computing the last estimates...")
                detail = p.state.value
                if p.pass_index >= 0:
                    detail += f" {pass_label(p.pass_index, plan.passes)}"
                if p.state.value == "finishing" and p.estimates_waiting:
                    detail += f", {p.estimates_waiting} estimate(s) to come"
                head = precision_headline(p.precision, p.estimate_error_estimate)
                if head:
                    detail += f" {head}"
                if np.isfinite(p.estimate_true_error):
                    detail += f" (vs truth {p.estimate_true_error:.2%})"
                progress.update(task, completed=p.frames_done, detail=detail)

            summary = execute_run(bench, plan, ack, publisher=pub, zmq_context=ctx, control=control,
                                  observer=observer, run_name=run_name or req.name or cfg.run.name,
                                  append=append, resume_note=resume_note, extra_events=extra_events)
        if summary.state.value != "finished":
            console.print(f"[bold]Run {summary.state.value}[/]: {escape(summary.message)}")
            if summary.resumable:
                console.print(f"Shutter closed; run file flushed and closed with {summary.sets_in_file} complete "
                              f"frame sets. Continue with: [bold]maskrun resume {out} --acknowledge-safety[/]")
            else:
                console.print(f"Shutter closed; run file {out} kept ({summary.sets_in_file} complete frame sets). "
                              "No resume can fix this (it would use the same settings): start a new run with "
                              "settings the device accepts.")
    finally:
        for sig, h in old_handlers.items():
            signal.signal(sig, h)
        bench.close()
        if pub is not None:
            pub.close()
        ctx.term()
    return summary


def print_summary(summary: RunSummary, console: Console) -> None:
    """The summary table: the run's counts, and the file's account of its outcome and precision (run_state)."""
    from maskrun.daemon.record.run_state import precision_rows, state_from_file

    try:
        told = state_from_file(summary.output_path).to_dict()
    except Exception:  # no file: the counts are all there is
        told = {}
    t = Table(title="Run summary", show_header=False)
    t.add_column(style="bold")
    t.add_column()
    t.add_row("outcome", escape(told.get("outcome") or summary.state.value
                                + (f" ({summary.message})" if summary.message else "")))
    if told:
        t.add_row("exposure (as used)", f"{told['exposure_s']:g} s" if told.get("exposure_s") else "unknown")
        t.add_row("passes planned, dark frames", f"{told.get('passes')}, {told.get('dark_frames')}")
    earlier = summary.sets_in_file - summary.passes_complete  # sets of earlier sessions (a resumed run)
    if earlier > 0:
        t.add_row("frame sets complete", f"{summary.sets_in_file} in the file ({summary.passes_complete} in this "
                  f"session, {earlier} before the resume)")
        t.add_row("frames taken", f"{summary.frames} in this session (+ {summary.darks} dark)")
    else:
        t.add_row("frame sets complete", str(summary.passes_complete))
        t.add_row("frames taken", f"{summary.frames} (+ {summary.darks} dark)")
    t.add_row("frames refused", f"{summary.rejected} (stale or repeated frame ids, retaken)"
              + (f"; {summary.refused} kept in /entry/refused" if summary.refused else ""))
    if summary.faults:
        t.add_row("faults", ", ".join(f"{k} x{v}" for k, v in sorted(summary.faults.items()))
                  + f"; {summary.recovered} recovered, {summary.pauses} pause(s)")
    t.add_row("frames flagged", f"{summary.flagged} ({summary.saturated_frames} over the saturation limit)")
    t.add_row("photons per frame", f"{summary.photons_per_frame_mean:.3g} (incident, dark-subtracted)")
    t.add_row("estimates", str(summary.estimates))
    rows = precision_rows(told.get("precision"), told.get("true_error"), told.get("error_estimate")) if told else []
    if not rows:
        rows = precision_rows(None, summary.final_true_error, summary.final_error_estimate)
    for label, value in rows:
        t.add_row(label, escape(value))
    if told.get("warnings"):
        t.add_row("warnings in the run log", escape(f"{len(told['warnings'])}; the last: {told['warnings'][-1]['message']}"))
    if np.isfinite(summary.final_residual):
        t.add_row("data residual", f"{summary.final_residual:.3g}")
    t.add_row("wall time", f"{summary.wall_s:.1f} s")
    t.add_row("run file", str(summary.output_path))
    console.print(t)
