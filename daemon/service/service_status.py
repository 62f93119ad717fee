"""The service's status: everything a client shows (state, safety readings with their age, run
progress, align figures, darks, dose, alerts), as one dict for the 'status' reply and the stream.

A mixin of ``service.Service``: it reads the service's state."""

from __future__ import annotations

import time

from maskrun.daemon.record.run_state import live_state
from maskrun.daemon.service.service_activities import RUN_STATES

PLANCK_J_S = 6.62607015e-34  # exact (SI 2019); CODATA 2018, Tiesinga et al., Rev. Mod. Phys. 93, 025010 (2021)
LIGHT_SPEED_M_S = 299792458.0  # exact (SI definition)


class ServiceStatus:
    """The status of the service (mixed into ``Service``)."""

    def _photon_energy_j(self) -> float:
        # E = h c / lambda (Planck-Einstein relation)
        return PLANCK_J_S * LIGHT_SPEED_M_S / self.cfg.laser.wavelength_m

    def status(self) -> dict:
        """Everything a client shows: state, safety, run progress, align figures, darks, alerts."""
        state = self.state
        run = None
        photons_now = 0.0
        exposure_now = self.exposure_s
        if self._run is not None and state in RUN_STATES:
            act = self._run
            pr = act.progress
            if act.last is not None:
                run = live_state(act.last, act.plan, int(self.bench.masks.shape[0]), fps=pr.get("fps", 0.0),
                                 eta_s=pr.get("eta_s"), elapsed_s=time.monotonic() - act.t_start,
                                 warnings=self.pub.recent_alerts if self.pub is not None else []).to_dict()
            else:
                run = {**pr, "output_path": str(act.plan.output_path), "passes": act.plan.passes,
                       "exposure_s": act.plan.exposure_s, "dark_frames": act.plan.dark_frames}
            exposure_now = run.get("exposure_s") or act.plan.exposure_s
            photons_now = run["photons_total"]
        align = None
        # every safety field is what the box said, with its age; too old or failed: unknown (never inferred)
        max_age = max(5.0, 3 * self.cfg.service.status_interval_s)
        readings = self.safety_readings.snapshot(max_age)
        interlock, shutter = readings["interlock_closed"], readings["shutter_open"]
        safety_source = (f"read from the safety box (by the {'run' if run is not None else 'align loop' if state == 'align' else 'service'}"
                         f"); a reading older than {max_age:g} s is shown as unknown")
        if self._align is not None and state == "align":
            align = self._align.figures.to_dict()
        elif self._align is not None and self._align.error:
            align = {"message": self._align.error}
        photons = self.photons_lifetime + photons_now
        ack = None
        if self._ack_valid():
            ack = {"who": self.ack.who, "how": self.ack.how, "when_utc": self.ack.when_utc}
        return {
            "state": state,
            "config": self.cfg.source_path,
            "uptime_s": time.time() - self._t_started,
            "control_address": self.control_address,
            "publish_address": self.publish_address,
            "curve": self.keys is not None,
            "stream_curve": bool(self.pub is not None and self.pub.authenticated),
            "safety": {"acknowledged": ack is not None, "acknowledgement": ack, "interlock_closed": interlock,
                       "shutter_open": shutter, "source": safety_source, "laser_class": self.cfg.laser.laser_class,
                       "wavelength_m": self.cfg.laser.wavelength_m, **readings},
            "exposure_s": exposure_now,  # the run's (as used) while a run goes, else the next run's
            "exposure_next_run_s": self.exposure_s,
            "masks": int(self.bench.masks.shape[0]) if self.bench is not None else 0,
            "grid_shape": list(self.cfg.grid.shape),
            "max_dn": self.bench.camera.max_dn if self.bench is not None else 0,
            "saturation_level": self.cfg.checks.saturation_level,
            "run": run,
            "last_run": self.last_run or None,
            "align": align,
            "darks": self.darks_info or None,
            "dose": {"photons_total": photons, "energy_j": photons * self._photon_energy_j(),
                     "note": "incident photons counted at the camera since the service started (runs only)"},
            "recent_alerts": self.pub.recent_alerts[-10:] if self.pub is not None else [],
            "stream_sent": dict(self.pub.sent) if self.pub is not None else {},
            "runs_started": self.runs_started,
            "reconstruction": None if self.recon is None else {
                "worker_pid": self.recon.process.pid if self.recon.process is not None else None,
                "worker_alive": self.recon.worker_alive()},
        }
