"""Mask families, forward model and the error metric of maskrun.reconstruct."""
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from maskrun.reconstruct import (
    ReconstructionInputError,
    binary_amplitude_masks,
    forward,
    load_masks,
    mask_weight,
    octanary_masks,
    quantized_phase_masks,
    random_phase_masks,
    relative_error,
)


def test_octanary_alphabet_and_frequencies():
    # Candès, Li, Soltanolkotabi, "Phase retrieval from coded diffraction patterns",
    # Appl. Comput. Harmon. Anal. 39 (2015): d = b1*b2, b1 uniform on {1,-1,i,-i},
    # b2 = sqrt(2)/2 w.p. 4/5 and sqrt(3) w.p. 1/5, so E|d|^2 = 1.
    m = octanary_masks(8, (64, 64), seed=11)
    assert m.shape == (8, 64, 64) and m.dtype == np.complex128
    amp = np.abs(m)
    lo, hi = np.sqrt(2) / 2, np.sqrt(3)
    assert np.all(np.isclose(amp, lo) | np.isclose(amp, hi))
    n = m.size
    frac_hi = np.mean(np.isclose(amp, hi))
    assert abs(frac_hi - 0.2) < 4 * np.sqrt(0.2 * 0.8 / n)
    unit = m / amp
    for b in (1, -1, 1j, -1j):
        frac = np.mean(np.isclose(unit, b))
        assert abs(frac - 0.25) < 4 * np.sqrt(0.25 * 0.75 / n)
    assert abs(np.mean(amp**2) - 1.0) < 0.03
    # independence of the two factors: high amplitude equally likely for each phase
    for b in (1, -1, 1j, -1j):
        sel = np.isclose(unit, b)
        assert abs(np.mean(np.isclose(amp[sel], hi)) - 0.2) < 0.02


def test_octanary_same_seed_same_masks_and_different_seed_differs():
    a = octanary_masks(3, (8, 9), seed=5)
    b = octanary_masks(3, (8, 9), seed=5)
    c = octanary_masks(3, (8, 9), seed=6)
    assert a.shape == (3, 8, 9)
    np.testing.assert_array_equal(a, b)
    assert not np.array_equal(a, c)


def test_phase_families_are_unit_modulus_and_quantized():
    r = random_phase_masks(4, (16, 16), seed=1)
    np.testing.assert_allclose(np.abs(r), 1.0)
    q = quantized_phase_masks(4, (16, 16), levels=4, seed=1)
    np.testing.assert_allclose(np.abs(q), 1.0)
    phases = np.mod(np.angle(q), 2 * np.pi)
    steps = np.round(phases / (np.pi / 2)) % 4
    np.testing.assert_allclose(np.exp(1j * steps * np.pi / 2), q, atol=1e-12)
    assert set(np.unique(steps).astype(int)) == {0, 1, 2, 3}
    lut = np.array([0.0, 1.0, 2.5])
    q2 = quantized_phase_masks(2, (8, 8), levels=3, lut_rad=lut, seed=2)
    got = np.unique(np.round(np.mod(np.angle(q2), 2 * np.pi), 9))
    assert set(got) <= set(np.round(lut, 9))
    with pytest.raises(ReconstructionInputError, match="lut_rad"):
        quantized_phase_masks(2, (8, 8), levels=3, lut_rad=[0.0, 1.0])


def test_binary_amplitude_masks_cover_every_pixel():
    d = binary_amplitude_masks(3, (32, 32), on_fraction=0.2, seed=4)
    assert set(np.unique(d.real)) <= {0.0, 1.0}
    np.testing.assert_array_equal(d.imag, 0)
    assert np.all(mask_weight(d) >= 1)  # 0.8**3 of pixels would otherwise be dark everywhere
    d8 = binary_amplitude_masks(8, (32, 32), on_fraction=0.5, seed=4)
    assert 0.47 < np.mean(d8.real) < 0.53


