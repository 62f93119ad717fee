"""Recovery of run files: repair after a crash, and where to resume.

Repair: a file whose writer was killed (SIGKILL, power cut) still reads fine in
SWMR read mode, but HDF5 refuses to open it for writing because the superblock
still carries the "open for SWMR write" consistency flags. Two ways out exist:
clearing those flags in the superblock by hand (a byte edit plus the superblock
checksum), or copying the contents into a fresh file. We copy, because:

* the original is never modified: it is read only, and replaced atomically
  (``os.replace`` in the same folder) only after the copy is complete, flushed,
  fsynced and verified row by row against the original; a crash during repair
  leaves the original as it was (and a stray ``*.repair-tmp`` that the next
  repair removes);
* it needs nothing but the public h5py/HDF5 API (no knowledge of superblock
  versions, no external tool), and it rewrites every object, so any half-written
  metadata of the killed writer is left behind;
* it costs a copy (seconds for a night's frames of a small grid) and room for a
  second copy on the disk, which is checked first (``DiskSpaceError``).

Rows: paired datasets (frames/frame_info, darks/dark_info, refused/refused_info,
estimates/estimate_info) are cut to the shorter of the two, and a trailing
frame row whose info was never written (``attempts == 0``; every stored frame
took at least one attempt) is dropped: at most the frame in progress is lost.

Resume point: ``resume_point(path)`` reads the file (never writing) and says
which pass comes next (after the last complete frame set), the next set index,
the exposure last used, the dose already delivered, the time of the last
record (the gap), and refuses clearly when there is nothing to resume or the
writer is still alive. A run with every planned frame set but no 'run finished'
end record (killed after its last frame) is not refused: ``finish_only`` is set
and ``daemon.acquire.finish`` completes it without light.

A reader holding the file (h5py with swmr=True, a viewer left open) makes HDF5's
file lock refuse a writer; ``needs_repair`` counts that too, so resume copies the
file into a fresh inode and replaces the path atomically: the reader keeps the
old inode (the file as it was when the writer died) until it reopens the path.
"""

from __future__ import annotations

import os
import socket
import time
from dataclasses import dataclass
from pathlib import Path

import h5py
import numpy as np

from maskrun.daemon.acquire.disk import MB, DiskSpaceError, free_bytes
from maskrun.daemon.record.store import FORMAT_NAME, StoreError

PAIRS = (("frames", "frame_info"), ("darks", "dark_info"), ("refused", "refused_info"),
         ("estimates", "estimate_info"))
_INFO_WITH_ATTEMPTS = ("frame_info", "dark_info", "refused_info")


class ResumeError(StoreError):
    """The run file cannot be resumed; the message says why and what to do."""


def _locked_by_reader(exc: OSError) -> bool:
    text = str(exc)
    return getattr(exc, "errno", None) == 11 or "unable to lock file" in text or "Resource temporarily unavailable" in text


def needs_repair(path: str | Path) -> bool:
    """True when the file cannot be opened for writing in place: a writer died with it open (the SWMR
    write flags are still set), or another process (a viewer, an h5py reader with swmr=True) holds it
    open, so HDF5's file lock refuses a writer. Both are solved the same way: a fresh copy put in place
    atomically (``repair_run_file``); readers keep the old inode (see docs/overnight-and-faults.md)."""
    try:
        with h5py.File(path, "r+", libver="latest"):
            return False
    except OSError as exc:
        text = str(exc)
        if "already open for write" in text or "file consistency flags" in text or _locked_by_reader(exc):
            return True
        raise StoreError(f"{path}: cannot open the run file ({exc})") from None


def make_writable(path: str | Path, reserve_bytes: int = 0) -> "RepairReport | None":
    """Repair (copy and replace) when ``needs_repair``; the report, or None when the file was writable."""
    if needs_repair(path):
        return repair_run_file(path, reserve_bytes)
    return None


@dataclass
class RepairReport:
    path: Path
    frames: int
    darks: int
    dropped_rows: int
    bytes_copied: int
    seconds: float

    def describe(self) -> str:
        return (f"repaired {self.path.name}: {self.frames} frames and {self.darks} dark frames copied into a fresh "
                f"file, verified and put in place ({self.bytes_copied / MB:.1f} MB, {self.seconds:.1f} s"
                + (f"; {self.dropped_rows} unfinished row(s) dropped" if self.dropped_rows else "") + ")")


