"""The X11 side of the ``display`` modulator: a child process that owns the X connection.

Run as ``python -m maskrun.drivers.display_x11 [--display :0]``; the driver
(``display_modulator.DisplayModulator``) starts it and talks to it in JSON lines on
stdin/stdout, so the GUI loop can never stall acquisition or the control socket, and an X
server that dies takes only this process with it.

Requests (one JSON object per line) and replies:

- (on start) -> ``{"hello": true, "screens": [...], "present": bool}`` or ``{"error": ...}``
- ``{"op": "open", "screen": i}``: a borderless (override-redirect) window exactly covering
  screen entry ``i``, cursor hidden -> ``{"ok": true, "visual": {...}}``
- ``{"op": "load", "path": "images.npy"}``: (K, rows, cols) uint8 grey images, uploaded into K
  server-side pixmaps, so a show is a buffer swap -> ``{"ok": true, "count": K}``
- ``{"op": "show", "index": k, "readback": bool}``: present pixmap k; the reply comes only once the
  X server reports it presented (Present extension ``CompleteNotify``: the refresh it reached the
  screen, ``msc``/``ust``; without Present, after a round trip that follows the copy) ->
  ``{"ok": true, "index": k, "serial": n, "msc": ..., "ust": ..., "mode": "copy"|"flip"|"skip"|"sync",
  "covered": bool (another window still covers part of the screen, as the X server reports it),
  "sha256": "...", "match": bool, "grey": bool}`` (when ``readback``: the screen read back with
  GetImage, the SHA-256 of its grey levels, whether they equal image k, whether every pixel is grey)
- ``{"op": "quit"}``.

Asynchronously, when the window is destroyed or unmapped, the screen's monitor disappears or
changes, or the X connection drops: ``{"lost": "reason"}`` and the process exits with status 3.

Grey level g goes out as the TrueColor pixel (g, g, g), computed from the visual's channel masks
(X Window System Protocol, X11R7.7, section 8 "Visuals": a TrueColor pixel is the sum of each
channel's value shifted into its mask). Only 8-bit channels (depth 24/32) are accepted, so no
value is rescaled.
"""

from __future__ import annotations

import argparse
import hashlib
import json
import os
import select
import sys

import numpy as np

from Xlib import X, display as xdisplay, error as xerror
from Xlib.ext import randr
from Xlib.protocol import rq

PRESENT = "Present"
PRESENT_COMPLETE_NOTIFY = 1
PRESENT_COMPLETE_MASK = 2
PRESENT_OPTION_COPY = 2
PRESENT_MODES = {0: "copy", 1: "flip", 2: "skip", 3: "suboptimal-copy"}


# The Present extension requests used here (presentproto 1.2, "The Present Extension",
# K. Packard, 2013-2021: PresentQueryVersion = 0, PresentPixmap = 1, PresentSelectInput = 3).
class _PresentQueryVersion(rq.ReplyRequest):
    _request = rq.Struct(rq.Card8("opcode"), rq.Opcode(0), rq.RequestLength(),
                         rq.Card32("major_version"), rq.Card32("minor_version"))
    _reply = rq.Struct(rq.ReplyCode(), rq.Pad(1), rq.Card16("sequence_number"), rq.ReplyLength(),
                       rq.Card32("major_version"), rq.Card32("minor_version"), rq.Pad(16))


class _PresentPixmap(rq.Request):
    _request = rq.Struct(
        rq.Card8("opcode"), rq.Opcode(1), rq.RequestLength(),
        rq.Card32("window"), rq.Card32("pixmap"), rq.Card32("serial"),
        rq.Card32("valid"), rq.Card32("update"), rq.Int16("x_off"), rq.Int16("y_off"),
        rq.Card32("target_crtc"), rq.Card32("wait_fence"), rq.Card32("idle_fence"),
        rq.Card32("options"), rq.Pad(4),
        rq.Card32("target_msc_lo"), rq.Card32("target_msc_hi"),
        rq.Card32("divisor_lo"), rq.Card32("divisor_hi"),
        rq.Card32("remainder_lo"), rq.Card32("remainder_hi"))


class _PresentSelectInput(rq.Request):
    _request = rq.Struct(rq.Card8("opcode"), rq.Opcode(3), rq.RequestLength(),
                         rq.Card32("eid"), rq.Card32("window"), rq.Card32("event_mask"))


