"""`maskrun watch`: a live terminal dashboard of a running service, drawn from its stream.

``WatchModel`` keeps the newest of everything the stream carries (service status,
preview of the latest frame, phase estimate, checks, alerts, gap counts);
``render(model)`` turns it into a rich renderable: state and safety line,
progress bar with ETA and frame rate, the figures (saturation, photons per frame,
cumulative photons and dose, residual and error estimate, align peak / centroid /
total counts), two small images drawn with unicode half blocks in 24-bit colour
(the latest frame in grey with saturated pixels in red; the phase estimate with
phase as hue and amplitude as brightness) and the recent alerts.

``run_watch`` subscribes to preview, estimate, status, check, alert, event and
frameset (not to full frames), and refreshes a ``rich.live.Live`` display. A
slow terminal never slows the service: the stream drops messages for a
subscriber that falls behind, and the dashboard counts those gaps.
"""

from __future__ import annotations

import collections
import time
from dataclasses import dataclass, field

import numpy as np
from rich.console import Console, Group
from rich.panel import Panel
from rich.progress_bar import ProgressBar
from rich.table import Table
from rich.text import Text

from maskrun.daemon.record.run_state import PAUSE_KINDS, clock, mask_label, precision_headline, precision_rows, progress_line, run_rows
from maskrun.daemon.safety.safety_readings import safety_text
from maskrun.daemon.record.stream import StreamError, StreamMessage, Subscriber

WATCH_TOPICS = ("preview", "estimate", "status", "check", "alert", "event", "frameset")
UPPER_HALF_BLOCK = "\u2580"
SATURATED_RGB = (255, 32, 32)
SHOWN_EVENTS = ("run_start", "run_end", "align_start", "align_end", "safety_ack", "paused", "resumed", "darks",
                "service_start", "estimates_wait")  # info events listed with the alerts


@dataclass
class WatchModel:
    """The newest state seen on the stream."""

    status: dict = field(default_factory=dict)
    run_state: str = ""
    preview: np.ndarray | None = None
    preview_meta: dict = field(default_factory=dict)
    estimate: np.ndarray | None = None
    estimate_meta: dict = field(default_factory=dict)
    check_meta: dict = field(default_factory=dict)
    alerts: collections.deque = field(default_factory=lambda: collections.deque(maxlen=6))
    run_warnings: list = field(default_factory=list)  # (t_s, kind, message) of this run's alerts (a new run clears)
    messages: int = 0
    bad_messages: int = 0
    gaps: dict = field(default_factory=dict)
    last_message_s: float | None = None  # time.monotonic() of the last message received
    status_interval_s: float = 0.5  # the service's status period, from its status messages
    _preview_times: collections.deque = field(default_factory=lambda: collections.deque(maxlen=30))

    def ingest(self, msg: StreamMessage, now_s: float | None = None) -> None:
        h = msg.header
        self.messages += 1
        self.last_message_s = time.monotonic() if now_s is None else now_s
        if msg.gap:
            self.gaps[h.topic] = self.gaps.get(h.topic, 0) + msg.gap
        if h.topic == "status":
            if h.meta.get("source") == "service":
                self.status = dict(h.meta)
                self.status_interval_s = float(h.meta.get("status_interval_s") or self.status_interval_s)
            else:
                self.run_state = str(h.meta.get("state", ""))
        elif h.topic == "preview" and msg.array is not None:
            self.preview, self.preview_meta = msg.array, dict(h.meta)
            self._preview_times.append(h.t_s)
        elif h.topic == "estimate" and msg.array is not None:
            self.estimate, self.estimate_meta = msg.array, dict(h.meta)
        elif h.topic == "check":
            self.check_meta = dict(h.meta)
        elif h.topic in ("alert", "event"):
            level = h.meta.get("level", "info")
            kind = str(h.meta.get("kind", ""))
            if kind == "run_open" and not h.meta.get("resumed"):
                self.alerts.clear()  # a new run: alerts belong to the run they were raised in
                self.run_warnings.clear()
            elif kind == "resumed":  # the pause alerts it answers no longer hold
                kept = [a for a in self.alerts if a[3] not in PAUSE_KINDS]
                self.alerts.clear()
                self.alerts.extend(kept)
            if h.topic == "alert":
                self.run_warnings.append((h.t_s, kind, str(h.meta.get("message", ""))))
            if h.topic == "alert" or kind in SHOWN_EVENTS:
                self.alerts.append((h.t_s, level, str(h.meta.get("message", "")), kind))

    def silent_for_s(self, now_s: float | None = None) -> float:
        """Seconds since the last message when that is long enough to mean trouble (the service
        publishes its status every status_interval_s): more than 5 periods and at least 3 s; else 0.
        Only for a service: a foreground run publishes status when its state changes, and may be
        quiet for long (a pause, the wait between the sets of a time series)."""
        if self.last_message_s is None or not self.status:
            return 0.0
        silent = (time.monotonic() if now_s is None else now_s) - self.last_message_s
        return silent if silent > max(3.0, 5 * self.status_interval_s) else 0.0

    @property
    def preview_fps(self) -> float:
        """Rate of previews received (frames per second as seen by this subscriber)."""
        t = self._preview_times
        return (len(t) - 1) / (t[-1] - t[0]) if len(t) > 2 and t[-1] > t[0] else 0.0


