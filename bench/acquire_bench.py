"""Acquisition benchmark: the daemon at 1 megapixel, 16 bit, 10 ms exposure, against a bare loop.

Run:  .venv/bin/python bench/acquire_bench.py [--seconds 60] [--size 1024] [--exposure 0.01]

1. The daemon (``maskrun run`` in this process: sequencer, checks, writer thread, stream) on the
   simulated bench with the fast simulated camera (``noise_rendering = "fast"``, real time: each
   frame is ready ``exposure`` after its trigger), simulated modulator (no settle time) and safety
   box, K = 8 masks, for at least ``--seconds``; live reconstruction off (this measures
   acquisition; the live engine runs in its own process and would share the two cores). A live
   subscriber (a process of its own, as a viewer is; the project's ``stream.Subscriber``) receives
   every frame.
2. In the same run, the bare loop on the same camera and frames: trigger, grab, then append to an
   HDF5 file with h5py (one frame per chunk, SWMR, flush per frame) and send with pyzmq (zero-copy),
   with a subscriber receiving, for the same time.

Prints the achieved frames per second of both, the frames dropped (file: taken but not stored;
stream: gaps seen by the subscriber), the writer queue's high-water mark, and the ratio of the
daemon's rate to the bare loop's. Targets: >= 95 fps sustained, 0 dropped, >= 0.8 x bare loop.
"""
from __future__ import annotations

import argparse
import io
import json
import multiprocessing
import socket
import tempfile
import time
from pathlib import Path

import h5py
import numpy as np
import zmq
from rich.console import Console

from maskrun.daemon.acquire.bench import build_bench
from maskrun.daemon.config import demo_config_text, parse_config
from maskrun.daemon.acquire.foreground import RunRequest, run_foreground
from maskrun.daemon.record.runfile import RunFile
from maskrun.daemon.record.stream import Subscriber

K = 8


def _port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def bench_config(size: int, exposure_s: float, passes: int, port: int, out: Path) -> str:
    text = demo_config_text()
    rate = 2.2e9 * (size * size) / (128 * 128) * (0.01 / exposure_s)
    repl = {
        "passes = 3": f"passes = {passes}",
        "dark_frames = 4": "dark_frames = 2",
        'output_dir = "runs"': f'output_dir = "{out}"',
        "shape = [128, 128]": f"shape = [{size}, {size}]",
        "sensor_shape = [160, 160]": f"sensor_shape = [{size}, {size}]",
        "bit_depth = 12": "bit_depth = 16",
        "full_well_e = 15000.0": "full_well_e = 150000.0",
        "exposure_s = 0.01": f"exposure_s = {exposure_s}",
        "readout_latency_s = 0.002": "readout_latency_s = 0.0\nnoise_rendering = \"fast\"",
        "photon_rate_per_s = 2.2e9": f"photon_rate_per_s = {rate:.6g}",
        "min_photons_per_frame = 1.0e6": "min_photons_per_frame = 1.0",
        "max_photons_per_frame = 1.0e9": "max_photons_per_frame = 1.0e15",
    }
    for old, new in repl.items():
        assert old in text, old
        text = text.replace(old, new, 1)
    # simulated modulator and safety box in this process (no serial line, no settle time)
    text = text.replace('[modulator]\ndriver = "serial-line"', '[modulator]\ndriver = "simulated"', 1)
    text = text.replace('[modulator.settings]\nport = "sim:modulator"', '[modulator.settings]\nsettle_s = 0.0', 1)
    text = text.replace('[safety]\ndriver = "serial-line"', '[safety]\ndriver = "simulated"', 1)
    text = text.replace('[safety.settings]\nport = "sim:safety"', '[safety.settings]', 1)
    lines = [ln for ln in text.splitlines() if not ln.startswith("watchdog_s") and not ln.startswith("settle_s = 0.02")]
    text = "\n".join(lines)
    text = text.replace("[reconstruction]", "[reconstruction]\nenabled = false", 1)
    return text + f'\n[stream]\npublish_address = "tcp://127.0.0.1:{port}"\n'


