"""Replay camera: plays back the frames of an existing run file, in order, as a camera.

Use it to rerun the daemon's checks and the live reconstruction on data taken earlier,
to demonstrate the software without a bench, or to test a config against real frames.

The run file is read directly with h5py in single-writer/multiple-reader mode (so a file
that is still being written, or one left behind by a crash, can be replayed too). Drivers
do not import the daemon, so the layout is read as documented in ``maskrun.daemon.record.run_layout``:
``/entry/frames`` (N, H, W) with ``/entry/frame_info`` (N,) rows, ``/entry/darks`` (D, H, W)
with ``/entry/dark_info``, attribute ``format = "maskrun-run"`` on the file and
``camera_bit_depth`` on ``/entry``. Paired datasets may differ by one row after a crash;
the shorter count is used.

What a replayed frame carries:

* ``pixels``: the stored counts (uint16 as stored), cut to the ROI;
* ``frame_id``: the recorded camera frame id (``frame_ids = "recorded"``) or 1, 2, 3, ...
  (``"sequential"``). On the n-th repeat of a looped file the recorded ids are shifted by
  n * (id span + 1), so ids always advance;
* ``timestamp_s``: the recorded time the camera stamped on the frame, shifted on repeats
  by n * (recorded duration + one typical frame gap) so it keeps advancing;
* ``exposure_s``: the recorded exposure of that frame (the exposure *setting* of the replay
  camera is kept and read back, but it cannot change recorded frames);
* ``metadata``: ``replay_row`` (row in its dataset), ``dark`` (bool), ``pass_index``,
  ``set_index``, ``mask_index``, ``recorded_frame_id``, ``recorded_timestamp_s``,
  ``recorded_flags``, ``loop`` (0 for the first play-through).

Order: the frames in stored order. With ``include_darks`` the dark frames are merged in by
their recorded time stamps (ties: darks first), so they appear where they were taken.

Pace: ``"fast"`` delivers each frame at once; ``"recorded"`` keeps the recorded gaps between
frames (each gap capped at ``max_gap_s``), counted from the first ``grab``; a grab whose
frame is due later than its timeout waits the timeout and raises DeviceTimeout, and the
frame stays next in line.

End of file: DeviceTimeout saying the run file has no more frames (or, with ``loop``, the
playback starts again from the first frame).

ROI: the sensor is the stored frame size; the ROI may be the whole frame or any part of it.
Binning 1 and software trigger only (``trigger()`` does nothing: frames come in order).
"""

from __future__ import annotations

import math
import threading
import time
from pathlib import Path
from typing import Literal

import h5py
import numpy as np
from pydantic import Field

from .base import Camera, DriverSettings, Frame, checked_roi
from .errors import DeviceDisconnected, DeviceFault, DeviceMisconfigured, DeviceTimeout

__all__ = ["ReplayCamera"]

#: value of the file attribute ``format`` of a run file (maskrun.daemon.record.run_layout.FORMAT_NAME)
RUN_FILE_FORMAT = "maskrun-run"


