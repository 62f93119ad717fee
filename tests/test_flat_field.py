"""Flat frames: pixel response non-uniformity (PRNU) in the simulated camera, the flat-field map
from `maskrun calibrate`, its use in a run (checks, frame sets, run file) and bad flat files.

Outside reference for the whole file: EMVA Standard 1288, Release 4.0 Linear, 2021, PRNU
(photo-response non-uniformity: the spatial spread, std / mean, of the dark-subtracted response
to uniform light; a flat-field correction divides it out).
"""

import io
import json
import os
import shutil
import subprocess
import sys

import h5py
import numpy as np
import pytest
from rich.console import Console

from benchcfg import small_bench_text
from maskrun.daemon.record.checks import CheckLimits, Response, check_frame
from maskrun.daemon.config import parse_config
from maskrun.daemon.acquire.foreground import RunRequest, run_foreground
from maskrun.daemon.offline.reprocess import frame_set_intensities, mean_dark_dn, response_for_run
from maskrun.daemon.record.runfile import RunFile
from maskrun.daemon.record.store import RunHeader, RunStore
from maskrun.reconstruct import forward
from maskrun.simulators.camera_model import CameraNoiseModel

MASKRUN = shutil.which("maskrun", path=os.path.dirname(sys.executable)) or "maskrun"
PRNU = 0.02
GRID, SENSOR, CAMERA_SEED = 32, 40, 11  # camera seed of the demo bench (benchcfg keeps it)


def _run_cli(*args, timeout=180):
    return subprocess.run([MASKRUN, *args], capture_output=True, text=True, timeout=timeout, stdin=subprocess.DEVNULL)


def _with_profile(text: str, profile) -> str:
    return text.replace("quantum_efficiency = 0.6\n\n[modulator]",
                        f'quantum_efficiency = 0.6\nprofile = "{profile}"\n\n[modulator]')


def _true_prnu_roi() -> np.ndarray:
    """The simulated camera's response map over the centred grid ROI (bench.open centres the ROI)."""
    full = CameraNoiseModel(prnu_fraction=PRNU).prnu_gain_map((SENSOR, SENSOR), CAMERA_SEED)
    r0 = (SENSOR - GRID) // 2
    return full[r0 : r0 + GRID, r0 : r0 + GRID].astype(np.float64)


# --------------------------------------------------------------------------- camera model
def test_prnu_map_is_deterministic_with_the_configured_spread():
    model = CameraNoiseModel(prnu_fraction=0.03)
    a = model.prnu_gain_map((64, 64), 5)
    assert a.dtype == np.float32 and a.shape == (64, 64)
    # PRNU is std / mean of the per-pixel response (EMVA Standard 1288, Release 4.0 Linear, 2021, PRNU)
    assert a.mean() == pytest.approx(1.0, abs=1e-5) and a.std() == pytest.approx(0.03, rel=1e-3)
    assert np.array_equal(a, model.prnu_gain_map((64, 64), 5))
    assert not np.array_equal(a, model.prnu_gain_map((64, 64), 6))
    assert CameraNoiseModel().prnu_gain_map((8, 8), 0) is None  # default: no PRNU
    with pytest.raises(ValueError, match="prnu_fraction"):
        CameraNoiseModel(prnu_fraction=-0.1)


def test_prnu_scales_the_mean_signal_per_pixel_not_the_dark_level():
    model = CameraNoiseModel(prnu_fraction=0.05, read_noise_e=0.0, dark_current_e_per_s=0.0, full_well_e=1e9,
                             bit_depth=16, gain_dn_per_e=0.1)
    prnu = model.prnu_gain_map((16, 16), 1)
    rng = np.random.default_rng(0)
    photons = np.full((16, 16), 20000.0)
    mean = np.mean([model.render(photons, 0.01, rng, prnu_map=prnu) for _ in range(20)], axis=0)
    signal = mean - model.offset_dn
    # EMVA 1288 linear model: mu_y - mu_y.dark = K * eta * mu_p, with eta varying per pixel (PRNU)
    expected = model.gain_dn_per_e * model.quantum_efficiency * photons * prnu
    assert np.corrcoef(signal.ravel(), expected.ravel())[0, 1] > 0.95
    np.testing.assert_allclose(signal, expected, rtol=0.02)
    dark = model.render(np.zeros((16, 16)), 0.01, rng, prnu_map=prnu)
    assert np.all(dark == model.offset_dn)  # no light, no PRNU: dark level untouched