# --- images in the terminal -------------------------------------------------------------
def _block_edges(n: int, out: int) -> np.ndarray:
    return np.unique(np.linspace(0, n, out + 1, dtype=int)[:-1])


def shrink(image: np.ndarray, max_cols: int, max_rows: int, how: str = "mean") -> np.ndarray:
    """Shrink a 2-D image to at most max_rows x max_cols by block mean / max / nearest (vectorised)."""
    rows, cols = image.shape
    f = max(1, int(np.ceil(rows / max_rows)), int(np.ceil(cols / max_cols)))
    if f == 1:
        return image
    r_idx, c_idx = _block_edges(rows, int(np.ceil(rows / f))), _block_edges(cols, int(np.ceil(cols / f)))
    if how == "nearest":
        return image[np.ix_(r_idx, c_idx)]
    ufunc = np.maximum if how == "max" else np.add
    out = ufunc.reduceat(ufunc.reduceat(image, r_idx, axis=0), c_idx, axis=1)
    if how == "mean":
        rs = np.diff(np.append(r_idx, rows))
        cs = np.diff(np.append(c_idx, cols))
        out = out / np.outer(rs, cs)
    return out


def intensity_rgb(image: np.ndarray, saturated: np.ndarray | None = None, offset: float = 0.0) -> np.ndarray:
    """Grey levels on a log scale (the diffraction pattern spans decades); saturated pixels in red."""
    v = np.log1p(np.maximum(np.asarray(image, dtype=np.float32) - offset, 0.0))
    top = float(v.max())
    g = (v / top * 255.0) if top > 0 else np.zeros_like(v)
    rgb = np.repeat(g.astype(np.uint8)[..., None], 3, axis=2)
    if saturated is not None:
        rgb[saturated] = SATURATED_RGB
    return rgb


def phase_rgb(field_: np.ndarray) -> np.ndarray:
    """Phase as hue (a full turn round the colour wheel), amplitude as brightness (HSV -> RGB, vectorised)."""
    amp = np.abs(field_)
    top = float(amp.max())
    value = np.sqrt(amp / top) if top > 0 else np.zeros(amp.shape)
    hue = (np.angle(field_) + np.pi) / (2 * np.pi)  # 0..1
    h6 = hue * 6.0
    i = np.floor(h6).astype(int) % 6
    f = h6 - np.floor(h6)
    p = np.zeros_like(value)
    q = value * (1 - f)
    t = value * f
    r = np.choose(i, [value, q, p, p, t, value])
    g = np.choose(i, [t, value, value, q, p, p])
    b = np.choose(i, [p, p, t, value, value, q])
    return (np.stack([r, g, b], axis=-1) * 255).astype(np.uint8)


def half_block_text(rgb: np.ndarray) -> Text:
    """Two image rows per text line: the upper half block in the top pixel's colour on the bottom pixel's."""
    rows = rgb.shape[0]
    if rows % 2:
        rgb = np.concatenate([rgb, np.zeros_like(rgb[:1])], axis=0)
    text = Text(no_wrap=True, overflow="crop")
    for y in range(0, rgb.shape[0], 2):
        top, bottom = rgb[y], rgb[y + 1]
        for (r1, g1, b1), (r2, g2, b2) in zip(top.tolist(), bottom.tolist()):
            text.append(UPPER_HALF_BLOCK, style=f"rgb({r1},{g1},{b1}) on rgb({r2},{g2},{b2})")
        if y + 2 < rgb.shape[0]:
            text.append("\n")
    return text


# --- the dashboard ------------------------------------------------------------------------
def _fmt(v, spec: str, none: str = "-") -> str:
    if v is None:
        return none
    try:
        if isinstance(v, float) and not np.isfinite(v):
            return none
        return format(v, spec)
    except (TypeError, ValueError):
        return str(v)


def _duration(s) -> str:
    if s is None or not np.isfinite(s):
        return "-"
    s = int(round(s))
    return f"{s // 3600:d}:{s // 60 % 60:02d}:{s % 60:02d}"


