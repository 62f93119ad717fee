"""Demo sample: an etched fused-silica phase test plate.

The plate is flat fused silica with features etched to known depths: a ring,
three groups of bars (three widths), a disk and a four-step wedge; a
partially transmitting chromium patch (amplitude 0.4) sits in one corner. It
is lit by a Gaussian beam. Edges are softened by a 1-pixel Gaussian blur, as
a real etch and a real imaging system would.

Phase delay of a thickness change t: phi = 2 pi (n - 1) t / lambda with
n = 1.457 for fused silica at 632.8 nm (from memory; Malitson's dispersion
formula gives 1.4570). Etched features are thinner, so
``thickness_m`` is <= 0 there and the phase is negative relative to the plate.
"""

from __future__ import annotations

import dataclasses

import numpy as np
from scipy import ndimage

__all__ = ["SampleTruth", "phase_target", "isolated_amplitude_target", "bare_beam", "FUSED_SILICA_INDEX_633NM"]

#: Refractive index of fused silica at 632.8 nm (from memory; Malitson 1965 formula gives 1.4570).
FUSED_SILICA_INDEX_633NM = 1.457

#: Etch depths of the features, metres (the step wedge uses ETCH_STEPS_M).
RING_DEPTH_M = 300e-9
BAR_DEPTH_M = 200e-9
DISK_DEPTH_M = 400e-9
ETCH_STEPS_M = (60e-9, 120e-9, 180e-9, 240e-9)
CHROMIUM_AMPLITUDE = 0.4


@dataclasses.dataclass(frozen=True)
class SampleTruth:
    """A known sample. field: complex128 (H, W) transmitted field; thickness_m: float64 (H, W)
    thickness change of the glass, metres (<= 0 where etched); description: what it is."""

    field: np.ndarray
    thickness_m: np.ndarray
    description: str
    wavelength_m: float = 632.8e-9
    refractive_index: float = FUSED_SILICA_INDEX_633NM

    @property
    def phase_rad(self) -> np.ndarray:
        """Phase delay of the glass, 2 pi (n - 1) t / lambda, radians."""
        return 2 * np.pi * (self.refractive_index - 1.0) * self.thickness_m / self.wavelength_m


def phase_target(shape, wavelength_m: float = 632.8e-9, *, refractive_index: float = FUSED_SILICA_INDEX_633NM,
                 blur_px: float = 1.0) -> SampleTruth:
    """The etched test plate on a grid of ``shape`` = (H, W) pixels (each at least 16). Deterministic.

    Features are placed at fixed fractions of the grid so any size works; the bar groups
    have widths w1, 2 w1, 3 w1 pixels with w1 = max(1, round(min(H, W) / 110)).
    """
    h, w = (int(s) for s in shape)
    if h < 16 or w < 16:
        raise ValueError(f"phase_target needs a grid of at least 16 x 16 pixels, got {h} x {w}")
    if not wavelength_m > 0:
        raise ValueError(f"wavelength_m must be > 0, got {wavelength_m}")
    y, x = np.mgrid[0:h, 0:w].astype(np.float64)
    u, v = y / h, x / w  # fractional coordinates 0..1
    depth = np.zeros((h, w))

    # Ring, centre (0.28, 0.28), radii 0.08..0.13 of the smaller side.
    r = np.hypot((u - 0.28) * h, (v - 0.28) * w) / min(h, w)
    depth[(r >= 0.08) & (r <= 0.13)] = RING_DEPTH_M

    # Three bar groups (3 bars each, gap = bar width) in the upper right: widths w1, 2 w1, 3 w1
    # with w1 = max(1, round(min(H, W) / 110)) pixels; groups that do not fit a small grid are cut.
    w1 = max(1, int(round(min(h, w) / 110)))
    col = int(0.50 * w)
    for bw in (w1, 2 * w1, 3 * w1):
        for _ in range(3):
            if col + bw > int(0.97 * w):
                break
            depth[int(0.12 * h) : int(0.42 * h), col : col + bw] = BAR_DEPTH_M
            col += 2 * bw
        col += 2 * bw

    # Disk, centre (0.68, 0.30), radius 0.10.
    r = np.hypot((u - 0.68) * h, (v - 0.30) * w) / min(h, w)
    depth[r <= 0.10] = DISK_DEPTH_M

    # Step wedge: four steps along a strip near the bottom.
    r0, r1 = int(0.84 * h), int(0.92 * h)
    edges = np.linspace(0.15 * w, 0.85 * w, len(ETCH_STEPS_M) + 1).astype(int)
    for step_depth, c0, c1 in zip(ETCH_STEPS_M, edges[:-1], edges[1:]):
        depth[r0:r1, c0:c1] = step_depth

    # Chromium patch (amplitude only) in the lower right.
    amplitude = np.ones((h, w))
    amplitude[int(0.55 * h) : int(0.75 * h), int(0.60 * w) : int(0.80 * w)] = CHROMIUM_AMPLITUDE

    if blur_px > 0:
        depth = ndimage.gaussian_filter(depth, blur_px, mode="nearest")
        amplitude = ndimage.gaussian_filter(amplitude, blur_px, mode="nearest")

    envelope = _beam_envelope(h, w)
    thickness_m = -depth
    phase = 2 * np.pi * (refractive_index - 1.0) * thickness_m / wavelength_m
    field = (envelope * amplitude * np.exp(1j * phase)).astype(np.complex128)
    description = (
        f"etched fused-silica phase plate {h}x{w} px at {wavelength_m * 1e9:.1f} nm (n = {refractive_index}): "
        f"ring {RING_DEPTH_M * 1e9:.0f} nm, bars of three widths {BAR_DEPTH_M * 1e9:.0f} nm, "
        f"disk {DISK_DEPTH_M * 1e9:.0f} nm, step wedge "
        + "/".join(f"{d * 1e9:.0f}" for d in ETCH_STEPS_M)
        + f" nm deep; chromium patch amplitude {CHROMIUM_AMPLITUDE}; Gaussian illumination"
    )
    return SampleTruth(field=field, thickness_m=thickness_m, description=description,
                       wavelength_m=float(wavelength_m), refractive_index=float(refractive_index))


