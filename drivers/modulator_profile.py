"""A modulator's phase response: grey level -> phase at one wavelength, as a JSON profile.

A liquid-crystal phase SLM driven as a display turns an 8-bit grey level into a phase delay
through a response curve that depends on the wavelength; 2π is usually reached near the top of
the grey range, and the curve is rarely a straight line (common practice, no source). The
``display`` modulator driver turns phase masks into grey levels through this table, the mask
builder quantizes the designed masks through it (so the run file stores the masks as really
imposed), and the response-measurement verb writes it.

File format (JSON, ``format = "maskrun-modulator-profile"``, ``format_version = 1``)::

    {
      "format": "maskrun-modulator-profile", "format_version": 1,
      "wavelength_m": 6.328e-07,
      "grey_levels": [0, 1, ..., 255],          # ascending, integers the device accepts
      "phase_rad": [0.0, 0.024, ...],           # unwrapped phase delay of each grey level,
                                                 # relative to grey_levels[0] (so phase_rad[0] = 0)
      "measured": true,                          # false: nominal (data-sheet / linear) table
      "method": "...", "created": "ISO 8601 time", "notes": "..."
    }
"""
from __future__ import annotations

import json
import os
from datetime import datetime, timezone
from pathlib import Path

import numpy as np
from pydantic import BaseModel, ConfigDict, Field, ValidationError, model_validator

__all__ = ["ModulatorProfile", "ModulatorProfileError", "linear_profile", "PROFILE_FORMAT"]

PROFILE_FORMAT = "maskrun-modulator-profile"


class ModulatorProfileError(ValueError):
    """A modulator profile file that cannot be used; the message names the file and the fix."""


class ModulatorProfile(BaseModel):
    """Grey level -> unwrapped phase (radians) at ``wavelength_m``."""

    model_config = ConfigDict(extra="forbid", frozen=True)

    format: str = PROFILE_FORMAT
    format_version: int = 1
    wavelength_m: float = Field(gt=0, description="wavelength the table holds for, metres")
    grey_levels: list[int] = Field(min_length=2, description="ascending grey levels")
    phase_rad: list[float] = Field(min_length=2, description="unwrapped phase of each grey level, radians")
    measured: bool = False
    method: str = ""
    created: str = ""
    notes: str = ""

    @model_validator(mode="after")
    def _consistent(self):
        if self.format != PROFILE_FORMAT:
            raise ValueError(f"format must be {PROFILE_FORMAT!r}, got {self.format!r}")
        if self.format_version != 1:
            raise ValueError(f"format_version {self.format_version} is not known (this maskrun reads 1)")
        if len(self.grey_levels) != len(self.phase_rad):
            raise ValueError(f"grey_levels ({len(self.grey_levels)}) and phase_rad ({len(self.phase_rad)}) "
                             "must have the same length")
        g = np.asarray(self.grey_levels)
        if np.any(np.diff(g) <= 0):
            raise ValueError("grey_levels must be strictly ascending")
        if g[0] < 0:
            raise ValueError("grey_levels must be >= 0")
        if not np.all(np.isfinite(self.phase_rad)):
            raise ValueError("phase_rad must be finite numbers")
        return self

    # ------------------------------------------------------------ mapping
    @property
    def grey(self) -> np.ndarray:
        return np.asarray(self.grey_levels, dtype=np.int64)

    @property
    def phase(self) -> np.ndarray:
        return np.asarray(self.phase_rad, dtype=np.float64)

    @property
    def phase_range_rad(self) -> float:
        """Largest phase span the table reaches (max - min of phase_rad)."""
        p = self.phase
        return float(p.max() - p.min())

    def phase_of_grey(self, grey) -> np.ndarray:
        """Phase (radians, float64) of each grey level in ``grey`` (levels must be in the table)."""
        g = np.asarray(grey, dtype=np.int64)
        idx = np.searchsorted(self.grey, g)
        idx = np.clip(idx, 0, len(self.grey_levels) - 1)
        if not np.array_equal(self.grey[idx], g):
            raise ModulatorProfileError("a grey level is not in the modulator profile's table")
        return self.phase[idx]

    def grey_for_phase(self, phase_rad) -> np.ndarray:
        """The table's grey level whose phase is nearest to ``phase_rad`` modulo 2π (int64 array).

        Phases the table cannot reach are imposed by the nearest reachable phase (on the circle).
        Done with one lookup table over 4096 phase bins, so it costs O(pixels), no per-pixel loop.
        """
        table_phase = np.mod(self.phase, 2 * np.pi)
        bins = 4096
        centres = (np.arange(bins) + 0.5) * (2 * np.pi / bins)
        d = np.abs(np.angle(np.exp(1j * (centres[:, None] - table_phase[None, :]))))
        best = self.grey[np.argmin(d, axis=1)]
        p = np.mod(np.asarray(phase_rad, dtype=np.float64), 2 * np.pi)
        b = np.minimum((p * (bins / (2 * np.pi))).astype(np.int64), bins - 1)
        return best[b]

    def imposed_phase(self, phase_rad) -> np.ndarray:
        """The phase the device really imposes when asked for ``phase_rad`` (through the table)."""
        return self.phase_of_grey(self.grey_for_phase(phase_rad))

    def impose(self, masks) -> np.ndarray:
        """The masks as the device really imposes them through this table (complex128, same shape):
        each pixel's phase is replaced by the phase of the grey level it is quantized to
        (``imposed_phase``); the amplitude is kept (an amplitude mask in front of a phase SLM)."""
        m = np.asarray(masks)
        return np.abs(m) * np.exp(1j * self.imposed_phase(np.angle(m)))

    # ------------------------------------------------------------ files
    @classmethod
    def load(cls, path: str | os.PathLike) -> "ModulatorProfile":
        path = Path(path)
        try:
            data = json.loads(path.read_text())
        except OSError as exc:
            raise ModulatorProfileError(f"{path}: cannot read the modulator profile ({exc.strerror or exc})") from None
        except json.JSONDecodeError as exc:
            raise ModulatorProfileError(f"{path}: not JSON (line {exc.lineno}: {exc.msg})") from None
        try:
            return cls.model_validate(data)
        except ValidationError as exc:
            first = exc.errors()[0]
            where = ".".join(str(p) for p in first["loc"]) or "(top level)"
            raise ModulatorProfileError(f"{path}: {where}: {first['msg']}") from None

    def save(self, path: str | os.PathLike) -> Path:
        path = Path(path)
        data = self.model_dump()
        if not data["created"]:
            data["created"] = datetime.now(timezone.utc).isoformat(timespec="seconds")
        tmp = path.with_name(path.name + ".tmp")
        tmp.write_text(json.dumps(data, indent=1) + "\n")
        os.replace(tmp, path)
        return path


def linear_profile(grey_levels_per_2pi: float, wavelength_m: float, levels: int = 256) -> ModulatorProfile:
    """The nominal response: phase = 2π · grey / grey_levels_per_2pi for grey = 0 .. levels-1."""
    if not grey_levels_per_2pi > 0:
        raise ModulatorProfileError(f"grey_levels_per_2pi must be > 0, got {grey_levels_per_2pi!r}")
    g = np.arange(int(levels))
    return ModulatorProfile(wavelength_m=float(wavelength_m), grey_levels=g.tolist(),
                            phase_rad=(2 * np.pi * g / float(grey_levels_per_2pi)).tolist(),
                            measured=False, method=f"linear, {grey_levels_per_2pi:g} grey levels per 2 pi")
