"""`maskrun report RUN.h5`: one picture and one page that tell a run's story.

Reads a run file (finished, stopped, or left behind by a crash) and writes

- ``RUN.report.png``: the final amplitude and phase, the last frame, error and
  residual per pass, photons and saturation per frame over time, a timeline of
  faults (run-log warnings/errors and per-frame flags), the safety
  acknowledgement and the main settings;
- ``RUN.report.html``: a self-contained page (the PNG embedded as a data URI)
  with the same picture plus tables: outcome, per-pass numbers, the full run
  log, the safety acknowledgement with the notice as shown, and the config.

Everything is drawn with matplotlib's Agg backend: no display needed.
The numbers come from ``RunStory`` (``read_story(path)``), so they can be
checked without looking at pixels.
"""

from __future__ import annotations

import base64
import html
import time
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from .figures import (
    INTENSITY_CMAP,
    LINE_LABELS,
    LINE_STYLES,
    PHASE_CMAP,
    SATURATED_RGB,
    log_counts,
    phase_for_display,
    saturated_pixels,
)
from .runfile import RunFile
from .store import FLAG_NAMES

# Okabe & Ito (2008) palette, see figures.py
_VERMILLION = "#D55E00"
_ORANGE = "#E69F00"
_GREY = "#666666"
_BLUE = "#0072B2"

FLAG_EXPLANATIONS = {
    "saturated": "more pixels at full scale than the limit allows",
    "photons_low": "fewer photons than [checks] min_photons_per_frame",
    "photons_high": "more photons than [checks] max_photons_per_frame",
    "retaken": "replaced a stale, dropped or failed attempt",
    "frame_id_gap": "the camera's frame counter jumped (a frame lost in the camera)",
    "timeout_retried": "the camera timed out at least once before this frame",
    "exposure_shortened": "exposure shortened after saturation",
    "after_resume": "first frame set after the run file was resumed (a gap in time precedes it)",
    "modulator_retried": "the modulator needed more than one command to show this mask",
    "reconnected": "a device was reconnected while taking this frame",
    "after_pause": "the run was paused (fault or request) while taking this frame",
    "shutter_closed": "refused frame: the shutter was found closed after the exposure",
}


@dataclass
class RunStory:
    """What a run did, read from its file. Times are epoch seconds; ``t0_s`` is the run start."""

    path: Path
    run_name: str
    created_utc: str
    outcome: str  # "finished", "stopped", "fault", or "incomplete (no end recorded)"
    outcome_message: str
    t0_s: float
    grid_shape: tuple[int, int]
    mask_count: int
    wavelength_m: float
    bit_depth: int
    estimate_units: str
    frame_info: np.ndarray
    dark_count: int
    estimate_info: np.ndarray
    last_estimate: np.ndarray | None
    truth: np.ndarray | None
    last_frame: np.ndarray | None
    last_frame_info: np.void | None
    events: list[dict]
    acknowledgement: dict
    config_toml: str
    complete_sets: int
    flag_counts: dict[str, int] = field(default_factory=dict)
    state: dict = field(default_factory=dict)  # run_state.state_from_file: the account every display shows
    run_plan: dict = field(default_factory=dict)  # the plan as used (overrides included), from the file

    @property
    def warnings(self) -> list[dict]:
        return [e for e in self.events if e["level"] in ("warning", "error")]

    @property
    def max_dn(self) -> int:
        return (1 << self.bit_depth) - 1


def _outcome(events: list[dict]) -> tuple[str, str]:
    ends = [e for e in events if e["kind"] == "run_end"]
    if not ends:
        return "incomplete (no end recorded)", "the file has no 'run_end' entry: the run was cut off or is still running"
    msg = ends[-1]["message"]
    for word in ("finished", "stopped", "fault"):
        if msg.startswith(f"run {word}"):
            return word, msg
    return "ended", msg


