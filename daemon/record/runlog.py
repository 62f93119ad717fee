"""The plain-text run log beside the run file (``RUN.h5`` -> ``RUN.log``).

The same events as ``/entry/events`` inside the run file, one line each, so
they can be read with any tool (``tail -f RUN.log``) even if the HDF5 file
cannot be opened. Append-only: a resumed run adds to the same log. Every line
is written and flushed at once; a failure to write the text log never stops a
run (the event is still in the HDF5 file), it is reported once on stderr.

Line format (UTC, millisecond resolution, fields separated by two spaces):

    2026-12-02T05:43:22.123Z  warning  camera_timeout  attempt 1: no frame within 0.1 s; retrying in 0.10 s
"""

from __future__ import annotations

import sys
import time
from pathlib import Path


def text_log_path(run_path: str | Path) -> Path:
    """Where the text log of a run file lives: same folder, same stem, suffix .log."""
    return Path(run_path).with_suffix(".log")


def format_event(t_s: float, level: str, kind: str, message: str) -> str:
    """One log line (no newline)."""
    stamp = time.strftime("%Y-%m-%dT%H:%M:%S", time.gmtime(t_s)) + f".{int((t_s % 1) * 1000):03d}Z"
    message = " ".join(str(message).split())  # one line, whatever the message held
    return f"{stamp}  {level:<7}  {kind:<20}  {message}"


class TextLog:
    """Appends event lines to a text file; opened per write so it survives a crash with nothing buffered."""

    def __init__(self, path: str | Path):
        self.path = Path(path)
        self._failed = False

    def write(self, t_s: float, level: str, kind: str, message: str) -> bool:
        """Append one line; returns False (and warns once) if the file cannot be written."""
        try:
            with open(self.path, "a", encoding="utf-8") as fh:
                fh.write(format_event(t_s, level, kind, message) + "\n")
            return True
        except OSError as exc:
            if not self._failed:
                self._failed = True
                print(f"warning: cannot write the text run log {self.path} ({exc.strerror or exc}); "
                      "events are still recorded inside the run file", file=sys.stderr)
            return False
