"""The run file: one HDF5 file per run, valid at every moment.

Layout (format ``maskrun-run`` version 2; documented in docs/run-file.md). Version 2 is version 1
plus the NeXus groups made by ``daemon.nexus`` (NXdata default plots ``/entry/data`` and
``/entry/reconstruction``, ``/entry/instrument`` with NXsource/NXdetector/modulator, NXsample, NXuser,
start_time/end_time, units), which hold hard links to the datasets below, never copies:

    /entry                      group, NX_class=NXentry; attributes below
    /entry/frames               (N, H, W) camera counts as delivered, one frame per chunk
    /entry/frame_info           (N,) compound: one row per frame (FRAME_INFO_DTYPE)
    /entry/darks                (D, H, W) dark frames (shutter closed)
    /entry/dark_info            (D,) compound, same fields as frame_info
    /entry/masks                (K, H, W) complex64, the mask set in grid orientation
    /entry/estimates            (P, H, W) complex64, sqrt(incident photons per second)
    /entry/estimate_info        (P,) compound (ESTIMATE_INFO_DTYPE)
    /entry/events               (E,) compound: the append-only run log (EVENT_DTYPE)
    /entry/refused              (R, H, W) frames taken but refused for the frame set (id gap, saturated
                                and retaken shorter, shutter found closed); kept, never used
    /entry/refused_info         (R,) compound, same fields as frame_info; ``flags`` says why
    /entry/truth                (H, W) complex128, simulated benches only, same units as estimates
    /entry/flat_field           (H, W) float32, per-pixel response (mean 1) from the camera profile, only
                                when the profile has one; electrons = (counts - dark) / flat / gain

Attributes of /entry (written once, before the file goes into single-writer /
multiple-reader mode): format, format_version, run_name, created_utc,
config_toml, safety_acknowledgement (JSON), grid_shape, mask_count,
frame_orientation, laser_wavelength_m, camera_bit_depth, and (written by
``session.run_header``) run_plan and the camera response actually used:
response_gain_dn_per_e, response_offset_dn, response_quantum_efficiency,
response_profile (the profile path, "" without one).

Crash safety: the file is created with the latest HDF5 format and switched to
SWMR mode before the first frame; raw data bypass HDF5's chunk cache
(``rdcc_nbytes=0``), so a frame's pixels are with the operating system (and a
write error is seen) at its append; the file is flushed after every complete
frame set and on a timer (``daemon.frame_writer``; events, darks and refused frames at once).
Datasets grow by resizing, never by creating new objects, so a reader (or a
reader after a SIGKILL) always sees a consistent file whose row counts may
differ by at most the frame in progress; readers use the shortest of
frames/frame_info.

Attributes cannot change once SWMR mode starts, so everything that happens
later (start, acknowledgement, faults, pauses, resumes, the end of the run) is
an event row; the run's outcome is the last ``run_end`` event. Each event is
also appended to a plain-text log beside the file (``daemon.runlog``).

A write failure (disk full, I/O error) raises ``StoreWriteError``; what was
flushed before it stays readable. A file left open by a killed writer is
repaired for appending by ``daemon.recovery`` (copy, verify, atomic replace).
"""

from __future__ import annotations

import json
import os
import threading
import time
from dataclasses import dataclass
from pathlib import Path

import h5py
import numpy as np

from .nexus import iso_utc, write_latest, write_nexus

FORMAT_NAME = "maskrun-run"
FORMAT_VERSION = 2  # 2: NeXus (NXdata default plots, NXinstrument, NXsample, start/end time, units); 1: no NeXus groups
READABLE_VERSIONS = (1, 2)  # every version this code reads (a version 1 file keeps its layout when resumed)

# Per-frame flag bits (frame_info['flags']).
FLAG_SATURATED = 1 << 0  # saturated fraction above the limit
FLAG_PHOTONS_LOW = 1 << 1  # photons below the minimum
FLAG_PHOTONS_HIGH = 1 << 2  # photons above the maximum
FLAG_RETAKEN = 1 << 3  # this frame replaced a stale, dropped or failed attempt
FLAG_ID_GAP = 1 << 4  # the camera frame id jumped (a frame was dropped by the camera)
FLAG_TIMEOUT_RETRIED = 1 << 5  # one or more grab timeouts before this frame
FLAG_EXPOSURE_SHORTENED = 1 << 6  # exposure was shortened after saturation
FLAG_AFTER_RESUME = 1 << 7  # first frame set after a resume (a gap in time precedes it)
FLAG_MODULATOR_RETRIED = 1 << 8  # the modulator needed more than one command to show this mask
FLAG_RECONNECTED = 1 << 9  # a device was reconnected while taking this frame
FLAG_AFTER_PAUSE = 1 << 10  # the run was paused (fault or request) while taking this frame
FLAG_SHUTTER_CLOSED = 1 << 11  # refused frame: the shutter was found closed after the exposure

