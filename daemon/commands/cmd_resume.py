"""Verb `resume RUN.h5`: continue a stopped or crashed run from its last complete frame set.

The config stored in the file is used (same bench, same plan); frames are appended to the
same file; the gap is recorded (a 'resume' event, and the flag after_resume on the first
frame set). The laser-safety notice is shown again and must be acknowledged again.
A file left open by a killed writer is repaired first (see daemon.acquire.recovery).
"""

from __future__ import annotations

from pathlib import Path

from rich.console import Console

from maskrun.daemon.safety.safety import UNATTENDED_OPTION


def register(sub) -> None:
    """`resume RUN.h5` continues a run file. The service's client verb `resume` (no file: resume the
    paused run of a running daemon) shares the name: when it is registered already, the run-file
    form is added to it and the handler dispatches on whether a file is given."""
    existing = sub.choices.get("resume")
    if existing is None:
        p = sub.add_parser("resume", help="continue a stopped or crashed run file from its last complete frame set")
        service_handler = None
    else:
        p = existing
        service_handler = existing.get_default("func")
    p.add_argument("run_file", nargs="?" if service_handler else None,
                   help="the run file (.h5) to continue from its last complete frame set"
                   + (" (without it: resume the paused run of a running daemon)" if service_handler else ""))
    p.add_argument(UNATTENDED_OPTION, dest="ack", action="store_true",
                   help="acknowledge the laser-safety notice on the command line (it is still shown and recorded)")
    p.add_argument("--no-figure", dest="figure", action="store_false", help="do not write the PNG summary")
    p.set_defaults(func=cmd_resume, service_resume=service_handler)


def cmd_resume(args) -> int:
    if not getattr(args, "run_file", None):
        return args.service_resume(args)
    from maskrun.daemon.show.figures import plot_run_summary
    from maskrun.daemon.acquire.foreground import RunRequest, print_summary, resume_foreground

    console = Console(highlight=False)
    summary = resume_foreground(Path(args.run_file), RunRequest(acknowledge_unattended=args.ack), console)
    print_summary(summary, console)
    if args.figure:
        try:
            png = plot_run_summary(summary.output_path, Path(summary.output_path).with_suffix(".png"))
            console.print(f"Figure: [bold]{png}[/]")
        except Exception as exc:  # the figure is a convenience; the run file is what matters
            console.print(f"[yellow]no figure:[/] {exc}")
    return 0 if summary.state.value == "finished" else 1
