"""Bad input on the control socket: >1,000 malformed requests, each answered with an error that says what was
wrong and what the state is; then the same daemon still completes a run correctly."""

from __future__ import annotations

import json
import random

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from maskrun.daemon.service.client import ServiceClient, ServiceUnreachable
from maskrun.daemon.service.control import REQUEST_NAMES
from maskrun.daemon.record.runfile import RunFile
from servicehelp import Daemon, service_config_text

K = 6


@pytest.fixture(scope="module")
def daemon(tmp_path_factory):
    d = Daemon(tmp_path_factory.mktemp("svc-fuzz"), service_config_text(passes=2)).wait_ready()
    yield d
    assert d.stop() == 0, d.output()


@pytest.fixture(scope="module")
def client(daemon):
    with ServiceClient(daemon.control, timeout_s=10) as c:
        yield c


def _wrong_value(rng: random.Random):
    return rng.choice([None, True, "x" * rng.randint(0, 50), -1, 0, 10**12, -1.5e308, [], {}, [1, 2, 3],
                       {"nested": {"a": [1]}}, "NaN", 1e400 if rng.random() < 0.01 else "inf"])


def malformed_requests(seed: int, count: int) -> list[bytes]:
    """Seeded random bad requests of every kind (syntax, type, unknown, wrong state, size)."""
    rng = random.Random(seed)
    out: list[bytes] = []
    fields = ["passes", "exposure_s", "dark_frames", "name", "output_path", "mask", "count", "who", "action",
              "shift_px", "reason", "iterations", "interval_s", "bogus"]
    for i in range(count):
        kind = i % 10
        if kind == 0:  # random bytes
            out.append(bytes(rng.getrandbits(8) for _ in range(rng.randint(0, 200))))
        elif kind == 1:  # truncated valid JSON
            text = json.dumps({"request": rng.choice(REQUEST_NAMES), "passes": 3})
            out.append(text[: rng.randint(0, len(text) - 1)].encode())
        elif kind == 2:  # JSON that is not an object
            out.append(json.dumps(rng.choice([[1, 2], "status", 42, None, True, 3.5, [{"request": "status"}]])).encode())
        elif kind == 3:  # unknown request names / wrong type of the name
            name = rng.choice(["", "STATUS", "statu", "start ", "rm -rf", "\u00e9t\u00e4t", 7, None, ["start"]])
            out.append(json.dumps({"request": name}).encode())
        elif kind == 4:  # known request, wrong field types
            name = rng.choice(["start", "set_exposure", "take_darks", "align_start", "acknowledge", "simulate"])
            body = {"request": name, rng.choice(fields): _wrong_value(rng)}
            out.append(json.dumps(body).encode())
        elif kind == 5:  # missing required fields / unknown fields
            name = rng.choice(["set_exposure", "acknowledge", "simulate"])
            out.append(json.dumps({"request": name, "extra_field": 1}).encode())
        elif kind == 6:  # out-of-range numbers
            body = rng.choice([{"request": "start", "passes": 0}, {"request": "start", "exposure_s": -1.0},
                               {"request": "set_exposure", "exposure_s": 0}, {"request": "take_darks", "count": 0},
                               {"request": "align_start", "mask": -2}, {"request": "start", "exposure_s": 1e9}])
            out.append(json.dumps(body).encode())
        elif kind == 7:  # valid requests in the wrong state (idle, notice not acknowledged)
            name = rng.choice(["pause", "resume", "stop", "align_stop", "start", "align_start"])
            out.append(json.dumps({"request": name}).encode())
        elif kind == 8:  # oversized (above the 64 KiB answer limit, below the hard limit)
            out.append(json.dumps({"request": "status", "pad": "x" * rng.randint(70_000, 200_000)}).encode())
        else:  # non-UTF-8 and NaN/Infinity constants, deep nesting
            out.append(rng.choice([b'{"request": "status", "x": NaN}', b"\xff\xfe{}", b'{"request": "set_exposure", '
                                   b'"exposure_s": Infinity}', b"[" * 5000 + b"]" * 5000,
                                   b'{"request": "start", "passes": 1, "passes": "2"}']))
    return out


