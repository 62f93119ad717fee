"""Mask registration: the offset of the masks on the field from one frame set, on the simulated bench with a
deliberately displaced modulator ([simulation] modulator_offset_px), and a run with the correction applied.

Real parts: the simulated bench (in-process simulated SLM and camera, the safety box on a pseudo-terminal),
real config files edited on disk, real HDF5 run files and the reconstruction worker process."""

import io

import numpy as np
import pytest
from rich.console import Console

from slmbench import slm_bench_text
from maskrun.daemon.acquire.bench import open_bench
from maskrun.daemon.commands.cli import main
from maskrun.daemon.config import ConfigError, load_config, parse_config
from maskrun.daemon.acquire.foreground import RunRequest, run_foreground
from maskrun.daemon.acquire.mask_registration import apply_offset, frame_set_from_run, register, take_frame_set
from maskrun.daemon.record.runfile import RunFile
from maskrun.reconstruct.masks import octanary_masks, shift_masks
from maskrun.reconstruct.registration import circular_centroid, estimate_mask_offset, residual_at_offset
from maskrun.simulators.sample import bare_beam, phase_target


def _console():
    return Console(file=io.StringIO(), width=120)


def _frames(x, masks, offset, seed=0):
    y = np.abs(np.fft.fft2(shift_masks(masks, offset) * x, norm="ortho")) ** 2
    return np.random.default_rng(seed).poisson(y).astype(float)


def test_whole_pixel_shifts_leave_the_data_unchanged():
    # Outside check: the DFT shift theorem, |F(f(. + s))| = |F(f)| (Bracewell, "The Fourier Transform and Its
    # Applications", 3rd ed. 2000, ch. 6, shift theorem): masks displaced by s with object x give the data of the
    # designed masks with the object displaced by -s. So the data residual cannot tell whole pixels apart,
    # and a position reference is needed for them; fractions change the data (the blend of mask pixels).
    x = bare_beam((32, 32)) * 300
    m = octanary_masks(6, (32, 32), seed=7)
    y = _frames(x, m, (1.0, 2.5))
    whole = [residual_at_offset(y, m, o)[0] for o in ((0.0, 0.5), (1.0, 2.5), (-3.0, 1.5))]
    assert max(whole) - min(whole) < 1e-3
    assert residual_at_offset(y, m, (1.0, 2.0))[0] > 20 * min(whole)


@pytest.mark.parametrize("offset", [(1.0, 0.0), (0.0, 2.5), (-1.3, 0.7)])
def test_offset_estimated_from_one_frame_set_of_the_bare_beam(offset):
    x = bare_beam((32, 32)) * 300
    m = octanary_masks(6, (32, 32), seed=7)
    r = estimate_mask_offset(_frames(x, m, offset), m)
    err = np.hypot(r.offset_px[0] - offset[0], r.offset_px[1] - offset[1])
    print(f"offset {offset}: estimate ({r.offset_px[0]:.3f}, {r.offset_px[1]:.3f}), error {err:.3f} px")
    assert err < 0.2
    assert r.residual <= r.residual_designed


def test_with_a_sample_in_the_whole_pixels_need_a_reference_image():
    x = phase_target((32, 32)).field * 300
    m = octanary_masks(6, (32, 32), seed=7)
    y = _frames(x, m, (0.0, 2.5))
    # the test plate's centroid is not at the grid centre (the chromium patch): the fraction is right, the
    # whole pixels from the centroid are not - so the reference must be said
    assert circular_centroid(np.abs(x) ** 2)[1] < 15.5
    r = estimate_mask_offset(y, m, reference_image=x)
    assert np.hypot(r.offset_px[0], r.offset_px[1] - 2.5) < 0.2
    r0 = estimate_mask_offset(y, m, reference_px=circular_centroid(np.abs(x) ** 2))
    assert np.hypot(r0.offset_px[0], r0.offset_px[1] - 2.5) < 0.2


def test_apply_offset_edits_the_config(tmp_path):
    path = tmp_path / "bench.toml"
    path.write_text(slm_bench_text(response=None))
    apply_offset(path, (0.123456, -2.5))
    assert load_config(path).masks.offset_px == (0.123, -2.5)
    apply_offset(path, (1.0, 0.0))  # replaces, does not add a second line
    assert load_config(path).masks.offset_px == (1.0, 0.0)
    assert path.read_text().count("offset_px =") == 1
    assert (tmp_path / "bench.toml.bak").exists()
    bare = tmp_path / "bare.toml"  # no [masks] table at all
    text = slm_bench_text(response=None)
    block = text[text.index("[masks]\n"):text.index("[camera]\n")]
    bare.write_text(text.replace(block, ""))
    assert "[masks]" not in bare.read_text()
    apply_offset(bare, (0.5, 0.5))
    assert load_config(bare).masks.offset_px == (0.5, 0.5)
    broken = tmp_path / "broken.toml"
    # an array spread over two lines is beyond the simple edit: refused, the file left as it was
    broken.write_text(slm_bench_text(response=None).replace("[masks]\n", "[masks]\noffset_px = [0.0,\n  1.0]\n"))
    before = broken.read_text()
    with pytest.raises(ConfigError):
        apply_offset(broken, (0.0, 1.0))
    assert broken.read_text() == before and not (tmp_path / "broken.toml.bak").exists()


