"""The live data stream: a ZeroMQ PUB socket and a matching subscriber.

Every message is three frames: ``[topic, header, payload]``.

- topic: ASCII bytes, one of TOPICS (subscribers filter on it).
- header: JSON of ``StreamHeader``: schema version, topic, per-topic sequence
  number (starts at 0 and increases by 1, so a subscriber can count gaps),
  global sequence number, send time, dtype/shape of the payload (empty payload:
  dtype "" and shape []), and a topic-specific ``meta`` dict.
- payload: the raw array bytes (C order), sent without copying.

Drop policy: the PUB socket has a send high-water mark; a subscriber that falls
behind loses whole messages (ZeroMQ drops for that subscriber only), never
slowing acquisition. Gaps show up as jumps in ``seq``. The run file never drops
anything.

Protection against subscribers (see docs/service.md):

- The socket is an XPUB in manual mode: ZeroMQ hands every subscription to the
  publisher instead of storing it, and only subscriptions that are a prefix of a
  topic name (at most ``MAX_SUBSCRIPTION_BYTES``) are applied. A PUB socket stores
  every subscription's bytes in its prefix tree (an 8 MiB subscription cost about
  100 MB of daemon memory, never given back); here a long or foreign one is dropped.
  ``MAXMSGSIZE`` drops a peer that sends a larger message before it is buffered.
- Per-subscriber memory is bounded by the send high-water mark (messages queued per
  subscriber, ``[stream] preview_hwm``) and the kernel socket buffers.
- CURVE (``[stream] curve``): "auto" (default) encrypts and authenticates the stream
  whenever it is bound off loopback (the service's keys; without keys such a binding
  is refused), "on" always, "off" never.
- A stream that is not authenticated never carries identities or paths: names of
  whoever acknowledged the safety notice, file paths and socket addresses are replaced
  (``redact``) before sending.
"""

from __future__ import annotations

import json
import re
import threading
import time
from dataclasses import dataclass
from typing import Any

import numpy as np
import zmq
from pydantic import BaseModel, ConfigDict, Field

SCHEMA_VERSION = 1
TOPICS = ("frame", "preview", "check", "alert", "frameset", "estimate", "status", "event")
MAX_HEADER_BYTES = 64 * 1024
MAX_SUBSCRIPTION_BYTES = 64  # longer subscriptions are never applied (the topic names are short)
SUBSCRIPTION_MESSAGE_MAX_BYTES = 4096  # zmq.MAXMSGSIZE of the publisher: a larger message drops its peer
WITHHELD = "(withheld: stream not authenticated)"
_REDACT_KEYS = {"config", "config_path", "control_address", "publish_address", "output_path", "output_dir",
                "acknowledgement", "who", "how", "operator", "path", "host", "worker"}
_PATH_RE = re.compile(r"(?:(?<=\s)|(?<=^)|(?<=[('\"=:]))(?:~|\.{1,2})?/[^\s'\"),;]+")
_ADDRESS_RE = re.compile(r"\b(?:tcp|ipc|inproc)://[^\s'\"),;]+")
_WHO_RE = re.compile(r"acknowledged by [^;]*")


