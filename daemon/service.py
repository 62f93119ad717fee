"""The long-running daemon (`maskrun serve CONFIG`): owns the bench, answers control requests, streams.

Threads
-------
- control thread (the one that calls ``serve_forever``): the only user of the
  control socket. It polls for requests, validates and answers each at once
  (nothing it does waits on a device while an activity runs), publishes the
  service status every ``[service] status_interval_s``, and starts/joins the
  activity threads. While idle it also reads the interlock/shutter state.
- one activity thread at a time, which alone touches the devices while it runs:
  ``run`` (``session.execute_run`` driven by a ``RunControl``; progress arrives
  through the observer callback), ``align`` (``align.AlignLoop``, plus its
  reconstruction thread) or ``darks`` (dark frames, shutter closed).
- ZeroMQ's own I/O threads; the CURVE authenticator thread when keys are configured.
- the reconstruction worker process (``ReconLink``), started once and kept between runs.

Sockets
-------
- control: ROUTER (``control.control_socket``; clients use REQ), bound to ``[service] control_address``
  (loopback unless CURVE keys are configured, see ``security``), ``MAXMSGSIZE`` = ``HARD_MAX_REQUEST_BYTES``;
  requests above ``max_request_bytes`` (but below the hard limit) get an error reply. Every reply is
  addressed to the peer identity its request came with; junk connections cannot shift it.
- stream: PUB (``ServicePublisher``), ``[service] publish_address``, send high-water
  mark ``[stream] preview_hwm``: a slow subscriber loses messages, acquisition never waits.
- reconstruction: PUSH/PULL on loopback to the worker (``recon_link``).

States (``state`` in every reply): idle, preparing, darks, acquiring, paused, finishing
(a run; from the sequencer), align, taking_darks, shutting_down.
"""

from __future__ import annotations

import collections
import dataclasses
import json
import os
import threading
import time
import traceback
from dataclasses import dataclass
from pathlib import Path
from typing import Callable

import numpy as np
import zmq

from maskrun.drivers import DeviceError

from . import control as C
from .align import AlignLoop, AlignSettings
from .bench import Bench, build_bench
from .config import BenchConfig, ConfigError
from .safety import Acknowledgement, make_acknowledgement, notice_lines
from .security import (
    ServerKeys,
    apply_server_keys,
    check_control_binding,
    check_stream_binding,
    connect_host_for,
    is_loopback_address,
    load_server_keys,
    start_authenticator,
)
from .run_state import AlertBook, live_state, state_from_file
from .safety_readings import RecordingSafetyBox, SafetyReadings
from .sequencer import Progress, RunControl, RunPlan, RunSummary
from .stream import Publisher

RUN_STATES = ("preparing", "darks", "acquiring", "paused", "finishing")
PLANCK_J_S = 6.62607015e-34  # exact (SI 2019); CODATA 2018, Tiesinga et al., Rev. Mod. Phys. 93, 025010 (2021)
LIGHT_SPEED_M_S = 299792458.0  # exact (SI definition)



class Refused(Exception):
    """A request that is valid but not allowed now; the message says why and what to do."""


class ServicePublisher(Publisher):
    """The stream publisher, recording recent alerts and counting messages for status."""

    def __init__(self, context: zmq.Context, address: str, *, hwm: int, alerts: int = 20, keys=None,
                 curve: str = "auto"):
        super().__init__(context, address, hwm=hwm, keys=keys, curve=curve)  # XPUB, bounded subscriptions
        self.alerts = AlertBook(alerts)  # time-stamped, cleared when they no longer hold (run_state)
        self.sent: collections.Counter = collections.Counter()

    @property
    def recent_alerts(self) -> list[dict]:
        return self.alerts.active()

    def publish(self, topic: str, meta: dict | None = None, array: np.ndarray | None = None) -> int:
        if topic in ("alert", "event"):
            self.alerts.on_event(topic, meta or {})
        self.sent[topic] += 1
        return super().publish(topic, meta, array)


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


