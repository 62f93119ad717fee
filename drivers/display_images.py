"""Masks -> the 8-bit grey images a display-driven modulator shows (pure numpy, no X).

Phase SLM: the phase of mask pixel (i, j) covers a superpixel of ``superpixel_px`` device
pixels whose top-left corner is ``offset_px + (i * sr, j * sc)``; on each device pixel (r, c)
inside the active region the device is asked for

    phase(r, c) = angle(mask[i, j]) + correction_rad[r, c] + 2π (r / period_r + c / period_c)

modulo 2π, turned into the grey level the modulator's phase response gives for it
(``ModulatorProfile.grey_for_phase``). The last term is a blazed grating (linear phase ramp,
device pixel coordinates from the screen's top-left corner) that sends the modulated light
into the first diffraction order, off the unmodulated zero order (common practice, no source);
a period of 0 leaves that axis without a ramp. Outside the active region (and outside the
mask's footprint) every pixel is at the fixed ``outside_grey``.

Binary amplitude (DMD): mask pixels 1 -> ``on_grey``, 0 -> ``off_grey``; same mapping.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .errors import DeviceMisconfigured
from .modulator_profile import ModulatorProfile

__all__ = ["DeviceMapping", "make_mapping", "phase_images", "binary_images", "imposable_families",
           "check_mask_family", "PHASE", "BINARY"]

PHASE = "phase"
BINARY = "binary_amplitude"

#: mask families each kind of device can impose ('file' only when the file's masks fit)
_FAMILIES = {PHASE: ("random_phase", "quantized_phase", "file"), BINARY: ("binary_amplitude", "file")}
_KIND_WORDS = {PHASE: "phase-only SLM", BINARY: "binary-amplitude device (DMD)"}
_FILE_NEEDS = {PHASE: "phase-only masks, |m| = 1 everywhere", BINARY: "masks of 0 and 1 only"}


@dataclass(frozen=True)
class DeviceMapping:
    """Where the mask lands on the device, in device pixels (rows, cols)."""

    screen_shape: tuple[int, int]
    mask_shape: tuple[int, int]
    superpixel_px: tuple[int, int]
    offset_px: tuple[int, int]  # top-left of the mask's footprint
    active_region_px: tuple[int, int, int, int]  # (row0, col0, rows, cols), inside the footprint
    outside_grey: int

    @property
    def footprint_px(self) -> tuple[int, int, int, int]:
        return (*self.offset_px, self.mask_shape[0] * self.superpixel_px[0], self.mask_shape[1] * self.superpixel_px[1])

    def as_dict(self) -> dict:
        return {"screen_shape": list(self.screen_shape), "mask_shape": list(self.mask_shape),
                "superpixel_px": list(self.superpixel_px), "offset_px": list(self.offset_px),
                "active_region_px": list(self.active_region_px), "outside_grey": int(self.outside_grey)}


def _bad(msg: str, hint: str) -> DeviceMisconfigured:
    return DeviceMisconfigured(msg, device="modulator", hint=hint)


def make_mapping(screen_shape, mask_shape, superpixel_px=(1, 1), offset_px=None, active_region_px=None,
                 outside_grey: int = 0) -> DeviceMapping:
    """Validate the mask -> device mapping; offset None centres the footprint on the screen;
    active region None is the whole footprint, else it is clipped to the footprint."""
    sh, sw = (int(v) for v in screen_shape)
    mh, mw = (int(v) for v in mask_shape)
    sr, sc = (int(v) for v in superpixel_px)
    if sr < 1 or sc < 1:
        raise _bad(f"superpixel_px {superpixel_px} must be at least 1 x 1", "give whole device pixels per mask pixel")
    fh, fw = mh * sr, mw * sc
    if offset_px is None:
        offset_px = ((sh - fh) // 2, (sw - fw) // 2)
    r0, c0 = (int(v) for v in offset_px)
    if r0 < 0 or c0 < 0 or r0 + fh > sh or c0 + fw > sw:
        raise _bad(f"the {mh} x {mw} mask with {sr} x {sc} device pixels per mask pixel ({fh} x {fw} device pixels) "
                   f"at offset ({r0}, {c0}) does not fit the {sh} x {sw} screen",
                   "make superpixel_px smaller, move offset_px, or use a smaller [grid] shape")
    if active_region_px is None:
        active = (r0, c0, fh, fw)
    else:
        a0, b0, ah, aw = (int(v) for v in active_region_px)
        if ah < 1 or aw < 1 or a0 < 0 or b0 < 0 or a0 + ah > sh or b0 + aw > sw:
            raise _bad(f"active_region_px {tuple(active_region_px)} (row0, col0, rows, cols) is not inside the "
                       f"{sh} x {sw} screen", "give a region inside the screen")
        top, left = max(a0, r0), max(b0, c0)
        bottom, right = min(a0 + ah, r0 + fh), min(b0 + aw, c0 + fw)
        if bottom <= top or right <= left:
            raise _bad(f"active_region_px {tuple(active_region_px)} does not overlap the mask's footprint "
                       f"({r0}, {c0}, {fh}, {fw})", "move the active region or offset_px")
        active = (top, left, bottom - top, right - left)
    if not 0 <= int(outside_grey) <= 255:
        raise _bad(f"outside_grey {outside_grey} is not a grey level 0..255", "give 0..255")
    return DeviceMapping((sh, sw), (mh, mw), (sr, sc), (r0, c0), active, int(outside_grey))


def _to_device(values: np.ndarray, mapping: DeviceMapping) -> tuple[np.ndarray, tuple[slice, slice]]:
    """values (H, W) per mask pixel -> the active region's device pixels (rows, cols) and its slices."""
    a0, b0, ah, aw = mapping.active_region_px
    r0, c0 = mapping.offset_px
    sr, sc = mapping.superpixel_px
    rows = (np.arange(a0, a0 + ah) - r0) // sr  # mask row of each device row in the active region
    cols = (np.arange(b0, b0 + aw) - c0) // sc
    return values[rows[:, None], cols[None, :]], (slice(a0, a0 + ah), slice(b0, b0 + aw))


