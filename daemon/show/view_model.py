"""What the live view shows, computed from stream messages (no GUI library needed).

``LiveViewState.ingest(message)`` takes every message a ``stream.Subscriber``
delivers; the GUI asks for display-ready arrays (``frame_image``,
``amplitude_image``, ``phase_image``), the per-pass history and the status
line, and redraws only the panels whose ``dirty`` flag is set. Only the newest
frame and estimate are kept: a view that falls behind skips to the latest
instead of queueing (the run file keeps everything).

Frames per second are measured from frame arrival times over the last
``FPS_WINDOW_S`` seconds. The dose shown is the number of incident photons
counted so far in the run: the last total the daemon published (status and
frameset messages carry ``photons_total``) plus the photons of the frames
received since.
"""

from __future__ import annotations

import collections
import time
from dataclasses import dataclass, field

import numpy as np

from maskrun.daemon.show.figures import log_counts, phase_for_display, saturated_pixels, unwrap_phase_ls
from maskrun.daemon.record.run_state import mask_label, pass_label, precision_headline
from maskrun.daemon.record.stream import StreamMessage
from maskrun.daemon.record.store import flag_names

# the per-pass curves of the view (figures.LINE_STYLES / LINE_LABELS name them)
HISTORY_CURVES = ("true_error", "error_reported", "error_predicted", "error_estimate", "residual")

FPS_WINDOW_S = 3.0
STALE_AFTER_S = 5.0


@dataclass
class PassRecord:
    pass_index: int
    residual: float
    error_estimate: float
    true_error: float
    error_reported: float = float("nan")
    error_predicted: float = float("nan")


