"""Camera profile: the result of a photon transfer calibration, saved as a JSON file.

A bench config references the file; the daemon loads it to turn digital numbers
into photons (dose accounting, photon budget) and refuses a profile that was
measured on another camera or in another mode (``check_profile_matches``).

File format: one JSON object with the fields of ``CameraProfile`` plus
``schema_version``. Written atomically (temporary file, then rename).

Flat field: ``maskrun calibrate`` also writes the per-pixel response map (float32,
mean 1, the profile's frame shape) beside the profile as ``<profile stem>.flat.npy``
and names it in ``flat_field_file`` (relative to the profile's folder). Profiles
without it (older ones, or ``--flat-frames 0``) mean a uniform response.
"""

from __future__ import annotations

import datetime as _dt
import json
import math
import os
import tempfile
from pathlib import Path
from typing import Any

from pydantic import BaseModel, ConfigDict, Field, ValidationError, field_validator

__all__ = [
    "PROFILE_SCHEMA_VERSION",
    "CameraProfile",
    "ProfileError",
    "ProfileMismatch",
    "camera_serial",
    "camera_driver_name",
    "check_profile_matches",
    "flat_field_path_for",
    "save_flat_field",
    "load_flat_field",
]

PROFILE_SCHEMA_VERSION = 1


class ProfileError(ValueError):
    """A profile file is missing, unreadable or invalid."""


class ProfileMismatch(ValueError):
    """The profile was measured on a different camera or camera mode. ``problems`` lists each difference."""

    def __init__(self, problems: list[str], path: str | None = None):
        self.problems = problems
        where = f" ({path})" if path else ""
        super().__init__(
            f"camera profile{where} does not match the camera: " + "; ".join(problems)
            + ". Run 'maskrun calibrate' for this camera and mode, or point the bench config at its own profile"
        )


