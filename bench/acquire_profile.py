"""Where the time of one frame goes: the daemon's per-frame calls timed with perf_counter.

Run:  .venv/bin/python bench/acquire_profile.py [--seconds 15] [--size 1024] [--exposure 0.01]

Runs the same daemon as ``acquire_bench.py`` (fast simulated camera in real time, live subscriber
in its own process) with each per-frame call wrapped in a timer (the wrappers cost a few
microseconds each). Prints, per frame, the mean and 90th percentile of every call, and splits the
frame interval into: the wait for the exposure inside ``grab``, the work in series between a
frame's arrival and the next trigger (which adds to the interval), and the work that overlaps
the next exposure (after the trigger). Time the writer thread holds the GIL shows up as extra
time in whichever main-thread call it interrupted.
"""
from __future__ import annotations

import argparse
import collections
import io
import tempfile
import time
from pathlib import Path

import numpy as np
from rich.console import Console

import acquire_bench as ab
from maskrun.daemon.acquire import sequencer as seq_mod
from maskrun.daemon.acquire import sequencer_frames as seq_frames_mod
from maskrun.daemon.acquire import frame_writer as fw_mod
from maskrun.daemon.record import stream as stream_mod
from maskrun.daemon.config import parse_config
from maskrun.daemon.acquire.foreground import RunRequest, run_foreground

TIMES: dict[str, list[float]] = collections.defaultdict(list)
MARKS: dict[str, list[float]] = collections.defaultdict(list)


def timed(name, fn):
    def wrapper(*a, **kw):
        t0 = time.perf_counter()
        try:
            return fn(*a, **kw)
        finally:
            TIMES[name].append(time.perf_counter() - t0)
    return wrapper


def wrap_module_fn(mod, attr, name=None):
    setattr(mod, attr, timed(name or attr, getattr(mod, attr)))


def wrap_method(cls, attr, name=None):
    setattr(cls, attr, timed(name or f"{cls.__name__}.{attr}", getattr(cls, attr)))


def install_camera_marks(bench):
    """Marks of grab return and trigger call, to split the interval into series and overlapped work."""
    cam = bench.camera
    grab, trigger = cam.grab, cam.trigger

    def g(timeout_s):
        t0 = time.perf_counter()
        f = grab(timeout_s)
        t1 = time.perf_counter()
        TIMES["camera.grab (incl. exposure wait)"].append(t1 - t0)
        MARKS["grab_return"].append(t1)
        return f

    def t():
        t0 = time.perf_counter()
        MARKS["trigger_call"].append(t0)
        trigger()
        TIMES["camera.trigger"].append(time.perf_counter() - t0)

    cam.grab, cam.trigger = g, t
    for dev, names in ((bench.safety, ("shutter_is_open", "interlock_closed")), (bench.modulator, ("show",))):
        for n in names:
            setattr(dev, n, timed(f"{type(dev).__name__}.{n}", getattr(dev, n)))


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seconds", type=float, default=15.0)
    ap.add_argument("--size", type=int, default=1024)
    ap.add_argument("--exposure", type=float, default=0.01)
    args = ap.parse_args()
    for attr in ("check_frame", "downsample_preview", "electrons_shifted"):  # looked up where the frame code lives
        wrap_module_fn(seq_frames_mod, attr)
    wrap_method(fw_mod.FrameWriter, "submit")
    wrap_method(stream_mod.Publisher, "publish")
    S = seq_mod.Sequencer
    for attr in ("_arm", "_take_frame", "_announce_durable", "_collect_estimates", "_notify", "_account_dose",
                 "_check_dose_before", "_ensure_light"):
        wrap_method(S, attr)
    wrap_method(seq_mod.DiskGuard, "check")
    orig_init = S.__init__

    def init(self, bench, *a, **kw):
        orig_init(self, bench, *a, **kw)
        install_camera_marks(bench)
    S.__init__ = init
    with tempfile.TemporaryDirectory(prefix="maskrun-profile-") as d:
        work = Path(d)
        passes = max(1, int(np.ceil(args.seconds / (ab.K * args.exposure))))
        port = ab._port()
        text = ab.bench_config(args.size, args.exposure, passes, port, work)
        cfg = parse_config(text, "profile.toml")
        listener = ab.Listener(f"tcp://127.0.0.1:{port}")
        summary = run_foreground(cfg, RunRequest(acknowledge_unattended=True, output_dir=str(work), name="prof"),
                                 Console(file=io.StringIO()))
        listener.stop()
    g, tr = np.array(MARKS["grab_return"]), np.array(MARKS["trigger_call"])
    # pair each grab return with the next trigger call after it (acquisition frames only: skip darks)
    series = []
    j = 0
    for t in g:
        while j < len(tr) and tr[j] < t:
            j += 1
        if j < len(tr) and tr[j] - t < 0.5:
            series.append(tr[j] - t)
    series = np.array(series[10:])
    interval = np.diff(g[10:])
    interval = interval[interval < 0.5]
    print(f"frames {summary.frames}, stream received {listener.frames}, writer high-water "
          f"{summary.writer_queue_high_water}")
    print(f"frame interval (grab return to grab return): mean {interval.mean() * 1e3:.2f} ms "
          f"-> {1 / interval.mean():.1f} fps; exposure {args.exposure * 1e3:g} ms")
    print(f"in series (grab return -> next trigger): mean {series.mean() * 1e3:.3f} ms, "
          f"p50 {np.median(series) * 1e3:.3f}, p90 {np.percentile(series, 90) * 1e3:.3f} ms")
    n = max(1, summary.frames)
    print(f"{'call':45s} {'calls/frame':>11s} {'mean ms':>8s} {'p90 ms':>8s} {'ms/frame':>9s}")
    for name, v in sorted(TIMES.items(), key=lambda kv: -sum(kv[1])):
        v = np.array(v)
        print(f"{name:45s} {len(v) / n:11.2f} {v.mean() * 1e3:8.3f} {np.percentile(v, 90) * 1e3:8.3f} "
              f"{v.sum() / n * 1e3:9.3f}")


if __name__ == "__main__":
    main()
