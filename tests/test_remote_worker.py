"""Remote reconstruction workers: `maskrun worker --connect ADDRESS` processes over tcp on loopback.

Real processes, real ZeroMQ sockets (with CURVE keys in one test), a real live run on the simulated
bench with the local worker disabled.
"""

import io
import os
import shutil
import socket
import subprocess
import sys
import threading
import time
from pathlib import Path

import numpy as np
import pytest
import zmq
from zmq.utils.monitor import recv_monitor_message

from benchcfg import small_bench_text
from maskrun.daemon.commands.cli import main as cli_main
from maskrun.daemon.config import ConfigError, ReconstructionConfig, parse_config
from maskrun.daemon.acquire.foreground import RunRequest, run_foreground
from maskrun.daemon.masks import make_masks
from maskrun.daemon.compute.recon_link import ReconLink
from maskrun.daemon.compute.remote_workers import link_options, worker_endpoints
from maskrun.daemon.record.runfile import RunFile
from maskrun.daemon.security import generate_keys, load_server_keys
from maskrun.daemon.compute.worker import EstimateHeader
from maskrun.reconstruct import forward, relative_error

from rich.console import Console

SHAPE = (24, 24)
K = 6


def _free_port_pair() -> int:
    """A port P with P and P+1 free on loopback (checked by binding both)."""
    for _ in range(50):
        with socket.socket() as a:
            a.bind(("127.0.0.1", 0))
            port = a.getsockname()[1]
            if port >= 65534:
                continue
            with socket.socket() as b:
                try:
                    b.bind(("127.0.0.1", port + 1))
                except OSError:
                    continue
        return port
    raise RuntimeError("no free port pair on loopback")


def _maskrun_command() -> list[str]:
    exe = Path(sys.executable).parent / "maskrun"
    return [str(exe)] if exe.exists() else [sys.executable, "-m", "maskrun.daemon.commands.cli"]


class WorkerProcess:
    """`maskrun worker --connect ADDRESS ...` as a subprocess; waits until it says it is serving."""

    def __init__(self, address: str, name: str, *extra: str):
        env = dict(os.environ, OMP_NUM_THREADS="1", OPENBLAS_NUM_THREADS="1")
        self.proc = subprocess.Popen([*_maskrun_command(), "worker", "--connect", address, "--name", name,
                                      "--idle-exit-s", "60", *extra],
                                     stdin=subprocess.DEVNULL, stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                                     env=env, text=True)
        self.lines: list[str] = []
        self._ready = threading.Event()
        threading.Thread(target=self._read, daemon=True).start()
        assert self._ready.wait(30), f"worker {name} did not start: {self.lines}"

    def _read(self):
        for line in self.proc.stderr:
            self.lines.append(line)
            if "to stop" in line:
                self._ready.set()

    def stop(self) -> int:
        self.proc.terminate()
        try:
            return self.proc.wait(10)
        except subprocess.TimeoutExpired:
            self.proc.kill()
            return self.proc.wait(5)


def _wait_handshakes(sock: zmq.Socket, monitor: zmq.Socket, n: int, timeout_s: float = 20.0) -> dict:
    """Count handshake events on a socket's monitor until n succeeded (returns all counts)."""
    counts = {"ok": 0, "failed_auth": 0}
    deadline = time.monotonic() + timeout_s
    while counts["ok"] < n and time.monotonic() < deadline:
        if monitor.poll(200):
            ev = recv_monitor_message(monitor)["event"]
            if ev == zmq.EVENT_HANDSHAKE_SUCCEEDED:
                counts["ok"] += 1
            elif ev == zmq.EVENT_HANDSHAKE_FAILED_AUTH:
                counts["failed_auth"] += 1
    return counts


def _frame_sets(n: int, seed: int = 5):
    """n noisy frame sets (detected photons, grid orientation) of a smooth complex object, and the masks."""
    masks = make_masks("octanary", K, SHAPE, seed=7)
    yy, xx = np.mgrid[: SHAPE[0], : SHAPE[1]] / SHAPE[0]
    truth = (1.0 + 0.3 * np.cos(2 * np.pi * xx)) * np.exp(1j * 2.0 * np.sin(2 * np.pi * yy))
    mean = forward(truth, masks)
    scale = 4e5 / mean[0].sum()  # ~4e5 detected photons per frame
    rng = np.random.default_rng(seed)
    sets = [rng.poisson(mean * scale).astype(np.float32) for _ in range(n)]
    return masks, truth * np.sqrt(scale), sets


def _link(ctx, masks, **kw) -> ReconLink:
    spec = {"family": "octanary", "count": K, "shape": SHAPE, "seed": 7, "levels": 8}
    opts = ReconstructionConfig(mode="accumulate", iterations_per_update=40)
    return ReconLink(ctx, masks, spec, opts, **kw)


