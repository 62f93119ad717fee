"""Figures drawn from a run file (matplotlib, no display needed).

Colour maps: 'cividis' for intensities and amplitudes (colour-blind safe,
perceptually uniform), 'twilight' for phase (cyclic, so -pi and pi meet).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from .runfile import RunFile


def _mpl():
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    return plt


def phase_for_display(estimate: np.ndarray, truth: np.ndarray | None = None) -> np.ndarray:
    """Phase in radians, with the global phase removed (aligned to the truth if given, else to the
    amplitude-weighted mean phase)."""
    if truth is not None:
        c = np.vdot(estimate, truth)
        estimate = estimate * np.exp(1j * np.angle(c))
    else:
        estimate = estimate * np.exp(-1j * np.angle(np.sum(estimate)))
    return np.angle(estimate)


def plot_run_summary(run_path: str | Path, png_path: str | Path) -> Path:
    """Raw frame, amplitude, phase and error per pass of one run, as a PNG."""
    plt = _mpl()
    with RunFile(run_path) as rf:
        info = rf.frame_info()
        frame = rf.frame(rf.frame_count - 1) if rf.frame_count else np.zeros(rf.grid_shape)
        est = rf.estimates()
        einfo = rf.estimate_info()
        truth = rf.truth()
        name = rf.attrs.get("run_name", "")
        darks = rf.darks()
    dark = darks.mean(axis=0) if len(darks) else 0.0
    fig, axes = plt.subplots(1, 4, figsize=(17, 4.2), constrained_layout=True)
    ax = axes[0]
    raw = np.clip(frame.astype(np.float64) - dark, 1.0, None)
    im = ax.imshow(np.log10(raw), cmap="cividis")
    last = info[-1] if len(info) else None
    ax.set_title(
        f"last frame (pass {last['pass_index']}, mask {last['mask_index']})" if last is not None else "no frames"
    )
    ax.set_xlabel("camera column (pixel)")
    ax.set_ylabel("camera row (pixel)")
    fig.colorbar(im, ax=ax, label="log10(counts above dark, DN)")
    if len(est):
        x = est[-1].astype(np.complex128)
        ax = axes[1]
        im = ax.imshow(np.abs(x), cmap="cividis")
        ax.set_title("amplitude estimate")
        ax.set_xlabel("sample column (grid pixel)")
        ax.set_ylabel("sample row (grid pixel)")
        fig.colorbar(im, ax=ax, label="amplitude, sqrt(photons/s)")
        ax = axes[2]
        im = ax.imshow(phase_for_display(x, truth), cmap="twilight", vmin=-np.pi, vmax=np.pi)
        ax.set_title("phase estimate")
        ax.set_xlabel("sample column (grid pixel)")
        ax.set_ylabel("sample row (grid pixel)")
        fig.colorbar(im, ax=ax, label="phase (rad)")
        ax = axes[3]
        passes = einfo["pass_index"] + 1
        if np.isfinite(einfo["true_error"]).any():
            ax.semilogy(passes, einfo["true_error"], "o-", color="#0072B2", label="error against truth")
        ax.semilogy(passes, einfo["error_estimate"], "s--", color="#E69F00", label="predicted from photon count")
        ax.semilogy(passes, np.maximum(einfo["residual"], 1e-16), "^:", color="#009E73", label="data residual")
        ax.set_xlabel("pass (frame sets included)")
        ax.set_ylabel("relative error / residual")
        ax.set_title("reconstruction per pass")
        ax.legend(fontsize=8)
        ax.grid(True, which="both", alpha=0.3)
    else:
        for ax in axes[1:]:
            ax.text(0.5, 0.5, "no estimate", ha="center", va="center")
            ax.set_axis_off()
    fig.suptitle(f"maskrun run '{name}'")
    png_path = Path(png_path)
    fig.savefig(png_path, dpi=90)
    plt.close(fig)
    return png_path
