"""The sequencer's link to the live reconstruction: frame sets announced once durable and submitted,
the noise model they carry, and the estimates collected, stored and published as they come back.

A mixin of ``sequencer.Sequencer``: it uses the run's state (bench, store, recon link, writer, counters)."""

from __future__ import annotations

import time

import numpy as np

from maskrun.daemon.acquire.frame_writer import FrameWriter
from maskrun.daemon.record.store import estimate_info_record

# estimate_info column -> key of reconstruct.precision.PrecisionEstimate.to_dict()
PRECISION_COLUMNS = {"error_predicted": "predicted", "error_data": "data", "misfit_chi2_dof": "chi2_dof",
                     "error_reported": "reported"}


def _nan_if_none(v) -> float:
    return float("nan") if v is None else float(v)


class SequencerEstimates:
    """Frame sets to the reconstruction, estimates back (mixed into ``Sequencer``)."""

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
        from maskrun.daemon.record.run_state import noise_model_for

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

