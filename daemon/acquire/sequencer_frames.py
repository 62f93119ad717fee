"""The sequencer's frames: arming the next exposure, grabbing with retakes and refusals, dark frames,
one checked frame of a mask, one pass (frame set) and the dose accounted before and after each frame.

A mixin of ``sequencer.Sequencer``: it uses the run's state (bench, store, writer, counters, events)."""

from __future__ import annotations

import time

import numpy as np

from maskrun.drivers import DeviceError, DeviceTimeout
from maskrun.drivers.errors import DeviceDisconnected, DeviceFault

from maskrun.daemon.record.checks import check_frame, downsample_preview
from maskrun.daemon.acquire.frame_convert import electrons_shifted
from maskrun.daemon.acquire.sequencer_devices import device_fault_kind
from maskrun.daemon.acquire.sequencer_types import DoseLimitStop, RunAborted, State
from maskrun.daemon.record.store import (
    FLAG_AFTER_RESUME,
    FLAG_EXPOSURE_SHORTENED,
    FLAG_ID_GAP,
    FLAG_RETAKEN,
    FLAG_SATURATED,
    FLAG_SHUTTER_CLOSED,
    FLAG_TIMEOUT_RETRIED,
    flag_names,
    frame_info_record,
)


class SequencerFrames:
    """Frames, frame sets and the dose of a run (mixed into ``Sequencer``)."""

    def _make_dose_ledger(self):
        ch = self.bench.config.checks
        if ch.max_dose_photons is None and ch.max_dose_energy_per_area_j_per_m2 is None:
            return None
        from maskrun.daemon.safety.dose import DoseLedger, mask_mean_transmission

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

    def _prepare_exposure(self, k: int) -> None:
        """The checks before any exposure (disk, dose, interlock and shutter; these may pause or stop),
        then show mask k (with the modulator's retries)."""
        self.disk.check()
        self._check_dose_before()
        self._ensure_light()
        self._call("modulator", lambda: self.bench.modulator.show(k), f"showing mask {k + 1}")

    def _arm(self, k: int, set_index: int, early: bool = False) -> bool:
        """Show mask k and start its exposure now, so it runs while the previous frame is stored and
        published (the pipelined loop). The same checks as before any exposure come first (disk, dose,
        interlock and shutter); a stop, pause or saturation stop asked for meanwhile arms nothing.
        A trigger that fails leaves the frame to be taken the ordinary way (with its retries).

        ``early``: the previous frame is not stored yet, so nothing here may wait, pause or raise: a
        disk near its reserve, a dose near its limit, an open interlock, a closed shutter or a device
        that does not answer at once arms nothing (returns False), and the ordinary arming after the
        frame is stored meets the same condition with its usual handling. Returns True when armed."""
        if self._stop_after_frame or self.control.stop_requested or self.control.pause_requested:
            return False
        self._frame_flags = 0
        mod = self.bench.modulator
        if early:
            safety = self.bench.safety
            try:
                self.disk.check()
                self._check_dose_before()
                if not (safety.interlock_closed() and safety.shutter_is_open()):
                    return False
                mod.show(k)
            except (DeviceTimeout, DeviceFault, DeviceDisconnected) as exc:  # logged as the retries log it
                self._fault(device_fault_kind("modulator", exc), f"showing mask {k + 1}: {exc.detail}; tried again once the "
                            "frame before it is stored")
                return False
            except Exception:  # disk near its reserve, dose near its limit, ...: met again on the ordinary path
                return False
        else:
            self._prepare_exposure(k)
        if mod.settle_s > 0:
            time.sleep(mod.settle_s)
        t = time.time()
        try:
            self.bench.camera.trigger()
        except DeviceError:
            return False
        self._armed, self._armed_t, self._armed_flags = (set_index, k), t, self._frame_flags
        return True

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
        self.dark_dn.setflags(write=False)
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
        from maskrun.daemon.safety.dose import DoseLimitExceeded

        try:
            self.dose.add(photons)
        except DoseLimitExceeded as exc:
            raise DoseLimitStop(str(exc)) from None

    def _arm_next(self, p: int, k: int, set_index: int, early: bool = False) -> bool:
        """Arm the exposure that follows mask k of pass p: the next mask of this set, or the first mask of
        the next set (no interval between sets, passes left). Nothing after the last frame (returns True:
        nothing is left to arm). Returns whether the arming is done (see `_arm`)."""
        if k + 1 < self.k:
            return self._arm(k + 1, set_index, early)
        if not self.plan.interval_s and p + 1 < self.plan.passes:
            return self._arm(0, set_index + 1, early)
        return True

    def _may_arm_before_check(self) -> bool:
        """Whether the next exposure may start before this frame is checked: only when no check result
        could ask for this frame to be retaken or the run to stop (``saturation_action = 'flag'``), and
        the dose limit leaves room for two more frames like the last one (this frame, not yet counted,
        and the next; with a limit set, the run's first frame is always checked first)."""
        if self.bench.config.checks.saturation_action != "flag":
            return False
        if self.dose is None:
            return True
        return self._last_photons > 0 and not self.dose.would_exceed(2.0 * self._last_photons)

    def _take_frame(self, p: int, k: int, set_index: int, arm_early: bool = False):
        """One good frame of mask k: returns (frame, check, flags, attempts, t_request, armed_next).
        Stores refused attempts. ``arm_early``: once the frame is in and the shutter was open, start the
        next exposure before checking this frame, when `_may_arm_before_check` allows (armed_next True)."""
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
                self._prepare_exposure(k)
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
            # the frame check cannot change what comes next: the next exposure starts now
            armed_next = arm_early and self._may_arm_before_check() and self._arm_next(p, k, set_index, early=True)
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
            return frame, chk, flags, attempts, t_req, armed_next

    def _take_pass(self, p: int) -> None:
        self._check_pause()
        self._set_state(State.acquiring)
        self._progress.pass_index = p
        resp = self.bench.response
        set_index = self.set_index
        self.set_index += 1
        for k in range(self.k):
            frame, chk, flags, attempts, t_req, armed_next = self._take_frame(p, k, set_index, arm_early=True)
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
            if not armed_next:
                self._arm_next(p, k, set_index)
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
