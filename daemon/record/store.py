"""The run file: one HDF5 file per run, valid at every moment.

The layout (format ``maskrun-run`` version 2) is in ``daemon.record.run_layout`` and docs/run-file.md;
this module opens, creates, appends to and closes the file.

Crash safety: the file is created with the latest HDF5 format and switched to
SWMR mode before the first frame; raw data bypass HDF5's chunk cache
(``rdcc_nbytes=0``), so a frame's pixels are with the operating system (and a
write error is seen) at its append; the file is flushed after every complete
frame set and on a timer (``daemon.acquire.frame_writer``; events, darks and refused frames at once).
Datasets grow by resizing, never by creating new objects, so a reader (or a
reader after a SIGKILL) always sees a consistent file whose row counts may
differ by at most the frame in progress; readers use the shortest of
frames/frame_info.

Attributes cannot change once SWMR mode starts, so everything that happens
later (start, acknowledgement, faults, pauses, resumes, the end of the run) is
an event row; the run's outcome is the last ``run_end`` event. Each event is
also appended to a plain-text log beside the file (``daemon.record.runlog``).

A write failure (disk full, I/O error) raises ``StoreWriteError``; what was
flushed before it stays readable. A file left open by a killed writer is
repaired for appending by ``daemon.acquire.recovery`` (copy, verify, atomic replace).
"""

from __future__ import annotations

import os
import threading
import time
from pathlib import Path

import h5py
import numpy as np

from maskrun.daemon.record.nexus import iso_utc, write_latest
# the layout's names are used here, and imported from here by the rest of the daemon (one place to import a
# run file's writer, its rows and its flags)
from maskrun.daemon.record.run_layout import (  # noqa: F401
    FORMAT_NAME, FORMAT_VERSION, READABLE_VERSIONS, FLAG_SATURATED, FLAG_PHOTONS_LOW, FLAG_PHOTONS_HIGH,
    FLAG_RETAKEN, FLAG_ID_GAP, FLAG_TIMEOUT_RETRIED, FLAG_EXPOSURE_SHORTENED, FLAG_AFTER_RESUME,
    FLAG_MODULATOR_RETRIED, FLAG_RECONNECTED, FLAG_AFTER_PAUSE, FLAG_SHUTTER_CLOSED, FLAG_NAMES,
    FRAME_INFO_DTYPE, ESTIMATE_INFO_DTYPE, EVENT_MESSAGE_BYTES, EVENT_DTYPE, RunHeader, StoreError,
    StoreWriteError, estimate_info_record, flag_names, frame_info_record, write_layout,
)


def _is_disk_full(exc: BaseException) -> bool:
    text = str(exc)
    return getattr(exc, "errno", None) == 28 or "No space left" in text or "errno = 28" in text


def _encode(text: str, nbytes: int) -> bytes:
    raw = text.encode("utf-8", "replace")
    if len(raw) > nbytes:
        raw = raw[: nbytes - 3] + b"..."
    return raw


def _link_new(made: Path, path: Path) -> None:
    """Give the file ``made`` the name ``path``, never over an existing file (a hard link, then the
    old name removed; a plain rename where the file system has no hard links)."""
    try:
        os.link(made, path)
    except FileExistsError:
        raise StoreError(f"{path}: a run file of this name exists already; choose another name or folder") from None
    except OSError:
        if path.exists():
            raise StoreError(f"{path}: a run file of this name exists already; choose another name or folder") from None
        os.rename(made, path)
        return
    made.unlink()


def _open_swmr_append(path: Path, wait_s: float = 3.0) -> h5py.File:
    """Open a run file for appending in SWMR-write mode (newest format, no chunk cache). A reader
    holding the file's lock (one that opened it while it was not in SWMR mode) is waited for up to
    ``wait_s``, then named in a StoreError."""
    fapl = h5py.h5p.create(h5py.h5p.FILE_ACCESS)
    fapl.set_libver_bounds(h5py.h5f.LIBVER_LATEST, h5py.h5f.LIBVER_LATEST)
    cache = list(fapl.get_cache())
    cache[2] = 0  # rdcc_nbytes: raw data bypass the chunk cache, as in a new file
    fapl.set_cache(*cache)
    deadline = time.monotonic() + wait_s
    while True:
        try:
            fid = h5py.h5f.open(os.fsencode(path), h5py.h5f.ACC_RDWR | h5py.h5f.ACC_SWMR_WRITE, fapl=fapl)
            return h5py.File(fid)
        except (OSError, RuntimeError) as exc:
            if "lock" in str(exc) and time.monotonic() < deadline:
                time.sleep(0.05)
                continue
            hint = ("another program probably holds the file open: close it, then try again" if "lock" in str(exc)
                    else "it may need a repair first (maskrun resume repairs a killed run's file)")
            raise StoreError(f"{path}: cannot open the run file for appending ({exc}); {hint}") from None


