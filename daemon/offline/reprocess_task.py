"""One frame-set task of offline reprocessing: the options, the task (a run file path and frame rows,
no arrays) and its result, the conversion of frames exactly as the live sequencer does, and
``process_frame_set``, which any worker runs (this process, a local pool, a Dask worker). The rules
that make a task give the same bits wherever it runs are in ``reprocess``, which re-exports every
name here."""

from __future__ import annotations

import os
import socket
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Literal

import numpy as np
from pydantic import BaseModel, ConfigDict, Field, field_validator

from maskrun.daemon.record.checks import Response
from maskrun.daemon.record.runfile import RunFile

FFT_BACKEND = "numpy"  # fixed: the timed choice may differ between processes, and so would the last bits


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
    from maskrun.daemon.config import parse_config

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
        from maskrun.daemon.config import parse_config

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

