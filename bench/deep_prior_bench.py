"""Low-dose benchmark: unregularised Poisson vs total variation vs deep image prior.

Run:  .venv/bin/python bench/deep_prior_bench.py [--size 128] [--doses 1 3 10]
(needs the `neural` extra for the deep-image-prior column: pip install 'maskrun[neural]';
without it that column is skipped). A few minutes per dose at 128x128 on 2 cores.

The simulated bench's sample (the etched phase plate), K = 8 octanary masks, Poisson counts with
the given mean detected photons per pixel per mask (one draw, seed 0); relative error against the
truth with the global phase removed. The deep image prior shows its progress as it fits.
"""
from __future__ import annotations

import argparse
import sys
import time

import numpy as np

from maskrun.reconstruct import octanary_masks, relative_error, solve
from maskrun.reconstruct.deep_prior import deep_prior_reconstruct, torch_available


def low_dose_case(photons_per_pixel: float, n: int, K: int = 8, seed: int = 0):
    from maskrun.simulators.optics import SimulatedOptics
    from maskrun.simulators.sample import phase_target

    m = octanary_masks(K, (n, n), seed=7)
    optics = SimulatedOptics(phase_target((n, n)).field, m, 1.0, (n, n))
    x = optics.truth_field()
    p = np.abs(np.fft.fft2(m * x, norm="ortho")) ** 2
    scale = photons_per_pixel / p.mean()
    y = np.random.default_rng(seed).poisson(p * scale).astype(np.float64)
    return y, m, x * np.sqrt(scale)


def main(argv: list[str]) -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--size", type=int, default=128)
    ap.add_argument("--doses", type=float, nargs="+", default=[1, 3, 10])
    ap.add_argument("--iterations", type=int, default=1500, help="deep-image-prior budget (Adam steps)")
    args = ap.parse_args(argv)
    dip = torch_available()
    if dip:
        import torch

        torch.set_num_threads(2)
    print(f"{args.size}x{args.size}, K = 8; relative error (time)" + ("" if dip else "; no PyTorch: no DIP column"))
    print("photons/pixel/mask | Poisson ML | Poisson + TV | deep image prior")
    for dose in args.doses:
        y, m, truth = low_dose_case(dose, args.size)
        t0 = time.perf_counter()
        e_p = relative_error(truth, solve(y, m, method="poisson").estimate)
        t_p = time.perf_counter() - t0
        t0 = time.perf_counter()
        e_tv = relative_error(truth, solve(y, m, prior="tv").estimate)
        t_tv = time.perf_counter() - t0
        cell = "-"
        if dip:
            def show(it, total, dev, target):
                print(f"\r  deep image prior: step {it}/{total}, deviance {dev:.4g} (stop at {target:.4g})",
                      end="", file=sys.stderr, flush=True)

            r = deep_prior_reconstruct(y, m, iterations=args.iterations, progress=show)
            print(file=sys.stderr)
            cell = (f"{relative_error(truth, r.estimate):.3f} ({r.elapsed_s:.0f} s, {r.iterations} steps, "
                    f"{r.stop_reason})")
        print(f"{dose:g} | {e_p:.3f} ({t_p:.1f} s) | {e_tv:.3f} ({t_tv:.1f} s) | {cell}", flush=True)


if __name__ == "__main__":
    main(sys.argv[1:])
