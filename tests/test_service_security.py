"""Security of the service: loopback by default, CURVE keys for anything else, size limits.
Real daemons in subprocesses, real sockets, keys made by `maskrun keys`."""

from __future__ import annotations

import ipaddress
import subprocess

import pytest
import zmq

from maskrun.daemon.service.client import ServiceClient, ServiceUnreachable
from maskrun.daemon.security import (
    InsecureBinding,
    KeyFileError,
    check_control_binding,
    connect_host_for,
    generate_keys,
    is_loopback_address,
    load_client_keys,
)
from servicehelp import MASKRUN, Daemon, service_config_text

pytestmark = pytest.mark.skipif(not zmq.has("curve"), reason="libzmq built without CURVE")


@pytest.mark.parametrize("host", ["127.0.0.1", "127.1.2.3", "::1", "0.0.0.0", "::", "10.0.0.5", "192.168.1.20",
                                  "8.8.8.8", "fe80::1"])
def test_loopback_detection_agrees_with_the_standard_library(host):
    # reference: Python's ipaddress module (RFC 1122 sec. 3.2.1.3 for 127/8, RFC 4291 sec. 2.5.3 for ::1)
    expected = ipaddress.ip_address(host).is_loopback
    shown = f"[{host}]" if ":" in host else host
    assert is_loopback_address(f"tcp://{shown}:5650") is expected


@pytest.mark.parametrize("address,loop", [("tcp://localhost:5650", True), ("tcp://*:5650", False),
                                          ("tcp://eth0:5650", False), ("ipc:///tmp/maskrun.sock", True),
                                          ("inproc://control", True), ("tcp://lab-pc.example.org:5650", False)])
def test_names_wildcards_and_local_transports(address, loop):
    assert is_loopback_address(address) is loop
    if not loop:
        with pytest.raises(InsecureBinding, match="maskrun keys"):
            check_control_binding(address, None)


def test_wildcard_stream_address_is_made_connectable():
    assert connect_host_for("tcp://0.0.0.0:6000", "tcp://127.0.0.1:5650") == "tcp://127.0.0.1:6000"
    assert connect_host_for("tcp://127.0.0.1:6000", "tcp://127.0.0.1:5650") == "tcp://127.0.0.1:6000"


def test_non_loopback_control_without_keys_is_refused_before_binding(tmp_path):
    text = service_config_text(service_table='[service]\ncontrol_address = "tcp://0.0.0.0:0"\n'
                               'publish_address = "tcp://127.0.0.1:0"\n')
    d = Daemon(tmp_path, text)
    code = d.proc.wait(timeout=30)
    out = d.output()
    d.log.close()
    assert code == 2
    assert "reachable from other machines and no CURVE keys" in out and "maskrun keys" in out
    assert not d.ready_file.exists()


def test_keys_verb_and_a_keyed_daemon_on_all_interfaces(tmp_path):
    keys = tmp_path / "keys"
    out = subprocess.run([MASKRUN, "keys", str(keys)], capture_output=True, text=True, timeout=60)
    assert out.returncode == 0, out.stderr
    assert (keys / "server.key_secret").exists() and (keys / "authorized_clients" / "client.key").exists()
    assert (keys / "server.key_secret").stat().st_mode & 0o077 == 0  # secret keys readable by the owner only
    again = subprocess.run([MASKRUN, "keys", str(keys)], capture_output=True, text=True, timeout=60)
    assert again.returncode == 2 and "already exists" in again.stderr
    other = tmp_path / "other"
    generate_keys(other)  # a key pair the daemon does not know
    text = service_config_text(service_table=f"""
[service]
control_address = "tcp://0.0.0.0:0"
publish_address = "tcp://127.0.0.1:0"
server_secret_key = "{keys / 'server.key_secret'}"
authorized_clients_dir = "{keys / 'authorized_clients'}"
""")
    d = Daemon(tmp_path / "daemon", text).wait_ready()
    d.keys = keys
    try:
        port = d.control.rsplit(":", 1)[1]
        address = f"tcp://127.0.0.1:{port}"
        with ServiceClient(address, keys=keys, timeout_s=10) as c:
            st = c.status()
            assert st["curve"] is True and st["state"] == "idle"
        with ServiceClient(address, timeout_s=1.0) as c:  # no keys: no answer
            with pytest.raises(ServiceUnreachable):
                c.status()
        with ServiceClient(address, keys=other, timeout_s=1.0) as c:  # keys not authorized: no answer
            with pytest.raises(ServiceUnreachable):
                c.status()
        out = subprocess.run([MASKRUN, "status", "--address", address, "--keys", str(keys)], capture_output=True,
                             text=True, timeout=60)
        assert out.returncode == 0 and "state: idle" in out.stdout
    finally:
        assert d.stop() == 0, d.output()


def test_client_keys_must_exist(tmp_path):
    with pytest.raises(KeyFileError, match="maskrun keys"):
        load_client_keys(tmp_path)
