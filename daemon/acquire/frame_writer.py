"""The frame writer: appends the run's frames to the run file in a thread of its own.

The sequencer hands every accepted frame to ``FrameWriter.submit`` and goes on with the next
exposure; the writer thread appends it (``RunStore.append_frame``) and flushes the file

* after the last frame of every frame set (``submit(..., set_end=...)``), and
* at least every ``flush_interval_s`` seconds while frames arrive,

so a crash loses no complete frame set and at most ``flush_interval_s`` of a set in progress.

The queue between the two is bounded (``max_queue`` frames): when it is full, ``submit`` waits
(back-pressure on acquisition), it never drops a frame. Frames are written in the order they
were submitted; their file rows are known at submit time (``submit`` returns the row).

A frame set counts as complete only when it is *durable*: the writer has flushed its last
frame. The sequencer learns that from ``durable_sets()`` and only then announces the set
(stream message, live reconstruction, progress), so whatever was announced is in the file.

A write error in the thread (disk full, I/O error) is kept and raised in the sequencer's
thread by the next ``submit``, ``durable_sets``, ``wait_durable`` or ``close``; the rows written
since the last good flush are cut from the file (their data may not have reached the disk), and
frames queued after it cannot be written either (the run stops; what was flushed before is kept).

The store is shared with the sequencer thread (events, darks, refused frames, estimates): the
store serialises its own calls (``RunStore.lock``), so a flush never lands between a frame's
data and its info row.
"""
from __future__ import annotations

import collections
import queue
import threading
import time
from dataclasses import dataclass

import numpy as np

from maskrun.daemon.record.store import RunStore, StoreError

__all__ = ["FrameWriter", "WriterStats"]

_STOP = object()


@dataclass
class WriterStats:
    """Counters of one writer (read by the bench and the status)."""

    frames_written: int = 0
    flushes: int = 0
    queue_high_water: int = 0
    write_s_total: float = 0.0
    waited_s_total: float = 0.0  # time submit() spent waiting for room (back-pressure)


class FrameWriter:
    def __init__(self, store: RunStore, max_queue: int = 16, flush_interval_s: float = 0.5):
        if max_queue < 1:
            raise ValueError(f"max_queue must be >= 1 frame; got {max_queue}")
        self.store = store
        self.flush_interval_s = float(flush_interval_s)
        self.stats = WriterStats()
        self._queue: queue.Queue = queue.Queue(maxsize=int(max_queue))
        self._next_row = store.frame_count
        self._error: BaseException | None = None
        self._durable: collections.deque = collections.deque()
        self._durable_cv = threading.Condition()
        self._outstanding_sets = 0
        self._closed = False
        self._thread = threading.Thread(target=self._loop, name="maskrun-frame-writer", daemon=True)
        self._thread.start()

    # --- the sequencer's side ---------------------------------------------------------
    def submit(self, pixels: np.ndarray, info, set_end=None) -> int:
        """Queue one frame (and its FRAME_INFO record) for the file; returns its row in the file.

        ``set_end``: any token (e.g. the set index); when given, this frame completes a frame set:
        the writer flushes after it and then reports the token in ``durable_sets``. Waits while the
        queue is full (never drops). The caller must not modify ``pixels`` afterwards."""
        self._raise_if_failed()
        if self._closed:
            raise StoreError("the frame writer is closed")
        row = self._next_row
        self._next_row += 1
        item = (pixels, info, set_end)
        if set_end is not None:
            with self._durable_cv:
                self._outstanding_sets += 1
        try:
            self._queue.put_nowait(item)
        except queue.Full:
            t0 = time.perf_counter()
            while True:
                self._raise_if_failed()
                try:
                    self._queue.put(item, timeout=0.2)
                    break
                except queue.Full:
                    continue
            self.stats.waited_s_total += time.perf_counter() - t0
        depth = self._queue.qsize()
        if depth > self.stats.queue_high_water:
            self.stats.queue_high_water = depth
        return row

    def durable_sets(self) -> list:
        """The ``set_end`` tokens whose frames are flushed to the file since the last call (in order)."""
        self._raise_if_failed()
        with self._durable_cv:
            out = list(self._durable)
            self._durable.clear()
        return out

    def wait_durable(self, timeout_s: float | None = None) -> bool:
        """Wait until every submitted frame set is durable (True) or the timeout passes (False)."""
        deadline = None if timeout_s is None else time.monotonic() + timeout_s
        with self._durable_cv:
            while self._outstanding_sets > 0 and self._error is None:
                left = None if deadline is None else deadline - time.monotonic()
                if left is not None and left <= 0:
                    return False
                self._durable_cv.wait(0.2 if left is None else min(left, 0.2))
        self._raise_if_failed()
        return True

    @property
    def queued(self) -> int:
        return self._queue.qsize()

    def close(self) -> None:
        """Write and flush everything queued, then stop the thread. Raises the thread's write error."""
        if not self._closed:
            self._closed = True
            self._queue.put(_STOP)
            self._thread.join()
        self._raise_if_failed()

    # --- the writer thread --------------------------------------------------------------
    def _raise_if_failed(self) -> None:
        if self._error is not None:
            raise self._error

    def _loop(self) -> None:
        last_flush = time.monotonic()
        dirty = False
        while True:
            try:
                item = self._queue.get(timeout=self.flush_interval_s if dirty else None)
            except queue.Empty:
                item = None
            if item is _STOP:
                if dirty and self._error is None:
                    self._flush()
                self._publish_durable_pending()
                return
            if item is not None and self._error is None:
                pixels, info, set_end = item
                t0 = time.perf_counter()
                try:
                    self.store.append_frame(pixels, info)
                    self.stats.frames_written += 1
                    dirty = True
                    if set_end is not None:
                        self._flush()
                        dirty = False
                        last_flush = time.monotonic()
                        with self._durable_cv:
                            self._durable.append(set_end)
                            self._outstanding_sets -= 1
                            self._durable_cv.notify_all()
                except BaseException as exc:  # kept, raised in the sequencer's thread
                    self._fail(exc)
                self.stats.write_s_total += time.perf_counter() - t0
            if dirty and self._error is None and time.monotonic() - last_flush >= self.flush_interval_s:
                try:
                    self._flush()
                except BaseException as exc:
                    self._fail(exc)
                dirty = False
                last_flush = time.monotonic()

    def _flush(self) -> None:
        self.store.flush()
        self.stats.flushes += 1

    def _fail(self, exc: BaseException) -> None:
        # rows appended since the last good flush may have their data lost (a full disk): take them out,
        # so no frame set looks complete with frames that never reached the disk
        self.store.truncate_frames(self.store._flushed_frames)
        with self._durable_cv:
            if self._error is None:
                self._error = exc
            self._durable_cv.notify_all()

    def _publish_durable_pending(self) -> None:
        with self._durable_cv:
            self._durable_cv.notify_all()