FLAG_NAMES = {
    FLAG_SATURATED: "saturated",
    FLAG_PHOTONS_LOW: "photons_low",
    FLAG_PHOTONS_HIGH: "photons_high",
    FLAG_RETAKEN: "retaken",
    FLAG_ID_GAP: "frame_id_gap",
    FLAG_TIMEOUT_RETRIED: "timeout_retried",
    FLAG_EXPOSURE_SHORTENED: "exposure_shortened",
    FLAG_AFTER_RESUME: "after_resume",
    FLAG_MODULATOR_RETRIED: "modulator_retried",
    FLAG_RECONNECTED: "reconnected",
    FLAG_AFTER_PAUSE: "after_pause",
    FLAG_SHUTTER_CLOSED: "shutter_closed",
}

FRAME_INFO_DTYPE = np.dtype(
    [
        ("pass_index", "<i4"),  # -1 for dark frames
        ("set_index", "<i4"),  # frame-set attempt; a pass restarted after a fault gets a new one; -1 for darks
        ("mask_index", "<i4"),  # -1 for dark frames
        ("frame_id", "<i8"),  # the camera's own counter
        ("t_request_s", "<f8"),  # epoch seconds when the frame was requested
        ("t_frame_s", "<f8"),  # epoch seconds the camera stamped on the frame
        ("exposure_s", "<f8"),  # exposure actually used
        ("saturated_fraction", "<f4"),
        ("peak_dn", "<u4"),
        ("photons", "<f8"),  # incident photons in the frame (dark-subtracted, from the response)
        ("flags", "<u4"),
        ("attempts", "<u2"),  # grabs it took to get this frame
    ]
)

ESTIMATE_INFO_DTYPE = np.dtype(
    [
        ("pass_index", "<i4"),  # the last pass included
        ("passes_used", "<i4"),
        ("residual", "<f8"),  # relative data residual
        ("error_estimate", "<f8"),  # predicted relative error from the photon count
        ("true_error", "<f8"),  # relative error against the stored truth (NaN without truth)
        ("iterations", "<i4"),
        ("photons", "<f8"),
        ("elapsed_s", "<f8"),
        ("t_s", "<f8"),
        # the precision estimate without a truth (reconstruct.precision; NaN when not computed)
        ("error_predicted", "<f8"),  # photon count + read noise + floors (dark frame, pixel response, quantisation)
        ("error_data", "<f8"),  # from the data misfit (amplitude residual, corrected for the fitted parameters)
        ("misfit_chi2_dof", "<f8"),  # chi^2 per degree of freedom against the noise model (~1: explained)
        ("error_reported", "<f8"),  # what the displays show as the precision
    ]
)

EVENT_MESSAGE_BYTES = 240
EVENT_DTYPE = np.dtype([("t_s", "<f8"), ("level", "S8"), ("kind", "S24"), ("message", f"S{EVENT_MESSAGE_BYTES}")])


class StoreError(OSError):
    """The run file cannot be created, written or read."""


class StoreWriteError(StoreError):
    """Appending to the run file failed (``disk_full`` True for ENOSPC). Rows flushed before are intact."""

    def __init__(self, message: str, disk_full: bool = False):
        super().__init__(message)
        self.disk_full = disk_full


def _is_disk_full(exc: BaseException) -> bool:
    text = str(exc)
    return getattr(exc, "errno", None) == 28 or "No space left" in text or "errno = 28" in text


@dataclass
class RunHeader:
    """Everything written once when the file is created."""

    run_name: str
    config_toml: str
    safety_acknowledgement: dict
    grid_shape: tuple[int, int]
    masks: np.ndarray  # (K, H, W) complex
    frame_dtype: np.dtype
    laser_wavelength_m: float
    camera_bit_depth: int
    truth: np.ndarray | None = None
    extra_attrs: dict | None = None
    flat_field: np.ndarray | None = None  # (H, W) per-pixel response, mean 1; stored as /entry/flat_field
    # --- NeXus description (version 2); None / missing keys are recorded as unknown, never guessed ---------
    live_reconstruction: bool = True  # estimates are expected: /entry/reconstruction is made and is the default plot
    source: dict | None = None  # description, power_w, laser_class (the class label of the acknowledgement)
    detector: dict | None = None  # driver, exposure_s, gain_setting, pixel_size_m ((y, x) or one number)
    modulator: dict | None = None  # driver, settings (dict), settle_s, mask_family
    sample: dict | None = None  # name, description
    operator: str = ""  # who ran the bench (the safety acknowledgement's 'who')


def _encode(text: str, nbytes: int) -> bytes:
    raw = text.encode("utf-8", "replace")
    if len(raw) > nbytes:
        raw = raw[: nbytes - 3] + b"..."
    return raw


