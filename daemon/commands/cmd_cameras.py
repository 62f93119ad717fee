"""Verb `cameras`: the GenICam cameras each GenTL producer sees, with the config lines that open them."""

from __future__ import annotations

import json

from rich.console import Console
from rich.markup import escape
from rich.table import Table


def register(sub) -> None:
    p = sub.add_parser("cameras", help="list the GenICam cameras each GenTL producer sees (for the genicam driver)")
    p.add_argument("--producer", action="append", default=[], metavar="PATH",
                   help="a GenTL producer (.cti) or a folder of them; repeat for several; default: the folders in "
                   "$GENICAM_GENTL64_PATH; 'sim:viky' = the simulated producer in the genicam wheel")
    p.add_argument("--json", action="store_true", help="machine-readable output (one object per camera)")
    p.set_defaults(func=cmd_cameras)


def _quoted(text: str) -> str:
    return json.dumps(text)  # a TOML basic string for what a path or serial holds


def cmd_cameras(args) -> int:
    from maskrun.drivers.genicam_discovery import find_producers, list_cameras

    producers = find_producers(args.producer or None)  # none found: one-line DeviceError (where it looked)
    per_producer: list[tuple[str, list, str]] = []
    for cti in producers:
        try:
            per_producer.append((str(cti), list_cameras([cti]), ""))
        except Exception as exc:  # noqa: BLE001 - one broken producer must not hide the others' cameras
            per_producer.append((str(cti), [], f"{type(exc).__name__}: {str(exc).splitlines()[0] if str(exc) else ''}"))
    if args.json:
        out = [{**c.to_dict(), "config_line": c.config_line()} for _, cams, _ in per_producer for c in cams]
        errors = [{"producer": p, "error": e} for p, _, e in per_producer if e]
        print(json.dumps({"cameras": out, "producer_errors": errors}, indent=2))
        return 0
    console = Console(highlight=False)
    total = 0
    for path, cams, error in per_producer:
        console.print(f"[bold]GenTL producer[/] {escape(path)}")
        if error:
            console.print(f"  [red]could not be loaded:[/] {escape(error)}")
            continue
        if not cams:
            console.print("  no camera seen (check power, cable, and for GigE Vision the network settings)")
            continue
        table = Table(box=None, padding=(0, 1, 0, 2), header_style="dim")
        for column in ("vendor", "model", "serial", "user name", "device id", "access", "config line"):
            table.add_column(column, overflow="fold")
        for c in cams:
            table.add_row(*(escape(v or "-") for v in (c.vendor, c.model, c.serial, c.user_name, c.id, c.access)),
                          escape(c.config_line()))
        console.print(table)
        total += len(cams)
    console.print()
    console.print(escape("In a bench config: [camera] driver = \"genicam\", and under [camera.settings]:"))
    named = args.producer[0] if len(args.producer) == 1 else producers[0].as_posix() if len(producers) == 1 else None
    if named is not None:
        console.print(f"  producer = {escape(_quoted(named))}")
    else:
        console.print(f"  producer = [{escape(', '.join(_quoted(p.as_posix()) for p in producers))}]")
    if not args.producer:
        console.print("  (or leave producer out: $GENICAM_GENTL64_PATH names its folder)")
    console.print("  device = ...   (the config line of the camera, above)")
    console.print(f"{total} camera(s) seen by {len(producers)} producer(s)")
    return 0
