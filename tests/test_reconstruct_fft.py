"""FFT backends and the mask-chunk threading of maskrun.reconstruct give identical numerics."""
import json

import numpy as np
import pytest

from maskrun.reconstruct import forward, octanary_masks, relative_error, solve
from maskrun.reconstruct import fft as rfft
from maskrun.reconstruct import fft_backends as rfft_backends
from maskrun.reconstruct import solvers as S


@pytest.mark.parametrize("backend", rfft.available_backends())
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


@pytest.mark.parametrize("backend", rfft.available_backends())
@pytest.mark.parametrize("aligned", [True, False])
def test_unnormalised_plans_match_numpy_default_scaling(backend, aligned):
    # Reference: numpy.fft.fft2 (norm="backward": no factor) and ifft2 times N (norm="forward") in complex128.
    rng = np.random.default_rng(3)
    shape = (4, 16, 20)
    a = (rng.standard_normal(shape) + 1j * rng.standard_normal(shape)).astype(np.complex64)
    plan = rfft.FFTPlan(shape, np.complex64, backend, unitary=False)
    assert plan.scale == pytest.approx(np.sqrt(16 * 20))
    raw = rfft.aligned_empty((a.size + 1,), np.complex64)
    b = raw[:a.size].reshape(shape) if aligned else raw[1:].reshape(shape)  # FFTW keeps a plan for each
    b[...] = a
    plan.forward(b)
    np.testing.assert_allclose(b, np.fft.fft2(a.astype(np.complex128)), rtol=1e-5, atol=1e-3)
    plan.inverse(b)
    np.testing.assert_allclose(b, a * (16 * 20), rtol=1e-5, atol=1e-2)


class _BatchedOrthoBug:
    """Reproduces the fault reported for mkl_fft 2.3.2 (maskrun issue 17, measured on this machine):
    a batched fft2(norm="ortho") scales by 1/sqrt(K N) instead of 1/sqrt(N); norm=None is right."""

    @staticmethod
    def _k(x):
        return int(np.prod(x.shape[:-2])) if x.ndim > 2 else 1

    def fft2(self, x, axes=(-2, -1), norm=None):
        out = np.fft.fft2(x, axes=axes, norm=norm)
        return out / np.sqrt(self._k(x)) if norm == "ortho" else out

    def ifft2(self, x, axes=(-2, -1), norm=None):
        out = np.fft.ifft2(x, axes=axes, norm=norm)
        return out / np.sqrt(self._k(x)) if norm == "ortho" else out


def test_correctness_check_refuses_a_wrongly_scaled_backend(monkeypatch, tmp_path):
    monkeypatch.setenv("MASKRUN_FFT_CACHE", str(tmp_path))
    monkeypatch.setattr(rfft_backends, "_mkl_fft", _BatchedOrthoBug())
    monkeypatch.setattr(rfft_backends, "_CHECKED", {})
    monkeypatch.setattr(rfft_backends, "_CHOICE_CACHE", {})
    shape = (8, 64, 64)
    assert "mkl" in rfft.available_backends()
    problem = rfft.check_backend("mkl", shape, np.complex64, unitary=True)
    assert "norm ratio 0.35355" in problem  # 1/sqrt(8)
    assert rfft.check_backend("mkl", shape, np.complex64, unitary=False) == ""  # unnormalised is right
    assert rfft.check_backend("mkl", (1, 64, 64), np.complex64, unitary=True) == ""  # K = 1 hides the fault
    with pytest.raises(rfft.BackendIncorrect, match="wrong transforms"):
        rfft.FFTPlan(shape, np.complex64, "mkl")
    with pytest.warns(RuntimeWarning, match="FFT backend mkl refused"):
        choice = rfft._choose(shape, np.complex64, unitary=True)
    assert choice != "mkl"


def test_choice_is_kept_on_disk_and_rechecked(monkeypatch, tmp_path):
    monkeypatch.setenv("MASKRUN_FFT_CACHE", str(tmp_path))
    monkeypatch.setattr(rfft_backends, "_CHOICE_CACHE", {})
    shape = (2, 64, 48)
    first = rfft._choose(shape, np.complex64, single_thread=True)
    ranking = json.loads((tmp_path / "fft-ranking.json").read_text())
    entry = ranking["2x64x48 complex64 workers=1"]
    assert entry["choice"] == first and set(entry["seconds"]) >= {"numpy", "scipy-1"}
    # a later process takes the kept choice without measuring again
    entry["choice"] = "scipy-1"
    (tmp_path / "fft-ranking.json").write_text(json.dumps(ranking))
    rfft_backends._CHOICE_CACHE.clear()
    assert rfft._choose(shape, np.complex64, single_thread=True) == "scipy-1"
    if "fftw-1" in rfft.available_backends():
        rfft.FFTPlan((3, 40, 40), np.complex64, "fftw-1", unitary=False).forward(rfft.aligned_empty((3, 40, 40), np.complex64))
        wisdom = json.loads(rfft.wisdom_path().read_text())
        assert wisdom["wisdom"] and any(len(w) > 0 for w in wisdom["wisdom"])


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
    for backend in [b for b in rfft.available_backends() if not b.endswith("-all")]:
        assert relative_error(x, solve(y, m, fft_backend=backend, dtype=np.complex128).estimate) < 1e-10


@pytest.mark.parametrize("backend", [b for b in rfft.available_backends() if b.startswith("fftw")])
def test_plans_of_one_shape_transform_their_own_buffers_from_two_threads(backend):
    # The solvers run equal-shaped mask chunks in two threads, each with its own FFTPlan. A pyfftw
    # plan holds the arrays it transforms, so two FFTPlans sharing one plan transformed each
    # other's buffers (wrong solver results under load). Reference: numpy.fft.fft2, unnormalised.
    from concurrent.futures import ThreadPoolExecutor

    shape = (4, 64, 64)
    rng = np.random.default_rng(3)
    plans = [rfft.FFTPlan(shape, np.complex128, backend, unitary=False) for _ in range(2)]
    assert plans[0]._fftw is not plans[1]._fftw  # no pyfftw plan is shared between two FFTPlans
    inputs = [rng.standard_normal(shape) + 1j * rng.standard_normal(shape) for _ in range(2)]
    expected = [np.fft.fft2(a) for a in inputs]

    def transform_many(i):
        worst = 0.0
        for _ in range(300):
            buf = rfft.aligned_empty(shape, np.complex128)
            buf[...] = inputs[i]
            plans[i].forward(buf)
            worst = max(worst, float(np.max(np.abs(buf - expected[i]))))
        return worst

    import sys

    interval = sys.getswitchinterval()
    sys.setswitchinterval(1e-6)  # switch threads often, as a loaded machine does
    try:
        with ThreadPoolExecutor(2) as pool:
            worst = list(pool.map(transform_many, [0, 1]))
    finally:
        sys.setswitchinterval(interval)
    assert max(worst) < 1e-9, worst
