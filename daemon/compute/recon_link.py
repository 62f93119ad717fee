"""The daemon's side of the reconstruction: sockets to the workers and the local worker process.

``ReconLink`` binds a PUSH socket for frame sets and a PULL socket for
estimates on loopback (or the configured interface), and by default starts
one local worker process (``python -m maskrun.daemon.compute.worker``) connected to
them. Submitting never blocks: if the workers fall so far behind that the send
queue is full, the frame set is skipped for live reconstruction (it is in the
run file anyway, and ``maskrun reconstruct`` can process it later) and the
caller is told.

``LiveData`` is the daemon's copy of the data (below). A resumed run preloads it
with the frame sets already in the file (``ReconLink.preload``), so the live
estimate after a resume uses every set, not only the new ones.

Several workers (``maskrun worker --connect ADDRESS`` on other machines, with
``worker_address`` fixed; see ``remote_workers``) share the frame sets: the
PUSH socket hands each frame set to one worker. So that the estimate does not
depend on which worker got which sets, the daemon keeps the data: in
accumulate mode the running sum of all frame sets (float64), in follow mode
the last ``window`` sets, and every frame-set message carries their mean and
``data_passes`` (how many sets it averages); workers use it as is, warm-started
from their own last estimate. Estimates are handed to the caller in pass
order: one that overtakes an earlier pass is held until that pass's estimate
arrives, or ``reorder_timeout_s`` passes (a worker died with it), or the run
drains.
"""

from __future__ import annotations

import collections
import os
import subprocess
import sys
import time
import uuid
from collections.abc import Iterable

import numpy as np
import zmq

from maskrun.daemon.config import ReconstructionConfig
from maskrun.daemon.compute.worker import MAX_MESSAGE_BYTES, EstimateHeader, FrameSetHeader, MaskSpec, ReconOptions, mask_digest


