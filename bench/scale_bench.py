"""Scale-out benchmark: offline reprocessing throughput, local processes against a Dask cluster.

Run:  .venv/bin/python bench/scale_bench.py [--passes 8] [--iterations 100] [--rounds 2]
      (about 1-3 minutes on 2 cores)

1. Makes one demo run (configs/demo.toml: 128x128 grid, K = 8 masks) with ``--passes``
   frame sets, in a temporary folder.
2. Throughput: reprocesses every frame set (mode 'each', hybrid, ``--iterations``,
   complex128) with 1 and with 2 local worker processes; frame sets per second
   and the speed-up ratio (2 workers / 1 worker). Wall time includes starting
   the process pool, as a user sees it.
3. Distributed overhead: the same tasks on a Dask LocalCluster on loopback
   (one worker process, one thread) against 1 local process, measured in the
   same run on a small run (32x32 grid, K = 6, from tests/benchcfg.py) with
   ``--iterations 1`` so the solve is nearly free (a few ms); the
   difference per frame set is what the distributed path costs (client
   connection, scheduling, result transfer through the scheduler). The light
   task list repeats the frame sets 4 times so fixed costs are spread out.
   Cluster start-up is excluded (a cluster is started once and reused, as on
   a real cluster); the local pool's start is included in the local figure.
4. Checks that the estimates are bit-for-bit the same from every path.

Each figure is the best of ``--rounds`` repeats (the machine may be shared:
the best is the least disturbed). Prints a table and one JSON line.
"""

from __future__ import annotations

import argparse
import io
import json
import os
import tempfile
import time
from pathlib import Path

import numpy as np
from rich.console import Console


def make_run(folder: Path, passes: int, small: bool = False) -> Path:
    from maskrun.daemon.config import load_demo_config
    from maskrun.daemon.acquire.foreground import RunRequest, run_foreground

    if small:
        import sys

        sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))
        from benchcfg import small_bench

        cfg = small_bench(passes=passes)
    else:
        cfg = load_demo_config()
    s = run_foreground(cfg, RunRequest(acknowledge_unattended=True, output_dir=str(folder), passes=passes,
                                                      figure=False), Console(file=io.StringIO()))
    if s.state.value != "finished":
        raise SystemExit(f"demo run did not finish: {s.message}")
    return Path(s.output_path)


def timed(runner, tasks) -> tuple[float, list]:
    results = []
    t0 = time.perf_counter()
    runner.run(tasks, results.append, lambda t, e: (_ for _ in ()).throw(e))
    wall = time.perf_counter() - t0
    results.sort(key=lambda r: r.set_index)
    return wall, results


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--passes", type=int, default=8)
    ap.add_argument("--iterations", type=int, default=100)
    ap.add_argument("--rounds", type=int, default=2)
    args = ap.parse_args(argv)

    import distributed

    from maskrun.daemon.offline.distributed import DaskRunner
    from maskrun.daemon.offline.reprocess import LocalRunner, ReprocessOptions, plan_tasks

    os.environ.setdefault("OMP_NUM_THREADS", "1")
    console = Console()
    load_before = os.getloadavg()[0]
    with tempfile.TemporaryDirectory() as tmp:
        run = make_run(Path(tmp), args.passes)
        work = plan_tasks(run, ReprocessOptions(iterations=args.iterations))
        light = plan_tasks(make_run(Path(tmp), args.passes, small=True), ReprocessOptions(iterations=1)) * 4
        n = len(work)
        best: dict[str, float] = {}
        estimates: dict[str, list] = {}

        def measure(label, runner, tasks):
            for _ in range(args.rounds):
                wall, res = timed(runner, tasks)
                best[label] = min(best.get(label, np.inf), wall)
                estimates.setdefault(label, [r.estimate for r in res])

        measure("local-1", LocalRunner(1), work)
        measure("local-2", LocalRunner(2), work)
        with distributed.LocalCluster(n_workers=1, processes=True, threads_per_worker=1, host="127.0.0.1",
                                      dashboard_address=None, silence_logs=40) as cluster:
            dask = DaskRunner(cluster.scheduler_address)
            measure("dask-1-light", dask, light)
            measure("local-1-light", LocalRunner(1), light)
            measure("dask-1", dask, work)
        same = all(np.array_equal(a, b) for a, b in zip(estimates["local-1"], estimates["local-2"])) and all(
            np.array_equal(a, b) for a, b in zip(estimates["local-1"], estimates["dask-1"]))
        same_light = all(np.array_equal(a, b) for a, b in zip(estimates["local-1-light"], estimates["dask-1-light"]))

    rate1, rate2 = n / best["local-1"], n / best["local-2"]
    nl = len(light)
    overhead_s = (best["dask-1-light"] - best["local-1-light"]) / nl
    fig = {
        "frame_sets": n, "grid": [128, 128], "masks": 8, "iterations": args.iterations, "cpu_count": os.cpu_count(),
        "local_1_sets_per_s": rate1, "local_2_sets_per_s": rate2, "speedup_2_over_1": rate2 / rate1,
        "dask_1_sets_per_s": n / best["dask-1"],
        "light_local_1_s_per_set": best["local-1-light"] / nl, "light_dask_1_s_per_set": best["dask-1-light"] / nl,
        "dask_overhead_s_per_set": overhead_s, "bit_identical": bool(same and same_light),
        "load_average_1min": [load_before, os.getloadavg()[0]],
    }
    console.print(f"{n} frame sets, 128x128, K=8, hybrid {args.iterations} iterations, complex128, best of {args.rounds}")
    console.print(f"  1 local process : {rate1:6.2f} frame sets/s")
    console.print(f"  2 local processes: {rate2:6.2f} frame sets/s   speed-up {rate2 / rate1:.2f}x")
    console.print(f"  Dask, 1 worker  : {fig['dask_1_sets_per_s']:6.2f} frame sets/s")
    console.print(f"  near-empty tasks (1 iteration): local {fig['light_local_1_s_per_set'] * 1e3:.1f} ms/set, "
                  f"Dask {fig['light_dask_1_s_per_set'] * 1e3:.1f} ms/set -> overhead {overhead_s * 1e3:+.1f} ms/set")
    console.print(f"  estimates bit-for-bit identical across paths: {fig['bit_identical']}")
    console.print(f"  1-minute load average before/after: {load_before:.1f} / {os.getloadavg()[0]:.1f} "
                  f"on {os.cpu_count()} cores (a load above the core count means shared cores: speed-ups shrink)")
    print(json.dumps(fig))
    return 0 if fig["bit_identical"] else 1


if __name__ == "__main__":
    raise SystemExit(main())
