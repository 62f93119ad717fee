"""Verb `worker --connect ADDRESS`: a reconstruction worker for a daemon on another machine.

The same worker the daemon starts locally (``maskrun.daemon.compute.worker.WorkerLoop``),
connected to the daemon's ``[reconstruction] worker_address``: frame sets come
from tcp://HOST:PORT, estimates go back to tcp://HOST:PORT+1. It serves run
after run (ZeroMQ reconnects by itself when the daemon restarts) until
interrupted, or until ``--idle-exit-s`` passes without work. Any address off
loopback needs ``--keys DIR`` (``client.key_secret`` and ``server.key`` from
``maskrun keys DIR``; the daemon must list the client key in its authorized
clients folder).
"""

from __future__ import annotations

import os
import signal
import socket

from rich.console import Console


def register(sub) -> None:
    p = sub.add_parser("worker", help="run a reconstruction worker for a daemon (this or another machine)")
    p.add_argument("--connect", required=True, metavar="ADDRESS",
                   help="the daemon's worker address tcp://HOST:PORT ([reconstruction] worker_address)")
    p.add_argument("--keys", default=None, metavar="DIR",
                   help="key folder with client.key_secret and server.key (needed off loopback)")
    p.add_argument("--name", default=None, help="worker name recorded with its estimates (default: host:pid)")
    p.add_argument("--idle-exit-s", type=float, default=None, help="exit after this many seconds without a frame set")
    p.add_argument("--threads", type=int, default=1, help="FFT/BLAS threads (default 1)")
    p.set_defaults(func=cmd_worker)


def cmd_worker(args) -> int:
    from maskrun.daemon.commands.cli import CommandError
    from maskrun.daemon.compute.remote_workers import WorkerAddressError, worker_endpoints
    from maskrun.daemon.security import KeyFileError, is_loopback_address, load_client_keys

    if args.threads < 1:
        raise CommandError("--threads must be at least 1")
    if args.idle_exit_s is not None and not args.idle_exit_s > 0:
        raise CommandError("--idle-exit-s must be a positive number of seconds")
    try:
        frames, results = worker_endpoints(args.connect)
    except (WorkerAddressError, ValueError) as exc:
        raise CommandError(str(exc)) from None
    keys = None
    if args.keys:
        try:
            keys = load_client_keys(args.keys)
        except KeyFileError as exc:
            raise CommandError(str(exc)) from None
    elif not is_loopback_address(args.connect):
        raise CommandError(f"{args.connect} is not on loopback: give --keys DIR (client.key_secret and server.key "
                           "from 'maskrun keys DIR'; the daemon must authorize client.key)")
    for var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS"):
        os.environ[var] = str(args.threads)
    from maskrun.reconstruct.fft import set_max_workers

    set_max_workers(args.threads)

    from maskrun.daemon.compute.worker import WorkerLoop

    name = args.name or f"{socket.gethostname()}:{os.getpid()}"
    console = Console(stderr=True, highlight=False)
    loop = WorkerLoop(frames, results, name=name, client_keys=keys, obey_stop=False)
    previous = signal.signal(signal.SIGTERM, lambda *_: (_ for _ in ()).throw(KeyboardInterrupt()))
    console.print(f"worker {name}: frame sets from {frames}, estimates to {results}"
                  f"{' (CURVE)' if keys else ''}; Ctrl-C to stop")
    try:
        loop.serve(args.idle_exit_s)
    except KeyboardInterrupt:
        pass
    finally:
        signal.signal(signal.SIGTERM, previous)
        loop.close()
    console.print(f"worker {name}: stopped")
    return 0