class Service:
    """The daemon. ``Service(cfg).serve_forever()``; ``request_shutdown()`` from another thread ends it."""

    def __init__(self, cfg: BenchConfig, *, control_address: str | None = None, publish_address: str | None = None,
                 log: Callable[[str], None] = print):
        self.cfg = cfg
        sc = cfg.service
        self.control_address_requested = control_address or sc.control_address
        self.publish_address_requested = publish_address or sc.publish_address
        self.log = log
        self.keys: ServerKeys | None = None
        if sc.server_secret_key or sc.authorized_clients_dir:
            if not (sc.server_secret_key and sc.authorized_clients_dir):
                raise ConfigError(cfg.source_path, [("service", "CURVE keys need both server_secret_key and "
                                                     "authorized_clients_dir (see 'maskrun keys DIR')")])
            base = cfg.config_dir
            self.keys = load_server_keys(base / sc.server_secret_key, base / sc.authorized_clients_dir)
        # refuse an exposed control socket before anything is opened
        check_control_binding(self.control_address_requested, self.keys)
        check_stream_binding(self.publish_address_requested, self.keys, cfg.stream.curve)
        self.state = "starting"
        self.exposure_s = cfg.camera.exposure_s
        self.ack: Acknowledgement | None = None
        self._ack_at = 0.0
        self.dark_dn: np.ndarray | float = cfg.response.offset_dn
        self.darks_info: dict = {}
        self.interlock_closed: bool | None = None
        self.shutter_open: bool | None = None
        self.safety_readings = SafetyReadings()  # every reading of the box, with its time (safety_readings)
        self.last_run: dict = {}
        self.photons_lifetime = 0.0
        self.runs_started = 0
        self._run: _RunActivity | None = None
        self._align: AlignLoop | None = None
        self._darks_thread: threading.Thread | None = None
        self._lock = threading.Lock()
        self._shutdown = threading.Event()
        self._t_started = time.time()
        self.bench: Bench | None = None
        self.ctx: zmq.Context | None = None
        self.pub: ServicePublisher | None = None
        self.sock: zmq.Socket | None = None
        self.recon = None
        self.auth = None
        self.control_address = ""
        self.publish_address = ""

    # --- life cycle --------------------------------------------------------------------
    def open(self) -> None:
        """Build and open the bench (shutter closed), the sockets and the reconstruction worker."""
        cfg = self.cfg
        self.bench = build_bench(cfg)
        self.bench.safety = RecordingSafetyBox(self.bench.safety, self.safety_readings)
        self.dark_dn = self.bench.response.offset_dn  # the profile's offset, until dark frames are taken
        try:
            self.bench.open()
            self.bench.safety.close_shutter()
            self._read_safety_state()
            self.ctx = zmq.Context()
            if self.keys is not None:
                self.auth = start_authenticator(self.ctx, self.keys)
            self.sock = C.control_socket(self.ctx)
            if self.keys is not None:
                apply_server_keys(self.sock, self.keys)
            self.sock.bind(self.control_address_requested)
            self.control_address = self.sock.getsockopt_string(zmq.LAST_ENDPOINT)
            self.pub = ServicePublisher(self.ctx, self.publish_address_requested, hwm=cfg.stream.preview_hwm,
                                        keys=self.keys, curve=cfg.stream.curve)
            self.publish_address = connect_host_for(self.pub.address, self.control_address)
            from .session import make_recon_link

            self.recon = make_recon_link(self.bench, self.ctx)
        except BaseException:
            self.close()
            raise
        self.state = "idle"
        self.pub.publish("event", {"kind": "service_start", "level": "info",
                                   "message": f"service ready: control {self.control_address}"})

    def close(self) -> None:
        """Stop any activity, close the shutter and the devices, the worker and the sockets."""
        self.state = "shutting_down"
        try:
            self._stop_activity("the service is shutting down", wait=True)
        finally:
            if self.bench is not None:
                self.bench.close()  # shutter closed first
            if self.recon is not None:
                self.recon.close()
                self.recon = None
            if self.pub is not None:
                self.pub.close()
                self.pub = None
            if self.sock is not None:
                self.sock.close(0)
                self.sock = None
            if self.auth is not None:
                self.auth.stop()
                self.auth = None
            if self.ctx is not None:
                self.ctx.term()
                self.ctx = None

    def request_shutdown(self) -> None:
        self._shutdown.set()

    def serve_forever(self, ready: Callable[[dict], None] | None = None) -> None:
        """Answer requests until a shutdown request (or ``request_shutdown``); then ``close()``."""
        if self.sock is None:
            self.open()
        if ready is not None:
            ready({"control_address": self.control_address, "publish_address": self.publish_address,
                   "pid": os.getpid(), "curve": self.keys is not None, "firmware": self.bench.firmware_info()})
        interval = self.cfg.service.status_interval_s
        next_status = 0.0
        try:
            while not self._shutdown.is_set():
                now = time.monotonic()
                if now >= next_status:
                    self._housekeeping()
                    self.pub.publish("status", {"source": "service", "status_interval_s": interval, **self.status()})
                    next_status = now + interval
                wait_ms = max(1, int((next_status - time.monotonic()) * 1000))
                if self.sock.poll(min(wait_ms, 100)):
                    self._answer_one()
        finally:
            self.close()

    # --- requests ----------------------------------------------------------------------
    def _answer_one(self) -> None:
        try:
            parts = self.sock.recv_multipart(flags=zmq.NOBLOCK, copy=True)
        except zmq.ZMQError:
            return
        envelope, parts = C.split_envelope(parts)  # ROUTER: the reply goes back to exactly this peer
        raw = parts[0] if len(parts) == 1 else b""
        try:
            if len(parts) != 1:
                raise C.BadRequest(f"a request is one message part holding JSON; got {len(parts)} parts")
            req = C.parse_request(raw, self.cfg.service.max_request_bytes)
            result = self.handle(req)
            reply = C.ok_reply(result, self.state)
        except (C.BadRequest, Refused) as exc:
            reply = C.error_reply(str(exc), self.state)
        except DeviceError as exc:
            reply = C.error_reply(f"device error: {exc}", self.state)
        except Exception as exc:  # a bug must not end the daemon: report it and carry on
            self.log(f"internal error answering a request: {traceback.format_exc()}")
            reply = C.error_reply(f"internal error ({type(exc).__name__}: {exc}); the service keeps running", self.state)
        try:
            self.sock.send_multipart([*envelope, reply], flags=zmq.NOBLOCK)
        except zmq.ZMQError as exc:  # EHOSTUNREACH: the peer left before its reply (router mandatory)
            if exc.errno not in (zmq.EHOSTUNREACH, zmq.EAGAIN):
                self.log(f"could not send a reply: {exc}")

    def handle(self, req) -> dict:
        """Dispatch one validated request; returns the result dict or raises Refused."""
        name = req.request
        return getattr(self, f"_do_{name}")(req)

    def _do_status(self, req) -> dict:
        return self.status()

    def _do_notice(self, req) -> dict:
        laser = self.cfg.laser
        return {"notice": notice_lines(laser), "laser_class": laser.laser_class, "acknowledged": self._ack_valid()}

    def _do_acknowledge(self, req: C.AcknowledgeRequest) -> dict:
        self.ack = make_acknowledgement(self.cfg.laser, who=req.who, how=f"control request ({req.how})")
        self._ack_at = time.monotonic()
        self.pub.publish("event", {"kind": "safety_ack", "level": "info",
                                   "message": f"laser-safety notice acknowledged by {self.ack.who} via {self.ack.how}"})
        return {"acknowledged_by": self.ack.who, "how": self.ack.how, "when_utc": self.ack.when_utc,
                "valid_s": self.cfg.service.acknowledgement_valid_s}

    def _require_idle(self, what: str) -> None:
        if self.state != "idle":
            hint = {"align": "stop align mode first ('stop')", "taking_darks": "wait for the dark frames to finish"}
            raise Refused(f"cannot {what} while the service is {self.state}; "
                          f"{hint.get(self.state, 'stop the run first (stop) or wait for it to end')}")

    def _require_safe_to_open(self, what: str) -> None:
        if not self._ack_valid():
            raise Refused(f"cannot {what}: the laser-safety notice has not been acknowledged "
                          f"(or the acknowledgement expired); read it ('maskrun acknowledge') and acknowledge it first")
        self._read_safety_state()
        if not self.interlock_closed:
            raise Refused(f"cannot {what}: the interlock reads OPEN; close the enclosure/door interlock first")

    def _do_start(self, req: C.StartRequest) -> dict:
        self._require_idle("start a run")
        self._require_safe_to_open("start a run")
        cfg = self.cfg
        from .foreground import RunRequest, check_output_folder, output_path_for

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
        from .disk import DiskSpaceError
        from .session import plan_run_disk

        try:
            plan_run_disk(self.bench, plan)  # refuse up front a run the disk cannot hold; nothing is written
        except DiskSpaceError as exc:
            raise Refused(str(exc)) from None
        self._check_watchdog(plan.exposure_s)
        if self.recon is not None and not self.recon.worker_alive():
            # the local reconstruction worker died since the last run: start a fresh one
            self.log("reconstruction worker had exited; starting a new one")
            self.recon.close()
            from .session import make_recon_link

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

        from .session import execute_run

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
        from .bench import check_exposure, check_watchdog

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

    def _do_shutdown(self, req: C.ShutdownRequest) -> dict:
        was = self.state
        self._shutdown.set()
        if was in RUN_STATES:
            self._run.control.request_stop("the service is shutting down")
        if was == "align":
            self._align.stop("the service is shutting down", timeout_s=0)
        return {"shutting_down": True, "was": was}

    def _do_simulate(self, req: C.SimulateRequest) -> dict:
        optics = self.bench.optics
        if optics is None:
            raise Refused("'simulate' works on a simulated bench only (this bench has no [simulation] table)")
        if req.action == "open_interlock":
            optics.interlock_closed = False
        elif req.action == "close_interlock":
            optics.interlock_closed = True
        elif req.action == "shift_sample":
            optics.set_sample(np.roll(optics.sample, tuple(req.shift_px), axis=(0, 1)), rescale=False)
        elif req.action == "reset_sample":
            from maskrun.simulators.sample import bare_beam, phase_target

            optics.set_sample(bare_beam(self.bench.grid_shape) if self.cfg.simulation.sample == "beam" else
                              phase_target(self.bench.grid_shape, wavelength_m=self.cfg.laser.wavelength_m).field)
        self.bench.truth = optics.truth_field()
        if self.state == "idle":
            self._housekeeping()  # the status shows the new interlock state at once
        return {"action": req.action, "interlock_closed": optics.interlock_closed}

    # --- state and status --------------------------------------------------------------------
    def _ack_valid(self) -> bool:
        return self.ack is not None and time.monotonic() - self._ack_at < self.cfg.service.acknowledgement_valid_s

    def _read_safety_state(self) -> None:
        """Read interlock and shutter (only when no activity thread owns the devices)."""
        try:
            self.interlock_closed = bool(self.bench.safety.interlock_closed())
            self.shutter_open = bool(self.bench.safety.shutter_is_open())
        except DeviceError as exc:
            self.interlock_closed = None
            self.shutter_open = None
            raise Refused(f"cannot read the safety box: {exc}") from None

    def _housekeeping(self) -> None:
        """Join finished activity threads; refresh the safety state while idle."""
        with self._lock:
            if self._run is not None and not self._run.thread.is_alive() and self.state == "idle":
                self._run.thread.join()
            if self.state == "idle":
                try:
                    self._read_safety_state()
                except Refused:
                    pass

    def _stop_activity(self, reason: str, wait: bool) -> None:
        if self._run is not None and self._run.thread.is_alive():
            self._run.control.request_stop(reason)
            if wait:
                self._run.thread.join(60)
        if self._align is not None and self._align.running:
            self._align.stop(reason, timeout_s=10 if wait else 0)
        if self._darks_thread is not None and wait:
            self._darks_thread.join(30)

    def _photon_energy_j(self) -> float:
        # E = h c / lambda (Planck-Einstein relation)
        return PLANCK_J_S * LIGHT_SPEED_M_S / self.cfg.laser.wavelength_m

    def status(self) -> dict:
        """Everything a client shows: state, safety, run progress, align figures, darks, alerts."""
        state = self.state
        run = None
        photons_now = 0.0
        exposure_now = self.exposure_s
        if self._run is not None and state in RUN_STATES:
            act = self._run
            pr = act.progress
            if act.last is not None:
                run = live_state(act.last, act.plan, int(self.bench.masks.shape[0]), fps=pr.get("fps", 0.0),
                                 eta_s=pr.get("eta_s"), elapsed_s=time.monotonic() - act.t_start,
                                 warnings=self.pub.recent_alerts if self.pub is not None else []).to_dict()
            else:
                run = {**pr, "output_path": str(act.plan.output_path), "passes": act.plan.passes,
                       "exposure_s": act.plan.exposure_s, "dark_frames": act.plan.dark_frames}
            exposure_now = run.get("exposure_s") or act.plan.exposure_s
            photons_now = run["photons_total"]
        align = None
        # every safety field is what the box said, with its age; too old or failed: unknown (never inferred)
        max_age = max(5.0, 3 * self.cfg.service.status_interval_s)
        readings = self.safety_readings.snapshot(max_age)
        interlock, shutter = readings["interlock_closed"], readings["shutter_open"]
        safety_source = (f"read from the safety box (by the {'run' if run is not None else 'align loop' if state == 'align' else 'service'}"
                         f"); a reading older than {max_age:g} s is shown as unknown")
        if self._align is not None and state == "align":
            align = self._align.figures.to_dict()
        elif self._align is not None and self._align.error:
            align = {"message": self._align.error}
        photons = self.photons_lifetime + photons_now
        ack = None
        if self._ack_valid():
            ack = {"who": self.ack.who, "how": self.ack.how, "when_utc": self.ack.when_utc}
        return {
            "state": state,
            "config": self.cfg.source_path,
            "uptime_s": time.time() - self._t_started,
            "control_address": self.control_address,
            "publish_address": self.publish_address,
            "curve": self.keys is not None,
            "stream_curve": bool(self.pub is not None and self.pub.authenticated),
            "safety": {"acknowledged": ack is not None, "acknowledgement": ack, "interlock_closed": interlock,
                       "shutter_open": shutter, "source": safety_source, "laser_class": self.cfg.laser.laser_class,
                       "wavelength_m": self.cfg.laser.wavelength_m, **readings},
            "exposure_s": exposure_now,  # the run's (as used) while a run goes, else the next run's
            "exposure_next_run_s": self.exposure_s,
            "masks": int(self.bench.masks.shape[0]) if self.bench is not None else 0,
            "grid_shape": list(self.cfg.grid.shape),
            "max_dn": self.bench.camera.max_dn if self.bench is not None else 0,
            "saturation_level": self.cfg.checks.saturation_level,
            "run": run,
            "last_run": self.last_run or None,
            "align": align,
            "darks": self.darks_info or None,
            "dose": {"photons_total": photons, "energy_j": photons * self._photon_energy_j(),
                     "note": "incident photons counted at the camera since the service started (runs only)"},
            "recent_alerts": self.pub.recent_alerts[-10:] if self.pub is not None else [],
            "stream_sent": dict(self.pub.sent) if self.pub is not None else {},
            "runs_started": self.runs_started,
            "reconstruction": None if self.recon is None else {
                "worker_pid": self.recon.process.pid if self.recon.process is not None else None,
                "worker_alive": self.recon.worker_alive()},
        }