class RunStore:
    """Writer of one run file. Its calls are serialised by ``lock`` (the frame writer thread appends frames
    while the sequencer thread logs events)."""

    def __init__(self, path: Path, h5: h5py.File, text_log: bool = True):
        # one writer at a time: the frame writer thread (daemon.acquire.frame_writer) appends frames while the
        # sequencer logs events; a flush must never land between a frame's data and its info row
        self.lock = threading.RLock()
        from maskrun.daemon.record.runlog import TextLog, text_log_path

        self.path = Path(path)
        self._f = h5
        self.text_log = TextLog(text_log_path(path)) if text_log else None
        e = h5["entry"]
        self._frames = e["frames"]
        self._frame_info = e["frame_info"]
        self._darks = e["darks"]
        self._dark_info = e["dark_info"]
        self._estimates = e["estimates"]
        self._estimate_info = e["estimate_info"]
        self._events = e["events"]
        self._refused = e.get("refused")  # absent in files written before it was added
        self._refused_info = e.get("refused_info")
        self._recon = e.get("reconstruction")  # the latest estimate as NXdata (version 2 files only)
        self._end_time = e.get("end_time") if "end_time" in e and e["end_time"].dtype.kind == "S" else None
        self._end_stamp = None
        self.refused_count = (min(self._refused.shape[0], self._refused_info.shape[0])
                              if self._refused is not None else 0)
        self.frame_count = min(self._frames.shape[0], self._frame_info.shape[0])
        self._flushed_frames = self.frame_count  # frame rows on disk as of the last good flush
        self.dark_count = min(self._darks.shape[0], self._dark_info.shape[0])
        self.estimate_count = min(self._estimates.shape[0], self._estimate_info.shape[0])
        self.event_count = self._events.shape[0]
        # A crash may leave one dataset a row longer than its partner; trim to agree.
        for ds, n in (
            (self._frames, self.frame_count),
            (self._frame_info, self.frame_count),
            (self._darks, self.dark_count),
            (self._dark_info, self.dark_count),
            (self._estimates, self.estimate_count),
            (self._estimate_info, self.estimate_count),
            (self._refused, self.refused_count),
            (self._refused_info, self.refused_count),
        ):
            if ds is not None and ds.shape[0] != n:
                ds.resize(n, axis=0)
        self.frame_shape = tuple(self._frames.shape[1:])
        self.bytes_per_frame = int(np.prod(self.frame_shape)) * self._frames.dtype.itemsize
        self._space_reserve = self._make_space_reserve()

    # --- emergency disk space ---------------------------------------------------------
    SPACE_RESERVE_BYTES = 256 * 1024

    def _make_space_reserve(self) -> Path | None:
        """Allocate a small file beside the run file (``RUN.h5.space``). When the disk fills up it is
        deleted, so HDF5 can still flush its metadata, the last event can be logged and the file
        closed cleanly (without it HDF5 keeps the half-flushed file open and crashes at exit)."""
        reserve = self.path.with_name(self.path.name + ".space")
        size = self.SPACE_RESERVE_BYTES + 4 * self.bytes_per_frame
        try:
            fd = os.open(reserve, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o644)
            try:
                try:
                    os.posix_fallocate(fd, 0, size)
                except (AttributeError, OSError):
                    os.write(fd, b"\0" * size)
            finally:
                os.close(fd)
        except OSError:
            reserve.unlink(missing_ok=True)
            return None
        return reserve

    def _release_space_reserve(self) -> bool:
        reserve, self._space_reserve = self._space_reserve, None
        if reserve is None:
            return False
        reserve.unlink(missing_ok=True)
        return True

    # --- creation ------------------------------------------------------------
    @classmethod
    def create(cls, path: str | Path, header: RunHeader, text_log: bool = True) -> RunStore:
        """Create a new run file. Refuses to overwrite. Removes the file again if creation fails."""
        path = Path(path)
        if path.exists():
            raise StoreError(f"{path}: a run file of this name exists already; choose another name or folder")
        try:
            path.parent.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise StoreError(f"{path.parent}: cannot create the output folder ({exc.strerror})") from None
        if not os.access(path.parent, os.W_OK):
            raise StoreError(f"{path.parent}: output folder is not writable; choose another output_dir")
        # made under a hidden name and linked to its own once in SWMR mode: a reader that opened it
        # before (a `maskrun inspect --follow` waiting for the run) would hold a lock that makes
        # switching SWMR on fail, and would read a file without its layout
        making = path.with_name(f".{path.name}.creating")
        making.unlink(missing_ok=True)
        try:
            f = h5py.File(making, "w", libver="latest", rdcc_nbytes=0)
        except OSError as exc:
            raise StoreError(f"{path}: cannot create the run file ({exc})") from None
        try:
            write_layout(f, header)
            f.attrs["file_name"] = path.name
            f.swmr_mode = True
            f.flush()
            _link_new(making, path)
        except Exception:
            f.close()
            making.unlink(missing_ok=True)
            raise
        return cls(path, f, text_log)

    @classmethod
    def reopen(cls, path: str | Path, text_log: bool = True) -> RunStore:
        """Open an existing run file to append to it (resume). The file must have been closed cleanly
        or be repaired first (see daemon.acquire.recovery)."""
        path = Path(path)
        # opened straight in SWMR-write mode: a file opened for appending first and switched to SWMR
        # after it would, if killed in between, carry the plain "open for write" flag, which no reader
        # (nor the repair) can open; killed in SWMR mode it stays readable and repairable. The row
        # trimming in __init__ is a resize, allowed in SWMR
        f = _open_swmr_append(path)
        if f.attrs.get("format") != FORMAT_NAME or "entry" not in f:
            f.close()
            raise StoreError(f"{path}: not a maskrun run file")
        try:
            store = cls(path, f, text_log)
        except Exception:
            f.close()
            raise
        return store

    # --- appending ---------------------------------------------------------------
    def _append(self, data_ds, info_ds, count: int, pixels: np.ndarray, info: np.void | tuple) -> int:
        with self.lock:
            return self._append_locked(data_ds, info_ds, count, pixels, info)

    def _append_locked(self, data_ds, info_ds, count: int, pixels: np.ndarray, info: np.void | tuple) -> int:
        if pixels.shape != self.frame_shape:
            raise StoreError(f"{self.path}: frame shape {pixels.shape} does not match the run's {self.frame_shape}")
        try:
            data_ds.resize(count + 1, axis=0)
            data_ds[count] = pixels
            info_ds.resize(count + 1, axis=0)
            info_ds[count] = info
        except (OSError, RuntimeError) as exc:
            for ds in (data_ds, info_ds):  # best effort: no half-written row stays visible
                try:
                    if ds.shape[0] > count:
                        ds.resize(count, axis=0)
                except Exception:
                    pass
            raise self._write_error(exc) from None
        return count

    def _write_error(self, exc: BaseException) -> StoreWriteError:
        full = _is_disk_full(exc)
        if full:
            self._release_space_reserve()  # room for HDF5 to flush its metadata and close cleanly
        why = "the disk is full" if full else f"{exc}"
        return StoreWriteError(f"{self.path}: writing the run file failed: {why}. Everything flushed before "
                               "is kept; free some space, then continue with 'maskrun resume'", disk_full=full)

    def append_frame(self, pixels: np.ndarray, info) -> int:
        """Append one frame and its info row (a FRAME_INFO_DTYPE record or tuple). Returns its index."""
        i = self._append(self._frames, self._frame_info, self.frame_count, pixels, info)
        self.frame_count += 1
        return i

    def truncate_frames(self, count: int) -> None:
        """Cut /entry/frames and /entry/frame_info back to ``count`` rows (after a failed write: rows whose
        data never reached the disk must not stay visible). Best effort; never raises."""
        with self.lock:
            for ds in (self._frames, self._frame_info):
                try:
                    if ds is not None and ds.shape[0] > count:
                        ds.resize(count, axis=0)
                except Exception:
                    pass
            self.frame_count = min(self.frame_count, int(count))

    def append_dark(self, pixels: np.ndarray, info) -> int:
        i = self._append(self._darks, self._dark_info, self.dark_count, pixels, info)
        self.dark_count += 1
        return i

    def append_refused(self, pixels: np.ndarray, info) -> int | None:
        """Keep a frame that was taken but not used (``info['flags']`` says why). None on old files."""
        if self._refused is None:
            return None
        i = self._append(self._refused, self._refused_info, self.refused_count, pixels, info)
        self.refused_count += 1
        return i

    def append_estimate(self, estimate: np.ndarray, info) -> int:
        if getattr(info, "dtype", None) is not None and info.dtype != self._estimate_info.dtype:  # an older file
            old = np.zeros((), dtype=self._estimate_info.dtype)
            for name in old.dtype.names:
                if name in info.dtype.names:
                    old[name] = info[name]
            info = old
        with self.lock:
            i = self._append(self._estimates, self._estimate_info, self.estimate_count,
                             estimate.astype(np.complex64), info)
            self.estimate_count += 1
            if self._recon is not None:
                try:
                    write_latest(self._recon, estimate, i, info)
                except (OSError, RuntimeError) as exc:
                    raise self._write_error(exc) from None
        return i

    def log(self, kind: str, message: str, level: str = "info", t_s: float | None = None) -> None:
        """Append one event to the run log inside the file (flushed at once) and to the text log beside it.

        The text line is written first, so an event survives in the text log even when the HDF5
        write fails (disk full); that failure raises StoreWriteError."""
        t_s = t_s if t_s is not None else time.time()
        if self.text_log is not None:
            self.text_log.write(t_s, level, kind, message)
        rec = np.array(
            [(t_s, level.encode()[:8], kind.encode()[:24], _encode(message, EVENT_MESSAGE_BYTES))],
            dtype=EVENT_DTYPE,
        )
        with self.lock:
            try:
                self._events.resize(self.event_count + 1, axis=0)
                self._events[self.event_count] = rec[0]
            except (OSError, RuntimeError) as exc:
                raise self._write_error(exc) from None
            self.event_count += 1
            self.flush()

    def flush(self) -> None:
        with self.lock:
            self._flush_locked()

    def _flush_locked(self) -> None:
        rows = self.frame_count
        try:
            if self._end_time is not None:  # /entry/end_time: the time of the last flush (data only: SWMR allows it)
                stamp = iso_utc()
                if stamp != self._end_stamp:
                    self._end_time[()] = stamp.encode()
                    self._end_stamp = stamp
            self._f.flush()
            self._flushed_frames = rows
        except (OSError, RuntimeError) as exc:
            raise self._write_error(exc) from None

    def close(self) -> None:
        """Flush and close. After a write failure (disk full) the handles are still released: dataset
        handles first, then the file (closing a file whose flush failed while dataset handles are alive
        can crash HDF5 later, at garbage collection); the error is raised after that."""
        if not self._f.id.valid:
            return
        err = None
        try:
            self._f.flush()
        except (OSError, RuntimeError) as exc:
            err = self._write_error(exc)
        import gc
        import sys

        previous_hook = sys.unraisablehook

        def _quiet_after_write_error(u):
            # releasing a handle retries the failed metadata write; that failure is already reported as err
            if err is not None and isinstance(u.exc_value, RuntimeError) and "decrement id ref count" in str(u.exc_value):
                return
            previous_hook(u)

        sys.unraisablehook = _quiet_after_write_error
        try:
            for name in ("_frames", "_frame_info", "_darks", "_dark_info", "_estimates", "_estimate_info", "_events",
                         "_refused", "_refused_info", "_recon", "_end_time"):
                setattr(self, name, None)
            gc.collect()
            try:
                self._f.close()
            except Exception as exc:
                err = err or self._write_error(exc)
            gc.collect()
        finally:
            sys.unraisablehook = previous_hook
        self._release_space_reserve()
        if err is not None:
            raise err

    @property
    def closed(self) -> bool:
        return not self._f.id.valid

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()
        return False
