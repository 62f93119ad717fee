"""The run sequencer: a state machine that takes the bench through a run.

For each pass and each mask k: the modulator shows mask k and acknowledges,
the sequencer waits the settle time, the camera exposes, the frame comes back
with its frame id and time stamp; the frame is checked (saturation, photons)
and handed to the writer thread (``frame_writer``; a full queue holds
acquisition back, nothing is dropped); then the next mask is shown and its
exposure started (``_arm``) while this frame is converted and published
(pipelined). The writer flushes the file at every complete frame set and on a
timer; a frame set is announced (stream, reconstruction worker, count) only
once it is flushed, so a crash loses no announced set. Estimates are stored and
published as they come back.

Safety: the interlock must read closed before the shutter opens; the shutter is
closed for dark frames, while paused, between the frame sets of a time series,
at the end, and on any fault (``finally``). The sequencer runs in the calling
thread; another thread steers it through ``RunControl`` (pause, resume, stop).

Fault handling (every fault is an event in the run log, and the frame it hit
carries a flag; see store.FLAG_*). Settings in ``[recovery]`` and ``[checks]``:

=========================== ==============================================================
fault                       reaction
=========================== ==============================================================
camera timeout / bad frame  retried ``retries`` times with exponential backoff
                            (``backoff_initial_s`` x ``backoff_factor``^n, at most
                            ``backoff_max_s``), then the run pauses (alert)
modulator no / bad reply    the command is resent the same way, then the run pauses
device disconnected         reconnect attempts (``reconnect_attempts``, same backoff),
                            then the run pauses; the frame in progress is retaken
stale frame (id repeated)   refused and retaken (up to ``stale_retakes``, then pause)
dropped frame (id gap)      the frame is refused (kept in /entry/refused) and retaken
interlock open              shutter closed, run paused; it continues only when the
                            interlock reads closed AND the user resumes (open before the
                            first frame of the run: the run does not start, 'fault')
shutter found closed after  the frame is refused (kept in /entry/refused) and retaken
an exposure
saturation above the limit  ``saturation_action``: 'flag' (keep, flagged), 'shorten'
                            (exposure x ``saturation_shorten_factor``, frame retaken;
                            the shorter exposure is kept for the rest of the run), or
                            'stop' (frame kept, run stopped)
cumulative dose             stop before the next frame would pass the limit
                            (``max_dose_photons`` / ``max_dose_energy_per_area_j_per_m2``)
free disk below the reserve stop safely before the disk is full (``[run] min_free_disk_mb``)
write error / disk full     stop; everything flushed before is kept
stop request (signal)       the frame in progress is finished (or its wait abandoned),
                            the shutter closed, the file flushed and closed
=========================== ==============================================================

A pause closes the shutter and waits for ``RunControl.resume()`` (the service's
'resume' request; SIGUSR1 for a foreground run). A pause not resumed within
``[recovery] pause_timeout_s`` ends the run safely ('stopped'); it can be
continued later with ``maskrun resume``. Frames of a frame set interrupted by
a pause stay in the set (the set continues with the next mask after the pause).
"""

from __future__ import annotations

import collections
import enum
import threading
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable

import numpy as np

from maskrun.drivers import DeviceError, DeviceTimeout
from maskrun.drivers.errors import DeviceDisconnected, DeviceFault, DeviceMisconfigured

from .bench import Bench
from .checks import CheckLimits, FrameIdTracker, check_frame, downsample_preview
from .disk import MB, DiskGuard, DiskSpaceError
from .frame_convert import electrons_shifted, shifted
from .frame_writer import FrameWriter
from .recon_link import ReconLink
from .store import (
    FLAG_AFTER_PAUSE,
    FLAG_AFTER_RESUME,
    FLAG_EXPOSURE_SHORTENED,
    FLAG_ID_GAP,
    FLAG_MODULATOR_RETRIED,
    FLAG_RECONNECTED,
    FLAG_RETAKEN,
    FLAG_SATURATED,
    FLAG_SHUTTER_CLOSED,
    FLAG_TIMEOUT_RETRIED,
    RunStore,
    StoreError,
    StoreWriteError,
    estimate_info_record,
    flag_names,
    frame_info_record,
)
from .stream import Publisher


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
    writer_queue_high_water: int = 0  # most frames ever waiting for the writer thread (daemon.frame_writer)


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


STOP_ESTIMATE_WAIT_S = 5.0  # after a stop or fault, wait at most this long for estimates of sets already taken

# estimate_info column -> key of reconstruct.precision.PrecisionEstimate.to_dict()
PRECISION_COLUMNS = {"error_predicted": "predicted", "error_data": "data", "misfit_chi2_dof": "chi2_dof",
                     "error_reported": "reported"}


def _nan_if_none(v) -> float:
    return float("nan") if v is None else float(v)


_DEVICE_ATTR = {"camera": "camera", "modulator": "modulator", "safety": "safety"}