class CameraProfile(BaseModel):
    """Camera constants from an EMVA 1288 photon transfer calibration.

    gain_dn_per_e: overall system gain K [DN/e-].
    offset_dn: dark offset at zero exposure [DN].
    dark_noise_e: dark noise sigma_d = sqrt(sigma_y.dark^2 - 1/12) / K [e-] (EMVA 1288 R4.0 Linear model,
        quantisation removed; the one definition, ``photon_transfer.dark_noise_e``); an upper limit when
        the dark noise was quantisation-limited.
    read_noise_e: the same number (kept for older readers), None when only an upper limit is known.
    measured: False when the photon transfer found the camera outside what it can measure
        (``range_warnings`` says why); use such a profile's numbers with care.
    range_warnings: the reasons, one sentence each.
    dark_current_e_per_s: [e-/s] (optional).
    saturation_capacity_e: electrons at the variance peak [e-].
    quantum_efficiency: eta in (0, 1] at ``wavelength_m`` (None if the photons were not known).
    wavelength_m: wavelength the QE belongs to (optional).
    linearity_error_pct: EMVA linearity error LE [%].
    bit_depth, frame_shape (rows, cols): camera mode the profile belongs to.
    camera_driver: driver name; camera_serial: the camera's serial number if it reports one.
    camera_gain_setting: the camera's own analog gain setting during calibration (K depends on it).
    binning: binning during calibration.
    created: UTC time of the calibration.
    flat_field_file: name of the flat-field map (.npy, float32, mean 1, frame_shape), relative to the
        profile's folder; None when no flat frames were taken.
    """

    model_config = ConfigDict(extra="forbid", frozen=True)

    schema_version: int = PROFILE_SCHEMA_VERSION
    gain_dn_per_e: float = Field(gt=0)
    offset_dn: float = Field(ge=0)
    dark_noise_e: float = Field(ge=0)
    read_noise_e: float | None = Field(default=None, ge=0)
    dark_current_e_per_s: float | None = None
    saturation_capacity_e: float = Field(gt=0)
    quantum_efficiency: float | None = Field(default=None, gt=0, le=1)
    wavelength_m: float | None = Field(default=None, gt=0)
    linearity_error_pct: float = Field(ge=0)
    bit_depth: int = Field(ge=1, le=32)
    frame_shape: tuple[int, int]
    camera_driver: str
    camera_serial: str | None = None
    camera_gain_setting: float = 1.0
    binning: int = Field(default=1, ge=1)
    created: _dt.datetime = Field(default_factory=lambda: _dt.datetime.now(_dt.timezone.utc))
    flat_field_file: str | None = None
    measured: bool = True
    range_warnings: list[str] = Field(default_factory=list)

    @field_validator("frame_shape")
    @classmethod
    def _shape_positive(cls, v):
        if v[0] < 1 or v[1] < 1:
            raise ValueError("frame_shape must be two positive pixel counts (rows, cols)")
        return v

    @field_validator("schema_version")
    @classmethod
    def _known_version(cls, v):
        if v != PROFILE_SCHEMA_VERSION:
            raise ValueError(
                f"profile schema version {v} is not supported (this maskrun reads version "
                f"{PROFILE_SCHEMA_VERSION}); recalibrate with 'maskrun calibrate'"
            )
        return v

    @property
    def max_dn(self) -> int:
        return (1 << self.bit_depth) - 1

    # ------------------------------------------------------------------ build
    @classmethod
    def from_result(
        cls,
        result: Any,
        camera: Any,
        *,
        driver_name: str | None = None,
        wavelength_m: float | None = None,
        flat_field_file: str | None = None,
    ) -> "CameraProfile":
        """Build a profile from a PhotonTransferResult measured on ``camera`` (a maskrun Camera)."""
        qe = result.quantum_efficiency
        if qe is not None and not (0 < qe <= 1):
            raise ProfileError(
                f"the measured quantum efficiency {qe:.3g} lies outside (0, 1]: the photons per pixel "
                "given for the calibration are wrong; give the right irradiance or none"
            )
        dark_current = result.dark_current_e_per_s
        return cls(
            gain_dn_per_e=result.gain_dn_per_e,
            offset_dn=max(result.offset_dn, 0.0),
            dark_noise_e=result.dark_noise_e,
            read_noise_e=result.read_noise_e,
            dark_current_e_per_s=None if dark_current is None or math.isnan(dark_current) else dark_current,
            saturation_capacity_e=result.saturation_capacity_e,
            quantum_efficiency=qe,
            wavelength_m=wavelength_m,
            linearity_error_pct=abs(result.linearity_error_pct),
            bit_depth=int(camera.bit_depth),
            frame_shape=tuple(int(s) for s in camera.frame_shape),
            camera_driver=driver_name or camera_driver_name(camera),
            camera_serial=camera_serial(camera),
            camera_gain_setting=float(camera.gain),
            binning=int(camera.binning),
            flat_field_file=flat_field_file,
            measured=bool(result.within_range),
            range_warnings=list(result.range_warnings),
        )

    # --------------------------------------------------------------- file I/O
    def save(self, path: str | os.PathLike) -> Path:
        """Write the profile as JSON atomically; returns the path."""
        path = Path(path)
        path.parent.mkdir(parents=True, exist_ok=True)
        text = json.dumps(self.model_dump(mode="json"), indent=2, sort_keys=True) + "\n"
        fd, tmp = tempfile.mkstemp(prefix=path.name + ".", suffix=".tmp", dir=path.parent)
        try:
            with os.fdopen(fd, "w", encoding="utf-8") as fh:
                fh.write(text)
                fh.flush()
                os.fsync(fh.fileno())
            os.replace(tmp, path)
        except BaseException:
            Path(tmp).unlink(missing_ok=True)
            raise
        return path

    @classmethod
    def load(cls, path: str | os.PathLike) -> "CameraProfile":
        """Read a profile file; raises ProfileError naming the file and each problem."""
        path = Path(path)
        try:
            raw = json.loads(path.read_text(encoding="utf-8"))
        except FileNotFoundError:
            raise ProfileError(
                f"camera profile {path} does not exist; run 'maskrun calibrate' to make one"
            ) from None
        except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
            raise ProfileError(f"camera profile {path} is not readable JSON ({exc}); recalibrate") from None
        if not isinstance(raw, dict):
            raise ProfileError(f"camera profile {path} must hold a JSON object, found {type(raw).__name__}")
        try:
            return cls.model_validate(raw)
        except ValidationError as exc:
            lines = [
                f"{'.'.join(str(p) for p in err['loc']) or '(top)'}: {err['msg']}" for err in exc.errors()
            ]
            raise ProfileError(f"camera profile {path} is invalid: " + "; ".join(lines)) from None


