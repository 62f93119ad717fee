"""The live stream cannot be used against the daemon: bounded subscriptions (measured from outside as
the daemon's resident memory), CURVE when bound off loopback, and no identities or paths in what an
unauthenticated stream sends.

Real parts: `maskrun serve` subprocesses, a hand-written ZMTP 3.0 subscriber on a raw TCP socket,
libzmq SUB sockets, keys made by `maskrun keys`. The daemon's memory is read from /proc/PID/status
(VmRSS; proc(5), Linux man-pages). Wire format of the raw subscriber: ZMTP 3.0, RFC 23
(rfc.zeromq.org/spec/23), sections "Greeting", "READY command" and "Framing"; a subscription is a
message whose first byte is 1 followed by the prefix (same RFC, "The SUB socket type").
"""

from __future__ import annotations

import json
import socket
import struct
import time

import pytest
import zmq

from maskrun.daemon.service.client import ServiceClient
from maskrun.daemon.security import generate_keys, load_client_keys
from maskrun.daemon.record.stream import MAX_SUBSCRIPTION_BYTES, WITHHELD, Subscriber, redact, subscription_allowed
from servicehelp import Daemon, service_config_text

MiB = 1 << 20


def rss_mb(pid: int) -> float:
    with open(f"/proc/{pid}/status") as fh:
        for line in fh:
            if line.startswith("VmRSS:"):
                return int(line.split()[1]) / 1024
    raise AssertionError("no VmRSS")


def raw_subscribe(address: str, prefix: bytes) -> socket.socket:
    """A hand-written ZMTP 3.0 SUB peer: greeting, READY (Socket-Type SUB), one subscription message."""
    host, port = address.replace("tcp://", "").rsplit(":", 1)
    s = socket.create_connection((host, int(port)), timeout=5)
    s.sendall(b"\xff" + b"\0" * 8 + b"\x7f" + bytes([3, 0]) + b"NULL".ljust(20, b"\0") + b"\0" + b"\0" * 31)
    prop = bytes([11]) + b"Socket-Type" + struct.pack(">I", 3) + b"SUB"
    ready = b"\x05READY" + prop
    s.sendall(b"\x04" + bytes([len(ready)]) + ready)
    body = b"\x01" + prefix
    try:
        s.sendall(b"\x02" + struct.pack(">Q", len(body)) + body if len(body) > 255 else b"\x00" + bytes([len(body)]) + body)
    except (ConnectionResetError, BrokenPipeError):
        pass  # the daemon dropped the peer part way (its MAXMSGSIZE): what it should do
    return s


def test_subscription_rules():
    assert subscription_allowed(b"") and subscription_allowed(b"status") and subscription_allowed(b"fr")
    assert not subscription_allowed(b"statusX") and not subscription_allowed(b"x" * (MAX_SUBSCRIPTION_BYTES + 1))
    meta = {"config": "/home/lab/bench.toml", "control_address": "tcp://127.0.0.1:5650",
            "safety": {"acknowledged": True, "acknowledgement": {"who": "A. Operator", "how": "x"}},
            "message": "laser-safety notice acknowledged by A. Operator via control request (maskrun on pc)",
            "note": "continue with: maskrun resume /data/runs/r-1.h5 --acknowledge-safety", "passes": 3}
    r = redact(meta)
    text = json.dumps(r)
    assert "Operator" not in text and "/data/runs" not in text and "/home/lab" not in text and "5650" not in text
    assert r["passes"] == 3 and r["safety"]["acknowledged"] is True and r["config"] == WITHHELD


@pytest.fixture(scope="module")
def daemon(tmp_path_factory):
    d = Daemon(tmp_path_factory.mktemp("stream"), service_config_text(recon=False)).wait_ready()
    yield d
    d.stop()


