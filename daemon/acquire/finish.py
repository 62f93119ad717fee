"""Finishing a run whose frames are all in the file but which has no end record.

A writer killed after its last frame set (while it waited for the last estimates, or
between the last estimate and the end record) leaves a file with every planned frame
set, no ``run_end`` event, the SWMR write flags still set and ``RUN.h5.space`` beside it.
``maskrun resume RUN.h5`` then finishes the run here, without the bench and without
light (so no laser-safety notice is needed):

1. the file is made writable: copied into a fresh file and put in place atomically when
   a killed writer left it flagged open, or when a reader holds it (``recovery``);
2. the estimates still missing (the frame sets after the last stored estimate) are
   computed from the frames in the file, the way the live reconstruction would have
   (accumulate: all sets up to that one; follow: the last ``window`` sets), with the
   offline solver (``reprocess.process_frame_set``, one thread, deterministic);
3. a ``resume`` event, the estimates and the ``run_end`` event ('run finished') are
   written; closing the store clears the write flags and removes the space file.
"""

from __future__ import annotations

import os
import socket
import time
from pathlib import Path

import numpy as np

from maskrun.daemon.config import BenchConfig
from maskrun.daemon.acquire.disk import MB
from maskrun.daemon.acquire.recovery import ResumePoint, make_writable
from maskrun.daemon.record.runfile import RunFile
from maskrun.daemon.acquire.sequencer import RunSummary, State
from maskrun.daemon.record.store import RunStore, estimate_info_record


def missing_estimate_tasks(path: Path, cfg: BenchConfig) -> list:
    """One reprocessing task per complete frame set after the last stored estimate (none when the
    reconstruction is off)."""
    from maskrun.daemon.offline.reprocess import FrameSetTask, ReprocessOptions

    rcfg = cfg.reconstruction
    if not rcfg.enabled:
        return []
    try:
        options = ReprocessOptions(method=rcfg.method, iterations=rcfg.iterations_per_update, precision="single")
    except ValueError:
        options = ReprocessOptions(iterations=rcfg.iterations_per_update, precision="single")
    with RunFile(path) as rf:
        sets = rf.complete_sets()
        done = rf.estimate_info()["pass_index"] if rf.estimate_count else np.array([], dtype=np.int64)
    last_done = int(done.max()) if len(done) else -1
    tasks = []
    for i, s in enumerate(sets):
        if s.pass_index <= last_done:
            continue
        used = sets[: i + 1] if rcfg.mode == "accumulate" else sets[max(0, i + 1 - rcfg.window): i + 1]
        tasks.append(FrameSetTask(str(path.resolve()), s.pass_index, s.set_index,
                                  tuple(tuple(int(r) for r in u.rows) for u in used), options))
    return tasks


def finish_run_file(point: ResumePoint, cfg: BenchConfig, log=print) -> RunSummary:
    """Finish a run file that holds every planned frame set (see the module docstring)."""
    from maskrun.daemon.offline.reprocess import process_frame_set

    t0 = time.monotonic()
    path = point.path
    repaired = make_writable(path, int(cfg.run.min_free_disk_mb * MB))
    if repaired is not None:
        log(repaired.describe())
    tasks = missing_estimate_tasks(path, cfg)
    if tasks:
        log(f"computing {len(tasks)} missing estimate(s) from the frames in the file")
    results = [process_frame_set(t) for t in tasks]  # before the file is opened for writing
    store = RunStore.reopen(path)
    last = (float("nan"), float("nan"), float("nan"))
    try:
        store.log("resume", f"finishing: all {point.passes} frame sets are in the file; {point.note()}", "warning")
        store.log("writer", f"pid {os.getpid()} on {socket.gethostname()}")
        if repaired is not None:
            store.log("repaired", repaired.describe())
        for r in results:
            store.append_estimate(r.estimate, estimate_info_record(
                pass_index=r.pass_index, passes_used=r.passes_used, residual=r.residual,
                error_estimate=r.error_estimate, true_error=r.true_error, iterations=r.iterations,
                photons=r.photons, elapsed_s=r.elapsed_s, t_s=time.time()))
            last = (r.true_error, r.error_estimate, r.residual)
        if results:
            store.log("estimates_added", f"{len(results)} estimate(s) computed after the run from the frames in the "
                      f"file (passes {results[0].pass_index}..{results[-1].pass_index}; offline solver)")
        sets = len(point.complete_passes)
        store.log("run_end", f"run finished: {sets} complete frame sets (finished by 'maskrun resume' after the "
                  "writer ended without an end record)" if point.outcome.startswith("no end") else
                  f"run finished: {sets} complete frame sets (finished by 'maskrun resume')")
        frames, darks, estimates = store.frame_count, store.dark_count, store.estimate_count
    finally:
        store.close()  # clears the SWMR write flags and removes RUN.h5.space
    return RunSummary(
        state=State.finished, passes_complete=0, frames=0, darks=0, rejected=0, flagged=0, saturated_frames=0,
        photons_per_frame_mean=0.0, photons_total=0.0, estimates=len(results), final_true_error=last[0],
        final_error_estimate=last[1], final_residual=last[2], wall_s=time.monotonic() - t0, output_path=path,
        message=f"finished without new frames: {len(results)} estimate(s) added, end record written "
                f"({frames} frames, {darks} dark, {estimates} estimates in the file)",
        sets_in_file=len(point.complete_passes))
