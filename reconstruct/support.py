"""Object supports for single-pattern phase retrieval: estimate, refine, check the sampling.

A support is a boolean (H, W) array on the reconstruction grid: True where the object
may be non-zero. The grid is periodic (the DFT's), so a support may wrap around an edge;
extents are measured on the circle.

* ``autocorrelation_support(y, masks)``: the first support, from the data alone. The
  inverse DFT of a far-field intensity |F x|^2 is the (circular) autocorrelation of x,
  whose support is the set of differences of the object's support: it contains a
  translate of the object's support and is about twice as wide (Fienup 1982, section 2;
  common practice to start from it). With masks, sum_k IDFT(y_k) is the sum of the
  autocorrelations of m_k x, with the same support bound.
* ``shrinkwrap(estimate, sigma_px, threshold)``: Marchesini et al., "X-ray image
  reconstruction from a diffraction pattern alone", Phys. Rev. B 68, 140101(R) (2003),
  from memory: every ~20 iterations blur the estimate's amplitude with a Gaussian of
  width sigma (3 pixels at first, 1 % smaller at every update down to ~1.5 pixels) and
  keep the pixels above ~20 % of its maximum.
* ``check_oversampling(support)``: the intensity samples the object's spectrum finely
  enough to determine it only when the object occupies at most half of the grid in each
  direction (Miao, Sayre, Chapman, JOSA A 15, 1662 (1998), from memory: oversampling
  ratio >= 2; per axis is the conservative form). ``UndersampledSupportWarning``
  otherwise.
"""
from __future__ import annotations

import warnings

import numpy as np

from .validation import ReconstructionInputError

__all__ = ["UndersampledSupportWarning", "autocorrelation_support", "shrinkwrap", "support_extent",
           "check_oversampling", "check_support", "reduced_support"]


class UndersampledSupportWarning(UserWarning):
    """The support spans more than half the grid in some direction: the pattern is not oversampled 2x."""


def check_support(support, shape) -> np.ndarray:
    """A boolean (H, W) support, or ReconstructionInputError saying what is wrong."""
    s = np.asarray(support)
    if s.shape != tuple(shape):
        raise ReconstructionInputError(f"support shape {s.shape} does not match the grid {tuple(shape)}.")
    s = s.astype(bool)
    if not s.any():
        raise ReconstructionInputError("support is empty (all False): nothing would be reconstructed.")
    return s


def _axis_extent(occupied: np.ndarray) -> tuple[int, int]:
    """(start, length) of the shortest circular interval covering the True entries of a 1-D array."""
    n = occupied.size
    if occupied.all():
        return 0, n
    # the longest circular run of False ends the covering interval
    idx = np.flatnonzero(occupied)
    gaps = np.diff(np.concatenate([idx, [idx[0] + n]])) - 1  # empty cells after each occupied one
    i = int(np.argmax(gaps))
    start = int(idx[(i + 1) % idx.size])
    return start, n - int(gaps[i])


def support_extent(support) -> tuple[int, int]:
    """(rows, cols) spanned by the support on the periodic grid (its circular bounding box)."""
    s = np.asarray(support, bool)
    return _axis_extent(s.any(axis=1))[1], _axis_extent(s.any(axis=0))[1]


def _bbox(support) -> tuple[int, int, int, int]:
    s = np.asarray(support, bool)
    r0, h = _axis_extent(s.any(axis=1))
    c0, w = _axis_extent(s.any(axis=0))
    return r0, c0, h, w


def check_oversampling(support, *, extent=None, what: str = "the support") -> tuple[int, int]:
    """Warn (``UndersampledSupportWarning``) when the object spans more than half the grid.

    ``extent`` (rows, cols) may be given instead of measured (for an estimate of the
    object's extent). Returns the extent used.
    """
    shape = np.shape(support)
    ext = support_extent(support) if extent is None else tuple(int(e) for e in extent)
    if ext[0] > shape[0] / 2 or ext[1] > shape[1] / 2:
        warnings.warn(
            f"{what} spans {ext[0]} x {ext[1]} pixels of a {shape[0]} x {shape[1]} grid: more than half the grid "
            "in some direction, so the diffraction pattern is not oversampled 2x per axis and the object may "
            "not be determined by it (Miao, Sayre and Chapman 1998). Use a finer detector sampling (a larger "
            "reconstruction grid for the same object), or a tighter support.",
            UndersampledSupportWarning, stacklevel=3)
    return ext


def autocorrelation(intensities) -> np.ndarray:
    """|sum_k IDFT(y_k)| (float64, (H, W)): the autocorrelation of the object for one plain pattern."""
    y = np.asarray(intensities, dtype=np.float64)
    if y.ndim == 2:
        y = y[None]
    return np.abs(np.fft.ifft2(y, norm="ortho").sum(axis=0))


def autocorrelation_support(intensities, *, threshold: float = 0.04, sigma_px: float = 1.0) -> tuple[np.ndarray, tuple[int, int]]:
    """First support from the data: the autocorrelation, blurred by ``sigma_px``, above
    ``threshold`` x its maximum. Returns (support, estimated object extent (rows, cols)),
    the extent being half the autocorrelation's plus one pixel (the whole grid when the
    autocorrelation fills it: aliased, under-sampled)."""
    from scipy.ndimage import gaussian_filter

    ac = autocorrelation(intensities)
    if sigma_px > 0:
        ac = gaussian_filter(ac, sigma_px, mode="wrap")
    s = ac > threshold * float(ac.max())
    h, w = support_extent(s)
    H, W = s.shape
    # an autocorrelation that fills the grid in a direction is aliased: the object spans at least half
    # the grid there (taken as all of it, so the oversampling check warns)
    return s, (H if h >= H else (h + 1) // 2, W if w >= W else (w + 1) // 2)


def shrinkwrap(estimate, sigma_px: float, threshold: float = 0.2) -> np.ndarray:
    """Marchesini et al. 2003: the pixels where |estimate| blurred by a Gaussian (sigma_px, periodic)
    exceeds ``threshold`` x its maximum. Never empty (keeps the maximum)."""
    from scipy.ndimage import gaussian_filter

    a = gaussian_filter(np.abs(np.asarray(estimate)).astype(np.float64), sigma_px, mode="wrap")
    peak = float(a.max())
    if peak <= 0:
        return np.ones(a.shape, bool)
    return a >= threshold * peak


def reduced_support(support, fraction: float = 0.25) -> np.ndarray:
    """The support with one corner of its bounding box cut off along the anti-diagonal: a support
    that is not centrosymmetric, for the twin-image remedy of Fienup and Wackerman, "Phase-retrieval
    stagnation problems and solutions", JOSA A 3, 1897 (1986), from memory (a few iterations with a
    support that the object fits and its twin does not, then the full support again)."""
    s = np.asarray(support, bool)
    H, W = s.shape
    r0, c0, h, w = _bbox(s)
    rr = ((np.arange(H) - r0) % H)[:, None] / max(h, 1)
    cc = ((np.arange(W) - c0) % W)[None, :] / max(w, 1)
    keep = rr + cc <= 2.0 * (1.0 - fraction)
    out = s & keep
    return out if out.any() else s
