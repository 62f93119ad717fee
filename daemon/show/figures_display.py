"""How maskrun shows images: colour maps and display transforms (``figures`` re-exports every name).

Shared by the run report (daemon/show/report.py, matplotlib, no display needed) and
the live view (daemon/show/view.py, Qt); only numpy and matplotlib are needed here.
It imports nothing of maskrun, so every display can use it without an import circle.

Colour maps (all readable with the common colour-vision deficiencies):
- intensities and amplitudes: 'cividis' (Nuñez, Anderton & Renslow, "Optimizing
  colormaps with consideration for color vision deficiency to enable accurate
  interpretation of scientific data", PLOS ONE 13(7), 2018);
- wrapped phase: 'twilight', cyclic, so -pi and +pi have the same colour
  (matplotlib's cyclic perceptually uniform map; from memory: designed by
  B. Hackenberg for matplotlib 3.0, 2018);
- unwrapped phase (not cyclic): 'viridis';
- lines and markers: the Okabe-Ito palette (Okabe & Ito, "Color Universal
  Design (CUD): how to make figures and presentations that are friendly to
  colorblind people", 2002/2008), always paired with distinct markers and dash
  styles, so no line is told apart by colour alone;
- saturated camera pixels: magenta (SATURATED_RGB), a colour not in cividis.
"""

from __future__ import annotations

import numpy as np

INTENSITY_CMAP = "cividis"
PHASE_CMAP = "twilight"
UNWRAPPED_PHASE_CMAP = "viridis"
SATURATED_RGB = (255, 0, 255)
#: Okabe-Ito colours by role, with the marker and dash style that go with each.
LINE_STYLES = {
    "true_error": ("#0072B2", "o", "-"),  # blue
    "error_estimate": ("#E69F00", "s", "--"),  # orange
    "residual": ("#009E73", "^", ":"),  # bluish green
    "error_reported": ("#CC79A7", "D", "-."),  # reddish purple
    "error_predicted": ("#56B4E9", "v", "--"),  # sky blue
    "photons": ("#0072B2", ".", "-"),
    "saturation": ("#D55E00", ".", "-"),  # vermillion
}
LINE_LABELS = {
    "true_error": "error against the known sample (simulation)",
    "error_estimate": "error predicted from the photon count",
    "residual": "data residual (measured vs. modelled frames)",
    "error_reported": "precision from the data (misfit)",
    "error_predicted": "predicted: photon count + floors",
}


def colormap_lut(name: str, n: int = 256) -> np.ndarray:
    """A matplotlib colour map as an (n, 3) uint8 lookup table (for Qt image items)."""
    from matplotlib import colormaps

    rgba = colormaps[name](np.linspace(0.0, 1.0, n))
    return np.ascontiguousarray((rgba[:, :3] * 255 + 0.5).astype(np.uint8))


def phase_for_display(estimate: np.ndarray, truth: np.ndarray | None = None) -> np.ndarray:
    """Phase in radians in [-pi, pi], with the global phase removed (which phase retrieval cannot
    recover): aligned to the truth if given, else so that the amplitude-weighted mean phasor is real."""
    if truth is not None:
        c = np.vdot(estimate, truth)
        estimate = estimate * np.exp(1j * np.angle(c))
    else:
        estimate = estimate * np.exp(-1j * np.angle(np.sum(estimate)))
    return np.angle(estimate).astype(np.float32)


def _wrap(phi: np.ndarray) -> np.ndarray:
    return (phi + np.pi) % (2 * np.pi) - np.pi


def unwrap_phase_ls(wrapped: np.ndarray) -> np.ndarray:
    """Unweighted least-squares 2-D phase unwrapping with the discrete cosine transform.

    Method: Ghiglia & Romero, "Robust two-dimensional weighted and unweighted phase
    unwrapping that uses fast transforms and iterative methods", J. Opt. Soc. Am. A 11(1),
    107-117, 1994 (the unweighted DCT solution of the Poisson equation with Neumann
    boundaries). The result is defined up to a constant; it is shifted so that its mean
    equals the mean of the wrapped input. Exact (up to that constant) where neighbouring
    true phase differences stay within (-pi, pi). float64 in, float32 out; O(N log N).
    """
    from scipy.fft import dctn, idctn

    psi = np.asarray(wrapped, dtype=np.float64)
    m, n = psi.shape
    dy = np.zeros_like(psi)
    dx = np.zeros_like(psi)
    dy[:-1, :] = _wrap(np.diff(psi, axis=0))
    dx[:, :-1] = _wrap(np.diff(psi, axis=1))
    rho = dy.copy()
    rho[1:, :] -= dy[:-1, :]
    rho += dx
    rho[:, 1:] -= dx[:, :-1]
    r = dctn(rho, type=2, norm="ortho")
    i = np.arange(m)[:, None]
    j = np.arange(n)[None, :]
    denom = 2.0 * (np.cos(np.pi * i / m) + np.cos(np.pi * j / n) - 2.0)
    denom[0, 0] = 1.0
    r /= denom
    r[0, 0] = 0.0
    phi = idctn(r, type=2, norm="ortho")
    phi += psi.mean() - phi.mean()
    return phi.astype(np.float32)


def log_counts(frame: np.ndarray, out: np.ndarray | None = None) -> np.ndarray:
    """log10 of camera counts (DN), counts below 1 shown as 0 (log10 1). float32; fills ``out`` if given."""
    if out is None:
        out = np.empty(frame.shape, dtype=np.float32)
    np.maximum(frame, 1, out=out, casting="unsafe")
    return np.log10(out, out=out)


def saturated_pixels(frame: np.ndarray, saturation_dn: float | None) -> np.ndarray:
    """Boolean mask of pixels at or above the saturation level in DN (all False if unknown)."""
    if saturation_dn is None or not np.isfinite(saturation_dn):
        return np.zeros(frame.shape, dtype=bool)
    return frame >= saturation_dn
