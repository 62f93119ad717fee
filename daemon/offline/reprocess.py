"""Offline reprocessing: reconstruct every complete frame set of finished (or growing) runs.

The unit of work is one *frame-set task*: a run file path, the frame rows of
the frame set(s) it uses, and the options. A task carries no arrays: whoever
executes it (this process, a local process pool, a Dask worker on another
machine) opens the run file read-only itself, reads its frames, converts them
exactly as the live sequencer does, and solves. So the same task gives the
same bits wherever it runs:

- conversion (``frame_set_intensities``): dark subtraction with the mean of
  the run's dark frames (summed in float64 in acquisition order, then float32,
  as ``Sequencer._take_darks`` does; the response offset when the run has no
  darks), division by the run's flat field (``/entry/flat_field``) when it has
  one, counts to detected photons with ``checks.Response.electrons`` built from
  the response the run recorded (``/entry`` attributes ``response_*``, written
  from the camera profile or ``[response]``; files without them fall back to the
  ``[response]`` table of the stored config, see ``response_for_run``),
  ``numpy.fft.ifftshift`` to the grid orientation (zero frequency at [0, 0]) and
  negative values clamped to 0;
- solve: ``maskrun.reconstruct.solve`` with a fixed FFT backend (numpy's
  pocketfft) and one solver thread instead of the timed per-process choices,
  a fixed seed for the spectral initialization, no time budget (wall-clock
  limits would make the result depend on the machine's load);
- units: the estimate is multiplied by 1/sqrt(QE * exposure_s) as in the live
  path, so it is in sqrt(incident photons per second).

Modes: ``each`` reconstructs every frame set on its own; ``cumulative`` gives
for pass p the estimate from the mean of frame sets 0..p (the offline
counterpart of the live ``accumulate`` mode, every task solved from scratch so
tasks stay independent).

Results go to a new HDF5 file per run, ``RUN.recon-<method>-<iterations>.h5``
(``-cumulative`` appended in that mode), written to a temporary name and
renamed when complete; the run file is only ever opened read-only. The results
file records how it was computed (method, iterations, options, maskrun and
numpy versions, scheduler, host, time); layout in ``write_results``.

Execution is pluggable: ``reprocess_runs(paths, options, runner)`` with a
``LocalRunner`` (``concurrent.futures.ProcessPoolExecutor``) here, or a
``DaskRunner`` (``maskrun.daemon.offline.distributed``).
"""

from __future__ import annotations

import concurrent.futures
import os
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable, Iterable, Protocol

# one task (options, conversion, solve) lives in reprocess_task, the results file in reprocess_results;
# every name is importable from here as before
from maskrun.daemon.record.checks import Response
from maskrun.daemon.offline.reprocess_results import (
    RESULT_INFO_DTYPE,
    RESULTS_FORMAT,
    RESULTS_FORMAT_VERSION,
    _provenance,
    read_results,
    write_results,
)
from maskrun.daemon.offline.reprocess_task import (
    _CONTEXTS,
    FFT_BACKEND,
    FrameSetResult,
    FrameSetTask,
    ReprocessError,
    ReprocessOptions,
    _one_core,
    _run_context,
    _RunContext,
    _stored_nonnegative,
    frame_set_intensities,
    live_frame_sets,
    mean_dark_dn,
    process_frame_set,
    response_for_run,
    response_from_config_text,
)
from maskrun.daemon.record.runfile import RunFile
from maskrun.daemon.record.store import StoreError


def __getattr__(name: str):
    # the one-thread flag is state of reprocess_task (set by _one_core): read it there, not a copy
    if name == "_ONE_CORE":
        from maskrun.daemon.offline import reprocess_task

        return reprocess_task._ONE_CORE
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")


# --- planning ---------------------------------------------------------------------------------
def plan_tasks(run_path: str | Path, options: ReprocessOptions) -> list[FrameSetTask]:
    """One task per complete frame set of the run (in acquisition order). StoreError for unreadable files."""
    path = str(Path(run_path).resolve())
    with RunFile(path) as rf:
        sets = rf.complete_sets()
    if not sets:
        raise ReprocessError(f"{run_path}: no complete frame set in this run file (nothing to reconstruct)")
    tasks = []
    for i, s in enumerate(sets):
        used = sets[: i + 1] if options.mode == "cumulative" else [s]
        tasks.append(FrameSetTask(path, s.pass_index, s.set_index,
                                  tuple(tuple(int(r) for r in u.rows) for u in used), options))
    return tasks


def results_path_for(run_path: str | Path, options: ReprocessOptions, output_dir: str | Path | None = None,
                     mask_count: int | None = None) -> Path:
    """``RUN.recon-<method used>-<iterations>[-cumulative].h5`` beside the run (or in output_dir)."""
    run_path = Path(run_path)
    if mask_count is None:
        with RunFile(run_path) as rf:
            mask_count = rf.mask_count
    suffix = "-cumulative" if options.mode == "cumulative" else ""
    name = (f"{run_path.stem}.recon-{options.resolved_method(mask_count)}-"
            f"{options.resolved_iterations(mask_count)}{suffix}.h5")
    return (Path(output_dir) if output_dir else run_path.parent) / name


