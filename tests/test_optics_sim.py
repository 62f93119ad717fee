"""The simulated bench (SimulatedOptics) and the demo sample."""

from __future__ import annotations

import threading
import time

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
import scipy.fft

from maskrun.simulators.optics import SimulatedOptics
from maskrun.simulators.sample import FUSED_SILICA_INDEX_633NM, phase_target


def _masks(k, shape, seed=0):
    rng = np.random.default_rng(seed)
    return np.exp(2j * np.pi * rng.random((k, *shape)))


def _optics(grid=(16, 20), sensor=(24, 30), k=3, rate=1e6, seed=0):
    rng = np.random.default_rng(seed + 100)
    sample = (0.5 + rng.random(grid)) * np.exp(1j * rng.random(grid))
    return SimulatedOptics(sample, _masks(k, grid, seed), rate, sensor)


def _dft_matrix(n):
    # Unitary DFT written out from its definition, F[j, l] = exp(-2 pi i j l / n) / sqrt(n)
    # (Oppenheim & Schafer, Discrete-Time Signal Processing, 3rd ed., 2010, ch. 8 -- from memory).
    j = np.arange(n)
    return np.exp(-2j * np.pi * np.outer(j, j) / n) / np.sqrt(n)


def test_truth_field_gives_photon_rate_per_mask():
    opt = _optics()
    truth = opt.truth_field()
    masks = opt.masks
    # forward model from the DFT definition, independent of numpy's FFT
    fr, fc = _dft_matrix(truth.shape[0]), _dft_matrix(truth.shape[1])
    per_mask = np.array([np.sum(np.abs(fr @ (m * truth) @ fc.T) ** 2) for m in masks])
    assert per_mask.mean() == pytest.approx(1e6, rel=1e-10)
    # Parseval: with a unitary DFT the photon count equals the energy of m_k * x
    # (Oppenheim & Schafer 2010, ch. 8, Parseval's relation for the DFT -- from memory)
    np.testing.assert_allclose(per_mask, np.sum(np.abs(masks * truth) ** 2, axis=(1, 2)), rtol=1e-10)


def test_expected_photons_layout_matches_reconstruction_convention():
    opt = _optics()
    opt.shutter_open = True
    opt.shown_mask = 2
    exposure_s = 0.25
    img = opt.expected_photons(exposure_s)
    assert img.shape == (24, 30) and img.dtype == np.float64
    r0, c0, h, w = opt.grid_roi
    assert (r0, c0, h, w) == (4, 5, 16, 20)
    crop = np.fft.ifftshift(img[r0 : r0 + h, c0 : c0 + w])
    # reference library: scipy's FFT with unitary normalisation
    ref = np.abs(scipy.fft.fft2(opt.masks[2] * opt.truth_field(), norm="ortho")) ** 2 * exposure_s
    np.testing.assert_allclose(crop, ref, rtol=1e-10, atol=1e-12)
    outside = img.copy()
    outside[r0 : r0 + h, c0 : c0 + w] = 0
    assert not outside.any()
    # photons scale linearly with the exposure
    np.testing.assert_allclose(opt.expected_photons(2 * exposure_s), 2 * img)


def test_reconstruction_forward_model_agrees():
    from maskrun.reconstruct.propagation import forward

    opt = _optics()
    opt.shutter_open = True
    y = forward(opt.truth_field(), opt.masks)
    r0, c0, h, w = opt.grid_roi
    for k in range(opt.mask_count):
        opt.shown_mask = k
        crop = np.fft.ifftshift(opt.expected_photons(1.0)[r0 : r0 + h, c0 : c0 + w])
        np.testing.assert_allclose(crop, y[k], rtol=1e-9)


def test_shutter_closed_and_blank_mask():
    opt = _optics()
    assert not opt.shutter_open and opt.interlock_closed and opt.shown_mask is None
    assert not opt.expected_photons(1.0).any()
    opt.shutter_open = True
    blank = opt.expected_photons(1.0)
    r0, c0, h, w = opt.grid_roi
    ref = np.fft.fftshift(np.abs(np.fft.fft2(opt.truth_field(), norm="ortho")) ** 2)
    np.testing.assert_allclose(blank[r0 : r0 + h, c0 : c0 + w], ref, rtol=1e-10)


def test_patterns_are_cached(monkeypatch):
    opt = _optics()
    opt.shutter_open = True
    opt.shown_mask = 1
    calls = []
    real = np.fft.fft2
    monkeypatch.setattr(np.fft, "fft2", lambda *a, **k: calls.append(1) or real(*a, **k))
    for _ in range(5):
        opt.expected_photons(0.1)
    assert len(calls) == 1
    opt.set_sample(opt.sample * 2, rescale=False)  # a new sample invalidates the cache
    opt.expected_photons(0.1)
    assert len(calls) == 2


def test_set_sample_rescale_choices():
    opt = _optics()
    opt.shutter_open = True
    before = opt.expected_photons(1.0).sum()
    opt.set_sample(opt.sample * 0.5, rescale=False)  # laser power fixed: a darker sample, fewer photons
    assert opt.expected_photons(1.0).sum() == pytest.approx(before * 0.25, rel=1e-9)
    opt.set_sample(opt.sample, rescale=True)
    per_mask = []
    for k in range(opt.mask_count):
        opt.shown_mask = k
        per_mask.append(opt.expected_photons(1.0).sum())
    assert np.mean(per_mask) == pytest.approx(1e6, rel=1e-9)


