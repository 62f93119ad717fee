"""The reconstruction worker: a separate process fed with frame sets over ZeroMQ.

The daemon binds a PUSH socket (frame sets out) and a PULL socket (estimates
in); each worker connects a PULL to the first and a PUSH to the second. So the
acquisition never waits for reconstruction, and a worker can run on another
machine (``maskrun worker --frames ADDR --results ADDR``).

Messages (multipart, JSON header then raw bytes):

- ``[b"frameset", header, intensities]``: intensities (K, H, W) float32 in
  detected photons, grid orientation (zero frequency at [0, 0]). The header is a
  ``FrameSetHeader``; masks are rebuilt from their description and checked
  against the SHA-256 the daemon sent (file masks travel as a fourth part).
- ``[b"estimate", header, estimate]``: estimate (H, W) complex64 in
  sqrt(incident photons per second); header is an ``EstimateHeader``.
- ``[b"stop", b"{}", b""]``: the worker exits.
"""

from __future__ import annotations

import argparse
import hashlib
import os
import sys
import time

import numpy as np
import zmq
from pydantic import BaseModel, ConfigDict

MAX_MESSAGE_BYTES = 1 << 31


class MaskSpec(BaseModel):
    model_config = ConfigDict(extra="forbid")
    family: str
    count: int
    shape: tuple[int, int]
    seed: int = 0
    levels: int = 8
    sha256: str


class ReconOptions(BaseModel):
    model_config = ConfigDict(extra="forbid")
    method: str = "auto"
    mode: str = "accumulate"
    window: int = 1
    iterations_per_update: int = 100
    time_budget_s: float | None = None


class FrameSetHeader(BaseModel):
    model_config = ConfigDict(extra="forbid")
    run_id: str
    pass_index: int
    shape: tuple[int, int, int]
    exposure_s: float
    estimate_scale: float  # multiply the estimate by this to get sqrt(incident photons / s)
    masks: MaskSpec
    options: ReconOptions
    # Set by the daemon when it accumulates (several workers may share a run): the intensities are
    # already the mean of this many frame sets (accumulate: all so far; follow: the window), and the
    # worker uses them as they are instead of folding them into a running mean of its own.
    data_passes: int | None = None
    # what is known about the data's noise (reconstruct.precision.NoiseModel fields), for the precision estimate
    noise: dict | None = None


class EstimateHeader(BaseModel):
    model_config = ConfigDict(extra="forbid")
    run_id: str
    pass_index: int
    passes_used: int
    residual: float
    error_estimate: float
    iterations: int
    photons: float
    elapsed_s: float
    shape: tuple[int, int]
    worker: str
    precision: dict | None = None  # reconstruct.precision.PrecisionEstimate.to_dict()


def mask_digest(masks: np.ndarray) -> str:
    return hashlib.sha256(np.ascontiguousarray(masks, dtype=np.complex64).tobytes()).hexdigest()


def build_masks(spec: MaskSpec, file_masks: np.ndarray | None = None) -> np.ndarray:
    """Rebuild the mask set from its description; check it against the sender's digest."""
    from maskrun.daemon.masks import make_masks

    masks = file_masks if spec.family == "file" else make_masks(spec.family, spec.count, spec.shape, spec.seed, spec.levels)
    got = mask_digest(masks)
    if got != spec.sha256:
        raise ValueError(
            f"mask set rebuilt here differs from the daemon's (family {spec.family}, seed {spec.seed}); "
            "check that worker and daemon run the same maskrun version"
        )
    return masks


