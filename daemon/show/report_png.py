"""The run report's picture: one PNG (matplotlib, Agg backend, no display needed) with the final
amplitude and phase, the last frame, the numbers per pass and over time, the timeline of faults and
the safety acknowledgement and settings (``render_report_png``)."""

from __future__ import annotations

from pathlib import Path

import numpy as np

from maskrun.daemon.show.figures_display import (
    INTENSITY_CMAP,
    LINE_LABELS,
    LINE_STYLES,
    PHASE_CMAP,
    SATURATED_RGB,
    log_counts,
    phase_for_display,
    saturated_pixels,
)
from maskrun.daemon.show.report_story import FLAG_EXPLANATIONS, RunStory, _acknowledgement_lines, _config_summary, read_story
from maskrun.daemon.record.store import FLAG_NAMES

# Okabe & Ito (2008) palette, see figures_display.py
_VERMILLION = "#D55E00"
_ORANGE = "#E69F00"
_GREY = "#666666"
_BLUE = "#0072B2"



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
    from maskrun.daemon.record.run_state import precision_headline

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