def read_story(run_path: str | Path) -> RunStory:
    """Read everything the report shows from a run file (works on growing and crashed files)."""
    run_path = Path(run_path)
    with RunFile(run_path) as rf:
        attrs = rf.attrs
        info = rf.frame_info()
        einfo = rf.estimate_info()
        est = rf.entry["estimates"][rf.estimate_count - 1] if rf.estimate_count else None
        last_frame = rf.frame(rf.frame_count - 1) if rf.frame_count else None
        events = rf.events()
        try:
            ack = rf.safety_acknowledgement
        except (KeyError, ValueError):
            ack = {}
        story = RunStory(
            path=run_path,
            run_name=str(attrs.get("run_name", run_path.stem)),
            created_utc=str(attrs.get("created_utc", "")),
            outcome="",
            outcome_message="",
            t0_s=0.0,
            grid_shape=rf.grid_shape,
            mask_count=rf.mask_count,
            wavelength_m=float(attrs.get("laser_wavelength_m", float("nan"))),
            bit_depth=int(attrs.get("camera_bit_depth", 16)),
            estimate_units=str(attrs.get("estimate_units", "sqrt(incident photons per second)")),
            frame_info=info,
            dark_count=rf.dark_count,
            estimate_info=einfo,
            last_estimate=est,
            truth=rf.truth(),
            last_frame=last_frame,
            last_frame_info=info[-1] if len(info) else None,
            events=events,
            acknowledgement=ack,
            config_toml=rf.config_toml if "config_toml" in attrs else "",
            complete_sets=len(rf.complete_sets()),
            run_plan=rf.run_plan or {},
        )
    story.outcome, story.outcome_message = _outcome(events)
    from .run_state import state_from_file

    story.state = state_from_file(run_path).to_dict()
    starts = [e["t_s"] for e in events] + ([float(info["t_request_s"][0])] if len(info) else [])
    story.t0_s = min(starts) if starts else 0.0
    for bit, name in FLAG_NAMES.items():
        n = int(np.count_nonzero(info["flags"] & bit)) if len(info) else 0
        if n:
            story.flag_counts[name] = n
    return story


def _time_unit(span_s: float) -> tuple[float, str]:
    if span_s < 600:
        return 1.0, "s"
    if span_s < 3 * 3600:
        return 60.0, "min"
    return 3600.0, "h"


def _image_panel(fig, ax, img, *, cmap, title, cbar_label, vmin=None, vmax=None, xlabel, ylabel):
    im = ax.imshow(img, cmap=cmap, vmin=vmin, vmax=vmax, interpolation="nearest")
    ax.set_title(title, fontsize=11)
    ax.set_xlabel(xlabel)
    ax.set_ylabel(ylabel)
    cb = fig.colorbar(im, ax=ax, fraction=0.046, pad=0.03)
    cb.set_label(cbar_label)
    return im, cb


def _empty(ax, text):
    ax.text(0.5, 0.5, text, ha="center", va="center", transform=ax.transAxes, color=_GREY)
    ax.set_xticks([])
    ax.set_yticks([])


def _planned_passes(story: RunStory) -> int | None:
    """Passes asked for when the run started (from the 'run_start' log entry; a service run may override the
    config)."""
    import re

    for e in story.events:
        if e["kind"] == "run_start":
            m = re.search(r"(\d+) passes", e["message"])
            if m:
                return int(m.group(1))
    return None


def _exposure_used(story: RunStory, cam: dict) -> str:
    """The exposure the run used (its frames'), not the config file's when an override changed it."""
    used = story.state.get("exposure_s")
    if used:
        return f"{used:g}" + (f" (config {cam.get('exposure_s')})" if cam.get("exposure_s") not in (None, used) else "")
    return str(cam.get("exposure_s", "?"))