def phase_images(masks: np.ndarray, mapping: DeviceMapping, profile: ModulatorProfile,
                 correction_rad: np.ndarray | None = None, blaze_period_px=(0.0, 0.0)) -> np.ndarray:
    """(K, rows, cols) uint8 grey images for phase masks (K, H, W)."""
    masks = np.asarray(masks)
    if masks.ndim != 3 or tuple(masks.shape[1:]) != mapping.mask_shape:
        raise _bad(f"mask set has shape {masks.shape}, the mapping expects (K, {mapping.mask_shape[0]}, "
                   f"{mapping.mask_shape[1]})", "the run's [grid] shape must match the masks")
    if profile.grey.max() > 255:
        raise _bad(f"the phase response table has grey levels up to {profile.grey.max()}, an 8-bit display shows 0..255",
                   "use a profile measured on this display")
    sh, sw = mapping.screen_shape
    a0, b0, ah, aw = mapping.active_region_px
    extra = np.zeros((ah, aw), dtype=np.float64)
    if correction_rad is not None:
        if correction_rad.shape != (sh, sw):
            raise _bad(f"the wavefront-correction image is {correction_rad.shape[0]} x {correction_rad.shape[1]}, "
                       f"the screen {sh} x {sw}", "give a correction image of the modulator's full resolution")
        extra += correction_rad[a0:a0 + ah, b0:b0 + aw]
    pr, pc = (float(v) for v in blaze_period_px)
    if pr:
        extra += (2 * np.pi / pr) * np.arange(a0, a0 + ah, dtype=np.float64)[:, None]
    if pc:
        extra += (2 * np.pi / pc) * np.arange(b0, b0 + aw, dtype=np.float64)[None, :]
    out = np.full((masks.shape[0], sh, sw), mapping.outside_grey, dtype=np.uint8)
    for k in range(masks.shape[0]):
        phase, where = _to_device(np.angle(masks[k]), mapping)
        out[k][where] = profile.grey_for_phase(phase + extra).astype(np.uint8)
    return out


