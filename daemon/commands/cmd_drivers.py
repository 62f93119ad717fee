"""Verbs `drivers` (list the installed drivers and their settings) and `check-camera`
(run the camera conformance kit on one driver)."""

from __future__ import annotations

import json
import tomllib
from typing import Any

from rich.console import Console
from rich.markup import escape
from rich.table import Table

KIND_TITLES = {"camera": "Cameras", "modulator": "Modulators", "safety": "Safety boxes"}


def register(sub) -> None:
    p = sub.add_parser("drivers", help="list the installed camera, modulator and safety-box drivers and their settings")
    p.add_argument("--kind", choices=list(KIND_TITLES), help="only this kind of driver")
    p.add_argument("--brief", action="store_true", help="names and summaries only, no settings")
    p.add_argument("--json", action="store_true", help="machine-readable output (name, summary, settings schema)")
    p.set_defaults(func=cmd_drivers)

    p = sub.add_parser("check-camera", help="check that a camera driver keeps the camera contract (conformance kit)")
    p.add_argument("name", help="camera driver name (see 'maskrun drivers --kind camera')")
    p.add_argument("--setting", action="append", default=[], metavar="KEY=VALUE",
                   help="a driver setting; VALUE is read as a TOML value (12, 0.5, true, [64, 64], \"text\"); "
                   "a bare word is taken as text. Repeat for several settings")
    p.add_argument("--failing-setting", action="append", default=[], metavar="KEY=VALUE",
                   help="a setting that makes open() fail (e.g. a missing device), to check that close() is safe after it")
    p.add_argument("--grab-timeout-s", type=float, default=5.0, help="timeout of ordinary grabs, seconds (default 5)")
    p.set_defaults(func=cmd_check_camera)


# ---------------------------------------------------------------------------- settings parsing
def parse_setting(text: str) -> tuple[str, Any]:
    """'key=value' -> (key, value); value read as TOML (number, bool, string, array, inline table),
    a bare word that is not valid TOML is taken as a string."""
    from maskrun.daemon.commands.cli import CommandError

    key, sep, raw = text.partition("=")
    key, raw = key.strip(), raw.strip()
    if not sep or not key:
        raise CommandError(f"setting {text!r} is not KEY=VALUE; write e.g. --setting bit_depth=12")
    try:
        value = tomllib.loads(f"v = {raw}")["v"]
    except tomllib.TOMLDecodeError:
        value = raw
    return key, value


def parse_settings(items: list[str]) -> dict[str, Any]:
    out: dict[str, Any] = {}
    for item in items:
        key, value = parse_setting(item)
        out[key] = value
    return out


# ---------------------------------------------------------------------------- drivers
def _type_name(prop: dict, defs: dict) -> str:
    """A short type name from a JSON schema property."""
    if "$ref" in prop:
        name = prop["$ref"].rsplit("/", 1)[-1]
        target = defs.get(name, {})
        return f"table ({', '.join(target.get('properties', {}))})" if target.get("properties") else name
    if "enum" in prop:
        return " | ".join(json.dumps(v) for v in prop["enum"])
    if "const" in prop:
        return json.dumps(prop["const"])
    if "anyOf" in prop:
        return " | ".join(_type_name(p, defs) for p in prop["anyOf"])
    t = prop.get("type")
    if t == "array":
        if "prefixItems" in prop:
            return "[" + ", ".join(_type_name(p, defs) for p in prop["prefixItems"]) + "]"
        items = prop.get("items")
        return f"list of {_type_name(items, defs)}" if items else "list"
    if t == "null":
        return "none"
    return {"integer": "int", "number": "float", "boolean": "bool", "string": "text", "object": "table"}.get(t, t or "any")


def _limits(prop: dict) -> str:
    words = []
    for key, sym in (("exclusiveMinimum", ">"), ("minimum", ">="), ("exclusiveMaximum", "<"), ("maximum", "<=")):
        if key in prop:
            words.append(f"{sym} {prop[key]}")
    return " ".join(words)


def settings_rows(schema: dict) -> list[tuple[str, str, str, str]]:
    """(name, type, default, description) for each setting of a driver's settings JSON schema."""
    defs = schema.get("$defs", {})
    required = set(schema.get("required", []))
    rows = []
    for name, prop in schema.get("properties", {}).items():
        typ = _type_name(prop, defs)
        limits = _limits(prop)
        if limits:
            typ += f" ({limits})"
        default = "(required)" if name in required else json.dumps(prop.get("default")) if "default" in prop else ""
        rows.append((name, typ, default, prop.get("description", "")))
    return rows


def cmd_drivers(args) -> int:
    from maskrun.drivers.registry import describe_drivers

    kinds = [args.kind] if args.kind else list(KIND_TITLES)
    if args.json:
        out = {k: [{"name": d.name, "summary": d.summary, "settings_schema": d.schema} for d in describe_drivers(k)]
               for k in kinds}
        print(json.dumps(out, indent=2))
        return 0
    console = Console(highlight=False)
    for kind in kinds:
        described = describe_drivers(kind)
        console.print(f"[bold]{KIND_TITLES[kind]}[/] (driver = \"NAME\" in the {escape(f'[{kind}]')} table of a bench config)")
        if not described:
            console.print("  (none installed)")
        for d in described:
            colour = "red" if d.summary.startswith("unavailable:") else "green"
            console.print(f"  [bold {colour}]{escape(d.name)}[/]  {escape(d.summary)}", soft_wrap=True)
            rows = settings_rows(d.schema)
            if args.brief or not rows:
                continue
            table = Table(show_header=True, header_style="dim", box=None, padding=(0, 1, 0, 4))
            table.add_column("setting", no_wrap=True)
            table.add_column("type", overflow="fold", max_width=28)
            table.add_column("default", overflow="fold", max_width=20)
            table.add_column("meaning", overflow="fold", ratio=1)
            for row in rows:
                table.add_row(*(escape(cell) for cell in row))
            console.print(table)
        console.print()
    console.print("Check a camera driver against the camera contract: [bold]maskrun check-camera NAME[/]")
    return 0


# ---------------------------------------------------------------------------- check-camera
def cmd_check_camera(args) -> int:
    from maskrun.drivers.conformance import print_results, run_conformance

    from maskrun.daemon.commands.cli import CommandError

    if not args.grab_timeout_s > 0:
        raise CommandError("--grab-timeout-s must be a positive number of seconds")
    settings = parse_settings(args.setting)
    failing = parse_settings(args.failing_setting) if args.failing_setting else None
    from maskrun.drivers.registry import build_driver

    build_driver("camera", args.name, settings)  # bad name or settings: one-line error before any output
    console = Console(highlight=False)
    shown = ", ".join(f"{k}={json.dumps(v)}" for k, v in settings.items()) or "defaults"
    console.print(f"Checking camera driver [bold]{args.name}[/] (settings: {shown})")
    results = run_conformance(args.name, settings, failing_settings=failing, grab_timeout_s=args.grab_timeout_s)
    print_results(results, console, title=f"camera {args.name!r}")
    return 1 if any(r.status == "fail" for r in results) else 0
