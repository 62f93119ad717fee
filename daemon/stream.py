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
"""

from __future__ import annotations

import json
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
    """Thread-safe publisher (one lock around the socket)."""

    def __init__(self, context: zmq.Context, address: str = "tcp://127.0.0.1:0", *, hwm: int = 10):
        self._sock = context.socket(zmq.PUB)
        self._sock.setsockopt(zmq.SNDHWM, hwm)
        self._sock.setsockopt(zmq.LINGER, 0)
        self._sock.bind(address)
        self.address = self._sock.getsockopt_string(zmq.LAST_ENDPOINT)
        self._lock = threading.Lock()
        self._seq: dict[str, int] = {}
        self._global = 0

    def publish(self, topic: str, meta: dict | None = None, array: np.ndarray | None = None) -> int:
        """Send one message; returns its per-topic sequence number. Never blocks (drops instead)."""
        if topic not in TOPICS:
            raise ValueError(f"unknown stream topic {topic!r}; topics are {', '.join(TOPICS)}")
        with self._lock:
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

    def __init__(self, context: zmq.Context, address: str, topics: tuple[str, ...] = TOPICS, *, hwm: int = 100):
        self._sock = context.socket(zmq.SUB)
        self._sock.setsockopt(zmq.RCVHWM, hwm)
        self._sock.setsockopt(zmq.LINGER, 0)
        self._sock.setsockopt(zmq.MAXMSGSIZE, 1 << 31)
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
