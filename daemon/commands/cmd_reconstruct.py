"""Verb `reconstruct RUN.h5 [RUN2.h5 ...]`: offline reprocessing of stored runs.

Local processes by default (``--workers N``), a Dask cluster with
``--scheduler ADDRESS``. One results file per run, never touching the run
file; see ``maskrun.daemon.offline.reprocess`` for the conversion and the layout.
"""

from __future__ import annotations

from rich.console import Console
from rich.markup import escape
from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeElapsedColumn, TimeRemainingColumn


def register(sub) -> None:
    from maskrun.reconstruct import METHODS

    p = sub.add_parser("reconstruct", help="reconstruct every complete frame set of stored runs (offline; "
                       "local processes or a Dask cluster)")
    p.add_argument("runs", nargs="+", metavar="RUN.h5", help="run files (read only)")
    p.add_argument("--method", default="auto", choices=METHODS, help="phase-retrieval method (default: auto = hio for K = 1, raar for K <= 4, else hybrid)")
    p.add_argument("--iterations", type=int, default=None, help="maximum iterations per frame set (default: the method's)")
    p.add_argument("--mode", default="each", choices=("each", "cumulative"),
                   help="each: every frame set alone; cumulative: pass p from the mean of frame sets 0..p")
    p.add_argument("--precision", default="double", choices=("single", "double"), help="complex128 (double) or complex64")
    p.add_argument("--seed", type=int, default=0, help="seed of the spectral initialization")
    p.add_argument("--workers", type=int, default=None, help="local worker processes (default: one per core)")
    p.add_argument("--scheduler", default=None, metavar="ADDRESS",
                   help="Dask scheduler address (e.g. tcp://host:8786); workers read the run files themselves, "
                   "so they must see them at the same path")
    p.add_argument("--output-dir", default=None, help="folder for the results files (default: beside each run)")
    p.add_argument("--overwrite", action="store_true", help="replace existing results files")
    p.set_defaults(func=cmd_reconstruct)


def cmd_reconstruct(args) -> int:
    from pydantic import ValidationError

    from maskrun.daemon.commands.cli import CommandError
    from maskrun.daemon.offline.reprocess import LocalRunner, ReprocessError, ReprocessOptions, reprocess_runs

    console = Console(highlight=False)
    try:
        options = ReprocessOptions(method=args.method, iterations=args.iterations, mode=args.mode,
                                   precision=args.precision, seed=args.seed)
    except ValidationError as exc:
        raise CommandError("; ".join(f"--{'-'.join(map(str, e['loc']))}: {e['msg']}" for e in exc.errors())) from None
    try:
        if args.scheduler:
            if args.workers is not None:
                raise ReprocessError("--workers is for local processes; with --scheduler the cluster decides")
            from maskrun.daemon.offline.distributed import DaskRunner

            runner = DaskRunner(args.scheduler)
        else:
            runner = LocalRunner(args.workers)
        columns = (TextColumn("[bold]reconstruct[/]"), BarColumn(), MofNCompleteColumn(), TextColumn("frame sets"),
                   TimeElapsedColumn(), TimeRemainingColumn())
        with Progress(*columns, console=console, transient=False) as bar:
            task = bar.add_task("frame sets", total=None)
            reports = reprocess_runs(
                args.runs, options, runner, output_dir=args.output_dir, overwrite=args.overwrite,
                on_planned=lambda n: bar.update(task, total=n),
                on_progress=lambda _r: bar.advance(task),
            )
    except ReprocessError as exc:
        raise CommandError(str(exc)) from None
    failures = 0
    for r in reports:
        if r.results_path is not None:
            console.print(f"{r.run_path}: {r.frame_sets} estimates -> [bold]{r.results_path}[/]")
        for set_index, msg in r.failed:
            failures += 1
            console.print(f"[bold red]{escape(str(r.run_path))}: frame set {set_index} failed:[/] {escape(str(msg))}")
    console.print(f"computed by {runner.description}, method {options.method}, "
                  f"{options.iterations or 'default'} iterations, mode {options.mode}")
    return 1 if failures else 0
