"""Verb `screens`: list the screens of an X server, as the `display` modulator names them."""

from __future__ import annotations

import json
import os


def register(sub) -> None:
    p = sub.add_parser("screens", help="list the X server's screens (for [modulator] driver = 'display', setting screen)")
    p.add_argument("--display", default=None, help="X display, e.g. ':0' (default: $DISPLAY)")
    p.add_argument("--json", action="store_true", help="machine-readable output")
    p.set_defaults(func=cmd_screens)


def cmd_screens(args) -> int:
    from rich.console import Console
    from rich.table import Table

    from maskrun.daemon.commands.cli import CommandError

    try:
        from Xlib import display as xdisplay, error as xerror

        from maskrun.drivers.display_modulator import label_screens
        from maskrun.drivers.display_x11 import list_screens
    except ImportError:
        raise CommandError("listing screens needs python-xlib: pip install 'maskrun[display]'") from None
    name = args.display or os.environ.get("DISPLAY")
    if not name:
        raise CommandError("no X display: DISPLAY is not set; give --display :0 (the display the modulator is on)")
    try:
        d = xdisplay.Display(name)
    except (xerror.DisplayError, xerror.ConnectionClosedError, OSError) as exc:
        raise CommandError(f"cannot connect to X display {name}: {exc}; is the X server running, and may this "
                           "user connect to it (xhost / XAUTHORITY)?") from None
    try:
        screens = label_screens(list_screens(d))
    finally:
        d.close()
    if args.json:
        print(json.dumps(screens, indent=1))
        return 0
    table = Table(title=f"screens of X display {name}")
    for col in ("index", "screen (name)", "geometry WxH+X+Y", "X screen", "primary"):
        table.add_column(col)
    for s in screens:
        table.add_row(str(s["index"]), s["label"], f"{s['width']}x{s['height']}+{s['x']}+{s['y']}", str(s["x_screen"]),
                      "yes" if s["primary"] else "")
    console = Console()
    console.print(table)
    console.print("Give one as [modulator.settings] screen = INDEX, \"NAME\" or \"WxH+X+Y\".", highlight=False, markup=False)
    return 0
