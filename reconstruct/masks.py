"""Mask families: the known patterns a modulator imposes on the field.

Every generator returns a complex128 array of shape (count, H, W) (cast with
``.astype(numpy.complex64)`` for the fast path); the same seed gives the same
masks. ``mask_weight`` gives sum_k |m_k|^2, the per-pixel illumination that
the solvers divide by.

Families and the hardware they model:

* ``octanary_masks`` - the coded-diffraction masks of Candès, Li and
  Soltanolkotabi (2015): phase steps of pi/2 with two amplitude levels. A
  phase plate plus an amplitude mask, or a complex-modulating SLM pair.
* ``random_phase_masks`` - uniform continuous phase: an ideal phase-only SLM
  or a diffuser of known profile.
* ``quantized_phase_masks`` - an N-level phase-only SLM driven through a
  lookup table (grey level -> phase in radians); ``lut_rad`` lets the
  measured LUT (not the nominal one) be used.
* ``binary_amplitude_masks`` - a digital micromirror device (DMD): each pixel
  on (1) or off (0). Pixels off in every mask cannot be recovered; the
  generator guarantees every pixel is on in at least one mask.
* ``load_masks`` - masks measured or designed elsewhere, from a .npy file or
  an .npz archive (key ``masks`` or its only array).
"""
from __future__ import annotations

import os

import numpy as np

from .validation import ReconstructionInputError, check_masks

__all__ = [
    "octanary_masks",
    "random_phase_masks",
    "quantized_phase_masks",
    "binary_amplitude_masks",
    "load_masks",
    "mask_weight",
    "shift_masks",
    "OCTANARY_PHASES",
    "OCTANARY_AMPLITUDES",
    "OCTANARY_AMPLITUDE_PROBABILITIES",
]

# Candès, Li, Soltanolkotabi, "Phase retrieval from coded diffraction patterns",
# Appl. Comput. Harmon. Anal. 39 (2015): d = b1 * b2.
OCTANARY_PHASES = np.array([1, -1, 1j, -1j], dtype=np.complex128)
OCTANARY_AMPLITUDES = np.array([np.sqrt(2) / 2, np.sqrt(3)])
OCTANARY_AMPLITUDE_PROBABILITIES = np.array([0.8, 0.2])


def _shape2(shape) -> tuple[int, int]:
    if isinstance(shape, (int, np.integer)):
        shape = (int(shape), int(shape))
    shape = tuple(int(s) for s in shape)
    if len(shape) != 2 or min(shape) < 2:
        raise ReconstructionInputError(f"shape must be (H, W) with H, W >= 2; got {shape}.")
    return shape


def _count(count) -> int:
    if int(count) != count or int(count) < 1:
        raise ReconstructionInputError(f"count must be a positive integer number of masks; got {count}.")
    return int(count)


def octanary_masks(count: int, shape, seed: int = 0) -> np.ndarray:
    """Octanary coded-diffraction masks (count, H, W), complex128.

    Entries d = b1*b2 with b1 uniform on {1, -1, i, -i} and b2 = sqrt(2)/2
    with probability 4/5, sqrt(3) with probability 1/5, all independent
    (E|d|^2 = 1). Same seed, same masks.
    """
    k = _count(count)
    h, w = _shape2(shape)
    rng = np.random.default_rng(seed)
    b1 = OCTANARY_PHASES[rng.integers(0, 4, size=(k, h, w))]
    b2 = np.where(rng.random((k, h, w)) < OCTANARY_AMPLITUDE_PROBABILITIES[0],
                  OCTANARY_AMPLITUDES[0], OCTANARY_AMPLITUDES[1])
    return b1 * b2


def random_phase_masks(count: int, shape, seed: int = 0) -> np.ndarray:
    """Unit-modulus masks exp(i*phi), phi uniform on [0, 2*pi): an ideal phase SLM."""
    k = _count(count)
    h, w = _shape2(shape)
    rng = np.random.default_rng(seed)
    return np.exp(2j * np.pi * rng.random((k, h, w)))


