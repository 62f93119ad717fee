"""The run sequencer: a state machine that takes the bench through a run.

For each pass and each mask k: the modulator shows mask k and acknowledges,
the sequencer waits the settle time, the camera exposes, the frame comes back
with its frame id and time stamp; stale frames (id not advancing) are refused
and retaken; the frame is checked (saturation, photons), appended to the run
file and published; when all K frames of a pass are in, the frame set goes to
the reconstruction worker (never waiting for it) and estimates are stored and
published as they come back.

Safety: the interlock must read closed before the shutter opens; the shutter is
closed for dark frames, while paused, at the end, and on any fault
(``finally``). The sequencer runs in the calling thread; another thread steers
it through ``RunControl`` (pause, resume, stop).
"""

from __future__ import annotations

import enum
import threading
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable

import numpy as np

from maskrun.drivers import DeviceError, DeviceTimeout

from .bench import Bench
from .checks import CheckLimits, FrameIdTracker, check_frame, downsample_preview
from .recon_link import ReconLink
from .store import (
    FLAG_RETAKEN,
    FLAG_TIMEOUT_RETRIED,
    RunStore,
    estimate_info_record,
    flag_names,
    frame_info_record,
)
from .stream import Publisher


class State(str, enum.Enum):
    idle = "idle"
    preparing = "preparing"
    darks = "darks"
    acquiring = "acquiring"
    paused = "paused"
    finishing = "finishing"
    finished = "finished"
    stopped = "stopped"
    fault = "fault"


class RunAborted(RuntimeError):
    """The run ended early; the message says why. Frames taken so far are in the file."""


class InterlockOpen(RuntimeError):
    """The interlock reads open: the shutter may not open."""


@dataclass
class RunPlan:
    passes: int
    dark_frames: int
    exposure_s: float
    output_path: Path
    interval_s: float | None = None  # start a pass every interval_s (time series); None = back to back


class RunControl:
    """Thread-safe steering of a running sequencer."""

    def __init__(self):
        self._stop = threading.Event()
        self._resume = threading.Event()
        self._resume.set()
        self.stop_reason = ""
        self.pause_reason = ""

    def request_stop(self, reason: str = "stop requested") -> None:
        self.stop_reason = reason
        self._stop.set()
        self._resume.set()

    def request_pause(self, reason: str = "pause requested") -> None:
        self.pause_reason = reason
        self._resume.clear()

    def resume(self) -> None:
        self._resume.set()

    @property
    def stop_requested(self) -> bool:
        return self._stop.is_set()

    @property
    def pause_requested(self) -> bool:
        return not self._resume.is_set()

    def wait_resume(self, timeout_s: float) -> bool:
        return self._resume.wait(timeout_s)

    def sleep(self, seconds: float) -> None:
        """Sleep, waking early on a stop request."""
        self._stop.wait(seconds)


@dataclass
class RunSummary:
    state: State
    passes_complete: int
    frames: int
    darks: int
    rejected: int  # stale / failed attempts refused
    flagged: int
    saturated_frames: int
    photons_per_frame_mean: float
    photons_total: float
    estimates: int
    final_true_error: float
    final_error_estimate: float
    final_residual: float
    wall_s: float
    output_path: Path
    message: str = ""
    true_errors: list[float] = field(default_factory=list)


@dataclass
class Progress:
    """What observers (the demo's display, the daemon's status) see after each step."""

    state: State
    pass_index: int
    mask_index: int
    frames_done: int
    frames_total: int
    photons_last: float = 0.0
    saturated_last: float = 0.0
    photons_total: float = 0.0
    estimate_true_error: float = float("nan")
    estimate_error_estimate: float = float("nan")
    estimate_residual: float = float("nan")
    message: str = ""


