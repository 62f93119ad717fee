"""The live stream over real ZeroMQ sockets on loopback."""

import json
import time

import numpy as np
import pytest
import zmq

from maskrun.daemon.record.stream import Publisher, StreamError, Subscriber, decode_message


@pytest.fixture
def ctx():
    c = zmq.Context()
    yield c
    c.term()


def _connect(ctx, pub, topics=("frame", "status")):
    sub = Subscriber(ctx, pub.address, topics)
    # PUB/SUB joins are asynchronous: publish until the subscriber sees something.
    for _ in range(200):
        pub.publish("status", {"hello": True})
        if sub.receive(0.02) is not None:
            break
    else:
        raise AssertionError("subscriber never connected")
    while sub.receive(0.05) is not None:
        pass
    return sub


def test_frame_roundtrip_keeps_dtype_shape_and_bytes(ctx):
    pub = Publisher(ctx, "tcp://127.0.0.1:0", hwm=100)
    sub = _connect(ctx, pub)
    img = np.arange(12 * 10, dtype=np.uint16).reshape(12, 10)
    pub.publish("frame", {"pass_index": 0}, img)
    msg = sub.receive(2.0)
    assert msg.header.topic == "frame" and msg.header.schema_version == 1
    assert msg.header.meta == {"pass_index": 0}
    np.testing.assert_array_equal(msg.array, img)
    assert msg.array.dtype == np.uint16
    sub.close()
    pub.close()


def test_sequence_numbers_reveal_gaps(ctx):
    pub = Publisher(ctx, "tcp://127.0.0.1:0", hwm=1000)
    sub = _connect(ctx, pub, ("frame",) + ("status",))
    pub.publish("frame", {})
    first = sub.receive(2.0)
    pub._seq["frame"] += 3  # simulate three messages lost on the way
    pub.publish("frame", {})
    second = sub.receive(2.0)
    assert second.header.seq == first.header.seq + 4
    assert second.gap == 3 and sub.gaps["frame"] == 3
    sub.close()
    pub.close()


def test_slow_subscriber_does_not_block_the_publisher(ctx):
    pub = Publisher(ctx, "tcp://127.0.0.1:0", hwm=2)
    sub = _connect(ctx, pub)
    big = np.zeros((512, 512), np.uint16)
    t0 = time.perf_counter()
    for _ in range(300):
        pub.publish("frame", {}, big)  # the subscriber reads nothing meanwhile
    elapsed = time.perf_counter() - t0
    assert elapsed < 10  # never blocked waiting for the reader (documented drop policy)
    got = 0
    while sub.receive(0.2) is not None:
        got += 1
    assert got < 300  # messages were dropped for the slow reader, not queued without bound
    sub.close()
    pub.close()


def test_malformed_messages_are_rejected_with_reasons():
    with pytest.raises(StreamError, match="3 message parts"):
        decode_message([b"frame", b"{}"])
    with pytest.raises(StreamError, match="bad stream header"):
        decode_message([b"frame", b"not json", b""])
    hdr = json.dumps({"schema_version": 1, "topic": "frame", "seq": 0, "global_seq": 0, "t_s": 0.0,
                      "dtype": "<u2", "shape": [4, 4], "meta": {}}).encode()
    with pytest.raises(StreamError, match="payload has 3 bytes"):
        decode_message([b"frame", hdr, b"abc"])
    with pytest.raises(StreamError, match="does not match"):
        decode_message([b"preview", hdr, bytes(32)])


def test_unknown_topic_is_refused(ctx):
    pub = Publisher(ctx)
    with pytest.raises(ValueError, match="unknown stream topic"):
        pub.publish("frames", {})
    pub.close()
