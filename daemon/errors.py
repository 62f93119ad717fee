"""The error a command reports to the user: raised by the verbs and by the bench-calibration frames below
them, printed by the command line without a traceback (``maskrun.daemon.commands.cli``)."""


class CommandError(RuntimeError):
    """A verb failed for a reason the user can fix; the message says how."""
