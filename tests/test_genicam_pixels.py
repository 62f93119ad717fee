"""GenICam pixel formats -> 2-D frames: packed Mono formats, line padding, colour refused or as luminance.

References: the packing is checked against an independent bit-by-bit packer written from the
format definitions (GenICam Pixel Format Naming Convention (PFNC) 2.1, EMVA 2017, section 4.3
'packed' formats: "p" formats are packed LSB first without gaps; the GigE Vision
'Mono12Packed'/'Mono10Packed' layout, AIA GigE Vision 2.0, 2011, pixel formats appendix, from
memory), against hand-worked bytes, and against the reference library harvesters' own unpacker
(harvesters.util.pfnc, maintained by the GenICam committee's member EMVA) where it agrees with the
definition (its Mono14p differs from the LSB-first definition, so Mono14p is checked only against
the bit-by-bit packer).
"""

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st

from maskrun.drivers.genicam_pixels import (
    MONO_FORMATS,
    UnsupportedPixelFormat,
    layout_for,
    unpack_bits_lsb,
    unpack_gige_packed,
)


def pack_lsb(pixels, bits):
    """Bit-by-bit packer: pixel i occupies bits i*bits .. i*bits+bits-1 of one little-endian bit stream."""
    value = 0
    for i, p in enumerate(pixels):
        value |= int(p) << (i * bits)
    nbytes = -(-len(pixels) * bits // 8)
    return value.to_bytes(nbytes, "little")


def pack_gige(pixels, bits):
    """GigE Vision 'Packed': byte 0 = high 8 bits of pixel 0, byte 1 = low bits of pixel 0 (low nibble)
    and of pixel 1 (high nibble), byte 2 = high 8 bits of pixel 1."""
    low = bits - 8
    out = bytearray()
    px = [int(p) for p in pixels] + ([0] if len(pixels) % 2 else [])
    for a, b in zip(px[::2], px[1::2]):
        out += bytes([a >> low, (a & ((1 << low) - 1)) | ((b & ((1 << low) - 1)) << 4), b >> low])
    return bytes(out)


def test_hand_worked_mono12_packings():
    # two pixels 0x123 and 0x456, worked by hand from the two definitions above
    assert pack_lsb([0x123, 0x456], 12) == bytes([0x23, 0x61, 0x45])
    assert pack_gige([0x123, 0x456], 12) == bytes([0x12, 0x63, 0x45])
    assert list(unpack_bits_lsb(np.frombuffer(bytes([0x23, 0x61, 0x45]), np.uint8), 12, 2)) == [0x123, 0x456]
    assert list(unpack_gige_packed(np.frombuffer(bytes([0x12, 0x63, 0x45]), np.uint8), 12, 2)) == [0x123, 0x456]
    # Mono10p: four pixels in five bytes; 0x3FF, 0, 0x3FF, 0 -> bits 0-9 and 20-29 set
    assert pack_lsb([0x3FF, 0, 0x3FF, 0], 10) == (0x3FF | 0x3FF << 20).to_bytes(5, "little")


@given(st.sampled_from(["Mono10p", "Mono12p", "Mono14p", "Mono10Packed", "Mono12Packed"]),
       st.integers(1, 9), st.integers(1, 5), st.integers(0, 2**32 - 1))
def test_packed_formats_unpack_to_the_pixels_packed(name, width, height, seed):
    bits, packing = MONO_FORMATS[name]
    pixels = np.random.default_rng(seed).integers(0, 1 << bits, (height, width))
    raw = (pack_lsb if packing == "lsb" else pack_gige)(pixels.reshape(-1), bits)
    frame = layout_for(name).to_frame(raw + b"\x00" * 7, width, height)  # producers' buffers are larger
    assert frame.dtype == np.uint16 and frame.shape == (height, width)
    np.testing.assert_array_equal(frame, pixels)


@given(st.sampled_from(["Mono10p", "Mono12p", "Mono12Packed", "Mono8", "Mono16"]), st.integers(1, 9),
       st.integers(1, 4), st.integers(1, 5), st.integers(0, 2**32 - 1))
def test_line_padding_is_cut_from_every_line(name, width, height, padding, seed):
    bits, packing = MONO_FORMATS[name]
    pixels = np.random.default_rng(seed).integers(0, 1 << bits, (height, width))
    lines = []
    for row in pixels:
        if packing == "lsb":
            line = pack_lsb(row, bits)
        elif packing == "gige":
            line = pack_gige(row, bits)
        else:
            line = row.astype("<u2" if bits > 8 else np.uint8).tobytes()
        lines.append(line + bytes([0xAB]) * padding)  # padding bytes must never reach the frame
    frame = layout_for(name).to_frame(b"".join(lines), width, height, padding_x=padding)
    np.testing.assert_array_equal(frame, pixels)


@pytest.mark.parametrize("name", ["Mono10p", "Mono12p", "Mono10Packed", "Mono12Packed", "Mono10", "Mono16"])
def test_agrees_with_the_reference_library_unpacker(name):
    from harvesters.util.pfnc import Dictionary

    layout = layout_for(name)
    raw = np.random.default_rng(5).integers(0, 256, layout.line_bytes(16) * 6, dtype=np.uint8)
    reference = np.asarray(Dictionary.get_proxy(symbolic=name).expand(raw)).reshape(-1)[: 16 * 6]
    np.testing.assert_array_equal(layout.to_frame(raw.tobytes(), 16, 6).reshape(-1), reference)


def test_colour_is_refused_unless_luminance_is_asked_for():
    with pytest.raises(UnsupportedPixelFormat, match="RGBa8 is colour"):
        layout_for("RGBa8")
    with pytest.raises(UnsupportedPixelFormat, match="BayerRG8 cannot be read.*Mono12p"):
        layout_for("BayerRG8", luminance=True)
    rgba = np.array([[[255, 0, 0, 9], [0, 255, 0, 9], [0, 0, 255, 9], [100, 100, 100, 9]]], np.uint8)
    y = layout_for("RGBa8", luminance=True).to_frame(rgba.tobytes(), 4, 1)
    # ITU-R BT.601-7 (2011), section 2.5.1: E'Y = 0.299 E'R + 0.587 E'G + 0.114 E'B
    assert y.dtype == np.uint8 and list(y[0]) == [76, 150, 29, 100]
    bgr = rgba[:, :, 2::-1]
    assert list(layout_for("BGR8", luminance=True).to_frame(bgr.tobytes(), 4, 1)[0]) == [76, 150, 29, 100]


def test_a_short_buffer_is_an_error_not_a_partial_frame():
    with pytest.raises(ValueError, match="short"):
        layout_for("Mono12p").to_frame(b"\x00" * 10, 8, 2)

