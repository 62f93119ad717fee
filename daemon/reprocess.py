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
``DaskRunner`` (``maskrun.daemon.distributed``).
"""

from __future__ import annotations

import concurrent.futures
import json
import os
import socket
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable, Iterable, Literal, Protocol

import h5py
import numpy as np
from pydantic import BaseModel, ConfigDict, Field, field_validator

from .checks import Response
from .runfile import RunFile
from .store import StoreError

RESULTS_FORMAT = "maskrun-recon"
RESULTS_FORMAT_VERSION = 1
FFT_BACKEND = "numpy"  # fixed: the timed choice may differ between processes, and so would the last bits

RESULT_INFO_DTYPE = np.dtype(
    [
        ("pass_index", "<i4"),  # pass of the (last) frame set used
        ("set_index", "<i4"),  # frame-set attempt in the run file
        ("passes_used", "<i4"),  # frame sets averaged (1 in mode 'each')
        ("residual", "<f8"),  # relative amplitude residual at the end
        ("error_estimate", "<f8"),  # shot-noise rule sqrt(lit pixels / detected photons)
        ("true_error", "<f8"),  # against the run's stored truth (NaN without truth)
        ("iterations", "<i4"),
        ("photons", "<f8"),  # detected photons in the data used
        ("elapsed_s", "<f8"),  # solve time on the worker
    ]
)


class ReprocessError(ValueError):
    """Reprocessing cannot start or finish; the message says what to change."""


class ReprocessOptions(BaseModel):
    """How to reconstruct. Recorded in the results file (``options_json``)."""

    model_config = ConfigDict(extra="forbid", frozen=True)
    method: str = "auto"
    iterations: int | None = Field(None, ge=1, description="maximum iterations; None = the method's default")
    mode: Literal["each", "cumulative"] = "each"
    precision: Literal["single", "double"] = "double"
    seed: int = 0

    @field_validator("method")
    @classmethod
    def _known_method(cls, v: str) -> str:
        from maskrun.reconstruct import METHODS

        if v not in METHODS:
            raise ValueError(f"unknown method {v!r}; choose one of {', '.join(METHODS)}")
        return v

    def resolved_method(self, mask_count: int) -> str:
        """The method used for K = mask_count ("auto" picks as ``solve`` does: RAAR for K <= 4, else hybrid)."""
        from maskrun.reconstruct.solvers import default_method

        return default_method(mask_count) if self.method == "auto" else self.method

    def resolved_iterations(self, mask_count: int) -> int:
        from maskrun.reconstruct.solvers import DEFAULT_ITERATIONS

        return self.iterations if self.iterations is not None else DEFAULT_ITERATIONS[self.resolved_method(mask_count)]

    @property
    def dtype(self):
        return np.complex64 if self.precision == "single" else np.complex128


@dataclass(frozen=True)
class FrameSetTask:
    """One unit of work: file path and frame rows only (no arrays), cheap to pickle and send."""

    run_path: str  # absolute path; workers on other machines need the same path (shared file system)
    pass_index: int  # of the last frame set used
    set_index: int
    sets: tuple[tuple[int, ...], ...]  # frame rows (ordered by mask index) of each frame set averaged
    options: ReprocessOptions


@dataclass
class FrameSetResult:
    run_path: str
    pass_index: int
    set_index: int
    passes_used: int
    estimate: np.ndarray  # (H, W), sqrt(incident photons per second)
    residual: float
    error_estimate: float
    true_error: float
    iterations: int
    photons: float
    elapsed_s: float
    worker: str  # host:pid that computed it


# --- conversion (the same as the live sequencer) ------------------------------------------
def response_from_config_text(config_toml: str, source: str) -> Response:
    """The camera response recorded with the run (``[response]`` of the stored config), as ``build_bench`` makes it."""
    from .config import parse_config

    cfg = parse_config(config_toml, source)
    r = cfg.response
    if r.gain_dn_per_e is None or r.quantum_efficiency is None:
        raise ReprocessError(f"{source}: the run file records neither the camera response it used nor data-sheet "
                             "values in its config (only a profile name); this file cannot be converted to photons")
    return Response(r.gain_dn_per_e, r.offset_dn, r.quantum_efficiency)


def response_for_run(rf: RunFile, source: str) -> Response:
    """The camera response the run used: the ``response_*`` attributes of /entry (the camera profile's
    values when the run had one), else, for files written before they were recorded, the ``[response]``
    table of the stored config."""
    recorded = rf.response_attrs()
    if recorded is None:
        return response_from_config_text(rf.config_toml, source)
    return Response(recorded["gain_dn_per_e"], recorded["offset_dn"], recorded["quantum_efficiency"])


def mean_dark_dn(darks: np.ndarray, offset_dn: float) -> np.ndarray | float:
    """Mean dark frame as the sequencer computes it (float64 running sum in order, then float32)."""
    if len(darks) == 0:
        return offset_dn
    acc = np.zeros(darks.shape[1:], dtype=np.float64)
    for d in darks:
        acc += d
    return (acc / len(darks)).astype(np.float32)


def frame_set_intensities(frames: np.ndarray, dark_dn, response: Response, flat: np.ndarray | None = None) -> np.ndarray:
    """(K, H, W) camera counts -> (K, H, W) float32 detected photons, grid orientation, clamped at 0.

    Frame by frame exactly as ``Sequencer._take_pass`` fills its frame-set buffer
    (``Response.electrons`` with the flat field, then ``np.fft.ifftshift``), then
    ``np.maximum(., 0)`` as it does before submitting.
    """
    out = np.empty(frames.shape, dtype=np.float32)
    for k in range(frames.shape[0]):
        out[k] = np.fft.ifftshift(response.electrons(frames[k], dark_dn, flat))
    return np.maximum(out, 0.0)


def live_frame_sets(run_path: str | Path, last: int | None = None):
    """The complete frame sets of a run file as the sequencer hands them to live reconstruction,
    oldest first (only the last ``last`` when given): (K, H, W) float32 detected photons, grid
    orientation, clamped at 0, every frame scaled to its set's shortest exposure. Dark level: the
    mean of the dark frames in the file (as for reprocessing). A generator: the file is open
    while it is being consumed."""
    with RunFile(str(run_path)) as rf:
        response = response_for_run(rf, f"{run_path}:/entry@config_toml")
        dark_dn = mean_dark_dn(rf.darks(), response.offset_dn)
        flat = rf.flat_field()
        exposure_s = rf.frame_info()["exposure_s"]
        sets = rf.complete_sets()
        if last is not None:
            sets = sets[-last:] if last > 0 else []
        for s in sets:
            y = frame_set_intensities(rf.frames(list(s.rows)), dark_dn, response, flat)
            set_exposures = exposure_s[s.rows].astype(np.float64)
            ref = float(set_exposures.min())
            if np.any(set_exposures != ref):
                y *= (ref / set_exposures).astype(np.float32)[:, None, None]
            yield y


@dataclass
class _RunContext:
    masks: np.ndarray
    response: Response
    dark_dn: np.ndarray | float
    flat: np.ndarray | None  # the run's flat field (mean 1) or None
    exposure_s: np.ndarray  # per frame row
    truth: np.ndarray | None
    lit_pixels: int
    nonnegative: bool = False  # [reconstruction] nonnegative of the stored config (HIO's constraint)


_CONTEXTS: dict[tuple, _RunContext] = {}


def _run_context(path: str) -> _RunContext:
    """Per-process cache of what every task of a run needs (masks, response, mean dark)."""
    st = os.stat(path)
    key = (path, st.st_mtime_ns, st.st_size)
    ctx = _CONTEXTS.get(key)
    if ctx is None:
        with RunFile(path) as rf:
            response = response_for_run(rf, f"{path}:/entry@config_toml")
            masks = rf.masks()
            ctx = _RunContext(
                masks=masks,
                response=response,
                dark_dn=mean_dark_dn(rf.darks(), response.offset_dn),
                flat=rf.flat_field(),
                exposure_s=rf.frame_info()["exposure_s"].copy(),
                truth=rf.truth(),
                lit_pixels=int(np.count_nonzero(np.sum(np.abs(masks.astype(np.complex128)) ** 2, axis=0) > 0)),
                nonnegative=_stored_nonnegative(rf.config_toml, path),
            )
        if len(_CONTEXTS) > 8:
            _CONTEXTS.clear()
        _CONTEXTS[key] = ctx
    return ctx


def _stored_nonnegative(config_toml: str, source: str) -> bool:
    """``[reconstruction] nonnegative`` of the run's stored config (False when it cannot be read)."""
    try:
        from .config import parse_config

        return bool(parse_config(config_toml, source).reconstruction.nonnegative)
    except Exception:
        return False


