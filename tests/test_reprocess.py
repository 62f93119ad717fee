"""Offline reprocessing (`maskrun reconstruct`): conversion, results files, local processes, bad input.

Runs are made for real (simulated bench, pty firmware, real HDF5) with the small test bench.
"""

import hashlib
import io
import pickle
from pathlib import Path

import h5py
import numpy as np
import pytest
from rich.console import Console

from benchcfg import small_bench
from maskrun.daemon.commands.cli import main as cli_main
from maskrun.daemon.acquire.foreground import RunRequest, run_foreground
from maskrun.daemon.offline.reprocess import (
    InProcessRunner,
    LocalRunner,
    ReprocessError,
    ReprocessOptions,
    frame_set_intensities,
    mean_dark_dn,
    plan_tasks,
    process_frame_set,
    read_results,
    reprocess_runs,
    response_for_run,
    response_from_config_text,
    results_path_for,
)
from maskrun.daemon.record.runfile import RunFile
from maskrun.daemon.record.store import StoreError
from maskrun.reconstruct import forward, kernels

ITERATIONS = 40


def _sha(path: Path) -> str:
    return hashlib.sha256(Path(path).read_bytes()).hexdigest()


@pytest.fixture(scope="module")
def run_path(tmp_path_factory) -> Path:
    out = tmp_path_factory.mktemp("runs")
    summary = run_foreground(small_bench(passes=3), RunRequest(acknowledge_unattended=True, output_dir=str(out)),
                             Console(file=io.StringIO()))
    assert summary.state.value == "finished", summary.message
    return Path(summary.output_path)


def test_conversion_follows_the_camera_model_and_grid_convention(run_path):
    with RunFile(run_path) as rf:
        resp = response_for_run(rf, "stored")
        darks = rf.darks()
        rows = rf.complete_sets()[0].rows
        frames = rf.frames(rows)
    dark = mean_dark_dn(darks, resp.offset_dn)
    y = frame_set_intensities(frames, dark, resp)
    # Linear camera model: mean grey value = dark level + K * mean electrons, so electrons = (DN - dark) / K
    # (EMVA Standard 1288, Release 4.0 Linear, 2021, section 2.2; from memory).
    expected = (frames.astype(np.float64) - darks.astype(np.float64).mean(axis=0)) / resp.gain_dn_per_e
    # grid convention: zero frequency at [0, 0]; numpy.fft.ifftshift undoes the centred (fftshift) layout
    # (NumPy reference, numpy.fft.ifftshift).
    expected = np.maximum(np.fft.ifftshift(expected, axes=(-2, -1)), 0.0)
    np.testing.assert_allclose(y, expected, rtol=1e-5, atol=1e-3)
    assert y.dtype == np.float32 and y.min() >= 0.0


def test_each_frame_set_is_reconstructed_into_a_new_file_and_the_run_is_untouched(run_path, tmp_path):
    before = _sha(run_path)
    opts = ReprocessOptions(iterations=ITERATIONS)
    reports = reprocess_runs([run_path], opts, LocalRunner(2), output_dir=tmp_path)
    assert _sha(run_path) == before  # raw data never modified
    (rep,) = reports
    assert rep.failed == [] and rep.frame_sets == 3
    assert rep.results_path == tmp_path / f"{run_path.stem}.recon-hybrid-{ITERATIONS}.h5"
    est, info, attrs = read_results(rep.results_path)
    assert est.shape == (3, 32, 32) and est.dtype == np.complex128
    assert info["pass_index"].tolist() == [0, 1, 2] and info["passes_used"].tolist() == [1, 1, 1]
    # provenance
    assert attrs["method_used"] == "hybrid" and attrs["iterations"] == ITERATIONS and attrs["mode"] == "each"
    assert attrs["scheduler"] == "local-processes:2" and attrs["host"] and attrs["created_utc"].endswith("Z")
    assert attrs["maskrun_version"] and attrs["source_run"] == str(run_path.resolve())
    assert attrs["solver_kernels"] == kernels.description()
    # the estimates explain the measured data: |F(m_k x)|^2 matches the frame set (in detected photons per
    # frame set) to the shot-noise level, and the error against the stored truth is a few per cent
    with RunFile(run_path) as rf:
        resp = response_for_run(rf, "stored")
        sets = rf.complete_sets()
        y0 = frame_set_intensities(rf.frames(sets[0].rows), mean_dark_dn(rf.darks(), resp.offset_dn), resp)
        masks = rf.masks()
        exposure = float(rf.frame_info()["exposure_s"][sets[0].rows[-1]])
    x_counts = est[0] * np.sqrt(resp.quantum_efficiency * exposure)
    model = forward(x_counts, masks)
    rel = np.linalg.norm(np.sqrt(model) - np.sqrt(y0)) / np.linalg.norm(np.sqrt(y0))
    assert rel < 0.1
    assert np.all(info["true_error"] < 0.1)
    # the shot-noise error estimate and the true error agree within a factor of 3
    assert np.all(info["true_error"] < 3 * info["error_estimate"]) and np.all(info["true_error"] > info["error_estimate"] / 3)


