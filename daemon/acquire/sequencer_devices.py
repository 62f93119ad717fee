"""The sequencer's device handling: every device command with retries, backoff and reconnects, the
interlock and shutter before light, pauses and stops (see the fault table in ``sequencer``).

A mixin of ``sequencer.Sequencer``: it uses the run's state (bench, control, counters, events)."""

from __future__ import annotations

import time

from maskrun.drivers import DeviceError, DeviceTimeout
from maskrun.drivers.errors import DeviceDisconnected, DeviceFault

from maskrun.daemon.record.checks import FrameIdTracker
from maskrun.daemon.acquire.sequencer_types import InterlockOpen, RunAborted, State
from maskrun.daemon.record.store import FLAG_AFTER_PAUSE, FLAG_MODULATOR_RETRIED, FLAG_RECONNECTED, StoreError

_DEVICE_ATTR = {"camera": "camera", "modulator": "modulator", "safety": "safety"}



def device_fault_kind(device: str, exc: Exception) -> str:
    """The run log's name for a device command that failed: ``<device>_no_ack`` (no reply in time),
    ``<device>_bad_reply`` or ``<device>_disconnect`` (link lost)."""
    if isinstance(exc, DeviceTimeout):
        return f"{device}_no_ack"
    if isinstance(exc, DeviceFault):
        return f"{device}_bad_reply"
    return f"{device}_disconnect"

class SequencerDevices:
    """Device commands, light, pauses and stops of a run (mixed into ``Sequencer``)."""

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
                self._fault(device_fault_kind(device, exc), f"{what}: {device} link lost ({exc.detail}); reconnecting")
                self._reconnect(device)
                failures += 1
                continue
            except (DeviceTimeout, DeviceFault) as exc:
                failures += 1
                kind = device_fault_kind(device, exc)
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

