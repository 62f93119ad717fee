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

The story is read in ``report_story``, the picture drawn in ``report_png``; this module writes the
page and the pair of files (every name importable from here).
"""

from __future__ import annotations

import base64
import html
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from maskrun.daemon.show.report_png import (
    _BLUE,
    _GREY,
    _ORANGE,
    _VERMILLION,
    _draw_timeline,
    _empty,
    _image_panel,
    _precision_phrase,
    _time_unit,
    render_report_png,
)
from maskrun.daemon.show.report_story import (
    FLAG_EXPLANATIONS,
    RunStory,
    _acknowledgement_lines,
    _config_summary,
    _exposure_used,
    _outcome,
    _planned_passes,
    overrides_used,
    read_story,
)

# names that lived here before the split (the story in report_story, the picture in report_png),
# importable from here as before
__all__ = [
    "FLAG_EXPLANATIONS", "ReportFiles", "RunStory", "overrides_used", "read_story", "render_report_html",
    "render_report_png", "write_report", "_acknowledgement_lines", "_config_summary", "_exposure_used", "_outcome",
    "_planned_passes", "_BLUE", "_GREY", "_ORANGE", "_VERMILLION", "_draw_timeline", "_empty", "_image_panel",
    "_precision_phrase", "_time_unit",
]


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
        from maskrun.daemon.record.run_state import precision_rows

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