_ONE_CORE = False


def _one_core() -> None:
    """Solve on one thread: the solver's measured choice of threads (masks split over threads, partial
    sums added in another order) could differ between processes and change the last bits. Caps this
    process's reconstruction threads for good (``maskrun.reconstruct.fft.set_max_workers(1)``)."""
    global _ONE_CORE
    if not _ONE_CORE:
        from maskrun.reconstruct.fft import set_max_workers

        set_max_workers(1)
        _ONE_CORE = True


def process_frame_set(task: FrameSetTask) -> FrameSetResult:
    """Read the task's frames from its run file, convert, solve. Deterministic for given inputs.

    Runs the solver on one thread in this process (see ``_one_core``); parallelism comes from
    running many tasks at once.
    """
    from maskrun.reconstruct import relative_error, shot_noise_relative_error, solve

    _one_core()
    ctx = _run_context(task.run_path)
    opts = task.options
    acc = None
    with RunFile(task.run_path) as rf:
        for rows in task.sets:
            y = frame_set_intensities(rf.frames(list(rows)), ctx.dark_dn, ctx.response, ctx.flat)
            if acc is None:
                acc = y.astype(np.float64)
            else:
                acc += y
    data = acc / len(task.sets)
    exposure_s = float(ctx.exposure_s[task.sets[-1][-1]])
    t0 = time.perf_counter()
    k = ctx.masks.shape[0]
    # K = 1 (a plain far-field pattern): HIO with a shrink-wrapped support, non-negative when the run's
    # config says the object is ([reconstruction] nonnegative); other methods take no constraint here
    nonneg = ctx.nonnegative and opts.resolved_method(k) == "hio"
    res = solve(data, ctx.masks, method=opts.resolved_method(k), iterations=opts.resolved_iterations(k),
                dtype=opts.dtype, seed=opts.seed, fft_backend=FFT_BACKEND, nonnegative=nonneg)
    elapsed = time.perf_counter() - t0
    scale = 1.0 / float(np.sqrt(ctx.response.quantum_efficiency * exposure_s))
    est = (res.estimate * scale).astype(opts.dtype)
    true_err = float("nan")
    if ctx.truth is not None and k == 1:  # one pattern: the error modulo shift, twin and global phase
        from maskrun.reconstruct.ambiguities import relative_error_modulo_ambiguities

        true_err = float(relative_error_modulo_ambiguities(ctx.truth, est.astype(np.complex128)))
    elif ctx.truth is not None:
        true_err = float(relative_error(ctx.truth, est.astype(np.complex128)))
    photons = float(acc.sum())
    return FrameSetResult(
        run_path=task.run_path, pass_index=task.pass_index, set_index=task.set_index, passes_used=len(task.sets),
        estimate=est, residual=res.residual, error_estimate=float(shot_noise_relative_error(ctx.lit_pixels, photons)),
        true_error=true_err, iterations=int(res.iterations), photons=photons, elapsed_s=elapsed,
        worker=f"{socket.gethostname()}:{os.getpid()}",
    )


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


