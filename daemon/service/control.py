"""Control messages of the service: JSON requests validated by pydantic, uniform replies.

A request is one ZeroMQ message (a single frame) holding a JSON object whose
``request`` field names it; the other fields are the request's own and unknown
fields are refused. ``parse_request(raw)`` turns the bytes into one of the
models below or raises ``BadRequest`` with a message that says what was wrong
(too large, not UTF-8, not JSON, unknown request, wrong field types).

Every reply is JSON, either ``{"ok": true, "result": {...}, "state": "..."}``
or ``{"ok": false, "error": "...", "state": "..."}``; ``state`` is always the
service state at the time of the reply, so a refused client knows why.
"""

from __future__ import annotations

import json
import math
from typing import Annotated, Any, Literal, Union

from pydantic import BaseModel, ConfigDict, Field, TypeAdapter, ValidationError, field_validator

PROTOCOL_VERSION = 1
DEFAULT_MAX_REQUEST_BYTES = 65536
# Requests above this are dropped by ZeroMQ itself (zmq.MAXMSGSIZE): the peer is disconnected and gets no
# reply. Between max_request_bytes and this hard limit the service answers with an error.
HARD_MAX_REQUEST_BYTES = 1 << 20


class _Request(BaseModel):
    """Strict: no type coercion, unknown fields refused, and JSON ``null`` refused for every field: a
    field that may be left out has a plain type with the default None (never validated), so an
    explicit null is a wrong type like any other (``parse_request`` names it first, in plain words)."""

    model_config = ConfigDict(extra="forbid", strict=True)



class StatusRequest(_Request):
    """The service's state, run progress, safety, align figures, recent alerts."""

    request: Literal["status"]


class NoticeRequest(_Request):
    """The laser-safety notice text (to show before acknowledging)."""

    request: Literal["notice"]


class AcknowledgeRequest(_Request):
    """Record that ``who`` read the laser-safety notice; ``how`` says where (e.g. 'maskrun acknowledge on host')."""

    request: Literal["acknowledge"]
    who: str = Field(min_length=1, max_length=200)
    how: str = Field("control request", min_length=1, max_length=200)


class StartRequest(_Request):
    """Start a run; omitted fields come from the config ([run], [camera])."""

    request: Literal["start"]
    passes: int = Field(None, ge=1, le=1_000_000)
    exposure_s: float = Field(None, gt=0, le=3600)
    dark_frames: int = Field(None, ge=0, le=10_000)
    interval_s: float = Field(None, gt=0, le=7 * 86400)
    name: str = Field(None, min_length=1, max_length=100, pattern=r"^[A-Za-z0-9_.\-]+$")
    output_dir: str = Field(None, min_length=1, max_length=4096)
    output_path: str = Field(None, min_length=1, max_length=4096, description="the run file (.h5); must not exist")

    @field_validator("exposure_s", "interval_s")
    @classmethod
    def _finite(cls, v):
        if v is not None and not math.isfinite(v):
            raise ValueError("must be a finite number of seconds")
        return v


class PauseRequest(_Request):
    request: Literal["pause"]
    reason: str = Field("paused by a control request", max_length=500)


class ResumeRequest(_Request):
    request: Literal["resume"]


class StopRequest(_Request):
    """Stop the run or align mode (frames taken so far are kept)."""

    request: Literal["stop"]
    reason: str = Field("stopped by a control request", max_length=500)


class SetExposureRequest(_Request):
    """Exposure for the next run or dark frames; applied at once in align mode."""

    request: Literal["set_exposure"]
    exposure_s: float = Field(gt=0, le=3600)

    @field_validator("exposure_s")
    @classmethod
    def _finite(cls, v):
        if not math.isfinite(v):
            raise ValueError("must be a finite number of seconds")
        return v


class TakeDarksRequest(_Request):
    """Take dark frames (shutter closed) while idle; the mean becomes the dark level for align mode."""

    request: Literal["take_darks"]
    count: int = Field(8, ge=1, le=1000)


