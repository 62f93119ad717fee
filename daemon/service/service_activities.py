"""The service's activities: the requests that start, steer and end a run, dark frames and align mode,
and the activity threads they start (see the threads in ``service``).

A mixin of ``service.Service``: it uses the service's state (bench, publisher, recon link, state)."""

from __future__ import annotations

import dataclasses
import threading
import time
import traceback
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from maskrun.daemon.service import control as C
from maskrun.daemon.acquire.align import AlignLoop, AlignSettings
from maskrun.daemon.config import ConfigError
from maskrun.daemon.record.run_state import state_from_file
from maskrun.daemon.acquire.sequencer import Progress, RunControl, RunPlan, RunSummary

RUN_STATES = ("preparing", "darks", "acquiring", "paused", "finishing")


@dataclass
class _RunActivity:
    thread: threading.Thread
    control: RunControl
    plan: RunPlan
    t_start: float
    progress: dict
    summary: RunSummary | None = None
    last: Progress | None = None  # the sequencer's latest progress
    error: str = ""


class Refused(Exception):
    """A request that is valid but not allowed now; the message says why and what to do."""


class ServiceActivities:
    """Run, dark-frame and align requests and their threads (mixed into ``Service``)."""

    def _do_start(self, req: C.StartRequest) -> dict:
        self._require_idle("start a run")
        self._require_safe_to_open("start a run")
        cfg = self.cfg
        from maskrun.daemon.acquire.foreground import RunRequest, check_output_folder, output_path_for

        if req.output_path:
            out = Path(req.output_path).expanduser()
            if out.suffix not in (".h5", ".hdf5"):
                raise Refused(f"output_path {out} must end in .h5 (an HDF5 run file)")
        else:
            out = output_path_for(cfg, RunRequest(output_dir=req.output_dir, name=req.name))
        if out.exists():
            raise Refused(f"{out} already exists; give another output_path (run files are never overwritten)")
        try:
            check_output_folder(out)
        except OSError as exc:
            raise Refused(str(exc)) from None
        plan = RunPlan(passes=req.passes or cfg.run.passes,
                       dark_frames=cfg.run.dark_frames if req.dark_frames is None else req.dark_frames,
                       exposure_s=req.exposure_s or self.exposure_s, output_path=out, interval_s=req.interval_s)
        from maskrun.daemon.acquire.disk import DiskSpaceError
        from maskrun.daemon.acquire.session import plan_run_disk

        try:
            plan_run_disk(self.bench, plan)  # refuse up front a run the disk cannot hold; nothing is written
        except DiskSpaceError as exc:
            raise Refused(str(exc)) from None
        self._check_watchdog(plan.exposure_s)
        if self.recon is not None and not self.recon.worker_alive():
            # the local reconstruction worker died since the last run: start a fresh one
            self.log("reconstruction worker had exited; starting a new one")
            self.recon.close()
            from maskrun.daemon.acquire.session import make_recon_link

            self.recon = make_recon_link(self.bench, self.ctx)
        control = RunControl()
        control.resume_hint = "'maskrun resume' (the service's 'resume' request)"
        k = self.bench.masks.shape[0]
        progress = {"state": "preparing", "pass_index": -1, "mask_index": -1, "frames_done": 0,
                    "frames_total": plan.passes * k, "photons_last": 0.0, "saturated_last": 0.0, "photons_total": 0.0,
                    "true_error": None, "error_estimate": None, "residual": None, "message": "",
                    "fps": 0.0, "eta_s": None, "elapsed_s": 0.0}
        act = _RunActivity(threading.Thread(target=self._run_thread, name="run", daemon=True), control, plan,
                           time.monotonic(), progress)
        self.pub.alerts.clear()  # a new run: the last run's alerts are in its outcome (last_run.warnings)
        self._run = act
        self.state = "preparing"
        self.runs_started += 1
        act.thread.start()
        return {"output_path": str(out), "passes": plan.passes, "dark_frames": plan.dark_frames,
                "exposure_s": plan.exposure_s, "frames_total": plan.passes * k}

    def _run_thread(self) -> None:
        act = self._run
        name = act.plan.output_path.stem
        first_frame_t: list[float] = []

        def observer(p: Progress) -> None:
            now = time.monotonic()
            pr = act.progress
            if p.frames_done and not first_frame_t:
                first_frame_t[:] = [now, p.frames_done]
            fps = 0.0
            if first_frame_t and p.frames_done > first_frame_t[1]:
                fps = (p.frames_done - first_frame_t[1]) / max(now - first_frame_t[0], 1e-9)
            remaining = p.frames_total - p.frames_done
            pr.update(state=p.state.value, pass_index=p.pass_index, mask_index=p.mask_index,
                      frames_done=p.frames_done, frames_total=p.frames_total, photons_last=p.photons_last,
                      saturated_last=p.saturated_last, photons_total=p.photons_total,
                      true_error=p.estimate_true_error, error_estimate=p.estimate_error_estimate,
                      residual=p.estimate_residual, message=p.message, fps=fps,
                      eta_s=(remaining / fps) if fps > 0 else None, elapsed_s=now - act.t_start)
            act.last = dataclasses.replace(p)
            if p.state.value in RUN_STATES:
                self.state = p.state.value

        from maskrun.daemon.acquire.session import execute_run

        try:
            act.summary = execute_run(self.bench, act.plan, self.ack, publisher=self.pub, zmq_context=self.ctx,
                                      control=act.control, observer=observer, run_name=name, recon=self.recon)
        except Exception as exc:
            act.error = f"{type(exc).__name__}: {exc}"
            self.log(f"run failed: {traceback.format_exc()}")
            self.pub.publish("alert", {"kind": "run_failed", "level": "error", "message": act.error})
        finally:
            s = act.summary
            photons = s.photons_total if s else act.progress["photons_total"]
            self.photons_lifetime += photons
            try:
                told = state_from_file(act.plan.output_path).to_dict()  # the file's account (run_state)
            except Exception as exc:  # no file (refused before creation) or unreadable
                told = {"outcome": f"Fault: {act.error or exc}"}
            self.pub.alerts.clear()  # the run's alerts are in its outcome now
            self.last_run = {
                **told,
                "state": s.state.value if s else "fault",
                "message": (s.message if s else act.error),
                "output_path": str(act.plan.output_path),
                "frames": s.frames if s else act.progress["frames_done"],
                "darks": s.darks if s else 0,
                "passes_complete": s.passes_complete if s else 0,
                "estimates": s.estimates if s else 0,
                "photons_total": photons,
                "final_true_error": s.final_true_error if s else None,
                "final_error_estimate": s.final_error_estimate if s else None,
                "wall_s": s.wall_s if s else time.monotonic() - act.t_start,
            }
            self.state = "idle"

    def _do_pause(self, req: C.PauseRequest) -> dict:
        if self.state not in ("preparing", "darks", "acquiring", "finishing"):
            raise Refused(f"nothing to pause: the service is {self.state} (pause applies to a running run)")
        self._run.control.request_pause(req.reason)
        return {"pausing": True, "note": "the run pauses before its next frame; the shutter closes while paused"}

    def _do_resume(self, req: C.ResumeRequest) -> dict:
        if self.state != "paused":
            if self._run is not None and self._run.control.pause_requested and self.state in RUN_STATES:
                self._run.control.resume()  # a pause not yet reached: cancel it
                return {"resumed": True}
            raise Refused(f"nothing to resume: the service is {self.state} (resume applies to a paused run)")
        if self.bench.optics is not None and not self.bench.optics.interlock_closed:
            raise Refused("cannot resume: the interlock reads OPEN; close the enclosure/door interlock first")
        self._run.control.resume()
        return {"resumed": True}

    def _do_stop(self, req: C.StopRequest) -> dict:
        if self.state in RUN_STATES:
            self._run.control.request_stop(req.reason)
            return {"stopping": "run", "output_path": str(self._run.plan.output_path)}
        if self.state == "align":
            self._align.stop(req.reason, timeout_s=0)  # the loop ends after its current frame
            return {"stopping": "align"}
        raise Refused(f"nothing to stop: the service is {self.state}")

    def _do_set_exposure(self, req: C.SetExposureRequest) -> dict:
        if self.state in RUN_STATES:
            raise Refused(f"the exposure is fixed for a run (the service is {self.state}); "
                          "give exposure_s with 'start', or stop the run first")
        if self.state == "taking_darks":
            raise Refused("cannot change the exposure while dark frames are being taken; wait for them to finish")
        self._check_watchdog(req.exposure_s)
        self.exposure_s = req.exposure_s
        if self.state == "align":
            self._align.set_exposure(req.exposure_s)
        return {"exposure_s": self.exposure_s}

    def _check_watchdog(self, exposure_s: float) -> None:
        """Refuse an exposure the camera cannot take (its own limits, bench.check_exposure) or that the
        safety box's watchdog would cut short (bench.check_watchdog)."""
        from maskrun.daemon.acquire.bench import check_exposure, check_watchdog

        try:
            check_exposure(self.bench, exposure_s, "exposure_s")
            check_watchdog(self.bench, exposure_s)
        except ConfigError as exc:
            raise Refused(str(exc)) from None

    def _do_take_darks(self, req: C.TakeDarksRequest) -> dict:
        self._require_idle("take dark frames")
        self.state = "taking_darks"
        self._darks_thread = threading.Thread(target=self._darks, args=(req.count,), name="darks", daemon=True)
        self._darks_thread.start()
        return {"count": req.count, "exposure_s": self.exposure_s,
                "note": "the shutter stays closed; 'status' shows the dark level when done"}

    def _darks(self, count: int) -> None:
        bench = self.bench
        cam = bench.camera
        try:
            bench.safety.close_shutter()
            cam.exposure_s = self.exposure_s
            acc = np.zeros(bench.grid_shape, dtype=np.float64)
            last_id = None
            taken = 0
            while taken < count:
                cam.trigger()
                frame = cam.grab(self.exposure_s + self.cfg.camera.grab_timeout_s)
                if last_id is not None and frame.frame_id <= last_id:
                    continue  # stale: take another
                last_id = frame.frame_id
                acc += frame.pixels
                taken += 1
                self.pub.publish("frame", {"mode": "dark", "index": taken - 1, "frame_id": frame.frame_id,
                                           "exposure_s": frame.exposure_s}, frame.pixels)
            mean = (acc / count).astype(np.float32)
            self.dark_dn = mean
            self.darks_info = {"count": count, "exposure_s": self.exposure_s, "mean_dn": float(mean.mean()),
                               "std_dn": float(mean.std()), "t_s": time.time(), "error": ""}
            self.pub.publish("event", {"kind": "darks", "level": "info",
                                       "message": f"{count} dark frames, mean level {float(mean.mean()):.1f} DN"})
        except Exception as exc:
            self.darks_info = {"count": 0, "error": f"{type(exc).__name__}: {exc}", "t_s": time.time()}
            self.pub.publish("alert", {"kind": "darks_failed", "level": "error", "message": self.darks_info["error"]})
        finally:
            try:
                bench.safety.close_shutter()
            finally:
                self.state = "idle"

    def _do_align_start(self, req: C.AlignStartRequest) -> dict:
        self._require_idle("start align mode")
        self._require_safe_to_open("start align mode")
        if req.exposure_s is not None:
            self._check_watchdog(req.exposure_s)
            self.exposure_s = req.exposure_s
        k = self.bench.masks.shape[0]
        if req.mask is not None and req.mask >= k:
            raise Refused(f"mask {req.mask} does not exist: masks are numbered 0..{k - 1}")
        settings = AlignSettings(mask=req.mask, exposure_s=self.exposure_s, iterations=req.iterations)

        def on_end(reason: str, failed: bool) -> None:
            self.state = "idle"

        self._align = AlignLoop(self.bench, self.pub, settings, self.dark_dn, self.cfg.checks.saturation_level,
                                on_end=on_end)
        self.state = "align"
        self._align.start()
        return {"mask": req.mask, "cycling": req.mask is None, "exposure_s": self.exposure_s,
                "reconstruction": "follow mode, window 1" if req.mask is None else
                "none (one mask does not determine the phase; omit 'mask' to cycle)"}

    def _do_align_stop(self, req: C.AlignStopRequest) -> dict:
        if self.state != "align":
            raise Refused(f"align mode is not on (the service is {self.state})")
        self._align.stop("align mode stopped by request", timeout_s=0)
        return {"stopping": "align"}
