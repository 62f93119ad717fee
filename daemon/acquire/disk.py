"""Disk planning: the expected size of a run file, the free space, and a guard during the run.

Before a run ``plan_disk(...)`` computes the expected file size from the plan
(frames, darks, estimates, masks, truth, logs) and compares it with the free
space of the output folder minus a reserve (``[run] min_free_disk_mb``):

* expected + reserve > free            -> ``DiskSpaceError`` (the run does not start, nothing written);
* expected > half of (free - reserve)  -> a warning (other writers may fill the rest overnight).

During the run ``DiskGuard.check()`` (called before every frame) stops the run safely when the free space drops below the reserve plus
room for two more frames, so the file is closed cleanly before the disk is
actually full. It reads the free space (``statvfs``, about 0.4 ms) at most every
``recheck_s`` seconds while there is plenty of room, and in between counts down
by the bytes of the frames written since; near the limit it reads before every
frame (within 256 MB of it). If the disk fills anyway (another process), the HDF5 write
fails with ENOSPC, which the sequencer turns into a safe stop (the store
raises ``StoreWriteError``); everything flushed before stays readable.
"""

from __future__ import annotations

import math
import shutil
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from maskrun.daemon.record.store import ESTIMATE_INFO_DTYPE, EVENT_DTYPE, FRAME_INFO_DTYPE, RunStore, StoreError

MB = 1024 * 1024
# HDF5 metadata (object headers, chunk indexes) per chunked row, generously; measured ~100-200 bytes
_ROW_OVERHEAD_BYTES = 256
_FILE_OVERHEAD_BYTES = 96 * 1024  # + ~25 kB of NeXus groups (format 2)


class DiskSpaceError(StoreError):
    """Not enough free disk for the run (before it starts, or while it runs)."""


@dataclass
class RunSizeEstimate:
    frames: int
    darks: int
    estimates: int
    bytes_total: int

    @property
    def mb(self) -> float:
        return self.bytes_total / MB


def expected_run_bytes(*, grid_shape, mask_count: int, passes: int, dark_frames: int, frame_itemsize: int = 2,
                       estimates: bool = True, truth: bool = False, flat_field: bool = False,
                       events_per_frame: float = 0.5) -> RunSizeEstimate:
    """Expected size of a run file in bytes (uncompressed chunks, one per frame; flat_field: the
    float32 per-pixel response map from a camera profile is stored too)."""
    h, w = (int(v) for v in grid_shape)
    px = h * w
    frames = passes * mask_count
    est = passes if estimates else 0
    frame_row = px * frame_itemsize + FRAME_INFO_DTYPE.itemsize + 2 * _ROW_OVERHEAD_BYTES
    size = (frames + dark_frames) * frame_row
    size += est * (px * 8 + ESTIMATE_INFO_DTYPE.itemsize + 2 * _ROW_OVERHEAD_BYTES)
    size += mask_count * px * 8 + (px * 16 if truth else 0) + (px * 4 if flat_field else 0)
    size += px * 8 if estimates else 0  # /entry/reconstruction: the latest amplitude and phase (float32 each)
    size += int(math.ceil((frames + dark_frames) * events_per_frame + 20)) * EVENT_DTYPE.itemsize
    size += _FILE_OVERHEAD_BYTES
    size += RunStore.SPACE_RESERVE_BYTES + 4 * px * frame_itemsize  # the emergency reserve beside the file
    return RunSizeEstimate(frames, dark_frames, est, int(size))


def free_bytes(folder: str | Path) -> int:
    """Free bytes for an unprivileged writer in ``folder`` (or its nearest existing parent)."""
    probe = Path(folder)
    while not probe.exists() and probe != probe.parent:
        probe = probe.parent
    return int(shutil.disk_usage(probe).free)


@dataclass
class DiskPlan:
    expected_bytes: int
    free_bytes: int
    reserve_bytes: int
    warning: str = ""

    def describe(self) -> str:
        return (f"expected file size {self.expected_bytes / MB:.1f} MB; free {self.free_bytes / MB:.0f} MB "
                f"(reserve {self.reserve_bytes / MB:.0f} MB)")