# CompleteNotify after the 10 bytes the generic event header takes (type, extension, sequence,
# length, evtype)
_COMPLETE_DATA = rq.Struct(rq.Card8("kind"), rq.Card8("mode"), rq.Card32("eid"), rq.Card32("window"),
                           rq.Card32("serial"), rq.Card32("ust_lo"), rq.Card32("ust_hi"),
                           rq.Card32("msc_lo"), rq.Card32("msc_hi"))


class Lost(Exception):
    """The display went away (window closed, monitor gone, connection dropped)."""


def list_screens(disp) -> list[dict]:
    """Every monitor of every X screen: index, x_screen, name, x, y, width, height, primary."""
    out = []
    has_randr = disp.has_extension("RANDR")
    for s in range(disp.screen_count()):
        scr = disp.screen(s)
        monitors = []
        if has_randr:
            try:
                monitors = scr.root.xrandr_get_monitors(is_active=True).monitors
            except (xerror.XError, AttributeError):
                monitors = []
        if monitors:
            for m in monitors:
                out.append({"x_screen": s, "name": disp.get_atom_name(m["name"]), "x": int(m["x"]),
                            "y": int(m["y"]), "width": int(m["width_in_pixels"]),
                            "height": int(m["height_in_pixels"]), "primary": bool(m["primary"])})
        else:
            out.append({"x_screen": s, "name": f"screen{s}", "x": 0, "y": 0, "width": scr.width_in_pixels,
                        "height": scr.height_in_pixels, "primary": s == disp.get_default_screen()})
    for i, entry in enumerate(out):
        entry["index"] = i
    return out


def _channel(mask: int) -> tuple[int, int]:
    """(shift, bits) of a visual's channel mask."""
    shift = (mask & -mask).bit_length() - 1
    return shift, bin(mask).count("1")