def _provenance(options: ReprocessOptions, mask_count: int, runner_description: str, wall_s: float) -> dict:
    import importlib.metadata

    from maskrun.reconstruct import kernels

    try:
        version = importlib.metadata.version("maskrun")
    except importlib.metadata.PackageNotFoundError:  # pragma: no cover - source tree without install
        version = "unknown"
    return {
        "method": options.method,
        "method_used": options.resolved_method(mask_count),
        "iterations": options.resolved_iterations(mask_count),
        "solver_threads": 1,
        "mode": options.mode,
        "precision": options.precision,
        "seed": options.seed,
        "fft_backend": FFT_BACKEND,
        "options_json": options.model_dump_json(),
        "maskrun_version": version,
        "numpy_version": np.__version__,
        "solver_kernels": kernels.description(),
        "scheduler": runner_description,
        "host": socket.gethostname(),
        "created_utc": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
        "wall_s": float(wall_s),
    }


def write_results(path: Path, run_path: str, results: list[FrameSetResult], provenance: dict,
                  failed: list[tuple[int, str]]) -> Path:
    """Write one results file (atomically: temporary name, then rename).

    Layout (format ``maskrun-recon`` version 1):

        /recon                 group; attributes: format, format_version, source_run, source_run_name,
                               frame_sets, failed_sets (JSON [[set_index, message], ...]) and the
                               provenance (method, method_used, iterations, mode, precision, seed,
                               fft_backend, options_json, maskrun_version, numpy_version,
                               solver_kernels ("numba <version>" or "numpy"), scheduler,
                               host, created_utc, wall_s)
        /recon/estimates       (N, H, W) complex128 (double) or complex64 (single), sqrt(incident photons / s),
                               ordered by (pass_index, set_index)
        /recon/estimate_info   (N,) compound RESULT_INFO_DTYPE
        /recon/worker          (N,) bytes: host:pid that computed each estimate
    """
    results = sorted(results, key=lambda r: (r.pass_index, r.set_index))
    tmp = path.with_name(path.name + f".part-{os.getpid()}")
    with RunFile(run_path) as rf:
        run_name = str(rf.attrs.get("run_name", ""))
        grid = rf.grid_shape
    dtype = np.complex64 if provenance["precision"] == "single" else np.complex128
    try:
        with h5py.File(tmp, "w") as f:
            g = f.create_group("recon")
            g.attrs["format"] = RESULTS_FORMAT
            g.attrs["format_version"] = RESULTS_FORMAT_VERSION
            g.attrs["source_run"] = str(run_path)
            g.attrs["source_run_name"] = run_name
            g.attrs["frame_sets"] = len(results)
            g.attrs["failed_sets"] = json.dumps(failed)
            for k, v in provenance.items():
                g.attrs[k] = v
            est = np.zeros((len(results), *grid), dtype=dtype)
            info = np.zeros(len(results), dtype=RESULT_INFO_DTYPE)
            for i, r in enumerate(results):
                est[i] = r.estimate
                info[i] = (r.pass_index, r.set_index, r.passes_used, r.residual, r.error_estimate, r.true_error,
                           r.iterations, r.photons, r.elapsed_s)
            g.create_dataset("estimates", data=est, chunks=(1, *grid) if len(results) else None)
            g.create_dataset("estimate_info", data=info)
            g.create_dataset("worker", data=np.array([r.worker.encode() for r in results], dtype="S64"))
        os.replace(tmp, path)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise
    return path


def read_results(path: str | Path) -> tuple[np.ndarray, np.ndarray, dict]:
    """(estimates, estimate_info, attributes) of a results file."""
    try:
        with h5py.File(path, "r") as f:
            if "recon" not in f or f["recon"].attrs.get("format") != RESULTS_FORMAT:
                raise StoreError(f"{path}: not a maskrun reconstruction results file")
            g = f["recon"]
            return g["estimates"][...], g["estimate_info"][...], dict(g.attrs)
    except OSError as exc:
        if isinstance(exc, StoreError):
            raise
        raise StoreError(f"{path}: not a readable HDF5 file ({exc})") from None


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