def _listen(address: str, bare: bool, ready, stop, results) -> None:
    """The live subscriber's process: counts frames and the gaps in their sequence numbers."""
    ctx = zmq.Context()
    frames = gaps = 0
    if bare:
        sock = ctx.socket(zmq.SUB)
        sock.setsockopt(zmq.RCVHWM, 1000)
        sock.setsockopt(zmq.SUBSCRIBE, b"")
        sock.connect(address)
        ready.set()
        expected = None
        while not stop.is_set():
            if not sock.poll(50):
                continue
            head, _payload = sock.recv_multipart(copy=False)
            seq = int.from_bytes(head.bytes, "little")
            if expected is not None and seq > expected:
                gaps += seq - expected
            expected = seq + 1
            frames += 1
        sock.close(linger=0)
    else:
        sub = Subscriber(ctx, address, ("frame",), hwm=1000)
        ready.set()
        while not stop.is_set():
            msg = sub.receive(0.05)
            if msg is not None and msg.header.topic == "frame":  # the filter "frame" also passes "frameset"
                frames += 1
        gaps = sub.gaps.get("frame", 0)
        sub.close()
    ctx.term()
    results.put((frames, gaps))


class Listener:
    """A subscriber that keeps up, in a process of its own (as a viewer would be)."""

    def __init__(self, address: str, bare: bool = False):
        mp = multiprocessing.get_context("spawn")
        self._ready, self._stop, self._results = mp.Event(), mp.Event(), mp.Queue()
        self._proc = mp.Process(target=_listen, args=(address, bare, self._ready, self._stop, self._results),
                                daemon=True)
        self._proc.start()
        self._ready.wait(30)
        time.sleep(0.2)  # the subscription reaches the publisher
        self.frames = self.gaps = 0

    def stop(self):
        time.sleep(0.5)  # what was sent is received
        self._stop.set()
        self.frames, self.gaps = self._results.get(timeout=30)
        self._proc.join(10)


def run_daemon(size: int, exposure_s: float, seconds: float, work: Path) -> dict:
    passes = max(1, int(np.ceil(seconds / (K * exposure_s))))
    port = _port()
    cfg_path = work / "acquire.toml"
    cfg_path.write_text(bench_config(size, exposure_s, passes, port, work))
    cfg = parse_config(cfg_path.read_text(), str(cfg_path))
    listener = Listener(f"tcp://127.0.0.1:{port}")
    summary = run_foreground(cfg, RunRequest(acknowledge_unattended=True, output_dir=str(work), name="acq"),
                             Console(file=io.StringIO()))
    listener.stop()
    with RunFile(summary.output_path) as rf:
        info = rf.frame_info()
        stored = rf.frame_count
        t = info["t_frame_s"]
        sets = len(rf.complete_sets())
    fps = (len(t) - 1) / (t[-1] - t[0]) if len(t) > 1 else 0.0
    return {"state": summary.state.value, "fps": fps, "frames_taken": summary.frames, "stored": stored,
            "file_dropped": summary.frames - stored + summary.refused, "refused": summary.refused,
            "stream_received": listener.frames, "stream_gaps": listener.gaps,
            "stream_dropped": summary.frames - listener.frames, "sets": sets, "passes": passes,
            "queue_high_water": summary.writer_queue_high_water, "wall_s": summary.wall_s, "cfg": cfg,
            "bytes": Path(summary.output_path).stat().st_size}


def run_bare(cfg, seconds: float, work: Path) -> dict:
    """Trigger, grab, h5py append + flush (SWMR, one frame per chunk), pyzmq zero-copy send: nothing else."""
    bench = build_bench(cfg)
    bench.open()
    port = _port()
    ctx = zmq.Context()
    pub = ctx.socket(zmq.PUB)
    pub.setsockopt(zmq.SNDHWM, 1000)
    pub.bind(f"tcp://127.0.0.1:{port}")
    listener = Listener(f"tcp://127.0.0.1:{port}", bare=True)
    cam, mod = bench.camera, bench.modulator
    cam.exposure_s = cfg.camera.exposure_s
    bench.safety.open_shutter()
    rows, cols = cam.roi[2:]
    path = work / "bare.h5"
    n = 0
    t_frames = []
    with h5py.File(path, "w", libver="latest") as f:
        ds = f.create_dataset("frames", (0, rows, cols), dtype=np.uint16, maxshape=(None, rows, cols),
                              chunks=(1, rows, cols))
        f.swmr_mode = True
        t_end = time.monotonic() + seconds
        while time.monotonic() < t_end:
            mod.show(n % K)
            cam.trigger()
            frame = cam.grab(1.0)
            ds.resize(n + 1, axis=0)
            ds[n] = frame.pixels
            f.flush()
            pub.send_multipart([n.to_bytes(8, "little"), frame.pixels], copy=False)
            t_frames.append(frame.timestamp_s)
            n += 1
    bench.safety.close_shutter()
    listener.stop()
    pub.close(linger=0)
    ctx.term()
    bench.close()
    fps = (n - 1) / (t_frames[-1] - t_frames[0]) if n > 1 else 0.0
    return {"fps": fps, "frames": n, "stream_received": listener.frames, "stream_gaps": listener.gaps}