class Presenter:
    def __init__(self, display_name: str | None):
        try:
            self.disp = xdisplay.Display(display_name)
        except (xerror.DisplayError, xerror.ConnectionClosedError, OSError) as exc:
            raise Lost(f"cannot connect to X display {display_name or os.environ.get('DISPLAY', '(DISPLAY unset)')}: {exc}")
        self.screens = list_screens(self.disp)
        self.present_opcode = None
        ext = self.disp.query_extension(PRESENT)
        if ext is not None and ext.present:
            self.present_opcode = ext.major_opcode
            reply = _PresentQueryVersion(display=self.disp.display, opcode=self.present_opcode,
                                         major_version=1, minor_version=2)
            self.present_version = (reply.major_version, reply.minor_version)
            self.disp.ge_add_event_data(self.present_opcode, PRESENT_COMPLETE_NOTIFY, _COMPLETE_DATA)
        self.window = None
        self.pixmaps: list = []
        self.entry = None
        self.serial = 0
        self.shown = None
        self.visibility = X.VisibilityUnobscured

    # ------------------------------------------------------------------ window
    def open(self, index: int) -> dict:
        entry = self.screens[index]
        self.entry = entry
        scr = self.disp.screen(entry["x_screen"])
        self.scr = scr
        self.root = scr.root
        visual = next((v for d in scr.allowed_depths if d.depth == scr.root_depth for v in d.visuals
                       if v.visual_id == scr.root_visual), None)
        if visual is None or visual.visual_class not in (X.TrueColor, X.DirectColor):
            raise ValueError("the screen's root visual is not TrueColor; give the modulator's screen 24-bit colour")
        channels = [_channel(m) for m in (visual.red_mask, visual.green_mask, visual.blue_mask)]
        if any(bits != 8 for _, bits in channels):
            raise ValueError(f"the screen has {[b for _, b in channels]} bits per colour channel; the display "
                             "modulator needs 8 bits per channel (depth 24), so grey levels go out unscaled")
        self.blue_shift = channels[2][0]
        self.grey_to_pixel = sum(1 << shift for shift, _ in channels)  # g * this = the pixel (g, g, g)
        fmt = next(f for f in self.disp.display.info.pixmap_formats if f.depth == scr.root_depth)
        if fmt.bits_per_pixel != 32:
            raise ValueError(f"{fmt.bits_per_pixel} bits per pixel is not supported (32 expected)")
        self.byte_order = "<" if self.disp.display.info.image_byte_order == X.LSBFirst else ">"
        w, h = entry["width"], entry["height"]
        blank = scr.root.create_pixmap(1, 1, 1)
        cursor = blank.create_cursor(blank, (0, 0, 0), (0, 0, 0), 0, 0)
        self.window = scr.root.create_window(
            entry["x"], entry["y"], w, h, 0, scr.root_depth, X.InputOutput, X.CopyFromParent,
            override_redirect=True, background_pixel=0, cursor=cursor,
            event_mask=X.StructureNotifyMask | X.ExposureMask | X.VisibilityChangeMask)
        self.window.set_wm_name("maskrun modulator")
        self.gc = self.window.create_gc(graphics_exposures=False)
        self.window.map()
        self.window.configure(stack_mode=X.Above)
        if self.disp.has_extension("RANDR"):
            scr.root.xrandr_select_input(randr.RRScreenChangeNotifyMask | randr.RROutputChangeNotifyMask
                                         | randr.RRCrtcChangeNotifyMask)
        if self.present_opcode is not None:
            self.eid = self.disp.display.allocate_resource_id()
            _PresentSelectInput(display=self.disp.display, opcode=self.present_opcode, eid=self.eid,
                                window=self.window.id, event_mask=PRESENT_COMPLETE_MASK)
        self.disp.sync()
        self._wait_mapped()
        return {"ok": True, "width": w, "height": h, "depth": scr.root_depth,
                "present": list(self.present_version) if self.present_opcode is not None else None}

    def _wait_mapped(self) -> None:
        while True:
            ev = self.disp.next_event()
            self._check_event(ev)
            if ev.type == X.MapNotify and ev.window.id == self.window.id:
                return

    def _check_event(self, ev) -> None:
        """Raise Lost for the events that mean the modulator's screen is no longer shown."""
        if self.window is None:
            return
        if ev.type == X.DestroyNotify and ev.window.id == self.window.id:
            raise Lost("the modulator window was closed (destroyed by another X client)")
        if ev.type == X.UnmapNotify and ev.window.id == self.window.id:
            raise Lost("the modulator window was taken off the screen (unmapped or closed by another X client)")
        if ev.type == X.VisibilityNotify and ev.window.id == self.window.id:
            self.visibility = ev.state  # unobscured, partially or fully obscured by another window
        if ev.type == X.Expose and ev.window.id == self.window.id and self.shown is not None:
            self.window.copy_area(self.gc, self.pixmaps[self.shown], ev.x, ev.y, ev.width, ev.height, ev.x, ev.y)
        name = getattr(ev, "__class__", type(ev)).__name__
        if name in ("ScreenChangeNotify", "OutputChangeNotify", "CrtcChangeNotify"):
            self._check_monitor()

    def _check_monitor(self) -> None:
        now = [s for s in list_screens(self.disp) if s["x_screen"] == self.entry["x_screen"]
               and s["name"] == self.entry["name"]]
        keys = ("x", "y", "width", "height")
        if not now:
            raise Lost(f"the modulator's screen {self.entry['name']!r} is gone (unplugged or switched off)")
        if any(now[0][k] != self.entry[k] for k in keys):
            raise Lost(f"the modulator's screen {self.entry['name']!r} changed geometry to "
                       f"{now[0]['width']}x{now[0]['height']}+{now[0]['x']}+{now[0]['y']}")

    # ------------------------------------------------------------------ images
    def load(self, path: str) -> dict:
        images = np.load(path, mmap_mode="r")
        k, rows, cols = images.shape
        if images.dtype != np.uint8 or (rows, cols) != (self.entry["height"], self.entry["width"]):
            raise ValueError(f"images {images.shape} {images.dtype} do not fit the screen "
                             f"{self.entry['height']}x{self.entry['width']}")
        for p in self.pixmaps:
            p.free()
        self.pixmaps = []
        row_bytes = cols * 4
        # whole rows per PutImage request, within the core request limit (max_request_length words)
        per_request = max(1, (self.disp.display.info.max_request_length * 4 - 64) // row_bytes)
        depth = self.scr.root_depth
        for i in range(k):
            pix = self.window.create_pixmap(cols, rows, depth)
            pixels = (images[i].astype(np.uint32) * np.uint32(self.grey_to_pixel)).astype(self.byte_order + "u4")
            for r0 in range(0, rows, per_request):
                chunk = pixels[r0:r0 + per_request]
                pix.put_image(self.gc, 0, r0, cols, chunk.shape[0], X.ZPixmap, depth, 0, chunk.tobytes())
            self.pixmaps.append(pix)
            self.disp.sync()
        self.images = images
        return {"ok": True, "count": k}

    def show(self, index: int, readback: bool) -> dict:
        pix = self.pixmaps[index]
        w, h = self.entry["width"], self.entry["height"]
        self.serial += 1
        # the server repaints exposures from the shown image by itself
        self.window.change_attributes(background_pixmap=pix)
        self.window.configure(stack_mode=X.Above)  # above any window that appeared on the modulator's screen
        # the screen saver (and display power management) count this as activity: no blanking mid-run
        self.disp.force_screen_saver(X.ScreenSaverReset)
        reply = {"ok": True, "index": index, "serial": self.serial}
        if self.present_opcode is not None:
            _PresentPixmap(display=self.disp.display, opcode=self.present_opcode, window=self.window.id,
                           pixmap=pix.id, serial=self.serial, valid=0, update=0, x_off=0, y_off=0,
                           target_crtc=0, wait_fence=0, idle_fence=0, options=PRESENT_OPTION_COPY,
                           target_msc_lo=0, target_msc_hi=0, divisor_lo=0, divisor_hi=0,
                           remainder_lo=0, remainder_hi=0)
            self.disp.flush()
            while True:
                ev = self.disp.next_event()
                self._check_event(ev)
                if (ev.type == 35 and ev.extension == self.present_opcode and ev.evtype == PRESENT_COMPLETE_NOTIFY
                        and ev.data.serial == self.serial):
                    d = ev.data
                    reply.update(mode=PRESENT_MODES.get(d.mode, str(d.mode)), msc=(d.msc_hi << 32) | d.msc_lo,
                                 ust=(d.ust_hi << 32) | d.ust_lo)
                    break
        else:
            self.window.copy_area(self.gc, pix, 0, 0, w, h, 0, 0)
            self.disp.sync()  # the round trip returns after the server has done the copy
            reply["mode"] = "sync"
        self.shown = index
        self.disp.sync()
        self.drain()  # visibility changes from the restack
        reply["covered"] = self.visibility != X.VisibilityUnobscured
        if readback:
            img = self.root.get_image(self.entry["x"], self.entry["y"], w, h, X.ZPixmap, 0xFFFFFFFF)
            shot = np.frombuffer(img.data, dtype=self.byte_order + "u4").reshape(h, w) & np.uint32(0xFFFFFF)
            grey = (shot >> np.uint32(self.blue_shift)) & np.uint32(0xFF)
            reply["grey"] = bool(np.array_equal(shot, grey * np.uint32(self.grey_to_pixel)))
            grey8 = np.ascontiguousarray(grey.astype(np.uint8))
            reply["sha256"] = hashlib.sha256(grey8.tobytes()).hexdigest()
            reply["match"] = bool(np.array_equal(grey8, self.images[index]))
        return reply

    def drain(self) -> None:
        while self.disp.pending_events():
            self._check_event(self.disp.next_event())


def _send(obj) -> None:
    sys.stdout.write(json.dumps(obj) + "\n")
    sys.stdout.flush()


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description="the X11 side of the maskrun display modulator (started by the driver)")
    ap.add_argument("--display", default=None)
    args = ap.parse_args(argv)
    try:
        p = Presenter(args.display)
    except Lost as exc:
        _send({"lost": str(exc)})
        return 3
    _send({"hello": True, "screens": p.screens, "present": p.present_opcode is not None})
    stdin = sys.stdin.buffer
    buf = b""
    try:
        while True:
            p.drain()
            ready, _, _ = select.select([stdin, p.disp.fileno()], [], [], 1.0)
            if p.disp.fileno() in ready:
                p.drain()
            if stdin not in ready:
                continue
            chunk = os.read(stdin.fileno(), 65536)
            if not chunk:
                return 0  # the driver went away
            buf += chunk
            while b"\n" in buf:
                line, buf = buf.split(b"\n", 1)
                req = json.loads(line)
                op = req.get("op")
                try:
                    if op == "open":
                        reply = p.open(int(req["screen"]))
                    elif op == "load":
                        reply = p.load(req["path"])
                    elif op == "show":
                        reply = p.show(int(req["index"]), bool(req.get("readback")))
                    elif op == "quit":
                        _send({"ok": True, "id": req.get("id")})
                        return 0
                    else:
                        reply = {"error": f"unknown request {op!r}"}
                except (ValueError, IndexError, KeyError) as exc:
                    reply = {"error": str(exc)}
                _send({**reply, "id": req.get("id")})
    except Lost as exc:
        _send({"lost": str(exc)})
        return 3
    except (xerror.ConnectionClosedError, OSError, xerror.XError) as exc:
        _send({"lost": f"the X connection was lost ({type(exc).__name__}: {exc})"})
        return 3


if __name__ == "__main__":
    sys.exit(main())
