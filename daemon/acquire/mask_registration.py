"""Check where the masks land on the field before a run: take one frame set (or read one from a run file),
estimate the offset (``reconstruct.registration``), and write it to ``[masks] offset_px`` on request.

The estimate is always made against the masks as designed and quantized through the modulator profile,
without any offset already in the config, so it is absolute: applying it replaces ``offset_px``."""

from __future__ import annotations

import os
import re
from pathlib import Path

import numpy as np

from maskrun.reconstruct.registration import RegistrationResult, estimate_mask_offset

from maskrun.daemon.acquire.bench import Bench
from maskrun.daemon.acquire.bench_frames import frame_after, grab_frame, open_shutter_checked, wait_in_place
from maskrun.daemon.config import BenchConfig, ConfigError, parse_config
from maskrun.daemon.masks import make_masks, masks_as_imposed


def registration_masks(cfg: BenchConfig, modulator_profile=None) -> np.ndarray:
    """The masks the estimate is measured against: designed, through the profile, no offset."""
    designed = make_masks(cfg.masks.family, cfg.masks.count, tuple(cfg.grid.shape), cfg.masks.seed, cfg.masks.levels,
                          cfg.config_dir / cfg.masks.path if cfg.masks.path else None)
    return masks_as_imposed(designed, modulator_profile)


def take_frame_set(bench: Bench, exposure_s: float | None = None, dark_frames: int = 2) -> np.ndarray:
    """One frame set (K, H, W) float64 electrons, grid convention, dark-subtracted: dark frames with the
    shutter closed, then masks 0..K-1 with it open (closed again in a ``finally``)."""
    exposure_s = float(exposure_s or bench.config.camera.exposure_s)
    bench.camera.exposure_s = exposure_s
    k = bench.masks.shape[0]
    bench.safety.close_shutter()
    bench.modulator.show(0)
    wait_in_place(bench)
    darks = [grab_frame(bench, exposure_s) for _ in range(max(1, dark_frames))]
    dark = np.mean(darks, axis=0) if dark_frames > 0 else bench.response.offset_dn
    out = np.empty((k, *bench.grid_shape), dtype=np.float64)
    try:
        open_shutter_checked(bench)
        for i in range(k):
            pixels = frame_after(bench, lambda i=i: bench.modulator.show(i), exposure_s)
            e = bench.response.electrons(pixels, dark, getattr(bench, "flat_field", None))
            out[i] = np.maximum(np.fft.ifftshift(e.astype(np.float64)), 0.0)
    finally:
        bench.safety.close_shutter()
    return out


def frame_set_from_run(path: str | os.PathLike, set_number: int = 0) -> np.ndarray:
    """Complete frame set number ``set_number`` (0 = first) of a run file, as live reconstruction sees it."""
    from maskrun.daemon.offline.reprocess import live_frame_sets

    for i, y in enumerate(live_frame_sets(path)):
        if i == set_number:
            return np.asarray(y, dtype=np.float64)
    raise ValueError(f"{path}: has no complete frame set number {set_number} (counting from 0)")


def register(cfg: BenchConfig, intensities: np.ndarray, modulator_profile=None, **kw) -> RegistrationResult:
    masks = registration_masks(cfg, modulator_profile)
    if intensities.shape != masks.shape:
        raise ValueError(f"the frame set is {intensities.shape} but the config's masks are {masks.shape}: "
                         "use the config the frames were taken with")
    return estimate_mask_offset(intensities, masks, **kw)


_TABLE = re.compile(r"^\s*\[([^\[\]]+)\]\s*(#.*)?$")
_OFFSET = re.compile(r"^\s*offset_px\s*=.*$")


def apply_offset(config_path: str | os.PathLike, offset_px) -> Path:
    """Write ``offset_px = [rows, cols]`` into the ``[masks]`` table of the config file (replacing one that is
    there; adding the table if there is none). The old file is kept as CONFIG.bak; the new text must still
    load (ConfigError otherwise, and nothing is changed)."""
    path = Path(config_path)
    text = path.read_text(encoding="utf-8")
    line = f"offset_px = [{float(offset_px[0]):.3f}, {float(offset_px[1]):.3f}]   # from 'maskrun register-masks'"
    lines = text.splitlines()
    start = next((i for i, l in enumerate(lines) if (m := _TABLE.match(l)) and m.group(1).strip() == "masks"), None)
    if start is None:
        lines += ["", "[masks]", line]
    else:
        end = next((i for i in range(start + 1, len(lines)) if _TABLE.match(lines[i]) or lines[i].lstrip().startswith("[[")),
                   len(lines))
        hit = next((i for i in range(start + 1, end) if _OFFSET.match(lines[i])), None)
        if hit is None:
            lines.insert(start + 1, line)
        else:
            lines[hit] = line
    new = "\n".join(lines) + "\n"
    cfg = parse_config(new, str(path))  # ConfigError: the edit did not give a valid config
    if tuple(cfg.masks.offset_px) != (round(float(offset_px[0]), 3), round(float(offset_px[1]), 3)):
        raise ConfigError(str(path), [("masks.offset_px", "could not be written (unusual layout of [masks]); "
                                       f"set it by hand: {line}")])
    backup = path.with_name(path.name + ".bak")
    backup.write_text(text, encoding="utf-8")
    tmp = path.with_name(path.name + ".tmp")
    tmp.write_text(new, encoding="utf-8")
    os.replace(tmp, path)
    return backup
