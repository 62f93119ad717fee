"""Dose accounting: photons and energy per area delivered to the sample.

Constants are the exact SI values (SI Brochure, 9th edition, 2019, table 1):
h = 6.626 070 15e-34 J s, c = 299 792 458 m/s, e = 1.602 176 634e-19 C.

Chain from camera counts to dose on the sample:

    detected photo-electrons = (sum of DN - n_pixels * offset_dn) / gain_dn_per_e
    photons at the camera    = photo-electrons / quantum_efficiency
    photons on the sample    = photons at the camera / optical_transmission
    energy per area [J/m^2]  = photons on the sample * h c / lambda / illuminated_area_m2

``optical_transmission`` is the fraction of the photons leaving the sample that
reach the camera (modulator, lenses, apertures), 1 by default.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np

__all__ = [
    "PLANCK_J_S",
    "SPEED_OF_LIGHT_M_PER_S",
    "ELEMENTARY_CHARGE_C",
    "photon_energy_j",
    "photon_energy_ev",
    "photon_rate_per_s",
    "dn_to_photons",
    "frame_photons",
    "DoseLimitExceeded",
    "DoseTotals",
    "DoseLedger",
]

#: Planck constant, exact (SI Brochure 9th ed., 2019).
PLANCK_J_S = 6.62607015e-34
#: Speed of light in vacuum, exact (SI Brochure 9th ed., 2019).
SPEED_OF_LIGHT_M_PER_S = 299792458.0
#: Elementary charge, exact (SI Brochure 9th ed., 2019); 1 eV = e J.
ELEMENTARY_CHARGE_C = 1.602176634e-19


def _positive(name: str, value: float) -> float:
    value = float(value)
    if not (math.isfinite(value) and value > 0):
        raise ValueError(f"{name} must be a finite number > 0, got {value}")
    return value


def photon_energy_j(wavelength_m: float) -> float:
    """Energy of one photon, E = h c / lambda [J], wavelength in metres (vacuum)."""
    return PLANCK_J_S * SPEED_OF_LIGHT_M_PER_S / _positive("wavelength_m", wavelength_m)


def photon_energy_ev(wavelength_m: float) -> float:
    """Energy of one photon in electronvolts, E / e."""
    return photon_energy_j(wavelength_m) / ELEMENTARY_CHARGE_C


def photon_rate_per_s(power_w: float, wavelength_m: float) -> float:
    """Photons per second carried by a beam of ``power_w`` watts: P / (h c / lambda)."""
    power_w = float(power_w)
    if not (math.isfinite(power_w) and power_w >= 0):
        raise ValueError(f"power_w must be a finite number >= 0 watts, got {power_w}")
    return power_w / photon_energy_j(wavelength_m)


def _camera_constants(profile, gain_dn_per_e, offset_dn, quantum_efficiency):
    if profile is not None:
        gain = profile.gain_dn_per_e if gain_dn_per_e is None else gain_dn_per_e
        offset = profile.offset_dn if offset_dn is None else offset_dn
        qe = profile.quantum_efficiency if quantum_efficiency is None else quantum_efficiency
    else:
        gain, offset, qe = gain_dn_per_e, offset_dn, quantum_efficiency
    if gain is None:
        raise ValueError("give a camera profile or gain_dn_per_e to convert DN to photons")
    gain = _positive("gain_dn_per_e", gain)
    offset = 0.0 if offset is None else float(offset)
    if qe is None:
        raise ValueError(
            "the quantum efficiency is unknown (the profile was calibrated without known photons): "
            "give quantum_efficiency at the configured wavelength (camera data sheet)"
        )
    qe = float(qe)
    if not (0 < qe <= 1):
        raise ValueError(f"quantum_efficiency must be in (0, 1], got {qe}")
    return gain, offset, qe


def dn_to_photons(
    dn_sum: float,
    profile: Any = None,
    *,
    n_pixels: int,
    gain_dn_per_e: float | None = None,
    offset_dn: float | None = None,
    quantum_efficiency: float | None = None,
) -> float:
    """Incident photons at the camera from a sum of raw DN over ``n_pixels`` pixels.

    photons = (dn_sum - n_pixels * offset_dn) / (gain_dn_per_e * quantum_efficiency),
    clipped at 0. Constants come from ``profile`` (a CameraProfile), each overridable by
    keyword (e.g. the QE at the configured wavelength). Pass offset_dn=0 for dark-subtracted sums.
    """
    gain, offset, qe = _camera_constants(profile, gain_dn_per_e, offset_dn, quantum_efficiency)
    if int(n_pixels) < 0:
        raise ValueError(f"n_pixels must be >= 0, got {n_pixels}")
    electrons = (float(dn_sum) - int(n_pixels) * offset) / gain
    return max(electrons, 0.0) / qe


def frame_photons(
    pixels: np.ndarray,
    profile: Any = None,
    *,
    dark_dn: np.ndarray | float | None = None,
    gain_dn_per_e: float | None = None,
    quantum_efficiency: float | None = None,
) -> float:
    """Incident photons at the camera in one frame. ``dark_dn`` (a dark frame or a level) is
    subtracted; without it the profile's offset is used."""
    total = float(np.sum(pixels, dtype=np.float64))
    if dark_dn is None:
        return dn_to_photons(total, profile, n_pixels=pixels.size, gain_dn_per_e=gain_dn_per_e,
                             quantum_efficiency=quantum_efficiency)
    dark_total = float(np.sum(np.broadcast_to(dark_dn, pixels.shape), dtype=np.float64))
    return dn_to_photons(total - dark_total, profile, n_pixels=pixels.size, gain_dn_per_e=gain_dn_per_e,
                         offset_dn=0.0, quantum_efficiency=quantum_efficiency)