def grey_image(grey: np.ndarray, mapping: DeviceMapping) -> np.ndarray:
    """(rows, cols) uint8 device image for a raw grey-level image (H, W) in mask pixels: mapped like a
    mask (superpixel, offset, active region, fixed level outside), with no response, correction or ramp."""
    grey = np.asarray(grey)
    if grey.shape != tuple(mapping.mask_shape):
        raise _bad(f"grey image has shape {grey.shape}, the mapping expects {tuple(mapping.mask_shape)}",
                   "give one grey level per mask pixel (the run's [grid] shape)")
    if not np.issubdtype(grey.dtype, np.integer) or grey.min() < 0 or grey.max() > 255:
        raise _bad(f"grey image must hold integer levels 0..255, got {grey.dtype} {grey.min()}..{grey.max()}",
                   "an 8-bit display shows levels 0..255")
    out = np.full(mapping.screen_shape, mapping.outside_grey, dtype=np.uint8)
    values, where = _to_device(grey, mapping)
    out[where] = values.astype(np.uint8)
    return out


def binary_images(masks: np.ndarray, mapping: DeviceMapping, on_grey: int = 255, off_grey: int = 0) -> np.ndarray:
    """(K, rows, cols) uint8 images for 0/1 amplitude masks (K, H, W)."""
    masks = np.asarray(masks)
    if masks.ndim != 3 or tuple(masks.shape[1:]) != mapping.mask_shape:
        raise _bad(f"mask set has shape {masks.shape}, the mapping expects (K, {mapping.mask_shape[0]}, "
                   f"{mapping.mask_shape[1]})", "the run's [grid] shape must match the masks")
    sh, sw = mapping.screen_shape
    out = np.full((masks.shape[0], sh, sw), mapping.outside_grey, dtype=np.uint8)
    levels = np.array([off_grey, on_grey], dtype=np.uint8)
    for k in range(masks.shape[0]):
        on, where = _to_device(np.abs(masks[k]) > 0.5, mapping)
        out[k][where] = levels[on.astype(np.intp)]
    return out


def imposable_families(kind: str) -> tuple[str, ...]:
    return _FAMILIES[kind]


def check_mask_family(kind: str, family: str, masks: np.ndarray | None = None) -> None:
    """DeviceMisconfigured when a device of ``kind`` cannot impose the mask family (or, for
    family 'file', the file's masks), naming the families it can impose."""
    can = ", ".join(_FAMILIES[kind])
    what = _KIND_WORDS[kind]
    hint = f"change [masks] family (a 'file' must hold {_FILE_NEEDS[kind]}), or drive another modulator"
    if family not in _FAMILIES[kind]:
        why = {"octanary": "its masks have two amplitude levels as well as four phases",
               "binary_amplitude": "its masks switch the amplitude on and off",
               "random_phase": "its masks are phase-only", "quantized_phase": "its masks are phase-only"}.get(family, "")
        raise _bad(f"a {what} cannot impose the mask family {family!r}{' (' + why + ')' if why else ''}; "
                   f"it can impose: {can}", hint)
    if family == "file" and masks is not None:
        m = np.asarray(masks)
        if kind == PHASE:
            err = float(np.max(np.abs(np.abs(m) - 1.0))) if m.size else 0.0
            if err > 1e-6:
                raise _bad(f"the masks of family 'file' are not phase-only (| |m| - 1 | up to {err:.3g}); a {what} "
                           "cannot impose amplitude", hint)
        else:
            if m.size and not (np.all(np.abs(m.imag) < 1e-9) and np.all(np.isin(np.round(m.real, 9), (0.0, 1.0)))):
                raise _bad(f"the masks of family 'file' are not 0/1 amplitude masks; a {what} shows only on and off", hint)