def test_an_8_mib_subscription_does_not_raise_the_daemons_memory(daemon):
    pid = daemon.proc.pid
    time.sleep(1.0)
    before = rss_mb(pid)
    peers = []
    for _ in range(3):  # hand-written peers: 8 MiB subscriptions straight on the wire
        peers.append(raw_subscribe(daemon.stream, b"s" * (8 * MiB)))
    ctx = zmq.Context()
    subs = []
    for _ in range(2):  # and libzmq's own SUB socket with long subscriptions (not 8 MiB: libzmq's own
        # subscription tree recurses once per byte, and a client holding 8 MiB crashes on close)
        s = ctx.socket(zmq.SUB)
        s.setsockopt(zmq.LINGER, 0)
        s.setsockopt(zmq.SUBSCRIBE, b"status" + b"x" * 3000)
        s.connect(daemon.stream)
        subs.append(s)
    time.sleep(3.0)  # several status messages: every pending subscription has been looked at
    during = rss_mb(pid)
    for p in peers:
        p.close()
    for s in subs:
        s.close(0)
    ctx.term()
    time.sleep(1.0)
    after = rss_mb(pid)
    print(f"\ndaemon memory: {before:.1f} MB before, {during:.1f} MB with three 8 MiB subscriptions (and two of 3 kB), "
          f"{after:.1f} MB after they left (+{max(during, after) - before:.1f} MB)")
    assert max(during, after) - before < 5.0
    # a normal subscriber still gets its messages
    ctx = zmq.Context()
    sub = Subscriber(ctx, daemon.stream, ("status",))
    try:
        msg = sub.receive(timeout_s=5)
        assert msg is not None and msg.header.topic == "status"
    finally:
        sub.close()
        ctx.term()


def test_a_foreign_or_long_subscription_receives_nothing(daemon):
    ctx = zmq.Context()
    socks = []
    try:
        for prefix in (b"status" + b"y" * 100, b"nosuchtopic"):
            s = ctx.socket(zmq.SUB)
            s.setsockopt(zmq.LINGER, 0)
            s.setsockopt(zmq.SUBSCRIBE, prefix)
            s.connect(daemon.stream)
            socks.append(s)
        good = Subscriber(ctx, daemon.stream, ("status",))
        assert good.receive(timeout_s=5) is not None
        time.sleep(0.5)
        assert all(not s.poll(200) for s in socks)
        good.close()
    finally:
        for s in socks:
            s.close(0)
        ctx.term()


def test_an_unauthenticated_stream_carries_no_identities_paths_or_addresses(daemon):
    ctx = zmq.Context()
    sub = Subscriber(ctx, daemon.stream, ("status", "event"))
    try:
        with ServiceClient(daemon.control, timeout_s=10) as c:
            c.acknowledge("Dr. Secret Name", how="test on bench pc")
            st = c.status()  # the control reply (loopback, or CURVE) keeps them
            assert st["safety"]["acknowledgement"]["who"] == "Dr. Secret Name" and st["config"]
        seen = []
        deadline = time.monotonic() + 5
        while time.monotonic() < deadline and not any(m.header.topic == "status" and
                                                      m.header.meta.get("safety", {}).get("acknowledged")
                                                      for m in seen):
            m = sub.receive(timeout_s=1)
            if m is not None:
                seen.append(m)
        text = json.dumps([m.header.meta for m in seen])
        assert seen and "Secret" not in text and str(daemon.folder) not in text and daemon.control not in text
        assert "bench.toml" not in text
    finally:
        sub.close()
        ctx.term()


def test_the_stream_off_loopback_is_curve_by_default(tmp_path):
    keys = tmp_path / "keys"
    generate_keys(keys)
    text = service_config_text(service_table=f"""
[service]
control_address = "tcp://127.0.0.1:0"
publish_address = "tcp://0.0.0.0:0"
status_interval_s = 0.2
server_secret_key = "{keys / 'server.key_secret'}"
authorized_clients_dir = "{keys / 'authorized_clients'}"
""", recon=False)
    d = Daemon(tmp_path / "d", text).wait_ready()
    d.keys = keys
    ctx = zmq.Context()
    try:
        with ServiceClient(d.control, keys=keys, timeout_s=10) as c:
            st = c.status()
            assert st["stream_curve"] is True
            c.acknowledge("Dr. Keyed")
        plain = Subscriber(ctx, d.stream, ("status",))
        assert plain.receive(timeout_s=2) is None  # no keys: nothing
        keyed = Subscriber(ctx, d.stream, ("status",), keys=load_client_keys(keys))
        msg = keyed.receive(timeout_s=5)
        assert msg is not None and msg.header.meta["config"] != WITHHELD  # authenticated: full content
        plain.close()
        keyed.close()
    finally:
        ctx.term()
        d.stop()
    no_keys = service_config_text(service_table='[service]\ncontrol_address = "tcp://127.0.0.1:0"\n'
                                  'publish_address = "tcp://0.0.0.0:0"\n', recon=False)
    d2 = Daemon(tmp_path / "d2", no_keys)
    assert d2.proc.wait(60) == 2
    assert "stream address tcp://0.0.0.0:0 is reachable from other machines" in d2.output()
