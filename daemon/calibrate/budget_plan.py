"""The planner's answer: a photon budget (``PhotonPlan``) with its printed table, and the error
raised when the dose limit forbids the target (``PlanInfeasible``); ``budget`` makes the plan and
re-exports both."""

from __future__ import annotations

from dataclasses import dataclass, field


class PlanInfeasible(RuntimeError):
    """The precision cannot be met under the dose limit. ``plan`` holds the numbers."""

    def __init__(self, plan: "PhotonPlan"):
        self.plan = plan
        super().__init__(plan.infeasible_reason or "the plan cannot be met")

@dataclass
class PhotonPlan:
    """A photon budget. Photon counts are *detected* unless the name says otherwise.

    method / method_note: 'crb' or 'shot_noise', and a sentence saying what was used.
    target_relative_error, target_phase_precision_rad: the goal (phase ~ relative error).
    photons_total: detected photons over all frames of all passes.
    passes: frame sets to average; frames_total = passes * mask_count.
    photons_per_frame, photons_per_pixel_mean, photons_per_pixel_peak: per frame (detected).
    frame_ceiling_photons: most detected photons one frame may hold below the saturation
        ceiling (None without a camera saturation capacity).
    incident_photons_at_camera: photons_total / quantum_efficiency.
    photons_on_sample: incident photons / optical_transmission.
    energy_per_area_j_per_m2: dose on the sample (None without wavelength and area).
    exposure_per_frame_s, total_exposure_s: with a known photon rate (else None).
    feasible: False when the dose limit forbids the target; infeasible_reason says why.
    achievable_relative_error: best relative error under the dose limit (None without a limit).
    warnings: sentences for the user (saturation, dose, read noise, assumptions).
    saturation_capacity_e, saturation_note: the capacity the passes were planned with and where it
        came from (profile, ADC range, given, unknown).
    """

    method: str
    method_note: str
    grid_shape: tuple[int, int]
    mask_count: int
    target_relative_error: float
    target_phase_precision_rad: float
    photons_total: float
    passes: int
    photons_per_frame: float
    photons_per_pixel_mean: float
    photons_per_pixel_peak: float
    peak_to_mean_ratio: float
    frame_ceiling_photons: float | None
    quantum_efficiency: float
    incident_photons_at_camera: float
    photons_on_sample: float
    energy_per_area_j_per_m2: float | None
    exposure_per_frame_s: float | None
    total_exposure_s: float | None
    feasible: bool
    infeasible_reason: str | None
    achievable_relative_error: float | None
    warnings: list[str] = field(default_factory=list)
    saturation_capacity_e: float | None = None
    saturation_note: str = "unknown"

    @property
    def frames_total(self) -> int:
        return self.passes * self.mask_count

    def raise_if_infeasible(self) -> None:
        """Raise PlanInfeasible (message with the numbers) when the dose limit forbids the target."""
        if not self.feasible:
            raise PlanInfeasible(self)

    def summary_rows(self) -> list[tuple[str, str, str]]:
        """(quantity, value, unit) rows for a printed table."""

        def g(v, d=4):
            return "n/a" if v is None else f"{v:.{d}g}"

        return [
            ("method", self.method_note, ""),
            ("target relative error", g(self.target_relative_error), "1"),
            ("target phase precision", g(self.target_phase_precision_rad), "rad"),
            ("detected photons, total", g(self.photons_total), "photons"),
            ("passes (frame sets averaged)", str(self.passes), "1"),
            ("frames", str(self.frames_total), "1"),
            ("detected photons per frame", g(self.photons_per_frame), "photons"),
            ("detected photons per pixel, mean / peak",
             f"{g(self.photons_per_pixel_mean)} / {g(self.photons_per_pixel_peak)}", "photons"),
            ("saturation capacity", f"{g(self.saturation_capacity_e)} ({self.saturation_note})", "e-"),
            ("incident photons at the camera", g(self.incident_photons_at_camera), "photons"),
            ("photons on the sample", g(self.photons_on_sample), "photons"),
            ("energy per area on the sample",
             g(self.energy_per_area_j_per_m2) if self.energy_per_area_j_per_m2 is not None
             else "n/a (no illuminated_area_m2: photons only)", "J/m^2"),
            ("fluence on the sample", g(None if self.energy_per_area_j_per_m2 is None
                                        else self.energy_per_area_j_per_m2 * 1e-4), "J/cm^2"),
            ("exposure per frame", g(self.exposure_per_frame_s), "s"),
            ("total exposure", g(self.total_exposure_s), "s"),
            ("feasible under the dose limit", "yes" if self.feasible else "NO", ""),
        ]
