"""Reconstruction workers on other machines: addresses, keys, and the daemon's link options.

One address names a daemon's worker endpoint: frame sets are offered (PUSH)
at ``tcp://HOST:PORT`` and estimates are collected (PULL) at
``tcp://HOST:PORT+1``. ``maskrun worker --connect tcp://HOST:PORT`` derives
the second from the first, so a worker needs only the address the daemon's
config names in ``[reconstruction] worker_address``.

Keys: on loopback no keys are needed. Any other address needs CURVE: the
daemon uses the same server key pair and authorized-clients folder as its
control socket (``[service] server_secret_key``, ``authorized_clients_dir``,
made by ``maskrun keys DIR``), and a worker loads ``client.key_secret`` and
``server.key`` from a key folder (``--keys DIR``). The frame-set and estimate
sockets are CURVE servers on their own ZeroMQ context with their own
authenticator, which admits the authorized client keys plus, when the daemon
also starts its local worker, a key pair made for that worker at start-up
(handed over in the environment variable ``MASKRUN_WORKER_CURVE``, never on
the command line).
"""

from __future__ import annotations

import os
from pathlib import Path

import zmq
import zmq.auth

from maskrun.daemon.security import ClientKeys, ServerKeys, address_host, is_loopback_address, load_server_keys

LOCAL_WORKER_KEYS_ENV = "MASKRUN_WORKER_CURVE"


class WorkerAddressError(ValueError):
    """A worker address is malformed or unsafe; the message says what to give instead."""


def split_worker_address(address: str) -> tuple[str, int]:
    """(host, port) of ``tcp://HOST:PORT`` (IPv6 hosts in brackets)."""
    transport, host = address_host(address)
    if transport != "tcp":
        raise WorkerAddressError(f"{address}: workers connect over tcp; give tcp://HOST:PORT")
    try:
        port = int(address.rsplit(":", 1)[1])
    except ValueError:
        raise WorkerAddressError(f"{address}: no port; give tcp://HOST:PORT (the daemon's worker_address)") from None
    if not 0 <= port <= 65534:
        raise WorkerAddressError(f"{address}: port {port} out of range (0..65534; estimates use port + 1)")
    return host, port


def _join(host: str, port: int) -> str:
    h = f"[{host}]" if ":" in host and not host.startswith("[") else host
    return f"tcp://{h}:{port}"


def worker_endpoints(address: str) -> tuple[str, str]:
    """(frame-set address, estimate address) for a worker connecting to ``address``."""
    host, port = split_worker_address(address)
    if port == 0:
        raise WorkerAddressError(f"{address}: port 0 means 'any free port' on the daemon; give the actual port "
                                 "(set [reconstruction] worker_address = 'tcp://HOST:PORT' in the daemon's config)")
    return _join(host, port), _join(host, port + 1)


def bind_endpoints(address: str) -> tuple[str, str]:
    """(frame-set bind address, estimate bind address) for the daemon; port 0 gives two free ports."""
    host, port = split_worker_address(address)
    if port == 0:
        return _join(host, 0), _join(host, 0)
    return _join(host, port), _join(host, port + 1)


def daemon_server_keys(cfg) -> ServerKeys | None:
    """The daemon's CURVE keys for the worker sockets, or None on loopback. Raises WorkerAddressError if unsafe."""
    address = cfg.reconstruction.worker_address
    split_worker_address(address)
    if is_loopback_address(address):
        return None
    svc = cfg.service
    if not (svc.server_secret_key and svc.authorized_clients_dir):
        raise WorkerAddressError(
            f"[reconstruction] worker_address = {address!r} is reachable from other machines and no CURVE keys are "
            "configured; use a loopback address, or make keys with 'maskrun keys DIR' and set [service] "
            "server_secret_key and authorized_clients_dir (workers then connect with --keys DIR)"
        )
    base = Path(cfg.config_dir)
    secret = Path(svc.server_secret_key)
    auth_dir = Path(svc.authorized_clients_dir)
    return load_server_keys(secret if secret.is_absolute() else base / secret,
                            auth_dir if auth_dir.is_absolute() else base / auth_dir)


def link_options(cfg) -> dict:
    """Keyword arguments for ``ReconLink`` from a bench config (address, local worker, keys)."""
    from maskrun.daemon.config import ConfigError
    from maskrun.daemon.security import KeyFileError

    rc = cfg.reconstruction
    try:
        keys = daemon_server_keys(cfg)
    except (WorkerAddressError, KeyFileError) as exc:
        raise ConfigError(cfg.source_path, [("reconstruction.worker_address", str(exc))]) from None
    return {"worker_address": rc.worker_address, "local_worker": rc.local_worker, "server_keys": keys}


class _AllowKeys:
    """Credentials provider for zmq's authenticator: a fixed set of Z85 public keys."""

    def __init__(self, public_keys: set[bytes]):
        self.allowed = set(public_keys)

    def callback(self, domain: str, key: bytes) -> bool:
        return key in self.allowed  # pyzmq hands the client's public key over Z85-encoded


def start_link_authenticator(context: zmq.Context, keys: ServerKeys, extra_public_keys: list[bytes]):
    """Authenticator on ``context`` admitting the authorized clients' keys and ``extra_public_keys`` (Z85)."""
    from zmq.auth.thread import ThreadAuthenticator

    allowed = set(extra_public_keys)
    for p in sorted(Path(keys.authorized_clients_dir).glob("*.key")):
        public, _ = zmq.auth.load_certificate(str(p))
        allowed.add(public)
    auth = ThreadAuthenticator(context)
    auth.start()
    auth.configure_curve_callback(domain="*", credentials_provider=_AllowKeys(allowed))
    return auth


def local_worker_keys(server_public: bytes) -> tuple[ClientKeys, str]:
    """A fresh key pair for the local worker and its environment value (public,secret,server; Z85)."""
    public, secret = zmq.curve_keypair()
    keys = ClientKeys(public, secret, server_public)
    return keys, b",".join((public, secret, server_public)).decode()  # "," is not in the Z85 alphabet


def client_keys_from_env() -> ClientKeys | None:
    value = os.environ.get(LOCAL_WORKER_KEYS_ENV)
    if not value:
        return None
    public, secret, server_public = (v.encode() for v in value.split(","))
    return ClientKeys(public, secret, server_public)