class ReplayCamera(Camera):
    """Plays back the frames (and optionally the dark frames) of a recorded run file as a camera."""

    class Settings(DriverSettings):
        """Replay camera settings."""

        path: Path = Field(description="run file (.h5) to play back; relative paths start at the config's folder")
        loop: bool = Field(default=False, description="start again from the first frame at the end of the file")
        include_darks: bool = Field(default=False, description="also play the dark frames, where they were taken")
        pace: Literal["fast", "recorded"] = Field(
            default="fast", description="'fast': every frame at once; 'recorded': keep the recorded gaps between frames")
        max_gap_s: float = Field(default=2.0, gt=0, description="longest wait between two frames with pace 'recorded', seconds")
        frame_ids: Literal["recorded", "sequential"] = Field(
            default="recorded", description="'recorded': the camera's recorded ids; 'sequential': 1, 2, 3, ...")
        exposure_s: float = Field(default=0.01, gt=0, description="exposure setting at start, seconds (read back only)")

    def __init__(self, settings, context=None):
        super().__init__(settings, context)
        self._path = Path(self.settings.path)
        if not self._path.is_absolute():
            self._path = Path(self.context.config_dir) / self._path
        self._lock = threading.RLock()
        self._file: h5py.File | None = None
        self._header: tuple[tuple[int, int], int] | None = None  # (frame shape, bit depth)
        self._roi: tuple[int, int, int, int] | None = None
        self._exposure_s = float(self.settings.exposure_s)
        self._reset_playback()

    # ------------------------------------------------------------------ file access
    def _open_h5(self) -> h5py.File:
        if not self._path.exists():
            raise DeviceMisconfigured(f"run file {self._path} does not exist", device="camera",
                                      hint="give the path of a recorded run file in the camera setting 'path'")
        try:
            f = h5py.File(self._path, "r", libver="latest", swmr=True)
        except OSError as exc:
            raise DeviceMisconfigured(f"{self._path} is not a readable HDF5 file ({exc})", device="camera",
                                      hint="give the path of a run file written by maskrun") from None
        fmt = f.attrs.get("format")
        if isinstance(fmt, bytes):
            fmt = fmt.decode()
        if fmt != RUN_FILE_FORMAT or "entry" not in f or "frames" not in f["entry"] or "frame_info" not in f["entry"]:
            f.close()
            raise DeviceMisconfigured(f"{self._path} is not a maskrun run file (no format = {RUN_FILE_FORMAT!r})",
                                      device="camera", hint="give the path of a run file written by maskrun")
        return f

    def _read_header(self, f: h5py.File) -> tuple[tuple[int, int], int]:
        frames = f["entry"]["frames"]
        shape = (int(frames.shape[1]), int(frames.shape[2]))
        bits = f["entry"].attrs.get("camera_bit_depth")
        bit_depth = int(bits) if bits is not None else 8 * frames.dtype.itemsize
        return shape, bit_depth

    def _header_info(self) -> tuple[tuple[int, int], int]:
        """Frame shape and bit depth, read from the file once (also before open())."""
        if self._header is None:
            with self._lock:
                f = self._file if self._file is not None else self._open_h5()
                try:
                    self._header = self._read_header(f)
                finally:
                    if f is not self._file:
                        f.close()
        return self._header

    @staticmethod
    def _pair_rows(entry: h5py.Group, data: str, info: str) -> int:
        if data not in entry or info not in entry:
            return 0
        return min(entry[data].shape[0], entry[info].shape[0])

    def _build_playlist(self, f: h5py.File) -> None:
        """The playback order: (dataset name, row) pairs with their info records."""
        entry = f["entry"]
        n = self._pair_rows(entry, "frames", "frame_info")
        info = entry["frame_info"][:n]
        sources = [np.zeros(n, dtype=np.int8)]
        rows = [np.arange(n)]
        infos = [info]
        if self.settings.include_darks:
            d = self._pair_rows(entry, "darks", "dark_info")
            infos.append(entry["dark_info"][:d])
            sources.append(np.ones(d, dtype=np.int8))
            rows.append(np.arange(d))
        info_all = np.concatenate(infos) if len(infos) > 1 else info
        source = np.concatenate(sources)
        row = np.concatenate(rows)
        if len(info_all) == 0:
            raise DeviceMisconfigured(
                f"run file {self._path} holds no frames{'' if self.settings.include_darks else ' (darks not included)'}",
                device="camera", hint="pick a run file with frames, or set include_darks = true to play its darks")
        if self.settings.include_darks:
            t = info_all["t_frame_s"].astype(np.float64)
            # darks first on equal times; stable for equal (time, source) keeps stored order
            order = np.lexsort((row, -source, t))
        else:
            order = np.arange(len(info_all))
        self._info = info_all[order]
        self._source = source[order]
        self._row = row[order]
        ids = self._info["frame_id"].astype(np.int64)
        self._id_span = int(ids.max() - ids.min() + 1)
        t = self._info["t_frame_s"].astype(np.float64)
        gaps = np.clip(np.diff(t), 0.0, self.settings.max_gap_s) if len(t) > 1 else np.zeros(0)
        self._offset_s = np.concatenate([[0.0], np.cumsum(gaps)])
        typical_gap = float(np.median(gaps)) if len(gaps) else 0.0
        self._loop_time_s = float(self._offset_s[-1]) + typical_gap  # play time of one pass through the file
        self._loop_stamp_s = float(t.max() - t.min()) + max(typical_gap, 1e-3)

    def _reset_playback(self) -> None:
        self._next = 0  # index into the playlist
        self._loop_count = 0
        self._delivered = 0
        self._t_start: float | None = None  # monotonic time of the first grab (pace 'recorded')

    # ------------------------------------------------------------------ life cycle
    def open(self) -> None:
        with self._lock:
            if self._file is not None:
                return
            f = self._open_h5()
            try:
                header = self._read_header(f)
                self._build_playlist(f)
            except BaseException:
                f.close()
                raise
            self._file = f
            self._header = header
            if self._roi is None:
                self._roi = (0, 0, *header[0])
            self._reset_playback()

    def close(self) -> None:
        with self._lock:
            f, self._file = self._file, None
            if f is not None:
                try:
                    f.close()
                except Exception:  # noqa: BLE001 - closing must not fail
                    pass

    # ------------------------------------------------------------------ geometry / format
    @property
    def sensor_shape(self) -> tuple[int, int]:
        """The stored frame size (rows, cols); reads the file header if the camera is not open."""
        return self._header_info()[0]

    @property
    def roi(self) -> tuple[int, int, int, int]:
        if self._roi is None:
            self._roi = (0, 0, *self.sensor_shape)
        return self._roi

    @roi.setter
    def roi(self, value) -> None:
        self._roi = checked_roi(value, self.sensor_shape, what="recorded frames",
                                hint="a replayed ROI must be the stored frame size or a part of it")

    @property
    def bit_depth(self) -> int:
        return self._header_info()[1]

    # ------------------------------------------------------------------ acquisition
    @property
    def exposure_s(self) -> float:
        """The exposure setting (frames keep their recorded exposure, see the module docstring)."""
        return self._exposure_s

    @exposure_s.setter
    def exposure_s(self, value: float) -> None:
        value = float(value)
        if not math.isfinite(value) or value <= 0:
            raise DeviceMisconfigured(f"exposure {value} s must be a positive number of seconds", device="camera")
        self._exposure_s = value

    def trigger(self) -> None:
        """Nothing to do: a replayed frame is ready in its turn."""

    @property
    def frames_left(self) -> int | None:
        """Frames left before the end of the file (None while closed; counts only the current pass with loop)."""
        with self._lock:
            return None if self._file is None else len(self._info) - self._next

    def grab(self, timeout_s: float) -> Frame:
        """The next recorded frame; DeviceTimeout at the end of the file (unless loop) or if not yet due."""
        timeout_s = max(0.0, float(timeout_s))
        t_call = time.monotonic()
        with self._lock:
            if self._file is None:
                raise DeviceDisconnected("the replay camera is not open", device="camera", hint="open the camera first")
            if self._next >= len(self._info):
                if not self.settings.loop:
                    raise DeviceTimeout(
                        f"run file {self._path.name} has no more frames (all {len(self._info)} played)",
                        device="camera", hint="set loop = true in the replay camera settings to play it again, "
                        "or stop the run")
                self._next = 0
                self._loop_count += 1
            i = self._next
            if self.settings.pace == "recorded":
                if self._t_start is None:
                    self._t_start = t_call
                due = self._t_start + self._loop_count * self._loop_time_s + float(self._offset_s[i])
                if due - t_call > timeout_s:
                    time.sleep(timeout_s)
                    raise DeviceTimeout(
                        f"next replayed frame is due in {due - t_call:.3g} s, after the {timeout_s:g} s timeout",
                        device="camera", hint="give a grab timeout longer than the recorded frame gaps, "
                        "or use pace = 'fast'")
                wait = due - time.monotonic()
                if wait > 0:
                    time.sleep(wait)
            rec = self._info[i]
            dark = bool(self._source[i])
            dataset = "darks" if dark else "frames"
            row = int(self._row[i])
            r0, c0, rows, cols = self.roi
            try:
                pixels = self._file["entry"][dataset][row, r0 : r0 + rows, c0 : c0 + cols]
            except (OSError, KeyError) as exc:
                raise DeviceFault(f"cannot read {dataset}[{row}] from {self._path.name} ({exc})", device="camera",
                                  hint="the run file may be damaged; check it with h5py") from None
            self._next += 1
            self._delivered += 1
            recorded_id = int(rec["frame_id"])
            recorded_t = float(rec["t_frame_s"])
            if self.settings.frame_ids == "sequential":
                frame_id = self._delivered
            else:
                frame_id = recorded_id + self._loop_count * self._id_span
            return Frame(
                pixels=np.ascontiguousarray(pixels),
                frame_id=frame_id,
                timestamp_s=recorded_t + self._loop_count * self._loop_stamp_s,
                exposure_s=float(rec["exposure_s"]),
                metadata={
                    "replay_file": str(self._path),
                    "replay_row": row,
                    "dark": dark,
                    "pass_index": int(rec["pass_index"]),
                    "set_index": int(rec["set_index"]),
                    "mask_index": int(rec["mask_index"]),
                    "recorded_frame_id": recorded_id,
                    "recorded_timestamp_s": recorded_t,
                    "recorded_flags": int(rec["flags"]),
                    "loop": self._loop_count,
                    "roi": list(self.roi),
                    "bit_depth": self.bit_depth,
                },
            )