def plan_disk(folder: str | Path, expected_bytes: int, reserve_bytes: int) -> DiskPlan:
    """Compare the expected size with the free space; raise DiskSpaceError if it does not fit."""
    free = free_bytes(folder)
    plan = DiskPlan(int(expected_bytes), free, int(reserve_bytes))
    usable = free - reserve_bytes
    if expected_bytes > usable:
        raise DiskSpaceError(
            f"{folder}: not enough free disk for this run: it needs about {expected_bytes / MB:.1f} MB, "
            f"{free / MB:.1f} MB are free and {reserve_bytes / MB:.1f} MB must stay free ([run] min_free_disk_mb). "
            "Free some space, choose another output_dir, or take fewer passes"
        )
    if expected_bytes > 0.5 * usable:
        plan.warning = (f"the run will use {expected_bytes / MB:.1f} MB of the {usable / MB:.1f} MB usable "
                        f"in {folder} ({100 * expected_bytes / max(usable, 1):.0f} %); other writers may fill the rest")
    return plan


class DiskGuard:
    """Checked before each frame: raises DiskSpaceError when free space < reserve + two frames.

    ``recheck_s``: longest time between two real readings of the free space while the estimate
    (last reading minus the frames written since) stays more than ``plenty_bytes`` above the
    limit; closer to the limit every check reads, so another writer would have to fill
    ``plenty_bytes`` (256 MB by default) within ``recheck_s`` to get past the guard (and then the
    write's ENOSPC still stops the run safely). ``clock``: seconds, monotonic."""

    def __init__(self, folder: str | Path, reserve_bytes: int, bytes_per_frame: int, *, recheck_s: float = 0.5,
                 plenty_bytes: int = 256 * MB, clock=time.monotonic):
        self.folder = Path(folder)
        self.reserve_bytes = int(reserve_bytes)
        self.frame_bytes = int(bytes_per_frame) + 2 * _ROW_OVERHEAD_BYTES
        self.margin_bytes = 2 * self.frame_bytes + 16 * 1024
        self.recheck_s = float(recheck_s)
        self.plenty_bytes = int(plenty_bytes)
        self._clock = clock
        self._last_free: int | None = None
        self._last_read_s = -math.inf
        self._frames_since_read = 0
        self.readings = 0  # real statvfs readings so far

    @property
    def limit_bytes(self) -> int:
        return self.reserve_bytes + self.margin_bytes

    def check(self) -> int:
        """Free bytes (read, or estimated from the last reading); raises DiskSpaceError below the limit."""
        now = self._clock()
        if self._last_free is not None and now - self._last_read_s < self.recheck_s:
            estimate = self._last_free - self._frames_since_read * self.frame_bytes
            if estimate > self.limit_bytes + self.plenty_bytes:
                self._frames_since_read += 1
                return estimate
        free = free_bytes(self.folder)
        self.readings += 1
        self._last_free, self._last_read_s, self._frames_since_read = free, now, 1
        if free < self.limit_bytes:
            raise DiskSpaceError(
                f"{self.folder}: free disk down to {free / MB:.2f} MB (reserve {self.reserve_bytes / MB:.2f} MB): "
                "the run stopped before the disk is full. Free some space, then continue with 'maskrun resume'"
            )
        return free


def estimate_duration_s(*, passes: int, mask_count: int, dark_frames: int, exposure_s: float, settle_s: float = 0.0,
                        readout_s: float = 0.0, interval_s: float | None = None, overhead_s: float = 0.01) -> float:
    """Expected wall time of a run (seconds): darks, passes, and the waits of a time series."""
    frame_s = exposure_s + readout_s + overhead_s
    pass_s = mask_count * (frame_s + settle_s)
    total = dark_frames * frame_s
    if interval_s and passes > 1:
        total += (passes - 1) * max(interval_s, pass_s) + pass_s
    else:
        total += passes * pass_s
    return float(total)


def series_passes(interval_s: float, duration_s: float) -> int:
    """Frame sets of a time series: one at t = 0, interval, 2 interval, ... while t < duration."""
    return max(1, int(math.ceil(duration_s / interval_s - 1e-9)))


def frame_itemsize(bit_depth: int) -> int:
    return int(np.dtype(np.uint16 if bit_depth > 8 else np.uint8).itemsize)
