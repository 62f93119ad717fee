"""Verbs for the service: `serve CONFIG` (the daemon), `keys DIR`, and the client verbs
`status`, `acknowledge`, `start`, `pause`, `resume`, `stop`, `exposure`, `darks`, `align`,
`shutdown`, `watch` that talk to a running daemon.

Client verbs find the daemon at ``--address`` (default: $MASKRUN_CONTROL, else
``[service] control_address`` of ``--config``, else tcp://127.0.0.1:5650) and load
CURVE keys from ``--keys DIR`` (or $MASKRUN_KEYS) when the daemon uses them.
"""

from __future__ import annotations

import json
import os

from rich.console import Console

from maskrun.daemon.service.client import DEFAULT_CONTROL_ADDRESS


def _client_options(p) -> None:
    p.add_argument("--address", help="control address of the daemon (default: $MASKRUN_CONTROL, the --config "
                   f"[service] control_address, or {DEFAULT_CONTROL_ADDRESS})")
    p.add_argument("--config", help="bench config whose [service] table gives the control address")
    p.add_argument("--keys", help="folder from 'maskrun keys' (client.key_secret, server.key) for a remote daemon")
    p.add_argument("--timeout-s", type=float, default=5.0, help="wait this long for each reply (default 5)")


def register(sub) -> None:
    p = sub.add_parser("serve", help="run the daemon: owns the bench (shutter closed, idle), control and stream sockets")
    p.add_argument("config", help="bench config (TOML)")
    p.add_argument("--control", help="control address, overriding [service] control_address")
    p.add_argument("--publish", help="stream address, overriding [service] publish_address")
    p.add_argument("--ready-file", help="write the bound addresses here (JSON) once the daemon answers")
    p.set_defaults(func=cmd_serve)

    p = sub.add_parser("keys", help="make CURVE key pairs (server and client) for a daemon reachable from the network")
    p.add_argument("dir", help="folder for the keys (created)")
    p.add_argument("--overwrite", action="store_true", help="replace existing keys (old clients lose access)")
    p.set_defaults(func=cmd_keys)

    p = sub.add_parser("status", help="state of a running daemon")
    _client_options(p)
    p.add_argument("--json", action="store_true", help="print the whole status as JSON")
    p.set_defaults(func=cmd_status)

    p = sub.add_parser("acknowledge", help="read the laser-safety notice of a running daemon and acknowledge it")
    _client_options(p)
    p.add_argument("--operator", help="who acknowledges (default: your user name)")
    p.add_argument("--yes", action="store_true", help="acknowledge without the prompt (the notice is still shown)")
    p.set_defaults(func=cmd_acknowledge)

    p = sub.add_parser("start", help="start a run on a running daemon")
    _client_options(p)
    p.add_argument("--passes", type=int)
    p.add_argument("--exposure-s", type=float)
    p.add_argument("--dark-frames", type=int)
    p.add_argument("--interval-s", type=float, help="start a pass every INTERVAL seconds (time series)")
    p.add_argument("--name", help="run name (file name prefix)")
    p.add_argument("--output-dir", help="folder for the run file (on the daemon's machine)")
    p.add_argument("--output-path", help="the run file itself (.h5, must not exist)")
    p.add_argument("--wait", action="store_true", help="wait until the run ends and print its outcome")
    p.set_defaults(func=cmd_start)

    # 'resume' is shared with cmd_resume (registered after this module): with a run file it continues a
    # stopped run file; without, it resumes the paused run of the running daemon (handled here)
    for verb, help_ in (("pause", "pause the run (shutter closed)"),
                        ("resume", "resume the paused run of a running daemon (or: resume RUN.h5)"),
                        ("stop", "stop the run or align mode (frames taken are kept)"),
                        ("shutdown", "stop everything, close the shutter and devices, end the daemon")):
        p = sub.add_parser(verb, help=help_)
        _client_options(p)
        p.set_defaults(func=cmd_simple, verb_name=verb)

    p = sub.add_parser("exposure", help="set the exposure for the next run (at once in align mode)")
    _client_options(p)
    p.add_argument("exposure_s", type=float, help="seconds")
    p.set_defaults(func=cmd_exposure)

    p = sub.add_parser("darks", help="take dark frames (shutter closed) on an idle daemon")
    _client_options(p)
    p.add_argument("--count", type=int, default=8)
    p.set_defaults(func=cmd_darks)

    p = sub.add_parser("align", help="align mode: free-running frames, live figures and a fast phase image")
    _client_options(p)
    p.add_argument("--mask", type=int, help="hold this mask (default: cycle all masks, with live reconstruction)")
    p.add_argument("--exposure-s", type=float)
    p.add_argument("--iterations", type=int, help="follow-mode iterations per frame set (default 30)")
    p.add_argument("--stop", action="store_true", help="end align mode")
    p.set_defaults(func=cmd_align)

    p = sub.add_parser("watch", help="live dashboard of a running daemon (progress, figures, frame and phase images)")
    _client_options(p)
    p.add_argument("--stream", help="stream address (default: asked from the daemon)")
    p.add_argument("--duration-s", type=float, help="stop after this long (default: until Ctrl-C)")
    p.add_argument("--refresh-hz", type=float, default=4.0)
    p.set_defaults(func=cmd_watch)