class Sequencer:
    def __init__(
        self,
        bench: Bench,
        store: RunStore,
        publisher: Publisher | None,
        recon: ReconLink | None,
        plan: RunPlan,
        control: RunControl | None = None,
        observer: Callable[[Progress], None] | None = None,
    ):
        self.bench = bench
        self.store = store
        self.pub = publisher
        self.recon = recon
        self.plan = plan
        self.control = control or RunControl()
        self.observer = observer
        cfg = bench.config
        self.rec = cfg.recovery
        self.k = bench.masks.shape[0]
        self.limits = CheckLimits(
            max_dn=bench.camera.max_dn,
            saturation_level=cfg.checks.saturation_level,
            max_saturated_fraction=cfg.checks.max_saturated_fraction,
            min_photons_per_frame=cfg.checks.min_photons_per_frame,
            max_photons_per_frame=cfg.checks.max_photons_per_frame,
        )
        self.ids = FrameIdTracker()
        self.state = State.idle
        self.dark_dn: np.ndarray | float = bench.response.offset_dn
        # flat field from the camera profile (mean 1) or None: used for the frame checks (photons per
        # frame, _take_frame) and for the frame sets (_take_pass): electrons = (pixels - dark) / flat / gain
        self.flat = getattr(bench, "flat_field", None)
        self.timeout_retries = self.rec.retries
        self.exposure_s = float(plan.exposure_s)
        # running totals
        self.frames = self.darks = self.rejected = self.flagged = self.saturated = 0
        self.passes_complete = 0
        self.set_index = plan.first_set_index
        self.photons_total = 0.0
        self.estimates = 0
        self.true_errors: list[float] = []
        self.fault_counts: collections.Counter[str] = collections.Counter()
        self.recovered = 0
        self.pauses = 0
        self.refused = 0
        self.last_estimate = (float("nan"), float("nan"), float("nan"))  # true error, error estimate, residual
        self._unfixable = False  # set when the first frame cannot be taken for a reason a resume repeats
        self.read_noise_e: float | None = None  # measured from this run's dark frames (2 or more)
        self._progress = Progress(State.idle, -1, -1, 0, (plan.passes - plan.first_pass) * self.k,
                                  exposure_s=self.exposure_s)
        # one reusable frame-set buffer (K, H, W) float32, grid orientation
        self._set_buffer = np.zeros((self.k, *bench.grid_shape), dtype=np.float32)
        self._set_exposures = np.zeros(self.k, dtype=np.float64)
        self._frame_flags = 0  # flags collected by recoveries while the current frame is taken
        self._expect_gap = False  # a frame was lost inside the camera (corrupted): the next id jumps
        self._after_resume = plan.resumed
        self._stop_after_frame = ""
        self._last_photons = 0.0
        self._roi = None
        self._light_started = False  # the interlock must read closed at the start; later it pauses the run
        self.disk = DiskGuard(Path(plan.output_path).parent, int(cfg.run.min_free_disk_mb * MB), store.bytes_per_frame)
        self.dose = self._make_dose_ledger()
        # pipelined acquisition (see _arm): the exposure of the next mask runs while this frame is stored
        # (FrameWriter thread) and published; a frame set is announced once it is flushed (durable)
        self.writer: FrameWriter | None = None
        self.writer_stats = None  # the last writer's counters (queue high-water mark, flushes), after the run
        self._armed = None  # (set_index, mask_index) whose exposure was started by _arm
        self._armed_t = 0.0
        self._armed_flags = 0
        self._pending_sets: dict = {}  # set_index -> what to announce when it is durable
        self._flat_shifted = None if self.flat is None else shifted(self.flat)

    def _make_dose_ledger(self):
        ch = self.bench.config.checks
        if ch.max_dose_photons is None and ch.max_dose_energy_per_area_j_per_m2 is None:
            return None
        from .dose import DoseLedger, mask_mean_transmission

        ledger = DoseLedger(
            wavelength_m=self.bench.config.laser.wavelength_m,
            illuminated_area_m2=ch.illuminated_area_m2,  # None: photons and joules only, never a made-up area
            max_energy_per_area_j_per_m2=ch.max_dose_energy_per_area_j_per_m2,
            max_photons=ch.max_dose_photons,
            optical_transmission=ch.transmission_sample_to_camera,
            modulator_position=ch.modulator_position,
            mask_transmission=mask_mean_transmission(self.bench.masks),
            limit_scope="run",
        )
        if self.plan.dose_photons_before > 0:
            # frames already in the file (resume): counted, without raising here (checked before each frame)
            ledger.set_run_photons(ledger.photons_on_sample(self.plan.dose_photons_before))
        return ledger

    # --- events --------------------------------------------------------------
    def event(self, kind: str, message: str, level: str = "info") -> None:
        self.store.log(kind, message, level)
        if self.pub is not None:
            topic = "alert" if level in ("warning", "error") else "event"
            self.pub.publish(topic, {"kind": kind, "level": level, "message": message})
        self._progress.message = message

    def _fault(self, kind: str, message: str, level: str = "warning") -> None:
        self.fault_counts[kind] += 1
        self.event(kind, message, level)

    def _set_state(self, state: State) -> None:
        self.state = state
        self._progress.state = state
        if self.pub is not None:
            self.pub.publish("status", self.status())
        self._notify()

    def _notify(self) -> None:
        if self.observer is not None:
            self.observer(self._progress)

    def status(self) -> dict:
        te, ee, res = self.last_estimate
        return {
            "state": self.state.value,
            "pass_index": self._progress.pass_index,
            "passes": self.plan.passes,
            "mask_index": self._progress.mask_index,
            "masks": self.k,
            "frames": self.frames,
            "frames_total": (self.plan.passes - self.plan.first_pass) * self.k,
            "darks": self.darks,
            "rejected": self.rejected,
            "photons_total": self.photons_total,
            "estimates": self.estimates,
            "true_error": te,
            "error_estimate": ee,
            "residual": res,
            "output_path": str(self.plan.output_path),
            "exposure_s": self.exposure_s,
            "faults": dict(self.fault_counts),
            "recovered": self.recovered,
            "pauses": self.pauses,
            "refused": self.refused,
            "pause_reason": self.control.pause_reason if self.state == State.paused else "",
            "message": self._progress.message,
        }

    # --- the run ---------------------------------------------------------------
    def run(self) -> RunSummary:
        t0 = time.monotonic()
        message = ""
        final = State.finished
        late_estimates = False  # set when a stop or fault ends the run: collect estimates already on their way
        cam = self.bench.camera
        cfg_run = self.bench.config.run
        try:
            self._set_state(State.preparing)
            cam.exposure_s = self.exposure_s
            try:
                self._roi = cam.roi
            except Exception:
                self._roi = None
            todo = self.plan.passes - self.plan.first_pass
            what = (f"resumed at pass {self.plan.first_pass + 1}: {todo} of {self.plan.passes} passes to go"
                    if self.plan.resumed else f"{self.plan.passes} passes")
            series = f", a frame set every {self.plan.interval_s:g} s" if self.plan.interval_s else ""
            self.event("run_start", f"run start: {what} x {self.k} masks, exposure {self.exposure_s:g} s{series}")
            self.writer = FrameWriter(self.store, cfg_run.writer_queue_frames, cfg_run.flush_interval_s)
            if self.plan.dark_frames:
                self._take_darks(self.plan.dark_frames)
            for p in range(self.plan.first_pass, self.plan.passes):
                t_pass = time.monotonic()
                self._take_pass(p)
                self._collect_estimates(0.0)
                if self.plan.interval_s and p + 1 < self.plan.passes:
                    self._interval_wait(t_pass)
                if self.control.stop_requested:
                    raise RunAborted(self.control.stop_reason)
            self._set_state(State.finishing)
            self.bench.safety.close_shutter()
            self._close_writer()  # the last frames durable: the last sets announced and submitted
            waiting = len(self.recon.outstanding) + len(self.recon._pending) if self.recon is not None else 0
            if waiting:
                self._progress.estimates_waiting = waiting
                self.event("estimates_wait", f"all frames taken, shutter closed; computing the estimates of the last "
                           f"{waiting} frame set(s) (up to 30 s)")
            self._collect_estimates(timeout_s=30.0, drain=True)
        except DiskSpaceError as exc:
            final, message = State.stopped, str(exc)
            self._fault_quietly("disk_low", message)
        except StoreWriteError as exc:
            final, message = (State.stopped if exc.disk_full else State.fault), str(exc)
            self._fault_quietly("disk_full" if exc.disk_full else "write_error", message)
        except DoseLimitStop as exc:
            final, message = State.stopped, str(exc)
            self._fault_quietly("dose_limit", message, "error")
            late_estimates = True
        except RunAborted as exc:
            final, message = State.stopped, str(exc)
            late_estimates = True
        except InterlockOpen as exc:
            final, message = State.fault, str(exc)
            late_estimates = True
        except DeviceError as exc:
            final, message = State.fault, str(exc)
            late_estimates = True
            if isinstance(exc, DeviceMisconfigured) and self.frames == 0 and self.darks == 0:
                # the device refused the run's own settings before the first frame: a resume (the same
                # stored settings) would fail the same way
                self._unfixable = True
        except Exception as exc:
            final, message = State.fault, f"{type(exc).__name__}: {exc}"
            raise
        finally:
            self._safe_state()
            try:  # every frame queued is written and flushed before the run ends (also after a stop or fault)
                self._close_writer()
            except StoreError as exc:
                if final == State.finished or not message:
                    final, message = State.fault, str(exc)
                self._fault_quietly("write_error", str(exc))
            if late_estimates:
                # shutter closed: keep the estimates of frame sets already taken (bounded wait; never on a disk fault)
                try:
                    self._collect_estimates(timeout_s=STOP_ESTIMATE_WAIT_S, drain=True)
                except (StoreError, OSError):  # the estimates are a convenience; the frames are already safe
                    pass
            in_file = self.plan.first_pass + self.passes_complete
            try:
                from .run_state import precision_terms_message

                if self._progress.precision:  # the last estimate's precision terms, before the run's end record
                    self.store.log("precision", precision_terms_message(self._progress.precision))
                if final == State.finished:
                    self.event("run_end", f"run finished: {in_file} complete frame sets")
                else:
                    level = "warning" if final == State.stopped else "error"
                    then = (f"continue with: maskrun resume {self.plan.output_path}" if not self._unfixable else
                            "no resume can fix this (it would use the same settings): start a new run with "
                            "settings the device accepts")
                    self.event("run_end", f"run {final.value}: {message}; {in_file} complete frame sets kept; {then}",
                               level)
                self.store.flush()
            except StoreError:
                pass  # the disk is full: the text log has the line; the file keeps what was flushed
            self._set_state(final)
        return self._summary(final, message, time.monotonic() - t0)

    def _close_writer(self) -> None:
        """Write and flush what is queued, stop the writer thread, announce the sets now durable."""
        if self.writer is None:
            return
        w, self.writer = self.writer, None
        try:
            w.close()
        finally:
            self.writer_stats = w.stats
            self._announce_durable(w)

    def _announce_durable(self, writer: FrameWriter | None = None) -> None:
        """Announce the frame sets the writer has flushed: count, stream message, live reconstruction."""
        w = writer or self.writer
        if w is None:
            return
        for set_index in w.durable_sets():
            done = self._pending_sets.pop(set_index, None)
            if done is None:
                continue
            p, intens, ref, photons_total = done
            self.passes_complete += 1
            if self.pub is not None:
                self.pub.publish("frameset", {"pass_index": p, "set_index": set_index, "frames": self.k,
                                              "photons_total": photons_total})
            if self.recon is not None and intens is not None:
                if not self.recon.submit(p, intens, ref, self.bench.response.quantum_efficiency,
                                        noise=self.noise_model()):
                    self.event("recon_behind", f"reconstruction is behind: frame set {p} skipped for the live "
                               "estimate (it is in the run file)", "warning")

    def _arm(self, k: int, set_index: int) -> None:
        """Show mask k and start its exposure now, so it runs while the previous frame is stored and
        published (the pipelined loop). The same checks as before any exposure come first (disk, dose,
        interlock and shutter); a stop, pause or saturation stop asked for meanwhile arms nothing.
        A trigger that fails leaves the frame to be taken the ordinary way (with its retries)."""
        if self._stop_after_frame or self.control.stop_requested or self.control.pause_requested:
            return
        self._frame_flags = 0
        self.disk.check()
        self._check_dose_before()
        self._ensure_light()
        mod = self.bench.modulator
        self._call("modulator", lambda: mod.show(k), f"showing mask {k + 1}")
        if mod.settle_s > 0:
            time.sleep(mod.settle_s)
        t = time.time()
        try:
            self.bench.camera.trigger()
        except DeviceError:
            return
        self._armed, self._armed_t, self._armed_flags = (set_index, k), t, self._frame_flags

    def _fault_quietly(self, kind: str, message: str, level: str = "error") -> None:
        """Record a fault that ends the run; never raises (the store may be what failed)."""
        self.fault_counts[kind] += 1
        try:
            self.event(kind, message, level)
        except StoreError:
            pass

    def _safe_state(self) -> None:
        try:
            self.bench.safety.close_shutter()
        except Exception as exc:
            try:
                self.store.log("shutter_fault", f"closing the shutter failed: {exc}; close it by hand", "error")
            except StoreError:
                pass

    def _interval_wait(self, t_pass: float) -> None:
        """Time series: shutter closed until the next frame set is due; pauses and stops are honoured."""
        self.bench.safety.close_shutter()
        wait = self.plan.interval_s - (time.monotonic() - t_pass)
        if wait <= 0:
            self.event("interval_late", f"the frame set took {self.plan.interval_s - wait:.1f} s, longer than the "
                       f"interval {self.plan.interval_s:g} s: the next starts at once", "warning")
            return
        self.event("interval_wait", f"next frame set in {wait:.1f} s (shutter closed)")
        due = time.monotonic() + wait
        while True:
            self._check_pause()
            left = due - time.monotonic()
            if left <= 0:
                return
            self.control.sleep(min(left, 0.5))
            self._collect_estimates(0.0)

    # --- stop / pause ---------------------------------------------------------
    def _check_stop(self) -> None:
        if self.control.stop_requested:
            raise RunAborted(self.control.stop_reason)

    def _check_pause(self) -> None:
        self._check_stop()
        if self.control.pause_requested:
            self._pause(self.control.pause_reason or "pause requested", kind="paused")

    def _pause(self, reason: str, kind: str = "paused", interlock: bool = False) -> None:
        """Close the shutter and wait for a resume (interlock pauses: and for the interlock to close).

        Raises RunAborted on a stop request or when ``[recovery] pause_timeout_s`` passes."""
        self._safe_state()
        self.control.request_pause(reason)
        self.pauses += 1
        self._frame_flags |= FLAG_AFTER_PAUSE
        timeout = self.rec.pause_timeout_s
        limit = f"; the run stops by itself if not resumed within {timeout:g} s" if timeout else ""
        self.event(kind, f"paused: {reason}; shutter closed. To continue: {self.control.resume_hint}{limit}", "error")
        previous = self.state if self.state != State.paused else State.acquiring
        self._set_state(State.paused)
        t0 = time.monotonic()
        while True:
            while not self.control.wait_resume(0.2):
                self._collect_estimates(0.0)
                self._read_safety_while_paused()
                if timeout and time.monotonic() - t0 > timeout:
                    raise RunAborted(f"paused for {timeout:g} s without a resume ({reason}): stopped safely")
            self._check_stop()
            if interlock:
                try:
                    closed = self.bench.safety.interlock_closed()
                except DeviceError as exc:
                    closed = False
                    reason_now = f"cannot read the interlock ({exc})"
                else:
                    reason_now = "the interlock still reads OPEN"
                if not closed:
                    self.control.request_pause(reason)
                    self.event("resume_refused", f"resume refused: {reason_now}; close it, then resume again", "warning")
                    continue
            break
        self.event("resumed", f"resumed after a {time.monotonic() - t0:.1f} s pause ({reason})")
        self._set_state(previous)

    def _read_safety_while_paused(self) -> None:
        """Keep reading the interlock and shutter about once a second while paused, so the status shows
        what the box says now (see safety_readings); a failed read is left to the resume check."""
        now = time.monotonic()
        if now - getattr(self, "_paused_read_t", 0.0) < 1.0:
            return
        self._paused_read_t = now
        try:
            self.bench.safety.interlock_closed()
            self.bench.safety.shutter_is_open()
        except DeviceError:
            pass

    # --- devices with retries, backoff and reconnects ----------------------------
    def _backoff(self):
        delay = self.rec.backoff_initial_s
        while True:
            yield delay
            delay = min(delay * self.rec.backoff_factor, self.rec.backoff_max_s)

    def _call(self, device: str, fn, what: str):
        """Run one device command; retry timeouts/bad replies with backoff, reconnect lost devices,
        pause when retries or reconnects are used up. Returns fn's result."""
        failures = 0
        delays = self._backoff()
        while True:
            self._check_stop()
            try:
                result = fn()
            except DeviceDisconnected as exc:
                self._fault(f"{device}_disconnect", f"{what}: {device} link lost ({exc.detail}); reconnecting")
                self._reconnect(device)
                failures += 1
                continue
            except (DeviceTimeout, DeviceFault) as exc:
                failures += 1
                kind = f"{device}_no_ack" if isinstance(exc, DeviceTimeout) else f"{device}_bad_reply"
                if failures > self.rec.retries:
                    self._fault(kind, f"{what}: {exc.detail} ({failures} attempts)")
                    self._pause(f"{device} does not answer ({what}: {exc.detail}) after {failures} attempts", kind="paused")
                    failures, delays = 0, self._backoff()
                    continue
                delay = next(delays)
                self._fault(kind, f"{what}: attempt {failures}: {exc.detail}; retrying in {delay:.2f} s")
                self.control.sleep(delay)
                continue
            if failures:
                self.recovered += 1
                self.event("recovered", f"{what}: {device} answered after {failures} failed attempt(s)")
                if device == "modulator":
                    self._frame_flags |= FLAG_MODULATOR_RETRIED
            return result

    def _reconnect(self, device: str) -> None:
        """Reopen a lost device (backoff between attempts); pause when ``reconnect_attempts`` fail."""
        attempts = 0
        delays = self._backoff()
        self._frame_flags |= FLAG_RECONNECTED
        while True:
            self._check_stop()
            attempts += 1
            try:
                self._reopen(device)
            except DeviceError as exc:
                if attempts >= max(1, self.rec.reconnect_attempts):
                    self._pause(f"{device} lost and {attempts} reconnect attempts failed ({exc.detail}); "
                                f"check its cable and power", kind="paused")
                    attempts, delays = 0, self._backoff()
                else:
                    self.control.sleep(next(delays))
                continue
            self.recovered += 1
            self.event(f"{device}_reconnected", f"{device} reconnected after {attempts} attempt(s)")
            return

    def _reopen(self, device: str) -> None:
        b = self.bench
        if device == "camera":
            cam = b.camera
            try:
                cam.close()
            except Exception:
                pass
            cam.open()
            cam.exposure_s = self.exposure_s
            if self._roi is not None:
                cam.roi = self._roi
            self.ids = FrameIdTracker()  # a reconnected camera may restart its counter
            return
        dev = getattr(b, _DEVICE_ATTR[device])
        if hasattr(dev, "reconnect"):
            dev.reconnect()
        else:
            try:
                dev.close()
            except Exception:
                pass
            dev.open()
            if device == "modulator":
                dev.load(b.masks)
        if device == "safety":
            dev.close_shutter()  # a known state; the box closes it by itself when its link drops

    # --- light ------------------------------------------------------------------
    def _ensure_light(self) -> None:
        """Interlock closed (else: shutter closed and pause until it closes and the user resumes), shutter open."""
        safety = self.bench.safety
        while True:
            if not self._call("safety", safety.interlock_closed, "reading the interlock"):
                self._safe_state()
                if not self._light_started:
                    raise InterlockOpen(
                        "interlock reads OPEN at the start of the run: the shutter stays closed. Close the "
                        "enclosure/door interlock, then start the run again")
                self._fault("interlock_open", "the interlock reads OPEN: shutter closed, run paused", "error")
                self._pause("the interlock is open (door or enclosure)", kind="paused", interlock=True)
                continue
            if self._call("safety", safety.shutter_is_open, "reading the shutter"):
                self._light_started = True
                return
            try:
                self._call("safety", self._open_shutter, "opening the shutter")
                self._light_started = True
                return
            except InterlockOpen:
                continue  # it opened in between: pause above

    def _open_shutter(self) -> None:
        if not self.bench.safety.interlock_closed():
            raise InterlockOpen(
                "interlock reads OPEN: the shutter stays closed. Close the enclosure/door interlock, "
                "then start or resume the run"
            )
        if not self.bench.safety.shutter_is_open():
            self.bench.safety.open_shutter()
            self.event("shutter", "shutter opened (interlock closed)")

    # --- frames -----------------------------------------------------------------
    def _grab(self, timeout_s: float, p: int = -1, k: int = -1, set_index: int = -1, triggered_at: float | None = None):
        """Trigger and grab one frame, retrying timeouts/faults with backoff, reconnecting a lost camera,
        refusing stale frames and frames after an id gap. Returns (frame, attempts, flags, t_request).
        ``triggered_at``: the exposure was already started (by ``_arm``) at that time: the first attempt
        only grabs it (a stop request then waits for the frame in progress)."""
        cam = self.bench.camera
        flags = 0
        attempts = failures = stale = 0
        delays = self._backoff()
        while True:
            if triggered_at is None:
                self._check_stop()
            attempts += 1
            t_req = time.time() if triggered_at is None else triggered_at
            try:
                if triggered_at is None:
                    cam.trigger()
                triggered_at = None
                frame = cam.grab(timeout_s)
            except DeviceDisconnected as exc:
                self._fault("camera_disconnect", f"camera link lost ({exc.detail}); reconnecting")
                self._reconnect("camera")
                flags |= FLAG_RETAKEN
                continue
            except (DeviceTimeout, DeviceFault) as exc:
                failures += 1
                timeout = isinstance(exc, DeviceTimeout)
                flags |= FLAG_TIMEOUT_RETRIED if timeout else FLAG_RETAKEN
                self._expect_gap = self._expect_gap or not timeout  # a corrupted frame used up an id
                kind = "camera_timeout" if timeout else "camera_fault"
                if failures > self.rec.retries:
                    self._fault(kind, f"attempt {attempts}: {exc.detail}")
                    self._pause(f"the camera gave no good frame in {failures} attempts ({exc.detail})", kind="paused")
                    failures, delays = 0, self._backoff()
                    continue
                delay = next(delays)
                self._fault(kind, f"attempt {attempts}: {exc.detail}; retrying in {delay:.2f} s")
                self.control.sleep(delay)
                continue
            kind = self.ids.classify(frame.frame_id)
            if kind == "stale":
                self.rejected += 1
                stale += 1
                flags |= FLAG_RETAKEN
                if stale > self.bench.config.checks.stale_retakes:
                    self._fault("stale_frame", f"frame id {frame.frame_id} did not advance, {stale} times in a row")
                    self._pause(f"the camera keeps delivering stale frames (id {frame.frame_id}); check its "
                                "trigger and frame buffer settings", kind="paused")
                    stale = 0
                    continue
                self._fault("stale_frame", f"frame id {frame.frame_id} did not advance: refused and retaken")
                continue
            if kind == "gap":
                flags |= FLAG_ID_GAP
                if not self._expect_gap:
                    self.rejected += 1
                    flags |= FLAG_RETAKEN
                    self._refuse(frame, p, k, set_index, t_req, flags, attempts)
                    self._fault("frame_dropped", f"camera frame id jumped to {frame.frame_id}: a frame was dropped; "
                                "this frame's origin is uncertain: kept in /entry/refused and retaken")
                    continue
                self.event("frame_id_gap", f"frame id jumped to {frame.frame_id} after the lost frame (expected)")
            self._expect_gap = False
            if failures or stale:
                self.recovered += 1
                self.event("recovered", f"camera delivered a good frame after {attempts} attempt(s)")
            return frame, attempts, flags, t_req

    def _refuse(self, frame, p, k, set_index, t_req, flags, attempts, chk=None) -> None:
        """Keep a frame that will not be used in /entry/refused (never lose what was taken)."""
        self.refused += 1
        peak = int(frame.pixels.max())
        self.store.append_refused(
            frame.pixels,
            frame_info_record(
                pass_index=p, set_index=set_index, mask_index=k, frame_id=frame.frame_id, t_request_s=t_req,
                t_frame_s=frame.timestamp_s, exposure_s=frame.exposure_s, peak_dn=peak,
                saturated_fraction=chk.saturated_fraction if chk else 0.0, photons=chk.photons if chk else 0.0,
                flags=flags, attempts=attempts,
            ),
        )
        self.store.flush()

    def _take_darks(self, count: int) -> None:
        self._set_state(State.darks)
        self.bench.safety.close_shutter()
        acc = np.zeros(self.bench.grid_shape, dtype=np.float64)
        acc_sq = np.zeros(self.bench.grid_shape, dtype=np.float64)  # for the read noise (precision estimate)
        for i in range(count):
            self._check_pause()
            self.disk.check()
            self._frame_flags = 0
            timeout = self.exposure_s + self.bench.config.camera.grab_timeout_s
            frame, attempts, flags, t_req = self._grab(timeout)
            self.store.append_dark(
                frame.pixels,
                frame_info_record(
                    pass_index=-1, set_index=-1, mask_index=-1, frame_id=frame.frame_id, t_request_s=t_req,
                    t_frame_s=frame.timestamp_s, exposure_s=frame.exposure_s, peak_dn=int(frame.pixels.max()),
                    flags=flags | self._frame_flags, attempts=attempts,
                ),
            )
            self.store.flush()
            acc += frame.pixels
            acc_sq += np.square(frame.pixels, dtype=np.float64)
            self.darks += 1
        self.dark_dn = (acc / count).astype(np.float32)
        self.dark_dn.setflags(write=False)  # replaced, never changed: checks.dark_total_dn keeps its sum
        if count > 1:  # temporal noise of one dark frame, mean over pixels, DN -> electrons
            var_dn = np.maximum(acc_sq - acc * acc / count, 0.0).sum() / ((count - 1) * acc.size)
            self.read_noise_e = float(np.sqrt(var_dn)) / float(self.bench.response.gain_dn_per_e)
        self.event("darks", f"{count} dark frames taken, mean level {float(self.dark_dn.mean()):.1f} DN")

    def _check_dose_before(self) -> None:
        if self.dose is None:
            return
        if self.dose.remaining_photons() <= 0 or (self._last_photons > 0 and self.dose.would_exceed(self._last_photons)):
            t = self.dose.run
            raise DoseLimitStop(
                f"dose limit: the next frame (about {self._last_photons:.3g} photons at the camera) would pass "
                f"the limit (so far {t.describe()}); "
                "stopped before exposing. Frames taken are kept; raise the limit or move to a fresh position"
            )

    def _account_dose(self, photons: float) -> None:
        photons = max(float(photons), 0.0)
        self._last_photons = photons  # the prediction for the next frame
        if self.dose is None:
            return
        from .dose import DoseLimitExceeded

        try:
            self.dose.add(photons)
        except DoseLimitExceeded as exc:
            raise DoseLimitStop(str(exc)) from None

    def _take_frame(self, p: int, k: int, set_index: int):
        """One good frame of mask k: returns (frame, check, flags, attempts, t_request). Stores refused attempts."""
        cam = self.bench.camera
        mod = self.bench.modulator
        action = self.bench.config.checks.saturation_action
        shortenings = 0
        self._frame_flags = FLAG_AFTER_RESUME if self._after_resume else 0
        armed = self._armed == (set_index, k)
        self._armed = None
        while True:
            if armed:  # shown and exposing since _arm (which made the checks below): grab it first
                self._frame_flags |= self._armed_flags
            else:
                self._check_pause()
                self.disk.check()
                self._check_dose_before()
                self._ensure_light()
                self._call("modulator", lambda: mod.show(k), f"showing mask {k + 1}")
                if mod.settle_s > 0:
                    time.sleep(mod.settle_s)
            timeout = self.exposure_s + self.bench.config.camera.grab_timeout_s
            frame, attempts, flags, t_req = self._grab(timeout, p, k, set_index,
                                                       triggered_at=self._armed_t if armed else None)
            armed = False
            flags |= self._frame_flags
            if not self._call("safety", self.bench.safety.shutter_is_open, "reading the shutter"):
                self._refuse(frame, p, k, set_index, t_req, flags | FLAG_SHUTTER_CLOSED, attempts)
                self._frame_flags |= FLAG_RETAKEN
                self._fault("shutter_closed", f"pass {p + 1} mask {k + 1}: the shutter was found closed after the exposure "
                            "(interlock?): frame kept in /entry/refused and retaken")
                continue
            chk = check_frame(frame.pixels, self.dark_dn, self.bench.response, self.limits, self.flat)
            flags |= chk.flags
            if chk.saturated_fraction > self.limits.max_saturated_fraction and action != "flag":
                if action == "stop":
                    self._stop_after_frame = (
                        f"saturation: {chk.saturated_fraction:.2%} of the pixels of pass {p + 1} mask {k + 1} saturated "
                        f"(limit {self.limits.max_saturated_fraction:.2%}); stopped as configured "
                        "(saturation_action = 'stop'). Lower the exposure or attenuate the beam")
                elif shortenings < self.bench.config.checks.saturation_max_shortenings:
                    new = self.exposure_s * self.bench.config.checks.saturation_shorten_factor
                    try:
                        cam.exposure_s = new
                    except DeviceError as exc:
                        self.event("saturation", f"cannot shorten the exposure below {self.exposure_s:g} s "
                                   f"({exc.detail}): frame kept, flagged", "warning")
                    else:
                        self._account_dose(chk.photons)
                        self._refuse(frame, p, k, set_index, t_req, flags, attempts, chk)
                        self._fault("exposure_shortened",
                                    f"pass {p + 1} mask {k + 1}: {chk.saturated_fraction:.2%} saturated: exposure "
                                    f"{self.exposure_s:g} s -> {new:g} s, frame retaken")
                        self.exposure_s = new
                        shortenings += 1
                        self._frame_flags |= FLAG_EXPOSURE_SHORTENED | FLAG_RETAKEN
                        continue
            return frame, chk, flags, attempts, t_req

    def _take_pass(self, p: int) -> None:
        self._check_pause()
        self._set_state(State.acquiring)
        self._progress.pass_index = p
        resp = self.bench.response
        set_index = self.set_index
        self.set_index += 1
        for k in range(self.k):
            frame, chk, flags, attempts, t_req = self._take_frame(p, k, set_index)
            last = k == self.k - 1
            info = frame_info_record(
                pass_index=p, set_index=set_index, mask_index=k, frame_id=frame.frame_id, t_request_s=t_req,
                t_frame_s=frame.timestamp_s, exposure_s=frame.exposure_s,
                saturated_fraction=chk.saturated_fraction, peak_dn=chk.peak_dn, photons=chk.photons,
                flags=flags, attempts=attempts,
            )
            self._set_exposures[k] = frame.exposure_s
            if last:  # announced once durable (the live data are added below, after the next trigger)
                self._pending_sets[set_index] = (p, None, float(self._set_exposures.min()),
                                                 self.photons_total + max(chk.photons, 0.0))
            # stored by the writer thread (waits only when its queue is full); flushed at the set's end
            idx = self.writer.submit(frame.pixels, info, set_end=set_index if last else None)
            self.frames += 1
            self.photons_total += max(chk.photons, 0.0)
            if flags:
                self.flagged += 1
            if chk.flags & FLAG_SATURATED:
                self.saturated += 1
            self._account_dose(chk.photons)
            # the next exposure starts now (its mask shown first), while this frame is published
            if not last:
                self._arm(k + 1, set_index)
            elif not self.plan.interval_s and p + 1 < self.plan.passes:
                self._arm(0, self.set_index)
            # frame set buffer: dark-subtracted, flat-corrected electrons, zero frequency moved to [0, 0]
            # (one pass with the shift folded in)
            electrons_shifted(frame.pixels, self.dark_dn, resp.gain_dn_per_e, self._flat_shifted, self._set_buffer[k])
            if last and set_index in self._pending_sets:
                q, _, ref, photons_at_end = self._pending_sets[set_index]
                self._pending_sets[set_index] = (q, self._frame_set_for_recon(), ref, photons_at_end)
            if chk.problems:
                self.event("check", f"pass {p + 1} mask {k + 1}: " + "; ".join(chk.problems), "warning")
            if self.pub is not None:
                meta = {"pass_index": p, "mask_index": k, "frame_index": idx, "frame_id": frame.frame_id,
                        "exposure_s": frame.exposure_s, "saturated_fraction": chk.saturated_fraction,
                        "peak_dn": chk.peak_dn, "photons": chk.photons, "flags": int(flags),
                        "flag_names": flag_names(flags),
                        "max_dn": self.limits.max_dn}
                self.pub.publish("frame", meta, frame.pixels)
                self.pub.publish("preview", meta, downsample_preview(frame.pixels))
                self.pub.publish("check", {**meta, "problems": chk.problems})
            pr = self._progress
            pr.mask_index, pr.frames_done, pr.exposure_s = k, self.frames, self.exposure_s
            pr.photons_last, pr.saturated_last, pr.photons_total = chk.photons, chk.saturated_fraction, self.photons_total
            self._notify()
            if self._stop_after_frame:
                self._fault("saturation_stop", self._stop_after_frame, "error")
                raise RunAborted(self._stop_after_frame)
            self._announce_durable()
            self._collect_estimates(0.0)
        self._after_resume = False

    def _frame_set_for_recon(self):
        """A copy of the frame-set buffer for the live reconstruction (None without one): negative values
        clipped, every frame scaled to the set's shortest exposure."""
        if self.recon is None:
            return None
        ref = float(self._set_exposures.min())
        intens = np.maximum(self._set_buffer, 0.0)
        if np.any(self._set_exposures != ref):
            intens *= (ref / self._set_exposures).astype(np.float32)[:, None, None]
        return intens

    def noise_model(self) -> dict:
        """What is known about the noise of the frame sets (reconstruct.precision.NoiseModel fields)."""
        from .run_state import noise_model_for

        return noise_model_for(self.bench, self.read_noise_e, self.darks if self.plan.dark_frames else 0)

    def _collect_estimates(self, timeout_s: float, drain: bool = False) -> None:
        if self.recon is None:
            return
        got = self.recon.drain(timeout_s) if drain else self.recon.poll(timeout_s)
        if drain and self.recon.outstanding:
            self.event("recon_incomplete", f"no estimate arrived for frame sets {sorted(self.recon.outstanding)}", "warning")
        from maskrun.reconstruct import relative_error

        for hdr, est in got:
            prec = hdr.precision or {}
            true_err = float("nan")
            if self.bench.truth is not None:
                if est.shape != self.bench.truth.shape or self.bench.config.masks.count != 1:
                    true_err = float(relative_error(self.bench.truth, est.astype(np.complex128)))
                else:  # one pattern: modulo shift, twin and global phase (reconstruct/ambiguities.py)
                    from maskrun.reconstruct.ambiguities import relative_error_modulo_ambiguities

                    true_err = relative_error_modulo_ambiguities(self.bench.truth, est.astype(np.complex128))
                self.true_errors.append(true_err)
            self.store.append_estimate(
                est,
                estimate_info_record(
                    pass_index=hdr.pass_index, passes_used=hdr.passes_used, residual=hdr.residual,
                    error_estimate=hdr.error_estimate, true_error=true_err, iterations=hdr.iterations,
                    photons=hdr.photons, elapsed_s=hdr.elapsed_s, t_s=time.time(),
                    **{col: _nan_if_none(prec.get(key)) for col, key in PRECISION_COLUMNS.items()},
                ),
            )
            self.store.flush()
            self.estimates += 1
            self.last_estimate = (true_err, hdr.error_estimate, hdr.residual)
            pr = self._progress
            pr.estimate_true_error, pr.estimate_error_estimate, pr.estimate_residual = self.last_estimate
            pr.precision = hdr.precision
            pr.estimates_waiting = len(self.recon.outstanding)
            if self.pub is not None:
                self.pub.publish("estimate", {"pass_index": hdr.pass_index, "passes_used": hdr.passes_used,
                                              "residual": hdr.residual, "error_estimate": hdr.error_estimate,
                                              "true_error": true_err, "iterations": hdr.iterations,
                                              "precision": hdr.precision,
                                              "units": "sqrt(incident photons per second)"}, est)
            self._notify()

    def _summary(self, state: State, message: str, wall_s: float) -> RunSummary:
        te, ee, res = self.last_estimate
        return RunSummary(
            state=state,
            passes_complete=self.passes_complete,
            frames=self.frames,
            darks=self.darks,
            rejected=self.rejected,
            flagged=self.flagged,
            saturated_frames=self.saturated,
            photons_per_frame_mean=self.photons_total / self.frames if self.frames else 0.0,
            photons_total=self.photons_total,
            estimates=self.estimates,
            final_true_error=te,
            final_error_estimate=ee,
            final_residual=res,
            wall_s=wall_s,
            output_path=self.plan.output_path,
            message=message,
            true_errors=list(self.true_errors),
            faults=dict(self.fault_counts),
            recovered=self.recovered,
            pauses=self.pauses,
            refused=self.refused,
            sets_in_file=self.plan.first_pass + self.passes_complete,
            resumable=not self._unfixable,
            writer_queue_high_water=self.writer_stats.queue_high_water if self.writer_stats else 0,
        )