class DoseLimitExceeded(RuntimeError):
    """The cumulative dose passed a configured limit. The frame that crossed it was recorded.

    Attributes: position, quantity ('energy per area' or 'photons'), value, limit, unit, totals.
    """

    def __init__(self, position: str, quantity: str, value: float, limit: float, unit: str, totals: "DoseTotals"):
        self.position, self.quantity, self.value, self.limit, self.unit = position, quantity, value, limit, unit
        self.totals = totals
        super().__init__(
            f"dose limit reached at sample position {position!r}: cumulative {quantity} {value:.4g} {unit} "
            f"exceeds the limit {limit:.4g} {unit} ({100 * value / limit:.0f} %). The run stops here; frames "
            "taken so far are kept. Lower the exposure or the laser power, take fewer passes, move to a fresh "
            "position, or raise the limit in the config if the sample tolerates it"
        )


@dataclass
class DoseTotals:
    """Cumulative dose: photons and energy per area on the sample, number of frames."""

    photons: float = 0.0
    energy_per_area_j_per_m2: float = 0.0
    frames: int = 0

    def as_dict(self) -> dict[str, float]:
        return {"photons": self.photons, "energy_per_area_j_per_m2": self.energy_per_area_j_per_m2,
                "frames": self.frames}


@dataclass
class DoseLedger:
    """Cumulative dose per run and per sample position, with optional limits.

    illuminated_area_m2: beam area on the sample [m^2].
    wavelength_m: laser wavelength [m].
    max_energy_per_area_j_per_m2, max_photons: limits (None = no limit), applied to every
        position's cumulative dose (radiation damage is local); ``limit_scope='run'`` applies
        them to the run total instead.
    optical_transmission: fraction of the sample's photons that reach the camera (0, 1].

    ``add(photons_at_camera, position=...)`` records one frame and raises DoseLimitExceeded
    once a limit is passed (the dose was delivered, so it is recorded first).
    ``remaining_photons(position)`` says how many more camera photons fit under the limits.
    """

    illuminated_area_m2: float
    wavelength_m: float
    max_energy_per_area_j_per_m2: float | None = None
    max_photons: float | None = None
    optical_transmission: float = 1.0
    limit_scope: str = "position"
    run: DoseTotals = field(default_factory=DoseTotals)
    positions: dict[str, DoseTotals] = field(default_factory=dict)

    def __post_init__(self) -> None:
        _positive("illuminated_area_m2", self.illuminated_area_m2)
        self._photon_energy_j = photon_energy_j(self.wavelength_m)
        for name in ("max_energy_per_area_j_per_m2", "max_photons"):
            value = getattr(self, name)
            if value is not None:
                _positive(name, value)
        t = float(self.optical_transmission)
        if not (0 < t <= 1):
            raise ValueError(f"optical_transmission must be in (0, 1], got {t}")
        if self.limit_scope not in ("position", "run"):
            raise ValueError(f"limit_scope must be 'position' or 'run', got {self.limit_scope!r}")

    @property
    def photon_energy_j(self) -> float:
        return self._photon_energy_j

    def energy_per_area(self, photons_on_sample: float) -> float:
        """Energy per area [J/m^2] of ``photons_on_sample`` spread over the illuminated area."""
        return photons_on_sample * self._photon_energy_j / self.illuminated_area_m2

    def photons_on_sample(self, photons_at_camera: float) -> float:
        return float(photons_at_camera) / self.optical_transmission

    def _limited_totals(self, position: str) -> DoseTotals:
        if self.limit_scope == "run":
            return self.run
        return self.positions.get(position, DoseTotals())

    def add(self, frame_photons: float, position: str = "default") -> DoseTotals:
        """Record one frame of ``frame_photons`` incident photons at the camera at ``position``.

        Returns the position's new totals; raises DoseLimitExceeded if a limit is now passed.
        """
        photons = float(frame_photons)
        if not (math.isfinite(photons) and photons >= 0):
            raise ValueError(f"frame_photons must be a finite number >= 0, got {frame_photons}")
        on_sample = self.photons_on_sample(photons)
        energy = self.energy_per_area(on_sample)
        pos = self.positions.setdefault(str(position), DoseTotals())
        for totals in (pos, self.run):
            totals.photons += on_sample
            totals.energy_per_area_j_per_m2 += energy
            totals.frames += 1
        limited = self._limited_totals(str(position))
        where = str(position) if self.limit_scope == "position" else "(whole run)"
        if self.max_energy_per_area_j_per_m2 is not None and \
                limited.energy_per_area_j_per_m2 > self.max_energy_per_area_j_per_m2:
            raise DoseLimitExceeded(where, "energy per area", limited.energy_per_area_j_per_m2,
                                    self.max_energy_per_area_j_per_m2, "J/m^2", limited)
        if self.max_photons is not None and limited.photons > self.max_photons:
            raise DoseLimitExceeded(where, "photons", limited.photons, self.max_photons, "photons", limited)
        return pos

    def remaining_photons(self, position: str = "default") -> float:
        """Incident photons at the camera that still fit under the limits at ``position`` (inf if none)."""
        limited = self._limited_totals(str(position))
        left_on_sample = math.inf
        if self.max_photons is not None:
            left_on_sample = min(left_on_sample, self.max_photons - limited.photons)
        if self.max_energy_per_area_j_per_m2 is not None:
            left_energy = self.max_energy_per_area_j_per_m2 - limited.energy_per_area_j_per_m2
            left_on_sample = min(left_on_sample, left_energy * self.illuminated_area_m2 / self._photon_energy_j)
        return max(left_on_sample, 0.0) * self.optical_transmission

    def would_exceed(self, frame_photons: float, position: str = "default") -> bool:
        """True if a frame of ``frame_photons`` camera photons would pass a limit (check before exposing)."""
        return float(frame_photons) > self.remaining_photons(position)

    def as_dict(self) -> dict[str, Any]:
        """Plain summary for HDF5 attributes or a status reply."""
        return {
            "wavelength_m": self.wavelength_m,
            "illuminated_area_m2": self.illuminated_area_m2,
            "photon_energy_j": self._photon_energy_j,
            "optical_transmission": self.optical_transmission,
            "max_energy_per_area_j_per_m2": self.max_energy_per_area_j_per_m2,
            "max_photons": self.max_photons,
            "limit_scope": self.limit_scope,
            "run": self.run.as_dict(),
            "positions": {k: v.as_dict() for k, v in self.positions.items()},
        }
