"""The live view's Qt window (``LiveViewWindow``), defined by ``_build_window_class`` once PySide6 and
pyqtgraph are imported, with the arithmetic of its axes (``nice_ceiling``, ``log_ticks``) and its
timing (``POLL_MS``, ``DRAIN_BUDGET_S``). ``view`` opens it (``run_view``, ``window_class``) and
re-exports every name here; see its docstring for the choice of library and what is redrawn when."""

from __future__ import annotations

import json
import os
import time
from pathlib import Path

import numpy as np

from maskrun.daemon.show.figures import INTENSITY_CMAP, LINE_LABELS, LINE_STYLES, PHASE_CMAP, SATURATED_RGB, UNWRAPPED_PHASE_CMAP
from maskrun.daemon.show.figures import colormap_lut
from maskrun.daemon.show.view_model import HISTORY_CURVES, LiveViewState

POLL_MS = 15
DRAIN_BUDGET_S = 0.02  # time spent reading messages per tick before drawing


def nice_ceiling(x: float) -> float:
    """The smallest of 1, 1.2, 1.5, 2, 2.5, 3, 4, 5, 6, 8 times a power of ten that is >= x (x <= 0: 1)."""
    if not (x > 0 and np.isfinite(x)):
        return 1.0
    k = np.floor(np.log10(x))
    for m in (1, 1.2, 1.5, 2, 2.5, 3, 4, 5, 6, 8, 10):
        if m * 10.0**k >= x * (1 - 1e-12):
            return float(m * 10.0**k)
    return float(10.0 ** (k + 1))


