"""The simulated misregistered modulator (mask offset) and the modulator profile table."""
import numpy as np
import pytest

from maskrun.drivers.modulator_profile import ModulatorProfile, ModulatorProfileError, linear_profile
from maskrun.reconstruct.masks import octanary_masks, shift_masks
from maskrun.simulators.optics import SimulatedOptics


def test_whole_pixel_shift_is_a_roll_and_fraction_is_linear():
    m = octanary_masks(3, (16, 12), seed=1)
    assert np.array_equal(shift_masks(m, (1, -2)), np.roll(m, (1, -2), axis=(1, 2)))
    half = shift_masks(m, (0, 0.5))
    assert np.allclose(half, 0.5 * m + 0.5 * np.roll(m, 1, axis=2))
    # shifting by 0.25 twice is not the same as 0.5 (linear interpolation smooths), but 1.0 = roll
    assert np.allclose(shift_masks(m, (0, 1.0)), np.roll(m, 1, axis=2))


def test_optics_sees_shifted_masks_and_keeps_the_truth():
    rng = np.random.default_rng(0)
    x = rng.standard_normal((16, 16)) + 1j * rng.standard_normal((16, 16))
    m = octanary_masks(4, (16, 16), seed=2)
    ref = SimulatedOptics(x, m, 1e6, (16, 16))
    off = SimulatedOptics(x, m, 1e6, (16, 16), mask_offset_px=(1.0, 2.5))
    assert off.mask_offset_px == (1.0, 2.5)
    assert np.allclose(off.masks, shift_masks(m, (1.0, 2.5)))
    assert not np.allclose(ref.masks, off.masks)


def test_linear_profile_round_trip_and_wrap(tmp_path):
    p = linear_profile(200, 633e-9)
    assert p.phase_of_grey([0, 100, 200]) == pytest.approx([0, np.pi, 2 * np.pi])
    # phase pi -> grey 100; phase 2 pi wraps to grey 0 or 200 (both 0 mod 2 pi)
    g = p.grey_for_phase([np.pi, 2 * np.pi, -np.pi / 2])
    assert g[0] == 100 and g[1] in (0, 200) and g[2] == 150
    path = p.save(tmp_path / "slm.json")
    assert ModulatorProfile.load(path) == p.model_copy(update={"created": ModulatorProfile.load(path).created})


def test_bad_profiles_are_refused_with_the_file_named(tmp_path):
    bad = tmp_path / "bad.json"
    bad.write_text('{"wavelength_m": 1e-6, "grey_levels": [0, 0], "phase_rad": [0, 1]}')
    with pytest.raises(ModulatorProfileError, match="bad.json.*ascending"):
        ModulatorProfile.load(bad)
    bad.write_text("{nope")
    with pytest.raises(ModulatorProfileError, match="not JSON"):
        ModulatorProfile.load(bad)