class LiveData:
    """The frame sets a live estimate uses: accumulate mode keeps the float64 running sum of all
    sets, follow mode the last ``window`` sets. ``add`` folds in one set and returns (their mean
    as float32, how many sets it averages)."""

    def __init__(self, mode: str, window: int):
        self.mode = mode
        self.sum: np.ndarray | None = None
        self.count = 0
        self.recent: collections.deque = collections.deque(maxlen=window)

    def add(self, intensities: np.ndarray) -> tuple[np.ndarray, int]:
        self._fold(intensities)
        if self.mode == "accumulate":
            return (self.sum / self.count).astype(np.float32), self.count
        acc = np.zeros(intensities.shape, dtype=np.float64)
        for y in self.recent:
            acc += y
        return (acc / len(self.recent)).astype(np.float32), len(self.recent)

    def _fold(self, intensities: np.ndarray) -> None:
        if self.mode == "accumulate":
            if self.sum is None:
                self.sum = np.zeros(intensities.shape, dtype=np.float64)
            self.sum += intensities
            self.count += 1
        else:
            self.recent.append(np.array(intensities, dtype=np.float32))

    def preload(self, frame_sets: Iterable[np.ndarray]) -> int:
        """Fold in earlier frame sets without sending anything; returns how many sets are held."""
        for y in frame_sets:
            self._fold(y)
        return self.held

    @property
    def held(self) -> int:
        """Frame sets the next mean will average before the new one (accumulate: all; follow: the window)."""
        return self.count if self.mode == "accumulate" else len(self.recent)


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
        worker_address: str | None = None,
        server_keys=None,
        reorder_timeout_s: float = 30.0,
    ):
        """worker_address: tcp://HOST:PORT for frame sets (estimates on PORT+1; port 0 = any free ports),
        overriding bind_host; server_keys: security.ServerKeys to make both sockets CURVE servers."""
        self._own_ctx = None
        self._auth = None
        self._local_keys_env = None
        if server_keys is not None:
            from maskrun.daemon.compute.remote_workers import local_worker_keys, start_link_authenticator

            self._own_ctx = context = zmq.Context()  # its own authenticator, apart from the service's
            local_keys, self._local_keys_env = local_worker_keys(server_keys.public)
            self._auth = start_link_authenticator(context, server_keys, [local_keys.public])
        self.reorder_timeout_s = reorder_timeout_s
        self._held: list = []  # (arrival time, EstimateHeader, estimate) waiting for an earlier pass
        self.live = LiveData(options.mode, options.window)
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
        self.pull = context.socket(zmq.PULL)
        self.pull.setsockopt(zmq.MAXMSGSIZE, MAX_MESSAGE_BYTES)
        self.pull.setsockopt(zmq.LINGER, 0)
        frames_bind, results_bind = f"tcp://{bind_host}:0", f"tcp://{bind_host}:0"
        if worker_address is not None:
            from maskrun.daemon.compute.remote_workers import bind_endpoints

            frames_bind, results_bind = bind_endpoints(worker_address)
        if server_keys is not None:
            from maskrun.daemon.security import apply_server_keys

            apply_server_keys(self.push, server_keys)
            apply_server_keys(self.pull, server_keys)
        try:
            self.push.bind(frames_bind)
            self.pull.bind(results_bind)
        except zmq.ZMQError as exc:
            self.push.close(0)
            self.pull.close(0)
            self._close_security()
            from maskrun.daemon.config import ConfigError

            raise ConfigError("[reconstruction] worker_address", [("", f"cannot listen for workers at {frames_bind} / "
                              f"{results_bind} ({exc}); choose another port (estimates use port + 1)")]) from None
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
        if self._local_keys_env is not None:
            from maskrun.daemon.compute.remote_workers import LOCAL_WORKER_KEYS_ENV

            env[LOCAL_WORKER_KEYS_ENV] = self._local_keys_env
        self.process = subprocess.Popen(
            [
                sys.executable,
                "-m",
                "maskrun.daemon.compute.worker",
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
            # its own session: Ctrl-C or a closed terminal stops the run, not the worker, so estimates
            # of the sets already taken still arrive; it exits on 'stop' or when the daemon is gone
            start_new_session=True,
        )

    def new_run(self) -> None:
        """Start a fresh reconstruction (a new run id resets the worker's engine)."""
        self.run_id = uuid.uuid4().hex[:12]
        self.outstanding.clear()
        self._pending.clear()
        self._held.clear()
        self.live = LiveData(self.options.mode, self.options.window)

    def preload(self, live: LiveData) -> None:
        """Use ``live`` (e.g. the frame sets already in a resumed run file) as the data so far."""
        if live.mode != self.options.mode or live.recent.maxlen != self.options.window:
            raise ValueError(f"preloaded data are for mode {live.mode!r} window {live.recent.maxlen}, "
                             f"this link runs {self.options.mode!r} window {self.options.window}")
        self.live = live

    def submit(self, pass_index: int, intensities: np.ndarray, exposure_s: float, quantum_efficiency: float,
               noise: dict | None = None) -> bool:
        """Queue one frame set (K, H, W) float32 detected photons, grid orientation. False if skipped.
        noise: what is known about the data's noise (reconstruct.precision.NoiseModel fields)."""
        intensities = np.ascontiguousarray(intensities, dtype=np.float32)
        intensities, data_passes = self.live.add(intensities)
        hdr = FrameSetHeader(
            run_id=self.run_id,
            pass_index=pass_index,
            shape=intensities.shape,
            exposure_s=exposure_s,
            estimate_scale=1.0 / float(np.sqrt(quantum_efficiency * exposure_s)),
            masks=self.mask_spec,
            options=self.options,
            data_passes=data_passes,
            noise=noise,
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
            self._held.append((time.monotonic(), hdr, est))
        out.extend(self._release())
        return out

    def _release(self, force: bool = False) -> list[tuple[EstimateHeader, np.ndarray]]:
        """Held estimates whose earlier passes are all in (or overdue), in pass order."""
        if not self._held:
            return []
        waiting = set(self.outstanding) | {p for p, _ in self._pending}
        now = time.monotonic()
        out, keep = [], []
        for item in sorted(self._held, key=lambda h: h[1].pass_index):
            t, hdr, est = item
            if force or not any(w < hdr.pass_index for w in waiting) or now - t > self.reorder_timeout_s:
                out.append((hdr, est))
            else:
                keep.append(item)
        self._held = keep
        return out

    def drain(self, timeout_s: float) -> list[tuple[EstimateHeader, np.ndarray]]:
        """Wait up to timeout_s for every outstanding estimate."""
        out = []
        deadline = time.monotonic() + timeout_s
        while (self.outstanding or self._pending) and time.monotonic() < deadline:
            if self.process is not None and self.process.poll() is not None:
                break  # local worker died; nothing more will come
            out.extend(self.poll(min(0.2, max(0.0, deadline - time.monotonic()))))
        out.extend(self._release(force=True))
        self.outstanding.update(p for p, _ in self._pending)  # never sent (no worker connected): report them too
        return out

    def worker_alive(self) -> bool:
        return self.process is None or self.process.poll() is None

    def close(self) -> None:
        if self.process is not None and self.process.poll() is None:
            # round robin: with remote workers connected (they ignore 'stop') one message might not reach
            # the local worker, so send a few
            for _ in range(8):
                try:
                    self.push.send_multipart([b"stop", b"{}", b""], flags=zmq.NOBLOCK)
                except zmq.ZMQError:
                    break
            try:
                self.process.wait(timeout=3)
            except subprocess.TimeoutExpired:
                self.process.kill()
                self.process.wait(timeout=3)
        self.push.close(0)
        self.pull.close(0)
        self._close_security()

    def _close_security(self) -> None:
        if self._auth is not None:
            self._auth.stop()
            self._auth = None
        if self._own_ctx is not None:
            self._own_ctx.term()
            self._own_ctx = None
