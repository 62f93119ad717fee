"""The quick run figure written after `maskrun run/demo/resume` (``plot_run_summary``).

The colour maps and display transforms live in ``figures_display`` (which imports nothing of
maskrun) and are importable from here as before. The figure is drawn by the run report
(``report``), which itself uses only ``figures_display``: report never imports this module, so
the two form no import circle.
"""

from __future__ import annotations

from pathlib import Path

from maskrun.daemon.show.figures_display import (
    INTENSITY_CMAP,
    LINE_LABELS,
    LINE_STYLES,
    PHASE_CMAP,
    SATURATED_RGB,
    UNWRAPPED_PHASE_CMAP,
    _wrap,
    colormap_lut,
    log_counts,
    phase_for_display,
    saturated_pixels,
    unwrap_phase_ls,
)

# names that lived here before the split, importable from here as before
__all__ = [
    "INTENSITY_CMAP", "LINE_LABELS", "LINE_STYLES", "PHASE_CMAP", "SATURATED_RGB", "UNWRAPPED_PHASE_CMAP", "_wrap",
    "colormap_lut", "log_counts", "phase_for_display", "plot_run_summary", "saturated_pixels", "unwrap_phase_ls",
]


# --------------------------------------------------------------------------- quick run figure
def plot_run_summary(run_path: str | Path, png_path: str | Path) -> Path:
    """The one-page run figure written after `maskrun run/demo` (the full report: daemon/show/report.py)."""
    from maskrun.daemon.show.report import render_report_png

    return render_report_png(run_path, png_path)