def frame_image(model: WatchModel, max_cols: int = 40, max_rows: int = 32) -> Text:
    if model.preview is None:
        return Text("(no frame yet)", style="dim")
    img = np.asarray(model.preview, dtype=np.float32)
    meta = model.preview_meta
    sat = np.zeros(img.shape, dtype=bool)
    listed = meta.get("saturated_preview")
    if listed:
        idx = np.asarray(listed, dtype=int).reshape(-1, 2)
        ok = (idx[:, 0] < img.shape[0]) & (idx[:, 1] < img.shape[1])
        sat[idx[ok, 0], idx[ok, 1]] = True
    sat_dn = meta.get("saturation_dn")
    if sat_dn is None and meta.get("max_dn"):
        sat_dn = float(meta["max_dn"]) * float(model.status.get("saturation_level", 0.98))
    if sat_dn is not None:
        sat |= img >= sat_dn
    small = shrink(img, max_cols, max_rows, "mean")
    small_sat = shrink(sat.astype(np.uint8), max_cols, max_rows, "max").astype(bool)
    offset = float(np.percentile(small, 5))
    return half_block_text(intensity_rgb(small, small_sat, offset))


def phase_image(model: WatchModel, max_cols: int = 40, max_rows: int = 32) -> Text:
    if model.estimate is None:
        return Text("(no estimate yet)", style="dim")
    est = np.asarray(model.estimate)
    total = complex(est.sum())
    if total != 0:
        # the global phase is arbitrary: turn it so the mean field is real, so colours stay put between updates
        est = est * np.complex64(abs(total) / total)
    small = shrink(est, max_cols, max_rows, "nearest")
    return half_block_text(phase_rgb(small))


def render(model: WatchModel, image_cols: int = 40, image_rows: int = 32, now_s: float | None = None):
    """The whole dashboard as one rich renderable (now_s: time.monotonic() for the silence check)."""
    st = model.status
    state = st.get("state") or model.run_state or "waiting for status"
    safety = st.get("safety") or {}
    ack = safety.get("acknowledged")
    inter = safety.get("interlock_closed")
    shutter = safety.get("shutter_open")
    inter_text, shutter_text = safety_text(safety) if safety else ("?", "?")
    head = Text()
    head.append(" maskrun ", style="bold black on cyan")
    head.append(f"  state: {state}", style="bold")
    head.append("   notice: ")
    head.append("acknowledged" if ack else "NOT acknowledged", style="green" if ack else "bold red")
    head.append("   interlock: ")
    head.append(inter_text, style="green" if inter else "bold red")
    head.append("   shutter: ")
    head.append(shutter_text, style="green" if shutter is False else "bold yellow")
    run = st.get("run") or {}
    exposure = run.get("exposure_s") or st.get("exposure_s")
    if exposure is not None:
        head.append(f"   exposure {exposure:g} s" + (" (this run)" if run else " (next run)"))

    figures = Table.grid(padding=(0, 2))
    figures.add_column(style="bold")
    figures.add_column()
    figures.add_column(style="bold")
    figures.add_column()
    align = st.get("align") or {}
    check = model.check_meta
    rows: list[tuple[str, str]] = []
    progress_line = Text("")
    bar = None
    if run:
        done, total = run.get("frames_done", 0), max(run.get("frames_total", 1), 1)
        bar = ProgressBar(total=total, completed=done, width=40)
        progress_line = Text(f" {progress_line_of(run)}"
                             f"  ETA {_duration(run.get('eta_s'))}  elapsed {_duration(run.get('elapsed_s'))}")
        rows += [("frame rate", f"{_fmt(run.get('fps'), '.1f')} fps"),
                 ("saturation (last)", f"{_fmt(run.get('saturated_last'), '.3%')}"),
                 ("photons / frame (last)", _fmt(run.get("photons_last"), ".3g")),
                 ("residual", _fmt(run.get("residual"), ".3g"))]
        rows += run_rows(run)
    elif align:
        cen = align.get("centroid_rc") or [None, None]
        rows += [("align", "cycling all masks" if align.get("cycling") else f"mask {align.get('mask_index')}"),
                 ("frame rate", f"{_fmt(align.get('fps'), '.1f')} fps"),
                 ("peak", f"{_fmt(align.get('peak_dn'), 'd')} DN"),
                 ("centroid (row, col)", f"{_fmt(cen[0], '.2f')}, {_fmt(cen[1], '.2f')}"),
                 ("total counts", f"{_fmt(align.get('total_counts_dn'), '.4g')} DN"),
                 ("saturated", f"{_fmt(align.get('saturated_pixels'), 'd')} px ({_fmt(align.get('saturated_fraction'), '.3%')})"),
                 ("residual", _fmt(align.get("residual"), ".3g")),
                 ("error estimate", _fmt(align.get("error_estimate"), ".2%")),
                 ("error vs truth", _fmt(align.get("true_error"), ".2%"))]
    else:
        last = st.get("last_run") or {}
        if last:
            rows += [("last run", last.get("outcome") or str(last.get("state"))),
                     ("frames", f"{last.get('frames')} (+{last.get('darks')} dark)")]
            rows += run_rows(last)
        elif check:
            rows.append(("last check", ", ".join(check.get("problems", [])) or "ok"))
    if model.run_warnings:
        kinds = collections.Counter(k for _, k, _ in model.run_warnings)
        rows.append(("warnings this run", ", ".join(f"{k} x{n}" if n > 1 else k for k, n in kinds.items())))
    dose = st.get("dose") or {}
    rows += [("photons (service)", _fmt(dose.get("photons_total"), ".3g")),
             ("dose (service)", f"{_fmt(dose.get('energy_j'), '.3g')} J"),
             ("previews seen", f"{model.preview_fps:.1f}/s"),
             ("stream gaps", ", ".join(f"{k} {v}" for k, v in sorted(model.gaps.items())) or "none")]
    for i in range(0, len(rows), 2):
        a = rows[i]
        b = rows[i + 1] if i + 1 < len(rows) else ("", "")
        figures.add_row(a[0], a[1], b[0], b[1])

    images = Table.grid(padding=(0, 2))
    images.add_column()
    images.add_column()
    fmeta = model.preview_meta
    label = mask_label(fmeta.get("mask_index"), st.get("masks"))
    ftitle = "latest frame" + (f" ({label})" if label else "")
    emeta = model.estimate_meta
    head_est = precision_headline(emeta.get("precision"), emeta.get("error_estimate"))
    etitle = "phase estimate" + (f" ({head_est})" if head_est else "")
    images.add_row(Panel(frame_image(model, image_cols, image_rows), title=ftitle, expand=False),
                   Panel(phase_image(model, image_cols, image_rows), title=etitle, expand=False))

    alerts = Text()
    for t_s, level, message in _alert_list(model)[-5:]:
        style = {"error": "bold red", "warning": "yellow"}.get(level, "dim")
        alerts.append(clock(t_s) + " ", style="dim")
        alerts.append(message + "\n", style=style)
    parts = [head]
    silent = model.silent_for_s(now_s)
    if silent:
        parts.insert(0, Text(f" NO MESSAGES FOR {silent:.0f} s: the service may have stopped or the network is down; "
                             "everything below is the last seen, not the present (check with 'maskrun status') ",
                             style="bold white on red"))
    if bar is not None:
        row = Table.grid()
        row.add_row(bar, progress_line)
        parts.append(row)
    parts += [figures, images, Panel(alerts or Text("none", style="dim"), title="recent alerts and events")]
    return Group(*parts)