def overrides_used(story: RunStory) -> list[tuple[str, str, str]]:
    """(setting, value the run used, value in the stored config) for the run settings an override may change."""
    import tomllib

    try:
        cfg = tomllib.loads(story.config_toml) if story.config_toml else {}
    except tomllib.TOMLDecodeError:
        cfg = {}
    plan = story.run_plan
    rows = []
    for key, table in (("passes", "run"), ("dark_frames", "run"), ("exposure_s", "camera"), ("interval_s", "run")):
        if key in plan:
            rows.append((f"{key}", str(plan[key]), str(cfg.get(table, {}).get(key, "(not set)"))))
    used = story.state.get("exposure_s")
    if used and str(used) != str(plan.get("exposure_s")):
        rows.append(("exposure_s at the end (shortened after saturation)", f"{used:g}", "-"))
    return rows


def _acknowledgement_lines(story: RunStory) -> list[str]:
    """Every safety acknowledgement of the run: the first (stored in full) and one per resume (run log)."""
    acks = story.state.get("acknowledgements") or []
    if not acks:
        return []
    return [f"  {i + 1}. {a['message'][len('laser-safety notice '):] if a['message'].startswith('laser-safety notice ') else a['message']}"
            for i, a in enumerate(acks)]


def _config_summary(story: RunStory) -> list[str]:
    import tomllib

    try:
        cfg = tomllib.loads(story.config_toml) if story.config_toml else {}
    except tomllib.TOMLDecodeError:
        cfg = {}
    cam, mod, saf, run = cfg.get("camera", {}), cfg.get("modulator", {}), cfg.get("safety", {}), cfg.get("run", {})
    rec = cfg.get("reconstruction", {})
    lines = [
        f"grid {story.grid_shape[0]} x {story.grid_shape[1]} pixels, {story.mask_count} masks "
        f"({cfg.get('masks', {}).get('family', '?')})",
        f"laser {story.wavelength_m * 1e9:.1f} nm, {cfg.get('laser', {}).get('power_w', '?')} W, "
        f"class {cfg.get('laser', {}).get('laser_class', '?')}",
        f"camera '{cam.get('driver', '?')}', exposure {_exposure_used(story, cam)} s, {story.bit_depth} bit",
        f"modulator '{mod.get('driver', '?')}', safety box '{saf.get('driver', '?')}'",
        f"passes planned {story.state.get('passes') or _planned_passes(story) or run.get('passes', '?')}, "
        f"dark frames {story.dark_count} taken ({story.run_plan.get('dark_frames', '?')} per session planned)",
        f"reconstruction {rec.get('mode', 'default')}, {rec.get('iterations_per_update', '?')} iterations per update",
    ]
    if "simulation" in cfg:
        lines.append(f"SIMULATED bench (sample '{cfg['simulation'].get('sample', '?')}')")
    return lines


