"""`maskrun view [ADDRESS]`: a live desktop window on the daemon's stream, for aligning the bench.

Panels: the latest camera frame (log or linear counts, saturated pixels in
magenta, fixed colour scale so it does not flicker), the current amplitude and
phase estimates (phase with the cyclic 'twilight' map, or unwrapped with
'viridis'), error and residual per pass, and a status line (state, pass, mask,
frames per second, dose in photons, saturation, stream health) with the latest
alerts underneath.

Library: Qt (PySide6) with pyqtgraph, chosen by measurement (bench/view_bench.py:
it keeps up with 512 x 512 frames well above 20 updates per second on a 2-core
machine, where matplotlib with blitting does not). Both come with the optional
extra ``view`` (``pip install 'maskrun[view]'``) so the daemon stays light; this
module imports them only inside ``run_view``/``LiveViewWindow``.

The view never slows the daemon: it subscribes to the PUB stream, drains
whatever has arrived every ``POLL_MS`` milliseconds and draws only the newest
frame and estimate (``view_model.LiveViewState``).

Automation hooks (used by the headless test and the benchmark):
``--state-file PATH`` writes a small JSON with message counts, paint counts and
the on-screen rectangles of the panels; ``--screenshot PATH`` saves the window
as a PNG on exit; ``--exit-after S`` closes the window after S seconds.
"""

from __future__ import annotations

import json
import os
import signal
import sys
import time
from pathlib import Path

import numpy as np

from .figures import INTENSITY_CMAP, LINE_LABELS, LINE_STYLES, PHASE_CMAP, SATURATED_RGB, UNWRAPPED_PHASE_CMAP
from .figures import colormap_lut
from .view_model import LiveViewState

POLL_MS = 15
DRAIN_BUDGET_S = 0.02  # time spent reading messages per tick before drawing
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


