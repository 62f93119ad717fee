"""The run's vocabulary, shared by the sequencer and everything that starts or watches a run: its states,
the plan, the steering (``RunControl``), the progress seen after each step and the summary at its end,
and the errors that end a run early."""

from __future__ import annotations

import enum
import threading
from dataclasses import dataclass, field
from pathlib import Path


class State(str, enum.Enum):
    idle = "idle"
    preparing = "preparing"
    darks = "darks"
    acquiring = "acquiring"
    paused = "paused"
    finishing = "finishing"
    finished = "finished"
    stopped = "stopped"
    fault = "fault"

class RunAborted(RuntimeError):
    """The run ended early; the message says why. Frames taken so far are in the file."""

class DoseLimitStop(RunAborted):
    """The cumulative dose reached its limit."""

class InterlockOpen(RuntimeError):
    """The interlock reads open: the shutter may not open."""

@dataclass
class RunPlan:
    passes: int
    dark_frames: int
    exposure_s: float
    output_path: Path
    interval_s: float | None = None  # start a pass every interval_s (time series); None = back to back
    # resume (maskrun resume): passes before first_pass are complete in the file
    first_pass: int = 0
    first_set_index: int = 0
    resumed: bool = False
    dose_photons_before: float = 0.0  # incident photons of the frames already in the file

    def to_record(self) -> dict:
        """What is stored in the run file (attribute run_plan) so a resume can continue the same plan."""
        return {"passes": self.passes, "dark_frames": self.dark_frames, "exposure_s": self.exposure_s,
                "interval_s": self.interval_s}

class RunControl:
    """Thread-safe steering of a running sequencer.

    ``resume_hint`` is shown in the pause alert: how the user resumes this run
    (the foreground sets 'kill -USR1 <pid>', the service its 'resume' request).
    """

    def __init__(self):
        self._stop = threading.Event()
        self._resume = threading.Event()
        self._resume.set()
        self.stop_reason = ""
        self.pause_reason = ""
        self.resume_hint = "resume the run (service: the 'resume' request)"

    def request_stop(self, reason: str = "stop requested") -> None:
        self.stop_reason = reason
        self._stop.set()
        self._resume.set()

    def request_pause(self, reason: str = "pause requested") -> None:
        self.pause_reason = reason
        self._resume.clear()

    def resume(self) -> None:
        self._resume.set()

    @property
    def stop_requested(self) -> bool:
        return self._stop.is_set()

    @property
    def pause_requested(self) -> bool:
        return not self._resume.is_set()

    def wait_resume(self, timeout_s: float) -> bool:
        return self._resume.wait(timeout_s)

    def sleep(self, seconds: float) -> None:
        """Sleep, waking early on a stop request."""
        self._stop.wait(seconds)

@dataclass
class RunSummary:
    state: State
    passes_complete: int
    frames: int
    darks: int
    rejected: int  # stale / failed attempts refused
    flagged: int
    saturated_frames: int
    photons_per_frame_mean: float
    photons_total: float
    estimates: int
    final_true_error: float
    final_error_estimate: float
    final_residual: float
    wall_s: float
    output_path: Path
    message: str = ""
    true_errors: list[float] = field(default_factory=list)
    faults: dict[str, int] = field(default_factory=dict)  # fault kind -> count
    recovered: int = 0  # faults that retries/reconnects/retakes got past
    pauses: int = 0
    refused: int = 0  # frames kept in /entry/refused
    sets_in_file: int = 0  # complete frame sets in the file (with those of earlier sessions of a resumed run)
    resumable: bool = True  # False: the run could not take its first frame for a reason a resume repeats
    writer_queue_high_water: int = 0  # most frames ever waiting for the writer thread (daemon.acquire.frame_writer)

@dataclass
class Progress:
    """What observers (the demo's display, the daemon's status) see after each step."""

    state: State
    pass_index: int
    mask_index: int
    frames_done: int
    frames_total: int
    photons_last: float = 0.0
    saturated_last: float = 0.0
    photons_total: float = 0.0
    estimate_true_error: float = float("nan")
    estimate_error_estimate: float = float("nan")
    estimate_residual: float = float("nan")
    message: str = ""
    precision: dict | None = None  # reconstruct.precision.PrecisionEstimate.to_dict() of the last estimate
    estimates_waiting: int = 0  # frame sets sent to the reconstruction whose estimate has not come back
    exposure_s: float = float("nan")  # the exposure in use (it may have been shortened after saturation)