def test_load_masks_npy_and_npz(tmp_path):
    m = octanary_masks(3, (8, 8), seed=2)
    np.save(tmp_path / "m.npy", m)
    np.testing.assert_array_equal(load_masks(tmp_path / "m.npy"), m)
    np.savez(tmp_path / "a.npz", masks=m, other=np.zeros(3))
    np.testing.assert_array_equal(load_masks(tmp_path / "a.npz"), m)
    np.savez(tmp_path / "b.npz", first=m, second=m * 2)
    with pytest.raises(ReconstructionInputError, match="key="):
        load_masks(tmp_path / "b.npz")
    np.testing.assert_array_equal(load_masks(tmp_path / "b.npz", key="second"), m * 2)
    with pytest.raises(ReconstructionInputError, match="does not exist"):
        load_masks(tmp_path / "missing.npy")
    (tmp_path / "junk.npy").write_bytes(b"not an array")
    with pytest.raises(ReconstructionInputError, match="cannot read"):
        load_masks(tmp_path / "junk.npy")
    np.save(tmp_path / "zero.npy", np.zeros((2, 4, 4), complex))
    with pytest.raises(ReconstructionInputError, match="zero everywhere"):
        load_masks(tmp_path / "zero.npy")


def test_forward_matches_numpy_fft_per_mask_and_parseval():
    # Reference: numpy.fft.fft2 with norm="ortho", one mask at a time (outside implementation).
    rng = np.random.default_rng(0)
    x = rng.standard_normal((12, 10)) + 1j * rng.standard_normal((12, 10))
    m = octanary_masks(5, (12, 10), seed=3)
    y = forward(x, m)
    assert y.shape == (5, 12, 10) and y.dtype == np.float64
    for k in range(5):
        ref = np.abs(np.fft.fft2(m[k] * x, norm="ortho")) ** 2
        np.testing.assert_allclose(y[k], ref, rtol=1e-12, atol=1e-12)
    # Parseval (unitary DFT): sum_k sum y_k = sum_k ||m_k x||^2
    np.testing.assert_allclose(y.sum(), np.sum(np.abs(m * x) ** 2), rtol=1e-12)
    # explicit DFT sum at one frequency (definition of the DFT, no fftshift)
    u, v = 3, 7
    H, W = x.shape
    ii, jj = np.meshgrid(np.arange(H), np.arange(W), indexing="ij")
    direct = np.sum(m[0] * x * np.exp(-2j * np.pi * (u * ii / H + v * jj / W))) / np.sqrt(H * W)
    assert abs(abs(direct) ** 2 - y[0, u, v]) < 1e-10


def test_forward_single_precision_stays_single():
    x = np.ones((8, 8), np.complex64)
    m = octanary_masks(2, (8, 8)).astype(np.complex64)
    assert forward(x, m).dtype == np.float32


def test_forward_rejects_shape_mismatch_and_nan():
    m = octanary_masks(2, (8, 8))
    with pytest.raises(ReconstructionInputError, match="does not match"):
        forward(np.ones((8, 9)), m)
    bad = np.ones((8, 8), complex)
    bad[1, 1] = np.nan
    with pytest.raises(ReconstructionInputError, match="NaN"):
        forward(bad, m)


@settings(max_examples=40, deadline=None)
@given(phi=st.floats(-10, 10), scale_seed=st.integers(0, 2**16))
def test_relative_error_ignores_global_phase(phi, scale_seed):
    rng = np.random.default_rng(scale_seed)
    x = rng.standard_normal((6, 5)) + 1j * rng.standard_normal((6, 5))
    assert relative_error(x, np.exp(1j * phi) * x) < 1e-12
    noise = 1e-3 * (rng.standard_normal((6, 5)) + 1j * rng.standard_normal((6, 5)))
    e = relative_error(x, np.exp(1j * phi) * (x + noise))
    # the optimal phase can only lower the error below the unaligned one
    assert e <= np.linalg.norm(noise) / np.linalg.norm(x) + 1e-12
    assert e > 0


def test_relative_error_against_brute_force_phase_search():
    rng = np.random.default_rng(7)
    x = rng.standard_normal((5, 5)) + 1j * rng.standard_normal((5, 5))
    xh = rng.standard_normal((5, 5)) + 1j * rng.standard_normal((5, 5))
    phis = np.linspace(0, 2 * np.pi, 200001)
    c = np.vdot(xh, x)
    brute = np.sqrt(np.min(np.linalg.norm(x) ** 2 + np.linalg.norm(xh) ** 2
                           - 2 * np.real(np.exp(-1j * phis) * c))) / np.linalg.norm(x)
    assert abs(relative_error(x, xh) - brute) < 1e-8
    with pytest.raises(ReconstructionInputError):
        relative_error(np.zeros((2, 2)), xh[:2, :2])