def render_report_png(run_path: str | Path, png_path: str | Path, story: RunStory | None = None) -> Path:
    """Draw the one-page run report as a PNG (about 1500 x 1250 pixels). Returns the path."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    s = story or read_story(run_path)
    png_path = Path(png_path)
    plt.rcParams.update({"font.size": 9, "axes.titlesize": 11, "axes.labelsize": 9})
    fig = plt.figure(figsize=(16.5, 14), dpi=90)
    gs = fig.add_gridspec(3, 3, height_ratios=[1.15, 1.0, 0.95], hspace=0.42, wspace=0.32,
                          left=0.05, right=0.97, top=0.90, bottom=0.05)

    # --- header ---------------------------------------------------------------------------
    n_frames = len(s.frame_info)
    colour = {"finished": "black"}.get(s.outcome, _VERMILLION)
    fig.text(0.05, 0.975, f"maskrun run report: {s.run_name}", fontsize=17, weight="bold", va="top")
    fig.text(0.05, 0.948, f"outcome: {s.state.get('outcome') or s.outcome}   {_precision_phrase(s)}", fontsize=12,
             color=colour, va="top", weight="bold")
    sat_frames = s.flag_counts.get("saturated", 0)
    photons = float(np.sum(np.maximum(s.frame_info["photons"], 0))) if n_frames else 0.0
    fig.text(0.05, 0.928,
             f"started {s.created_utc}   |   {n_frames} frames + {s.dark_count} dark, {s.complete_sets} complete "
             f"frame sets of {s.mask_count}   |   {len(s.warnings)} warnings/errors in the log   |   "
             f"{sat_frames} frames flagged saturated   |   {photons:.3g} incident photons in total (dark-subtracted)   |   "
             f"file {s.path.name}", fontsize=9.5, va="top", color=_GREY)

    # --- row 1: images ------------------------------------------------------------------
    ax = fig.add_subplot(gs[0, 0])
    if s.last_frame is not None:
        fi = s.last_frame_info
        img = log_counts(s.last_frame)
        _image_panel(fig, ax, img, cmap=INTENSITY_CMAP, vmin=0, vmax=np.log10(s.max_dn),
                     title=f"last frame: pass {int(fi['pass_index']) + 1}, mask {int(fi['mask_index']) + 1} of "
                     f"{s.mask_count}", cbar_label="camera counts, log10(DN)",
                     xlabel="camera column (pixel)", ylabel="camera row (pixel)")
        sat = saturated_pixels(s.last_frame, s.max_dn)
        if sat.any():
            overlay = np.zeros((*sat.shape, 4))
            overlay[sat] = (*(c / 255 for c in SATURATED_RGB), 1.0)
            ax.imshow(overlay, interpolation="nearest")
        ax.text(0.0, -0.2, f"magenta = saturated pixels (at {s.max_dn} DN): {int(sat.sum())}",
                transform=ax.transAxes, fontsize=8.5, color=_GREY, va="top")
    else:
        ax.set_title("last frame")
        _empty(ax, "no frames in this run")

    ax_amp, ax_ph = fig.add_subplot(gs[0, 1]), fig.add_subplot(gs[0, 2])
    if s.last_estimate is not None:
        x = s.last_estimate.astype(np.complex128)
        last = s.estimate_info[-1]
        used = f"{int(last['passes_used'])} frame set{'s' if int(last['passes_used']) != 1 else ''}"
        _image_panel(fig, ax_amp, np.abs(x), cmap=INTENSITY_CMAP, title=f"final amplitude ({used})",
                     cbar_label=f"amplitude, {s.estimate_units}", xlabel="sample column (grid pixel)",
                     ylabel="sample row (grid pixel)")
        aligned = " (global phase matched to the known sample)" if s.truth is not None else ""
        _image_panel(fig, ax_ph, phase_for_display(x, s.truth), cmap=PHASE_CMAP, vmin=-np.pi, vmax=np.pi,
                     title="final phase" + (" *" if aligned else ""), cbar_label="phase (rad), cyclic colours",
                     xlabel="sample column (grid pixel)", ylabel="sample row (grid pixel)")
        if aligned:
            ax_ph.text(0.0, -0.2, "* " + aligned.strip(" ()"), transform=ax_ph.transAxes, fontsize=8.5,
                       color=_GREY, va="top")
    else:
        ax_amp.set_title("final amplitude")
        ax_ph.set_title("final phase")
        _empty(ax_amp, "no estimate: no complete frame set\nwas reconstructed")
        _empty(ax_ph, "no estimate")

    # --- row 2: per pass and over time ---------------------------------------------------
    ax = fig.add_subplot(gs[1, 0])
    ax.set_title("reconstruction quality per pass")
    ei = s.estimate_info
    if len(ei):
        passes = ei["pass_index"] + 1
        for key in ("true_error", "error_reported", "error_predicted", "error_estimate", "residual"):
            if key not in ei.dtype.names:
                continue
            vals = np.asarray(ei[key], dtype=float)
            ok = np.isfinite(vals) & (vals > 0)
            if ok.any():
                c, m, ls = LINE_STYLES[key]
                ax.semilogy(passes[ok], vals[ok], color=c, marker=m, linestyle=ls, label=LINE_LABELS[key])
        ax.set_xlabel("pass (frame sets taken so far)")
        ax.set_ylabel("relative error / residual (dimensionless)")
        ax.set_xticks(np.unique(passes) if len(np.unique(passes)) <= 12 else ax.get_xticks())
        ax.grid(True, which="both", alpha=0.3)
        from matplotlib.ticker import LogFormatterSciNotation

        ax.yaxis.set_minor_formatter(LogFormatterSciNotation(labelOnlyBase=False, minor_thresholds=(2, 0.5)))
        ax.legend(fontsize=8, loc="upper right")
    else:
        _empty(ax, "no estimates")

    span = 0.0
    if n_frames:
        t_frames = s.frame_info["t_request_s"] - s.t0_s
        span = float(np.max(t_frames))
    if s.events:
        span = max(span, max(e["t_s"] for e in s.events) - s.t0_s)
    scale, unit = _time_unit(span)

    ax = fig.add_subplot(gs[1, 1])
    ax.set_title("photons per frame")
    if n_frames:
        c, m, ls = LINE_STYLES["photons"]
        ph = np.asarray(s.frame_info["photons"], dtype=float)
        top = float(np.nanmax(np.abs(ph))) if np.isfinite(ph).any() else 0.0
        exp10 = int(np.floor(np.log10(top))) if top > 0 else 0
        ph_scaled = ph / 10.0**exp10
        ax.plot(t_frames / scale, ph_scaled, color=c, marker=m, linestyle=ls, markersize=4, label="one frame")
        bad = (s.frame_info["flags"] & (2 | 4)) != 0
        if bad.any():
            ax.plot(t_frames[bad] / scale, ph_scaled[bad], "x", color=_VERMILLION, markersize=8,
                    markeredgewidth=2, label="outside the photon limits")
        ax.legend(fontsize=8, loc="lower right")
        ax.set_xlabel(f"time since run start ({unit})")
        ax.set_ylabel("incident photons per frame" + (f" (x 10^{exp10})" if exp10 else ""))
        ax.set_ylim(0, 1.15 * float(np.nanmax(ph_scaled)) if top > 0 else 1.0)
        ax.grid(True, alpha=0.3)
    else:
        _empty(ax, "no frames")

    ax = fig.add_subplot(gs[1, 2])
    ax.set_title("saturation per frame")
    if n_frames:
        c, m, ls = LINE_STYLES["saturation"]
        ax.plot(t_frames / scale, 100 * s.frame_info["saturated_fraction"], color=c, marker=m, linestyle=ls,
                markersize=4, label="saturated pixels (% of all pixels)")
        peak = 100 * s.frame_info["peak_dn"] / s.max_dn
        ax.plot(t_frames / scale, peak, color=_BLUE, linestyle="--", linewidth=1,
                label="brightest pixel (% of full scale)")
        ax.set_xlabel(f"time since run start ({unit})")
        ax.set_ylabel("percent (%)")
        ax.set_ylim(-2, 125)
        ax.grid(True, alpha=0.3)
        ax.legend(fontsize=8, loc="upper center", ncol=2)
    else:
        _empty(ax, "no frames")

    # --- row 3: timeline and record --------------------------------------------------------
    ax = fig.add_subplot(gs[2, 0:2])
    _draw_timeline(ax, s, scale, unit)

    ax = fig.add_subplot(gs[2, 2])
    ax.set_axis_off()
    ack = s.acknowledgement
    lines = ["Laser-safety acknowledgement"]
    if ack:
        lines += [f"  by {ack.get('who', '?')} on {ack.get('host', '?')}",
                  f"  at {ack.get('when_utc', '?')}",
                  f"  via {ack.get('how', '?')}",
                  f"  laser class {ack.get('laser_class', '?')}, {ack.get('power_w', '?')} W"]
        more = _acknowledgement_lines(s)
        if len(more) > 1:
            lines += [f"  all {len(more)} acknowledgements (first, then one per resume):"] + more
    else:
        lines.append("  NONE RECORDED in this file")
    lines += ["", "Settings (full config in the HTML page)"] + ["  " + t for t in _config_summary(s)]
    ax.text(0.0, 1.0, "\n".join(lines), va="top", ha="left", family="monospace", fontsize=8.5,
            transform=ax.transAxes, wrap=True)

    fig.savefig(png_path, dpi=90)
    plt.close(fig)
    return png_path


def _precision_phrase(s: RunStory) -> str:
    from .run_state import precision_headline

    st = s.state
    head = precision_headline(st.get("precision"), st.get("error_estimate"))
    if st.get("true_error") is not None:
        head += f"; error vs truth {st['true_error']:.2%}"
    return head


def _draw_timeline(ax, s: RunStory, scale: float, unit: str) -> None:
    """One row per kind of trouble (log warnings, log errors, each per-frame flag), the frames taken,
    and the run's milestones as labelled dotted lines."""
    ax.set_title("timeline: milestones, warnings and faults (run log and per-frame flags)")
    rows: list[tuple[str, np.ndarray, str, str]] = []  # label, times, colour, marker
    errors = [e for e in s.events if e["level"] == "error"]
    warns = [e for e in s.events if e["level"] == "warning"]
    info = s.frame_info
    for k in sorted({e["kind"] for e in errors}):
        t = np.array([e["t_s"] - s.t0_s for e in errors if e["kind"] == k]) / scale
        rows.append((f"error in the log: {k} ({len(t)})", t, _VERMILLION, "X"))
    for k in sorted({e["kind"] for e in warns}):
        t = np.array([e["t_s"] - s.t0_s for e in warns if e["kind"] == k]) / scale
        rows.append((f"warning in the log: {k} ({len(t)})", t, _ORANGE, "^"))
    for bit, name in FLAG_NAMES.items():
        if s.flag_counts.get(name):
            t = (info["t_request_s"][(info["flags"] & bit) != 0] - s.t0_s) / scale
            rows.append((f"frames flagged '{name}' ({len(t)}): {FLAG_EXPLANATIONS.get(name, '')}", t, _ORANGE, "|"))
    t_frames = (info["t_request_s"] - s.t0_s) / scale if len(info) else np.zeros(0)
    rows.append((f"frames taken ({len(t_frames)}, one tick each)", t_frames, _GREY, "|"))
    rows.reverse()  # errors at the top
    from matplotlib.transforms import blended_transform_factory

    lab = blended_transform_factory(ax.transAxes, ax.transData)
    for i, (label, t, c, m) in enumerate(rows):
        ax.plot(t, np.full(len(t), i), m, color=c, markersize=12 if m == "|" else 9, markeredgewidth=2)
        ax.text(0.005, i + 0.28, label, transform=lab, fontsize=8, color=_VERMILLION if c == _VERMILLION else "black",
                va="bottom")
    top = len(rows) - 0.3
    milestone_kinds = ("run_start", "darks", "shutter", "paused", "resumed", "run_end", "interval_wait")
    shown = [e for e in s.events if e["kind"] in milestone_kinds][:40]
    lo, hi = ax.get_xlim()
    span = max(hi - lo, 1e-9)
    last_t, level = -np.inf, 0
    for e in shown:
        t = (e["t_s"] - s.t0_s) / scale
        level = level + 1 if (t - last_t) < 0.08 * span else 0
        last_t = t
        c = _VERMILLION if e["level"] == "error" else _GREY
        ax.axvline(t, color=c, linewidth=0.8, linestyle=":")
        ax.text(t, top + 0.35 + 0.45 * (level % 3), " " + e["kind"].replace("_", " "), fontsize=7.5, color=c,
                ha="left", va="bottom")
    ax.set_yticks([])
    ax.set_ylim(-0.6, top + 1.9)
    ax.set_xlabel(f"time since run start ({unit})")
    ax.grid(True, axis="x", alpha=0.3)
    if len(rows) == 1:
        ax.set_title("timeline: milestones (no warnings, errors or flagged frames in this run)")


