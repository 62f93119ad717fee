"""Build the run's mask set from the [masks] table (or its description in a worker message)."""

from __future__ import annotations

from pathlib import Path

import numpy as np

from maskrun import reconstruct as rc


def make_masks(family: str, count: int, shape, seed: int = 0, levels: int = 8, path: str | Path | None = None) -> np.ndarray:
    """The (K, H, W) complex mask set. family: octanary | random_phase | quantized_phase | binary_amplitude | file | blank."""
    shape = tuple(int(s) for s in shape)
    if family == "octanary":
        return rc.octanary_masks(count, shape, seed=seed)
    if family == "random_phase":
        return rc.random_phase_masks(count, shape, seed=seed)
    if family == "quantized_phase":
        return rc.quantized_phase_masks(count, shape, levels=levels, seed=seed)
    if family == "binary_amplitude":
        return rc.binary_amplitude_masks(count, shape, seed=seed)
    if family == "blank":  # no modulator pattern: the plain far field
        return np.ones((count, *shape), dtype=np.complex128)
    if family == "file":
        if path is None:
            raise ValueError("masks family 'file' needs a path")
        masks = rc.load_masks(path)
        if masks.shape != (count, *shape):
            raise ValueError(f"{path}: masks have shape {masks.shape}, the config asks for {(count, *shape)}")
        return masks
    raise ValueError(f"unknown mask family {family!r}")


def masks_as_imposed(designed: np.ndarray, profile=None, offset_px=(0.0, 0.0)) -> np.ndarray:
    """The masks as they really act on the field: the designed ones quantized through the modulator's
    phase response (``profile``: a ``ModulatorProfile``, or None for an exact device), then displaced by
    the measured registration ``offset_px`` = (rows, cols) grid pixels (``[masks] offset_px``).

    These are what the run file stores and the reconstruction uses; the modulator is still given the
    designed masks (it quantizes them itself, through the same table)."""
    masks = np.asarray(designed)
    if profile is not None:
        masks = profile.impose(masks)
    if tuple(float(o) for o in offset_px) != (0.0, 0.0):
        from maskrun.reconstruct.masks import shift_masks

        masks = shift_masks(masks, offset_px)
    return masks
