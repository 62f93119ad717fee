"""Small simulated bench configs for tests, derived from the embedded demo bench."""

from __future__ import annotations

from maskrun.daemon.config import BenchConfig, demo_config_text, parse_config


def small_bench_text(*, grid=32, sensor=48, masks=6, passes=2, darks=2, extra_camera="", extra="", exposure_s=0.002,
                     recon_iterations=60, prnu_fraction=0.0) -> str:
    text = demo_config_text()
    # same photons per pixel as the demo bench, on a smaller grid and a shorter exposure
    rate = 2.2e9 * (grid * grid) / (128 * 128) * (0.01 / exposure_s)
    repl = {
        "shape = [128, 128]": f"shape = [{grid}, {grid}]",
        "sensor_shape = [160, 160]": f"sensor_shape = [{sensor}, {sensor}]",
        "count = 8": f"count = {masks}",
        "passes = 3": f"passes = {passes}",
        "dark_frames = 4": f"dark_frames = {darks}",
        "exposure_s = 0.01": f"exposure_s = {exposure_s}",
        "photon_rate_per_s = 2.2e9": f"photon_rate_per_s = {rate:.6g}",
        "min_photons_per_frame = 1.0e6": "min_photons_per_frame = 1.0e4",
        "iterations_per_update = 100": f"iterations_per_update = {recon_iterations}",
        "seed = 11": "seed = 11\n" + extra_camera,
        # the demo camera has a 1 % pixel response spread (PRNU); test benches have none unless asked
        "prnu_fraction = 0.01": f"prnu_fraction = {prnu_fraction}",
        # the data-sheet spread the precision estimate uses ([response]) says the same
        "prnu_fraction = 0.01        # data-sheet": f"prnu_fraction = {prnu_fraction}        # data-sheet",
    }
    for old, new in repl.items():
        assert old in text, old
        text = text.replace(old, new, 1)
    return text + "\n" + extra


def small_bench(**kw) -> BenchConfig:
    return parse_config(small_bench_text(**kw), "test-bench.toml")