def _collect(link: ReconLink, n: int, timeout_s: float = 40.0) -> list[tuple[EstimateHeader, np.ndarray]]:
    got = []
    deadline = time.monotonic() + timeout_s
    while len(got) < n and time.monotonic() < deadline:
        got.extend(link.poll(0.2))
    return got


def test_two_remote_workers_share_the_frame_sets_and_estimates_come_in_pass_order():
    port = _free_port_pair()
    address = f"tcp://127.0.0.1:{port}"
    masks, truth, sets = _frame_sets(6)
    ctx = zmq.Context()
    link = _link(ctx, masks, worker_address=address, local_worker=False)
    monitor = link.push.get_monitor_socket(zmq.EVENT_HANDSHAKE_SUCCEEDED | zmq.EVENT_HANDSHAKE_FAILED_AUTH)
    workers = [WorkerProcess(address, "w1"), WorkerProcess(address, "w2")]
    try:
        assert link.process is None  # no local worker
        assert _wait_handshakes(link.push, monitor, 2)["ok"] == 2
        for p, y in enumerate(sets):
            assert link.submit(p, y, exposure_s=1.0, quantum_efficiency=1.0)
        got = _collect(link, 6)
    finally:
        link.push.disable_monitor()
        monitor.close(0)
        link.close()
        codes = [w.stop() for w in workers]
        ctx.term()
    assert [h.pass_index for h, _ in got] == list(range(6))  # reordered by pass
    assert {h.worker for h, _ in got} == {"w1", "w2"}  # both workers took frame sets
    # accumulate mode with the daemon's running mean: estimate p uses all frame sets 0..p
    assert [h.passes_used for h, _ in got] == list(range(1, 7))
    total = np.sum([y.sum(dtype=np.float64) for y in sets])
    assert np.isclose(got[-1][0].photons, total, rtol=1e-5)
    errs = [relative_error(truth, est.astype(np.complex128)) for _, est in got]
    # shot-noise rule (relative error ~ sqrt(pixels / photons)); see maskrun.reconstruct.bounds
    assert errs[-1] < 3 * got[-1][0].error_estimate and errs[-1] < errs[0]
    assert codes == [0, 0]  # SIGTERM ends a remote worker cleanly


def test_estimates_overtaking_an_earlier_pass_are_held_back():
    """A hand-driven worker on real sockets answers frame sets 2, 0, 1: the link hands them out as 0, 1, 2."""
    masks, _, sets = _frame_sets(3)
    ctx = zmq.Context()
    link = _link(ctx, masks, local_worker=False)
    pull = ctx.socket(zmq.PULL)
    push = ctx.socket(zmq.PUSH)
    pull.connect(link.frames_address)
    push.connect(link.results_address)
    try:
        for p, y in enumerate(sets):
            link.submit(p, y, exposure_s=1.0, quantum_efficiency=1.0)
        headers = []
        deadline = time.monotonic() + 10
        while len(headers) < 3 and time.monotonic() < deadline:
            assert link.poll(0.0) == []  # sends what is queued once the peer is connected
            if pull.poll(100):
                headers.append(pull.recv_multipart())
        assert len(headers) == 3
        released = []
        for p in (2, 0, 1):
            hdr = EstimateHeader(run_id=link.run_id, pass_index=p, passes_used=p + 1, residual=0.1, error_estimate=0.1,
                                 iterations=1, photons=1.0, elapsed_s=0.0, shape=SHAPE, worker="hand")
            push.send_multipart([b"estimate", hdr.model_dump_json().encode(), np.zeros(SHAPE, np.complex64).tobytes()])
            time.sleep(0.1)
            released.append([h.pass_index for h, _ in link.poll(1.0)])
        assert released == [[], [0], [1, 2]]
        # the daemon sends the running mean and how many frame sets it averages
        import json

        data_passes = [json.loads(h[1])["data_passes"] for h in headers]
        assert data_passes == [1, 2, 3]
        mean_of_all = np.frombuffer(headers[2][2], dtype=np.float32).reshape(K, *SHAPE)
        np.testing.assert_allclose(mean_of_all, np.mean(sets, axis=0), rtol=1e-6)
    finally:
        pull.close(0)
        push.close(0)
        link.close()
        ctx.term()