def _run_error(tmp_path, name, text):
    cfg = parse_config(text, str(tmp_path / f"{name}.toml"))
    summary = run_foreground(cfg, RunRequest(acknowledge_unattended=True, output_dir=str(tmp_path / name)), _console())
    assert summary.state.value == "finished", summary.message
    with RunFile(summary.output_path) as rf:
        return float(rf.estimate_info()["true_error"][-1]), summary.output_path


@pytest.mark.parametrize("offset", [(1.0, 0.0), (0.0, 2.5)])
def test_simulated_bench_registration_and_corrected_run(tmp_path, offset):
    common = dict(family="octanary", response=None, modulator_offset_px=offset)
    # before the run: the bare beam (sample out), one frame set, the estimate
    cfg = parse_config(slm_bench_text(sample="beam", **common), str(tmp_path / "register.toml"))
    with open_bench(cfg) as bench:
        y = take_frame_set(bench)
        assert not bench.safety.shutter_is_open()
    r = register(cfg, y)
    err = np.hypot(r.offset_px[0] - offset[0], r.offset_px[1] - offset[1])
    # the run: sample in, offset applied to [masks] offset_px
    run_path = tmp_path / "run.toml"
    run_path.write_text(slm_bench_text(**common))
    apply_offset(run_path, r.offset_px)
    corrected, corrected_file = _run_error(tmp_path, "corrected", run_path.read_text())
    uncorrected, _ = _run_error(tmp_path, "uncorrected", slm_bench_text(**common))
    registered, _ = _run_error(tmp_path, "registered", slm_bench_text(family="octanary", response=None))
    print(f"offset {offset}: estimate ({r.offset_px[0]:.3f}, {r.offset_px[1]:.3f}), error {err:.3f} px; run error "
          f"corrected {corrected:.4f}, uncorrected {uncorrected:.4f}, unshifted bench {registered:.4f}, "
          f"ratio corrected/unshifted {corrected / registered:.2f}")
    assert err < 0.2
    assert corrected < 1.2 * registered
    assert uncorrected > 5 * registered
    with RunFile(corrected_file) as rf:
        assert np.allclose(rf.attrs["masks_offset_px"], np.round(r.offset_px, 3))
        assert np.allclose(rf.masks(), shift_masks(octanary_masks(6, (32, 32), seed=7), np.round(r.offset_px, 3)),
                           atol=1e-6)


def test_the_verb_from_a_run_file_and_with_apply(tmp_path, capsys):
    offset = (0.0, 1.5)
    cfg_path = tmp_path / "bench.toml"
    cfg_path.write_text(slm_bench_text(family="octanary", response=None, sample="beam", modulator_offset_px=offset,
                                       output_dir=tmp_path / "runs"))
    _, run_file = _run_error(tmp_path, "beam", cfg_path.read_text())
    y = frame_set_from_run(run_file, 0)
    assert y.shape == (6, 32, 32)
    assert main(["register-masks", str(cfg_path), "--from-run", str(run_file), "--apply"]) == 0
    out = capsys.readouterr().out
    assert "Whole-pixel shifts leave the data unchanged" in out and "Written:" in out
    got = load_config(cfg_path).masks.offset_px
    assert np.hypot(got[0] - offset[0], got[1] - offset[1]) < 0.2
    assert main(["register-masks", str(cfg_path), "--from-run", str(run_file), "--set", "9"]) == 2
    assert "no complete frame set number 9" in capsys.readouterr().err


from hypothesis import given, settings, strategies as st  # noqa: E402


@settings(max_examples=6, deadline=None)
@given(rows=st.floats(-3, 3), cols=st.floats(-3, 3))
def test_any_offset_within_three_pixels_is_found(rows, cols):
    x = bare_beam((24, 24)) * 300
    m = octanary_masks(6, (24, 24), seed=1)
    r = estimate_mask_offset(_frames(x, m, (rows, cols), seed=2), m)
    assert np.hypot(r.offset_px[0] - rows, r.offset_px[1] - cols) < 0.2
