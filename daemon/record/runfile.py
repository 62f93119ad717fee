"""Read a run file, finished, growing, or left behind by a crash.

Opens in HDF5 single-writer/multiple-reader mode, so it works while the daemon
is still writing and after the writer was killed. Row counts of paired
datasets (frames/frame_info, ...) are reconciled to the shorter of the two.
"""

from __future__ import annotations

import json
from dataclasses import dataclass
from pathlib import Path

import h5py
import numpy as np

from maskrun.daemon.record.store import FORMAT_NAME, READABLE_VERSIONS, StoreError


@dataclass
class FrameSetIndex:
    pass_index: int
    set_index: int
    rows: np.ndarray  # indices into /entry/frames, ordered by mask index


class RunFile:
    """Read-only view of a run file."""

    def __init__(self, path: str | Path):
        self.path = Path(path)
        if not self.path.exists():
            raise StoreError(f"{self.path}: no such run file")
        try:
            self._f = h5py.File(self.path, "r", libver="latest", swmr=True)
        except OSError as exc:
            raise StoreError(f"{self.path}: not a readable HDF5 run file ({exc})") from None
        if self._f.attrs.get("format") != FORMAT_NAME or "entry" not in self._f:
            self._f.close()
            raise StoreError(f"{self.path}: not a maskrun run file (no 'format = {FORMAT_NAME}' attribute)")
        self.entry = self._f["entry"]
        version = self.format_version
        if version not in READABLE_VERSIONS:
            self._f.close()
            raise StoreError(f"{self.path}: run file format version {version}; this maskrun reads versions "
                             f"{', '.join(map(str, READABLE_VERSIONS))} (a newer maskrun wrote it: update maskrun)")

    @property
    def format_version(self) -> int:
        """1: the plain layout; 2: the same datasets plus the NeXus groups (docs/run-file.md)."""
        raw = self._f.attrs.get("format_version", self.entry.attrs.get("format_version", 1))
        try:
            return int(raw)
        except (TypeError, ValueError):
            return -1

    @property
    def is_nexus(self) -> bool:
        return self.format_version >= 2

    def end_time(self) -> str | None:
        """/entry/end_time (version 2: the time of the last flush), or None for version 1 files."""
        if "end_time" not in self.entry:
            return None
        raw = self.entry["end_time"][()]
        return raw.decode() if isinstance(raw, bytes) else str(raw)

    def latest_reconstruction(self) -> tuple[np.ndarray, np.ndarray] | None:
        """(amplitude, phase) of the latest estimate: /entry/reconstruction in version 2 files, else computed
        from the last row of /entry/estimates (version 1); None without an estimate."""
        rec = self.entry.get("reconstruction")
        if rec is not None and int(rec["estimate_index"][()]) >= 0:
            return rec["amplitude"][...], rec["phase"][...]
        if self.estimate_count:
            est = self.entry["estimates"][self.estimate_count - 1]
            return np.abs(est).astype(np.float32), np.angle(est).astype(np.float32)
        return None

    def refresh(self) -> None:
        """See rows the writer appended since opening."""
        for name in ("frames", "frame_info", "darks", "dark_info", "estimates", "estimate_info", "events",
                     "refused", "refused_info", "end_time", "reconstruction/amplitude", "reconstruction/phase",
                     "reconstruction/estimate_index"):
            if name in self.entry:
                self.entry[name].refresh()

    def close(self) -> None:
        self._f.close()

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()
        return False

    # --- attributes ------------------------------------------------------------
    @property
    def attrs(self) -> dict:
        return dict(self.entry.attrs)

    @property
    def config_toml(self) -> str:
        return str(self.entry.attrs["config_toml"])

    @property
    def safety_acknowledgement(self) -> dict:
        return json.loads(self.entry.attrs["safety_acknowledgement"])

    @property
    def mask_count(self) -> int:
        return int(self.entry.attrs["mask_count"])

    @property
    def grid_shape(self) -> tuple[int, int]:
        return tuple(int(v) for v in self.entry.attrs["grid_shape"])

    # --- data ----------------------------------------------------------------------
    def _pair_len(self, a: str, b: str) -> int:
        return min(self.entry[a].shape[0], self.entry[b].shape[0])

    @property
    def frame_count(self) -> int:
        return self._pair_len("frames", "frame_info")

    @property
    def dark_count(self) -> int:
        return self._pair_len("darks", "dark_info")

    @property
    def estimate_count(self) -> int:
        return self._pair_len("estimates", "estimate_info")

    def frame_info(self) -> np.ndarray:
        return self.entry["frame_info"][: self.frame_count]

    def frame(self, i: int) -> np.ndarray:
        if not 0 <= i < self.frame_count:
            raise IndexError(f"frame {i} out of range (0..{self.frame_count - 1})")
        return self.entry["frames"][i]

    def frames(self, rows=None) -> np.ndarray:
        n = self.frame_count
        if rows is None:
            return self.entry["frames"][:n]
        return np.stack([self.entry["frames"][int(r)] for r in rows]) if len(rows) else np.zeros((0, *self.grid_shape))

    def darks(self) -> np.ndarray:
        return self.entry["darks"][: self.dark_count]

    def dark_info(self) -> np.ndarray:
        return self.entry["dark_info"][: self.dark_count]

    def masks(self) -> np.ndarray:
        return self.entry["masks"][...]

    def estimates(self) -> np.ndarray:
        return self.entry["estimates"][: self.estimate_count]

    def estimate_info(self) -> np.ndarray:
        return self.entry["estimate_info"][: self.estimate_count]

    @property
    def refused_count(self) -> int:
        return self._pair_len("refused", "refused_info") if "refused" in self.entry else 0

    def refused_info(self) -> np.ndarray:
        n = self.refused_count
        return self.entry["refused_info"][:n] if n else np.zeros(0, dtype=self.entry["frame_info"].dtype)

    @property
    def run_plan(self) -> dict | None:
        """The plan the run was started with (passes, dark_frames, exposure_s, interval_s), if recorded."""
        raw = self.entry.attrs.get("run_plan")
        return json.loads(raw) if raw is not None else None

    def truth(self) -> np.ndarray | None:
        return self.entry["truth"][...] if "truth" in self.entry else None

    def flat_field(self) -> np.ndarray | None:
        """The flat field used by the run (float32, mean 1, frame shape), or None when it had none."""
        return self.entry["flat_field"][...] if "flat_field" in self.entry else None

    def response_attrs(self) -> dict | None:
        """The camera response the run used (gain_dn_per_e, offset_dn, quantum_efficiency, profile),
        or None for files written before it was recorded."""
        a = self.entry.attrs
        if "response_gain_dn_per_e" not in a:
            return None
        return {"gain_dn_per_e": float(a["response_gain_dn_per_e"]), "offset_dn": float(a["response_offset_dn"]),
                "quantum_efficiency": float(a["response_quantum_efficiency"]),
                "profile": str(a.get("response_profile", ""))}

    def events(self) -> list[dict]:
        ev = self.entry["events"][...]
        return [
            {"t_s": float(e["t_s"]), "level": e["level"].decode(), "kind": e["kind"].decode(),
             "message": e["message"].decode("utf-8", "replace")}
            for e in ev
        ]

    def complete_sets(self) -> list[FrameSetIndex]:
        """Frame sets with all K masks present, in acquisition order (the last attempt of each set index)."""
        info = self.frame_info()
        k = self.mask_count
        out = []
        for s in np.unique(info["set_index"]):
            if s < 0:
                continue
            rows = np.flatnonzero(info["set_index"] == s)
            masks = info["mask_index"][rows]
            if len(rows) == k and sorted(masks.tolist()) == list(range(k)):
                order = rows[np.argsort(masks)]
                out.append(FrameSetIndex(int(info["pass_index"][rows[0]]), int(s), order))
        return out

    def finished(self) -> bool:
        """True when the last run_end event says 'run finished' (a resumed run may have stopped before)."""
        end = self.last_end()
        return end is not None and end["message"].startswith("run finished")

    def last_end(self) -> dict | None:
        """The last 'run_end' event, unless the run was resumed after it (then None: it is running or
        was killed)."""
        end = None
        for e in self.events():
            if e["kind"] == "run_end":
                end = e
            elif e["kind"] == "resume":
                end = None
        return end

    def writer_pid(self) -> int | None:
        """Process id of the last writer (from its 'writer' event), or None."""
        pid = None
        for e in self.events():
            if e["kind"] == "writer":
                try:
                    pid = int(e["message"].split()[1])
                except (IndexError, ValueError):
                    pass
        return pid
