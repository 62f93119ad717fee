"""The simulated bench's physical state shared between processes: a small memory-mapped file.

When the firmware simulators run as their own processes (``[simulation] firmware_processes``),
the light path is still computed in the maskrun process (the simulated camera reads the
optics), but the beam shutter belongs to the safety box's process and the shown mask and the
trigger line to the modulator's. They meet here, as they would in the lab in the light itself:

    byte 0   shutter open (0/1)        written by the safety box process
    byte 1   interlock closed (0/1)    written by whoever moves the doors (maskrun's 'simulate')
    4..8     shown mask (int32, -1 = none)        written by the modulator process
    8..16    trigger pulses fired (uint64)        written by the modulator process

Single aligned writes of one field; readers see either the old or the new value.
"""

from __future__ import annotations

import mmap
import os
import struct
from pathlib import Path

SIZE = 64
_NO_MASK = -(2**31)  # shown_mask None (a blank modulator); -1 is the simulated optics' CUSTOM_IMAGE


class SharedBenchState:
    """Open (``create=True``: make) the shared state file and map it."""

    def __init__(self, path: str | Path, create: bool = False):
        self.path = str(path)
        flags = os.O_RDWR | (os.O_CREAT | os.O_TRUNC if create else 0)
        fd = os.open(self.path, flags, 0o600)
        try:
            if create:
                os.ftruncate(fd, SIZE)
            self._map = mmap.mmap(fd, SIZE)
        finally:
            os.close(fd)
        if create:
            self.shutter_open = False
            self.interlock_closed = True
            self.shown_mask = None

    @property
    def shutter_open(self) -> bool:
        return self._map[0] == 1

    @shutter_open.setter
    def shutter_open(self, value: bool) -> None:
        self._map[0] = 1 if value else 0

    @property
    def interlock_closed(self) -> bool:
        return self._map[1] == 1

    @interlock_closed.setter
    def interlock_closed(self, value: bool) -> None:
        self._map[1] = 1 if value else 0

    @property
    def shown_mask(self) -> int | None:
        k = struct.unpack_from("<i", self._map, 4)[0]
        return None if k == _NO_MASK else k  # negative indices are real: CUSTOM_IMAGE (-1) is a shown image

    @shown_mask.setter
    def shown_mask(self, value: int | None) -> None:
        struct.pack_into("<i", self._map, 4, _NO_MASK if value is None else int(value))

    @property
    def triggers_fired(self) -> int:
        return struct.unpack_from("<Q", self._map, 8)[0]

    def fire_trigger(self) -> None:
        struct.pack_into("<Q", self._map, 8, self.triggers_fired + 1)  # one writer: the modulator process

    def close(self) -> None:
        try:
            self._map.close()
        except (BufferError, ValueError):
            pass