def redact(value):
    """A copy of a message's meta without identities, paths or socket addresses (for unauthenticated streams)."""
    if isinstance(value, dict):
        return {k: (WITHHELD if k in _REDACT_KEYS and v not in (None, "") else redact(v)) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [redact(v) for v in value]
    if isinstance(value, str):
        text = _WHO_RE.sub(lambda m: "acknowledged (name withheld)", value)
        text = _ADDRESS_RE.sub("<address>", text)
        return _PATH_RE.sub("<path>", text)
    return value


def subscription_allowed(topic_prefix: bytes) -> bool:
    """A subscription is applied only when it is short and a prefix of a topic name (b"" = all topics)."""
    if len(topic_prefix) > MAX_SUBSCRIPTION_BYTES:
        return False
    return any(t.encode().startswith(topic_prefix) for t in TOPICS)


class StreamHeader(BaseModel):
    model_config = ConfigDict(extra="forbid")

    schema_version: int = SCHEMA_VERSION
    topic: str
    seq: int = Field(ge=0, description="per-topic sequence number")
    global_seq: int = Field(ge=0)
    t_s: float
    dtype: str = ""
    shape: list[int] = Field(default_factory=list)
    meta: dict[str, Any] = Field(default_factory=dict)


class StreamError(ValueError):
    """A received message does not follow the stream format."""


def _jsonable(obj):
    if isinstance(obj, np.generic):
        return obj.item()
    if isinstance(obj, np.ndarray):
        return obj.tolist()
    raise TypeError(f"not JSON serialisable: {type(obj).__name__}")


class Publisher:
    """Thread-safe publisher (one lock around the socket). ``keys``: security.ServerKeys for a CURVE
    stream (ZeroMQ's authenticator must run on ``context``); ``curve``: "auto" | "on" | "off"."""

    def __init__(self, context: zmq.Context, address: str = "tcp://127.0.0.1:0", *, hwm: int = 10,
                 keys=None, curve: str = "auto"):
        from maskrun.daemon.security import apply_server_keys, check_stream_binding

        use_curve = check_stream_binding(address, keys, curve)  # InsecureBinding before any socket
        self._sock = context.socket(zmq.XPUB)
        self._sock.setsockopt(zmq.XPUB_MANUAL, 1)  # subscriptions come to us; only the ones allowed are applied
        self._sock.setsockopt(zmq.SNDHWM, hwm)
        self._sock.setsockopt(zmq.RCVHWM, 64)
        self._sock.setsockopt(zmq.MAXMSGSIZE, SUBSCRIPTION_MESSAGE_MAX_BYTES)
        self._sock.setsockopt(zmq.LINGER, 0)
        if use_curve:
            apply_server_keys(self._sock, keys)
        self.authenticated = use_curve
        self.subscriptions_refused = 0
        self._sock.bind(address)
        self.address = self._sock.getsockopt_string(zmq.LAST_ENDPOINT)
        self._lock = threading.Lock()
        self._seq: dict[str, int] = {}
        self._global = 0

    def _apply_subscriptions(self) -> None:
        """Apply pending (un)subscriptions that are allowed; drop the rest (caller holds the lock)."""
        for _ in range(1000):  # bounded work per publish
            try:
                msg = self._sock.recv(zmq.NOBLOCK, copy=True)
            except zmq.Again:
                return
            if not msg or msg[0] not in (0, 1):
                continue
            prefix = msg[1:]
            if not subscription_allowed(prefix):
                self.subscriptions_refused += 1
                continue
            self._sock.setsockopt(zmq.SUBSCRIBE if msg[0] == 1 else zmq.UNSUBSCRIBE, prefix)

    def publish(self, topic: str, meta: dict | None = None, array: np.ndarray | None = None) -> int:
        """Send one message; returns its per-topic sequence number. Never blocks (drops instead)."""
        if topic not in TOPICS:
            raise ValueError(f"unknown stream topic {topic!r}; topics are {', '.join(TOPICS)}")
        if not self.authenticated and meta:
            meta = redact(meta)
        with self._lock:
            self._apply_subscriptions()
            seq = self._seq.get(topic, 0)
            self._seq[topic] = seq + 1
            g = self._global
            self._global += 1
            if array is not None:
                array = np.ascontiguousarray(array)
                dtype, shape, payload = array.dtype.str, list(array.shape), memoryview(array).cast("B")
            else:
                dtype, shape, payload = "", [], b""
            header = {
                "schema_version": SCHEMA_VERSION,
                "topic": topic,
                "seq": seq,
                "global_seq": g,
                "t_s": time.time(),
                "dtype": dtype,
                "shape": shape,
                "meta": meta or {},
            }
            hdr = json.dumps(header, default=_jsonable).encode()
            try:
                # copy=False: the payload buffer goes to ZeroMQ without a copy.
                self._sock.send_multipart([topic.encode(), hdr, payload], copy=False, flags=zmq.NOBLOCK)
            except zmq.Again:
                pass  # documented drop policy: previews are dropped, never queued without bound
            return seq

    def close(self) -> None:
        with self._lock:
            self._sock.close(linger=0)


@dataclass
class StreamMessage:
    header: StreamHeader
    array: np.ndarray | None
    gap: int  # messages of this topic missed before this one


def decode_message(parts: list) -> tuple[StreamHeader, np.ndarray | None]:
    """Validate and decode one multipart message. Raises StreamError on anything malformed."""
    if len(parts) != 3:
        raise StreamError(f"expected 3 message parts [topic, header, payload], got {len(parts)}")
    topic, hdr, payload = (bytes(p.buffer) if hasattr(p, "buffer") else p for p in parts)
    if len(hdr) > MAX_HEADER_BYTES:
        raise StreamError(f"header of {len(hdr)} bytes exceeds the {MAX_HEADER_BYTES}-byte limit")
    try:
        header = StreamHeader.model_validate_json(hdr)
    except Exception as exc:  # pydantic.ValidationError or JSON error
        raise StreamError(f"bad stream header: {exc}") from None
    if header.schema_version != SCHEMA_VERSION:
        raise StreamError(f"stream schema {header.schema_version} is not supported (this reader: {SCHEMA_VERSION})")
    if header.topic.encode() != topic:
        raise StreamError(f"topic frame {topic!r} does not match header topic {header.topic!r}")
    if not header.dtype:
        return header, None
    dt = np.dtype(header.dtype)
    expected = int(np.prod(header.shape)) * dt.itemsize
    if len(payload) != expected:
        raise StreamError(f"payload has {len(payload)} bytes, header says {header.shape} {header.dtype} = {expected}")
    return header, np.frombuffer(payload, dtype=dt).reshape(header.shape)


class Subscriber:
    """Subscribes to a publisher and tracks per-topic gaps."""

    def __init__(self, context: zmq.Context, address: str, topics: tuple[str, ...] = TOPICS, *, hwm: int = 100,
                 keys=None):
        """keys: security.ClientKeys for a CURVE stream."""
        self._sock = context.socket(zmq.SUB)
        self._sock.setsockopt(zmq.RCVHWM, hwm)
        self._sock.setsockopt(zmq.LINGER, 0)
        self._sock.setsockopt(zmq.MAXMSGSIZE, 1 << 31)
        if keys is not None:
            from maskrun.daemon.security import apply_client_keys

            apply_client_keys(self._sock, keys)
        for t in topics:
            self._sock.setsockopt(zmq.SUBSCRIBE, t.encode())
        self._sock.connect(address)
        self._next: dict[str, int] = {}
        self.gaps: dict[str, int] = {}

    def receive(self, timeout_s: float | None = None) -> StreamMessage | None:
        """Next message, or None after timeout_s."""
        if timeout_s is not None and not self._sock.poll(int(timeout_s * 1000)):
            return None
        parts = self._sock.recv_multipart(copy=True)
        header, array = decode_message(parts)
        expected = self._next.get(header.topic)
        gap = 0 if expected is None else max(0, header.seq - expected)
        if gap:
            self.gaps[header.topic] = self.gaps.get(header.topic, 0) + gap
        self._next[header.topic] = header.seq + 1
        return StreamMessage(header, array, gap)

    def close(self) -> None:
        self._sock.close(linger=0)
