"""`maskrun calibrate` and `maskrun plan` from the command line, and the profile used by a run."""

import json
import os
import shutil
import subprocess
import sys

import pytest

from benchcfg import small_bench_text

MASKRUN = shutil.which("maskrun", path=os.path.dirname(sys.executable)) or "maskrun"


def _run(*args, timeout=180):
    return subprocess.run([MASKRUN, *args], capture_output=True, text=True, timeout=timeout, stdin=subprocess.DEVNULL)


@pytest.fixture(scope="module")
def calibrated(tmp_path_factory):
    d = tmp_path_factory.mktemp("cal")
    cfg = d / "bench.toml"
    cfg.write_text(small_bench_text(grid=32, sensor=40))
    res = _run("calibrate", str(cfg), "--acknowledge-safety", "--steps", "24", "--output", str(d / "profile.json"))
    assert res.returncode == 0, res.stderr + res.stdout
    return d, res


def test_calibration_recovers_the_simulated_camera(calibrated):
    d, res = calibrated
    prof = json.loads((d / "profile.json").read_text())
    # EMVA Standard 1288, Release 4.0 Linear (2021), photon transfer: the fitted system gain K
    # and the quantum efficiency must match the simulated camera's (gain 0.3 DN/e-, QE 0.6, read noise 3 e-).
    assert prof["gain_dn_per_e"] == pytest.approx(0.3, rel=0.02)
    assert prof["quantum_efficiency"] == pytest.approx(0.6, rel=0.03)
    assert prof["read_noise_e"] == pytest.approx(3.0, rel=0.05)
    assert prof["frame_shape"] == [32, 32] and prof["bit_depth"] == 12
    assert (d / "profile.png").stat().st_size > 10_000
    assert "overall system gain K" in res.stdout


def test_a_run_uses_the_profile_and_a_mismatch_is_refused(calibrated, tmp_path):
    d, _ = calibrated
    good = tmp_path / "good.toml"
    good.write_text(small_bench_text(grid=32, sensor=40, passes=1).replace(
        "quantum_efficiency = 0.6\n\n[modulator]", f'quantum_efficiency = 0.6\nprofile = "{d / "profile.json"}"\n\n[modulator]'))
    res = _run("run", str(good), "--acknowledge-safety", "--output-dir", str(tmp_path / "out"), "--no-figure")
    assert res.returncode == 0, res.stderr + res.stdout
    bad = tmp_path / "bad.toml"  # a 16x16 grid: the camera mode no longer matches the profile
    bad.write_text(small_bench_text(grid=16, sensor=40, passes=1).replace(
        "quantum_efficiency = 0.6\n\n[modulator]", f'quantum_efficiency = 0.6\nprofile = "{d / "profile.json"}"\n\n[modulator]'))
    res = _run("run", str(bad), "--acknowledge-safety", "--output-dir", str(tmp_path / "out2"))
    assert res.returncode != 0 and "Traceback" not in res.stderr
    assert "frame shape (32, 32) in the profile, (16, 16) on the camera" in res.stderr


def test_plan_reports_photons_and_refuses_an_impossible_dose(tmp_path):
    # a 48x48 grid plans with the shot-noise rule (the Cramer-Rao path is covered in test_budget.py)
    cfg = tmp_path / "bench.toml"
    cfg.write_text(small_bench_text(grid=48, sensor=56))
    res = _run("plan", str(cfg), "--phase-precision", "0.05")
    assert res.returncode == 0, res.stderr
    assert "detected photons, total" in res.stdout and "exposure per frame" in res.stdout
    limited = tmp_path / "limited.toml"
    limited.write_text(small_bench_text(grid=48, sensor=56).replace("[checks]", "[checks]\nmax_dose_photons = 1000.0"))
    res = _run("plan", str(limited), "--phase-precision", "0.001")
    assert res.returncode != 0
    assert "cannot be reached under the dose limit" in res.stderr


def test_plan_with_many_passes_asks_for_as_many_dark_frames(calibrated, tmp_path):
    """With a profile the saturation capacity splits a demanding plan into many passes; the config's
    2 dark frames would then limit the accumulated estimate, and the plan says so."""
    d, _ = calibrated
    cfg = tmp_path / "bench.toml"
    cfg.write_text(small_bench_text(grid=32, sensor=40, darks=2).replace(
        "quantum_efficiency = 0.6\n\n[modulator]", f'quantum_efficiency = 0.6\nprofile = "{d / "profile.json"}"\n\n[modulator]'))
    res = _run("plan", str(cfg), "--relative-error", "0.001")
    assert res.returncode == 0, res.stderr
    text = " ".join(res.stdout.split())
    assert "saturation comes first" in text and "2 dark frame(s) for" in text and "[run] dark_frames" in text
