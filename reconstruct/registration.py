"""Mask registration: where the masks land on the field, from one frame set.

Model (the simulator's, ``masks.shift_masks``): the field sees the designed masks displaced by
``offset_px`` = (rows, cols) grid pixels, periodic, linear between pixels. For a candidate offset the
frame set is reconstructed with the masks shifted by it, and the data residual
|| sqrt(y) - |F(m x)| || / || sqrt(y) || is what is minimised.

What the data can and cannot tell. A whole-pixel shift s of the masks gives exactly the data of the
designed masks with the object shifted by -s (|F(m(. - s) x)| = |F(m x(. + s))|, the DFT shift
theorem), so the residual is the same at every whole-pixel offset: the data fix only the fraction of
the offset (the blend of neighbouring mask pixels), and they fix it sharply. The whole pixels need a
position reference in the object plane: by default the intensity centroid of the reconstruction is
taken to be at ``reference_px`` (the grid centre): register with the bare beam (sample out), or with
a sample whose centroid is known, and give ``reference_px`` then. So the search runs:

1. fraction: the residual on the unit torus of fractions, a coarse grid (``coarse`` x ``coarse``
   points, independent solves) then golden-section refinement along each axis in turn (warm starts);
2. whole pixels: the reconstruction at that fraction is the object displaced by the whole-pixel part
   n, so n = round(reference - centroid) (circular centroid on the periodic grid).
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .masks import shift_masks
from .metrics import amplitude_residual
from .solvers import solve
from .validation import ReconstructionInputError, check_masks

__all__ = ["RegistrationResult", "estimate_mask_offset", "residual_at_offset", "circular_centroid"]

_GOLDEN = (np.sqrt(5.0) - 1.0) / 2.0


@dataclass
class RegistrationResult:
    """offset_px: (rows, cols) estimated displacement of the masks on the field (whole + fraction), each in
    (-size/2, size/2]; fraction_px: its fractional part in [0, 1); whole_px: its whole-pixel part (mod size);
    residual: data residual at the estimate; residual_designed: at offset (0, 0) (the designed masks);
    centroid_px / reference_px: the intensity centroid of the reconstruction at the fraction, and where it
    is taken to be; evaluations: solves run; estimate: the object reconstructed with the estimated offset."""

    offset_px: tuple[float, float]
    fraction_px: tuple[float, float]
    whole_px: tuple[int, int]
    residual: float
    residual_designed: float
    centroid_px: tuple[float, float]
    reference_px: tuple[float, float]
    evaluations: int
    estimate: np.ndarray


def circular_centroid(intensity) -> tuple[float, float]:
    """(row, col) centroid of a non-negative (H, W) image on the periodic grid (angle of the first
    Fourier coefficient along each axis), in [0, H) x [0, W)."""
    a = np.asarray(intensity, dtype=np.float64)
    h, w = a.shape
    rows = a.sum(axis=1) @ np.exp(2j * np.pi * np.arange(h) / h)
    cols = a.sum(axis=0) @ np.exp(2j * np.pi * np.arange(w) / w)
    return (float(np.angle(rows) / (2 * np.pi) * h % h), float(np.angle(cols) / (2 * np.pi) * w % w))


def residual_at_offset(intensities, masks, offset_px, *, iterations: int = 150, x0=None, seed: int = 0):
    """(data residual, estimate) of the frame set reconstructed with the masks shifted by ``offset_px``."""
    m = shift_masks(masks, offset_px).astype(np.complex64)
    res = solve(intensities, m, iterations=iterations, x0=x0, seed=seed)
    pred = np.abs(np.fft.fft2(m.astype(np.complex128) * res.estimate, norm="ortho")) ** 2
    return amplitude_residual(intensities, pred), res.estimate


def _signed(v: float, size: int) -> float:
    v = v % size
    return v - size if v > size / 2 else v


def estimate_mask_offset(intensities, masks, *, reference_px=None, reference_image=None, iterations: int = 150,
                         coarse: int = 4, tol_px: float = 0.01, rounds: int = 2, seed: int = 0) -> RegistrationResult:
    """Estimate the displacement of ``masks`` (the designed (K, H, W) set) on the field from one frame set
    ``intensities`` (K, H, W) in the grid convention (photons or electrons; dark-subtracted).

    reference_px: (row, col) where the object's intensity centroid is (default: the grid centre, (H/2, W/2),
    right for a centred bare beam). reference_image: instead, an (H, W) image of the object in grid
    coordinates (e.g. a registered earlier reconstruction); the whole pixels are then the peak of the circular
    cross-correlation of the amplitudes. iterations: solver iterations per candidate. coarse: grid points per axis
    of the first fraction search. tol_px: golden-section tolerance of the fraction. rounds: axis sweeps.
    """
    m = check_masks(masks)
    y = np.asarray(intensities, dtype=np.float64)
    if y.shape != m.shape:
        raise ReconstructionInputError(f"intensities {y.shape} and masks {m.shape} must have the same shape (K, H, W).")
    if coarse < 2 or tol_px <= 0 or rounds < 1:
        raise ReconstructionInputError("coarse must be >= 2, tol_px > 0 and rounds >= 1.")
    h, w = m.shape[1:]
    ref = (h / 2.0, w / 2.0) if reference_px is None else (float(reference_px[0]), float(reference_px[1]))
    evaluations = 0
    cache: dict[tuple[float, float], tuple[float, np.ndarray]] = {}

    def evaluate(frac, x0=None):
        nonlocal evaluations
        key = (round(frac[0] % 1.0, 6), round(frac[1] % 1.0, 6))
        if key not in cache:
            evaluations += 1
            cache[key] = residual_at_offset(y, m, key, iterations=iterations, x0=x0, seed=seed)
        return cache[key]

    # 1. the fraction: coarse grid on the torus, independent starts
    grid = np.arange(coarse) / coarse
    best = min(((fr, fc) for fr in grid for fc in grid), key=lambda f: evaluate(f)[0])
    residual_designed = evaluate((0.0, 0.0))[0]
    # then golden section along each axis in turn, within one coarse cell either side, warm-started
    half = 1.0 / coarse
    frac = [best[0], best[1]]
    for _ in range(rounds):
        for axis in (0, 1):
            warm = evaluate(tuple(frac))[1]

            def along(t, axis=axis, warm=warm):
                f = list(frac)
                f[axis] = t
                return evaluate(tuple(f), x0=warm)[0]

            lo, hi = frac[axis] - half, frac[axis] + half
            a, b = hi - _GOLDEN * (hi - lo), lo + _GOLDEN * (hi - lo)
            fa, fb = along(a), along(b)
            while hi - lo > tol_px:
                if fa < fb:
                    hi, b, fb = b, a, fa
                    a = hi - _GOLDEN * (hi - lo)
                    fa = along(a)
                else:
                    lo, a, fa = a, b, fb
                    b = lo + _GOLDEN * (hi - lo)
                    fb = along(b)
            cands = [(evaluate(tuple(frac))[0], frac[axis]), (fa, a), (fb, b)]
            frac[axis] = min(cands)[1]
            half = max(tol_px * 4, half / 2)
    frac = (frac[0] % 1.0, frac[1] % 1.0)
    residual, x_frac = evaluate(frac)
    # 2. whole pixels from the position reference
    centroid = circular_centroid(np.abs(x_frac) ** 2)
    if reference_image is not None:
        r_img = np.abs(np.asarray(reference_image, dtype=np.complex128))
        if r_img.shape != (h, w):
            raise ReconstructionInputError(f"reference_image {r_img.shape} must have the grid shape {(h, w)}.")
        # corr[s] = sum_r ref(r) |x|(r - s): peaks at the shift that carries the reconstruction onto the reference
        corr = np.fft.ifft2(np.fft.fft2(r_img) * np.conj(np.fft.fft2(np.abs(x_frac)))).real
        peak = np.unravel_index(int(np.argmax(corr)), corr.shape)
        whole = (int(_signed(peak[0], h)), int(_signed(peak[1], w)))
        ref = circular_centroid(r_img**2)
    else:
        whole = (int(round(_signed(ref[0] - centroid[0], h))), int(round(_signed(ref[1] - centroid[1], w))))
    offset = (_signed(whole[0] + frac[0], h), _signed(whole[1] + frac[1], w))
    estimate = np.roll(x_frac, whole, axis=(0, 1))
    return RegistrationResult(offset_px=(float(offset[0]), float(offset[1])), fraction_px=(float(frac[0]), float(frac[1])),
                              whole_px=(whole[0] % h, whole[1] % w), residual=float(residual),
                              residual_designed=float(residual_designed), centroid_px=centroid, reference_px=ref,
                              evaluations=evaluations, estimate=estimate)