def test_an_estimate_is_not_held_for_ever_when_a_worker_vanished_with_an_earlier_pass():
    masks, _, sets = _frame_sets(2)
    ctx = zmq.Context()
    link = _link(ctx, masks, local_worker=False, reorder_timeout_s=0.5)
    pull = ctx.socket(zmq.PULL)
    push = ctx.socket(zmq.PUSH)
    pull.connect(link.frames_address)
    push.connect(link.results_address)
    try:
        for p, y in enumerate(sets):
            link.submit(p, y, exposure_s=1.0, quantum_efficiency=1.0)
        got = 0
        deadline = time.monotonic() + 10
        while got < 2 and time.monotonic() < deadline:
            link.poll(0.0)
            if pull.poll(100):
                pull.recv_multipart()
                got += 1
        assert got == 2
        # only pass 1 is answered: pass 0 died with its worker
        hdr = EstimateHeader(run_id=link.run_id, pass_index=1, passes_used=2, residual=0.1, error_estimate=0.1,
                             iterations=1, photons=1.0, elapsed_s=0.0, shape=SHAPE, worker="hand")
        push.send_multipart([b"estimate", hdr.model_dump_json().encode(), np.zeros(SHAPE, np.complex64).tobytes()])
        t0 = time.monotonic()
        assert link.poll(0.3) == []  # held: pass 0 is still outstanding
        released = []
        while not released and time.monotonic() - t0 < 5:
            released = link.poll(0.1)
        assert [h.pass_index for h, _ in released] == [1]
        assert 0.5 <= time.monotonic() - t0 < 3.0
        assert link.outstanding == {0}  # still reported as missing at the end of the run
    finally:
        pull.close(0)
        push.close(0)
        link.close()
        ctx.term()


def test_curve_keys_admit_authorized_workers_only(tmp_path):
    keys_dir = tmp_path / "keys"
    generate_keys(keys_dir)
    intruder = tmp_path / "intruder"
    generate_keys(intruder)
    shutil.copy(keys_dir / "server.key", intruder / "server.key")  # knows the server, not authorized
    server_keys = load_server_keys(keys_dir / "server.key_secret", keys_dir / "authorized_clients")
    port = _free_port_pair()
    address = f"tcp://127.0.0.1:{port}"
    masks, _, sets = _frame_sets(4)
    ctx = zmq.Context()
    link = _link(ctx, masks, worker_address=address, server_keys=server_keys, local_worker=True)
    monitor = link.push.get_monitor_socket(zmq.EVENT_HANDSHAKE_SUCCEEDED | zmq.EVENT_HANDSHAKE_FAILED_AUTH)
    workers = [WorkerProcess(address, "remote", "--keys", str(keys_dir)),
               WorkerProcess(address, "intruder", "--keys", str(intruder))]
    try:
        counts = _wait_handshakes(link.push, monitor, 2)  # the local worker (its own key pair) and 'remote'
        deadline = time.monotonic() + 10
        while counts["failed_auth"] == 0 and time.monotonic() < deadline:
            if monitor.poll(200) and recv_monitor_message(monitor)["event"] == zmq.EVENT_HANDSHAKE_FAILED_AUTH:
                counts["failed_auth"] += 1
        for p, y in enumerate(sets):
            link.submit(p, y, exposure_s=1.0, quantum_efficiency=1.0)
        got = _collect(link, 4)
    finally:
        link.push.disable_monitor()
        monitor.close(0)
        link.close()
        for w in workers:
            w.stop()
        ctx.term()
    assert counts["ok"] == 2 and counts["failed_auth"] >= 1
    assert [h.pass_index for h, _ in got] == [0, 1, 2, 3]
    assert {h.worker for h, _ in got} == {"local", "remote"}


def _remote_config_text(port: int, passes: int) -> str:
    text = small_bench_text(passes=passes, recon_iterations=40)
    old = "iterations_per_update = 40"
    assert old in text
    return text.replace(old, old + f'\nlocal_worker = false\nworker_address = "tcp://127.0.0.1:{port}"', 1)


def test_live_run_reconstructed_by_a_remote_worker_only(tmp_path):
    port = _free_port_pair()
    cfg = parse_config(_remote_config_text(port, passes=3), "remote-bench.toml")
    assert cfg.reconstruction.local_worker is False
    worker = WorkerProcess(f"tcp://127.0.0.1:{port}", "remote")
    try:
        summary = run_foreground(cfg, RunRequest(acknowledge_unattended=True, output_dir=str(tmp_path)),
                                 Console(file=io.StringIO()))
    finally:
        code = worker.stop()
    assert summary.state.value == "finished", summary.message
    assert code == 0
    with RunFile(summary.output_path) as rf:
        info = rf.estimate_info()
        assert info["pass_index"].tolist() == [0, 1, 2]
        assert info["passes_used"].tolist() == [1, 2, 3]
        assert info["true_error"][-1] < 0.05
        assert not any(e["kind"] == "recon_incomplete" for e in rf.events())


