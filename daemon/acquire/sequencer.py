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
import time
from pathlib import Path
from typing import Callable

import numpy as np

from maskrun.drivers import DeviceError
from maskrun.drivers.errors import DeviceMisconfigured

from maskrun.daemon.acquire.bench import Bench
from maskrun.daemon.record.checks import CheckLimits, FrameIdTracker
from maskrun.daemon.acquire.disk import MB, DiskGuard, DiskSpaceError
from maskrun.daemon.acquire.frame_convert import shifted
from maskrun.daemon.acquire.frame_writer import FrameWriter
from maskrun.daemon.compute.recon_link import ReconLink
from maskrun.daemon.acquire.sequencer_devices import _DEVICE_ATTR, SequencerDevices
from maskrun.daemon.acquire.sequencer_estimates import PRECISION_COLUMNS, SequencerEstimates, _nan_if_none
from maskrun.daemon.acquire.sequencer_frames import SequencerFrames
from maskrun.daemon.acquire.sequencer_types import (
    DoseLimitStop,
    InterlockOpen,
    Progress,
    RunAborted,
    RunControl,
    RunPlan,
    RunSummary,
    State,
)
from maskrun.daemon.record.store import RunStore, StoreError, StoreWriteError
from maskrun.daemon.record.stream import Publisher

# names that lived here before the split, importable from here as before
__all__ = [
    "DoseLimitStop", "InterlockOpen", "PRECISION_COLUMNS", "Progress", "RunAborted", "RunControl", "RunPlan",
    "RunSummary", "STOP_ESTIMATE_WAIT_S", "Sequencer", "State", "_DEVICE_ATTR", "_nan_if_none",
]

STOP_ESTIMATE_WAIT_S = 5.0  # after a stop or fault, wait at most this long for estimates of sets already taken


class Sequencer(SequencerDevices, SequencerFrames, SequencerEstimates):
    """Takes the bench through one run (module docstring); the device handling, the frames and the
    link to the reconstruction are its mixins (``sequencer_devices``, ``sequencer_frames``,
    ``sequencer_estimates``)."""

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
                from maskrun.daemon.record.run_state import precision_terms_message

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


    def _fault_quietly(self, kind: str, message: str, level: str = "error") -> None:
        """Record a fault that ends the run; never raises (the store may be what failed)."""
        self.fault_counts[kind] += 1
        try:
            self.event(kind, message, level)
        except StoreError:
            pass


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
