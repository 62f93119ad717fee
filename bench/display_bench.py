"""The `display` modulator's costs on an X server: image computation, upload, and show -> presented.

    python bench/display_bench.py [--size 1152x1920] [--masks 8] [--shows 60]

Starts its own Xvfb with one screen of the SLM's size (Xvfb's Present extension ticks a
simulated 60 Hz refresh), opens the driver on it and measures, within one run:
1. computing the K device images (phase response, correction, ramp, mapping) per image;
2. uploading them into the X server per image;
3. show(k) until the server reports it presented, against the refresh period (the ``ust``
   difference between successive presentations), and the refresh counter steps per show.
Quote the ratios; seconds depend on the machine.
"""

from __future__ import annotations

import argparse
import os
import statistics
import subprocess
import tempfile
import time

import numpy as np

from maskrun.drivers import BenchContext
from maskrun.drivers.registry import build_driver
from maskrun.reconstruct.masks import quantized_phase_masks


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--size", default="1152x1920", help="screen rows x cols")
    ap.add_argument("--masks", type=int, default=8)
    ap.add_argument("--shows", type=int, default=60)
    args = ap.parse_args()
    rows, cols = (int(v) for v in args.size.split("x"))
    r, w = os.pipe()
    xvfb = subprocess.Popen(["Xvfb", "-displayfd", str(w), "-nolisten", "tcp", "-screen", "0", f"{cols}x{rows}x24"],
                            pass_fds=(w,), stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    os.close(w)
    with os.fdopen(r) as f:
        display = ":" + f.readline().strip()
    try:
        with tempfile.TemporaryDirectory() as tmp:
            corr = np.random.default_rng(0).uniform(0, 2 * np.pi, (rows, cols))
            np.save(os.path.join(tmp, "corr.npy"), corr)
            mod = build_driver("modulator", "display", {"x_display": display, "screen": 0, "settle_s": 0.0,
                                                        "correction": "corr.npy", "blaze_period_px": [0, 8.3],
                                                        "superpixel_px": [8, 8]},
                               BenchContext(config_dir=tmp, wavelength_m=633e-9))
            side = min(rows, cols) // 8
            masks = quantized_phase_masks(args.masks, (side, side), levels=8, seed=1)
            mod.open()
            try:
                t0 = time.perf_counter()
                images = mod.device_images(masks)
                t_compute = (time.perf_counter() - t0) / args.masks
                t0 = time.perf_counter()
                mod.load(masks)
                t_load = (time.perf_counter() - t0) / args.masks - t_compute  # load recomputes, then uploads
                lat = []
                for i in range(args.shows):
                    t0 = time.perf_counter()
                    mod.show(i % args.masks)
                    lat.append(time.perf_counter() - t0)
                shown = list(mod.presented)[-args.shows:]
                ust = np.diff([e["ust"] for e in shown]) * 1e-6
                msc = np.diff([e["msc"] for e in shown])
                refresh_s = float(np.median(ust / msc))
            finally:
                mod.close()
        print(f"screen {rows} x {cols}, {args.masks} masks, {args.shows} shows, X display {display}")
        print(f"compute per image        {t_compute * 1e3:8.1f} ms")
        print(f"upload per image         {t_load * 1e3:8.1f} ms")
        print(f"refresh period (Present) {refresh_s * 1e3:8.1f} ms")
        print(f"show -> presented        {statistics.median(lat) * 1e3:8.1f} ms median "
              f"= {statistics.median(lat) / refresh_s:.2f} refresh periods "
              f"(max {max(lat) / refresh_s:.2f}); refresh steps per show: median {np.median(msc):.0f}")
        print(f"images equal to a fresh computation: {bool(np.array_equal(images, mod.images))}")
    finally:
        xvfb.terminate()
        xvfb.wait(10)


if __name__ == "__main__":
    main()
