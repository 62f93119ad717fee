"""The single-pattern bench (configs/single-pattern.toml): K = 1 blank mask, an isolated object,
a real run on the simulated bench (pty firmware, real HDF5) and `maskrun reconstruct` with HIO."""
import io
from pathlib import Path

import numpy as np
import pytest
from rich.console import Console

from maskrun.daemon.commands.cli import main as cli_main
from maskrun.daemon.config import parse_config
from maskrun.daemon.acquire.foreground import RunRequest, run_foreground
from maskrun.daemon.offline.reprocess import read_results
from maskrun.daemon.record.runfile import RunFile

CONFIG = Path(__file__).resolve().parents[1] / "configs" / "single-pattern.toml"


def config_text(**repl) -> str:
    text = CONFIG.read_text()
    for old, new in repl.items():
        assert old in text, old
        text = text.replace(old, new, 1)
    return text


@pytest.fixture(scope="module")
def run_path(tmp_path_factory) -> Path:
    out = tmp_path_factory.mktemp("runs")
    cfg = parse_config(config_text(**{"passes = 8": "passes = 3"}), str(CONFIG))
    summary = run_foreground(cfg, RunRequest(acknowledge_unattended=True, output_dir=str(out)), Console(file=io.StringIO()))
    assert summary.state.value == "finished", summary.message
    return Path(summary.output_path)


def test_single_pattern_run_records_one_blank_mask(run_path):
    with RunFile(str(run_path)) as rf:
        assert rf.mask_count == 1
        assert np.all(rf.masks() == 1)
        assert len(rf.complete_sets()) == 3
        truth = rf.truth()
    # the isolated object spans at most half the grid per axis (oversampled 2x) and is real, >= 0
    rows, cols = np.nonzero(np.abs(truth) > 1e-3 * np.abs(truth).max())
    assert np.ptp(rows) + 1 <= 32 and np.ptp(cols) + 1 <= 32  # blurred edges included
    assert np.all(truth.imag == 0) and np.all(truth.real >= 0)


def test_offline_reconstruct_runs_hio_on_the_k1_run(run_path, tmp_path, capsys):
    rc = cli_main(["reconstruct", str(run_path), "--mode", "cumulative", "--iterations", "3000", "--workers", "1",
                   "--output-dir", str(tmp_path)])
    assert rc == 0
    out = capsys.readouterr().out
    assert "3 estimates" in " ".join(out.split())
    path = tmp_path / f"{run_path.stem}.recon-hio-3000-cumulative.h5"
    est, info, attrs = read_results(path)
    assert attrs["method_used"] == "hio"
    # [reconstruction] nonnegative = true in the config: the estimates are real and non-negative
    assert np.all(est.imag == 0) and np.all(est.real >= 0)
    # error modulo shift, twin and global phase, against the simulated truth: the photon-limited data
    # (2e5 photons per frame, most far-field pixels below one photon) give a rough but right object
    assert np.all(np.isfinite(info["true_error"]))
    assert info["true_error"][-1] < 0.4
    assert np.all(info["residual"] < 0.3)


def test_blank_masks_need_count_one_and_parse_without_simulation():
    from maskrun.daemon.config import ConfigError

    with pytest.raises(ConfigError, match="count = 1"):
        parse_config(config_text(**{"count = 1": "count = 2"}), "bad.toml")
    text = CONFIG.read_text()
    real_bench = text[: text.index("[simulation]")]  # what a real bench has: no [simulation]
    cfg = parse_config(real_bench, "real.toml")
    assert cfg.masks.family == "blank" and cfg.reconstruction.nonnegative and cfg.simulation is None
