"""Reconstruction benchmark: prints the measured figures quoted in the notes.

Run:  .venv/bin/python bench/recon_bench.py   (about 4-5 minutes on 2 cores)

(a) cost of one iteration against the floor of 2K FFT units (time per
    iteration / time of K forward + K inverse FFTs of the same size
    and dtype with the same plan), and against the FASTEST such floor of every
    installed backend that passes the correctness check (FFTW, scipy, numpy,
    mkl_fft if installed), per solver, at 256x256 and 512x512 with
    K = 8; with all cores and with one core; and, for comparison in the same
    run, 256x256 complex64 on one core with the numpy passes instead of the
    fused kernels (maskrun.reconstruct.kernels).
(b) iterations and wall time to reach relative error 1e-6 and 1e-10 on a
    noiseless 256x256, K = 8 octanary problem (scikit-image 'camera' amplitude,
    'moon' phase), complex128; and 1e-5 in complex64.
(c) MSE / Cramér-Rao bound on a small Poisson problem (16x16, ~1e3 photons
    per pixel, 30 noise draws).
(d) one incremental update of a 256x256, K = 8 frame set on one core, and
    the demo problem (128x128, 1e7 photons per frame, 3 passes).
(h) HIO on one pattern: time per iteration against its 2-FFT floor (section h alone:
    ``bench/recon_bench.py h``).

Timings are minima over repeats (the machine may be shared).
"""
from __future__ import annotations

import sys
import time

import numpy as np
from skimage import data as skdata
from skimage.transform import resize

from maskrun.reconstruct import (
    IncrementalEngine,
    align_global_phase,
    forward,
    octanary_masks,
    poisson_crb,
    relative_error,
    shot_noise_relative_error,
    solve,
)
from maskrun.reconstruct import fft as rfft
from maskrun.reconstruct import solvers as S

K = 8


def natural_object(n: int) -> np.ndarray:
    amp = resize(skdata.camera().astype(float) / 255.0, (n, n), anti_aliasing=True)
    ph = resize(skdata.moon().astype(float) / 255.0, (n, n), anti_aliasing=True)
    return amp * np.exp(1j * np.pi * ph)


def floor_s(ws, buf: np.ndarray) -> float:
    """Time of the 2K-FFT floor: K forward and K inverse FFTs with the solver's own FFT plans.

    With one mask chunk this is one batched forward and one batched inverse FFT.
    With several chunks (threads) each thread transforms its own chunk at the same
    time, exactly as the solver does, so the floor uses the same cores as the
    iteration it is compared with.
    """
    def transform(chunk, plan):
        plan.forward(buf[chunk])
        plan.inverse(buf[chunk])

    t0 = time.perf_counter()
    ws.map_chunks(transform)
    return time.perf_counter() - t0


def fastest_floor_s(ws, buf: np.ndarray, repeats: int = 15) -> tuple[float, str, dict]:
    """The 2K-FFT floor with the FASTEST backend installed (each checked for correctness first),
    whatever the solver chose: K forward + K inverse, batched, the cores as ``ws`` uses them.
    Returns (seconds, backend, {backend: seconds})."""
    workers = rfft._cpu_workers()
    found = {}
    for b in rfft.available_backends():
        if b.endswith("-all") and workers == 1:
            continue
        if rfft.check_backend(b, ws.shape, ws.dtype, unitary=False):
            continue  # wrong transforms on this shape: not a floor
        plan = rfft.FFTPlan(ws.shape, ws.dtype, b, unitary=False)
        scale = 1.0 / plan.scale ** 2
        plan.forward(buf)
        plan.inverse(buf)
        buf *= scale
        best = np.inf
        for _ in range(repeats):
            t0 = time.perf_counter()
            plan.forward(buf)
            plan.inverse(buf)
            best = min(best, time.perf_counter() - t0)
            buf *= scale
        found[b] = best
    b = min(found, key=found.get)
    return found[b], b, found


