"""The results file of offline reprocessing (``RUN.recon-<method>-<iterations>.h5``): its layout and
provenance, written to a temporary name and renamed when complete (``write_results``), and read back
(``read_results``)."""

from __future__ import annotations

import json
import os
import socket
import time
from pathlib import Path

import h5py
import numpy as np

from maskrun.daemon.offline.reprocess_task import FFT_BACKEND, FrameSetResult, ReprocessOptions
from maskrun.daemon.record.runfile import RunFile
from maskrun.daemon.record.store import StoreError

RESULTS_FORMAT = "maskrun-recon"

RESULTS_FORMAT_VERSION = 1

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