class RunStore:
    """Writer of one run file. Its calls are serialised by ``lock`` (the frame writer thread appends frames
    while the sequencer thread logs events)."""

    def __init__(self, path: Path, h5: h5py.File, text_log: bool = True):
        # one writer at a time: the frame writer thread (daemon.frame_writer) appends frames while the
        # sequencer logs events; a flush must never land between a frame's data and its info row
        self.lock = threading.RLock()
        from .runlog import TextLog, text_log_path

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
        try:
            f = h5py.File(path, "w", libver="latest", rdcc_nbytes=0)
        except OSError as exc:
            raise StoreError(f"{path}: cannot create the run file ({exc})") from None
        try:
            cls._write_layout(f, header)
            f.swmr_mode = True
            f.flush()
        except Exception:
            f.close()
            path.unlink(missing_ok=True)
            raise
        return cls(path, f, text_log)

    @staticmethod
    def _write_layout(f: h5py.File, h: RunHeader) -> None:
        rows, cols = h.grid_shape
        masks = np.asarray(h.masks)
        f.attrs["format"] = FORMAT_NAME
        f.attrs["format_version"] = FORMAT_VERSION
        e = f.create_group("entry")
        e.attrs["NX_class"] = "NXentry"
        e.attrs["format"] = FORMAT_NAME
        e.attrs["format_version"] = FORMAT_VERSION
        e.attrs["run_name"] = h.run_name
        created = iso_utc()
        e.attrs["created_utc"] = created
        e.attrs["config_toml"] = h.config_toml
        e.attrs["safety_acknowledgement"] = json.dumps(h.safety_acknowledgement)
        e.attrs["grid_shape"] = np.asarray(h.grid_shape, dtype=np.int64)
        e.attrs["mask_count"] = masks.shape[0]
        e.attrs["frame_orientation"] = "centred (zero frequency at the centre; ifftshift to reach the grid convention)"
        e.attrs["laser_wavelength_m"] = float(h.laser_wavelength_m)
        e.attrs["camera_bit_depth"] = int(h.camera_bit_depth)
        e.attrs["estimate_units"] = "sqrt(incident photons per second)"
        for k, v in (h.extra_attrs or {}).items():
            e.attrs[k] = v
        fd = np.dtype(h.frame_dtype)
        e.create_dataset("frames", (0, rows, cols), maxshape=(None, rows, cols), chunks=(1, rows, cols), dtype=fd)
        e.create_dataset("frame_info", (0,), maxshape=(None,), chunks=(256,), dtype=FRAME_INFO_DTYPE)
        e.create_dataset("darks", (0, rows, cols), maxshape=(None, rows, cols), chunks=(1, rows, cols), dtype=fd)
        e.create_dataset("dark_info", (0,), maxshape=(None,), chunks=(64,), dtype=FRAME_INFO_DTYPE)
        e.create_dataset("masks", data=masks.astype(np.complex64))
        e.create_dataset(
            "estimates", (0, rows, cols), maxshape=(None, rows, cols), chunks=(1, rows, cols), dtype=np.complex64
        )
        e.create_dataset("estimate_info", (0,), maxshape=(None,), chunks=(64,), dtype=ESTIMATE_INFO_DTYPE)
        e.create_dataset("events", (0,), maxshape=(None,), chunks=(128,), dtype=EVENT_DTYPE)
        e.create_dataset("refused", (0, rows, cols), maxshape=(None, rows, cols), chunks=(1, rows, cols), dtype=fd)
        e.create_dataset("refused_info", (0,), maxshape=(None,), chunks=(64,), dtype=FRAME_INFO_DTYPE)
        if h.truth is not None:
            e.create_dataset("truth", data=np.asarray(h.truth, dtype=np.complex128))
        if h.flat_field is not None:
            flat = np.asarray(h.flat_field, dtype=np.float32)
            if flat.shape != (rows, cols):
                raise StoreError(f"flat field shape {flat.shape} does not match the frames {(rows, cols)}")
            e.create_dataset("flat_field", data=flat)
        write_nexus(f, e, h, created)  # NeXus groups, links and units (version 2): all before SWMR mode

    @classmethod
    def reopen(cls, path: str | Path, text_log: bool = True) -> RunStore:
        """Open an existing run file to append to it (resume). The file must have been closed cleanly
        or be repaired first (see daemon.recovery)."""
        path = Path(path)
        try:
            f = h5py.File(path, "a", libver="latest", rdcc_nbytes=0)
        except OSError as exc:
            raise StoreError(f"{path}: cannot open the run file for appending ({exc})") from None
        if f.attrs.get("format") != FORMAT_NAME or "entry" not in f:
            f.close()
            raise StoreError(f"{path}: not a maskrun run file")
        try:
            # SWMR mode first, while no dataset of the file is open (starting it with open dataset
            # handles crashed HDF5 now and then); the row trimming in __init__ is a resize, allowed in SWMR
            import gc

            gc.collect()
            f.swmr_mode = True
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


def frame_info_record(**fields) -> np.void:
    """A FRAME_INFO_DTYPE record; unspecified fields are zero."""
    rec = np.zeros((), dtype=FRAME_INFO_DTYPE)
    for k, v in fields.items():
        rec[k] = v
    return rec


def estimate_info_record(**fields) -> np.void:
    rec = np.zeros((), dtype=ESTIMATE_INFO_DTYPE)
    for name in ("true_error", "error_predicted", "error_data", "misfit_chi2_dof", "error_reported"):
        rec[name] = np.nan
    for k, v in fields.items():
        rec[k] = v
    return rec


def flag_names(flags: int) -> list[str]:
    return [name for bit, name in FLAG_NAMES.items() if flags & bit]