# ------------------------------------------------------------------------------------- Qt part
def _build_window_class():
    """Define the Qt classes after PySide6/pyqtgraph are imported (keeps this module importable without them)."""
    import pyqtgraph as pg
    from PySide6 import QtCore, QtGui, QtWidgets

    pg.setConfigOptions(imageAxisOrder="row-major", background="w", foreground="k", antialias=False)

    def cmap(name):
        lut = colormap_lut(name)
        return pg.ColorMap(np.linspace(0.0, 1.0, len(lut)), lut)

    class CountingLayout(pg.GraphicsLayoutWidget):
        """GraphicsLayoutWidget that counts its paints (to measure real screen updates)."""

        paints = 0

        def paintEvent(self, ev):  # noqa: N802 (Qt name)
            self.paints += 1
            super().paintEvent(ev)

    def image_plot(layout, row, col, title, xlabel, ylabel):
        p = layout.addPlot(row=row, col=col, title=title)
        p.setLabel("bottom", xlabel)
        p.setLabel("left", ylabel)
        p.invertY(True)
        p.setAspectLocked(True)
        p.setMenuEnabled(False)
        p.hideButtons()
        img = pg.ImageItem(axisOrder="row-major")
        p.addItem(img)
        return p, img

    class LiveViewWindow(QtWidgets.QMainWindow):
        def __init__(self, subscriber, address: str, state: LiveViewState, *, state_file: str | None = None):
            super().__init__()
            self.sub, self.address, self.state = subscriber, address, state
            self.state_file = Path(state_file) if state_file else None
            self.renders = 0
            self._last_state_write = 0.0
            self._colour_maps = {n: cmap(n) for n in (INTENSITY_CMAP, PHASE_CMAP, UNWRAPPED_PHASE_CMAP)}
            self.setWindowTitle(f"maskrun view: {address}")
            central = QtWidgets.QWidget()
            vbox = QtWidgets.QVBoxLayout(central)
            vbox.setContentsMargins(6, 6, 6, 6)
            self.glw = CountingLayout()
            vbox.addWidget(self.glw, stretch=1)

            g = self.glw
            self.frame_plot, self.frame_img = image_plot(g, 0, 0, "camera frame (latest)", "camera column (pixel)",
                                                         "camera row (pixel)")
            self.sat_img = pg.ImageItem(axisOrder="row-major")
            self.sat_img.setLookupTable(np.array([[0, 0, 0, 0], [*SATURATED_RGB, 255]], dtype=np.uint8))
            self.sat_img.setZValue(10)
            self.frame_plot.addItem(self.sat_img)
            self.frame_bar = pg.ColorBarItem(values=(0, 4), colorMap=self._colour_maps[INTENSITY_CMAP],
                                             label="counts, log10(DN)", interactive=False, width=14)
            self.frame_bar.setImageItem(self.frame_img, insert_in=self.frame_plot)

            self.amp_plot, self.amp_img = image_plot(g, 0, 1, "amplitude estimate", "sample column (grid pixel)",
                                                     "sample row (grid pixel)")
            self.amp_bar = pg.ColorBarItem(values=(0, 1), colorMap=self._colour_maps[INTENSITY_CMAP],
                                           label="amplitude, sqrt(photons/s)", interactive=False, width=14)
            self.amp_bar.setImageItem(self.amp_img, insert_in=self.amp_plot)

            self.phase_plot, self.phase_img = image_plot(g, 0, 2, "phase estimate (wrapped)",
                                                         "sample column (grid pixel)", "sample row (grid pixel)")
            self.phase_bar = pg.ColorBarItem(values=(-np.pi, np.pi), colorMap=self._colour_maps[PHASE_CMAP],
                                             label="phase (rad)", interactive=False, width=14)
            self.phase_bar.setImageItem(self.phase_img, insert_in=self.phase_plot)

            self.hist_plot = g.addPlot(row=1, col=0, colspan=3, title="reconstruction quality per pass")
            self.hist_plot.setLogMode(x=False, y=True)
            self.hist_plot.setLabel("bottom", "pass (frame sets taken so far)")
            self.hist_plot.setLabel("left", "relative error / residual (dimensionless)")
            self.hist_plot.showGrid(x=True, y=True, alpha=0.3)
            self.hist_plot.setMenuEnabled(False)
            self.hist_plot.hideButtons()
            legend = self.hist_plot.addLegend(offset=(-10, 10))
            dash = {"-": QtCore.Qt.SolidLine, "--": QtCore.Qt.DashLine, ":": QtCore.Qt.DotLine}
            symbol = {"o": "o", "s": "s", "^": "t1"}
            self.curves = {}
            for key in ("true_error", "error_estimate", "residual"):
                colour, marker, ls = LINE_STYLES[key]
                pen = pg.mkPen(colour, width=2, style=dash[ls])
                self.curves[key] = self.hist_plot.plot([], [], pen=pen, symbol=symbol[marker], symbolBrush=colour,
                                                       symbolPen=colour, symbolSize=8, name=LINE_LABELS[key])
            g.ci.layout.setRowStretchFactor(0, 3)
            g.ci.layout.setRowStretchFactor(1, 1)
            legend.setParentItem(self.hist_plot.vb)

            controls = QtWidgets.QHBoxLayout()
            self.log_box = QtWidgets.QCheckBox("frame: log scale")
            self.log_box.setChecked(state.log_scale)
            self.log_box.toggled.connect(self._set_log)
            self.unwrap_box = QtWidgets.QCheckBox("phase: unwrapped")
            self.unwrap_box.setChecked(state.unwrap)
            self.unwrap_box.toggled.connect(self._set_unwrap)
            legend_text = QtWidgets.QLabel(
                f"<span style='color:rgb{SATURATED_RGB}'>&#9632;</span> saturated pixels   "
                f"stream: {address}")
            for w in (self.log_box, self.unwrap_box, legend_text):
                controls.addWidget(w)
            controls.addStretch(1)
            vbox.addLayout(controls)
            font = QtGui.QFontDatabase.systemFont(QtGui.QFontDatabase.FixedFont)
            self.status_label = QtWidgets.QLabel("")
            self.status_label.setFont(font)
            self.alert_label = QtWidgets.QLabel("")
            self.alert_label.setFont(font)
            self.alert_label.setStyleSheet("color: #A04000")
            vbox.addWidget(self.status_label)
            vbox.addWidget(self.alert_label)
            self.setCentralWidget(central)

            self.timer = QtCore.QTimer(self)
            self.timer.timeout.connect(self.tick)
            self.timer.start(POLL_MS)

        # --- controls -------------------------------------------------------------------
        def _set_log(self, on: bool) -> None:
            self.state.log_scale = bool(on)
            self.state.dirty.add("frame")
            self.frame_bar.axis.setLabel("counts, log10(DN)" if on else "counts (DN)")

        def _set_unwrap(self, on: bool) -> None:
            self.state.unwrap = bool(on)
            self.state.dirty.add("estimate")
            name = UNWRAPPED_PHASE_CMAP if on else PHASE_CMAP
            self.phase_bar.setColorMap(self._colour_maps[name])
            self.phase_plot.setTitle("phase estimate (unwrapped)" if on else "phase estimate (wrapped)")

        # --- loop -----------------------------------------------------------------------
        def tick(self) -> None:
            t_end = time.monotonic() + DRAIN_BUDGET_S
            while time.monotonic() < t_end:
                msg = self.sub.receive(0)
                if msg is None:
                    break
                self.state.ingest(msg)
            self.render()

        def render(self) -> None:
            """Redraw the panels whose data changed; the status line every tick (fps ages)."""
            s = self.state
            dirty, s.dirty = s.dirty, set()
            if "frame" in dirty and s.frame is not None:
                img, sat = s.frame_image()
                levels = s.frame_levels()
                self.frame_img.setImage(img, autoLevels=False, levels=levels)
                self.frame_bar.setLevels(levels)
                self.sat_img.setImage(sat.view(np.uint8), autoLevels=False, levels=(0, 1))
                fm = s.frame_meta
                self.frame_plot.setTitle(f"camera frame: pass {int(fm.get('pass_index', -1)) + 1}, "
                                         f"mask {int(fm.get('mask_index', -1)) + 1}")
            if "estimate" in dirty and s.estimate is not None:
                amp = s.amplitude_image()
                top = float(amp.max()) or 1.0
                self.amp_img.setImage(amp, autoLevels=False, levels=(0.0, top))
                self.amp_bar.setLevels((0.0, top))
                phase, levels = s.phase_image()
                self.phase_img.setImage(phase, autoLevels=False, levels=levels)
                self.phase_bar.setLevels(levels)
                em = s.estimate_meta
                self.amp_plot.setTitle(f"amplitude estimate (pass {int(em.get('pass_index', -1)) + 1}, "
                                       f"{em.get('passes_used', '?')} frame sets)")
            if "history" in dirty:
                for key, (x, y) in s.history_arrays().items():
                    self.curves[key].setData(x, y)
            self.status_label.setText(s.status_text(self.address))
            self.alert_label.setText(s.alert_text())
            self.renders += 1
            self._write_state()

        def panel_rects(self) -> dict[str, list[int]]:
            """On-screen rectangles [x, y, w, h] (global pixels) of the image panels and the pass plot."""

            def rect(item):
                r = item.mapRectToScene(item.boundingRect())
                br = self.glw.mapFromScene(r).boundingRect()
                tl = self.glw.mapToGlobal(br.topLeft())
                return [tl.x(), tl.y(), br.width(), br.height()]

            return {"frame": rect(self.frame_img), "amplitude": rect(self.amp_img), "phase": rect(self.phase_img),
                    "history": rect(self.hist_plot.vb)}

        def _write_state(self, force: bool = False) -> None:
            if self.state_file is None:
                return
            now = time.monotonic()
            if not force and now - self._last_state_write < 0.25:
                return
            self._last_state_write = now
            doc = {"pid": os.getpid(), "renders": self.renders, "paints": self.glw.paints,
                   "received": dict(self.state.received), "panels": self.panel_rects(),
                   "estimate_pass": self.state.estimate_meta.get("pass_index"),
                   "status": self.state.status_text(self.address)}
            tmp = self.state_file.with_suffix(".tmp")
            tmp.write_text(json.dumps(doc))
            tmp.replace(self.state_file)

        def closeEvent(self, ev):  # noqa: N802 (Qt name)
            self.timer.stop()
            self._write_state(force=True)
            super().closeEvent(ev)

    return LiveViewWindow


_WINDOW_CLASS = None


def window_class():
    """The LiveViewWindow class (imports Qt on first use)."""
    global _WINDOW_CLASS
    if _WINDOW_CLASS is None:
        require_view_extra()
        _WINDOW_CLASS = _build_window_class()
    return _WINDOW_CLASS


def run_view(address: str, *, log_scale: bool = True, unwrap: bool = False, size: tuple[int, int] = (1400, 900),
             state_file: str | None = None, screenshot: str | None = None, exit_after_s: float | None = None) -> int:
    """Open the window on ``address`` and run until it is closed (or Ctrl-C, SIGTERM, ``exit_after_s``)."""
    require_view_extra()
    require_display()
    address = normalise_address(address)
    import zmq
    from PySide6 import QtCore, QtWidgets

    from .stream import Subscriber

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