def _committed_rows(entry: h5py.Group, data: str, info: str) -> int:
    if data not in entry or info not in entry:
        return 0
    n = min(entry[data].shape[0], entry[info].shape[0])
    if info in _INFO_WITH_ATTEMPTS:
        while n > 0 and int(entry[info][n - 1]["attempts"]) == 0:
            n -= 1  # info row never written (fill value): the frame in progress at the crash
    return n


def repair_run_file(path: str | Path, reserve_bytes: int = 0) -> RepairReport:
    """Copy a crashed run file into a fresh file, verify it, and atomically replace the original."""
    path = Path(path)
    t0 = time.monotonic()
    size = path.stat().st_size
    free = free_bytes(path.parent)
    if free < size + reserve_bytes:
        raise DiskSpaceError(f"{path.parent}: repairing {path.name} needs room for a copy ({size / MB:.1f} MB) "
                             f"but only {free / MB:.1f} MB are free; free some space first")
    tmp = path.with_name(path.name + ".repair-tmp")
    tmp.unlink(missing_ok=True)
    dropped = 0
    counts: dict[str, int] = {}
    try:
        with h5py.File(path, "r", libver="latest", swmr=True) as src:
            if src.attrs.get("format") != FORMAT_NAME or "entry" not in src:
                raise StoreError(f"{path}: not a maskrun run file; nothing repaired")
            e = src["entry"]
            for data, info in PAIRS:
                if data in e:
                    n = _committed_rows(e, data, info)
                    dropped += max(e[data].shape[0], e[info].shape[0]) - n
                    counts[data] = counts[info] = n
            with h5py.File(tmp, "w", libver="latest") as dst:
                for k, v in src.attrs.items():
                    dst.attrs[k] = v
                src.copy(e, dst, name="entry")
                de = dst["entry"]
                for name, n in counts.items():
                    if de[name].shape[0] != n:
                        de[name].resize(n, axis=0)
                dst.flush()
            _verify_copy(e, tmp, counts)
        with open(tmp, "rb") as fh:
            os.fsync(fh.fileno())
        os.replace(tmp, path)
        _fsync_dir(path.parent)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise
    return RepairReport(path, counts.get("frames", 0), counts.get("darks", 0), dropped, size,
                        time.monotonic() - t0)


def _verify_copy(src_entry: h5py.Group, tmp: Path, counts: dict[str, int], block_rows: int = 64) -> None:
    """Every dataset of the copy equals the original over the rows kept (compared in blocks)."""
    with h5py.File(tmp, "r") as f:
        de = f["entry"]
        for name, ds in src_entry.items():
            if not isinstance(ds, h5py.Dataset):
                continue
            if name not in de:
                raise StoreError(f"repair: dataset {name} missing from the copy; the original is untouched")
            n = counts.get(name, ds.shape[0] if ds.ndim else None)
            copy = de[name]
            if ds.ndim == 0:
                same = np.array_equal(ds[()], copy[()])
            else:
                same = copy.shape[0] == n
                for i in range(0, n, block_rows) if same else ():
                    a, b = ds[i : i + block_rows], copy[i : i + block_rows]
                    if a.dtype.kind == "V":  # compound rows (NaN members never compare equal): bit for bit
                        differ = a.dtype != b.dtype or a.tobytes() != b.tobytes()
                    else:
                        differ = not np.array_equal(a, b, equal_nan=a.dtype.kind in "fc")
                    if differ:
                        same = False
                        break
            if not same:
                raise StoreError(f"repair: the copy of {name} differs from the original; the original is untouched")
        for k, v in src_entry.attrs.items():
            if k not in de.attrs:
                raise StoreError(f"repair: attribute {k} missing from the copy; the original is untouched")


def _fsync_dir(folder: Path) -> None:
    try:
        fd = os.open(folder, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)


@dataclass
class ResumePoint:
    path: Path
    run_name: str
    config_text: str
    passes: int
    dark_frames: int
    exposure_s: float  # the exposure last used (it may have been shortened)
    interval_s: float | None
    complete_passes: list[int]
    first_pass: int
    first_set_index: int
    dose_photons: float  # incident photons (camera) of all bright frames kept, refused ones included
    last_record_t_s: float  # epoch seconds of the last frame or event
    outcome: str  # 'stopped', 'fault', or 'no end recorded (killed)'
    finish_only: bool = False  # every planned frame set is in the file: only estimates and the end record are missing

    @property
    def gap_s(self) -> float:
        return max(0.0, time.time() - self.last_record_t_s)

    def note(self) -> str:
        last = time.strftime("%Y-%m-%d %H:%M:%S", time.localtime(self.last_record_t_s))
        return (f"previous session: {self.outcome}; last record {last}, gap {self.gap_s:.0f} s; "
                f"{len(self.complete_passes)} complete frame sets kept")