def test_checks_divide_by_the_flat():
    resp = Response(gain_dn_per_e=0.5, offset_dn=100.0, quantum_efficiency=0.5)
    flat = np.array([[0.8, 1.2]], dtype=np.float32)
    px = np.array([[100 + 80, 100 + 120]], dtype=np.uint16)  # 200 e- per pixel seen through the flat
    # electrons = (DN - dark) / flat / K (common practice, no source: flat-field correction)
    np.testing.assert_allclose(resp.electrons(px, 100.0, flat), [[200.0, 200.0]], rtol=1e-6)
    np.testing.assert_allclose(resp.electrons(px, 100.0), [[160.0, 240.0]], rtol=1e-6)
    limits = CheckLimits(max_dn=4095, saturation_level=0.98, max_saturated_fraction=0.1,
                         min_photons_per_frame=0, max_photons_per_frame=1e12)
    assert check_frame(px, 100.0, resp, limits, flat).photons == pytest.approx(800.0)
    skewed = np.array([[0.5, 1.5]], dtype=np.float32)
    assert check_frame(px, 100.0, resp, limits, skewed).photons == pytest.approx((160 + 80) / 0.5 / 0.5)


def test_run_file_stores_the_flat_field(tmp_path):
    rng = np.random.default_rng(0)
    flat = (1 + 0.01 * rng.standard_normal((8, 6))).astype(np.float32)
    header = RunHeader("t", "", {}, (8, 6), np.ones((2, 8, 6), complex), np.dtype(np.uint16), 6e-7, 12,
                       flat_field=flat)
    RunStore.create(tmp_path / "a.h5", header).close()
    with h5py.File(tmp_path / "a.h5", "r") as f:  # plain h5py, the documented path
        assert f["/entry/flat_field"].dtype == np.float32
        np.testing.assert_array_equal(f["/entry/flat_field"][...], flat)
    header.flat_field = None
    RunStore.create(tmp_path / "b.h5", header).close()
    with RunFile(tmp_path / "b.h5") as rf:
        assert rf.flat_field() is None and rf.response_attrs() is None


# --------------------------------------------------------------------- calibrate and runs
@pytest.fixture(scope="module")
def calibrated(tmp_path_factory):
    d = tmp_path_factory.mktemp("flatcal")
    cfg = d / "bench.toml"
    cfg.write_text(small_bench_text(grid=GRID, sensor=SENSOR, prnu_fraction=PRNU))
    res = _run_cli("calibrate", str(cfg), "--acknowledge-safety", "--steps", "16", "--output", str(d / "profile.json"))
    assert res.returncode == 0, res.stderr + res.stdout
    return d


def test_calibration_flat_recovers_the_simulated_prnu_map(calibrated):
    prof = json.loads((calibrated / "profile.json").read_text())
    assert prof["flat_field_file"] == "profile.flat.npy"
    flat = np.load(calibrated / "profile.flat.npy")
    assert flat.dtype == np.float32 and flat.shape == (GRID, GRID)
    assert flat.mean() == pytest.approx(1.0, abs=1e-5)
    truth = _true_prnu_roi()
    # EMVA Standard 1288, Release 4.0 Linear, 2021, PRNU: the averaged, dark-subtracted flat frames
    # reproduce the per-pixel response; its spread is the configured PRNU
    assert np.corrcoef(flat.ravel(), truth.ravel())[0, 1] > 0.9
    assert flat.std() == pytest.approx(PRNU, rel=0.10)


@pytest.fixture(scope="module")
def two_runs(calibrated):
    """The same PRNU camera (same seeds, so the same raw frames) converted with and without the flat."""
    d = calibrated
    prof = json.loads((d / "profile.json").read_text())
    prof.pop("flat_field_file")
    (d / "noflat.json").write_text(json.dumps(prof))
    paths = {}
    for name, profile in (("flat", d / "profile.json"), ("noflat", d / "noflat.json")):
        cfg = parse_config(_with_profile(small_bench_text(grid=GRID, sensor=SENSOR, prnu_fraction=PRNU), profile),
                           str(d / f"{name}.toml"))
        summary = run_foreground(cfg, RunRequest(acknowledge_unattended=True, output_dir=str(d / f"out-{name}")),
                                 Console(file=io.StringIO()))
        assert summary.state.value == "finished", summary.message
        paths[name] = summary.output_path
    return paths