def iteration_cost(n: int, dtype, samples: int = 9, iters: int = 20) -> dict:
    """Ratio (time per iteration) / (2K-FFT floor), measured as interleaved pairs.

    On a shared machine absolute times drift with the load; each sample
    times ``iters`` iterations and, right after, ``iters`` floor batches with
    the same FFT plan, and the median of the per-sample ratios is reported
    (the ratio of minima is printed too). RAAR's per-call set-up (one A x and
    one final estimate, 2K FFTs) is included, i.e. +1/iters floor.
    """
    x = natural_object(n)
    m = octanary_masks(K, (n, n), seed=1)
    y = forward(x, m)
    ws = S.Workspace(m, dtype)
    ws.set_intensities(y)
    cons = S._Constraints(None, False, (n, n), dtype)
    x0 = (x * 1.01).astype(dtype)
    rng = np.random.default_rng(0)  # a defined buffer: uninitialised memory may hold denormals or NaNs
    buf = rfft.aligned_empty(ws.shape, dtype)
    buf[...] = (rng.standard_normal(ws.shape) + 1j * rng.standard_normal(ws.shape)).astype(dtype)
    fast_s, fast_b, floors = fastest_floor_s(ws, buf)
    runners = {"er": S._run_er, "raar": S._run_raar, "wf": S._run_wf}
    out = {}
    for name, f in runners.items():
        ratios, t_it_min, t_fl_min = [], np.inf, np.inf
        f(ws, x0, 2, cons, [], S._Stopper(-1.0, 0.0), None, None, [])
        for _ in range(samples):
            t0 = time.perf_counter()
            f(ws, x0, iters, cons, [], S._Stopper(-1.0, 0.0), None, None, [])
            t_it = (time.perf_counter() - t0) / iters
            t_fl = min(floor_s(ws, buf) for _ in range(iters))
            ratios.append(t_it / t_fl)
            t_it_min, t_fl_min = min(t_it_min, t_it), min(t_fl_min, t_fl)
        out[name] = (float(np.median(ratios)), t_it_min / t_fl_min, t_it_min)
    # Poisson L-BFGS: per accepted step (float64 inside, 1-2 gradient evaluations per step)
    tp = np.inf
    for _ in range(2):
        t0 = time.perf_counter()
        _, nit = S._run_poisson(ws, x0, 10, cons, [], S._Stopper(-1.0, 0.0), None, None, [])
        tp = min(tp, (time.perf_counter() - t0) / max(nit, 1))
    t_fl = min(floor_s(ws, buf) for _ in range(10))
    out["poisson"] = (tp / t_fl, tp / t_fl, tp)
    fast2_s, _, _ = fastest_floor_s(ws, buf)  # again after the solvers (the load may have changed)
    fast_s = min(fast_s, fast2_s)
    return {"floor_s": t_fl_min, "ratios": out, "backend": ws.plan.backend, "threads": ws.threads,
            "fastest_floor_s": fast_s, "fastest_backend": fast_b, "floors": floors,
            "vs_fastest": {k: v[2] / fast_s for k, v in out.items()}}


def section_a() -> None:
    print("(a) one iteration / the 2K-FFT floor (2K = 16 FFT units), K = 8; target <= 1.3 at 256x256 complex64")
    print("    median of interleaved samples [ratio of minima]; FFT units = 16 x ratio")
    from maskrun.reconstruct import kernels
    print("    elementwise passes: " + ("fused numba kernels" if kernels.accelerated()
                                        else "numpy (numba unavailable or MASKRUN_JIT=0)"))
    for cores_label, workers in (("all cores", None), ("one core", 1)):
        rfft.set_max_workers(workers)
        for n in (256, 512):
            for dtype in (np.complex64, np.complex128):
                r = iteration_cost(n, dtype)
                parts = [f"{name} {med:4.2f} [{mn:4.2f}] = {16 * med:4.1f} u ({t * 1e3:5.1f} ms)"
                         for name, (med, mn, t) in r["ratios"].items()]
                print(f"  {n}x{n} {np.dtype(dtype).name:10s} [{cores_label}, FFT {r['backend']}, "
                      f"{r['threads']} mask chunk(s), floor {r['floor_s'] * 1e3:5.2f} ms]: " + "; ".join(parts))
                fl = ", ".join(f"{b} {t * 1e3:.2f} ms" for b, t in r["floors"].items())
                vs = "; ".join(f"{name} {v:4.2f}" for name, v in r["vs_fastest"].items())
                print(f"      against the FASTEST floor ({r['fastest_backend']}, {r['fastest_floor_s'] * 1e3:5.2f} ms; "
                      f"all: {fl}), ratio of minima: {vs}")
    if kernels.accelerated():
        # the same measurement with the numpy passes, for comparison in the same run
        kernels.use_jit(False)
        try:
            r = iteration_cost(256, np.complex64)
        finally:
            kernels.use_jit(None)
        parts = [f"{name} {med:4.2f} [{mn:4.2f}]" for name, (med, mn, t) in r["ratios"].items() if name != "poisson"]
        print("  256x256 complex64  [one core, numpy passes instead of the fused kernels]: " + "; ".join(parts))
    rfft.set_max_workers(None)
    print("  (hybrid = raar until the residual is < 2 %, then er: its cost is theirs; poisson runs float64 L-BFGS,"
          " cost per accepted step)")