def test_unsafe_addresses_are_refused(capsys, tmp_path):
    cfg = parse_config(_remote_config_text(5000, passes=1).replace("tcp://127.0.0.1:5000", "tcp://0.0.0.0:5000"),
                       "open-bench.toml")
    with pytest.raises(ConfigError, match="no CURVE keys"):
        link_options(cfg)
    # a run with that config is refused before the safety notice, and nothing is written
    with pytest.raises(ConfigError, match="reconstruction.worker_address"):
        run_foreground(cfg, RunRequest(acknowledge_unattended=True, output_dir=str(tmp_path / "out")),
                       Console(file=io.StringIO()))
    assert not (tmp_path / "out").exists()
    # a worker refuses a non-loopback daemon without keys before opening any socket
    assert cli_main(["worker", "--connect", "tcp://daemon-host.invalid:5000"]) == 2
    assert "--keys" in capsys.readouterr().err
    assert cli_main(["worker", "--connect", "tcp://127.0.0.1:0"]) == 2
    assert "port 0" in capsys.readouterr().err
    assert worker_endpoints("tcp://[::1]:7000") == ("tcp://[::1]:7000", "tcp://[::1]:7001")


def test_worker_fed_running_means_matches_an_accumulating_engine():
    """A worker given the daemon's running mean (data_passes) picks the same solver and reaches the same
    estimate as an accumulate-mode IncrementalEngine fed the frame sets one by one (real PUSH/PULL on loopback)."""
    from maskrun.daemon.compute.worker import FrameSetHeader, MaskSpec, ReconOptions, WorkerLoop, mask_digest
    from maskrun.reconstruct import IncrementalEngine
    from maskrun.reconstruct.incremental import update_method

    rng = np.random.default_rng(5)
    masks = make_masks("octanary", K, SHAPE, seed=3)
    x = rng.standard_normal(SHAPE) + 1j * rng.standard_normal(SHAPE)
    y = forward(x, masks) * 2e3
    sets = [rng.poisson(y).astype(np.float32) for _ in range(3)]

    ctx = zmq.Context()
    to_worker, from_worker = ctx.socket(zmq.PUSH), ctx.socket(zmq.PULL)
    port_out = to_worker.bind_to_random_port("tcp://127.0.0.1")
    port_in = from_worker.bind_to_random_port("tcp://127.0.0.1")
    worker = WorkerLoop(f"tcp://127.0.0.1:{port_out}", f"tcp://127.0.0.1:{port_in}", context=ctx, name="w")
    spec = MaskSpec(family="octanary", count=K, shape=SHAPE, seed=3, sha256=mask_digest(masks))
    engine = IncrementalEngine(masks, mode="accumulate", iterations_per_update=60)
    total = np.zeros((K,) + SHAPE)
    try:
        for p, frame_set in enumerate(sets):
            total += frame_set
            mean = (total / (p + 1)).astype(np.float32)
            hdr = FrameSetHeader(run_id="r", pass_index=p, shape=(K,) + SHAPE, exposure_s=1.0, estimate_scale=1.0,
                                 masks=spec, options=ReconOptions(iterations_per_update=60), data_passes=p + 1)
            to_worker.send_multipart([b"frameset", hdr.model_dump_json().encode(), mean.tobytes()])
            assert worker.pull.poll(5000)
            assert worker.handle(worker.pull.recv_multipart())
            assert from_worker.poll(5000)
            _, head, payload = from_worker.recv_multipart()
            got = EstimateHeader.model_validate_json(head)
            estimate = np.frombuffer(payload, np.complex64).reshape(SHAPE)
            expected = engine.update(frame_set)
            assert worker._engine.method == update_method("auto", K, warm_start=p > 0, accumulating=True)
            assert got.passes_used == expected.passes_used == p + 1
            assert got.iterations == expected.iterations
            # the engine averages in float64, the daemon sends a float32 mean: agreement to float32 precision
            assert relative_error(expected.estimate, estimate) < 1e-4
            assert got.error_estimate == pytest.approx(expected.error_estimate, rel=1e-5)
    finally:
        worker.pull.close(0)
        worker.push.close(0)
        to_worker.close(0)
        from_worker.close(0)
        ctx.term()


def test_update_method_choices():
    from maskrun.reconstruct.incremental import update_method

    assert update_method("auto", 8, warm_start=False, accumulating=True) == "hybrid"
    assert update_method("auto", 8, warm_start=True, accumulating=True) == "er"
    assert update_method("auto", 8, warm_start=True, accumulating=False) == "hybrid"
    assert update_method("auto", 4, warm_start=True, accumulating=True) == "raar"
    assert update_method("wf", 8, warm_start=True, accumulating=True) == "wf"