@dataclass
class LiveViewState:
    """Latest frame and estimate, per-pass history, status. Not thread-safe: use from the GUI thread."""

    log_scale: bool = True
    unwrap: bool = False
    frame: np.ndarray | None = None
    frame_meta: dict = field(default_factory=dict)
    estimate: np.ndarray | None = None
    estimate_meta: dict = field(default_factory=dict)
    history: dict[int, PassRecord] = field(default_factory=dict)
    status: dict = field(default_factory=dict)
    alerts: collections.deque = field(default_factory=lambda: collections.deque(maxlen=5))
    received: collections.Counter = field(default_factory=collections.Counter)
    dropped: int = 0
    dirty: set = field(default_factory=lambda: {"frame", "estimate", "history", "status"})
    _frame_times: collections.deque = field(default_factory=lambda: collections.deque(maxlen=2000))
    _photons_known: float = 0.0
    _photons_since: float = 0.0
    _last_message_t: float | None = None
    _log_buf: np.ndarray | None = None
    _phase_cache: tuple | None = None
    run_warnings: list = field(default_factory=list)  # (clock, kind, message) of this run's alerts; a new run clears
    service: dict = field(default_factory=dict)  # last periodic status of `maskrun serve` (empty: none seen)
    service_saturation_dn: float | None = None

    # --- input -----------------------------------------------------------------------
    def ingest(self, msg: StreamMessage, now: float | None = None) -> None:
        """Take one stream message (any topic; unknown topics are counted and ignored)."""
        now = time.monotonic() if now is None else now
        h = msg.header
        self.received[h.topic] += 1
        self.dropped += msg.gap
        self._last_message_t = now
        meta = h.meta
        if h.topic == "frame" and msg.array is not None:
            self.frame, self.frame_meta = msg.array, meta
            self._frame_times.append(now)
            self._photons_since += max(float(meta.get("photons", 0.0) or 0.0), 0.0)
            self.dirty |= {"frame", "status"}
        elif h.topic == "estimate" and msg.array is not None:
            self.estimate, self.estimate_meta = msg.array, meta
            self._phase_cache = None
            p = int(meta.get("pass_index", meta.get("set_index", len(self.history))))
            prec = meta.get("precision") or {}
            self.history[p] = PassRecord(p, _num(meta.get("residual")), _num(meta.get("error_estimate")),
                                         _num(meta.get("true_error")), _num(prec.get("reported")),
                                         _num(prec.get("predicted")))
            self.dirty |= {"estimate", "history", "status"}
        elif h.topic == "status" and meta.get("source") == "service":
            self._ingest_service_status(meta)
        elif h.topic in ("status", "frameset"):
            if h.topic == "status":
                if meta.get("state") == "preparing":  # a new run starts: forget the last run's curves
                    self.history.clear()
                    self._photons_known = self._photons_since = 0.0
                    self.dirty.add("history")
                self.status.update(meta)
            if "photons_total" in meta:
                self._photons_known = float(meta["photons_total"])
                self._photons_since = 0.0
            if h.topic == "frameset" and "pass_index" in meta:
                self.status["pass_index"] = meta["pass_index"]
            self.dirty.add("status")
        elif h.topic in ("alert", "event"):
            if meta.get("kind") == "run_open" and not meta.get("resumed"):
                self.run_warnings.clear()  # a new run: its alerts start here
            if h.topic == "alert":
                stamp = time.strftime("%H:%M:%S", time.localtime(h.t_s))
                self.alerts.append((stamp, meta.get("level", "warning"), str(meta.get("message", ""))))
                self.run_warnings.append((stamp, str(meta.get("kind", "")), str(meta.get("message", ""))))
            self.dirty.add("status")

    def _ingest_service_status(self, meta: dict) -> None:
        """The periodic status of `maskrun serve`: state, run progress, safety, dose since the service started."""
        self.service = meta
        if meta.get("state") == "preparing" and self.status.get("state") != "preparing":
            self.history.clear()
            self.dirty.add("history")
        self.status["state"] = meta.get("state")
        run = meta.get("run") or {}
        for key in ("passes", "pass_index"):
            if key in run:
                self.status[key] = run[key]
        if meta.get("masks"):
            self.status["masks"] = meta["masks"]
        if meta.get("max_dn") and meta.get("saturation_level"):
            self.service_saturation_dn = float(meta["max_dn"]) * float(meta["saturation_level"])
        self.dirty.add("status")

    # --- output ----------------------------------------------------------------------
    def fps(self, now: float | None = None) -> float:
        """Frames per second received over the last FPS_WINDOW_S seconds (0 if fewer than 2)."""
        now = time.monotonic() if now is None else now
        t = [x for x in self._frame_times if now - x <= FPS_WINDOW_S]
        if len(t) < 2:
            return 0.0
        return (len(t) - 1) / max(t[-1] - t[0], 1e-9) if now - t[-1] < FPS_WINDOW_S else 0.0

    @property
    def photons_total(self) -> float:
        return self._photons_known + self._photons_since

    @property
    def saturation_dn(self) -> float | None:
        m = self.frame_meta
        v = m.get("saturation_dn", self.service_saturation_dn if self.service_saturation_dn else m.get("max_dn"))
        return float(v) if v is not None else None

    def frame_levels(self) -> tuple[float, float]:
        """Fixed colour-scale limits for the frame (so the scale does not flicker while aligning)."""
        top = self.saturation_dn or (float(self.frame.max()) if self.frame is not None else 1.0)
        top = max(top, 2.0)
        return (0.0, float(np.log10(top))) if self.log_scale else (0.0, top)

    def frame_image(self) -> tuple[np.ndarray, np.ndarray]:
        """(display image float32, saturated-pixel mask bool) of the latest frame."""
        f = self.frame
        if self.log_scale:
            if self._log_buf is None or self._log_buf.shape != f.shape:
                self._log_buf = np.empty(f.shape, dtype=np.float32)
            img = log_counts(f, out=self._log_buf)
        else:
            img = f.astype(np.float32, copy=False)
        return img, saturated_pixels(f, self.saturation_dn)

    def amplitude_image(self) -> np.ndarray:
        return np.abs(self.estimate).astype(np.float32, copy=False)

    def phase_image(self) -> tuple[np.ndarray, tuple[float, float]]:
        """(phase in radians, colour limits). Wrapped: limits -pi..pi. Unwrapped: data range."""
        key = (id(self.estimate), self.unwrap)
        if self._phase_cache is not None and self._phase_cache[0] == key:
            return self._phase_cache[1], self._phase_cache[2]
        phase = phase_for_display(self.estimate)
        if self.unwrap:
            phase = unwrap_phase_ls(phase)
            lo, hi = float(phase.min()), float(phase.max())
            levels = (lo, hi if hi > lo else lo + 1e-6)
        else:
            levels = (-np.pi, np.pi)
        self._phase_cache = (key, phase, levels)
        return phase, levels

    def history_arrays(self) -> dict[str, tuple[np.ndarray, np.ndarray]]:
        """Per-pass curves: name -> (pass number starting at 1, values), finite positive values only."""
        recs = [self.history[k] for k in sorted(self.history)]
        out = {}
        for name in HISTORY_CURVES:
            x = np.array([r.pass_index + 1 for r in recs], dtype=float)
            y = np.array([getattr(r, name) for r in recs], dtype=float)
            ok = np.isfinite(y) & (y > 0)
            out[name] = (x[ok], y[ok])
        return out

    def status_text(self, address: str = "", now: float | None = None) -> str:
        """One line: state, pass, mask, frames/s, dose (photons), saturation, stream health."""
        now = time.monotonic() if now is None else now
        st, fm = self.status, self.frame_meta
        parts = [f"state: {st.get('state') or 'unknown (waiting for the daemon to report)'}"]
        if fm.get("mode") == "align" and st.get("state") != "align":
            parts[0] += " (align-mode frames)"
        safety = self.service.get("safety") or {}
        if "shutter_open" in safety:
            parts.append("shutter OPEN" if safety["shutter_open"] else "shutter closed")
        p = fm.get("pass_index", st.get("pass_index"))
        if pass_label(p, st.get("passes")):
            parts.append(pass_label(p, st.get("passes")))
        if mask_label(fm.get("mask_index"), st.get("masks")):
            parts.append(mask_label(fm.get("mask_index"), st.get("masks")))
        run = self.service.get("run") or {}
        exposure = run.get("exposure_s") or fm.get("exposure_s")
        if exposure:
            parts.append(f"exposure {float(exposure):g} s")
        parts.append(f"{self.fps(now):.1f} frames/s")
        figures = []  # second line: figures of the latest frame and the stream's health
        dose = self.service.get("dose") or {}
        if "photons_total" in dose:
            energy = dose.get("energy_j")
            parts.append(f"dose {float(dose['photons_total']):.3g} photons"
                         + (f" ({float(energy):.3g} J)" if energy is not None else "") + " since the service started")
        else:
            parts.append(f"dose {self.photons_total:.3g} photons")
        if fm:
            if "peak_dn" in fm:
                figures.append(f"peak {int(fm['peak_dn'])} DN")
            c = fm.get("centroid_rc")
            if c and all(np.isfinite(c)):
                figures.append(f"centroid row {c[0]:.1f}, col {c[1]:.1f} (pixel)")
            figures.append(f"saturated {100 * float(fm.get('saturated_fraction', 0.0)):.2f}% of pixels")
            if fm.get("flags"):
                names = fm.get("flag_names") or (flag_names(int(fm["flags"])) if isinstance(fm["flags"], int)
                                                 else list(fm["flags"]))
                figures.append("flags: " + ",".join(names))
        head = precision_headline(self.estimate_meta.get("precision"), self.estimate_meta.get("error_estimate"))
        if head:
            figures.append(head)
        if self._last_message_t is None:
            figures.append(f"no data yet from {address}" if address else "no data yet")
        elif now - self._last_message_t > STALE_AFTER_S:
            figures.append(f"no data for {now - self._last_message_t:.0f} s")
        if self.dropped:
            figures.append(f"{self.dropped} messages skipped (view behind; the run file has all)")
        return "   |   ".join(parts) + "\n" + "   |   ".join(figures)

    def alert_text(self) -> str:
        """The latest alert, and how many arrived in all (the run log has every one)."""
        if not self.alerts:
            return ""
        t, lvl, m = self.alerts[-1]
        n = len(self.run_warnings)
        kinds = sorted({k for _, k, _ in self.run_warnings})
        return f"[{t}] {lvl}: {m}" + (f"   ({n} alerts this run: {', '.join(kinds)})" if n > 1 else "")


def _num(v) -> float:
    try:
        return float(v)
    except (TypeError, ValueError):
        return float("nan")