# --- daemon side ------------------------------------------------------------------------------
def cmd_serve(args) -> int:
    import zmq

    from maskrun.daemon.commands.cli import CommandError
    from maskrun.daemon.config import load_config
    from maskrun.daemon.security import BadAddress, InsecureBinding, KeyFileError
    from maskrun.daemon.service.server import serve

    cfg = load_config(args.config)
    console = Console(highlight=False)
    try:
        return serve(cfg, control_address=args.control, publish_address=args.publish, ready_file=args.ready_file,
                     log=lambda line: console.print(line, soft_wrap=True))
    except (InsecureBinding, KeyFileError, BadAddress) as exc:
        raise CommandError(str(exc)) from None
    except (OSError, zmq.ZMQError) as exc:  # e.g. 'Address already in use'
        raise CommandError(f"cannot bind the service sockets: {exc}; is another daemon running? "
                           "choose other addresses with --control/--publish") from None


def cmd_keys(args) -> int:
    from maskrun.daemon.commands.cli import CommandError
    from maskrun.daemon.security import KeyFileError, generate_keys

    try:
        paths = generate_keys(args.dir, overwrite=args.overwrite)
    except KeyFileError as exc:
        raise CommandError(str(exc)) from None
    c = Console(highlight=False)
    c.print(f"Server keys: {paths['server_secret']} (keep on the daemon's machine), {paths['server_public']}")
    c.print(f"Client keys: {paths['client_secret']} (give to the client), {paths['client_public']}")
    c.print("In the daemon's config:\n  [service]\n"
            f"  server_secret_key = \"{paths['server_secret']}\"\n  authorized_clients_dir = \"{paths['authorized_clients']}\"",
            markup=False)
    c.print(f"Clients: maskrun status --address tcp://HOST:5650 --keys {args.dir}  "
            "(the folder needs client.key_secret and server.key)")
    return 0


# --- client side --------------------------------------------------------------------------------
def _address(args) -> str:
    if args.address:
        return args.address
    if os.environ.get("MASKRUN_CONTROL"):
        return os.environ["MASKRUN_CONTROL"]
    if args.config:
        from maskrun.daemon.config import load_config

        return load_config(args.config).service.control_address
    return DEFAULT_CONTROL_ADDRESS


def _client(args):
    from maskrun.daemon.commands.cli import CommandError
    from maskrun.daemon.service.client import ServiceClient
    from maskrun.daemon.security import KeyFileError

    try:
        return ServiceClient(_address(args), keys=args.keys or os.environ.get("MASKRUN_KEYS") or None,
                             timeout_s=args.timeout_s)
    except KeyFileError as exc:
        raise CommandError(str(exc)) from None


def _call(args, fn):
    """Run fn(client); refused requests and an absent daemon become one-line errors."""
    from maskrun.daemon.commands.cli import CommandError
    from maskrun.daemon.service.client import RequestRefused, ServiceUnreachable

    client = _client(args)
    try:
        return fn(client)
    except (RequestRefused, ServiceUnreachable, TimeoutError) as exc:
        raise CommandError(str(exc)) from None
    finally:
        client.close()


def cmd_status(args) -> int:
    st = _call(args, lambda c: c.status())
    c = Console(highlight=False)
    if args.json:
        c.print_json(json.dumps(st))
        return 0
    c.print(_status_lines(st), soft_wrap=True, markup=False)  # messages and paths are plain text
    return 0


def _status_lines(st: dict) -> str:
    from maskrun.daemon.record.run_state import alert_line, progress_line, run_rows
    from maskrun.daemon.safety.safety_readings import safety_text

    s = st.get("safety") or {}
    inter, shutter = safety_text(s)
    run = st.get("run")
    exposure = (run or {}).get("exposure_s") or st.get("exposure_s")
    lines = [f"state: {st['state']}   control {st.get('control_address')}   stream {st.get('publish_address')}",
             f"notice acknowledged: {'yes (' + s['acknowledgement']['who'] + ')' if s.get('acknowledged') else 'NO'}"
             f"   interlock: {inter}   shutter: {shutter}"
             f"   exposure {exposure:g} s {'(this run)' if run else '(next run)'}"]
    if run:
        lines.append(f"run: {run['state']}, {progress_line(run)}")
        lines += [f"  {k}: {v}" for k, v in run_rows(run)]
    if st.get("align"):
        a = st["align"]
        lines.append(f"align: {a.get('frames', 0)} frames, {a.get('fps', 0):.1f} fps, peak {a.get('peak_dn')} DN, "
                     f"centroid {a.get('centroid_rc')}, total {a.get('total_counts_dn')} DN")
    if st.get("last_run") and not run:
        lr = st["last_run"]
        lines.append(f"last run: {lr.get('outcome') or lr['state']} ({lr['frames']} frames)")
        lines += [f"  {k}: {v}" for k, v in run_rows(lr)]
        if lr.get("warnings"):
            lines.append(f"  warnings in its log: {len(lr['warnings'])}, the last: {alert_line(lr['warnings'][-1])}")
    for a in st.get("recent_alerts", [])[-3:]:
        lines.append(f"alert {alert_line(a)}")
    return "\n".join(lines)