# ----------------------------------------------------------------------------------- HTML
_CSS = """
body{font-family:DejaVu Sans,Helvetica,Arial,sans-serif;max-width:1500px;margin:1.5em auto;padding:0 1em;color:#111}
h1{font-size:1.6em;margin-bottom:.2em} h2{font-size:1.2em;margin-top:1.6em;border-bottom:1px solid #ccc}
table{border-collapse:collapse;font-size:.9em} td,th{border:1px solid #ccc;padding:.25em .6em;text-align:left;vertical-align:top}
th{background:#f2f2f2} .warning{background:#fff4d6} .error{background:#fde0d6} .bad{color:#D55E00;font-weight:bold}
pre{background:#f7f7f7;border:1px solid #ddd;padding:.8em;overflow-x:auto;font-size:.85em} img{max-width:100%;border:1px solid #ddd}
.muted{color:#555}
"""


def _fmt_t(epoch_s: float) -> str:
    return time.strftime("%Y-%m-%d %H:%M:%S", time.gmtime(epoch_s)) + f".{int((epoch_s % 1) * 1000):03d}Z"


def render_report_html(story: RunStory, png_path: Path, html_path: Path) -> Path:
    """The page: the PNG embedded (data URI, so the page can be moved alone) and the tables."""
    e = html.escape
    s = story
    png_b64 = base64.b64encode(Path(png_path).read_bytes()).decode("ascii")
    cls = "" if s.outcome == "finished" else "bad"
    out = [f"<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'><title>maskrun report: {e(s.run_name)}"
           f"</title><style>{_CSS}</style></head><body>",
           f"<h1>maskrun run report: {e(s.run_name)}</h1>",
           f"<p class='{cls}'>Outcome: {e(s.outcome)} &mdash; {e(s.state.get('outcome') or s.outcome_message)}</p>",
           f"<p class='muted'>File {e(str(s.path))}; started {e(s.created_utc)}; report written "
           f"{e(time.strftime('%Y-%m-%dT%H:%M:%SZ', time.gmtime()))}.</p>",
           f"<img src='data:image/png;base64,{png_b64}' alt='run report figure for {e(s.run_name)}'>"]
    # numbers
    n = len(s.frame_info)
    rows = [("frames taken", f"{n} (+ {s.dark_count} dark frames)"),
            ("complete frame sets", f"{s.complete_sets} of {s.mask_count} masks each"),
            ("estimates", str(len(s.estimate_info))),
            ("warnings / errors in the log", str(len(s.warnings))),
            ("flagged frames", ", ".join(f"{k}: {v}" for k, v in s.flag_counts.items()) or "none")]
    rows.append(("incident photons in total (dark-subtracted)", f"{s.state.get('photons_total') or 0:.4g}"))
    if len(s.estimate_info):
        from .run_state import precision_rows

        last = s.estimate_info[-1]
        rows.append(("final data residual", f"{last['residual']:.4g}"))
        rows += [(f"final {k}", v) for k, v in precision_rows(s.state.get("precision"), s.state.get("true_error"),
                                                              s.state.get("error_estimate"))]
    out.append("<h2>Summary</h2><table>" + "".join(f"<tr><th>{e(a)}</th><td>{e(b)}</td></tr>" for a, b in rows)
               + "</table>")
    if s.flag_counts:
        out.append("<h2>What the frame flags mean</h2><table><tr><th>flag</th><th>frames</th><th>meaning</th></tr>")
        out += [f"<tr><td>{e(k)}</td><td>{v}</td><td>{e(FLAG_EXPLANATIONS.get(k, ''))}</td></tr>"
                for k, v in s.flag_counts.items()]
        out.append("</table>")
    # per pass
    if len(s.estimate_info):
        out.append("<h2>Reconstruction per pass</h2><table><tr><th>pass</th><th>frame sets used</th>"
                   "<th>data residual</th><th>precision (from the data)</th><th>predicted (photon count + floors)"
                   "</th><th>chi2/dof</th><th>photon count only</th><th>error against known sample</th>"
                   "<th>iterations</th><th>photons used</th><th>solve time (s)</th></tr>")
        names = s.estimate_info.dtype.names

        def cell(r, key):
            return f"{r[key]:.4g}" if key in names and np.isfinite(r[key]) else "&ndash;"

        for r in s.estimate_info:
            te = cell(r, "true_error")
            out.append(f"<tr><td>{int(r['pass_index']) + 1}</td><td>{int(r['passes_used'])}</td>"
                       f"<td>{r['residual']:.4g}</td><td>{cell(r, 'error_reported')}</td>"
                       f"<td>{cell(r, 'error_predicted')}</td><td>{cell(r, 'misfit_chi2_dof')}</td>"
                       f"<td>{r['error_estimate']:.4g}</td><td>{te}</td>"
                       f"<td>{int(r['iterations'])}</td><td>{r['photons']:.4g}</td><td>{r['elapsed_s']:.3g}</td></tr>")
        out.append("</table>")
    # run log
    out.append("<h2>Run log</h2><table><tr><th>time (UTC)</th><th>+ s</th><th>level</th><th>kind</th>"
               "<th>message</th></tr>")
    for ev in s.events:
        lvl = ev["level"]
        out.append(f"<tr class='{e(lvl)}'><td>{_fmt_t(ev['t_s'])}</td><td>{ev['t_s'] - s.t0_s:.2f}</td>"
                   f"<td>{e(lvl)}</td><td>{e(ev['kind'])}</td><td>{e(ev['message'])}</td></tr>")
    out.append("</table>")
    # safety
    ack = s.acknowledgement
    out.append("<h2>Laser-safety acknowledgement</h2>")
    if ack:
        out.append("<table>" + "".join(
            f"<tr><th>{e(k)}</th><td>{e(str(ack[k]))}</td></tr>"
            for k in ("who", "host", "when_utc", "how", "laser_class", "wavelength_m", "power_w", "notice_sha256")
            if k in ack) + "</table>")
        if ack.get("notice"):
            out.append("<p>Notice as shown:</p><pre>" + e("\n".join(ack["notice"])) + "</pre>")
        more = _acknowledgement_lines(s)
        if more:
            out.append(f"<p>All {len(more)} acknowledgement(s) of this run file (the first, then one per resume):</p>"
                       "<ul>" + "".join(f"<li>{e(m.strip())}</li>" for m in more) + "</ul>")
    else:
        out.append("<p class='bad'>No acknowledgement recorded in this file.</p>")
    over = overrides_used(s)
    out.append("<h2>Config (as used)</h2>")
    if over:
        out.append("<p>Run settings as used (command-line or request overrides win over the stored config):</p>"
                   "<table><tr><th>setting</th><th>used</th><th>in the config file</th></tr>"
                   + "".join(f"<tr><td>{e(a)}</td><td>{e(b)}</td><td>{e(c)}</td></tr>" for a, b, c in over)
                   + "</table>")
    out.append("<p>The config file as stored (before the overrides above):</p><pre>"
               + e(s.config_toml or "(none stored)") + "</pre>")
    out.append("</body></html>")
    html_path = Path(html_path)
    html_path.write_text("\n".join(out), encoding="utf-8")
    return html_path


@dataclass
class ReportFiles:
    png: Path
    html: Path
    story: RunStory


def write_report(run_path: str | Path, out_dir: str | Path | None = None) -> ReportFiles:
    """Write RUN.report.png and RUN.report.html next to the run file (or into ``out_dir``)."""
    run_path = Path(run_path)
    story = read_story(run_path)
    folder = Path(out_dir) if out_dir is not None else run_path.parent
    folder.mkdir(parents=True, exist_ok=True)
    png = render_report_png(run_path, folder / f"{run_path.stem}.report.png", story)
    page = render_report_html(story, png, folder / f"{run_path.stem}.report.html")
    return ReportFiles(png, page, story)
