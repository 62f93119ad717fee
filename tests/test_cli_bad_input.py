"""Bad input to the command line: one clear line, a non-zero exit, no traceback, no file."""

import os
import shutil
import subprocess
import sys

from benchcfg import small_bench_text

MASKRUN = shutil.which("maskrun", path=os.path.dirname(sys.executable)) or "maskrun"


def _run(*args, cwd=None, timeout=120):
    return subprocess.run([MASKRUN, *args], capture_output=True, text=True, cwd=cwd, timeout=timeout,
                          stdin=subprocess.DEVNULL)


def _assert_one_clear_error(res, *needles):
    assert res.returncode != 0
    assert "Traceback" not in res.stderr, res.stderr
    err_lines = [line for line in res.stderr.splitlines() if line.startswith("error:")]
    assert err_lines, res.stderr
    for n in needles:
        assert n in res.stderr, (n, res.stderr)


def test_missing_config(tmp_path):
    res = _run("run", str(tmp_path / "nope.toml"), "--acknowledge-safety")
    _assert_one_clear_error(res, "nope.toml", "file not found")


def test_malformed_config(tmp_path):
    p = tmp_path / "bad.toml"
    p.write_text("[run\npasses = 3\n")
    res = _run("run", str(p), "--acknowledge-safety")
    _assert_one_clear_error(res, "bad.toml", "not valid TOML")


def test_camera_smaller_than_grid(tmp_path):
    p = tmp_path / "small-sensor.toml"
    p.write_text(small_bench_text(grid=32, sensor=24))
    res = _run("run", str(p), "--acknowledge-safety", "--output-dir", str(tmp_path / "out"))
    _assert_one_clear_error(res, "small-sensor.toml", "camera.settings.sensor_shape", "smaller than the reconstruction grid")
    assert not (tmp_path / "out").exists()


def test_zero_masks(tmp_path):
    p = tmp_path / "zero.toml"
    p.write_text(small_bench_text(masks=0))
    res = _run("run", str(p), "--acknowledge-safety")
    _assert_one_clear_error(res, "zero.toml", "masks.count", "at least one mask")


def test_unwritable_output_folder_leaves_no_file(tmp_path):
    p = tmp_path / "bench.toml"
    p.write_text(small_bench_text())
    blocker = tmp_path / "blocker"
    blocker.write_text("a file, not a folder")
    res = _run("run", str(p), "--acknowledge-safety", "--output-dir", str(blocker / "runs"))
    _assert_one_clear_error(res, "not writable")
    assert sorted(x.name for x in tmp_path.iterdir()) == ["bench.toml", "blocker"]


def test_no_acknowledgement_without_a_terminal(tmp_path):
    p = tmp_path / "bench.toml"
    p.write_text(small_bench_text())
    res = _run("run", str(p), "--output-dir", str(tmp_path / "out"))
    _assert_one_clear_error(res, "--acknowledge-safety")
    assert "LASER SAFETY NOTICE" in res.stdout  # the notice was shown before refusing
    assert not (tmp_path / "out").exists()


def test_a_good_run_from_the_command_line(tmp_path):
    p = tmp_path / "bench.toml"
    p.write_text(small_bench_text(passes=1))
    res = _run("run", str(p), "--acknowledge-safety", "--output-dir", str(tmp_path / "out"))
    assert res.returncode == 0, res.stderr + res.stdout
    files = sorted(x.suffix for x in (tmp_path / "out").iterdir())
    assert files == [".h5", ".log", ".png"]  # run file, plain-text run log, figure
    assert "Run summary" in res.stdout and "error vs truth" in res.stdout
