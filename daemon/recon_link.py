"""The daemon's side of the reconstruction: sockets to the workers and the local worker process.

``ReconLink`` binds a PUSH socket for frame sets and a PULL socket for
estimates on loopback (or the configured interface), and by default starts
one local worker process (``python -m maskrun.daemon.worker``) connected to
them. Submitting never blocks: if the workers fall so far behind that the send
queue is full, the frame set is skipped for live reconstruction (it is in the
run file anyway, and ``maskrun reconstruct`` can process it later) and the
caller is told.
"""

from __future__ import annotations

import collections
import os
import subprocess
import sys
import time
import uuid

import numpy as np
import zmq

from .config import ReconstructionConfig
from .worker import MAX_MESSAGE_BYTES, EstimateHeader, FrameSetHeader, MaskSpec, ReconOptions, mask_digest


class ReconLink:
    def __init__(
        self,
        context: zmq.Context,
        masks: np.ndarray,
        mask_spec: dict,
        options: ReconstructionConfig,
        *,
        bind_host: str = "127.0.0.1",
        local_worker: bool = True,
        send_hwm: int = 50,
    ):
        self.ctx = context
        self.masks = np.ascontiguousarray(masks, dtype=np.complex64)
        self.mask_spec = MaskSpec(**mask_spec, sha256=mask_digest(masks))
        self.options = ReconOptions(
            method=options.method,
            mode=options.mode,
            window=options.window,
            iterations_per_update=options.iterations_per_update,
            time_budget_s=options.time_budget_s,
        )
        self.run_id = uuid.uuid4().hex[:12]
        self.push = context.socket(zmq.PUSH)
        self.push.setsockopt(zmq.SNDHWM, send_hwm)
        self.push.setsockopt(zmq.LINGER, 0)
        self.push.bind(f"tcp://{bind_host}:0")
        self.pull = context.socket(zmq.PULL)
        self.pull.setsockopt(zmq.MAXMSGSIZE, MAX_MESSAGE_BYTES)
        self.pull.setsockopt(zmq.LINGER, 0)
        self.pull.bind(f"tcp://{bind_host}:0")
        self.frames_address = self.push.getsockopt_string(zmq.LAST_ENDPOINT)
        self.results_address = self.pull.getsockopt_string(zmq.LAST_ENDPOINT)
        self.outstanding: set[int] = set()
        self._pending: collections.deque = collections.deque()
        self.max_pending = 20
        self.process: subprocess.Popen | None = None
        if local_worker:
            self.start_local_worker()

    def start_local_worker(self) -> None:
        env = dict(os.environ)
        env.setdefault("OMP_NUM_THREADS", "1")
        env.setdefault("OPENBLAS_NUM_THREADS", "1")
        self.process = subprocess.Popen(
            [
                sys.executable,
                "-m",
                "maskrun.daemon.worker",
                "--frames",
                self.frames_address,
                "--results",
                self.results_address,
                "--parent-pid",
                str(os.getpid()),
                "--name",
                "local",
            ],
            env=env,
            stdin=subprocess.DEVNULL,
        )

    def new_run(self) -> None:
        """Start a fresh reconstruction (a new run id resets the worker's engine)."""
        self.run_id = uuid.uuid4().hex[:12]
        self.outstanding.clear()
        self._pending.clear()

    def submit(self, pass_index: int, intensities: np.ndarray, exposure_s: float, quantum_efficiency: float) -> bool:
        """Queue one frame set (K, H, W) float32 detected photons, grid orientation. False if skipped."""
        intensities = np.ascontiguousarray(intensities, dtype=np.float32)
        hdr = FrameSetHeader(
            run_id=self.run_id,
            pass_index=pass_index,
            shape=intensities.shape,
            exposure_s=exposure_s,
            estimate_scale=1.0 / float(np.sqrt(quantum_efficiency * exposure_s)),
            masks=self.mask_spec,
            options=self.options,
        )
        parts = [b"frameset", hdr.model_dump_json().encode(), memoryview(intensities).cast("B")]
        if self.mask_spec.family == "file":
            parts.append(memoryview(self.masks).cast("B"))
        self._pending.append((pass_index, parts))
        skipped = False
        while len(self._pending) > self.max_pending:
            self._pending.popleft()  # the workers are far behind: drop the oldest for live reconstruction
            skipped = True
        self._flush_pending()
        return not skipped

    def _flush_pending(self) -> None:
        """Send queued frame sets while the workers accept them (no worker connected yet: keep them)."""
        while self._pending:
            pass_index, parts = self._pending[0]
            try:
                self.push.send_multipart(parts, copy=False, flags=zmq.NOBLOCK)
            except zmq.Again:
                return
            self._pending.popleft()
            self.outstanding.add(pass_index)

    def poll(self, timeout_s: float = 0.0) -> list[tuple[EstimateHeader, np.ndarray]]:
        """Estimates that have arrived (for this run), waiting at most timeout_s for the first."""
        self._flush_pending()
        out = []
        wait_ms = int(timeout_s * 1000)
        while self.pull.poll(wait_ms):
            wait_ms = 0
            parts = self.pull.recv_multipart()
            if len(parts) != 3 or parts[0] != b"estimate":
                continue
            try:
                hdr = EstimateHeader.model_validate_json(parts[1])
                est = np.frombuffer(parts[2], dtype=np.complex64).reshape(hdr.shape)
            except Exception:
                continue
            if hdr.run_id != self.run_id:
                continue  # a late estimate of an earlier run
            self.outstanding.discard(hdr.pass_index)
            out.append((hdr, est))
        return out

    def drain(self, timeout_s: float) -> list[tuple[EstimateHeader, np.ndarray]]:
        """Wait up to timeout_s for every outstanding estimate."""
        out = []
        deadline = time.monotonic() + timeout_s
        while (self.outstanding or self._pending) and time.monotonic() < deadline:
            if self.process is not None and self.process.poll() is not None:
                break  # local worker died; nothing more will come
            out.extend(self.poll(min(0.2, max(0.0, deadline - time.monotonic()))))
        return out

    def worker_alive(self) -> bool:
        return self.process is None or self.process.poll() is None

    def close(self) -> None:
        if self.process is not None and self.process.poll() is None:
            try:
                self.push.send_multipart([b"stop", b"{}", b""], flags=zmq.NOBLOCK)
            except zmq.ZMQError:
                pass
            try:
                self.process.wait(timeout=3)
            except subprocess.TimeoutExpired:
                self.process.kill()
                self.process.wait(timeout=3)
        self.push.close(0)
        self.pull.close(0)
