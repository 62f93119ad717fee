"""Verb `firmware KIND --state FILE`: run a simulated device's firmware as its own process.

The bench starts these itself when ``[simulation] firmware_processes = true``; the verb is the
same program, for trying a device by hand (open its port with any serial terminal program) or
for benches that start their devices separately. See ``maskrun.simulators.firmware_process``.
"""

from __future__ import annotations


def register(sub) -> None:
    from maskrun.simulators.firmware_process import add_arguments

    p = sub.add_parser("firmware", help="run a simulated device's firmware (safety box or modulator) as its own "
                       "process on a pseudo-terminal (what [simulation] firmware_processes starts)")
    add_arguments(p)
    p.set_defaults(func=cmd_firmware)


def cmd_firmware(args) -> int:
    from maskrun.simulators.firmware_process import serve

    return serve(args)
