"""FFT backends and the mask-chunk threading of maskrun.reconstruct give identical numerics."""
import numpy as np
import pytest

from maskrun.reconstruct import forward, octanary_masks, relative_error, solve
from maskrun.reconstruct import fft as rfft
from maskrun.reconstruct import solvers as S


@pytest.mark.parametrize("backend", ["numpy", "scipy-1", "scipy-all"])
@pytest.mark.parametrize("dtype", [np.complex64, np.complex128])
def test_backends_match_numpy_reference(backend, dtype):
    # Reference: numpy.fft.fft2 / ifft2 with norm="ortho" in complex128 (outside implementation).
    rng = np.random.default_rng(0)
    a = (rng.standard_normal((3, 32, 24)) + 1j * rng.standard_normal((3, 32, 24))).astype(dtype)
    plan = rfft.FFTPlan(a.shape, dtype, backend)
    b = a.copy()
    out = plan.forward(b)
    assert out is b and b.dtype == np.dtype(dtype)
    tol = 1e-5 if dtype == np.complex64 else 1e-12
    np.testing.assert_allclose(b, np.fft.fft2(a.astype(np.complex128), norm="ortho"), atol=tol)
    plan.inverse(b)
    np.testing.assert_allclose(b, a, atol=tol)


def test_unknown_backend_and_worker_limit():
    with pytest.raises(ValueError, match="unknown FFT backend"):
        rfft.FFTPlan((2, 8, 8), np.complex64, "fftw")
    with pytest.raises(ValueError):
        rfft.set_max_workers(0)
    rfft.set_max_workers(1)
    try:
        assert rfft._cpu_workers() == 1
        assert rfft.time_one_fft((16, 16), np.complex64, repeats=3) > 0
    finally:
        rfft.set_max_workers(None)


@pytest.mark.parametrize("method", ["er", "raar", "wf"])
def test_threaded_mask_chunks_match_serial(method):
    rng = np.random.default_rng(1)
    n, K = 24, 5  # odd K: unequal chunks
    x = rng.standard_normal((n, n)) + 1j * rng.standard_normal((n, n))
    m = octanary_masks(K, (n, n), seed=1)
    y = forward(x, m)
    results = []
    for threads in (1, 2, 3):
        ws = S.Workspace(m, np.complex128, threads=threads)
        assert ws.threads == threads and len(ws.chunks) == threads
        ws.set_intensities(y)
        x0 = S.spectral_initialization(ws, 20)
        cons = S._Constraints(None, False, (n, n), np.complex128)
        runner = {"er": S._run_er, "raar": S._run_raar, "wf": S._run_wf}[method]
        res = []
        xe, _ = runner(ws, x0, 30, cons, res, S._Stopper(-1, 0), None, None, [])
        results.append((xe, np.array(res)))
    for xe, res in results[1:]:
        np.testing.assert_allclose(xe, results[0][0], rtol=1e-10, atol=1e-12)
        np.testing.assert_allclose(res, results[0][1], rtol=1e-10)


def test_solve_gives_same_answer_with_any_backend():
    rng = np.random.default_rng(2)
    x = rng.standard_normal((32, 32)) + 1j * rng.standard_normal((32, 32))
    m = octanary_masks(6, x.shape, seed=2)
    y = forward(x, m)
    for backend in ("numpy", "scipy-1"):
        assert relative_error(x, solve(y, m, fft_backend=backend, dtype=np.complex128).estimate) < 1e-10