class WorkerLoop:
    """Receive frame sets, update an IncrementalEngine per run, send estimates back."""

    def __init__(self, frames_address: str, results_address: str, *, context: zmq.Context | None = None, name: str = "",
                 client_keys=None, obey_stop: bool = True):
        """client_keys: security.ClientKeys for a CURVE daemon; obey_stop=False for a remote worker that
        serves many runs (a stop message is then ignored; end it with a signal)."""
        self.ctx = context or zmq.Context.instance()
        self.obey_stop = obey_stop
        self.pull = self.ctx.socket(zmq.PULL)
        self.pull.setsockopt(zmq.MAXMSGSIZE, MAX_MESSAGE_BYTES)
        self.pull.setsockopt(zmq.LINGER, 0)
        self.push = self.ctx.socket(zmq.PUSH)
        self.push.setsockopt(zmq.LINGER, 2000)
        if client_keys is not None:
            from maskrun.daemon.security import apply_client_keys

            apply_client_keys(self.pull, client_keys)
            apply_client_keys(self.push, client_keys)
        self.pull.connect(frames_address)
        self.push.connect(results_address)
        self.name = name or f"worker-{os.getpid()}"
        self._engine = None
        self._run_id = None
        self._engine_key = None

    def _engine_for(self, hdr: FrameSetHeader, masks: np.ndarray):
        from maskrun.reconstruct import IncrementalEngine

        key = (hdr.run_id, hdr.masks.sha256, hdr.options.model_dump_json())
        if self._engine is None or key != self._engine_key:
            o = hdr.options
            daemon_accumulates = hdr.data_passes is not None  # then the engine only holds the latest data
            self._engine = IncrementalEngine(
                masks,
                mode="follow" if daemon_accumulates else o.mode,
                window=1 if daemon_accumulates else o.window,
                iterations_per_update=o.iterations_per_update,
                time_budget_s=o.time_budget_s,
                method=o.method,
                dtype=np.complex64,  # live reconstruction computes in single precision (the frames are float32)
            )
            self._engine_key = key
        return self._engine

    def handle(self, parts: list[bytes]) -> bool:
        """Process one message; False when told to stop."""
        kind = parts[0]
        if kind == b"stop":
            return not self.obey_stop
        if kind != b"frameset" or len(parts) not in (3, 4):
            print(f"{self.name}: ignoring malformed message ({len(parts)} parts, kind {kind[:20]!r})", file=sys.stderr)
            return True
        hdr = FrameSetHeader.model_validate_json(parts[1])
        intensities = np.frombuffer(parts[2], dtype=np.float32).reshape(hdr.shape)
        file_masks = None
        if len(parts) == 4:
            file_masks = np.frombuffer(parts[3], dtype=np.complex64).reshape(hdr.shape)
        masks = build_masks(hdr.masks, file_masks)
        engine = self._engine_for(hdr, masks)
        if hdr.data_passes is not None and hdr.options.mode == "accumulate":
            # the daemon sends the running mean; the engine (a one-set window) chooses as an accumulating one would
            from maskrun.reconstruct.incremental import update_method

            engine.method = update_method(hdr.options.method, masks.shape[0], warm_start=engine.estimate is not None,
                                          accumulating=True)
        t0 = time.perf_counter()
        upd = engine.update(intensities)
        if hdr.data_passes is not None:  # the data are a mean over data_passes frame sets
            from maskrun.reconstruct import shot_noise_relative_error

            upd.passes_used = hdr.data_passes
            upd.photons = upd.photons * hdr.data_passes
            upd.error_estimate = shot_noise_relative_error(engine.pixels, upd.photons)
        precision = _precision(engine, upd, intensities, hdr)
        est = (np.asarray(upd.estimate) * hdr.estimate_scale).astype(np.complex64)
        out = EstimateHeader(
            run_id=hdr.run_id,
            pass_index=hdr.pass_index,
            passes_used=int(upd.passes_used),
            residual=float(upd.residual),
            error_estimate=float(upd.error_estimate),
            iterations=int(upd.iterations),
            photons=float(upd.photons),
            elapsed_s=time.perf_counter() - t0,
            shape=est.shape,
            worker=self.name,
            precision=precision,
        )
        self.push.send_multipart([b"estimate", out.model_dump_json().encode(), memoryview(est).cast("B")], copy=False)
        return True

    def serve(self, idle_exit_s: float | None = None, parent_pid: int | None = None) -> None:
        """Work until told to stop, idle for idle_exit_s, or the parent process (the daemon) is gone."""
        last = time.monotonic()
        while True:
            if self.pull.poll(200):
                parts = self.pull.recv_multipart()
                last = time.monotonic()
                try:
                    if not self.handle(parts):
                        break
                except Exception as exc:  # a bad frame set must not kill the worker
                    print(f"{self.name}: frame set skipped: {exc}", file=sys.stderr)
            elif idle_exit_s is not None and time.monotonic() - last > idle_exit_s:
                break
            if parent_pid is not None and not _alive(parent_pid):
                break  # the daemon died (e.g. SIGKILL): do not linger as an orphan

    def close(self) -> None:
        self.pull.close(0)
        self.push.close()


def _precision(engine, upd, intensities: np.ndarray, hdr: FrameSetHeader) -> dict | None:
    """The precision estimate of this update (reconstruct.precision): one more forward transform."""
    from maskrun.reconstruct.precision import NoiseModel, estimate_precision

    try:
        ws = engine._ws
        x = np.asarray(upd.estimate)
        model = np.abs(ws.apply(x, np.empty(ws.shape, ws.dtype))) ** 2
        lit = ws.lit
        est = estimate_precision(model, intensities, sets=int(upd.passes_used), photons=float(upd.photons),
                                 pixels=int(engine.pixels), lit_pixels=int(lit.sum()),
                                 mean_weight=float(ws.weight[lit].mean()),
                                 field_norm_sq=float(np.sum(np.abs(x.astype(np.complex128)) ** 2)),
                                 noise=NoiseModel(**hdr.noise) if hdr.noise else None)
        return est.to_dict()
    except Exception as exc:  # the estimate is a convenience: never lose the update over it
        print(f"precision estimate failed: {type(exc).__name__}: {exc}", file=sys.stderr)
        return None


def _alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(prog="maskrun-worker", description="reconstruction worker")
    ap.add_argument("--frames", required=True, help="daemon's frame-set address, e.g. tcp://127.0.0.1:5601")
    ap.add_argument("--results", required=True, help="daemon's estimate address")
    ap.add_argument("--idle-exit-s", type=float, default=None, help="exit after this long without work")
    ap.add_argument("--name", default="")
    ap.add_argument("--parent-pid", type=int, default=None, help="exit when this process is gone")
    args = ap.parse_args(argv)
    # one core for the worker: the acquisition keeps the other
    os.environ.setdefault("OMP_NUM_THREADS", "1")
    from maskrun.daemon.compute.remote_workers import client_keys_from_env

    loop = WorkerLoop(args.frames, args.results, name=args.name, client_keys=client_keys_from_env())
    try:
        loop.serve(args.idle_exit_s, args.parent_pid)
    except KeyboardInterrupt:
        pass
    finally:
        loop.close()
    return 0


if __name__ == "__main__":
    sys.exit(main())
