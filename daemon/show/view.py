"""`maskrun view [ADDRESS]`: a live desktop window on the daemon's stream, for aligning the bench.

Panels: the latest camera frame (log or linear counts, saturated pixels in
magenta, fixed colour scale so it does not flicker), the current amplitude and
phase estimates (phase with the cyclic 'twilight' map, or unwrapped with
'viridis'), error and residual per pass, and a status line (state, pass, mask,
frames per second, dose in photons, saturation, stream health) with the latest
alerts underneath.

Library: Qt (PySide6) with pyqtgraph, chosen by measurement (bench/view_bench.py,
512 x 512, 2 shared cores, Xvfb): it redraws everything that changes (frame,
amplitude, phase, titles, colour-bar limits, the error plot) at 49-62 updates/s
and frames alone at 250-290/s; a 30 frames/s stream is drawn in full. matplotlib
with blitting reached 31-40 and 131-182 updates/s for image data only; new
titles, colour-bar limits or plot ranges need a full redraw there, 6-8
updates/s. pyqtgraph also gives zoom and pan with the mouse, which alignment
needs. Both libraries come with the optional extra ``view``
(``pip install 'maskrun[view]'``) so the daemon stays light; this module imports
them only inside ``run_view``/``window_class`` (the window itself is built in ``view_window``).

Titles and colour-bar limits are set only when they change, the amplitude scale
is rounded up to a round number, and the saturation overlay is hidden when no
pixel is saturated: each of these avoids re-laying out and repainting the axes.

The view never slows the daemon: it subscribes to the PUB stream, drains
whatever has arrived every ``POLL_MS`` milliseconds and draws only the newest
frame and estimate (``view_model.LiveViewState``).

Automation hooks (used by the headless test and the benchmark):
``--state-file PATH`` writes a small JSON with message counts, paint counts and
the on-screen rectangles of the panels; ``--screenshot PATH`` saves the window
as a PNG on exit; ``--exit-after S`` closes the window after S seconds.
"""

from __future__ import annotations

import os
import signal
import sys

from maskrun.daemon.show.view_model import LiveViewState
# the window, its axes and its timing live in view_window; importable from here as before
from maskrun.daemon.show.view_window import DRAIN_BUDGET_S, POLL_MS, _build_window_class, log_ticks, nice_ceiling

VIEW_EXTRA_HINT = ("the live view needs the optional 'view' extra (PySide6-Essentials and pyqtgraph), which is not "
                   "installed here: pip install 'maskrun[view]'  (in a source checkout: pip install -e '.[view]')")


class ViewUnavailable(RuntimeError):
    """The view cannot start here (missing extra or no display); the message says what to do."""


def require_view_extra() -> None:
    """Raise ViewUnavailable naming the extra to install if PySide6 or pyqtgraph cannot be imported."""
    missing = []
    for mod in ("PySide6", "pyqtgraph"):
        try:
            __import__(mod)
        except ImportError:
            missing.append(mod)
    if missing:
        raise ViewUnavailable(f"{' and '.join(missing)} not importable: {VIEW_EXTRA_HINT}")


def require_display() -> None:
    """Raise ViewUnavailable if no display is reachable (instead of Qt aborting the process)."""
    if sys.platform.startswith("linux") and not (
        os.environ.get("DISPLAY") or os.environ.get("WAYLAND_DISPLAY") or os.environ.get("QT_QPA_PLATFORM")
    ):
        raise ViewUnavailable(
            "no display: DISPLAY is not set. Run `maskrun view` on the desktop of the bench computer, over "
            "`ssh -X`, or without a screen under a virtual X server (xvfb-run maskrun view ...), or set "
            "QT_QPA_PLATFORM=offscreen and use --screenshot PATH --exit-after SECONDS"
        )


def normalise_address(address: str) -> str:
    """'tcp://host:port' or 'ipc://path' as given; 'host:port' -> tcp://host:port; 'PORT' -> tcp://127.0.0.1:PORT."""
    a = address.strip()
    if "://" in a:
        return a
    if a.isdigit():
        return f"tcp://127.0.0.1:{a}"
    if ":" in a:
        return f"tcp://{a}"
    raise ValueError(f"stream address {address!r} is not of the form tcp://HOST:PORT, HOST:PORT or PORT")


_WINDOW_CLASS = None


def window_class():
    """The LiveViewWindow class (imports Qt on first use)."""
    global _WINDOW_CLASS
    if _WINDOW_CLASS is None:
        require_view_extra()
        _WINDOW_CLASS = _build_window_class()
    return _WINDOW_CLASS


def run_view(address: str, *, log_scale: bool = True, unwrap: bool = False, size: tuple[int, int] = (1500, 860),
             state_file: str | None = None, screenshot: str | None = None, exit_after_s: float | None = None) -> int:
    """Open the window on ``address`` and run until it is closed (or Ctrl-C, SIGTERM, ``exit_after_s``)."""
    require_view_extra()
    require_display()
    address = normalise_address(address)
    import zmq
    from PySide6 import QtCore, QtWidgets

    from maskrun.daemon.record.stream import Subscriber

    app = QtWidgets.QApplication.instance() or QtWidgets.QApplication(["maskrun view"])
    cls = window_class()
    ctx = zmq.Context()
    sub = Subscriber(ctx, address, ("frame", "estimate", "status", "frameset", "alert", "event"), hwm=20)
    win = cls(sub, address, LiveViewState(log_scale=log_scale, unwrap=unwrap), state_file=state_file)
    win.resize(*size)
    win.move(0, 0)
    win.show()

    def quit_app(*_):
        app.quit()

    signal.signal(signal.SIGINT, quit_app)
    signal.signal(signal.SIGTERM, quit_app)
    if exit_after_s is not None:
        QtCore.QTimer.singleShot(int(exit_after_s * 1000), quit_app)
    try:
        app.exec()
    finally:
        win.timer.stop()
        win._write_state(force=True)
        if screenshot:
            win.grab().save(str(screenshot), "PNG")
        win.close()
        sub.close()
        ctx.term()
        win.deleteLater()
        app.processEvents()
    return 0