class AlignStartRequest(_Request):
    """Free-running frames with one mask (``mask``) or all masks in turn (``mask`` omitted)."""

    request: Literal["align_start"]
    mask: int = Field(None, ge=0, description="mask index to hold; omitted: cycle through all masks")
    exposure_s: float = Field(None, gt=0, le=3600)
    iterations: int = Field(30, ge=1, le=1000, description="follow-mode iterations per frame set")


class AlignStopRequest(_Request):
    request: Literal["align_stop"]


class ShutdownRequest(_Request):
    """Stop any activity, close the shutter and the devices, exit."""

    request: Literal["shutdown"]


class SimulateRequest(_Request):
    """Change the simulated world (simulated benches only): open/close the interlock, shift or reset the sample."""

    request: Literal["simulate"]
    action: Literal["open_interlock", "close_interlock", "shift_sample", "reset_sample"]
    shift_px: tuple[int, int] = (0, 0)


Request = Annotated[
    Union[
        StatusRequest, NoticeRequest, AcknowledgeRequest, StartRequest, PauseRequest, ResumeRequest, StopRequest,
        SetExposureRequest, TakeDarksRequest, AlignStartRequest, AlignStopRequest, ShutdownRequest, SimulateRequest,
    ],
    Field(discriminator="request"),
]
_ADAPTER: TypeAdapter = TypeAdapter(Request)
REQUEST_NAMES = (
    "status", "notice", "acknowledge", "start", "pause", "resume", "stop", "set_exposure", "take_darks",
    "align_start", "align_stop", "shutdown", "simulate",
)


CONTROL_HANDSHAKE_IVL_MS = 2000  # a peer that has not finished the ZeroMQ handshake by then is dropped


def control_socket(context):
    """The service's control socket: a ROUTER, not a REP.

    Why REP lost replies after junk connections: libzmq treats a peer whose first byte is not
    0xFF as an unversioned (ZMTP 1.0) peer, so random bytes and HTTP text are parsed into frames
    and can arrive as messages (measured: 297 junk messages in 100 batches of ten random-byte
    connections reached a plain ROUTER). A REP socket reads the return route of each request from
    the message itself and drops a request whose route has no empty delimiter by rolling back the
    route it had started to copy. When the junk peer has already gone, that rollback leaves the
    underlying router "in the middle of an outgoing message", so the next legitimate request's
    route is taken as a continuation and discarded: its request is carried out and its reply is
    silently dropped (old code: 68 of 100 batches answered within 1 s). This reading of libzmq's
    REP/ROUTER is consistent with the measurements (losses only with junk that forms malformed
    routes, none with CURVE, which has no ZMTP 1.0 fallback); it is not proven line by line.

    With a ROUTER the service itself receives [peer identity, delimiter, body] and sends
    [peer identity, delimiter, reply] as one whole message, so a reply can only go to the peer
    whose request it answers and nothing carries over from one request to the next.
    ROUTER_MANDATORY makes a reply to a peer that has left an error (EHOSTUNREACH, ignored)
    instead of a silent drop; HANDSHAKE_IVL drops peers that never finish the handshake; receive
    and send never block the control thread."""
    import zmq

    sock = context.socket(zmq.ROUTER)
    sock.setsockopt(zmq.LINGER, 0)
    sock.setsockopt(zmq.MAXMSGSIZE, HARD_MAX_REQUEST_BYTES)
    sock.setsockopt(zmq.SNDHWM, 100)
    sock.setsockopt(zmq.RCVHWM, 100)
    sock.setsockopt(zmq.ROUTER_MANDATORY, 1)
    sock.setsockopt(zmq.HANDSHAKE_IVL, CONTROL_HANDSHAKE_IVL_MS)
    sock.setsockopt(zmq.SNDTIMEO, 0)
    return sock


def split_envelope(parts: list) -> tuple[list, list]:
    """ROUTER message -> (envelope to send back, body parts). The envelope is the peer identity and,
    from REQ peers, the frames up to and including the empty delimiter."""
    for i in range(1, len(parts)):
        if len(parts[i]) == 0:
            return parts[: i + 1], parts[i + 1:]
    return parts[:1], parts[1:]


