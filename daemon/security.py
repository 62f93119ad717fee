"""Security of the service sockets: loopback by default, CURVE keys otherwise, size limits.

Rules
-----
- The control socket binds to a loopback address (127.0.0.0/8, ::1, ``localhost``)
  or a local transport (``ipc://``, ``inproc://``) unless CURVE keys are configured
  (``[service] server_secret_key`` and ``authorized_clients_dir``). Anything else is
  refused with ``InsecureBinding`` before a socket is opened.
- With keys, the control socket is a CURVE server: traffic is encrypted and only
  clients whose public key is in ``authorized_clients_dir`` get in (ZeroMQ's
  authenticator thread, ``zmq.auth``). Clients load their own secret key and the
  server's public key (``ClientKeys``).
- The stream is an XPUB socket that applies only short topic subscriptions (``stream``).
  Bound off loopback it is a CURVE server by default (``[stream] curve = "auto"``, the
  same keys as the control socket; ``check_stream_binding``); ``curve = "off"`` publishes
  it unencrypted, and then identities and paths are withheld from its messages.
- Every socket sets ``zmq.MAXMSGSIZE`` so an oversized message drops the peer
  instead of filling memory.

``maskrun keys DIR`` (``generate_keys``) writes ``server.key``/``server.key_secret``
and ``client.key``/``client.key_secret`` and an ``authorized_clients/`` folder with
a copy of the client's public key.
"""

from __future__ import annotations

import ipaddress
import os
import shutil
import socket
from dataclasses import dataclass
from pathlib import Path

import zmq
import zmq.auth

SERVER_NAME = "server"
CLIENT_NAME = "client"
AUTHORIZED_DIR = "authorized_clients"


class InsecureBinding(ValueError):
    """The control socket would be reachable from other machines without keys."""


class BadAddress(ValueError):
    """Not a ZeroMQ endpoint."""


class KeyFileError(ValueError):
    """A key file is missing or unreadable; the message says which and how to make it."""


def address_host(address: str) -> tuple[str, str]:
    """(transport, host) of a ZeroMQ endpoint such as tcp://127.0.0.1:5650 or ipc:///tmp/x."""
    if "://" not in address:
        raise BadAddress(f"{address!r} is not a ZeroMQ address (expected e.g. tcp://127.0.0.1:5650)")
    transport, rest = address.split("://", 1)
    if transport != "tcp":
        return transport, rest
    if rest.startswith("["):  # tcp://[::1]:5650
        host = rest[1:].split("]", 1)[0]
    else:
        host = rest.rsplit(":", 1)[0]
    if ";" in host:  # tcp://src;dst form: the bind host is the part after ';'
        host = host.split(";", 1)[1]
    return transport, host


def is_loopback_address(address: str) -> bool:
    """True if binding ``address`` exposes the socket to this machine only.

    Uses the standard library's notion of loopback (``ipaddress.ip_address(...).is_loopback``,
    RFC 1122 section 3.2.1.3 for 127.0.0.0/8, RFC 4291 section 2.5.3 for ::1). Names other than
    ``localhost`` and wildcards (``*``, ``0.0.0.0``) and interface names are not loopback.
    """
    transport, host = address_host(address)
    if transport in ("ipc", "inproc"):
        return True
    if transport != "tcp":
        return False
    if host == "localhost":
        return True
    try:
        return ipaddress.ip_address(host).is_loopback
    except ValueError:
        return False  # '*', interface names, host names


@dataclass
class ServerKeys:
    public: bytes
    secret: bytes
    authorized_clients_dir: Path


@dataclass
class ClientKeys:
    public: bytes
    secret: bytes
    server_public: bytes


def _load(path: Path, want_secret: bool) -> tuple[bytes, bytes | None]:
    if not path.is_file():
        raise KeyFileError(f"{path}: key file not found; make keys with 'maskrun keys DIR'")
    try:
        public, secret = zmq.auth.load_certificate(str(path))
    except Exception as exc:
        raise KeyFileError(f"{path}: not a ZeroMQ certificate ({exc}); make keys with 'maskrun keys DIR'") from None
    if want_secret and not secret:
        raise KeyFileError(f"{path}: holds no secret key (give the .key_secret file)")
    return public, secret


def load_server_keys(secret_path: str | Path, authorized_clients_dir: str | Path) -> ServerKeys:
    public, secret = _load(Path(secret_path), True)
    auth_dir = Path(authorized_clients_dir)
    if not auth_dir.is_dir() or not any(auth_dir.glob("*.key")):
        raise KeyFileError(f"{auth_dir}: no client public keys (*.key) there; copy each client's .key file into it")
    return ServerKeys(public, secret, auth_dir)