def cmd_acknowledge(args) -> int:
    import getpass
    import socket
    import sys

    from rich.panel import Panel

    from maskrun.daemon.commands.cli import CommandError

    def go(client):
        notice = client.notice()
        c = Console(highlight=False)
        c.print(Panel("\n".join(notice["notice"]), title=" LASER SAFETY NOTICE ", border_style="yellow"))
        if not args.yes:
            if not sys.stdin.isatty():
                raise CommandError("no terminal to ask at: read the notice above and run again with --yes")
            c.print("Type [bold]yes[/] to confirm you have read the notice and the area is safe to run: ", end="")
            if sys.stdin.readline().strip().lower() != "yes":
                raise CommandError("the notice was not acknowledged; nothing changed")
        who = args.operator or getpass.getuser()
        how = f"maskrun acknowledge{' --yes' if args.yes else ' (prompt)'} on {socket.gethostname()}"
        r = client.acknowledge(who, how)
        c.print(f"Acknowledged by {r['acknowledged_by']} at {r['when_utc']} (valid {r['valid_s']:.0f} s).")
        return 0

    return _call(args, go)


def cmd_start(args) -> int:
    def go(client):
        r = client.start(passes=args.passes, exposure_s=args.exposure_s, dark_frames=args.dark_frames,
                         interval_s=args.interval_s, name=args.name, output_dir=args.output_dir,
                         output_path=args.output_path)
        c = Console(highlight=False)
        c.print(f"Run started: {r['frames_total']} frames, exposure {r['exposure_s']:g} s -> {r['output_path']}",
                markup=False)
        if not args.wait:
            return 0
        st = client.wait_idle(timeout_s=7 * 86400)
        lr = st.get("last_run") or {}
        c.print(f"Run {lr.get('state')}: {lr.get('frames')} frames, {lr.get('passes_complete')} frame sets"
                f"{' (' + lr['message'] + ')' if lr.get('message') else ''}", markup=False)
        return 0 if lr.get("state") == "finished" else 1

    return _call(args, go)


def cmd_simple(args) -> int:
    from maskrun.daemon.service.client import reply_sentence

    r = _call(args, lambda c: c.request(args.verb_name))
    Console(highlight=False).print(reply_sentence(args.verb_name, r), markup=False)
    return 0


def cmd_exposure(args) -> int:
    r = _call(args, lambda c: c.set_exposure(args.exposure_s))
    Console(highlight=False).print(f"exposure {r['exposure_s']:g} s")
    return 0


def cmd_darks(args) -> int:
    r = _call(args, lambda c: c.take_darks(args.count, wait=True))
    Console(highlight=False).print(f"{r['count']} dark frames, mean {r['mean_dn']:.2f} DN (std of the mean frame "
                                   f"{r['std_dn']:.2f} DN) at {r['exposure_s']:g} s")
    return 0


def cmd_align(args) -> int:
    if args.stop:
        _call(args, lambda c: c.align_stop())
        Console(highlight=False).print("align mode stopping (shutter closes)")
        return 0
    r = _call(args, lambda c: c.align_start(mask=args.mask, exposure_s=args.exposure_s, iterations=args.iterations))
    Console(highlight=False).print(f"align mode on: {'cycling all masks' if r['cycling'] else 'mask ' + str(r['mask'])}, "
                                   f"exposure {r['exposure_s']:g} s; reconstruction: {r['reconstruction']}. "
                                   "See it with 'maskrun watch'; end it with 'maskrun stop'.")
    return 0


def cmd_watch(args) -> int:
    from maskrun.daemon.show.watch import run_watch

    keys_dir = args.keys or os.environ.get("MASKRUN_KEYS")
    st = _call(args, lambda c: c.status()) if not args.stream or keys_dir else {}
    stream = args.stream or st["publish_address"]
    keys = None
    if st.get("stream_curve") and keys_dir:
        from maskrun.daemon.security import load_client_keys

        keys = load_client_keys(keys_dir)  # the stream is a CURVE server with the daemon's keys
    run_watch(stream, Console(), duration_s=args.duration_s, refresh_hz=args.refresh_hz, keys=keys)
    return 0