def test_a_thousand_malformed_requests_each_get_an_error_reply_then_a_run_completes(client, daemon):
    requests = malformed_requests(seed=20261202, count=1200)
    errors = []
    for raw in requests:
        reply = client.send_raw(raw)
        assert reply.ok is False, raw[:80]
        assert reply.error and reply.state == "idle"
        errors.append(reply.error)
    # the errors say what kind of thing was wrong
    for words in ("not valid JSON", "not UTF-8", "must be a JSON object", "unknown request", "bad 'start' request",
                  "unknown field", "required field is missing", "not been acknowledged", "nothing to pause",
                  "exceeds the 65536-byte limit"):
        assert any(words in e for e in errors), words
    # the daemon is still alive and correct: a run driven by the client completes
    client.acknowledge("fuzz operator")
    r = client.start(passes=2, name="afterfuzz")
    st_ = client.wait_idle(timeout_s=60)
    assert st_["last_run"]["state"] == "finished"
    with RunFile(daemon.folder / r["output_path"]) as rf:
        assert rf.frame_count == 2 * K and len(rf.complete_sets()) == 2
        assert rf.frame_info()["photons"].min() > 1e4
        assert rf.estimate_count >= 1


def test_error_messages_name_the_problem(client):
    cases = {
        b"not json": "not valid JSON",
        b'{"request": "start", "passes": "3"}': "passes: Input should be a valid integer",
        b'{"request": "launch"}': "unknown request 'launch'",
        b'{"request": "set_exposure"}': "exposure_s: required field is missing",
        b'{"request": "status", "verbose": true}': "verbose: unknown field",
        b"[1]": "must be a JSON object",
        json.dumps({"request": "status", "pad": "x" * 100_000}).encode(): "exceeds the 65536-byte limit",
    }
    for raw, words in cases.items():
        reply = client.send_raw(raw)
        assert not reply.ok and words in reply.error, (raw[:60], reply.error)


def test_a_request_above_the_hard_limit_is_dropped_and_the_daemon_carries_on(daemon):
    # ZeroMQ's MAXMSGSIZE drops the connection of a peer that sends more than 1 MiB: no reply, no memory use
    with ServiceClient(daemon.control, timeout_s=1.5) as c:
        with pytest.raises(ServiceUnreachable):
            c.send_raw(b"{" + b" " * (2 << 20) + b"}")
        c.timeout_s = 10
        assert c.status()["state"] in ("idle", "preparing", "acquiring", "finishing", "darks")


def test_multipart_request_is_refused(daemon):
    import zmq

    ctx = zmq.Context()
    s = ctx.socket(zmq.REQ)
    s.setsockopt(zmq.LINGER, 0)
    s.connect(daemon.control)
    s.send_multipart([b'{"request": "status"}', b"extra"])
    assert s.poll(10_000)
    reply = json.loads(s.recv())
    assert reply["ok"] is False and "one message part" in reply["error"]
    s.close()
    ctx.term()


json_values = st.recursive(
    st.none() | st.booleans() | st.integers() | st.floats(allow_nan=False, allow_infinity=False) | st.text(max_size=20),
    lambda children: st.lists(children, max_size=4) | st.dictionaries(st.text(max_size=10), children, max_size=4),
    max_leaves=12,
)


@settings(max_examples=200, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(name=st.sampled_from(REQUEST_NAMES), extra=st.dictionaries(st.text(max_size=12).filter(lambda k: k != "request"), json_values, min_size=1,
                                                                    max_size=3))
def test_property_any_json_object_gets_a_reply_with_ok_and_state(client, name, extra):
    body = {**extra, "request": name}
    if name in ("shutdown", "acknowledge", "start", "align_start", "take_darks", "simulate", "set_exposure"):
        body["bogus_field_that_is_never_valid"] = 1  # never change the daemon's state from here
    reply = client.send_raw(json.dumps(body).encode())
    assert reply.ok is False
    assert reply.state and reply.error
