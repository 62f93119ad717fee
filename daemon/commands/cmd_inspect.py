"""Verb `inspect RUN.h5`: a summary of a run file, finished, growing, or left by a crash.

Reads in SWMR mode, so it works while the daemon writes. ``--follow`` refreshes every
``--interval-s`` seconds, printing new events as they come, until the run ends (Ctrl-C to quit).
"""

from __future__ import annotations

import os
import socket
import time
from pathlib import Path

import numpy as np
from rich.console import Console
from rich.markup import escape
from rich.table import Table

from maskrun.daemon.record.store import FLAG_NAMES


def register(sub) -> None:
    p = sub.add_parser("inspect", help="summarise a run file (also while it is written; --follow to watch)")
    p.add_argument("run_file", help="the run file (.h5)")
    p.add_argument("--follow", action="store_true", help="keep watching: print new events and progress until the run ends")
    p.add_argument("--interval-s", type=float, default=2.0, help="refresh period with --follow (seconds)")
    p.add_argument("--events", type=int, default=12, help="how many of the last events to show")
    p.set_defaults(func=cmd_inspect)


def run_outcome(rf) -> str:
    """'finished', 'stopped: ...', 'fault: ...', 'running (pid N)' or 'no end recorded ...'."""
    end = rf.last_end()
    if end is not None:
        msg = end["message"]
        return msg.removeprefix("run ").split(";")[0]
    pid = rf.writer_pid()
    host = None
    for e in rf.events():
        if e["kind"] == "writer":
            parts = e["message"].split()
            host = parts[3] if len(parts) >= 4 else None
    if pid is not None and host == socket.gethostname():
        try:
            os.kill(pid, 0)
            with open(f"/proc/{pid}/stat") as fh:
                zombie = fh.read().rsplit(")", 1)[1].split()[0] == "Z"
            if not zombie:
                return f"running (writer pid {pid})"
        except (ProcessLookupError, OSError):
            pass
        return f"no end recorded and the writer (pid {pid}) is gone: killed or lost power; {resume_advice(rf)}"
    return "no end recorded (running elsewhere, or the writer died)"


def resume_advice(rf) -> str:
    """What 'maskrun resume' will do with this file, in the words it uses (the same check: recovery.resume_point)."""
    from maskrun.daemon.acquire.recovery import ResumeError, resume_point

    try:
        point = resume_point(rf.path)
    except ResumeError as exc:
        return f"'maskrun resume' refuses it: {str(exc).split(': ', 1)[-1]}"
    except Exception as exc:  # an unreadable stored config: say so rather than advise
        return f"'maskrun resume' cannot read it ({type(exc).__name__}: {exc})"
    if point.finish_only:
        return (f"all {point.passes} frame sets are in the file; finish it with 'maskrun resume {rf.path}' "
                "(computes the missing estimates and writes the end record; no light)")
    return f"continue with 'maskrun resume {rf.path}' from pass {point.first_pass}"


def summary_table(rf, path: Path) -> Table:
    a = rf.attrs
    t = Table(title=escape(path.name), show_header=False)
    t.add_column(style="bold")
    t.add_column()
    plan = rf.run_plan or {}
    k = rf.mask_count
    sets = rf.complete_sets()
    info = rf.frame_info()
    t.add_row("run", escape(f"{a.get('run_name', '?')} created {a.get('created_utc', '?')}"))
    t.add_row("state", escape(run_outcome(rf)))
    passes = plan.get("passes")
    t.add_row("frame sets", f"{len(sets)} complete" + (f" of {passes} planned" if passes else "") + f" ({k} masks each)")
    t.add_row("frames", f"{rf.frame_count} (+ {rf.dark_count} dark, {rf.refused_count} refused and kept)")
    if len(info):
        flags = np.bitwise_or.reduce(info["flags"]) if len(info) else 0
        counts = [f"{name} x{int(np.count_nonzero(info['flags'] & bit))}" for bit, name in FLAG_NAMES.items()
                  if flags & bit]
        t.add_row("flags", ", ".join(counts) if counts else "none")
        last = float(info["t_frame_s"].max())
        t.add_row("last frame", f"{time.strftime('%Y-%m-%d %H:%M:%S', time.localtime(last))} "
                  f"({time.time() - last:.0f} s ago), exposure {float(info['exposure_s'][-1]):g} s")
        if len(sets) >= 2 and passes:
            t_sets = [float(info["t_frame_s"][s.rows].max()) for s in sets]
            per_set = (t_sets[-1] - t_sets[0]) / (len(sets) - 1)
            left = passes - 1 - sets[-1].pass_index
            if left > 0 and "running" in run_outcome(rf):
                eta = time.localtime(t_sets[-1] + left * per_set)
                t.add_row("ETA", f"{time.strftime('%H:%M', eta)} ({left} frame sets to go, {per_set:.1f} s each)")
    if rf.estimate_count:
        ei = rf.estimate_info()[-1]
        err = f"true error {ei['true_error']:.2%}" if np.isfinite(ei["true_error"]) else f"predicted error {ei['error_estimate']:.2%}"
        t.add_row("estimates", f"{rf.estimate_count}; last after {ei['passes_used']} sets, {err}")
    ev = rf.events()
    faults = [e for e in ev if e["level"] in ("warning", "error")]
    t.add_row("events", f"{len(ev)} ({len(faults)} warnings/errors)")
    t.add_row("file size", f"{path.stat().st_size / 1e6:.2f} MB")
    version = rf.format_version
    t.add_row("format", f"maskrun-run version {version}" + (
        f" (NeXus; default plot /entry/{rf.entry.attrs.get('default', 'data')})" if rf.is_nexus else " (before NeXus)"))
    return t


def _event_line(e: dict) -> str:
    stamp = time.strftime("%H:%M:%S", time.localtime(e["t_s"]))
    colour = {"error": "red", "warning": "yellow"}.get(e["level"], "dim")
    return f"[{colour}]{stamp} {e['level']:<7} {e['kind']:<18}[/] {escape(e['message'])}"


def cmd_inspect(args) -> int:
    from maskrun.daemon.commands.cli import CommandError
    from maskrun.daemon.record.runfile import RunFile

    if args.interval_s <= 0:
        raise CommandError("--interval-s must be a positive number of seconds")
    console = Console(highlight=False)
    path = Path(args.run_file)
    with RunFile(path) as rf:
        console.print(summary_table(rf, path))
        ev = rf.events()
        for e in ev[-args.events:] if args.events > 0 else []:
            console.print(_event_line(e), soft_wrap=True)
        if not args.follow:
            return 0
        seen = len(ev)
        frames = rf.frame_count
        try:
            while rf.last_end() is None:
                time.sleep(args.interval_s)
                rf.refresh()
                ev = rf.events()
                for e in ev[seen:]:
                    console.print(_event_line(e), soft_wrap=True)
                seen = len(ev)
                if rf.frame_count != frames:
                    frames = rf.frame_count
                    console.print(f"[dim]{time.strftime('%H:%M:%S')} frames {frames}, complete sets "
                                  f"{len(rf.complete_sets())}[/]")
                if "running" not in run_outcome(rf) and rf.last_end() is None:
                    console.print(run_outcome(rf))
                    return 1
        except KeyboardInterrupt:
            return 0
        console.print(f"[bold]run ended:[/] {escape(run_outcome(rf))}")
    return 0