def test_bad_inputs_name_what_is_wrong():
    with pytest.raises(ValueError, match=r"sensor_shape \(10, 30\).*grid shape \(16, 20\)"):
        _optics(sensor=(10, 30))
    with pytest.raises(ValueError, match="masks must have shape"):
        SimulatedOptics(np.ones((4, 4)), np.ones((2, 4, 5)), 1.0, (4, 4))
    opt = _optics()
    with pytest.raises(ValueError, match="out of range"):
        opt.shown_mask = 3
    with pytest.raises(ValueError, match="exposure_s"):
        opt.expected_photons(-1)


def test_trigger_line_latches_pulses_and_times_out():
    opt = _optics()
    t0 = time.monotonic()
    assert opt.wait_trigger(0.05) is False
    assert 0.04 <= time.monotonic() - t0 < 1.0
    opt.fire_trigger()
    opt.fire_trigger()
    assert opt.wait_trigger(0) and opt.wait_trigger(0) and not opt.wait_trigger(0)
    threading.Timer(0.03, opt.fire_trigger).start()
    assert opt.wait_trigger(2.0)
    opt.fire_trigger()
    assert opt.clear_triggers() == 1 and not opt.wait_trigger(0)
    assert opt.triggers_fired == 4


def test_listeners_see_state_changes_from_other_threads():
    opt = _optics()
    seen = []
    unsubscribe = opt.subscribe(lambda name, value: seen.append((name, value)))
    t = threading.Thread(target=lambda: setattr(opt, "interlock_closed", False))
    t.start()
    t.join()
    opt.interlock_closed = False  # no change, no event
    opt.shown_mask = 0
    unsubscribe()
    opt.shutter_open = True
    assert seen == [("interlock_closed", False), ("shown_mask", 0)]


def test_phase_target_depths_and_patch():
    truth = phase_target((128, 128))
    assert truth.field.dtype == np.complex128 and truth.field.shape == (128, 128)
    np.testing.assert_array_equal(truth.field, phase_target((128, 128)).field)  # deterministic
    # thin-element phase delay phi = 2 pi (n - 1) t / lambda
    # (Goodman, Introduction to Fourier Optics, 3rd ed., 2005, sec. 5.1 -- from memory);
    # n = 1.457 for fused silica at 632.8 nm (from memory)
    assert FUSED_SILICA_INDEX_633NM == pytest.approx(1.457, abs=1e-3)
    disk_centre = (int(0.68 * 128), int(0.30 * 128))
    plate = (5, 64)  # unetched glass
    expected = 2 * np.pi * 0.457 * (-400e-9) / 632.8e-9
    phase = np.angle(truth.field[disk_centre] / truth.field[plate])
    assert phase == pytest.approx(expected, abs=1e-6)
    assert truth.phase_rad[disk_centre] == pytest.approx(expected, abs=1e-6)
    # chromium patch: amplitude 0.4 of the plate, once the Gaussian illumination is divided out
    r, c = int(0.65 * 128), int(0.70 * 128)
    gaussian = np.exp(-(((r / 128 - 0.5) / 0.45) ** 2 + ((c / 128 - 0.5) / 0.45) ** 2))
    assert np.abs(truth.field[r, c]) / gaussian == pytest.approx(0.4, abs=1e-3)
    assert np.abs(truth.field[plate]) / np.exp(-(((5 / 128 - 0.5) / 0.45) ** 2)) == pytest.approx(1.0, abs=1e-3)
    # smooth edges: no phase jump between neighbours is as large as the full disk step
    assert np.abs(np.diff(truth.phase_rad, axis=1)).max() < 0.6 * abs(expected)
    # step wedge: four distinct depths
    row = truth.thickness_m[int(0.88 * 128)]
    levels = {round(-row[c] * 1e9) for c in (int(f * 128) for f in (0.2, 0.38, 0.55, 0.75))}
    assert levels == {60, 120, 180, 240}


def test_phase_target_rejects_tiny_grid():
    with pytest.raises(ValueError, match="at least 16"):
        phase_target((8, 32))


@settings(max_examples=30, deadline=None)
@given(
    h=st.integers(1, 12), w=st.integers(1, 12), extra_r=st.integers(0, 7), extra_c=st.integers(0, 7),
    k=st.integers(1, 3), rate=st.floats(1e-3, 1e12), exposure_s=st.floats(1e-6, 10.0), seed=st.integers(0, 99),
)
def test_photon_budget_for_any_geometry(h, w, extra_r, extra_c, k, rate, exposure_s, seed):
    rng = np.random.default_rng(seed)
    sample = (0.1 + rng.random((h, w))) * np.exp(2j * np.pi * rng.random((h, w)))
    opt = SimulatedOptics(sample, _masks(k, (h, w), seed), rate, (h + extra_r, w + extra_c))
    opt.shutter_open = True
    r0, c0, rows, cols = opt.grid_roi
    assert (rows, cols) == (h, w) and r0 + rows <= h + extra_r and c0 + cols <= w + extra_c
    # centred: the margins on both sides differ by at most one pixel
    assert abs((h + extra_r - rows - r0) - r0) <= 1 and abs((w + extra_c - cols - c0) - c0) <= 1
    totals = []
    for m in range(k):
        opt.shown_mask = m
        img = opt.expected_photons(exposure_s)
        assert img.min() >= 0
        totals.append(img[r0 : r0 + rows, c0 : c0 + cols].sum())
        assert img.sum() == pytest.approx(totals[-1], rel=1e-12)
    assert np.mean(totals) == pytest.approx(rate * exposure_s, rel=1e-9)