def _photon_images(path):
    """Incident photons per pixel of every frame as the pipeline computes them, and the simulated truth."""
    with RunFile(path) as rf:
        resp = response_for_run(rf, str(path))
        info = rf.frame_info()
        detected = frame_set_intensities(rf.frames(), mean_dark_dn(rf.darks(), resp.offset_dn), resp, rf.flat_field())
        truth = forward(rf.truth(), rf.masks())[info["mask_index"]] * info["exposure_s"][:, None, None]
    return detected / resp.quantum_efficiency, truth


def test_the_flat_brings_photon_counts_closer_to_the_truth(two_runs):
    errors = {}
    for name, path in two_runs.items():
        photons, truth = _photon_images(path)
        errors[name] = np.sqrt(np.mean((photons - truth) ** 2)) / np.sqrt(np.mean(truth**2))
    # without the flat every pixel carries its response error (2 % PRNU) on top of the shot noise
    assert errors["flat"] < 0.9 * errors["noflat"], errors


def test_the_run_file_holds_the_flat_and_the_live_checks_used_it(two_runs, calibrated):
    with RunFile(two_runs["flat"]) as rf:
        flat = rf.flat_field()
        resp = rf.response_attrs()
        info = rf.frame_info()
        frames = rf.frames().astype(np.float64)
        dark = mean_dark_dn(rf.darks(), resp["offset_dn"])
    np.testing.assert_array_equal(flat, np.load(calibrated / "profile.flat.npy"))
    assert resp["profile"].endswith("profile.json")
    # photons per frame in frame_info = sum((counts - dark) / flat) / K / QE
    expected = ((frames - dark) / flat).sum(axis=(1, 2)) / resp["gain_dn_per_e"] / resp["quantum_efficiency"]
    np.testing.assert_allclose(info["photons"], expected, rtol=1e-5)
    with RunFile(two_runs["noflat"]) as rf:
        assert rf.flat_field() is None
        no_flat_photons = rf.frame_info()["photons"]
    assert not np.allclose(no_flat_photons, info["photons"], rtol=1e-6)  # same raw frames, other conversion


@pytest.mark.parametrize("problem", ["missing", "wrong shape"])
def test_a_bad_flat_file_is_refused_with_one_line(calibrated, tmp_path, problem):
    prof = json.loads((calibrated / "profile.json").read_text())
    if problem == "missing":
        prof["flat_field_file"] = "gone.flat.npy"
        expect = "does not exist"
    else:
        np.save(tmp_path / "small.flat.npy", np.ones((16, 16), np.float32))
        prof["flat_field_file"] = "small.flat.npy"
        expect = "has shape (16, 16) but the frames are (32, 32)"
    (tmp_path / "profile.json").write_text(json.dumps(prof))
    cfg = tmp_path / "bench.toml"
    cfg.write_text(_with_profile(small_bench_text(grid=GRID, sensor=SENSOR, passes=1), tmp_path / "profile.json"))
    res = _run_cli("run", str(cfg), "--acknowledge-safety", "--output-dir", str(tmp_path / "out"))
    assert res.returncode != 0 and "Traceback" not in res.stderr
    lines = [ln for ln in res.stderr.splitlines() if ln.strip()]
    assert len(lines) == 1 and expect in lines[0] and "flat-field file" in lines[0], res.stderr
    assert not (tmp_path / "out").exists() or not any((tmp_path / "out").glob("*.h5"))


def test_a_profile_alone_in_the_response_table_is_enough(calibrated):
    """What `maskrun calibrate` tells the user to write: [response] profile = ..., no data-sheet values."""
    from maskrun.daemon.acquire.bench import build_bench

    text = small_bench_text(grid=GRID, sensor=SENSOR, prnu_fraction=PRNU)
    head = text.index("\n[response]")
    block_end = text.index("\n[", head + 1)
    text = text[:head] + f'\n[response]\nprofile = "{calibrated / "profile.json"}"\n' + text[block_end:]
    assert "quantum_efficiency" not in text[head:text.index("\n[", head + 1)]
    bench = build_bench(parse_config(text, str(calibrated / "profile-only.toml")))
    try:
        prof = json.loads((calibrated / "profile.json").read_text())
        assert bench.response.gain_dn_per_e == pytest.approx(prof["gain_dn_per_e"])
        assert bench.response.quantum_efficiency == pytest.approx(prof["quantum_efficiency"])
        assert bench.flat_field is not None
    finally:
        bench.close()
