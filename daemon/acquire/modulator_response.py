"""Measure a phase modulator's grey level -> phase response on the bench, with its own camera.

Split aperture: the left half of the modulator (columns < W/2) stays at a reference grey level, the
right half steps through the grey levels, one far-field frame (or the mean of a few) per level. The
interference of the two halves shifts with their phase difference; ``reconstruct.phase_steps`` reads
the phase of every step from all the pixels of all the frames (phase shifting with unknown steps), the
split geometry gives the sign (the convention of maskrun's masks, exp(+i phase), in the camera
orientation the reconstruction uses), and the steps are unwrapped in grey order. Consecutive levels
must differ by less than pi (a step of 1 to 16 grey levels on an 8-bit SLM).

The result is a ``ModulatorProfile`` (measured = true), the file ``[modulator] profile`` names.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Callable

import numpy as np

from maskrun.drivers.modulator_profile import ModulatorProfile
from maskrun.reconstruct.phase_steps import phase_steps, split_orientation

from maskrun.daemon.acquire.bench import Bench
from maskrun.daemon.acquire.bench_frames import frame_after, open_shutter_checked, saturated_pixels

#: pixels saturated in some frame are left out of the fit; beyond this fraction the measurement is refused
MAX_SATURATED_FRACTION = 0.02

METHOD = ("split aperture (left half at the reference level, right half stepped), far-field frames, phase "
          "shifting with unknown steps (Wang & Han 2004 iterative algorithm), sign from the split geometry")


class ResponseMeasurementError(RuntimeError):
    """The frames do not give a trustworthy response; the message says why and what to change."""


@dataclass
class ResponseMeasurement:
    profile: ModulatorProfile
    orientation: float  # split_orientation evidence (>> 1 or << 1: sign certain; near 1: not told by the geometry)
    residual_rms: float  # model misfit relative to the frames' variation
    largest_step_rad: float  # largest phase change between consecutive measured levels


def stepped_levels(levels: int, step: int, reference_level: int) -> list[int]:
    """Grey levels to show on the stepped half: 0, step, 2 step, ..., the top level, and the reference level."""
    if levels < 2 or step < 1:
        raise ValueError(f"levels must be >= 2 and step >= 1, got levels={levels}, step={step}")
    if not 0 <= reference_level < levels:
        raise ValueError(f"the reference level {reference_level} is outside 0..{levels - 1}")
    return sorted(set(range(0, levels, step)) | {levels - 1, reference_level})


def split_image(shape, reference_level: int, level: int) -> np.ndarray:
    """Grey image (H, W) int32: columns < W/2 at ``reference_level``, the rest at ``level``."""
    h, w = (int(s) for s in shape)
    img = np.full((h, w), int(reference_level), dtype=np.int32)
    img[:, w // 2:] = int(level)
    return img


def profile_from_frames(grey_levels, frames, reference_level: int, wavelength_m: float,
                        method: str = METHOD, valid=None) -> ResponseMeasurement:
    """Response from far-field frames (N, H, W) in the grid convention, one per grey level of the stepped half
    (``grey_levels`` ascending, containing ``reference_level``); ``valid``: pixels to use (grid convention)."""
    grey = np.asarray(grey_levels, dtype=np.int64)
    if np.any(np.diff(grey) <= 0):
        raise ValueError("grey_levels must be strictly ascending")
    hits = np.flatnonzero(grey == int(reference_level))
    if hits.size != 1:
        raise ValueError(f"the reference level {reference_level} must be among the stepped levels")
    steps = phase_steps(frames, reference=int(hits[0]), valid=valid)
    orientation = split_orientation(steps, axis=1)
    if orientation < 1.0:
        steps = steps.flipped()
    wrapped = steps.phase_rad
    jumps = np.abs(np.angle(np.exp(1j * np.diff(wrapped))))
    largest = float(jumps.max()) if jumps.size else 0.0
    if largest > 2.5:
        raise ResponseMeasurementError(
            f"consecutive grey levels differ by up to {largest:.2f} rad: too close to pi to unwrap; measure with a "
            "smaller --step")
    phase = np.unwrap(wrapped)
    phase = phase - phase[0]
    if phase[-1] < 0:  # the whole curve is negative: report it, do not hide it
        note_sign = " The phase falls with the grey level on this device (or the camera image is mirrored)."
    else:
        note_sign = ""
    certain = orientation > 1.5 or orientation < 1 / 1.5
    notes = (f"{grey.size} levels; model misfit {steps.residual_rms:.2e} of the frames' variation; sign evidence "
             f"{max(orientation, 1 / orientation):.2f} (cross-correlation energy ratio)"
             + ("" if certain else " - WEAK: the field is nearly symmetric under a half-grid shift; check the sign")
             + note_sign)
    profile = ModulatorProfile(wavelength_m=float(wavelength_m), grey_levels=grey.tolist(), phase_rad=phase.tolist(),
                               measured=True, method=method, notes=notes)
    return ResponseMeasurement(profile, orientation, steps.residual_rms, largest)


def probe_exposure_s(bench: Bench, image: np.ndarray, target_fraction: float = 0.8) -> float:
    """An exposure that puts the brightest pixel at ``target_fraction`` of the ADC range with ``image`` shown
    (the reference frame, where the two halves agree, is usually the brightest), at most [camera] exposure_s.
    The shutter must be open."""
    t = float(bench.config.camera.exposure_s)
    offset = float(bench.response.offset_dn)
    full = float(bench.camera.max_dn) - offset
    for _ in range(6):
        bench.camera.exposure_s = t
        peak = float(frame_after(bench, lambda: bench.modulator.show_grey(image), t, check_saturation=False).max()) - offset
        if peak <= 0:
            raise ResponseMeasurementError(f"no light on the camera at {t:g} s: is the shutter open and the beam on "
                                           "the modulator?")
        if peak < 0.95 * full:  # not saturated: scale to the target
            return min(float(bench.config.camera.exposure_s), t * target_fraction * full / peak)
        t *= 0.1
    raise ResponseMeasurementError("the camera stays saturated even at 1e-6 of the configured exposure: less light")


def measure_response(bench: Bench, *, levels: int = 256, step: int = 1, reference_level: int = 0,
                     exposure_s: float | None = None, frames_per_level: int = 1,
                     progress: Callable[[int, int], None] | None = None) -> ResponseMeasurement:
    """Step the right half of the modulator through the grey levels and measure the response (shutter
    opened here, closed in a ``finally``). The bench must be open and the safety notice acknowledged."""
    grey = stepped_levels(levels, step, reference_level)
    if frames_per_level < 1:
        raise ValueError(f"frames_per_level must be >= 1, got {frames_per_level}")
    shape = bench.grid_shape
    frames = np.empty((len(grey), *shape), dtype=np.float64)
    saturated = np.zeros(shape, dtype=bool)
    try:
        open_shutter_checked(bench)
        if exposure_s is None:
            exposure_s = probe_exposure_s(bench, split_image(shape, reference_level, reference_level))
        exposure_s = float(exposure_s)
        bench.camera.exposure_s = exposure_s
        for i, g in enumerate(grey):
            img = split_image(shape, reference_level, g)
            acc = np.zeros(shape)
            for _ in range(frames_per_level):
                pixels = frame_after(bench, lambda: bench.modulator.show_grey(img), exposure_s, check_saturation=False)
                saturated |= saturated_pixels(bench, pixels)
                acc += pixels
            frames[i] = np.fft.ifftshift(acc / frames_per_level)
            if progress is not None:
                progress(i + 1, len(grey))
    finally:
        bench.safety.close_shutter()
    fraction = float(saturated.mean())
    if fraction > MAX_SATURATED_FRACTION:
        raise ResponseMeasurementError(
            f"{100 * fraction:.1f} % of the pixels saturated in some frame (at most {100 * MAX_SATURATED_FRACTION:g} % "
            f"can be left out): use a shorter exposure than {exposure_s:g} s (--exposure-s) or less light")
    m = profile_from_frames(grey, frames, reference_level, bench.config.laser.wavelength_m,
                            valid=~np.fft.ifftshift(saturated))
    extra = f"; exposure {exposure_s:.4g} s, {frames_per_level} frame(s) per level"
    if saturated.any():
        extra += f"; {int(saturated.sum())} saturated pixels left out of the fit (the sign evidence then weakens)"
    m.profile = m.profile.model_copy(update={"notes": m.profile.notes + extra})
    return m
