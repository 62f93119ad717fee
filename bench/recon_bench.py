"""Reconstruction benchmark: prints the measured figures quoted in the notes.

Run:  .venv/bin/python bench/recon_bench.py   (about 2-4 minutes on 2 cores)

(a) cost of one iteration in FFT units (time per iteration / time of one
    unitary FFT of the same size and dtype, same backend), per solver, at
    256x256 and 512x512 with K = 8, against the floor of 2K FFT units;
    with all cores and with one core.
(b) iterations and wall time to reach relative error 1e-6 and 1e-10 on a
    noiseless 256x256, K = 8 octanary problem (scikit-image 'camera' amplitude,
    'moon' phase), complex128; and 1e-5 in complex64.
(c) MSE / Cramér-Rao bound on a small Poisson problem (16x16, ~1e3 photons
    per pixel, 30 noise draws).
(d) one incremental update of a 256x256, K = 8 frame set on one core, and
    the demo problem (128x128, 1e7 photons per frame, 3 passes).

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


def fft_unit_s(plan: rfft.FFTPlan, buf: np.ndarray) -> float:
    t0 = time.perf_counter()
    plan.forward(buf)
    plan.inverse(buf)
    return (time.perf_counter() - t0) / (2 * buf.shape[0])


def iteration_cost(n: int, dtype, repeats: int = 7, iters: int = 10) -> dict:
    x = natural_object(n)
    m = octanary_masks(K, (n, n), seed=1)
    y = forward(x, m)
    ws = S.Workspace(m, dtype)
    ws.set_intensities(y)
    cons = S._Constraints(None, False, (n, n), dtype)
    x0 = (x * 1.01).astype(dtype)
    buf = ws.Z.copy()
    unit = np.inf
    best = {}
    runners = {"er": S._run_er, "raar": S._run_raar, "wf": S._run_wf}
    for _ in range(repeats):
        unit = min(unit, fft_unit_s(ws.plan, buf))
        for name, f in runners.items():
            t0 = time.perf_counter()
            f(ws, x0, iters, cons, [], S._Stopper(-1.0, 0.0), None, None, [])
            best[name] = min(best.get(name, np.inf), (time.perf_counter() - t0) / iters)
        unit = min(unit, fft_unit_s(ws.plan, buf))
    # Poisson L-BFGS: per accepted step (float64 inside, 1-2 gradient evaluations per step)
    tp = np.inf
    for _ in range(2):
        res: list = []
        t0 = time.perf_counter()
        _, nit = S._run_poisson(ws, x0, iters, cons, res, S._Stopper(-1.0, 0.0), None, None, [])
        tp = min(tp, (time.perf_counter() - t0) / max(nit, 1))
    best["poisson"] = tp
    return {"unit_s": unit, "per_iter_s": best, "backend": ws.plan.backend, "threads": ws.threads}


def section_a() -> None:
    print("(a) one iteration in FFT units, K = 8 (floor 2K = 16 units; target <= 1.3 x floor at 256, complex64)")
    for cores_label, workers in (("all cores", None), ("one core", 1)):
        rfft.set_max_workers(workers)
        for n in (256, 512):
            for dtype in (np.complex64, np.complex128):
                r = iteration_cost(n, dtype)
                u = r["unit_s"]
                parts = []
                for name, t in r["per_iter_s"].items():
                    parts.append(f"{name} {t / u:5.1f} u ({t / u / (2 * K):4.2f}x floor, {t * 1e3:6.2f} ms)")
                print(f"  {n}x{n} {np.dtype(dtype).name:10s} [{cores_label}, FFT {r['backend']}, "
                      f"{r['threads']} mask chunk(s), 1 FFT = "
                      f"{u * 1e6:6.1f} us]: " + "; ".join(parts))
    rfft.set_max_workers(None)
    print("  (hybrid = raar for 25 iterations then er; poisson runs float64 L-BFGS, cost per accepted step)")


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
            for _ in range(2):
                t0 = time.perf_counter()
                rr = solve(y, m, method=method, dtype=dtype, iterations=it, tol=0)
                best_t = min(best_t, time.perf_counter() - t0)
            check = relative_error(x, rr.estimate)
            out.append(f"{level:.0e}: {it} it, {best_t:.2f} s (error {check:.1e})")
        print(f"  {method:6s} {np.dtype(dtype).name:10s} " + "; ".join(out))
    print("  (wall time includes the 50-iteration spectral start; final reached error:"
          f" hybrid complex128 {r.errors.min():.1e} shown above for complex64)")


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
            est = solve(rng.poisson(y0), m, method=method).estimate
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
    eng = IncrementalEngine(m)  # defaults: accumulate, 50 iterations, complex64
    times = []
    for p in range(4):
        u = eng.update(rng.poisson(y * scale).astype(np.float32))
        times.append(u.elapsed_s)
    err = relative_error(x * np.sqrt(scale), u.estimate)
    print(f"  256x256 K=8 one core, 50 iterations per update: first update {times[0]:.3f} s (incl. spectral start), "
          f"warm updates {min(times[1:]):.3f}-{max(times[1:]):.3f} s (target < 0.5 s); error after 4 passes {err:.4f} "
          f"(predicted {u.error_estimate:.4f})")
    rfft.set_max_workers(None)
    n = 128
    x = natural_object(n)
    m = octanary_masks(K, (n, n), seed=5)
    y = forward(x, m)
    scale = 1e7 / (y.sum() / K)
    eng = IncrementalEngine(m)
    total = 0.0
    errs = []
    for p in range(3):
        u = eng.update(rng.poisson(y * scale).astype(np.float32))
        total += u.elapsed_s
        errs.append(relative_error(x * np.sqrt(scale), u.estimate))
    print(f"  demo 128x128 K=8, 1e7 photons/frame, 3 passes: errors {', '.join(f'{e:.4f}' for e in errs)}, "
          f"total compute {total:.2f} s (need < 5 %)")


def main(argv: list[str]) -> None:
    which = set(argv) or {"a", "b", "c", "d"}
    print(f"numpy {np.__version__}; FFT backend and thread split are measured per shape and cached")
    for name, fn in (("a", section_a), ("b", section_b), ("c", section_c), ("d", section_d)):
        if name in which:
            t0 = time.perf_counter()
            fn()
            print(f"  [section {name}: {time.perf_counter() - t0:.0f} s]")


if __name__ == "__main__":
    main(sys.argv[1:])