def load_client_keys(keys_dir: str | Path) -> ClientKeys:
    """Client keys from a folder made by 'maskrun keys': client.key_secret and server.key."""
    d = Path(keys_dir)
    public, secret = _load(d / f"{CLIENT_NAME}.key_secret", True)
    server_public, _ = _load(d / f"{SERVER_NAME}.key", False)
    return ClientKeys(public, secret, server_public)


def generate_keys(keys_dir: str | Path, *, overwrite: bool = False) -> dict[str, Path]:
    """Write a server and a client key pair (CURVE25519, zmq.auth) and the authorized-clients folder."""
    d = Path(keys_dir)
    d.mkdir(parents=True, exist_ok=True)
    existing = [p for p in (d / f"{SERVER_NAME}.key_secret", d / f"{CLIENT_NAME}.key_secret") if p.exists()]
    if existing and not overwrite:
        raise KeyFileError(f"{existing[0]} already exists; use another folder or --overwrite (old clients lose access)")
    server_pub, server_sec = zmq.auth.create_certificates(str(d), SERVER_NAME)
    client_pub, client_sec = zmq.auth.create_certificates(str(d), CLIENT_NAME)
    for secret in (server_sec, client_sec):
        os.chmod(secret, 0o600)
    auth = d / AUTHORIZED_DIR
    auth.mkdir(exist_ok=True)
    shutil.copy(client_pub, auth / f"{CLIENT_NAME}.key")
    return {"server_public": Path(server_pub), "server_secret": Path(server_sec),
            "client_public": Path(client_pub), "client_secret": Path(client_sec), "authorized_clients": auth}


def check_control_binding(address: str, keys: ServerKeys | None) -> None:
    """Refuse a non-loopback control address without keys (raises InsecureBinding)."""
    if keys is None and not is_loopback_address(address):
        raise InsecureBinding(
            f"control address {address} is reachable from other machines and no CURVE keys are configured; "
            "bind control to tcp://127.0.0.1:PORT, or make keys with 'maskrun keys DIR' and set [service] "
            "server_secret_key = 'DIR/server.key_secret' and authorized_clients_dir = 'DIR/authorized_clients'"
        )


def check_stream_binding(address: str, keys: ServerKeys | None, curve: str = "auto") -> bool:
    """Whether the stream uses CURVE: "auto" = when bound off loopback, "on" = always, "off" = never.
    Raises InsecureBinding when CURVE is wanted and no keys are configured."""
    want = curve == "on" or (curve == "auto" and not is_loopback_address(address))
    if want and keys is None:
        raise InsecureBinding(
            f"stream address {address} is reachable from other machines, and the stream uses CURVE there by default "
            "([stream] curve = 'auto') but no keys are configured; bind the stream to tcp://127.0.0.1:PORT, make keys "
            "with 'maskrun keys DIR' and set [service] server_secret_key / authorized_clients_dir, or set "
            "[stream] curve = 'off' to publish it unencrypted to anyone (identities and paths are withheld)")
    return want


def apply_server_keys(sock: zmq.Socket, keys: ServerKeys) -> None:
    sock.curve_secretkey = keys.secret
    sock.curve_publickey = keys.public
    sock.curve_server = True


def apply_client_keys(sock: zmq.Socket, keys: ClientKeys) -> None:
    sock.curve_secretkey = keys.secret
    sock.curve_publickey = keys.public
    sock.curve_serverkey = keys.server_public


def start_authenticator(context: zmq.Context, keys: ServerKeys):
    """ZeroMQ's authenticator thread, allowing only the authorized client public keys."""
    from zmq.auth.thread import ThreadAuthenticator

    auth = ThreadAuthenticator(context)
    auth.start()
    auth.configure_curve(domain="*", location=str(keys.authorized_clients_dir))
    return auth


def connect_host_for(bound_endpoint: str, control_address: str) -> str:
    """A connectable stream address: a wildcard bind (0.0.0.0 / ::) is replaced by the control host."""
    transport, host = address_host(bound_endpoint)
    if transport != "tcp" or host not in ("0.0.0.0", "::", "*"):
        return bound_endpoint
    port = bound_endpoint.rsplit(":", 1)[1]
    _, chost = address_host(control_address)
    if chost in ("0.0.0.0", "::", "*", ""):
        chost = "127.0.0.1"
    if ":" in chost:
        chost = f"[{chost}]"
    return f"tcp://{chost}:{port}"


def this_host() -> str:
    return socket.gethostname()
