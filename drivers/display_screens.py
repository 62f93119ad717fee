"""Which X screen the display modulator uses: the screens labelled uniquely, and the one a setting
names (index, monitor name or geometry) chosen, with the list of screens in the error otherwise."""
from __future__ import annotations

import collections
import re

from .errors import DeviceMisconfigured

__all__ = ["choose_screen", "label_screens"]

_GEOMETRY = re.compile(r"^(\d+)x(\d+)\+(\d+)\+(\d+)$")


def _screen_line(s: dict) -> str:
    return (f"  {s['index']}: {s['label']}  {s['width']}x{s['height']}+{s['x']}+{s['y']}"
            f"{'  (primary)' if s.get('primary') else ''}")


def label_screens(screens: list[dict]) -> list[dict]:
    """Give every screen a unique label: its monitor name, qualified 'S/NAME' by the X screen when
    the name repeats (as with several X screens of one server)."""
    counts = collections.Counter(s["name"] for s in screens)
    return [{**s, "label": s["name"] if counts[s["name"]] == 1 else f"{s['x_screen']}/{s['name']}"} for s in screens]


def choose_screen(spec, screens: list[dict]) -> dict:
    """The screen ``spec`` names: an index (int or digits), a name ('HDMI-1', '1/screen'), or a
    geometry 'WxH+X+Y' (optionally 'S/WxH+X+Y'). DeviceMisconfigured listing the screens otherwise."""
    screens = label_screens(screens)
    listing = "\n".join(_screen_line(s) for s in screens)
    hint = "set [modulator.settings] screen to one of the indices, names or geometries listed"
    if spec is None or (isinstance(spec, str) and not spec.strip()):
        raise DeviceMisconfigured(f"no screen chosen for the modulator; the X server has:\n{listing}", device="modulator",
                                  hint=hint)
    if isinstance(spec, int) or (isinstance(spec, str) and spec.strip().isdigit()):
        i = int(spec)
        if 0 <= i < len(screens):
            return screens[i]
        raise DeviceMisconfigured(f"there is no screen {i}; the X server has:\n{listing}", device="modulator", hint=hint)
    text = spec.strip()
    x_screen, rest = None, text
    if "/" in text and text.split("/", 1)[0].isdigit():
        x_screen, rest = int(text.split("/", 1)[0]), text.split("/", 1)[1]
    pool = [s for s in screens if x_screen is None or s["x_screen"] == x_screen]
    m = _GEOMETRY.match(rest)
    if m:
        w, h, x, y = (int(v) for v in m.groups())
        found = [s for s in pool if (s["width"], s["height"], s["x"], s["y"]) == (w, h, x, y)]
    else:
        found = [s for s in pool if s["label"] == text or s["name"] == rest]
    if len(found) == 1:
        return found[0]
    if len(found) > 1:
        raise DeviceMisconfigured(f"screen {spec!r} matches {len(found)} screens; the X server has:\n{listing}",
                                  device="modulator", hint="give the index or the 'S/NAME' label instead")
    raise DeviceMisconfigured(f"no screen {spec!r} on the X server; it has:\n{listing}", device="modulator", hint=hint)
