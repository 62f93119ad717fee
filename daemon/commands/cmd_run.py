"""Verbs `demo` (the embedded simulated bench) and `run CONFIG` (a run in the foreground)."""

from __future__ import annotations

from pathlib import Path

from rich.console import Console

from maskrun.daemon.safety.safety import UNATTENDED_OPTION


def _add_run_options(p) -> None:
    p.add_argument(UNATTENDED_OPTION, dest="ack", action="store_true",
                   help="acknowledge the laser-safety notice on the command line (unattended runs); "
                   "the notice is still shown and the acknowledgement recorded")
    p.add_argument("--output-dir", help="folder for the run file (default: [run] output_dir)")
    p.add_argument("--passes", type=int, help="number of passes (frame sets), overriding [run] passes")
    p.add_argument("--exposure-s", type=float, help="exposure per frame in seconds, overriding [camera] exposure_s")
    p.add_argument("--dark-frames", type=int, help="dark frames before the first pass, overriding [run] dark_frames")
    p.add_argument("--name", help="run name (file name prefix)")
    p.add_argument("--no-figure", dest="figure", action="store_false", help="do not write the PNG summary")


def register(sub) -> None:
    p = sub.add_parser("demo", help="run the whole job on the embedded simulated bench (configs/demo.toml)")
    _add_run_options(p)
    p.add_argument("--firmware-processes", action="store_true",
                   help="run the simulated safety box and modulator firmware as their own processes (killing or "
                   "freezing maskrun is then seen by the box: it closes the shutter)")
    p.set_defaults(func=cmd_demo)
    p = sub.add_parser("run", help="run a bench config in the foreground (notice, darks, passes, reconstruction)")
    p.add_argument("config", help="bench config (TOML)")
    _add_run_options(p)
    p.set_defaults(func=cmd_run)


def _execute(cfg, args) -> int:
    from maskrun.daemon.commands.cli import CommandError
    from maskrun.daemon.show.figures import plot_run_summary
    from maskrun.daemon.acquire.foreground import RunRequest, print_summary, run_foreground

    console = Console(highlight=False)
    if args.passes is not None and args.passes < 1:
        raise CommandError("--passes must be at least 1")
    if args.exposure_s is not None and not args.exposure_s > 0:
        raise CommandError("--exposure-s must be a positive number of seconds")
    if args.dark_frames is not None and args.dark_frames < 0:
        raise CommandError("--dark-frames must be 0 or more")
    req = RunRequest(acknowledge_unattended=args.ack, output_dir=args.output_dir, passes=args.passes,
                     exposure_s=args.exposure_s, name=args.name, dark_frames=args.dark_frames)
    summary = run_foreground(cfg, req, console)
    print_summary(summary, console)
    if args.figure and Path(summary.output_path).exists():
        png = plot_run_summary(summary.output_path, Path(summary.output_path).with_suffix(".png"))
        console.print(f"Figure: [bold]{png}[/]")
    console.print(f"Read the file: [bold]maskrun inspect {summary.output_path}[/] (or h5py; layout in docs/run-file.md)")
    return 0 if summary.state.value == "finished" else 1


def cmd_demo(args) -> int:
    from maskrun.daemon.config import load_demo_config

    cfg = load_demo_config()
    if args.firmware_processes:
        cfg.simulation.firmware_processes = True
    return _execute(cfg, args)


def cmd_run(args) -> int:
    from maskrun.daemon.config import load_config

    return _execute(load_config(args.config), args)
