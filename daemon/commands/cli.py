"""The `maskrun` command: one command, verbs that say what they do.

Each verb lives in a module that provides ``register(subparsers)``; the verb's
handler returns an exit code. Expected failures (bad config, unwritable
folder, device errors, refused safety acknowledgement) print one clear line
and exit non-zero without a traceback; set MASKRUN_DEBUG=1 to see tracebacks.
"""

from __future__ import annotations

import argparse
import errno
import importlib
import os
import sys

from rich.console import Console
from rich.markup import escape

from maskrun.daemon.errors import CommandError

COMMAND_MODULES = [
    "maskrun.daemon.commands.cmd_run",
    "maskrun.daemon.commands.cmd_inspect",
    "maskrun.daemon.commands.cmd_service",
    "maskrun.daemon.commands.cmd_calibrate",
    "maskrun.daemon.commands.cmd_reconstruct",
    "maskrun.daemon.commands.cmd_worker",
    "maskrun.daemon.commands.cmd_drivers",
    "maskrun.daemon.commands.cmd_screens",
    "maskrun.daemon.commands.cmd_cameras",
    "maskrun.daemon.commands.cmd_view",
    "maskrun.daemon.commands.cmd_report",
    "maskrun.daemon.commands.cmd_firmware",
    "maskrun.daemon.commands.cmd_modulator",
    "maskrun.daemon.commands.cmd_resume",  # after cmd_service: shares the verb 'resume' (run file, or the daemon)
]


def build_parser() -> argparse.ArgumentParser:
    ap = argparse.ArgumentParser(
        prog="maskrun",
        description="Run a coded-mask phase-imaging bench: sequence masks, take and check frames, "
        "store them safely, reconstruct live.",
    )
    sub = ap.add_subparsers(dest="verb", metavar="VERB")
    for name in COMMAND_MODULES:
        importlib.import_module(name).register(sub)
    return ap


def expected_errors() -> tuple[type[BaseException], ...]:
    from maskrun.drivers import DeviceError
    from maskrun.drivers.errors import DriverSettingsError, UnknownDriver

    from maskrun.daemon.config import ConfigError
    from maskrun.daemon.safety.safety import SafetyNotAcknowledged
    from maskrun.daemon.calibrate.camera_profile import ProfileError, ProfileMismatch
    from maskrun.daemon.record.store import StoreError

    return (ConfigError, StoreError, ProfileError, ProfileMismatch, SafetyNotAcknowledged, DeviceError, UnknownDriver, DriverSettingsError, CommandError)


def main(argv: list[str] | None = None) -> int:
    ap = build_parser()
    args = ap.parse_args(argv)
    if not getattr(args, "func", None):
        ap.print_help()
        return 2
    err = Console(stderr=True, highlight=False)
    try:
        return int(args.func(args) or 0)
    except expected_errors() as exc:
        if os.environ.get("MASKRUN_DEBUG"):
            raise
        for line in str(exc).splitlines():
            err.print("[bold red]error:[/]", escape(line), soft_wrap=True)  # escape: keep "[view]" etc. literal
        return 2
    except KeyboardInterrupt:
        err.print("[bold red]interrupted[/]")
        return 130
    except OSError as exc:
        if exc.errno not in (errno.EIO, errno.EPIPE):
            raise
        # the terminal went away (closed window, dropped ssh session, closed pipe): the run itself
        # has already been stopped safely and its file closed; there is no one left to tell
        return 129


if __name__ == "__main__":
    sys.exit(main())