# --- runners ----------------------------------------------------------------------------------
class Runner(Protocol):
    """Executes tasks somewhere; calls on_done(result) in the caller's thread as each finishes."""

    description: str  # recorded in the results file, e.g. "local-processes:2" or "dask:tcp://host:8786"

    def run(self, tasks: list[FrameSetTask], on_done: Callable[[FrameSetResult], None],
            on_error: Callable[[FrameSetTask, BaseException], None]) -> None: ...


class InProcessRunner:
    """Runs the tasks one after the other in this process (debugging, and the reference)."""

    description = "in-process"

    def run(self, tasks, on_done, on_error) -> None:
        for t in tasks:
            try:
                on_done(process_frame_set(t))
            except Exception as exc:
                on_error(t, exc)


def _init_local_worker() -> None:
    os.environ["OMP_NUM_THREADS"] = "1"
    os.environ["OPENBLAS_NUM_THREADS"] = "1"


class LocalRunner:
    """A pool of ``workers`` local processes (``concurrent.futures.ProcessPoolExecutor``)."""

    def __init__(self, workers: int | None = None):
        self.workers = int(workers or os.cpu_count() or 1)
        if self.workers < 1:
            raise ReprocessError(f"--workers must be at least 1; got {workers}")
        self.description = f"local-processes:{self.workers}"

    def run(self, tasks, on_done, on_error) -> None:
        with concurrent.futures.ProcessPoolExecutor(max_workers=self.workers, initializer=_init_local_worker) as pool:
            futures = {pool.submit(process_frame_set, t): t for t in tasks}
            for fut in concurrent.futures.as_completed(futures):
                try:
                    on_done(fut.result())
                except Exception as exc:
                    on_error(futures[fut], exc)


# --- results file -----------------------------------------------------------------------------------
@dataclass
class ReprocessReport:
    run_path: Path
    results_path: Path | None
    frame_sets: int
    failed: list[tuple[int, str]] = field(default_factory=list)  # (set_index, message)


# --- the whole job ------------------------------------------------------------------------------------
def reprocess_runs(
    run_paths: Iterable[str | Path],
    options: ReprocessOptions,
    runner: Runner,
    *,
    output_dir: str | Path | None = None,
    overwrite: bool = False,
    on_planned: Callable[[int], None] | None = None,
    on_progress: Callable[[FrameSetResult | None], None] | None = None,
) -> list[ReprocessReport]:
    """Reconstruct every complete frame set of each run and write one results file per run.

    Everything is checked before any work: every run file readable with at
    least one complete frame set, no results file already there (unless
    ``overwrite``), the output folder writable. Tasks of all runs go to the
    runner together. A frame set whose solve fails is listed in the report
    and in the results file's ``failed_sets``; the others are still written.
    """
    run_paths = [Path(p) for p in run_paths]
    if not run_paths:
        raise ReprocessError("give at least one run file")
    plans: list[tuple[Path, Path, list[FrameSetTask], int]] = []
    for p in run_paths:
        tasks = plan_tasks(p, options)
        with RunFile(p) as rf:
            k = rf.mask_count
        out = results_path_for(p, options, output_dir, k)
        if out.exists() and not overwrite:
            raise ReprocessError(f"{out} already exists; remove it, choose --output-dir, or pass --overwrite")
        folder = out.parent
        if not folder.is_dir() or not os.access(folder, os.W_OK):
            raise ReprocessError(f"{folder}: results folder is missing or not writable; choose --output-dir")
        plans.append((p, out, tasks, k))
    all_tasks = [t for _, _, ts, _ in plans for t in ts]
    if on_planned:
        on_planned(len(all_tasks))
    done: dict[str, list[FrameSetResult]] = {t.run_path: [] for t in all_tasks}
    failed: dict[str, list[tuple[int, str]]] = {t.run_path: [] for t in all_tasks}

    def _done(r: FrameSetResult) -> None:
        done[r.run_path].append(r)
        if on_progress:
            on_progress(r)

    def _error(t: FrameSetTask, exc: BaseException) -> None:
        failed[t.run_path].append((t.set_index, f"{type(exc).__name__}: {exc}"))
        if on_progress:
            on_progress(None)

    t0 = time.monotonic()
    runner.run(all_tasks, _done, _error)
    wall_s = time.monotonic() - t0
    reports = []
    for p, out, tasks, k in plans:
        key = tasks[0].run_path
        prov = _provenance(options, k, runner.description, wall_s)
        written = write_results(out, key, done[key], prov, sorted(failed[key])) if done[key] else None
        reports.append(ReprocessReport(p, written, len(done[key]), sorted(failed[key])))
    return reports