def log_ticks(lo: float, hi: float, max_ticks: int = 7) -> list[tuple[float, str]]:
    """Tick marks for a log axis as (log10 value, label): the coarsest of 1 / 1-2-5 / 1..9 steps per
    decade that gives at least 3 ticks near [lo, hi], thinned to at most max_ticks."""
    lo = max(lo, 1e-300)
    hi = max(hi, lo)
    k0, k1 = int(np.floor(np.log10(lo))) - 1, int(np.ceil(np.log10(hi))) + 1
    picked: list[float] = []
    for mants in ((1,), (1, 2, 5), tuple(range(1, 10))):
        picked = [m * 10.0**k for k in range(k0, k1 + 1) for m in mants if lo / 1.3 <= m * 10.0**k <= hi * 1.3]
        if len(picked) >= 3:
            break
    if len(picked) > max_ticks:
        picked = picked[:: int(np.ceil(len(picked) / max_ticks))]
    return [(float(np.log10(v)), f"{v:g}") for v in picked]


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

    def colour_bar(values, colour_map, label):
        bar = pg.ColorBarItem(values=values, colorMap=colour_map, interactive=False, width=14)
        bar.getAxis("right").setLabel(label)  # label outside the tick values, away from the image
        bar.getAxis("right").setWidth(62)
        return bar

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
            # intensity centroid (align mode sends it): white cross on a black cross, visible on any colour
            self.centroid = pg.ScatterPlotItem(symbol="+", size=22, pen=pg.mkPen("k", width=5),
                                               brush=None, pxMode=True)
            self.centroid_inner = pg.ScatterPlotItem(symbol="+", size=20, pen=pg.mkPen("w", width=2),
                                                     brush=None, pxMode=True)
            for item in (self.centroid, self.centroid_inner):
                item.setZValue(20)
                self.frame_plot.addItem(item)
            self.frame_bar = colour_bar((0, 4), self._colour_maps[INTENSITY_CMAP], "counts, log10(DN)")
            self.frame_bar.setImageItem(self.frame_img, insert_in=self.frame_plot)

            self.amp_plot, self.amp_img = image_plot(g, 0, 1, "amplitude estimate", "sample column (grid pixel)",
                                                     "sample row (grid pixel)")
            self.amp_bar = colour_bar((0, 1), self._colour_maps[INTENSITY_CMAP], "amplitude, sqrt(photons/s)")
            self.amp_bar.setImageItem(self.amp_img, insert_in=self.amp_plot)

            self.phase_plot, self.phase_img = image_plot(g, 0, 2, "phase estimate (wrapped)",
                                                         "sample column (grid pixel)", "sample row (grid pixel)")
            self.phase_bar = colour_bar((-np.pi, np.pi), self._colour_maps[PHASE_CMAP], "phase (rad)")
            self._phase_labels = {False: "phase (rad), cyclic colours", True: "phase (rad), unwrapped"}
            self.phase_bar.setImageItem(self.phase_img, insert_in=self.phase_plot)

            self.hist_plot = g.addPlot(row=1, col=0, colspan=3, title="reconstruction quality per pass")
            self.hist_plot.setLogMode(x=False, y=True)
            self.hist_plot.setLabel("bottom", "pass, or frame set in align mode")
            self.hist_plot.setLabel("left", "relative error")
            self.hist_plot.getAxis("left").enableAutoSIPrefix(False)
            self.hist_plot.showGrid(x=True, y=True, alpha=0.3)
            self.hist_plot.setMenuEnabled(False)
            self.hist_plot.hideButtons()
            self.hist_plot.addLegend(offset=(12, -8), labelTextSize="9pt", brush=(255, 255, 255, 210),
                                    pen=(180, 180, 180), verSpacing=-6)
            dash = {"-": QtCore.Qt.SolidLine, "--": QtCore.Qt.DashLine, ":": QtCore.Qt.DotLine,
                    "-.": QtCore.Qt.DashDotLine}
            symbol = {"o": "o", "s": "s", "^": "t1", "D": "d", "v": "t"}
            self.curves = {}
            for key in HISTORY_CURVES:
                colour, marker, ls = LINE_STYLES[key]
                pen = pg.mkPen(colour, width=2, style=dash[ls])
                self.curves[key] = self.hist_plot.plot([], [], pen=pen, symbol=symbol[marker], symbolBrush=colour,
                                                       symbolPen=colour, symbolSize=8, name=LINE_LABELS[key])
            g.ci.layout.setHorizontalSpacing(36)  # room between a colour-bar label and the next panel
            g.ci.layout.setRowStretchFactor(0, 5)
            g.ci.layout.setRowStretchFactor(1, 2)
            self._shapes: dict[str, tuple] = {}
            self._titles: dict[int, str] = {}
            self._levels: dict[int, tuple] = {}

            controls = QtWidgets.QHBoxLayout()
            self.log_box = QtWidgets.QCheckBox("frame: log scale")
            self.log_box.setChecked(state.log_scale)
            self.log_box.toggled.connect(self._set_log)
            self.unwrap_box = QtWidgets.QCheckBox("phase: unwrapped")
            self.unwrap_box.setChecked(state.unwrap)
            self.unwrap_box.toggled.connect(self._set_unwrap)
            sat_key = QtWidgets.QLabel(f"<span style='color:rgb{SATURATED_RGB}'>&#9632;</span> saturated pixels "
                                       "(in the frame)")
            stream_text = QtWidgets.QLabel(f"stream: {address}")
            for w in (self.log_box, self.unwrap_box, sat_key):
                controls.addWidget(w)
                controls.addSpacing(24)
            controls.addStretch(1)
            controls.addWidget(stream_text)
            vbox.addLayout(controls)
            font = QtGui.QFontDatabase.systemFont(QtGui.QFontDatabase.FixedFont)
            self.status_label = QtWidgets.QLabel("")
            self.status_label.setFont(font)
            self.alert_label = QtWidgets.QLabel("")
            self.alert_label.setFont(font)
            self.alert_label.setStyleSheet("color: #A04000")
            for lab in (self.status_label, self.alert_label):
                # long lines must not force the window wider than the screen
                lab.setSizePolicy(QtWidgets.QSizePolicy.Ignored, QtWidgets.QSizePolicy.Preferred)
                vbox.addWidget(lab)
            self.setCentralWidget(central)
            self._set_log(state.log_scale)
            self._set_unwrap(state.unwrap)

            self.timer = QtCore.QTimer(self)
            self.timer.timeout.connect(self.tick)
            self.timer.start(POLL_MS)

        # --- controls -------------------------------------------------------------------
        def _set_log(self, on: bool) -> None:
            self.state.log_scale = bool(on)
            self.state.dirty.add("frame")
            self.frame_bar.getAxis("right").setLabel("counts, log10(DN)" if on else "counts (DN)")

        def _set_unwrap(self, on: bool) -> None:
            self.state.unwrap = bool(on)
            self.state.dirty.add("estimate")
            name = UNWRAPPED_PHASE_CMAP if on else PHASE_CMAP
            self.phase_bar.setColorMap(self._colour_maps[name])
            self.phase_plot.setTitle("phase estimate (unwrapped)" if on else "phase estimate (wrapped)")
            self.phase_bar.getAxis("right").setLabel(self._phase_labels[bool(on)])

        def _title(self, plot, text: str) -> None:
            """Set a panel title only when it changes (a new title re-lays out and repaints the axes)."""
            if self._titles.get(id(plot)) != text:
                self._titles[id(plot)] = text
                plot.setTitle(text)

        def _bar_levels(self, bar, levels) -> None:
            key = (float(levels[0]), float(levels[1]))
            if self._levels.get(id(bar)) != key:
                self._levels[id(bar)] = key
                bar.setLevels(key)

        def _fit(self, name: str, plot, shape) -> None:
            """Zoom the panel to the image when its shape changes (the user may zoom freely otherwise)."""
            if self._shapes.get(name) != shape:
                self._shapes[name] = shape
                plot.getViewBox().setRange(xRange=(0, shape[1]), yRange=(0, shape[0]), padding=0.02)

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
                self._fit("frame", self.frame_plot, img.shape)
                self._bar_levels(self.frame_bar, levels)
                if sat.any():
                    self.sat_img.setImage(sat.view(np.uint8), autoLevels=False, levels=(0, 1))
                    self.sat_img.setVisible(True)
                elif self.sat_img.isVisible():
                    self.sat_img.setVisible(False)
                fm = s.frame_meta
                where = [f"pass {int(fm['pass_index']) + 1}"] if int(fm.get("pass_index", -1)) >= 0 else []
                if fm.get("mode") == "align":
                    where = ["align mode"]
                if int(fm.get("mask_index", -1)) >= 0:
                    where.append(f"mask {int(fm['mask_index']) + 1}")
                self._title(self.frame_plot, "camera frame" + (": " + ", ".join(where) if where else ""))
                c = fm.get("centroid_rc")
                if c and len(c) == 2 and all(np.isfinite(c)):
                    for item in (self.centroid, self.centroid_inner):
                        item.setData([c[1] + 0.5], [c[0] + 0.5])
                else:
                    for item in (self.centroid, self.centroid_inner):
                        item.setData([], [])
            if "estimate" in dirty and s.estimate is not None:
                amp = s.amplitude_image()
                top = nice_ceiling(float(amp.max()))  # rounded up: the colour bar changes only now and then
                self.amp_img.setImage(amp, autoLevels=False, levels=(0.0, top))
                self._fit("amplitude", self.amp_plot, amp.shape)
                self._bar_levels(self.amp_bar, (0.0, top))
                phase, levels = s.phase_image()
                self.phase_img.setImage(phase, autoLevels=False, levels=levels)
                self._fit("phase", self.phase_plot, phase.shape)
                self._bar_levels(self.phase_bar, levels)
                em = s.estimate_meta
                used = em.get("passes_used")
                used = f", {used} frame set{'s' if used != 1 else ''}" if used is not None else ""
                if "pass_index" in em:
                    self._title(self.amp_plot, f"amplitude estimate (pass {int(em['pass_index']) + 1}{used})")
                else:
                    self._title(self.amp_plot,
                                f"amplitude estimate (frame set {int(em.get('set_index', -1)) + 1}{used})")
            if "history" in dirty:
                last = 1.0
                for key, (x, y) in s.history_arrays().items():
                    self.curves[key].setData(x, y)
                    if len(x):
                        last = max(last, float(x.max()))
                step = float(max(1, int(np.ceil(last / 10))))
                self.hist_plot.getAxis("bottom").setTickSpacing(major=step, minor=step)
                ys = np.concatenate([y for _, y in s.history_arrays().values()] + [np.zeros(0)])
                if ys.size:
                    self.hist_plot.getAxis("left").setTicks([log_ticks(float(ys.min()), float(ys.max())), []])
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

