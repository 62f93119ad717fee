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
import json
import os
import threading
import time
import traceback
from pathlib import Path
from typing import Callable

import numpy as np
import zmq

from maskrun.drivers import DeviceError

from maskrun.daemon.service import control as C
from maskrun.daemon.acquire.align import AlignLoop
from maskrun.daemon.acquire.bench import Bench, build_bench
from maskrun.daemon.config import BenchConfig, ConfigError
from maskrun.daemon.safety.safety import Acknowledgement, make_acknowledgement, notice_lines
from maskrun.daemon.security import (
    ServerKeys,
    apply_server_keys,
    check_control_binding,
    check_stream_binding,
    connect_host_for,
    is_loopback_address,
    load_server_keys,
    start_authenticator,
)
from maskrun.daemon.record.run_state import AlertBook
from maskrun.daemon.safety.safety_readings import RecordingSafetyBox, SafetyReadings
from maskrun.daemon.service.service_activities import RUN_STATES, Refused, ServiceActivities, _RunActivity
from maskrun.daemon.service.service_status import LIGHT_SPEED_M_S, PLANCK_J_S, ServiceStatus
from maskrun.daemon.record.stream import Publisher

# names that lived here before the split, importable from here as before
__all__ = [
    "LIGHT_SPEED_M_S", "PLANCK_J_S", "RUN_STATES", "Refused", "Service", "ServicePublisher", "_RunActivity", "serve",
]


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


class Service(ServiceActivities, ServiceStatus):
    """The daemon. ``Service(cfg).serve_forever()``; ``request_shutdown()`` from another thread ends it.

    The activity requests and threads are its mixin ``service_activities``, the status ``service_status``."""

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
            from maskrun.daemon.acquire.session import make_recon_link

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
