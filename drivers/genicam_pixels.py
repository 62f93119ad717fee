"""Pixel formats of GenICam cameras: raw buffer bytes -> one 2-D uint8/uint16 frame.

Names and bit layouts follow the GenICam Pixel Format Naming Convention (PFNC):

* ``Mono8``; ``Mono10`` / ``Mono12`` / ``Mono14`` / ``Mono16``: one pixel per byte or per
  little-endian 16-bit word (the unused high bits zero).
* ``Mono10p`` / ``Mono12p`` / ``Mono14p``: pixels bit-packed one after the other with no gap,
  least significant bit first (4 pixels in 5 bytes for 10 bits, 2 in 3 for 12, 4 in 7 for 14).
* ``Mono10Packed`` / ``Mono12Packed`` (the older GigE Vision layout): 2 pixels in 3 bytes;
  byte 0 and byte 2 hold the 8 high bits of pixel 0 and pixel 1, byte 1 holds the low bits
  of pixel 0 in its low nibble and those of pixel 1 in its high nibble.
* Colour ``RGB8``, ``BGR8``, ``RGBa8``, ``BGRa8``: refused unless luminance is asked for; then
  luminance Y = 0.299 R + 0.587 G + 0.114 B (ITU-R BT.601 weights, as the usb-video driver),
  rounded to uint8.

Everything is vectorised over the whole frame (a few numpy passes per frame, a loop only over
the few bytes of one packing group); no per-pixel Python loop.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["COLOUR_FORMATS", "MONO_FORMATS", "PixelLayout", "layout_for", "unpack_bits_lsb", "unpack_gige_packed"]

# name -> (bits per pixel, packing): "byte" (uint8), "word" (little-endian uint16), "lsb" (PFNC p), "gige"
MONO_FORMATS: dict[str, tuple[int, str]] = {
    "Mono8": (8, "byte"),
    "Mono10": (10, "word"),
    "Mono12": (12, "word"),
    "Mono14": (14, "word"),
    "Mono16": (16, "word"),
    "Mono10p": (10, "lsb"),
    "Mono12p": (12, "lsb"),
    "Mono14p": (14, "lsb"),
    "Mono10Packed": (10, "gige"),
    "Mono12Packed": (12, "gige"),
}
# name -> (bytes per pixel, index of R, G, B within a pixel)
COLOUR_FORMATS: dict[str, tuple[int, tuple[int, int, int]]] = {
    "RGB8": (3, (0, 1, 2)),
    "BGR8": (3, (2, 1, 0)),
    "RGBa8": (4, (0, 1, 2)),
    "BGRa8": (4, (2, 1, 0)),
}
#: preference when the config names no format and the camera is not in a mono format already
MONO_PREFERENCE = ["Mono16", "Mono14", "Mono12", "Mono12p", "Mono12Packed", "Mono10", "Mono10p", "Mono10Packed", "Mono8"]


class UnsupportedPixelFormat(ValueError):
    """The format is not one this driver can turn into a 2-D frame (message says which ones it can)."""


def unpack_bits_lsb(raw: np.ndarray, bits: int, count: int) -> np.ndarray:
    """``count`` pixels of ``bits`` bits packed LSB first (PFNC 'p' formats) from uint8 ``raw`` -> uint16."""
    group_px = 8 // np.gcd(bits, 8)  # pixels per group of whole bytes
    group_bytes = group_px * bits // 8
    groups = -(-count // group_px)
    need = groups * group_bytes
    raw = np.ascontiguousarray(raw[:need])
    if raw.size < need:
        raw = np.concatenate([raw, np.zeros(need - raw.size, np.uint8)])
    g = raw.reshape(groups, group_bytes).astype(np.uint64)
    word = np.zeros(groups, np.uint64)
    for i in range(group_bytes):  # at most 7 bytes: the group as one little-endian integer
        word |= g[:, i] << np.uint64(8 * i)
    out = np.empty((groups, group_px), np.uint16)
    mask = np.uint64((1 << bits) - 1)
    for j in range(group_px):
        out[:, j] = (word >> np.uint64(j * bits)) & mask
    return out.reshape(-1)[:count]


def unpack_gige_packed(raw: np.ndarray, bits: int, count: int) -> np.ndarray:
    """``count`` pixels in the GigE Vision 'Packed' layout (2 pixels in 3 bytes) -> uint16."""
    low = bits - 8
    pairs = -(-count // 2)
    need = pairs * 3
    raw = np.ascontiguousarray(raw[:need])
    if raw.size < need:
        raw = np.concatenate([raw, np.zeros(need - raw.size, np.uint8)])
    t = raw.reshape(pairs, 3).astype(np.uint16)
    out = np.empty((pairs, 2), np.uint16)
    low_mask = (1 << low) - 1
    out[:, 0] = (t[:, 0] << low) | (t[:, 1] & low_mask)
    out[:, 1] = (t[:, 2] << low) | ((t[:, 1] >> 4) & low_mask)
    return out.reshape(-1)[:count]


@dataclass(frozen=True)
class PixelLayout:
    """How one pixel format becomes a frame: ``bit_depth`` of the result, ``colour`` when luminance is made."""

    name: str
    bit_depth: int
    packing: str  # byte, word, lsb, gige, colour
    colour: bool = False

    @property
    def dtype(self):
        return np.uint8 if self.bit_depth <= 8 else np.uint16

    def line_bytes(self, width: int) -> int:
        if self.colour:
            return width * COLOUR_FORMATS[self.name][0]
        bits, packing = MONO_FORMATS[self.name]
        if packing == "byte":
            return width
        if packing == "word":
            return 2 * width
        if packing == "gige":
            return 3 * (-(-width // 2))
        return -(-width * bits // 8)

    def _unpack_stream(self, raw: np.ndarray, count: int) -> np.ndarray:
        bits, packing = MONO_FORMATS[self.name]
        if packing == "byte":
            return raw[:count]
        if packing == "word":
            return raw[: 2 * count].view("<u2")
        if packing == "lsb":
            return unpack_bits_lsb(raw, bits, count)
        return unpack_gige_packed(raw, bits, count)

    def to_frame(self, raw, width: int, height: int, padding_x: int = 0) -> np.ndarray:
        """A new (height, width) array from the buffer bytes; ``padding_x``: bytes after each line."""
        raw = np.frombuffer(raw, np.uint8) if not isinstance(raw, np.ndarray) else raw.reshape(-1).view(np.uint8)
        line = self.line_bytes(width)
        if padding_x:
            stride = line + padding_x
            if raw.size < stride * height:
                raise ValueError(f"{self.name} buffer of {raw.size} bytes is short of {height} lines of {stride} bytes")
            rows = raw[: stride * height].reshape(height, stride)[:, :line]
        else:
            rows = None
        if self.colour:
            bpp, (ri, gi, bi) = COLOUR_FORMATS[self.name]
            data = rows if rows is not None else raw[: line * height]
            if data.size < line * height:
                raise ValueError(f"{self.name} buffer of {raw.size} bytes is short of {width} x {height} pixels")
            px = data.reshape(height, width, bpp)
            # ITU-R BT.601 luma weights (ITU-R Recommendation BT.601-7, section 2.5.1)
            y = 0.299 * px[:, :, ri].astype(np.float32) + 0.587 * px[:, :, gi] + 0.114 * px[:, :, bi]
            return np.clip(np.rint(y), 0, 255).astype(np.uint8)
        if rows is not None:  # lines start on byte boundaries: unpack each line, cut the group padding
            bits, packing = MONO_FORMATS[self.name]
            if packing in ("byte", "word"):
                return np.ascontiguousarray(rows).view("<u2" if packing == "word" else np.uint8).astype(self.dtype)
            group_px = 8 // np.gcd(bits, 8) if packing == "lsb" else 2
            group_bytes = group_px * bits // 8 if packing == "lsb" else 3
            groups = -(-width // group_px)
            padded = np.zeros((height, groups * group_bytes), np.uint8)
            padded[:, :line] = rows
            flat = self._unpack_stream(padded.reshape(-1), height * groups * group_px)
            return np.ascontiguousarray(flat.reshape(height, groups * group_px)[:, :width]).astype(self.dtype)
        count = width * height
        bits, packing = MONO_FORMATS[self.name]
        need = {"lsb": -(-count * bits // 8), "gige": 3 * (-(-count // 2)), "byte": count}.get(packing, 2 * count)
        if raw.size < need:
            raise ValueError(f"{self.name} buffer of {raw.size} bytes is short of {width} x {height} pixels ({need} bytes)")
        out = self._unpack_stream(raw, count).reshape(height, width)
        return np.array(out, dtype=self.dtype, copy=True)


def layout_for(name: str, *, luminance: bool = False) -> PixelLayout:
    """The layout of pixel format ``name``; UnsupportedPixelFormat for colour without ``luminance`` and
    for formats this driver cannot read (Bayer, YUV, 3-D coordinates, ...)."""
    if name in MONO_FORMATS:
        bits, packing = MONO_FORMATS[name]
        return PixelLayout(name, bits, packing)
    if name in COLOUR_FORMATS:
        if not luminance:
            raise UnsupportedPixelFormat(
                f"pixel format {name} is colour; the reconstruction needs one intensity per pixel")
        return PixelLayout(name, 8, "colour", colour=True)
    raise UnsupportedPixelFormat(
        f"pixel format {name} cannot be read by this driver (it reads {', '.join(MONO_FORMATS)}, "
        f"and as luminance {', '.join(COLOUR_FORMATS)})")