def disk_write_rate_mb_s(folder: Path, mb: int) -> float:
    """Sustained write rate of ``folder``: ``mb`` MB in 2 MB blocks, then fsync; the file is deleted."""
    block = np.random.default_rng(0).integers(0, 65535, 1 << 20, dtype=np.uint16).tobytes()
    path = folder / "disk-check.bin"
    t0 = time.perf_counter()
    with open(path, "wb") as f:
        for _ in range(max(1, mb // 2)):
            f.write(block)
        f.flush()
        import os

        os.fsync(f.fileno())
    dt = time.perf_counter() - t0
    path.unlink()
    return max(1, mb // 2) * 2 / dt


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seconds", type=float, default=60.0)
    ap.add_argument("--size", type=int, default=1024)
    ap.add_argument("--exposure", type=float, default=0.01)
    ap.add_argument("--dir", default=None, help="where the run files go (default: the system's temporary folder); "
                    "e.g. /dev/shm to take the disk out of the measurement (needs 2 x 200 MB per second of RAM)")
    ap.add_argument("--disk-check-mb", type=int, default=1024,
                    help="first measure the folder's sustained write rate with this many MB (written, fsynced, "
                         "deleted; 0 = skip)")
    args = ap.parse_args()
    with tempfile.TemporaryDirectory(prefix="maskrun-acquire-", dir=args.dir) as d:
        work = Path(d)
        print(f"acquire bench: {args.size}x{args.size} uint16, exposure {args.exposure * 1e3:g} ms, K = {K}, "
              f"{args.seconds:g} s each; fast simulated camera (real time), live subscriber")
        need = args.size * args.size * 2 / args.exposure / 1e6
        if args.disk_check_mb:
            rate = disk_write_rate_mb_s(work, args.disk_check_mb)
            print(f"  the folder takes {rate:.0f} MB/s sustained (written and fsynced); {need:.0f} MB/s are needed "
                  f"at the exposure rate" + ("" if rate >= need else ": the disk, not the software, limits both loops"))
        dm = run_daemon(args.size, args.exposure, args.seconds, work)
        print(f"  daemon: {dm['fps']:6.1f} fps over {dm['frames_taken']} frames ({dm['sets']} complete sets, "
              f"{dm['state']}, {dm['wall_s']:.1f} s with darks and set-up); dropped: file {dm['file_dropped']} "
              f"(refused {dm['refused']}), stream {dm['stream_dropped']} (gaps {dm['stream_gaps']}); writer queue "
              f"high-water mark {dm['queue_high_water']} frames")
        bare = run_bare(dm["cfg"], args.seconds, work)
        print(f"  bare h5py + pyzmq loop: {bare['fps']:6.1f} fps over {bare['frames']} frames; stream received "
              f"{bare['stream_received']} (gaps {bare['stream_gaps']})")
        ratio = dm["fps"] / bare["fps"] if bare["fps"] else float("nan")
        ideal = 1.0 / args.exposure
        print(f"  ratio daemon / bare loop: {ratio:.3f}; daemon / exposure rate ({ideal:g} fps): {dm['fps'] / ideal:.3f}")
        print("  targets: >= 95 fps, 0 dropped (file and stream), >= 0.8 x the bare loop")
        print(json.dumps({"daemon_fps": dm["fps"], "bare_fps": bare["fps"], "ratio": ratio,
                          "file_dropped": dm["file_dropped"], "stream_dropped": dm["stream_dropped"],
                          "queue_high_water": dm["queue_high_water"]}))


if __name__ == "__main__":
    main()
