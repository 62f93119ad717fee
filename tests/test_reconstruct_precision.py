"""Precision follows the input: solve and the incremental engine compute in the precision of their
inputs unless ``dtype`` is given; ``iterations`` is a budget; the result says why it stopped."""
import numpy as np
import pytest
from skimage import data as skdata
from skimage.transform import resize

from maskrun.reconstruct import IncrementalEngine, forward, octanary_masks, relative_error, solve
from maskrun.reconstruct.validation import working_dtype


def natural_object(n: int) -> np.ndarray:
    """scikit-image's bundled 'camera' photograph as amplitude, 'moon' as phase (0..pi)."""
    amp = resize(skdata.camera().astype(float) / 255.0, (n, n), anti_aliasing=True)
    ph = resize(skdata.moon().astype(float) / 255.0, (n, n), anti_aliasing=True)
    return amp * np.exp(1j * np.pi * ph)


@pytest.mark.parametrize("n", [64, 256])
def test_double_precision_input_reaches_ten_digits_by_default(n):
    # The check of the issue: noiseless complex128 input, K = 8, default arguments -> 1e-10.
    x = natural_object(n)
    m = octanary_masks(8, x.shape, seed=1)
    y = forward(x, m)
    assert y.dtype == np.float64 and m.dtype == np.complex128
    r = solve(y, m)
    assert r.estimate.dtype == np.complex128
    assert relative_error(x, r.estimate) < 1e-10
    assert r.converged and r.stop_reason in ("tolerance", "precision floor")
    assert r.iterations < 500  # stopped on its own, well inside the default budget


def test_single_precision_input_computes_in_single_precision():
    x = natural_object(48)
    m = octanary_masks(8, x.shape, seed=3).astype(np.complex64)
    y = forward(x, m).astype(np.float32)
    r = solve(y, m)
    assert r.estimate.dtype == np.complex64
    assert 1e-8 < relative_error(x, r.estimate) < 1e-5  # single precision: ~1e-6, not 1e-10
    assert r.converged
    # asked for explicitly, the other precision is used whatever the input
    r2 = solve(y, m, dtype=np.complex128)
    assert r2.estimate.dtype == np.complex128  # (its error is that of the float32-rounded data, ~1e-8)
    r3 = solve(forward(x, m), octanary_masks(8, x.shape, seed=3), dtype=np.complex64)
    assert r3.estimate.dtype == np.complex64


@pytest.mark.parametrize("frames, masks", [
    (np.float32, np.complex64), (np.float64, np.complex64), (np.float32, np.complex128),
    (np.int16, np.complex64), (np.int64, np.complex64), (np.float16, np.float32),
])
def test_working_precision_is_numpys_promotion(frames, masks):
    # Outside reference: numpy's type promotion (NumPy 2 documentation, "Data type promotion in
    # NumPy"; numpy.result_type) and numpy.fft keeping single precision since NumPy 2.0 (release
    # notes, "numpy.fft support for different precisions"): the working dtype is what numpy
    # itself gives for an FFT of the product of the inputs.
    y = np.ones((2, 4, 4), frames)
    m = np.ones((2, 4, 4), masks)
    expected = np.fft.fft2(y * m).dtype
    if int(np.__version__.split(".")[0]) < 2:
        expected = np.result_type(np.complex64, y.dtype, m.dtype)
    assert working_dtype(None, y, m) == expected
    assert working_dtype(np.complex128, y, m) == np.complex128


def test_iterations_are_a_budget_and_the_result_says_why_it_stopped():
    x = natural_object(32)
    m = octanary_masks(8, x.shape, seed=2)
    y = forward(x, m)
    r = solve(y, m, iterations=30, tol=0)
    assert r.iterations == 30 and r.stop_reason == "iterations" and not r.converged
    r = solve(y, m, iterations=5000)  # a big budget is not spent once converged
    assert r.iterations < 500 and r.converged and r.stop_reason in ("tolerance", "precision floor")
    r = solve(y, m, iterations=10 ** 6, tol=0, time_budget_s=0.3)
    assert r.stop_reason in ("time budget", "precision floor")
    rng = np.random.default_rng(0)
    r = solve(rng.poisson(y * 30.0) / 30.0, m, method="er", stall_tol=1e-3)
    assert r.stop_reason == "stalled" and not r.converged


def test_engine_follows_the_masks_precision_unless_told():
    x = natural_object(32)
    m = octanary_masks(8, x.shape, seed=4)
    y = forward(x, m)
    assert IncrementalEngine(m).update(y).estimate.dtype == np.complex128
    assert IncrementalEngine(m.astype(np.complex64)).update(y).estimate.dtype == np.complex64
    assert IncrementalEngine(m, dtype=np.complex64).update(y).estimate.dtype == np.complex64


def test_daemon_worker_asks_for_single_precision_explicitly():
    # The live worker receives float32 frames and rebuilds complex128 masks from their description;
    # it must not silently switch to double-precision cost: it passes dtype=complex64.
    import inspect

    from maskrun.daemon.acquire import align

    from maskrun.daemon.compute import worker

    assert "dtype=np.complex64" in inspect.getsource(worker.WorkerLoop._engine_for)
    assert "dtype=np.complex64" in inspect.getsource(align)
