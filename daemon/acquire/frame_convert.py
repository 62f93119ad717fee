"""Camera counts to the reconstruction's frame-set layout in one pass per operation.

``electrons_shifted`` computes ``numpy.fft.ifftshift(Response.electrons(pixels, dark, flat))`` (zero
frequency from the centre of the ROI to [0, 0]; see ``checks.Response``) with the shift folded into
the subtraction: the four quadrants of the frame are subtracted straight into their shifted places
in the output, so there is no separate shift pass and no temporary frame. The arithmetic is the
same, operation for operation, so the result is bit-identical to the two-step form.
"""
from __future__ import annotations

import numpy as np

__all__ = ["electrons_shifted", "shifted"]


def _quadrants(shape):
    """Pairs (out slice, in slice) of ifftshift over two axes: out[i] = in[(i + n // 2) % n]."""
    parts = []
    for n in shape:
        a = n // 2
        parts.append(((slice(0, n - a), slice(a, n)), (slice(n - a, n), slice(0, a))))
    return [((ro, co), (ri, ci)) for ro, ri in parts[0] for co, ci in parts[1]]


def shifted(a: np.ndarray) -> np.ndarray:
    """ifftshift of a 2-D per-pixel map (e.g. the dark frame or the flat field), done once per run."""
    return np.fft.ifftshift(a)


def electrons_shifted(pixels: np.ndarray, dark_dn, gain_dn_per_e: float, flat_shifted: np.ndarray | None,
                      out: np.ndarray) -> np.ndarray:
    """out = ifftshift((pixels - dark_dn) / flat / gain_dn_per_e) as float32 (``out`` (H, W) float32).

    ``dark_dn``: a number or an (H, W) array in the camera's layout; ``flat_shifted``: the flat field
    already shifted (``shifted(flat)``) or None."""
    dark_is_map = isinstance(dark_dn, np.ndarray) and dark_dn.ndim == 2
    for o, i in _quadrants(pixels.shape):
        np.subtract(pixels[i], dark_dn[i] if dark_is_map else dark_dn, out=out[o], dtype=np.float32)
    if flat_shifted is not None:
        out /= flat_shifted
    out *= np.float32(1.0 / gain_dn_per_e)
    return out