class Sequencer:
    def __init__(
        self,
        bench: Bench,
        store: RunStore,
        publisher: Publisher | None,
        recon: ReconLink | None,
        plan: RunPlan,
        control: RunControl | None = None,
        observer: Callable[[Progress], None] | None = None,
    ):
        self.bench = bench
        self.store = store
        self.pub = publisher
        self.recon = recon
        self.plan = plan
        self.control = control or RunControl()
        self.observer = observer
        cfg = bench.config
        self.k = bench.masks.shape[0]
        self.limits = CheckLimits(
            max_dn=bench.camera.max_dn,
            saturation_level=cfg.checks.saturation_level,
            max_saturated_fraction=cfg.checks.max_saturated_fraction,
            min_photons_per_frame=cfg.checks.min_photons_per_frame,
            max_photons_per_frame=cfg.checks.max_photons_per_frame,
        )
        self.ids = FrameIdTracker()
        self.state = State.idle
        self.dark_dn: np.ndarray | float = bench.response.offset_dn
        self.timeout_retries = 3
        # running totals
        self.frames = self.darks = self.rejected = self.flagged = self.saturated = 0
        self.passes_complete = 0
        self.set_index = 0
        self.photons_total = 0.0
        self.estimates = 0
        self.true_errors: list[float] = []
        self.last_estimate = (float("nan"), float("nan"), float("nan"))  # true error, error estimate, residual
        self._progress = Progress(State.idle, -1, -1, 0, plan.passes * self.k)
        # one reusable frame-set buffer (K, H, W) float32, grid orientation
        self._set_buffer = np.zeros((self.k, *bench.grid_shape), dtype=np.float32)

    # --- events --------------------------------------------------------------
    def event(self, kind: str, message: str, level: str = "info") -> None:
        self.store.log(kind, message, level)
        if self.pub is not None:
            topic = "alert" if level in ("warning", "error") else "event"
            self.pub.publish(topic, {"kind": kind, "level": level, "message": message})
        self._progress.message = message

    def _set_state(self, state: State) -> None:
        self.state = state
        self._progress.state = state
        if self.pub is not None:
            self.pub.publish("status", self.status())
        self._notify()

    def _notify(self) -> None:
        if self.observer is not None:
            self.observer(self._progress)

    def status(self) -> dict:
        te, ee, res = self.last_estimate
        return {
            "state": self.state.value,
            "pass_index": self._progress.pass_index,
            "passes": self.plan.passes,
            "mask_index": self._progress.mask_index,
            "masks": self.k,
            "frames": self.frames,
            "frames_total": self.plan.passes * self.k,
            "darks": self.darks,
            "rejected": self.rejected,
            "photons_total": self.photons_total,
            "estimates": self.estimates,
            "true_error": te,
            "error_estimate": ee,
            "residual": res,
            "output_path": str(self.plan.output_path),
        }

    # --- the run ---------------------------------------------------------------
    def run(self) -> RunSummary:
        t0 = time.monotonic()
        message = ""
        final = State.finished
        cam = self.bench.camera
        try:
            self._set_state(State.preparing)
            cam.exposure_s = self.plan.exposure_s
            self.event("run_start", f"run start: {self.plan.passes} passes x {self.k} masks, exposure {self.plan.exposure_s:g} s")
            if self.plan.dark_frames:
                self._take_darks(self.plan.dark_frames)
            for p in range(self.plan.passes):
                t_pass = time.monotonic()
                self._take_pass(p)
                self._collect_estimates(0.0)
                if self.plan.interval_s and p + 1 < self.plan.passes:
                    self.bench.safety.close_shutter()
                    wait = self.plan.interval_s - (time.monotonic() - t_pass)
                    if wait > 0:
                        self.event("interval_wait", f"next pass in {wait:.1f} s (shutter closed)")
                        self.control.sleep(wait)
                if self.control.stop_requested:
                    raise RunAborted(self.control.stop_reason)
            self._set_state(State.finishing)
            self.bench.safety.close_shutter()
            self._collect_estimates(timeout_s=30.0, drain=True)
        except RunAborted as exc:
            final, message = State.stopped, str(exc)
        except InterlockOpen as exc:
            final, message = State.fault, str(exc)
        except DeviceError as exc:
            final, message = State.fault, str(exc)
        except Exception as exc:
            final, message = State.fault, f"{type(exc).__name__}: {exc}"
            raise
        finally:
            self._safe_state()
            if final == State.finished:
                self.event("run_end", f"run finished: {self.passes_complete} complete frame sets")
            else:
                level = "warning" if final == State.stopped else "error"
                self.event("run_end", f"run {final.value}: {message}; {self.passes_complete} complete frame sets kept", level)
            self.store.flush()
            self._set_state(final)
        return self._summary(final, message, time.monotonic() - t0)

    def _safe_state(self) -> None:
        try:
            self.bench.safety.close_shutter()
        except Exception as exc:
            self.store.log("shutter_fault", f"closing the shutter failed: {exc}", "error")

    def _open_shutter(self) -> None:
        if not self.bench.safety.interlock_closed():
            raise InterlockOpen(
                "interlock reads OPEN: the shutter stays closed. Close the enclosure/door interlock, "
                "then start or resume the run"
            )
        if not self.bench.safety.shutter_is_open():
            self.bench.safety.open_shutter()
            self.event("shutter", "shutter opened (interlock closed)")

    def _check_pause(self) -> None:
        if self.control.stop_requested:
            raise RunAborted(self.control.stop_reason)
        if self.control.pause_requested:
            self.bench.safety.close_shutter()
            self.event("paused", f"paused: {self.control.pause_reason}; shutter closed")
            self._set_state(State.paused)
            while not self.control.wait_resume(0.2):
                self._collect_estimates(0.0)
            if self.control.stop_requested:
                raise RunAborted(self.control.stop_reason)
            self.event("resumed", "resumed")
            self._set_state(State.acquiring)

    def _grab(self, timeout_s: float):
        """Trigger and grab one frame, retrying timeouts with backoff. Returns (frame, attempts, flags, t_request)."""
        cam = self.bench.camera
        flags = 0
        attempts = 0
        delay = 0.05
        while True:
            attempts += 1
            t_req = time.time()
            try:
                cam.trigger()
                frame = cam.grab(timeout_s)
            except DeviceTimeout as exc:
                if attempts > self.timeout_retries:
                    raise
                flags |= FLAG_TIMEOUT_RETRIED
                self.event("camera_timeout", f"attempt {attempts}: {exc.detail}; retrying in {delay:.2f} s", "warning")
                self.control.sleep(delay)
                delay *= 2
                continue
            kind = self.ids.classify(frame.frame_id)
            if kind == "stale":
                self.rejected += 1
                if attempts > self.bench.config.checks.stale_retakes:
                    raise DeviceError(
                        f"camera keeps delivering stale frames (id {frame.frame_id} did not advance) "
                        f"after {attempts} attempts",
                        device="camera",
                        hint="check the camera's trigger and frame buffer settings",
                    )
                flags |= FLAG_RETAKEN
                self.event("stale_frame", f"frame id {frame.frame_id} did not advance: refused and retaken", "warning")
                continue
            if kind == "gap":
                flags |= self.ids.flag_for(kind)
                self.event("frame_id_gap", f"camera frame id jumped to {frame.frame_id}: the camera dropped a frame", "warning")
            return frame, attempts, flags, t_req

    def _take_darks(self, count: int) -> None:
        self._set_state(State.darks)
        self.bench.safety.close_shutter()
        timeout = self.plan.exposure_s + self.bench.config.camera.grab_timeout_s
        acc = np.zeros(self.bench.grid_shape, dtype=np.float64)
        for i in range(count):
            self._check_pause()
            frame, attempts, flags, t_req = self._grab(timeout)
            self.store.append_dark(
                frame.pixels,
                frame_info_record(
                    pass_index=-1, set_index=-1, mask_index=-1, frame_id=frame.frame_id, t_request_s=t_req,
                    t_frame_s=frame.timestamp_s, exposure_s=frame.exposure_s, peak_dn=int(frame.pixels.max()),
                    flags=flags, attempts=attempts,
                ),
            )
            acc += frame.pixels
            self.darks += 1
        self.dark_dn = (acc / count).astype(np.float32)
        self.store.flush()
        self.event("darks", f"{count} dark frames taken, mean level {float(self.dark_dn.mean()):.1f} DN")

    def _take_pass(self, p: int) -> None:
        self._check_pause()
        self._open_shutter()
        self._set_state(State.acquiring)
        self._progress.pass_index = p
        cam = self.bench.camera
        mod = self.bench.modulator
        resp = self.bench.response
        timeout = self.plan.exposure_s + self.bench.config.camera.grab_timeout_s
        set_index = self.set_index
        self.set_index += 1
        exposure_used = self.plan.exposure_s
        for k in range(self.k):
            self._check_pause()
            if not self.bench.safety.interlock_closed():
                self.bench.safety.close_shutter()
                raise InterlockOpen("interlock opened during the pass: shutter closed, run stopped safely")
            mod.show(k)
            if mod.settle_s > 0:
                time.sleep(mod.settle_s)
            frame, attempts, flags, t_req = self._grab(timeout)
            chk = check_frame(frame.pixels, self.dark_dn, resp, self.limits)
            flags |= chk.flags
            exposure_used = frame.exposure_s
            idx = self.store.append_frame(
                frame.pixels,
                frame_info_record(
                    pass_index=p, set_index=set_index, mask_index=k, frame_id=frame.frame_id, t_request_s=t_req,
                    t_frame_s=frame.timestamp_s, exposure_s=frame.exposure_s,
                    saturated_fraction=chk.saturated_fraction, peak_dn=chk.peak_dn, photons=chk.photons,
                    flags=flags, attempts=attempts,
                ),
            )
            self.store.flush()
            self.frames += 1
            self.photons_total += max(chk.photons, 0.0)
            if flags:
                self.flagged += 1
            if chk.saturated_fraction > self.limits.max_saturated_fraction:
                self.saturated += 1
            if chk.problems:
                self.event("check", f"pass {p} mask {k}: " + "; ".join(chk.problems), "warning")
            # frame set buffer: dark-subtracted electrons, zero frequency moved to [0, 0]
            self._set_buffer[k] = np.fft.ifftshift(resp.electrons(frame.pixels, self.dark_dn))
            if self.pub is not None:
                meta = {"pass_index": p, "mask_index": k, "frame_index": idx, "frame_id": frame.frame_id,
                        "exposure_s": frame.exposure_s, "saturated_fraction": chk.saturated_fraction,
                        "peak_dn": chk.peak_dn, "photons": chk.photons, "flags": flag_names(flags),
                        "max_dn": self.limits.max_dn}
                self.pub.publish("frame", meta, frame.pixels)
                self.pub.publish("preview", meta, downsample_preview(frame.pixels))
                self.pub.publish("check", {**meta, "problems": chk.problems})
            pr = self._progress
            pr.mask_index, pr.frames_done = k, self.frames
            pr.photons_last, pr.saturated_last, pr.photons_total = chk.photons, chk.saturated_fraction, self.photons_total
            self._notify()
            self._collect_estimates(0.0)
        self.passes_complete += 1
        if self.pub is not None:
            self.pub.publish("frameset", {"pass_index": p, "set_index": set_index, "frames": self.k,
                                          "photons_total": self.photons_total})
        if self.recon is not None:
            intens = np.maximum(self._set_buffer, 0.0)  # a copy: the buffer is reused for the next pass
            if not self.recon.submit(p, intens, exposure_used, resp.quantum_efficiency):
                self.event("recon_behind", f"reconstruction is behind: frame set {p} skipped for the live estimate "
                           "(it is in the run file)", "warning")

    def _collect_estimates(self, timeout_s: float, drain: bool = False) -> None:
        if self.recon is None:
            return
        got = self.recon.drain(timeout_s) if drain else self.recon.poll(timeout_s)
        if drain and self.recon.outstanding:
            self.event("recon_incomplete", f"no estimate arrived for frame sets {sorted(self.recon.outstanding)}", "warning")
        from maskrun.reconstruct import relative_error

        for hdr, est in got:
            true_err = float("nan")
            if self.bench.truth is not None:
                true_err = float(relative_error(self.bench.truth, est.astype(np.complex128)))
                self.true_errors.append(true_err)
            self.store.append_estimate(
                est,
                estimate_info_record(
                    pass_index=hdr.pass_index, passes_used=hdr.passes_used, residual=hdr.residual,
                    error_estimate=hdr.error_estimate, true_error=true_err, iterations=hdr.iterations,
                    photons=hdr.photons, elapsed_s=hdr.elapsed_s, t_s=time.time(),
                ),
            )
            self.store.flush()
            self.estimates += 1
            self.last_estimate = (true_err, hdr.error_estimate, hdr.residual)
            pr = self._progress
            pr.estimate_true_error, pr.estimate_error_estimate, pr.estimate_residual = self.last_estimate
            if self.pub is not None:
                self.pub.publish("estimate", {"pass_index": hdr.pass_index, "passes_used": hdr.passes_used,
                                              "residual": hdr.residual, "error_estimate": hdr.error_estimate,
                                              "true_error": true_err, "iterations": hdr.iterations,
                                              "units": "sqrt(incident photons per second)"}, est)
            self._notify()

    def _summary(self, state: State, message: str, wall_s: float) -> RunSummary:
        te, ee, res = self.last_estimate
        return RunSummary(
            state=state,
            passes_complete=self.passes_complete,
            frames=self.frames,
            darks=self.darks,
            rejected=self.rejected,
            flagged=self.flagged,
            saturated_frames=self.saturated,
            photons_per_frame_mean=self.photons_total / self.frames if self.frames else 0.0,
            photons_total=self.photons_total,
            estimates=self.estimates,
            final_true_error=te,
            final_error_estimate=ee,
            final_residual=res,
            wall_s=wall_s,
            output_path=self.plan.output_path,
            message=message,
            true_errors=list(self.true_errors),
        )