def test_local_processes_and_in_process_give_the_same_bits(run_path, tmp_path):
    opts = ReprocessOptions(iterations=ITERATIONS, precision="single", seed=3)
    (tmp_path / "a").mkdir()
    (tmp_path / "b").mkdir()
    a = reprocess_runs([run_path], opts, InProcessRunner(), output_dir=tmp_path / "a")
    b = reprocess_runs([run_path], opts, LocalRunner(2), output_dir=tmp_path / "b")
    ea, ia, _ = read_results(a[0].results_path)
    eb, ib, attrs = read_results(b[0].results_path)
    assert ea.dtype == np.complex64
    assert np.array_equal(ea, eb) and np.array_equal(ia["residual"], ib["residual"])
    # different seed, different start: not the same bits (the comparison above can fail)
    c = process_frame_set(plan_tasks(run_path, ReprocessOptions(iterations=ITERATIONS, precision="single", seed=4))[0])
    assert not np.array_equal(c.estimate, ea[0])


def test_cumulative_mode_matches_the_live_photon_count(run_path, tmp_path):
    opts = ReprocessOptions(iterations=ITERATIONS, mode="cumulative")
    (rep,) = reprocess_runs([run_path], opts, InProcessRunner(), output_dir=tmp_path)
    assert rep.results_path.name.endswith("-cumulative.h5")
    _, info, _ = read_results(rep.results_path)
    assert info["passes_used"].tolist() == [1, 2, 3]
    with RunFile(run_path) as rf:
        live = rf.estimate_info()
    # the live worker saw the same detected photons (same conversion as the sequencer)
    for row in info:
        (match,) = live[live["pass_index"] == row["pass_index"]]
        assert match["passes_used"] == row["passes_used"]
        assert np.isclose(match["photons"], row["photons"], rtol=1e-6)
    # more data, smaller predicted error (shot noise: ~1/sqrt(passes))
    assert np.all(np.diff(info["error_estimate"]) < 0)


def test_tasks_carry_paths_and_rows_not_arrays(run_path):
    tasks = plan_tasks(run_path, ReprocessOptions())
    assert len(tasks) == 3 and all(len(t.sets) == 1 and len(t.sets[0]) == 6 for t in tasks)
    assert max(len(pickle.dumps(t)) for t in tasks) < 2000  # a 32x32x6 frame set alone is ~12 kB


def test_bad_input_is_refused_before_any_work(run_path, tmp_path):
    opts = ReprocessOptions(iterations=ITERATIONS)
    not_h5 = tmp_path / "notes.h5"
    not_h5.write_text("not hdf5")
    with pytest.raises(StoreError, match="not a readable HDF5"):
        reprocess_runs([run_path, not_h5], opts, InProcessRunner(), output_dir=tmp_path)
    assert not results_path_for(run_path, opts, tmp_path).exists()  # nothing written for the good run either
    with h5py.File(tmp_path / "other.h5", "w") as f:
        f.attrs["format"] = "something-else"
    with pytest.raises(StoreError, match="not a maskrun run file"):
        plan_tasks(tmp_path / "other.h5", opts)
    reprocess_runs([run_path], opts, InProcessRunner(), output_dir=tmp_path)
    with pytest.raises(ReprocessError, match="already exists"):
        reprocess_runs([run_path], opts, InProcessRunner(), output_dir=tmp_path)
    with pytest.raises(ValueError, match="unknown method"):
        ReprocessOptions(method="magic")