class BadRequest(ValueError):
    """The bytes received are not a valid request; the message says what was wrong."""


def _describe_errors(err: ValidationError, name: str) -> str:
    parts = []
    for e in err.errors(include_url=False):
        loc = ".".join(str(x) for x in e["loc"][1:] if not str(x).startswith("function-")) or "(request)"
        msg = e["msg"]
        if e["type"] == "extra_forbidden":
            msg = "unknown field"
        elif e["type"] == "missing":
            msg = "required field is missing"
        elif "input" in e and e["type"] != "value_error":
            shown = repr(e["input"])
            msg = f"{msg} (got {shown[:60]}{'...' if len(shown) > 60 else ''})"
        parts.append(f"{loc}: {msg.removeprefix('Value error, ')}")
    return f"bad {name!r} request: " + "; ".join(parts)


def parse_request(raw: bytes, max_bytes: int = DEFAULT_MAX_REQUEST_BYTES):
    """Validate one request. Returns a request model; raises BadRequest (never anything else)."""
    if len(raw) > max_bytes:
        raise BadRequest(f"request of {len(raw)} bytes exceeds the {max_bytes}-byte limit; send a smaller JSON object")
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise BadRequest(f"request is not UTF-8 text ({exc.reason} at byte {exc.start}); send a JSON object") from None
    try:
        data = json.loads(text, parse_constant=_refuse_constant)
    except (ValueError, RecursionError) as exc:
        raise BadRequest(f"request is not valid JSON ({str(exc)[:120]}); send a JSON object such as "
                         '{"request": "status"}') from None
    if not isinstance(data, dict):
        raise BadRequest(f"request must be a JSON object, got {type(data).__name__}; e.g. {{\"request\": \"status\"}}")
    name = data.get("request")
    if not isinstance(name, str):
        raise BadRequest(f"the field 'request' (a string naming the request) is missing or not a string; "
                         f"requests are: {', '.join(REQUEST_NAMES)}")
    if name not in REQUEST_NAMES:
        shown = name[:40] + ("..." if len(name) > 40 else "")
        raise BadRequest(f"unknown request {shown!r}; requests are: {', '.join(REQUEST_NAMES)}")
    nulls = [k for k, v in data.items() if v is None]
    if nulls:  # the models refuse them too (wrong type); this says it in plain words
        raise BadRequest(f"bad {name!r} request: " + "; ".join(
            f"{k}: null is not allowed (leave the field out to use its default)" for k in nulls))
    try:
        return _ADAPTER.validate_json(text)
    except ValidationError as exc:
        raise BadRequest(_describe_errors(exc, name)) from None


def _refuse_constant(name: str):
    raise ValueError(f"{name} is not allowed in a request")


def _jsonable(obj):
    import numpy as np

    if isinstance(obj, np.generic):
        return obj.item()
    if isinstance(obj, np.ndarray):
        return obj.tolist()
    if hasattr(obj, "__fspath__"):
        return str(obj)
    raise TypeError(f"not JSON serialisable: {type(obj).__name__}")


def _clean(value):
    """NaN/inf are not JSON: replace them by None (documented in the reply format)."""
    if isinstance(value, float):
        return value if math.isfinite(value) else None
    if isinstance(value, dict):
        return {k: _clean(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_clean(v) for v in value]
    return value


def ok_reply(result: Any, state: str) -> bytes:
    return json.dumps({"ok": True, "result": _clean(result), "state": state}, default=_jsonable,
                      allow_nan=False).encode()


def error_reply(error: str, state: str) -> bytes:
    return json.dumps({"ok": False, "error": error, "state": state}).encode()


class Reply(BaseModel):
    """A decoded reply (client side)."""

    model_config = ConfigDict(extra="forbid")
    ok: bool
    result: Any = None
    error: str = ""
    state: str = ""
