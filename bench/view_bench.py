"""Updates per second of the live view at 512 x 512 (and of the matplotlib-with-blitting alternative).

    python bench/view_bench.py [--size 512] [--seconds 4] [--skip-mpl]

Runs on the display in DISPLAY (e.g. under `Xvfb :99 &` with DISPLAY=:99, so
the pixels really travel to an X server), or offscreen if no DISPLAY is set.

Data: 512 x 512 camera frames simulated from the etched phase test plate behind
8 octanary masks (simulators.optics, Poisson photon noise, 12-bit counts) and
complex estimates (the known sample with a little noise): real image content,
not constant arrays, so colour mapping does its full work.

Measured:
1. pyqtgraph view, worst case: every update brings a new frame AND a new
   amplitude/phase estimate (three 512 x 512 images recoloured and painted).
   Counted as paints of the window that really happened.
2. pyqtgraph view, frames only (what alignment looks like: frames at the
   camera rate, an estimate once per pass).
3. pyqtgraph view, live: a Publisher thread sends frames at TARGET_HZ (and an
   estimate every 8 frames) over loopback ZeroMQ; the view runs its own
   timer; we count distinct frames drawn per second and messages skipped.
4. matplotlib with blitting (QtAgg canvas on the same display, and the Agg
   canvas alone), the same three images + colour bars + a line plot:
   set_data, draw_artist, blit; frame-only blits just the frame panel.
5. matplotlib full redraw: what it takes when titles, colour-bar limits or
   plot ranges change (blitting cannot redraw those).
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import threading
import time

import numpy as np

TARGET_HZ = 30.0


def make_data(n: int, frames: int = 8, estimates: int = 4, seed: int = 1):
    from maskrun.reconstruct import octanary_masks
    from maskrun.simulators.optics import SimulatedOptics
    from maskrun.simulators.sample import phase_target

    rng = np.random.default_rng(seed)
    truth = phase_target((n, n)).field
    masks = octanary_masks(frames, (n, n), seed=7)
    optics = SimulatedOptics(truth, masks, photon_rate_per_s=2.2e9 * (n * n) / (128 * 128), sensor_shape=(n, n))
    optics.shutter_open = True
    out_frames = []
    for k in range(frames):
        optics.shown_mask = k
        photons = optics.expected_photons(0.01)
        e = rng.poisson(photons * 0.6)
        dn = np.clip(100 + 0.3 * e + rng.normal(0, 1, e.shape), 0, 4095).astype(np.uint16)
        out_frames.append(dn)
    field = optics.truth_field()
    ests = [(field * (1 + 0.02 * rng.standard_normal(field.shape))
             * np.exp(1j * 0.05 * rng.standard_normal(field.shape))).astype(np.complex64) for _ in range(estimates)]
    return out_frames, ests


def _msg(topic, seq, meta, array):
    from maskrun.daemon.record.stream import StreamHeader, StreamMessage

    hdr = StreamHeader(topic=topic, seq=seq, global_seq=seq, t_s=time.time(), dtype=array.dtype.str,
                       shape=list(array.shape), meta=meta)
    return StreamMessage(hdr, array, 0)


def bench_pyqtgraph(frames, ests, seconds: float, live_hz: float = TARGET_HZ) -> dict:
    import zmq
    from PySide6 import QtWidgets

    from maskrun.daemon.record.stream import Publisher, Subscriber
    from maskrun.daemon.show.view import window_class
    from maskrun.daemon.show.view_model import LiveViewState

    app = QtWidgets.QApplication.instance() or QtWidgets.QApplication(["view_bench"])
    ctx = zmq.Context()
    pub = Publisher(ctx, "tcp://127.0.0.1:0", hwm=20)
    sub = Subscriber(ctx, pub.address, ("frame", "estimate", "status"), hwm=20)
    win = window_class()(sub, pub.address, LiveViewState())
    win.timer.stop()
    win.resize(1500, 860)
    win.show()
    app.processEvents()
    results = {"platform": app.platformName()}

    def run(label, with_estimate: bool):
        s = win.state
        p0, n, t0 = win.glw.paints, 0, time.perf_counter()
        while time.perf_counter() - t0 < seconds:
            k = n % len(frames)
            s.ingest(_msg("frame", n, {"pass_index": 0, "mask_index": k, "max_dn": 4095, "photons": 1e7}, frames[k]))
            if with_estimate:
                s.ingest(_msg("estimate", n, {"pass_index": n, "residual": 0.01, "error_estimate": 0.008,
                                              "true_error": float("nan")}, ests[n % len(ests)]))
            win.render()
            app.processEvents()
            n += 1
        dt = time.perf_counter() - t0
        results[label] = {"updates": n, "paints": win.glw.paints - p0, "seconds": round(dt, 2),
                          "updates_per_s": round(n / dt, 1), "paints_per_s": round((win.glw.paints - p0) / dt, 1)}

    run("pyqtgraph_frame_and_estimate", True)
    run("pyqtgraph_frame_only", False)

    # live: publisher thread at TARGET_HZ, the view on its own timer
    for _ in range(100):  # PUB/SUB join
        pub.publish("status", {"state": "idle"})
        app.processEvents()
        if sub.receive(0.02) is not None:
            break
    win.timer.start()
    stop = threading.Event()

    def publisher():
        i, t_next = 0, time.perf_counter()
        while not stop.is_set():
            k = i % len(frames)
            pub.publish("frame", {"pass_index": i // 8, "mask_index": k, "max_dn": 4095, "photons": 1e7}, frames[k])
            if k == len(frames) - 1:
                pub.publish("estimate", {"pass_index": i // 8, "residual": 0.01, "error_estimate": 0.008,
                                         "true_error": float("nan")}, ests[(i // 8) % len(ests)])
            i += 1
            t_next += 1.0 / live_hz
            time.sleep(max(0.0, t_next - time.perf_counter()))

    drawn = []
    orig_render = win.render

    def counting_render():
        if "frame" in win.state.dirty:
            drawn.append(time.perf_counter())
        orig_render()

    win.render = counting_render
    th = threading.Thread(target=publisher, daemon=True)
    p0 = win.glw.paints
    rec0 = win.state.received["frame"]
    t0 = time.perf_counter()
    th.start()
    while time.perf_counter() - t0 < seconds:
        app.processEvents()
        time.sleep(0.001)
    stop.set()
    th.join()
    dt = time.perf_counter() - t0
    results["pyqtgraph_live_stream"] = {
        "target_frames_per_s": live_hz, "frames_received": win.state.received["frame"] - rec0,
        "frames_drawn": len(drawn), "frames_drawn_per_s": round(len(drawn) / dt, 1),
        "paints_per_s": round((win.glw.paints - p0) / dt, 1), "messages_skipped": win.state.dropped,
        "seconds": round(dt, 2)}
    win.timer.stop()
    win.close()
    sub.close()
    pub.close()
    ctx.term()
    win.deleteLater()
    app.processEvents()
    return results


def bench_matplotlib_blit(frames, ests, seconds: float, backend: str) -> dict:
    import matplotlib

    matplotlib.use(backend)
    import matplotlib.pyplot as plt

    from maskrun.daemon.show.figures import INTENSITY_CMAP, PHASE_CMAP, log_counts, phase_for_display

    fig, axes = plt.subplots(2, 3, figsize=(15, 8.6), dpi=100, gridspec_kw={"height_ratios": [5, 2]})
    n0 = frames[0].shape
    ims = []
    for ax, cmap, lim in ((axes[0, 0], INTENSITY_CMAP, (0, 3.6)), (axes[0, 1], INTENSITY_CMAP, (0, 1)),
                          (axes[0, 2], PHASE_CMAP, (-np.pi, np.pi))):
        im = ax.imshow(np.zeros(n0, np.float32), cmap=cmap, vmin=lim[0], vmax=lim[1], interpolation="nearest",
                       animated=True)
        fig.colorbar(im, ax=ax)
        ax.set_xlabel("column (pixel)")
        ax.set_ylabel("row (pixel)")
        ims.append(im)
    for ax in axes[1, 1:]:
        ax.remove()
    (line,) = axes[1, 0].semilogy([1, 2], [0.01, 0.01], "o-", animated=True)
    axes[1, 0].set_xlim(0, 1000)
    axes[1, 0].set_ylim(1e-3, 1)
    if backend != "Agg":
        plt.show(block=False)
        plt.pause(0.2)
    canvas = fig.canvas
    canvas.draw()
    bg = canvas.copy_from_bbox(fig.bbox)
    bg_frame = canvas.copy_from_bbox(axes[0, 0].bbox)
    buf = np.empty(n0, np.float32)
    results = {}

    def run(label, with_estimate):
        n, t0 = 0, time.perf_counter()
        xs, ys = [], []
        while time.perf_counter() - t0 < seconds:
            k = n % len(frames)
            if not with_estimate:  # only the frame panel changes: restore, draw and blit just that panel
                canvas.restore_region(bg_frame)
                ims[0].set_data(log_counts(frames[k], out=buf))
                axes[0, 0].draw_artist(ims[0])
                canvas.blit(axes[0, 0].bbox)
                canvas.flush_events()
                n += 1
                continue
            canvas.restore_region(bg)
            ims[0].set_data(log_counts(frames[k], out=buf))
            axes[0, 0].draw_artist(ims[0])
            if with_estimate:
                e = ests[n % len(ests)]
                amp = np.abs(e)
                ims[1].set_data(amp)
                ims[1].set_clim(0, float(amp.max()))
                ims[2].set_data(phase_for_display(e))
                xs.append(n + 1)
                ys.append(0.01)
                line.set_data(xs, ys)
            for a, artist in ((axes[0, 1], ims[1]), (axes[0, 2], ims[2]), (axes[1, 0], line)):
                a.draw_artist(artist)
            canvas.blit(fig.bbox)
            canvas.flush_events()
            n += 1
        dt = time.perf_counter() - t0
        results[label] = {"updates": n, "seconds": round(dt, 2), "updates_per_s": round(n / dt, 1)}

    run(f"matplotlib_{backend}_blit_frame_and_estimate", True)
    run(f"matplotlib_{backend}_blit_frame_only", False)

    # what the view also needs on most estimates: new titles, a re-levelled colour bar, a rescaled error
    # plot. Blitting cannot redraw those (they are outside the animated artists): a full redraw.
    n, t0 = 0, time.perf_counter()
    while time.perf_counter() - t0 < seconds:
        k = n % len(frames)
        ims[0].set_data(log_counts(frames[k], out=buf))
        e = ests[n % len(ests)]
        amp = np.abs(e)
        ims[1].set_data(amp)
        ims[1].set_clim(0, float(amp.max()))
        ims[2].set_data(phase_for_display(e))
        axes[0, 0].set_title(f"camera frame: pass {n // 8 + 1}, mask {k + 1}")
        for im in ims:
            im.set_animated(False)
        canvas.draw()
        canvas.flush_events()
        n += 1
    dt = time.perf_counter() - t0
    results[f"matplotlib_{backend}_full_redraw_frame_and_estimate"] = {
        "updates": n, "seconds": round(dt, 2), "updates_per_s": round(n / dt, 1)}
    plt.close(fig)
    return results


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--size", type=int, default=512, help="frame and grid size in pixels (default 512)")
    ap.add_argument("--seconds", type=float, default=4.0, help="seconds per measurement (default 4)")
    ap.add_argument("--live-hz", type=float, default=TARGET_HZ,
                    help=f"frame rate of the live-stream measurement (default {TARGET_HZ:g})")
    ap.add_argument("--skip-mpl", action="store_true", help="measure only the chosen (pyqtgraph) view")
    ap.add_argument("--json", help="also write the figures to this JSON file")
    args = ap.parse_args(argv)
    if not os.environ.get("DISPLAY"):
        os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")
    frames, ests = make_data(args.size)
    res = {"size": args.size, "display": os.environ.get("DISPLAY") or os.environ.get("QT_QPA_PLATFORM"),
           "cpus": os.cpu_count()}
    res.update(bench_pyqtgraph(frames, ests, args.seconds, args.live_hz))
    if not args.skip_mpl:
        res.update(bench_matplotlib_blit(frames, ests, args.seconds, "QtAgg"))
        res.update(bench_matplotlib_blit(frames, ests, args.seconds, "Agg"))
    for k, v in res.items():
        print(f"{k:48s} {v}")
    if args.json:
        with open(args.json, "w") as f:
            json.dump(res, f, indent=1)
    sys.stdout.flush()
    os._exit(0)  # skip interpreter teardown of Qt objects (nothing left to flush)


if __name__ == "__main__":
    main()
