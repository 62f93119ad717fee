"""Dose accounting: photons and energy per area delivered to the sample.

Constants are the exact SI values (SI Brochure, 9th edition, 2019, table 1):
h = 6.626 070 15e-34 J s, c = 299 792 458 m/s, e = 1.602 176 634e-19 C.

Chain from camera counts to dose on the sample:

    detected photo-electrons = (sum of DN - n_pixels * offset_dn) / gain_dn_per_e
    photons at the camera    = photo-electrons / quantum_efficiency
    photons on the sample    = photons at the camera / (optical_transmission * mask_transmission)
    energy [J]               = photons on the sample * h c / lambda
    energy per area [J/m^2]  = energy / illuminated_area_m2   (1 J/m^2 = 1e-4 J/cm^2, the trade's unit)

``optical_transmission`` is the fraction of the photons leaving the sample that
reach the camera through the optics (lenses, apertures, filters), 1 by default.
``mask_transmission`` is the masks' mean intensity transmission mean(|m|^2)
(capped at 1: a passive modulator does not amplify) when the modulator sits
between the sample and the camera, and 1 when it sits before the sample (then the
sample sees the light the masks let through, and so does the camera). Without an
illuminated area the ledger counts photons and joules only: no energy per area
is made up.
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
    "J_PER_M2_IN_J_PER_CM2",
    "MODULATOR_POSITIONS",
    "mask_mean_transmission",
]

#: 1 J/m^2 = 1e-4 J/cm^2.
J_PER_M2_IN_J_PER_CM2 = 1e-4
#: Where the modulator sits: before the sample, or between the sample and the camera.
MODULATOR_POSITIONS = ("before_sample", "after_sample")

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


def mask_mean_transmission(masks: np.ndarray) -> float:
    """Mean intensity transmission of a mask set, mean(|m|^2) over masks and pixels, capped at 1."""
    m = np.asarray(masks)
    if m.size == 0:
        raise ValueError("the mask set is empty")
    t = float(np.mean(m.real.astype(np.float64) ** 2 + m.imag.astype(np.float64) ** 2))
    if not (math.isfinite(t) and t > 0):
        raise ValueError(f"the masks' mean transmission must be > 0, got {t}")
    return min(t, 1.0)


class DoseLimitExceeded(RuntimeError):
    """The cumulative dose passed a configured limit. The frame that crossed it was recorded.

    Attributes: position, quantity ('energy per area' or 'photons'), value, limit, unit, totals.
    """

    def __init__(self, position: str, quantity: str, value: float, limit: float, unit: str, totals: "DoseTotals"):
        self.position, self.quantity, self.value, self.limit, self.unit = position, quantity, value, limit, unit
        self.totals = totals
        extra = ""
        if unit == "J/m^2":
            c = J_PER_M2_IN_J_PER_CM2
            extra = f"; {value * c:.4g} J/cm^2 against {limit * c:.4g} J/cm^2"
        super().__init__(
            f"dose limit reached at sample position {position!r}: cumulative {quantity} {value:.4g} {unit} "
            f"exceeds the limit {limit:.4g} {unit} ({100 * value / limit:.0f} %{extra}). The run stops here; frames "
            "taken so far are kept. Lower the exposure or the laser power, take fewer passes, move to a fresh "
            "position, or raise the limit in the config if the sample tolerates it"
        )


@dataclass
class DoseTotals:
    """Cumulative dose: photons and energy on the sample, energy per area (None without an area), frames."""

    photons: float = 0.0
    energy_j: float = 0.0
    energy_per_area_j_per_m2: float | None = 0.0
    frames: int = 0

    @property
    def fluence_j_per_cm2(self) -> float | None:
        """Energy per area in J/cm^2 (None without an illuminated area)."""
        e = self.energy_per_area_j_per_m2
        return None if e is None else e * J_PER_M2_IN_J_PER_CM2

    def describe(self) -> str:
        """'N photons, E J' plus the energy per area in J/m^2 and J/cm^2 when the area is known."""
        text = f"{self.photons:.4g} photons, {self.energy_j:.4g} J on the sample"
        if self.energy_per_area_j_per_m2 is not None:
            text += f", {self.energy_per_area_j_per_m2:.4g} J/m^2 ({self.fluence_j_per_cm2:.4g} J/cm^2)"
        else:
            text += " (no illuminated_area_m2 in the config: no energy per area)"
        return text

    def as_dict(self) -> dict[str, float | None]:
        return {"photons": self.photons, "energy_j": self.energy_j,
                "energy_per_area_j_per_m2": self.energy_per_area_j_per_m2,
                "fluence_j_per_cm2": self.fluence_j_per_cm2, "frames": self.frames}


@dataclass
class DoseLedger:
    """Cumulative dose per run and per sample position, with optional limits.

    wavelength_m: source wavelength [m].
    illuminated_area_m2: beam area on the sample [m^2]; None: photons and joules only.
    max_energy_per_area_j_per_m2, max_photons: limits (None = no limit), applied to every
        position's cumulative dose (radiation damage is local); ``limit_scope='run'`` applies
        them to the run total instead. A limit per area needs the area.
    optical_transmission: fraction of the sample's photons that reach the camera through the optics (0, 1].
    modulator_position: 'after_sample' (between sample and camera: the masks' transmission is
        divided out too) or 'before_sample'.
    mask_transmission: the masks' mean intensity transmission (``mask_mean_transmission``), (0, 1].

    ``add(photons_at_camera, position=...)`` records one frame and raises DoseLimitExceeded
    once a limit is passed (the dose was delivered, so it is recorded first).
    ``remaining_photons(position)`` says how many more camera photons fit under the limits.
    """

    wavelength_m: float
    illuminated_area_m2: float | None = None
    max_energy_per_area_j_per_m2: float | None = None
    max_photons: float | None = None
    optical_transmission: float = 1.0
    modulator_position: str = "after_sample"
    mask_transmission: float = 1.0
    limit_scope: str = "position"
    run: DoseTotals = field(default_factory=DoseTotals)
    positions: dict[str, DoseTotals] = field(default_factory=dict)

    def __post_init__(self) -> None:
        if self.illuminated_area_m2 is not None:
            _positive("illuminated_area_m2", self.illuminated_area_m2)
        self._photon_energy_j = photon_energy_j(self.wavelength_m)
        for name in ("max_energy_per_area_j_per_m2", "max_photons"):
            value = getattr(self, name)
            if value is not None:
                _positive(name, value)
        if self.max_energy_per_area_j_per_m2 is not None and self.illuminated_area_m2 is None:
            raise ValueError("a dose limit per area (max_energy_per_area_j_per_m2) needs illuminated_area_m2, "
                             "the beam area on the sample in m^2")
        for name in ("optical_transmission", "mask_transmission"):
            t = float(getattr(self, name))
            if not (0 < t <= 1):
                raise ValueError(f"{name} must be in (0, 1], got {t}")
        if self.modulator_position not in MODULATOR_POSITIONS:
            raise ValueError(f"modulator_position must be one of {MODULATOR_POSITIONS}, got {self.modulator_position!r}")
        if self.limit_scope not in ("position", "run"):
            raise ValueError(f"limit_scope must be 'position' or 'run', got {self.limit_scope!r}")
        if self.illuminated_area_m2 is None:
            self.run.energy_per_area_j_per_m2 = None

    @property
    def photon_energy_j(self) -> float:
        return self._photon_energy_j

    @property
    def camera_fraction(self) -> float:
        """Fraction of the sample's photons the camera counts (before its QE)."""
        masks = self.mask_transmission if self.modulator_position == "after_sample" else 1.0
        return float(self.optical_transmission) * masks

    def energy_per_area(self, photons_on_sample: float) -> float | None:
        """Energy per area [J/m^2] of ``photons_on_sample`` over the illuminated area (None without one)."""
        if self.illuminated_area_m2 is None:
            return None
        return photons_on_sample * self._photon_energy_j / self.illuminated_area_m2

    def photons_on_sample(self, photons_at_camera: float) -> float:
        return float(photons_at_camera) / self.camera_fraction

    def _new_totals(self) -> DoseTotals:
        return DoseTotals(energy_per_area_j_per_m2=0.0 if self.illuminated_area_m2 is not None else None)

    def set_run_photons(self, photons_on_sample: float) -> None:
        """Set the run's totals from photons already delivered (a resumed run)."""
        self.run.photons = float(photons_on_sample)
        self.run.energy_j = self.run.photons * self._photon_energy_j
        self.run.energy_per_area_j_per_m2 = self.energy_per_area(self.run.photons)

    def _limited_totals(self, position: str) -> DoseTotals:
        if self.limit_scope == "run":
            return self.run
        return self.positions.get(position, self._new_totals())

    def add(self, frame_photons: float, position: str = "default") -> DoseTotals:
        """Record one frame of ``frame_photons`` incident photons at the camera at ``position``.

        Returns the position's new totals; raises DoseLimitExceeded if a limit is now passed.
        """
        photons = float(frame_photons)
        if not (math.isfinite(photons) and photons >= 0):
            raise ValueError(f"frame_photons must be a finite number >= 0, got {frame_photons}")
        on_sample = self.photons_on_sample(photons)
        energy = on_sample * self._photon_energy_j
        per_area = self.energy_per_area(on_sample)
        pos = self.positions.setdefault(str(position), self._new_totals())
        for totals in (pos, self.run):
            totals.photons += on_sample
            totals.energy_j += energy
            if per_area is not None:
                totals.energy_per_area_j_per_m2 += per_area
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
        return max(left_on_sample, 0.0) * self.camera_fraction

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
            "modulator_position": self.modulator_position,
            "mask_transmission": self.mask_transmission,
            "max_energy_per_area_j_per_m2": self.max_energy_per_area_j_per_m2,
            "max_photons": self.max_photons,
            "limit_scope": self.limit_scope,
            "run": self.run.as_dict(),
            "positions": {k: v.as_dict() for k, v in self.positions.items()},
        }
