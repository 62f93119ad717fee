"""Align mode: free-running frames for adjusting the bench, with a live follow-mode reconstruction.

``AlignLoop`` runs in its own thread on an open bench (owned by the service):

- the shutter opens only while the interlock reads closed (checked before every
  frame; an open interlock closes the shutter and ends align mode with the reason);
- frames are taken back to back at the camera's best rate, with one mask held
  (``mask=k``) or all masks shown in turn (``mask=None``);
- every frame is published: ``frame`` (full), ``preview`` (block mean, with the
  saturated preview pixels listed in the header) and ``check`` (peak, centroid,
  total counts, saturated fraction); ``meta["mode"] == "align"`` on all of them;
- when masks cycle, each complete cycle is a frame set that goes to a follow-mode
  ``IncrementalEngine`` (window 1, a small iteration budget) in a second thread;
  only the newest waiting frame set is kept (older ones are dropped: the image must
  follow the user's adjustments, not lag behind them). Estimates are published on
  ``estimate`` with ``meta["mode"] == "align"``. With one mask held there is no
  phase estimate: one diffraction pattern does not determine the phase.

Nothing is written to a run file in align mode. Any fault closes the shutter.
"""

from __future__ import annotations

import threading
import time
from dataclasses import dataclass, field
from typing import Callable

import numpy as np

from maskrun.drivers import DeviceError, DeviceTimeout

from maskrun.daemon.record.checks import FrameIdTracker, downsample_preview
from maskrun.daemon.record.stream import Publisher

MAX_SATURATED_LISTED = 2000  # saturated preview pixels listed in one header (keeps headers well under 64 KiB)


@dataclass
class FrameStats:
    """Figures of one frame for aligning. Counts are dark-subtracted DN (negative values clipped to 0)."""

    peak_dn: int
    total_counts_dn: float
    centroid_rc: tuple[float, float]  # (row, col) in frame pixels, NaN if the frame is dark
    saturated_fraction: float
    saturated_pixels: int

    def to_dict(self) -> dict:
        return {"peak_dn": self.peak_dn, "total_counts_dn": self.total_counts_dn,
                "centroid_rc": list(self.centroid_rc), "saturated_fraction": self.saturated_fraction,
                "saturated_pixels": self.saturated_pixels}


def frame_stats(pixels: np.ndarray, dark_dn: np.ndarray | float, saturation_dn: float) -> FrameStats:
    """Peak, intensity-weighted centroid, total counts and saturation of one frame (vectorised)."""
    signal = np.subtract(pixels, dark_dn, dtype=np.float32)
    np.maximum(signal, 0.0, out=signal)
    total = float(signal.sum(dtype=np.float64))
    if total > 0:
        rows = signal.sum(axis=1, dtype=np.float64)
        cols = signal.sum(axis=0, dtype=np.float64)
        centroid = (float(rows @ np.arange(rows.size)) / total, float(cols @ np.arange(cols.size)) / total)
    else:
        centroid = (float("nan"), float("nan"))
    saturated = int(np.count_nonzero(pixels >= saturation_dn))
    return FrameStats(int(pixels.max()), total, centroid, saturated / pixels.size, saturated)