def serve(cfg: BenchConfig, *, control_address: str | None = None, publish_address: str | None = None,
          ready_file: str | None = None, log: Callable[[str], None] = print) -> int:
    """Run the service until a shutdown request or SIGINT/SIGTERM/SIGHUP. Returns an exit code.

    SIGHUP (the terminal closed, e.g. a dropped ssh session) shuts down safely like SIGTERM: a run
    in progress is stopped, the shutter closed and the file closed. Messages to a terminal that is
    gone are dropped rather than raised."""
    import signal

    printer = log

    def log(message: str) -> None:  # noqa: F811 - the caller's log, made safe for a closed terminal
        try:
            printer(message)
        except OSError:
            pass

    svc = Service(cfg, control_address=control_address, publish_address=publish_address, log=log)

    def on_signal(signum, _frame):
        svc.request_shutdown()

    old = {s: signal.signal(s, on_signal) for s in (signal.SIGINT, signal.SIGTERM, signal.SIGHUP)}

    def ready(info: dict) -> None:
        log(f"maskrun service ready: control {info['control_address']}, stream {info['publish_address']}"
            f"{' (CURVE keys)' if info['curve'] else ' (loopback only)'}; shutter closed, idle")
        if not is_loopback_address(info["publish_address"]):
            log("note: the stream is reachable from other machines (read-only, not encrypted)")
        if ready_file:
            tmp = Path(ready_file).with_suffix(".tmp")
            tmp.write_text(json.dumps(info))
            os.replace(tmp, ready_file)

    try:
        svc.serve_forever(ready)
    finally:
        for s, h in old.items():
            signal.signal(s, h)
    log("maskrun service stopped; shutter closed, devices closed")
    return 0
