"""The simulated SLM with a non-nominal response, its measurement on the simulated bench (split aperture,
phase shifting with unknown steps), and the masks as really imposed in the run file and the reconstruction.

Real parts: the simulated bench (in-process simulated SLM and camera, the safety box on a pseudo-terminal),
real HDF5 run files and the real reconstruction worker process (run_foreground)."""

import io

import numpy as np
import pytest
from rich.console import Console

from slmbench import slm_bench_text
from maskrun.daemon.acquire.bench import build_bench, open_bench
from maskrun.daemon.commands.cli import main
from maskrun.daemon.config import ConfigError, parse_config
from maskrun.daemon.acquire.foreground import RunRequest, run_foreground
from maskrun.daemon.masks import make_masks
from maskrun.daemon.acquire.modulator_response import measure_response, profile_from_frames, split_image
from maskrun.daemon.record.runfile import RunFile
from maskrun.drivers.errors import DeviceMisconfigured
from maskrun.drivers.modulator_profile import ModulatorProfile, linear_profile
from maskrun.reconstruct.phase_steps import phase_steps
from maskrun.simulators.modulator import true_response_profile
from maskrun.simulators.sample import phase_target


def _console():
    return Console(file=io.StringIO(), width=120)


def test_equal_steps_match_the_synchronous_detection_formula():
    # Outside check: for N steps equally spaced over 2 pi, the fringe phase is
    # theta = atan2(-sum I_n sin d_n, sum I_n cos d_n) (Bruning et al., "Digital wavefront measuring
    # interferometer for testing optical surfaces and lenses", Appl. Opt. 13, 2693, 1974).
    # N = 6: three directions on the circle (with 4 frames at quarter steps the unknown-step problem is
    # degenerate: any skewed pair of quadratures fits as well).
    rng = np.random.default_rng(3)
    theta = rng.uniform(-np.pi, np.pi, (12, 12))
    a, b = 5 + rng.random((12, 12)), 1 + rng.random((12, 12))
    steps = 2 * np.pi * np.arange(6) / 6
    frames = a + b * np.cos(theta[None] + steps[:, None, None])
    got = phase_steps(frames, reference=0)
    sign = 1 if abs(got.phase_rad[1] - np.pi / 3) < 0.1 else -1  # the data alone leave the sign open
    fit = got if sign == 1 else got.flipped()
    assert np.allclose(np.angle(np.exp(1j * (fit.phase_rad - steps))), 0, atol=1e-6)
    # the per-pixel cross term carries the fringe phase: a + p cos D + q sin D = a + b cos(theta + D)
    synchronous = np.arctan2(-np.tensordot(np.sin(steps), frames, 1), np.tensordot(np.cos(steps), frames, 1))
    assert np.allclose(np.angle(np.exp(1j * (np.arctan2(-fit.cross_q, fit.cross_p) - synchronous))), 0, atol=1e-6)