def saturated_preview_pixels(pixels: np.ndarray, saturation_dn: float, max_side: int = 128) -> list[list[int]]:
    """[row, col] of the preview pixels (same blocks as ``downsample_preview``) holding a saturated pixel."""
    rows, cols = pixels.shape
    f = max(1, int(np.ceil(max(rows, cols) / max_side)))
    r, c = rows // f * f, cols // f * f
    sat = pixels[:r, :c] >= saturation_dn
    if f > 1:
        sat = sat.reshape(r // f, f, c // f, f).any(axis=(1, 3))
    idx = np.argwhere(sat)[:MAX_SATURATED_LISTED]
    return idx.tolist()


@dataclass
class AlignSettings:
    mask: int | None  # None: cycle through all masks
    exposure_s: float
    iterations: int = 30
    time_budget_s: float = 0.5


@dataclass
class AlignFigures:
    """What status reports about align mode (written by the align threads, read by the control thread)."""

    frames: int = 0
    fps: float = 0.0
    mask_index: int = -1
    cycling: bool = True
    exposure_s: float = 0.0
    stats: dict = field(default_factory=dict)
    estimates: int = 0
    frame_sets_dropped: int = 0
    residual: float = float("nan")
    error_estimate: float = float("nan")
    true_error: float = float("nan")
    message: str = ""

    def to_dict(self) -> dict:
        return {"frames": self.frames, "fps": self.fps, "mask_index": self.mask_index, "cycling": self.cycling,
                "exposure_s": self.exposure_s, **self.stats, "estimates": self.estimates,
                "frame_sets_dropped": self.frame_sets_dropped, "residual": self.residual,
                "error_estimate": self.error_estimate, "true_error": self.true_error, "message": self.message}


class _FollowReconstructor:
    """Follow-mode reconstruction in its own thread; keeps only the newest waiting frame set."""

    def __init__(self, masks: np.ndarray, iterations: int, time_budget_s: float, publisher: Publisher,
                 figures: AlignFigures, truth_fn: Callable[[], np.ndarray | None]):
        from maskrun.reconstruct import IncrementalEngine

        self.engine = IncrementalEngine(masks.astype(np.complex64), mode="follow", window=1,
                                        iterations_per_update=iterations, time_budget_s=time_budget_s,
                                        dtype=np.complex64)
        self.pub = publisher
        self.fig = figures
        self.truth_fn = truth_fn
        self._cond = threading.Condition()
        self._waiting: tuple | None = None
        self._stop = False
        self._thread = threading.Thread(target=self._run, name="align-reconstruction", daemon=True)
        self._thread.start()

    def submit(self, set_index: int, intensities: np.ndarray, scale: float) -> None:
        with self._cond:
            if self._waiting is not None:
                self.fig.frame_sets_dropped += 1
            self._waiting = (set_index, intensities, scale)
            self._cond.notify()

    def stop(self) -> None:
        with self._cond:
            self._stop = True
            self._cond.notify()
        self._thread.join(timeout=10)

    def _run(self) -> None:
        from maskrun.reconstruct import relative_error

        while True:
            with self._cond:
                self._cond.wait_for(lambda: self._stop or self._waiting is not None)
                if self._stop:
                    return
                set_index, intensities, scale = self._waiting
                self._waiting = None
            try:
                upd = self.engine.update(np.maximum(intensities, 0.0))
            except Exception as exc:  # a bad set (e.g. all dark) must not end align mode
                self.fig.message = f"reconstruction skipped a frame set: {exc}"
                self.engine.reset()
                continue
            est = (upd.estimate * np.float32(scale)).astype(np.complex64)
            truth = self.truth_fn()
            true_err = float(relative_error(truth, est.astype(np.complex128))) if truth is not None else float("nan")
            fig = self.fig
            fig.estimates += 1
            fig.residual, fig.error_estimate, fig.true_error = float(upd.residual), float(upd.error_estimate), true_err
            self.pub.publish("estimate", {"mode": "align", "set_index": set_index, "passes_used": upd.passes_used,
                                          "residual": upd.residual, "error_estimate": upd.error_estimate,
                                          "true_error": true_err, "iterations": upd.iterations,
                                          "elapsed_s": upd.elapsed_s,
                                          "units": "sqrt(incident photons per second)"}, est)


class AlignLoop:
    """Align mode on an open bench. ``start()``; ``stop(reason)`` joins; ``error`` holds why it ended early.

    bench: the service's open Bench (only this loop touches the devices while it runs).
    publisher: the service's stream. dark_dn: dark level (mean dark frame or offset) in DN.
    on_end(reason, failed): called from the loop thread when the loop ends by itself.
    """

    def __init__(self, bench, publisher: Publisher, settings: AlignSettings, dark_dn: np.ndarray | float,
                 saturation_level: float, on_end: Callable[[str, bool], None] | None = None):
        k = bench.masks.shape[0]
        if settings.mask is not None and not 0 <= settings.mask < k:
            raise ValueError(f"mask {settings.mask} does not exist: masks are numbered 0..{k - 1}")
        self.bench = bench
        self.pub = publisher
        self.settings = settings
        self.dark_dn = dark_dn
        self.saturation_dn = saturation_level * bench.camera.max_dn
        self.on_end = on_end
        self.figures = AlignFigures(cycling=settings.mask is None, exposure_s=settings.exposure_s)
        self.error = ""
        self.interlock_closed: bool | None = None
        self.shutter_open = False
        self._stop = threading.Event()
        self._stop_reason = ""
        self._pending_exposure: float | None = None
        self._thread: threading.Thread | None = None

    # --- control (any thread) ---------------------------------------------------
    def start(self) -> None:
        self._thread = threading.Thread(target=self._run, name="align", daemon=True)
        self._thread.start()

    def stop(self, reason: str = "align mode stopped", timeout_s: float = 10.0) -> None:
        self._stop_reason = reason
        self._stop.set()
        if self._thread is not None and self._thread is not threading.current_thread():
            self._thread.join(timeout_s)

    def set_exposure(self, exposure_s: float) -> None:
        """Applied between frames (the current cycle restarts, so a frame set never mixes exposures)."""
        self._pending_exposure = float(exposure_s)

    @property
    def running(self) -> bool:
        return self._thread is not None and self._thread.is_alive()

    # --- the loop (own thread) -------------------------------------------------------
    def _event(self, kind: str, message: str, level: str = "info") -> None:
        self.pub.publish("alert" if level in ("warning", "error") else "event",
                         {"kind": kind, "level": level, "message": message, "mode": "align"})

    def _run(self) -> None:
        bench = self.bench
        cam, mod, safety = bench.camera, bench.modulator, bench.safety
        k_total = bench.masks.shape[0]
        cycling = self.settings.mask is None
        recon = None
        failed = False
        reason = ""
        try:
            cam.exposure_s = self.settings.exposure_s
            if cycling:
                truth_fn = (lambda: bench.optics.truth_field()) if bench.optics is not None else (lambda: None)
                recon = _FollowReconstructor(bench.masks, self.settings.iterations, self.settings.time_budget_s,
                                             self.pub, self.figures, truth_fn)
            else:
                mod.show(self.settings.mask)
                if mod.settle_s > 0:
                    time.sleep(mod.settle_s)
            if not safety.interlock_closed():
                raise _InterlockOpen("interlock reads OPEN: the shutter stays closed; close the interlock and "
                                     "start align mode again")
            safety.open_shutter()
            self.shutter_open = True
            self.interlock_closed = True
            self._event("align_start", f"align mode: {'cycling all masks' if cycling else f'mask {self.settings.mask}'},"
                        f" exposure {self.settings.exposure_s:g} s, shutter open")
            self._loop(cam, mod, safety, k_total, cycling, recon)
            reason = self._stop_reason or "align mode stopped"
        except _InterlockOpen as exc:
            failed, reason = True, str(exc)
        except DeviceError as exc:
            failed, reason = True, f"device fault in align mode: {exc}"
        except Exception as exc:
            failed, reason = True, f"align mode failed: {type(exc).__name__}: {exc}"
        finally:
            try:
                safety.close_shutter()
                self.shutter_open = False
            except Exception as exc:
                failed, reason = True, f"{reason}; closing the shutter FAILED: {exc}"
            if recon is not None:
                recon.stop()
            self.error = reason if failed else ""
            self.figures.message = reason
            self._event("align_end", f"{reason}; shutter closed", "error" if failed else "info")
            if self.on_end is not None:
                self.on_end(reason, failed)

    def _loop(self, cam, mod, safety, k_total: int, cycling: bool, recon) -> None:
        bench = self.bench
        fig = self.figures
        ids = FrameIdTracker()
        grid = bench.grid_shape
        set_buffer = np.zeros((k_total, *grid), dtype=np.float32)
        resp = bench.response
        k = 0
        set_index = 0
        timeouts = 0
        t_rate, n_rate = time.monotonic(), 0
        while not self._stop.is_set():
            if self._pending_exposure is not None:
                exposure, self._pending_exposure = self._pending_exposure, None
                cam.exposure_s = exposure
                fig.exposure_s = exposure
                k = 0  # restart the cycle: a frame set never mixes exposures
                self._event("exposure", f"align exposure set to {exposure:g} s")
            if not safety.interlock_closed():
                self.interlock_closed = False
                safety.close_shutter()
                self.shutter_open = False
                raise _InterlockOpen("interlock opened during align mode: shutter closed, align mode ended")
            mask = k if cycling else self.settings.mask
            if cycling:
                mod.show(mask)
                if mod.settle_s > 0:
                    time.sleep(mod.settle_s)
            try:
                cam.trigger()
                frame = cam.grab(cam.exposure_s + bench.config.camera.grab_timeout_s)
            except DeviceTimeout as exc:
                timeouts += 1
                if timeouts > 3:
                    raise
                self._event("camera_timeout", f"align: {exc}; retrying", "warning")
                continue
            timeouts = 0
            if ids.classify(frame.frame_id) == "stale":
                continue
            pixels = frame.pixels
            st = frame_stats(pixels, self.dark_dn, self.saturation_dn)
            fig.frames += 1
            n_rate += 1
            now = time.monotonic()
            if now - t_rate >= 0.5:
                fig.fps = n_rate / (now - t_rate)
                t_rate, n_rate = now, 0
            fig.mask_index = mask
            fig.stats = st.to_dict()
            meta = {"mode": "align", "mask_index": mask, "frame_id": frame.frame_id, "exposure_s": frame.exposure_s,
                    "max_dn": bench.camera.max_dn, "saturation_dn": self.saturation_dn, **st.to_dict()}
            self.pub.publish("frame", meta, pixels)
            self.pub.publish("preview", {**meta, "saturated_preview": saturated_preview_pixels(pixels, self.saturation_dn)},
                             downsample_preview(pixels))
            self.pub.publish("check", {**meta, "fps": fig.fps})
            if cycling:
                set_buffer[mask] = np.fft.ifftshift(resp.electrons(pixels, self.dark_dn, getattr(bench, "flat_field", None)))
                k += 1
                if k == k_total:
                    k = 0
                    scale = 1.0 / float(np.sqrt(resp.quantum_efficiency * frame.exposure_s))
                    recon.submit(set_index, set_buffer.copy(), scale)
                    self.pub.publish("frameset", {"mode": "align", "set_index": set_index, "frames": k_total})
                    set_index += 1


class _InterlockOpen(RuntimeError):
    pass
