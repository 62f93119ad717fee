"""IncrementalEngine of maskrun.reconstruct: warm-started live reconstruction."""
import time

import numpy as np
import pytest
from skimage import data as skdata
from skimage.transform import resize

from maskrun.reconstruct import (
    EngineUpdate,
    IncrementalEngine,
    ReconstructionInputError,
    forward,
    octanary_masks,
    relative_error,
)


def camera_object(n):
    # scikit-image's bundled 'camera' (amplitude) and 'moon' (phase) photographs
    amp = resize(skdata.camera().astype(float) / 255.0, (n, n), anti_aliasing=True)
    ph = resize(skdata.moon().astype(float) / 255.0, (n, n), anti_aliasing=True)
    return amp * np.exp(1j * np.pi * ph)


def frame_sets(x, m, photons_per_frame, count, seed=0, dark_offset=0.0):
    y = forward(x, m)
    scale = photons_per_frame / (y.sum() / m.shape[0])
    rng = np.random.default_rng(seed)
    sets = [(rng.poisson(y * scale) - dark_offset).astype(np.float32) for _ in range(count)]
    return sets, x * np.sqrt(scale)


def test_accumulate_sharpens_and_reports_consistent_figures():
    x = camera_object(48)
    m = octanary_masks(8, x.shape, seed=1)
    sets, truth = frame_sets(x, m, 1e5, 4, dark_offset=0.3)
    eng = IncrementalEngine(m, mode="accumulate", dtype=np.complex64)  # as the daemon's worker asks
    assert eng.estimate is None
    errs = []
    for i, ys in enumerate(sets):
        u = eng.update(ys)
        assert isinstance(u, EngineUpdate)
        assert u.estimate.shape == x.shape and u.estimate.dtype == np.complex64
        assert u.passes_used == i + 1
        assert u.photons == pytest.approx(sum(np.maximum(s, 0).sum() for s in sets[: i + 1]), rel=1e-6)
        assert u.iterations >= 1 and u.elapsed_s > 0 and np.isfinite(u.residual)
        errs.append(relative_error(truth, u.estimate))
        # the shot-noise prediction is within a factor 2 of the true error
        assert 0.5 < errs[-1] / u.error_estimate < 2.0
    assert errs[-1] < 0.8 * errs[0]  # averaging 4 frame sets: error falls ~ 1/sqrt(passes)
    np.testing.assert_array_equal(eng.estimate, u.estimate)


def test_demo_sized_problem_reaches_five_percent_quickly():
    # The daemon's demo: 128x128, K = 8 octanary, 1e7 photons per frame, 3 passes, default settings.
    x = camera_object(128)
    m = octanary_masks(8, x.shape, seed=2)
    sets, truth = frame_sets(x, m, 1e7, 3, seed=2)
    eng = IncrementalEngine(m, mode="accumulate", iterations_per_update=50)
    t0 = time.perf_counter()
    for ys in sets:
        u = eng.update(ys)
    assert relative_error(truth, u.estimate) < 0.05
    assert time.perf_counter() - t0 < 10.0  # generous on a shared machine; typically ~0.3 s


def test_follow_mode_tracks_a_changed_object_and_uses_window():
    x1 = camera_object(32)
    x2 = np.roll(x1, 5, axis=1) * np.exp(0.5j)
    m = octanary_masks(8, x1.shape, seed=3)
    s1, t1 = frame_sets(x1, m, 1e6, 2, seed=1)
    s2, t2 = frame_sets(x2, m, 1e6, 3, seed=2)
    eng = IncrementalEngine(m, mode="follow", window=2, iterations_per_update=80)
    for ys in s1:
        u = eng.update(ys)
    assert u.passes_used == 2
    assert relative_error(t1, u.estimate) < 0.05
    for ys in s2:
        u = eng.update(ys)
    assert u.passes_used == 2  # only the window
    assert u.photons == pytest.approx(float(s2[1].sum() + s2[2].sum()), rel=1e-6)
    assert relative_error(t2, u.estimate) < 0.05


def test_accumulate_mode_averages_rather_than_follows():
    x = camera_object(24)
    m = octanary_masks(8, x.shape, seed=4)
    y = forward(x, m)
    eng = IncrementalEngine(m, mode="accumulate", dtype=np.complex128, iterations_per_update=300)
    eng.update(y)
    u = eng.update(4 * y)  # mean of y and 4y = 2.5 y
    assert relative_error(np.sqrt(2.5) * x, u.estimate) < 1e-6
    assert u.passes_used == 2


def test_time_budget_limits_an_update():
    x = camera_object(64)
    m = octanary_masks(8, x.shape, seed=5)
    sets, _ = frame_sets(x, m, 1e6, 1)
    eng = IncrementalEngine(m, iterations_per_update=100000, time_budget_s=0.2)
    u = eng.update(sets[0])
    assert u.elapsed_s < 1.5 and u.iterations < 100000


def test_reset_and_bad_frame_sets_keep_state():
    x = camera_object(24)
    m = octanary_masks(6, x.shape, seed=6)
    sets, truth = frame_sets(x, m, 1e6, 2)
    eng = IncrementalEngine(m)
    u1 = eng.update(sets[0])
    before = eng.estimate
    bad = sets[1].copy()
    bad[0, 0, 0] = np.nan
    with pytest.raises(ReconstructionInputError, match="NaN"):
        eng.update(bad)
    with pytest.raises(ReconstructionInputError, match="shape"):
        eng.update(sets[1][:5])
    with pytest.raises(ReconstructionInputError, match="zero everywhere"):
        eng.update(np.zeros_like(sets[1]))
    # nothing already taken is lost: data and estimate unchanged by the rejected sets
    assert eng.passes_used == 1
    np.testing.assert_array_equal(eng.estimate, before)
    u2 = eng.update(sets[1])
    assert u2.passes_used == 2 and u2.photons > u1.photons
    eng.reset()
    assert eng.estimate is None and eng.passes_used == 0


def test_constructor_rejects_bad_options():
    m = octanary_masks(4, (8, 8))
    with pytest.raises(ReconstructionInputError, match="mode"):
        IncrementalEngine(m, mode="stream")
    with pytest.raises(ReconstructionInputError, match="window"):
        IncrementalEngine(m, mode="follow", window=0)
    with pytest.raises(ReconstructionInputError, match="iterations_per_update"):
        IncrementalEngine(m, iterations_per_update=0)
    with pytest.raises(ReconstructionInputError, match="time_budget_s"):
        IncrementalEngine(m, time_budget_s=-1)
    with pytest.raises(ReconstructionInputError, match="method"):
        IncrementalEngine(m, method="nope")
    with pytest.raises(ReconstructionInputError, match="dtype"):
        IncrementalEngine(m, dtype=np.float64)