def progress_line_of(run: dict) -> str:
    return progress_line(run)


def _alert_list(model: WatchModel) -> list[tuple[float, str, str]]:
    """The stream's alerts and shown events, with the service's active alerts (raised before this watch
    subscribed) merged in by time; each once."""
    seen = {(round(a[0], 1), a[2]) for a in model.alerts}
    out = [(a[0], a[1], a[2]) for a in model.alerts]
    for a in (model.status.get("recent_alerts") or []):
        key = (round(float(a.get("t_s") or 0), 1), str(a.get("message", "")))
        if not any(k[1] == key[1] and abs(k[0] - key[0]) < 2 for k in seen):
            out.append((float(a.get("t_s") or 0), str(a.get("level", "warning")), str(a.get("message", ""))))
            seen.add(key)
    return sorted(out, key=lambda a: a[0])


def run_watch(publish_address: str, console: Console, *, duration_s: float | None = None, refresh_hz: float = 4.0,
              context=None, keys=None) -> WatchModel:
    """Subscribe and keep the dashboard live until duration_s (None: until Ctrl-C). Returns the model."""
    import zmq
    from rich.live import Live

    ctx = context or zmq.Context.instance()
    sub = Subscriber(ctx, publish_address, WATCH_TOPICS, hwm=20, keys=keys)  # keys: a CURVE stream
    model = WatchModel()
    period = 1.0 / refresh_hz
    t_end = None if duration_s is None else time.monotonic() + duration_s
    try:
        with Live(render(model), console=console, refresh_per_second=refresh_hz, transient=False) as live:
            next_draw = time.monotonic()
            while t_end is None or time.monotonic() < t_end:
                wait = 0.05
                for _ in range(500):  # bounded, so drawing keeps its rate however fast messages come
                    try:
                        msg = sub.receive(timeout_s=wait)
                    except StreamError:
                        model.bad_messages += 1
                        continue
                    if msg is None:
                        break
                    model.ingest(msg)
                    wait = 0
                if time.monotonic() >= next_draw:
                    live.update(render(model))
                    next_draw = time.monotonic() + period
    except KeyboardInterrupt:
        pass
    finally:
        sub.close()
    return model