def flat_field_path_for(profile_path: str | os.PathLike) -> Path:
    """Where the flat-field map of a profile goes: ``<folder>/<profile stem>.flat.npy``."""
    profile_path = Path(profile_path)
    return profile_path.with_name(profile_path.stem + ".flat.npy")


def save_flat_field(path: str | os.PathLike, flat: Any) -> Path:
    """Write a flat-field map (saved as float32 .npy) atomically; returns the path."""
    import numpy as np

    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=path.name + ".", suffix=".tmp", dir=path.parent)
    try:
        with os.fdopen(fd, "wb") as fh:
            np.save(fh, np.asarray(flat, dtype=np.float32))
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise
    return path


def load_flat_field(profile: CameraProfile, profile_path: str | os.PathLike):
    """The profile's flat-field map (float32, mean 1) or None when the profile names none.

    Raises ProfileError when the file is missing, unreadable, not 2-D, of another shape than the
    profile's frame shape, or holds values that are not finite and > 0.
    """
    import numpy as np

    if not profile.flat_field_file:
        return None
    path = Path(profile_path).parent / profile.flat_field_file
    fix = "recalibrate with 'maskrun calibrate' or remove flat_field_file from the profile"
    try:
        flat = np.load(path, allow_pickle=False)
    except FileNotFoundError:
        raise ProfileError(f"flat-field file {path} named by camera profile {profile_path} does not exist; {fix}") from None
    except (OSError, ValueError) as exc:
        raise ProfileError(f"flat-field file {path} is not a readable .npy array ({exc}); {fix}") from None
    shape = tuple(int(s) for s in profile.frame_shape)
    if flat.ndim != 2 or tuple(flat.shape) != shape:
        raise ProfileError(
            f"flat-field file {path} has shape {tuple(flat.shape)} but the frames are {shape} "
            f"(profile frame_shape); {fix}"
        )
    flat = flat.astype(np.float32)
    if not (np.all(np.isfinite(flat)) and flat.min() > 0):
        raise ProfileError(f"flat-field file {path} holds values that are not finite and > 0; {fix}")
    return flat


def camera_serial(camera: Any) -> str | None:
    """The camera's serial number if the driver reports one (``serial`` attribute or setting)."""
    for source in (camera, getattr(camera, "settings", None)):
        for name in ("serial", "serial_number"):
            value = getattr(source, name, None)
            if value not in (None, ""):
                return str(value)
    return None


def camera_driver_name(camera: Any) -> str:
    """A driver identity: ``driver_name`` attribute if present, else module.ClassName."""
    name = getattr(camera, "driver_name", None)
    if name:
        return str(name)
    cls = type(camera)
    return f"{cls.__module__}.{cls.__qualname__}"


def check_profile_matches(
    profile: CameraProfile, camera: Any, *, path: str | None = None, driver_name: str | None = None
) -> None:
    """Refuse (ProfileMismatch) a profile whose frame shape, bit depth, serial, gain setting,
    binning or driver differ from the camera's current ones. Serial and driver are compared
    only when both sides know them."""
    problems: list[str] = []
    shape = tuple(int(s) for s in camera.frame_shape)
    if tuple(profile.frame_shape) != shape:
        problems.append(f"frame shape {tuple(profile.frame_shape)} in the profile, {shape} on the camera")
    if profile.bit_depth != int(camera.bit_depth):
        problems.append(f"bit depth {profile.bit_depth} in the profile, {camera.bit_depth} on the camera")
    serial = camera_serial(camera)
    if profile.camera_serial is not None and serial is not None and profile.camera_serial != serial:
        problems.append(f"serial {profile.camera_serial!r} in the profile, {serial!r} on the camera")
    gain = float(camera.gain)
    if not math.isclose(profile.camera_gain_setting, gain, rel_tol=1e-9, abs_tol=1e-12):
        problems.append(f"camera gain setting {profile.camera_gain_setting:g} in the profile, {gain:g} now")
    if profile.binning != int(camera.binning):
        problems.append(f"binning {profile.binning} in the profile, {camera.binning} on the camera")
    driver = driver_name or getattr(camera, "driver_name", None)
    if driver and profile.camera_driver != driver:
        problems.append(f"driver {profile.camera_driver!r} in the profile, {driver!r} now")
    if problems:
        raise ProfileMismatch(problems, path)