def isolated_amplitude_target(shape, *, blur_px: float = 1.0) -> SampleTruth:
    """An isolated absorbing object for single-pattern (no modulator) benches: a triangular opening
    in an opaque screen, half the grid wide and high at most (so the far-field pattern is
    oversampled 2x per axis), centred; inside, the test plate's features as chromium (amplitude
    ``CHROMIUM_AMPLITUDE``) on clear glass. Real and non-negative (no phase), edges softened by
    ``blur_px``; the triangle is not centrosymmetric, which avoids HIO's twin-image stagnation.
    """
    h, w = (int(s) for s in shape)
    if h < 32 or w < 32:
        raise ValueError(f"isolated_amplitude_target needs a grid of at least 32 x 32 pixels, got {h} x {w}")
    margin = 2 * int(np.ceil(3 * blur_px)) + 2  # the blurred edges stay inside half the grid too
    oh, ow = h // 2 - margin, w // 2 - margin
    inner = phase_target((oh, ow), blur_px=0.0)
    features = inner.thickness_m < 0  # etched features of the plate, drawn in chromium here
    amp = np.where(features, CHROMIUM_AMPLITUDE, 1.0)
    rows, cols = np.mgrid[0:oh, 0:ow]
    opening = rows / oh >= cols / ow  # lower-left triangle
    obj = np.zeros((h, w))
    r0, c0 = (h - oh) // 2, (w - ow) // 2
    obj[r0:r0 + oh, c0:c0 + ow] = amp * opening
    if blur_px > 0:
        obj = ndimage.gaussian_filter(obj, blur_px, mode="constant")
    return SampleTruth(field=obj.astype(np.complex128), thickness_m=np.zeros((h, w)),
                       description=f"isolated amplitude object {oh}x{ow} px (triangular opening, chromium "
                       f"features {CHROMIUM_AMPLITUDE}) on a {h}x{w} grid, opaque outside")


def _beam_envelope(h: int, w: int) -> np.ndarray:
    """Gaussian illumination centred on the grid, 1/e^2 intensity radius 0.45 of each side (amplitude exp(-r^2/w^2))."""
    y, x = np.mgrid[0:h, 0:w].astype(np.float64)
    u, v = y / h, x / w
    return np.exp(-(((u - 0.5) / 0.45) ** 2 + ((v - 0.5) / 0.45) ** 2))


def bare_beam(shape) -> np.ndarray:
    """The illumination alone (sample removed): the test plate's Gaussian beam, complex128 (H, W), flat phase.

    Symmetric about the grid centre (H/2, W/2), so its intensity centroid marks the centre of the field:
    the position reference of the mask registration (``maskrun.reconstruct.registration``)."""
    h, w = (int(s) for s in shape)
    if h < 4 or w < 4:
        raise ValueError(f"bare_beam needs a grid of at least 4 x 4 pixels, got {h} x {w}")
    return _beam_envelope(h, w).astype(np.complex128)
