"""Reprocessing on a real Dask distributed cluster on loopback: scheduler plus two worker processes.

The cluster is dask.distributed's LocalCluster (processes=True, one thread per worker); the
client submits file paths and frame rows, the workers open the HDF5 run files themselves.
"""

import io
import os
from pathlib import Path

import numpy as np
import pytest
from rich.console import Console

distributed = pytest.importorskip("distributed")

from benchcfg import small_bench  # noqa: E402
from maskrun.daemon.commands.cli import main as cli_main  # noqa: E402
from maskrun.daemon.offline.distributed import DaskRunner  # noqa: E402
from maskrun.daemon.acquire.foreground import RunRequest, run_foreground  # noqa: E402
from maskrun.daemon.offline.reprocess import LocalRunner, ReprocessError, ReprocessOptions, read_results, reprocess_runs  # noqa: E402

ITERATIONS = 30


@pytest.fixture(scope="module")
def runs(tmp_path_factory) -> list[Path]:
    out = tmp_path_factory.mktemp("runs")
    paths = []
    for name, passes in (("first", 2), ("second", 3)):
        s = run_foreground(small_bench(passes=passes), RunRequest(acknowledge_unattended=True, output_dir=str(out),
                                                                   name=name), Console(file=io.StringIO()))
        assert s.state.value == "finished", s.message
        paths.append(Path(s.output_path))
    return paths


@pytest.fixture(scope="module")
def cluster():
    with distributed.LocalCluster(n_workers=2, processes=True, threads_per_worker=1, host="127.0.0.1",
                                  dashboard_address=None, silence_logs=40) as c:
        yield c


def test_dask_and_local_processes_give_identical_results(runs, cluster, tmp_path):
    opts = ReprocessOptions(iterations=ITERATIONS)
    (tmp_path / "dask").mkdir()
    (tmp_path / "local").mkdir()
    dask_reports = reprocess_runs(runs, opts, DaskRunner(cluster.scheduler_address), output_dir=tmp_path / "dask")
    local_reports = reprocess_runs(runs, opts, LocalRunner(2), output_dir=tmp_path / "local")
    assert [r.frame_sets for r in dask_reports] == [2, 3]
    for d, loc in zip(dask_reports, local_reports):
        ed, idd, ad = read_results(d.results_path)
        el, il, al = read_results(loc.results_path)
        assert np.array_equal(ed, el)  # bit for bit
        for field in ("residual", "error_estimate", "true_error", "iterations", "photons"):
            assert np.array_equal(idd[field], il[field]), field
        assert ad["scheduler"] == f"dask:{cluster.scheduler_address}" and al["scheduler"] == "local-processes:2"
        assert ad["options_json"] == al["options_json"]
        # computed in the cluster's worker processes, not in this one
        with __import__("h5py").File(d.results_path) as f:
            pids = {w.decode().rsplit(":", 1)[1] for w in f["recon/worker"][...]}
        assert str(os.getpid()) not in pids
        assert np.all(idd["true_error"] < 0.1)


def test_cli_with_scheduler(runs, cluster, tmp_path, capsys):
    rc = cli_main(["reconstruct", *map(str, runs), "--scheduler", cluster.scheduler_address, "--iterations", "5",
                   "--method", "er", "--mode", "cumulative", "--output-dir", str(tmp_path)])
    assert rc == 0, capsys.readouterr().err
    out = capsys.readouterr().out
    assert f"dask:{cluster.scheduler_address}" in out
    _, info, attrs = read_results(tmp_path / f"{runs[1].stem}.recon-er-5-cumulative.h5")
    assert info["passes_used"].tolist() == [1, 2, 3] and attrs["mode"] == "cumulative"


def test_unreachable_scheduler_is_a_clear_error(runs, tmp_path):
    import socket

    with socket.socket() as s:  # a port with nobody listening
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
    with pytest.raises(ReprocessError, match="cannot reach the Dask scheduler"):
        DaskRunner(f"tcp://127.0.0.1:{port}", connect_timeout_s=1.0).client()
