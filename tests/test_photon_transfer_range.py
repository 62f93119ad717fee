"""Photon transfer knows its range: frames from an independent generator of the EMVA 1288 linear
camera model, written here (not the project's simulator), inside and outside what the method
can measure.

Outside reference: EMVA Standard 1288, Release 4.0 Linear (2021), sec. 2 (from memory): photons
-> Poisson electrons with mean eta mu_p, plus dark noise sigma_d (Gaussian, electrons), times the
system gain K, plus the offset, rounded to DN (quantisation noise 1/12 DN^2) and clipped to the
ADC range; sigma_y.dark^2 = K^2 sigma_d^2 + 1/12 DN^2. The quantisation limit sigma_y.dark^2 <
0.24 DN^2 and the upper limit sigma_d < 0.49 / K are from memory of the standard's dark-noise
section; the other thresholds are common practice, no source (see daemon/calibrate/photon_transfer.py).
"""

from __future__ import annotations

import math
from types import SimpleNamespace

import numpy as np
import pytest

from maskrun.daemon.calibrate.calibration import photons_per_pixel_per_s_from_power
from maskrun.daemon.calibrate.camera_profile import CameraProfile
from maskrun.daemon.calibrate.photon_transfer import analyse_photon_transfer, dark_noise_e, step_statistics
from maskrun.simulators.camera_model import CameraNoiseModel

SHAPE = (96, 96)


def emva_frame(rng, mu_p, *, qe, gain, sigma_d_e, offset_dn, bits, full_well_e):
    """One frame of the EMVA 1288 linear model (independent of maskrun.simulators)."""
    electrons = np.minimum(rng.poisson(qe * mu_p, SHAPE).astype(np.float64), full_well_e)
    electrons += rng.normal(0.0, sigma_d_e, SHAPE)
    return np.clip(np.round(offset_dn + gain * electrons), 0, 2**bits - 1).astype(np.uint16)


def emva_series(*, qe=0.5, gain, sigma_d_e, offset_dn, bits, full_well_e, steps=50, seed=0):
    rng = np.random.default_rng(seed)
    max_dn = 2**bits - 1
    sat_e = min(full_well_e, (max_dn - offset_dn) / gain)
    rate = sat_e / qe  # photons per pixel per second: saturation at t = 1 s
    cam = dict(qe=qe, gain=gain, sigma_d_e=sigma_d_e, offset_dn=offset_dn, bits=bits, full_well_e=full_well_e)
    out = []
    for t in np.linspace(1.3 / steps, 1.3, steps):
        bright = [emva_frame(rng, rate * t, **cam) for _ in range(2)]
        dark = [emva_frame(rng, 0.0, **cam) for _ in range(2)]
        out.append(step_statistics(t, bright, dark, photons_per_pixel=rate * t, max_dn=max_dn))
    return analyse_photon_transfer(out, max_dn=max_dn)


def _profile(result, bits):
    camera = SimpleNamespace(bit_depth=bits, frame_shape=SHAPE, gain=1.0, binning=1)
    return CameraProfile.from_result(result, camera, driver_name="generator")


def test_inside_the_range_gain_and_dark_noise_are_right_and_nothing_is_flagged():
    r = emva_series(gain=0.25, sigma_d_e=3.0, offset_dn=100, bits=12, full_well_e=15000)
    assert r.gain_dn_per_e == pytest.approx(0.25, rel=0.01)
    assert r.dark_noise_e == pytest.approx(3.0, rel=0.05)
    assert r.quantum_efficiency == pytest.approx(0.5, rel=0.02)
    assert r.within_range and r.range_warnings == []
    assert _profile(r, 12).measured


def test_quantisation_limited_dark_noise_is_an_upper_limit_not_zero():
    # issue 16: a 16-bit camera with 0.2 DN of dark noise gave "read noise 0 e-" and no warning
    r = emva_series(gain=0.1, sigma_d_e=2.0, offset_dn=100, bits=16, full_well_e=20000)
    assert not r.within_range and any("quantisation-limited" in w for w in r.range_warnings)
    assert r.read_noise_e is None and r.dark_noise_upper_limit
    assert r.dark_noise_e == pytest.approx(0.49 / r.gain_dn_per_e, rel=0.02)  # EMVA 1288 upper limit (from memory)
    assert r.dark_noise_e >= 2.0  # an upper limit never understates the noise
    prof = _profile(r, 16)
    assert not prof.measured and prof.read_noise_e is None and prof.range_warnings
    assert any(row[1].startswith("< ") for row in r.summary_rows() if row[0].startswith("dark noise sigma_d"))