def quantized_phase_masks(count: int, shape, levels: int = 8, seed: int = 0, lut_rad=None) -> np.ndarray:
    """Phase-only masks from an N-level SLM: grey level g uniform on 0..levels-1.

    The phase of level g is ``lut_rad[g]`` (radians) if a lookup table is
    given, else the nominal 2*pi*g/levels.
    """
    k = _count(count)
    h, w = _shape2(shape)
    if int(levels) != levels or levels < 2:
        raise ReconstructionInputError(f"levels must be an integer >= 2; got {levels}.")
    levels = int(levels)
    if lut_rad is None:
        lut = 2 * np.pi * np.arange(levels) / levels
    else:
        lut = np.asarray(lut_rad, dtype=np.float64)
        if lut.shape != (levels,) or not np.all(np.isfinite(lut)):
            raise ReconstructionInputError(
                f"lut_rad must hold {levels} finite phases in radians (one per grey level); got shape {lut.shape}."
            )
    rng = np.random.default_rng(seed)
    grey = rng.integers(0, levels, size=(k, h, w))
    return np.exp(1j * lut[grey])


def binary_amplitude_masks(count: int, shape, on_fraction: float = 0.5, seed: int = 0) -> np.ndarray:
    """DMD-style 0/1 amplitude masks; each pixel is switched on in at least one mask.

    Note: with real non-negative masks the object is determined only up to
    the usual ambiguities unless K is large and the object has a support or
    non-negativity constraint; phase-coding families recover far better.
    """
    k = _count(count)
    h, w = _shape2(shape)
    if not 0 < on_fraction <= 1:
        raise ReconstructionInputError(f"on_fraction must be in (0, 1]; got {on_fraction}.")
    rng = np.random.default_rng(seed)
    m = (rng.random((k, h, w)) < on_fraction).astype(np.float64)
    never = m.sum(axis=0) == 0
    if never.any():
        which = rng.integers(0, k, size=int(never.sum()))
        yy, xx = np.nonzero(never)
        m[which, yy, xx] = 1.0
    return m.astype(np.complex128)


def load_masks(path: str | os.PathLike, key: str | None = None) -> np.ndarray:
    """Load a mask family from a .npy file or an .npz archive and validate it.

    For .npz: ``key`` if given, else the array named ``masks``, else the only
    array in the archive. Pickled objects are refused.
    """
    p = os.fspath(path)
    if not os.path.exists(p):
        raise ReconstructionInputError(f"mask file {p!r} does not exist.")
    try:
        data = np.load(p, allow_pickle=False)
    except Exception as exc:  # noqa: BLE001 - re-raised with context
        raise ReconstructionInputError(f"cannot read mask file {p!r} as .npy/.npz: {exc}") from exc
    if isinstance(data, np.lib.npyio.NpzFile):
        with data:
            names = list(data.files)
            if key is None:
                key = "masks" if "masks" in names else (names[0] if len(names) == 1 else None)
            if key is None or key not in names:
                raise ReconstructionInputError(
                    f"mask archive {p!r} holds {names}; pass key= to choose one (or store it as 'masks')."
                )
            arr = np.array(data[key])
    else:
        arr = np.asarray(data)
    return check_masks(arr, warn_k1=False)


def mask_weight(masks) -> np.ndarray:
    """Per-pixel illumination sum_k |m_k|^2 (H, W), float64."""
    m = np.asarray(masks)
    return np.sum(m.real.astype(np.float64) ** 2 + m.imag.astype(np.float64) ** 2, axis=0)


def shift_masks(masks, offset_px) -> np.ndarray:
    """The masks as they land on the field when the modulator image is displaced by
    ``offset_px = (rows, cols)`` grid pixels (positive: towards higher indices).

    Periodic, and linear between pixels: a field pixel that straddles two modulator pixels sees
    each in proportion to its overlap (the area weighting of box-shaped pixels). Whole-pixel
    offsets are exact rolls. Returns complex128 of the input's shape (K, H, W).
    """
    m = np.asarray(masks)
    if m.ndim != 3:
        raise ReconstructionInputError(f"masks must be (K, H, W); got shape {m.shape}.")
    offset = tuple(float(o) for o in offset_px)
    if len(offset) != 2 or not all(np.isfinite(offset)):
        raise ReconstructionInputError(f"offset_px must be two finite numbers (rows, cols); got {offset_px!r}.")
    out = m.astype(np.complex128, copy=True)
    for axis, o in zip((1, 2), offset):
        whole = int(np.floor(o))
        frac = o - whole
        rolled = np.roll(out, whole, axis=axis)
        if frac > 0.0:
            out = (1.0 - frac) * rolled + frac * np.roll(rolled, 1, axis=axis)
        else:
            out = rolled
    return out