def test_cli_reconstruct(run_path, tmp_path, capsys):
    rc = cli_main(["reconstruct", str(run_path), "--iterations", "5", "--workers", "1", "--method", "er",
                   "--output-dir", str(tmp_path)])
    assert rc == 0
    out = capsys.readouterr().out
    assert "3 estimates" in out and "local-processes:1" in out
    assert (tmp_path / f"{run_path.stem}.recon-er-5.h5").exists()
    assert cli_main(["reconstruct", str(run_path), "--iterations", "5", "--method", "er",
                     "--output-dir", str(tmp_path)]) == 2  # exists: one-line error
    assert "already exists" in capsys.readouterr().err
    assert cli_main(["reconstruct", str(tmp_path / "missing.h5")]) == 2
    assert "no such run file" in capsys.readouterr().err


def test_a_run_with_a_profile_reprocesses_with_the_profile_gain(tmp_path):
    """The run file records the response actually used; reprocessing must not fall back to [response]."""
    from benchcfg import small_bench_text
    from maskrun.daemon.calibrate.camera_profile import CameraProfile
    from maskrun.daemon.config import parse_config

    # the true camera: gain 0.3 DN/e-, offset 100 DN, QE 0.6 (the demo camera); [response] says 0.5
    CameraProfile(gain_dn_per_e=0.3, offset_dn=100.0, dark_noise_e=3.0, saturation_capacity_e=12000.0,
                  quantum_efficiency=0.6, linearity_error_pct=0.1, bit_depth=12, frame_shape=(32, 32),
                  camera_driver="simulated").save(tmp_path / "profile.json")
    text = small_bench_text(passes=2).replace(
        "[response]                  # counts -> photons; from the data sheet until 'maskrun calibrate' gives a profile\n"
        "gain_dn_per_e = 0.3", "[response]\ngain_dn_per_e = 0.5")
    text = text.replace("quantum_efficiency = 0.6\n\n[modulator]",
                        f'quantum_efficiency = 0.6\nprofile = "{tmp_path / "profile.json"}"\n\n[modulator]')
    assert "gain_dn_per_e = 0.5" in text
    cfg = parse_config(text, str(tmp_path / "bench.toml"))
    summary = run_foreground(cfg, RunRequest(acknowledge_unattended=True, output_dir=str(tmp_path / "out")),
                             Console(file=io.StringIO()))
    assert summary.state.value == "finished", summary.message
    path = Path(summary.output_path)
    with RunFile(path) as rf:
        assert rf.response_attrs()["gain_dn_per_e"] == pytest.approx(0.3)
        assert rf.response_attrs()["profile"] == str((tmp_path / "profile.json").resolve())
        assert response_for_run(rf, "x").gain_dn_per_e == pytest.approx(0.3)
        assert response_from_config_text(rf.config_toml, "x").gain_dn_per_e == pytest.approx(0.5)
        live = rf.estimate_info()
    (rep,) = reprocess_runs([path], ReprocessOptions(iterations=ITERATIONS, mode="cumulative"), InProcessRunner(),
                            output_dir=tmp_path)
    _, info, _ = read_results(rep.results_path)
    for row in info:  # the live worker converted with the profile's gain; so must the reprocessing
        (match,) = live[live["pass_index"] == row["pass_index"]]
        assert np.isclose(match["photons"], row["photons"], rtol=1e-6)
    assert np.all(info["true_error"] < 0.1)  # with the [response] gain the photons would be 0.6x and off


def test_files_without_recorded_response_fall_back_to_the_stored_config(run_path, tmp_path):
    old = tmp_path / "old.h5"
    old.write_bytes(run_path.read_bytes())
    with h5py.File(old, "a") as f:  # as written before the response was recorded
        for name in ("response_gain_dn_per_e", "response_offset_dn", "response_quantum_efficiency", "response_profile"):
            del f["entry"].attrs[name]
        text = f["entry"].attrs["config_toml"]
        head, table = text.split("\n[response]", 1)  # the [response] table's gain (the camera has its own)
        assert "\ngain_dn_per_e = 0.3\n" in table
        f["entry"].attrs["config_toml"] = head + "\n[response]" + table.replace(
            "\ngain_dn_per_e = 0.3\n", "\ngain_dn_per_e = 0.25\n", 1)
    with RunFile(old) as rf:
        assert rf.response_attrs() is None
        assert response_for_run(rf, "x").gain_dn_per_e == pytest.approx(0.25)
    with RunFile(run_path) as rf:
        assert response_for_run(rf, "x").gain_dn_per_e == pytest.approx(0.3)