def test_a_short_photon_transfer_range_is_flagged():
    # issue 16: an 8-bit camera with 40 DN of dark noise wrote a profile without complaint
    r = emva_series(gain=2.0, sigma_d_e=20.0, offset_dn=60, bits=8, full_well_e=1e6)
    assert not r.within_range
    assert any("less than 20 x the dark noise" in w for w in r.range_warnings)
    assert not _profile(r, 8).measured


def test_clipping_dark_frames_are_flagged():
    # offset 2 DN with 3 DN of dark noise: about a quarter of the dark pixels sit at 0 DN
    r = emva_series(gain=0.25, sigma_d_e=12.0, offset_dn=2, bits=12, full_well_e=15000)
    assert any("dark frames clip" in w for w in r.range_warnings)


def test_too_few_steps_in_the_linear_range_are_flagged():
    r = emva_series(gain=0.25, sigma_d_e=3.0, offset_dn=100, bits=12, full_well_e=15000, steps=9)
    assert any("steps lie in the 0-70 % gain fit" in w for w in r.range_warnings)
    assert not _profile(r, 12).measured


def test_one_definition_of_dark_noise():
    # EMVA 1288 R4.0 Linear sec. 2: sigma_y.dark^2 = K^2 sigma_d^2 + 1/12 DN^2; the simulator's sigma_d
    # (read noise and dark current) and the analysis's sigma_d are the same quantity
    model = CameraNoiseModel(gain_dn_per_e=0.3, read_noise_e=1.5, dark_current_e_per_s=4.0)
    variance = model.gain_dn_per_e**2 * (1.5**2 + 4.0 * 0.25) + 1 / 12
    assert dark_noise_e(variance, model.gain_dn_per_e) == pytest.approx(model.dark_noise_e(0.25), rel=1e-12)


def test_irradiance_from_a_power_meter():
    # by hand (exact SI constants, SI brochure 2019): 1 uW spread over 1 cm^2 is 0.01 W/m^2; a 5 um pixel
    # (2.5e-11 m^2) gets 2.5e-13 W; one 632.8 nm photon is 3.1391369e-19 J, so 7.9640e5 photons per second
    # (EMVA 1288: mu_p = A E t_exp / (h c / lambda), from memory)
    rate = photons_per_pixel_per_s_from_power(1e-6, 1e-4, (5e-6) ** 2, 632.8e-9)
    assert rate == pytest.approx(2.5e-13 / 3.1391369e-19, rel=1e-7)
    assert math.isclose(rate, 7.9640e5, rel_tol=1e-4)
    with pytest.raises(ValueError, match="beam_area_m2"):
        photons_per_pixel_per_s_from_power(1e-6, 0.0, 1e-12, 632.8e-9)


def test_calibrate_reports_qe_from_a_power_meter_reading(tmp_path):
    """`maskrun calibrate` with a power-meter reading: the simulated bench's known uniform irradiance is
    turned into watts by hand (E = h c / lambda, SI brochure 2019), given back as a reading, and the
    quantum efficiency of the simulated camera (0.6) comes out."""
    import os
    import shutil
    import subprocess
    import sys

    from rich.console import Console

    from benchcfg import small_bench_text
    from maskrun.daemon.acquire.bench import build_bench
    from maskrun.daemon.commands.cmd_calibrate import _uniform_light
    from maskrun.daemon.config import parse_config

    text = small_bench_text(grid=32, sensor=40)
    cfg_path = tmp_path / "bench.toml"
    cfg_path.write_text(text)
    bench = build_bench(parse_config(text, str(cfg_path)))
    try:
        bench.open()
        rate = _uniform_light(bench, Console(quiet=True), False)  # photons per pixel per second
    finally:
        bench.close()
    pitch, area = 5e-6, 1e-4
    power = rate * (area / pitch**2) * 6.62607015e-34 * 299792458 / 632.8e-9
    maskrun = shutil.which("maskrun", path=os.path.dirname(sys.executable)) or "maskrun"
    res = subprocess.run([maskrun, "calibrate", str(cfg_path), "--acknowledge-safety", "--steps", "24",
                          "--flat-frames", "0", "--output", str(tmp_path / "p.json"), "--power-w", f"{power:.9g}",
                          "--beam-area-m2", str(area), "--pixel-pitch-m", str(pitch)],
                         capture_output=True, text=True, timeout=180, stdin=subprocess.DEVNULL)
    assert res.returncode == 0, res.stderr + res.stdout
    assert "from the power meter" in res.stdout
    prof = CameraProfile.load(tmp_path / "p.json")
    assert prof.quantum_efficiency == pytest.approx(0.6, rel=0.03) and prof.measured
