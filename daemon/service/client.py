"""A small client for the service's control socket, for scripts and for the `maskrun` client verbs.

    from maskrun.daemon.service.client import ServiceClient
    with ServiceClient("tcp://127.0.0.1:5650") as c:
        c.acknowledge("A. Operator")
        c.start(passes=10, exposure_s=0.01)
        c.wait_idle()
        print(c.status()["last_run"])

Every method returns the reply's ``result`` dict, or raises ``RequestRefused``
(the service answered ``ok: false``; ``.error`` and ``.state`` say why) or
``ServiceUnreachable`` (no reply within ``timeout_s``: the daemon is not running,
the address is wrong, or the keys do not match). After a timeout the socket is
rebuilt, so the client stays usable.
"""

from __future__ import annotations

import json
import time
from pathlib import Path

import zmq

from maskrun.daemon.service.control import Reply
from maskrun.daemon.security import ClientKeys, apply_client_keys, load_client_keys

DEFAULT_CONTROL_ADDRESS = "tcp://127.0.0.1:5650"


class ServiceUnreachable(RuntimeError):
    """No reply from the service within the timeout."""


class RequestRefused(RuntimeError):
    """The service answered with an error."""

    def __init__(self, error: str, state: str):
        self.error = error
        self.state = state
        super().__init__(f"{error} [service state: {state}]")


class ServiceClient:
    """Request/reply client. ``keys``: a folder from 'maskrun keys' (client.key_secret, server.key) or ClientKeys."""

    def __init__(self, address: str = DEFAULT_CONTROL_ADDRESS, *, keys: str | Path | ClientKeys | None = None,
                 timeout_s: float = 5.0, context: zmq.Context | None = None):
        self.address = address
        self.timeout_s = timeout_s
        self.keys = load_client_keys(keys) if isinstance(keys, (str, Path)) else keys
        self._own_ctx = context is None
        self.ctx = context or zmq.Context()
        self.sock: zmq.Socket | None = None
        self._connect()

    def _connect(self) -> None:
        s = self.ctx.socket(zmq.REQ)
        s.setsockopt(zmq.LINGER, 0)
        s.setsockopt(zmq.MAXMSGSIZE, 16 << 20)
        if self.keys is not None:
            apply_client_keys(s, self.keys)
        s.connect(self.address)
        self.sock = s

    def close(self) -> None:
        if self.sock is not None:
            self.sock.close(0)
            self.sock = None
        if self._own_ctx:
            self.ctx.term()

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()
        return False

    # --- the round trip ---------------------------------------------------------------
    def send_raw(self, payload: bytes, timeout_s: float | None = None) -> Reply:
        """Send bytes as they are (for tests of bad input) and decode the reply."""
        timeout = self.timeout_s if timeout_s is None else timeout_s
        self.sock.send(payload)
        if not self.sock.poll(int(timeout * 1000)):
            self.sock.close(0)  # a REQ socket without its reply is stuck: rebuild it
            self._connect()
            raise ServiceUnreachable(
                f"no reply from {self.address} within {timeout:g} s; is 'maskrun serve' running there "
                "(and, for a remote service, are the keys right)?")
        return Reply.model_validate_json(self.sock.recv())

    def request(self, request_name: str, /, **fields) -> dict:
        """Send one request; returns the result or raises RequestRefused / ServiceUnreachable."""
        body = {"request": request_name, **{k: v for k, v in fields.items() if v is not None}}
        reply = self.send_raw(json.dumps(body).encode())
        if not reply.ok:
            raise RequestRefused(reply.error, reply.state)
        return reply.result if reply.result is not None else {}

    # --- requests -------------------------------------------------------------------------
    def status(self) -> dict:
        return self.request("status")

    def notice(self) -> dict:
        return self.request("notice")

    def acknowledge(self, who: str, how: str = "control request") -> dict:
        return self.request("acknowledge", who=who, how=how)

    def start(self, *, passes: int | None = None, exposure_s: float | None = None, dark_frames: int | None = None,
              interval_s: float | None = None, name: str | None = None, output_dir: str | None = None,
              output_path: str | None = None) -> dict:
        return self.request("start", passes=passes, exposure_s=exposure_s, dark_frames=dark_frames,
                            interval_s=interval_s, name=name, output_dir=output_dir,
                            output_path=None if output_path is None else str(output_path))

    def pause(self, reason: str | None = None) -> dict:
        return self.request("pause", reason=reason)

    def resume(self) -> dict:
        return self.request("resume")

    def stop(self, reason: str | None = None) -> dict:
        return self.request("stop", reason=reason)

    def set_exposure(self, exposure_s: float) -> dict:
        return self.request("set_exposure", exposure_s=exposure_s)

    def take_darks(self, count: int = 8, *, wait: bool = True, timeout_s: float = 60.0) -> dict:
        result = self.request("take_darks", count=count)
        if not wait:
            return result
        self.wait_idle(timeout_s)
        darks = self.status().get("darks") or {}
        if darks.get("error"):
            raise RequestRefused(f"dark frames failed: {darks['error']}", "idle")
        return darks

    def align_start(self, *, mask: int | None = None, exposure_s: float | None = None,
                    iterations: int | None = None) -> dict:
        return self.request("align_start", mask=mask, exposure_s=exposure_s, iterations=iterations)

    def align_stop(self) -> dict:
        return self.request("align_stop")

    def simulate(self, action: str, shift_px: tuple[int, int] | None = None) -> dict:
        return self.request("simulate", action=action, shift_px=None if shift_px is None else list(shift_px))

    def shutdown(self) -> dict:
        return self.request("shutdown")

    # --- helpers ---------------------------------------------------------------------------
    def wait_state(self, states: str | tuple[str, ...], timeout_s: float = 60.0, poll_s: float = 0.05) -> dict:
        """Poll status until its state is one of ``states``; returns that status (TimeoutError otherwise)."""
        wanted = (states,) if isinstance(states, str) else tuple(states)
        deadline = time.monotonic() + timeout_s
        while True:
            st = self.status()
            if st["state"] in wanted:
                return st
            if time.monotonic() > deadline:
                raise TimeoutError(f"service still {st['state']} after {timeout_s:g} s (waiting for {wanted})")
            time.sleep(poll_s)

    def wait_idle(self, timeout_s: float = 600.0) -> dict:
        return self.wait_state("idle", timeout_s)


def reply_sentence(verb: str, result: dict) -> str:
    """A reply to a client verb as one sentence a person reads (not a dictionary)."""
    r = result or {}
    if verb == "pause":
        return "Pausing: the run pauses before its next frame and the shutter closes while paused."
    if verb == "resume":
        return "Resumed: the run continues." if r.get("resumed") else "Nothing to resume."
    if verb == "stop":
        if r.get("stopping") == "run":
            return (f"Stopping the run after its current frame; frames taken are kept in {r.get('output_path')} "
                    "(shutter closes).")
        if r.get("stopping") == "align":
            return "Stopping align mode after its current frame (shutter closes)."
    if verb == "shutdown":
        return (f"Shutting down (the service was {r.get('was', 'idle')}): a run in progress is stopped, the shutter "
                "closed and the devices closed.")
    parts = ", ".join(f"{k.replace('_', ' ')} {v}" for k, v in r.items())
    return f"{verb.capitalize()}: done" + (f" ({parts})." if parts else ".")