def first_below(errors: np.ndarray, level: float):
    idx = np.nonzero(errors <= level)[0]
    return int(idx[0]) + 1 if idx.size else None


def section_b() -> None:
    print("(b) noiseless 256x256, K = 8 octanary, natural-image object: iterations and wall time to reach a level")
    n = 256
    x = natural_object(n)
    m = octanary_masks(K, (n, n), seed=2)
    y = forward(x, m)
    plans = [("hybrid", np.complex128, 800, (1e-6, 1e-10)), ("er", np.complex128, 800, (1e-6, 1e-10)),
             ("raar", np.complex128, 800, (1e-6, 1e-10)), ("wf", np.complex128, 1500, (1e-6, 1e-10)),
             ("hybrid", np.complex64, 800, (1e-5,))]
    for method, dtype, cap, levels in plans:
        r = solve(y, m, method=method, dtype=dtype, iterations=cap, truth=x, tol=0)
        out = []
        for level in levels:
            it = first_below(r.errors, level)
            if it is None:
                out.append(f"{level:.0e}: not reached in {cap} (best {r.errors.min():.1e})")
                continue
            best_t = np.inf
            for _ in range(3):
                t0 = time.perf_counter()
                rr = solve(y, m, method=method, dtype=dtype, iterations=it, tol=0)
                best_t = min(best_t, time.perf_counter() - t0)
            check = relative_error(x, rr.estimate)
            out.append(f"{level:.0e}: {it} it, {best_t:.2f} s (error {check:.1e})")
        print(f"  {method:6s} {np.dtype(dtype).name:10s} " + "; ".join(out))
    print("  (wall time = a fresh solve() run for exactly that many iterations: set-up, 20-iteration spectral"
          " start and the iterations, no error tracking)")


def section_c(trials: int = 30) -> None:
    print("(c) Poisson data, 16x16 natural object, K = 8, ~1e3 photons per pixel: MSE / Cramér-Rao bound")
    n = 16
    x = natural_object(n)
    m = octanary_masks(K, (n, n), seed=3)
    y0 = forward(x, m)
    scale = 1e3 / y0.mean()
    xs, y0 = x * np.sqrt(scale), y0 * scale
    crb = poisson_crb(xs, m)
    print(f"  CRB: MSE >= {crb.total_mse:.3g} (relative error {crb.relative_error:.4f}); "
          f"shot-noise rule {shot_noise_relative_error(n * n, crb.photons):.4f}")
    for method in ("poisson", "hybrid", "er", "wf"):
        rng = np.random.default_rng(0)
        sq = []
        t0 = time.perf_counter()
        for _ in range(trials):
            est = solve(rng.poisson(y0), m, method=method, dtype=np.complex64).estimate
            sq.append(np.sum(np.abs(xs - align_global_phase(xs, est)) ** 2))
        sq = np.array(sq)
        ratio = sq.mean() / crb.total_mse
        se = sq.std(ddof=1) / np.sqrt(trials) / crb.total_mse
        print(f"  {method:7s} MSE/CRB = {ratio:.3f} +- {se:.3f} ({trials} draws, "
              f"{(time.perf_counter() - t0) / trials * 1e3:.0f} ms per solve)")


