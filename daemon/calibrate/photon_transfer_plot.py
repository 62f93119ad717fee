"""The photon transfer figure: the photon transfer, linearity and linearity-error plots of a
``PhotonTransferResult`` in one PNG (``photon_transfer`` re-exports ``plot_photon_transfer``)."""

from __future__ import annotations

from pathlib import Path

import numpy as np

from maskrun.daemon.calibrate.photon_transfer_data import PhotonTransferResult


# ----------------------------------------------------------------------------- plots
# Okabe & Ito, "Color Universal Design (CUD): how to make figures and presentations that are
# friendly to colorblind people" (2008): colour-blind-safe palette.
_BLUE, _ORANGE, _GREEN, _VERMILION, _GREY = "#0072B2", "#E69F00", "#009E73", "#D55E00", "#999999"

def plot_photon_transfer(result: PhotonTransferResult, path_png: str | Path) -> Path:
    """Save the photon transfer and linearity plots (three panels) as a PNG; returns the path."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    path_png = Path(path_png)
    fig = Figure(figsize=(14, 4.6), layout="constrained")
    FigureCanvasAgg(fig)  # Agg renderer, no GUI and no global pyplot state
    ax_ptc, ax_lin, ax_dev = fig.subplots(1, 3)
    r = result
    sig, svar = r.signal_dn, r.signal_variance_dn2
    fit, sat = r.in_gain_fit, r.saturation_index

    ax_ptc.plot(sig[~fit], svar[~fit], "o", color=_GREY, mfc="none", label="steps outside fit")
    ax_ptc.plot(sig[fit], svar[fit], "o", color=_BLUE, label="steps in fit (0-70 % sat.)")
    xs = np.linspace(0, max(sig[fit].max(), 1e-9), 50)
    ax_ptc.plot(xs, r.gain_dn_per_e * xs + r.gain_fit_intercept_dn2, "-", color=_ORANGE,
                label=f"fit: K = {r.gain_dn_per_e:.4g} DN/e-")
    ax_ptc.plot([sig[sat]], [svar[sat]], "s", ms=9, mfc="none", mew=2, color=_VERMILION,
                label=f"saturation: {r.saturation_capacity_e:.4g} e-")
    ax_ptc.set_xlabel(r"mean signal $\mu_y - \mu_{y.dark}$ (DN)")
    ax_ptc.set_ylabel(r"temporal variance $\sigma_y^2 - \sigma_{y.dark}^2$ (DN$^2$)")
    ax_ptc.set_title("Photon transfer (EMVA 1288)")
    ax_ptc.grid(True, alpha=0.3)
    ax_ptc.legend(fontsize=8)

    if r.linearity_axis == "photons_per_pixel":
        x, xlabel = r.photons_per_pixel, r"incident photons per pixel $\mu_p$ (photons)"
    else:
        x, xlabel = r.exposure_s, "exposure time (s)"
    lin = r.in_linearity_fit
    ax_lin.plot(x[~lin], sig[~lin], "o", color=_GREY, mfc="none", label="steps outside fit")
    ax_lin.plot(x[lin], sig[lin], "o", color=_BLUE, label="steps in fit (5-95 % sat.)")
    xl = np.linspace(0, float(np.nanmax(x)), 50)
    ax_lin.plot(xl, r.linearity_slope * xl + r.linearity_intercept_dn, "-", color=_ORANGE, label="linear fit")
    ax_lin.set_xlabel(xlabel)
    ax_lin.set_ylabel(r"mean signal $\mu_y - \mu_{y.dark}$ (DN)")
    ax_lin.set_title("Linearity")
    ax_lin.grid(True, alpha=0.3)
    ax_lin.legend(fontsize=8)

    ax_dev.axhline(0.0, color=_GREY, lw=1)
    ax_dev.plot(x[lin], r.linearity_deviation_pct[lin], "o-", color=_GREEN,
                label=f"LE = {r.linearity_error_pct:.3g} %")
    ax_dev.set_xlabel(xlabel)
    ax_dev.set_ylabel("deviation from linear fit (%)")
    ax_dev.set_title("Linearity error")
    ax_dev.grid(True, alpha=0.3)
    ax_dev.legend(fontsize=8)

    path_png.parent.mkdir(parents=True, exist_ok=True)
    fig.savefig(path_png, dpi=100)
    return path_png
