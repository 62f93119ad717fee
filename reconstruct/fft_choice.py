"""The checked, measured and kept choice of FFT backend: each candidate checked against numpy.fft,
the good ones ranked in interleaved rounds, the choice kept in this process and on disk.

The process caches (``fft_backends._CHECKED``, ``fft_backends._CHOICE_CACHE``), the transform
``fft_backends._run`` and the installed backends are looked up in ``fft_backends`` at call time, so
replacing them there takes effect.
"""
from __future__ import annotations

import time
import warnings

import numpy as np

from . import fft_backends as _b
from .fft_fftw import _LOCK, _read_json, _ranking_path, _versions, _write_json, aligned_empty

_RANK_ROUNDS = 7


def check_backend(backend: str, shape, dtype, unitary: bool = True) -> str:
    """Check one backend against numpy.fft in complex128 on a random batch of ``shape``.

    Returns "" when both directions agree (relative error below 1e-4 in single and 1e-10 in
    double precision), else a description of what was wrong. Kept per process.
    """

    dtype = np.dtype(dtype)
    key = (backend, tuple(shape), dtype.str, bool(unitary))
    if key in _b._CHECKED:
        return _b._CHECKED[key]
    rng = np.random.default_rng(12345)
    a = (rng.standard_normal(shape) + 1j * rng.standard_normal(shape)).astype(dtype)
    ref = a.astype(np.complex128)
    tol = 1e-4 if dtype == np.complex64 else 1e-10
    problem = ""
    try:
        for inverse in (False, True):
            b = a.copy()
            out = _b._run(backend, b, inverse, unitary)
            want = (np.fft.ifft2 if inverse else np.fft.fft2)(ref, norm=_b._norm(inverse, unitary))
            err = float(np.linalg.norm(out - want) / np.linalg.norm(want))
            if out.dtype != dtype or out.shape != tuple(shape):
                problem = f"{'inverse' if inverse else 'forward'} gave {out.dtype} {out.shape}"
            elif not err < tol:
                ratio = float(np.linalg.norm(out) / np.linalg.norm(want))
                problem = (f"{'inverse' if inverse else 'forward'} differs from numpy.fft by {err:.3g} "
                           f"(relative; norm ratio {ratio:.6g})")
            if problem:
                break
    except Exception as exc:  # a backend that fails on this shape is simply not used
        problem = f"{type(exc).__name__}: {exc}"
    _b._CHECKED[key] = problem
    return problem


def _time_backend(backend: str, buf: np.ndarray, repeats: int, unitary: bool = True) -> float:

    _b._run(backend, buf, False, unitary)
    best = np.inf
    for _ in range(repeats):
        t0 = time.perf_counter()
        _b._run(backend, buf, False, unitary)
        _b._run(backend, buf, True, unitary)
        best = min(best, time.perf_counter() - t0)
    return best


def rank_backends(shape, dtype, candidates, unitary: bool = True, rounds: int = _RANK_ROUNDS) -> dict[str, float]:
    """Seconds for one forward + inverse transform of ``shape`` per candidate (minimum over
    ``rounds`` interleaved rounds; every candidate warmed up, i.e. planned, first)."""

    rng = np.random.default_rng(0)
    buf = aligned_empty(shape, dtype)
    buf[...] = (rng.standard_normal(shape) + 1j * rng.standard_normal(shape)).astype(dtype)
    scale = 1.0 if unitary else 1.0 / np.sqrt(shape[-1] * shape[-2])
    for b in candidates:
        _b._run(b, buf, False, unitary)
        _b._run(b, buf, True, unitary)
        buf *= scale * scale
    best = {b: np.inf for b in candidates}
    for _ in range(rounds):
        for b in candidates:
            t0 = time.perf_counter()
            _b._run(b, buf, False, unitary)
            _b._run(b, buf, True, unitary)
            best[b] = min(best[b], time.perf_counter() - t0)
            buf *= scale * scale  # keep the values bounded
    return best


def _choose(shape: tuple[int, ...], dtype: np.dtype, unitary: bool = True, single_thread: bool = False) -> str:

    workers = 1 if single_thread else _b._cpu_workers()
    key = (tuple(shape), np.dtype(dtype).str, workers)
    with _LOCK:
        if key in _b._CHOICE_CACHE:
            return _b._CHOICE_CACHE[key]
        if int(np.prod(shape)) < _b._MEASURE_MIN_ELEMENTS:
            _b._CHOICE_CACHE[key] = "numpy"
            return "numpy"
        disk_key = f"{'x'.join(map(str, shape))} {np.dtype(dtype).name} workers={workers}"
        stored = _read_json(_ranking_path())
        entry = stored.get(disk_key) if stored.get("versions") == _versions() else None
        choice = None
        if entry and entry.get("choice") in _b.available_backends():
            if not check_backend(entry["choice"], shape, dtype, unitary):
                choice = entry["choice"]
        if choice is None:
            candidates = [b for b in _b.available_backends() if not b.endswith("-all") or workers > 1]
            if workers == 1:
                candidates = [b for b in candidates if not b.endswith("-all")]
            good = []
            for b in candidates:
                problem = check_backend(b, shape, dtype, unitary)
                if problem:
                    warnings.warn(f"FFT backend {b} refused for {shape} {np.dtype(dtype).name}: {problem}",
                                  RuntimeWarning, stacklevel=3)
                else:
                    good.append(b)
            times = rank_backends(shape, dtype, good, unitary)
            choice = min(times, key=times.get)
            if stored.get("versions") != _versions():
                stored = {"versions": _versions()}
            stored[disk_key] = {"choice": choice, "seconds": {b: float(t) for b, t in times.items()}}
            _write_json(_ranking_path(), stored)
        _b._CHOICE_CACHE[key] = choice
        return choice


def chosen_backends() -> dict[tuple, str]:
    """The backend chosen so far for each (shape, dtype, workers) (a copy)."""

    return dict(_b._CHOICE_CACHE)