def section_d() -> None:
    print("(d) incremental engine")
    rfft.set_max_workers(1)
    n = 256
    x = natural_object(n)
    m = octanary_masks(K, (n, n), seed=4)
    y = forward(x, m)
    scale = 1e7 / (y.sum() / K)
    rng = np.random.default_rng(0)
    eng = IncrementalEngine(m, dtype=np.complex64)  # as the daemon: accumulate, 50 iterations, complex64
    times = []
    for p in range(4):
        u = eng.update(rng.poisson(y * scale).astype(np.float32))
        times.append(u.elapsed_s)
    err = relative_error(x * np.sqrt(scale), u.estimate)
    print(f"  256x256 K=8 one core, 50 iterations per update: first update {times[0]:.3f} s (incl. spectral start), "
          f"warm updates {min(times[1:]):.3f}-{max(times[1:]):.3f} s (target < 0.25 s); error after 4 passes {err:.4f} "
          f"(predicted {u.error_estimate:.4f})")
    rfft.set_max_workers(None)
    n = 128
    x = natural_object(n)
    m = octanary_masks(K, (n, n), seed=5)
    y = forward(x, m)
    scale = 1e7 / (y.sum() / K)
    eng = IncrementalEngine(m, dtype=np.complex64)
    total = 0.0
    errs = []
    for p in range(3):
        u = eng.update(rng.poisson(y * scale).astype(np.float32))
        total += u.elapsed_s
        errs.append(relative_error(x * np.sqrt(scale), u.estimate))
    print(f"  demo 128x128 K=8, 1e7 photons/frame, 3 passes: errors {', '.join(f'{e:.4f}' for e in errs)}, "
          f"total compute {total:.2f} s (need < 5 %)")


def section_h(samples: int = 5, iters: int = 100) -> None:
    """(h) HIO on one pattern (K = 1): time per iteration / its 2-FFT floor (one forward and one
    inverse FFT of the grid), fixed support and with shrink-wrap (every 20 iterations)."""
    from maskrun.reconstruct.hio import HIOSettings, run_hio

    print("(h) HIO, one pattern (K = 1): one iteration / the 2-FFT floor; object half the grid, real >= 0")
    for n in (256, 512):
        for dtype in (np.complex64, np.complex128):
            obj = resize(skdata.camera().astype(float) / 255.0, (n // 2, n // 2), anti_aliasing=True)
            x = np.zeros((n, n))
            x[n // 4: n // 4 + n // 2, n // 4: n // 4 + n // 2] = obj
            one = np.ones((1, n, n), dtype)
            ws = S.Workspace(one, dtype)
            ws.set_intensities(np.abs(np.fft.fft2(x, norm="ortho"))[None] ** 2)
            buf = (np.random.default_rng(0).standard_normal(ws.shape) + 0j).astype(dtype)
            line = []
            for label, support, wrap in (("fixed support", x > 0, False), ("shrink-wrap", None, True)):
                settings = HIOSettings(shrinkwrap=wrap, er_iterations=0, restarts=0, check_every=10 ** 9)
                ratios, t_min, fl_min = [], np.inf, np.inf
                for _ in range(samples):
                    t0 = time.perf_counter()
                    run_hio(ws, None, iters, support, True, [], S._Stopper(-1.0, 0.0), None, None, [], settings)
                    t_it = (time.perf_counter() - t0) / iters
                    t_fl = min(floor_s(ws, buf) for _ in range(iters))
                    ratios.append(t_it / t_fl)
                    t_min, fl_min = min(t_min, t_it), min(fl_min, t_fl)
                line.append(f"{label} {np.median(ratios):.2f} (of minima {t_min / fl_min:.2f}; {t_min * 1e3:.2f} ms)")
            print(f"  {n}x{n} {np.dtype(dtype).name:10s} [FFT {ws.plan.backend}]: " + "; ".join(line))
    print("  (per-call set-up included: the random start and, with shrink-wrap, the autocorrelation support)")


def main(argv: list[str]) -> None:
    which = set(argv) or {"a", "b", "c", "d", "h"}
    print(f"numpy {np.__version__}; FFT backend and thread split are measured per shape and cached")
    for name, fn in (("a", section_a), ("b", section_b), ("c", section_c), ("d", section_d), ("h", section_h)):
        if name in which:
            t0 = time.perf_counter()
            fn()
            print(f"  [section {name}: {time.perf_counter() - t0:.0f} s]")


if __name__ == "__main__":
    main(sys.argv[1:])
