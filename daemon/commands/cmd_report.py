"""Verb `report RUN.h5`: a PNG and an HTML page that tell a run's story."""

from __future__ import annotations


def register(sub) -> None:
    p = sub.add_parser(
        "report",
        help="summarise a run file as a PNG and an HTML page (final amplitude and phase, error per pass, "
        "photons and saturation over time, faults on a timeline, safety acknowledgement, config)",
    )
    p.add_argument("run_file", metavar="RUN.h5", help="a run file written by maskrun (finished, stopped or crashed)")
    p.add_argument("--output-dir", help="folder for RUN.report.png and RUN.report.html (default: beside the run file)")
    p.set_defaults(func=cmd_report)


def cmd_report(args) -> int:
    from rich.console import Console

    from maskrun.daemon.commands.cli import CommandError
    from maskrun.daemon.show.report import write_report

    from pathlib import Path

    path = Path(args.run_file)
    if not path.exists():
        raise CommandError(f"{path}: no such file; give a run file written by maskrun (runs/NAME-DATE-TIME.h5)")
    try:
        files = write_report(path, args.output_dir)
    except PermissionError as exc:
        raise CommandError(f"cannot write the report: {exc}; choose another folder with --output-dir") from None
    console = Console(highlight=False)
    s = files.story
    console.print(f"Run '{s.run_name}': {s.outcome}; {len(s.frame_info)} frames, {s.complete_sets} complete frame "
                  f"sets, {len(s.warnings)} warnings/errors")
    console.print(f"Picture: [bold]{files.png}[/]")
    console.print(f"Page:    [bold]{files.html}[/]  (open in a web browser; the picture is embedded)")
    return 0
