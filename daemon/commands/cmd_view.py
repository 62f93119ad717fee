"""Verb `view [ADDRESS]`: the live window for aligning the bench (needs the 'view' extra)."""

from __future__ import annotations

import argparse

DEFAULT_STREAM_ADDRESS = "tcp://127.0.0.1:5651"  # [service] publish_address default (daemon/config.py)


def register(sub) -> None:
    p = sub.add_parser(
        "view",
        help="live window on a running bench: frame, amplitude and phase estimates, error per pass, status "
        "(needs the 'view' extra: pip install 'maskrun[view]')",
        description="Open a live window on the stream of `maskrun serve` (default address) or of `maskrun run` "
        "(give the address it prints). The window waits for data if the daemon is not there yet, and reconnects "
        "when it restarts. Close the window or press Ctrl-C to quit; the bench is not affected.",
    )
    p.add_argument("address", nargs="?",
                   help="stream address as printed by `maskrun serve` or `maskrun run`: tcp://HOST:PORT, HOST:PORT or "
                   f"just PORT (loopback); default: the service's default stream {DEFAULT_STREAM_ADDRESS}")
    p.add_argument("--config", help="take the address from this bench config's [service] publish_address (the "
                   "stream of `maskrun serve CONFIG`)")
    p.add_argument("--linear", action="store_true", help="show the frame in linear counts (default: log10)")
    p.add_argument("--unwrap", action="store_true", help="start with the phase unwrapped (default: wrapped)")
    p.add_argument("--size", default="1500x860", help="window size WIDTHxHEIGHT in pixels (default 1500x860)")
    p.add_argument("--screenshot", metavar="PNG", help="save the window as a PNG when it closes")
    p.add_argument("--exit-after", type=float, metavar="SECONDS", help="close the window after this many seconds")
    p.add_argument("--state-file", metavar="JSON", help=argparse.SUPPRESS)  # automation/test hook, see view.py
    p.set_defaults(func=cmd_view)


def _address_from_config(path: str) -> str:
    from maskrun.daemon.commands.cli import CommandError
    from maskrun.daemon.config import load_config

    cfg = load_config(path)
    addr = cfg.service.publish_address
    if addr.rstrip("/").endswith(":0"):
        raise CommandError(f"{path}: service.publish_address is {addr!r}, a port picked at random when the daemon "
                           "starts; give the address `maskrun serve` printed (maskrun view tcp://127.0.0.1:PORT), or "
                           "set a fixed port in the config")
    return addr


def cmd_view(args) -> int:
    from maskrun.daemon.commands.cli import CommandError
    from maskrun.daemon.show.view import ViewUnavailable, normalise_address, run_view

    if args.address and args.config:
        raise CommandError("give either ADDRESS or --config, not both")
    if args.config:
        address = _address_from_config(args.config)
    elif args.address:
        address = args.address
    else:
        address = DEFAULT_STREAM_ADDRESS
    try:
        address = normalise_address(address)
    except ValueError as exc:
        raise CommandError(str(exc)) from None
    try:
        w, h = (int(v) for v in args.size.lower().split("x"))
        if w < 200 or h < 200:
            raise ValueError
    except ValueError:
        raise CommandError(f"--size {args.size!r}: give WIDTHxHEIGHT in pixels, each at least 200, e.g. 1400x900") \
            from None
    if args.exit_after is not None and not args.exit_after > 0:
        raise CommandError("--exit-after must be a positive number of seconds")
    try:
        return run_view(address, log_scale=not args.linear, unwrap=args.unwrap, size=(w, h),
                        state_file=args.state_file, screenshot=args.screenshot, exit_after_s=args.exit_after)
    except ViewUnavailable as exc:
        raise CommandError(str(exc)) from None