def _split_frames(field, phases, rng):
    h, w = field.shape
    right = np.zeros((h, w), bool)
    right[:, w // 2:] = True
    return np.array([rng.poisson(np.abs(np.fft.fft2(field * np.exp(1j * np.where(right, p, 0.0)), norm="ortho")) ** 2)
                     for p in phases], dtype=float)


@pytest.mark.parametrize("direction", [1, -1])
def test_sign_comes_from_the_split_geometry_not_from_an_assumption(direction):
    truth = true_response_profile(200, 0.2, levels=256)
    field = phase_target((32, 32)).field * 300
    frames = _split_frames(field, direction * truth.phase[::4], np.random.default_rng(0))
    m = profile_from_frames(truth.grey[::4], frames, 0, 632.8e-9)
    assert np.sqrt(np.mean((m.profile.phase - direction * truth.phase[::4]) ** 2)) < 0.02
    assert m.profile.measured and "split aperture" in m.profile.method


def test_measured_response_matches_the_simulated_truth(tmp_path):
    cfg = parse_config(slm_bench_text(), str(tmp_path / "slm.toml"))
    with open_bench(cfg) as bench:
        m = measure_response(bench, frames_per_level=2)
        truth = bench.optics.slm_response
        assert bench.optics.shown_mask == -1  # the split image, not a mask, was on the field
        assert not bench.safety.shutter_is_open()  # closed again at the end
    assert m.profile.grey_levels == list(range(256))
    rms = float(np.sqrt(np.mean((m.profile.phase - truth.phase) ** 2)))
    print(f"measured vs simulated true response: rms {rms:.4f} rad over 256 levels")
    assert rms < 0.05  # the target
    # 2 pi is reached near grey 220 (the truth), not at 256 (the nominal table)
    assert abs(int(np.argmax(m.profile.phase >= 2 * np.pi)) - 220) <= 2
    path = m.profile.save(tmp_path / "slm.json")
    assert ModulatorProfile.load(path).measured


def test_the_verb_writes_a_profile_and_refuses_a_modulator_that_cannot_show_grey(tmp_path, capsys):
    cfg_path = tmp_path / "slm.toml"
    cfg_path.write_text(slm_bench_text(output_dir=tmp_path))
    out = tmp_path / "measured.json"
    assert main(["measure-response", str(cfg_path), "--acknowledge-safety", "--step", "4", "--output", str(out)]) == 0
    text = capsys.readouterr().out
    assert "rms difference from the simulated true response" in text and "2 pi is reached at grey level" in text
    prof = ModulatorProfile.load(out)
    assert prof.grey_levels[:3] == [0, 4, 8] and prof.grey_levels[-1] == 255
    # the demo bench's serial-line modulator shows stored masks only: refused before the safety notice
    demo = tmp_path / "demo.toml"
    demo.write_text(slm_bench_text(response=None).replace('driver = "simulated"\n\n[modulator.settings]',
                                                          'driver = "serial-line"\n\n[modulator.settings]\nport = "sim:modulator"', 1))
    assert main(["measure-response", str(demo), "--acknowledge-safety"]) == 2
    err = capsys.readouterr()
    assert "cannot show arbitrary grey images" in err.err and "LASER SAFETY" not in err.out


def test_show_grey_checks_its_input(tmp_path):
    cfg = parse_config(slm_bench_text(), str(tmp_path / "slm.toml"))
    with open_bench(cfg) as bench:
        with pytest.raises(DeviceMisconfigured, match="integer"):
            bench.modulator.show_grey(np.zeros(bench.grid_shape))
        with pytest.raises(DeviceMisconfigured, match="grid"):
            bench.modulator.show_grey(np.zeros((3, 3), dtype=int))
        with pytest.raises(DeviceMisconfigured, match="not all levels"):
            bench.modulator.show_grey(split_image(bench.grid_shape, 0, 300))


def test_config_refusals(tmp_path):
    bad = slm_bench_text().replace('[modulator]\ndriver = "simulated"\n\n[modulator.settings]',
                                   '[modulator]\ndriver = "serial-line"\n\n[modulator.settings]\nport = "sim:modulator"', 1)
    with pytest.raises(ConfigError, match="simulation.modulator_response.*driver = 'simulated'"):
        build_bench(parse_config(bad, str(tmp_path / "bad.toml")))
    linear_profile(230, 1064e-9).save(tmp_path / "ir.json")
    with pytest.raises(ConfigError, match="modulator.profile.*1064.0 nm.*632.8 nm"):
        build_bench(parse_config(slm_bench_text(profile="ir.json"), str(tmp_path / "ir.toml")))
    with pytest.raises(ConfigError, match="modulator.profile.*measure-response"):
        build_bench(parse_config(slm_bench_text(profile="missing.json"), str(tmp_path / "m.toml")))


def _run_error(tmp_path, name, text):
    cfg = parse_config(text, str(tmp_path / f"{name}.toml"))
    summary = run_foreground(cfg, RunRequest(acknowledge_unattended=True, output_dir=str(tmp_path / name)), _console())
    assert summary.state.value == "finished", summary.message
    with RunFile(summary.output_path) as rf:
        return float(rf.estimate_info()["true_error"][-1]), summary.output_path


def test_runs_with_the_measured_profile_store_and_use_the_masks_as_imposed(tmp_path):
    cfg = parse_config(slm_bench_text(), str(tmp_path / "slm.toml"))
    with open_bench(cfg) as bench:
        measured = measure_response(bench, frames_per_level=2).profile
        truth = bench.optics.slm_response
    measured.save(tmp_path / "slm.json")
    nominal_err, _ = _run_error(tmp_path, "nominal", slm_bench_text())
    measured_err, path = _run_error(tmp_path, "measured", slm_bench_text(profile="slm.json"))
    ideal_err, _ = _run_error(tmp_path, "ideal", slm_bench_text(response=None))
    print(f"error vs truth: nominal table {nominal_err:.4f}, measured profile {measured_err:.4f}, "
          f"exact modulator {ideal_err:.4f} (ratio measured/exact {measured_err / ideal_err:.2f})")
    assert nominal_err > 5 * ideal_err  # the nominal table spoils the reconstruction
    assert measured_err < 1.5 * ideal_err
    with RunFile(path) as rf:
        stored = rf.masks()
        attrs = rf.attrs
    designed = make_masks("random_phase", 6, (32, 32), 7)
    assert np.allclose(stored, measured.impose(designed), atol=1e-6)  # quantized through the profile
    # and close to what the device really imposes when driven through that profile (it is a measurement)
    true_masks = np.exp(1j * truth.phase_of_grey(measured.grey_for_phase(np.angle(designed))))
    assert np.sqrt(np.mean(np.angle(stored / true_masks) ** 2)) < 0.05
    assert "quantized through the modulator profile slm.json" in attrs["masks_as_stored"]
    kept = ModulatorProfile.model_validate_json(attrs["modulator_profile"])
    assert kept.phase_rad == measured.phase_rad and kept.grey_levels == measured.grey_levels and kept.measured


from hypothesis import given, settings, strategies as st  # noqa: E402


@settings(max_examples=25, deadline=None)
@given(n=st.integers(12, 60), span=st.floats(2 * np.pi, 3 * np.pi), seed=st.integers(0, 10_000))
def test_unknown_steps_are_recovered_for_any_steps_around_the_circle(n, span, seed):
    # as in the measurement, the steps go once round the circle or more (a grey range reaching 2 pi),
    # at random places, a dozen or more (few steps crowded together converge slowly: see phase_steps)
    rng = np.random.default_rng(seed)
    steps = np.concatenate([[0.0], np.sort(rng.uniform(0, span, n - 2)), [span]])
    theta = rng.uniform(-np.pi, np.pi, (10, 10))
    a, b = 3 + rng.random((10, 10)), 0.5 + rng.random((10, 10))
    got = phase_steps(a + b * np.cos(theta[None] + steps[:, None, None]), reference=0)
    diff = [np.max(np.abs(np.angle(np.exp(1j * (s * got.phase_rad - steps))))) for s in (1, -1)]
    assert min(diff) < 2e-3  # noise-free: limited by the slow final convergence of few, uneven steps


def test_the_example_bench_has_a_non_nominal_displaced_slm():
    from pathlib import Path

    import maskrun.configs

    from maskrun.daemon.config import load_config

    path = Path(maskrun.configs.__file__).parent / "simulated-slm.toml"
    bench = build_bench(load_config(path))
    try:
        assert bench.optics.mask_offset_px == (0.0, 2.5)
        assert bench.optics.slm_response.phase_of_grey([220])[0] == pytest.approx(2 * np.pi)
        assert type(bench.modulator).__name__ == "SimulatedModulator"
    finally:
        bench.close()