def _writer_alive(events: list[dict]) -> int | None:
    """pid of a writer that logged itself on this host and is still running, else None."""
    host = socket.gethostname()
    pid = None
    for e in events:
        if e["kind"] == "writer":
            parts = e["message"].split()
            try:
                pid = int(parts[1]) if len(parts) >= 4 and parts[3] == host else None
            except ValueError:
                pid = None
    if pid is None or pid == os.getpid():
        return None
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return None
    except PermissionError:
        return pid
    try:  # a zombie (killed, not yet reaped) is not a writer
        with open(f"/proc/{pid}/stat") as fh:
            if fh.read().rsplit(")", 1)[1].split()[0] == "Z":
                return None
    except OSError:
        pass
    return pid


def resume_point(path: str | Path) -> ResumePoint:
    """Where to continue a stopped or crashed run (reads the file, never writes it)."""
    from maskrun.daemon.record.runfile import RunFile

    path = Path(path)
    with RunFile(path) as rf:
        events = rf.events()
        end = rf.last_end()
        if end is not None and end["message"].startswith("run finished"):
            raise ResumeError(f"{path}: the run finished ({end['message']}); nothing to resume")
        if end is not None and "no resume can fix this" in end["message"]:
            raise ResumeError(f"{path}: {end['message'].removeprefix('run ')}")
        if end is None:
            pid = _writer_alive(events)
            if pid is not None:
                raise ResumeError(f"{path}: the run is still being written by process {pid}; stop it first "
                                  f"(Ctrl-C or kill -TERM {pid}) or watch it with 'maskrun inspect --follow'")
        attrs = rf.attrs
        plan = rf.run_plan
        config_text = str(attrs.get("config_toml", ""))
        if not config_text.strip():
            raise ResumeError(f"{path}: the run file holds no config; it cannot be resumed (start a new run)")
        if plan is None:
            from maskrun.daemon.config import parse_config

            cfg = parse_config(config_text, f"{path} (stored config)")
            plan = {"passes": cfg.run.passes, "dark_frames": cfg.run.dark_frames,
                    "exposure_s": cfg.camera.exposure_s, "interval_s": cfg.run.interval_s}
        e = rf.entry
        n = _committed_rows(e, "frames", "frame_info")
        info = e["frame_info"][:n]
        k = rf.mask_count
        complete = []
        for s in np.unique(info["set_index"]) if n else []:
            rows = np.flatnonzero(info["set_index"] == s)
            if len(rows) == k and sorted(info["mask_index"][rows].tolist()) == list(range(k)):
                complete.append(int(info["pass_index"][rows[0]]))
        complete = sorted(set(complete))
        first_pass = complete[-1] + 1 if complete else 0
        finish_only = first_pass >= plan["passes"]  # killed (or stopped) after the last frame: finish it
        nr = _committed_rows(e, "refused", "refused_info") if "refused" in e else 0
        refused = e["refused_info"][:nr] if nr else None
        dose = float(np.clip(info["photons"], 0, None).sum()) if n else 0.0
        if refused is not None:
            dose += float(np.clip(refused["photons"], 0, None).sum())
        exposure = float(info["exposure_s"][-1]) if n else float(plan["exposure_s"])
        times = [ev["t_s"] for ev in events] + ([float(info["t_frame_s"].max())] if n else [])
        sets = info["set_index"] if n else np.array([-1])
        if end is None:
            outcome = "no end recorded (the writer was killed or lost power)"
        else:
            outcome = end["message"].split(";")[0]
        return ResumePoint(
            path=path, run_name=str(attrs.get("run_name", path.stem)), config_text=config_text,
            passes=int(plan["passes"]), dark_frames=int(plan["dark_frames"]), exposure_s=exposure,
            interval_s=plan.get("interval_s"), complete_passes=complete, first_pass=first_pass,
            first_set_index=int(max(int(sets.max()), -1)) + 1, dose_photons=dose,
            last_record_t_s=max(times) if times else time.time(), outcome=outcome, finish_only=finish_only,
        )
