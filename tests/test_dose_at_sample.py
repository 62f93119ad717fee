"""Dose counted where the sample is: the optics and (after the sample) the masks between sample and
camera are divided out, no area is made up, fluence is given in J/cm^2 beside SI.

Outside checks: hand computations with the exact SI constants h = 6.62607015e-34 J s,
c = 299 792 458 m/s, e = 1.602176634e-19 C (SI Brochure, 9th edition, 2019, table 1; the CODATA
2018 values are the same exact numbers); 1 J/cm^2 = 1e4 J/m^2 (SI prefixes).
"""

from __future__ import annotations

import numpy as np
import pytest

from maskrun.daemon.calibrate.budget import plan_photons
from maskrun.daemon.config import ConfigError, parse_config
from maskrun.daemon.safety.dose import DoseLedger, mask_mean_transmission
from maskrun.daemon.record.runfile import RunFile
from maskrun.daemon.acquire.sequencer import State
from maskrun.reconstruct.masks import binary_amplitude_masks, octanary_masks

from test_faults import bench_text, run_bench


def test_demo_case_by_hand():
    # HeNe 632.8 nm (the demo bench), camera counts 8 frames of 1e9 incident photons (after QE),
    # optics 0.8 between sample and camera, amplitude masks of mean transmission 0.5 after the sample,
    # 1 mm^2 beam. By hand: photons on the sample = 8e9 / (0.8 * 0.5) = 2e10;
    # E = h c / lambda = 1.9864458571e-25 J m / 632.8e-9 m = 3.1391369e-19 J;
    # energy = 2e10 * 3.1391369e-19 = 6.2782739e-9 J; per area 6.2782739e-3 J/m^2 = 6.2782739e-7 J/cm^2.
    ledger = DoseLedger(wavelength_m=632.8e-9, illuminated_area_m2=1e-6, optical_transmission=0.8,
                        modulator_position="after_sample", mask_transmission=0.5)
    for _ in range(8):
        ledger.add(1e9)
    assert ledger.run.photons == pytest.approx(2e10, rel=1e-12)
    assert ledger.run.energy_j == pytest.approx(6.2782739e-9, rel=1e-7)
    assert ledger.run.energy_per_area_j_per_m2 == pytest.approx(6.2782739e-3, rel=1e-7)
    assert ledger.run.fluence_j_per_cm2 == pytest.approx(6.2782739e-7, rel=1e-7)
    assert "J/cm^2" in ledger.run.describe() and "J/m^2" in ledger.run.describe()
    # the same masks before the sample: the sample sees what the camera sees, over the optics only
    before = DoseLedger(wavelength_m=632.8e-9, illuminated_area_m2=1e-6, optical_transmission=0.8,
                        modulator_position="before_sample", mask_transmission=0.5)
    before.add(8e9)
    assert before.run.photons == pytest.approx(1e10, rel=1e-12)


def test_xray_case_by_hand():
    # 8 keV: E = 8000 eV * 1.602176634e-19 J/eV = 1.2817413072e-15 J exactly; lambda = h c / E = 1.5498025e-10 m.
    # 1e6 photons on a 100 um x 100 um spot (1e-8 m^2): 1.2817413072e-9 J, 0.12817413 J/m^2, 1.2817413e-5 J/cm^2.
    wavelength = 1.5498024804e-10
    ledger = DoseLedger(wavelength_m=wavelength, illuminated_area_m2=1e-8, modulator_position="before_sample")
    ledger.add(1e6)
    assert ledger.photon_energy_j == pytest.approx(1.2817413072e-15, rel=1e-9)
    assert ledger.run.energy_j == pytest.approx(1.2817413072e-9, rel=1e-9)
    assert ledger.run.energy_per_area_j_per_m2 == pytest.approx(0.12817413072, rel=1e-9)
    assert ledger.run.fluence_j_per_cm2 == pytest.approx(1.2817413072e-5, rel=1e-9)


def test_without_an_area_photons_only():
    # issue 16: with only max_dose_photons the ledger took the area as 1 m^2 and showed joules as J/m^2
    ledger = DoseLedger(wavelength_m=632.8e-9, max_photons=1e12)
    ledger.add(1e9)
    assert ledger.run.energy_per_area_j_per_m2 is None and ledger.run.fluence_j_per_cm2 is None
    assert ledger.run.energy_j == pytest.approx(1e9 * 3.1391369e-19, rel=1e-7)  # hand value as above
    assert "no energy per area" in ledger.run.describe()
    with pytest.raises(ValueError, match="needs illuminated_area_m2"):
        DoseLedger(wavelength_m=632.8e-9, max_energy_per_area_j_per_m2=1.0)


def test_mask_mean_transmission():
    # binary amplitude masks, half the pixels on (plus pixels switched on where no mask had them): about 0.5;
    # octanary masks have E|d|^2 = 1 (Candès, Li, Soltanolkotabi 2015), capped at 1 for a passive modulator
    binary = binary_amplitude_masks(8, (64, 64), seed=1)
    assert mask_mean_transmission(binary) == pytest.approx(0.5, abs=0.02)
    assert mask_mean_transmission(octanary_masks(8, (64, 64), seed=1)) <= 1.0


def test_config_keys_for_the_dose_at_the_sample():
    text = bench_text().replace('modulator_position = "after_sample"', "modulator_position = 'between'", 1)
    with pytest.raises(ConfigError, match="checks.modulator_position"):
        parse_config(text, "bench.toml")
    text = bench_text().replace("transmission_sample_to_camera = 1.0", "transmission_sample_to_camera = 1.5", 1)
    with pytest.raises(ConfigError, match="checks.transmission_sample_to_camera"):
        parse_config(text, "bench.toml")


def _binary(text: str, checks: str) -> str:
    text = text.replace('family = "octanary"', 'family = "binary_amplitude"', 1)
    return text.replace("[checks]", "[checks]\n" + checks, 1)


def test_a_run_counts_the_masks_after_the_sample(tmp_path):
    # issue 16: binary-amplitude masks between sample and camera halve what the camera sees; the
    # ledger counted camera photons as sample photons, undercounting the sample's dose by ~2x.
    probe, _ = run_bench(tmp_path / "probe", _binary(bench_text(passes=1), ""))
    per_frame = probe.photons_per_frame_mean
    limit = 5.5 * per_frame  # photons on the sample
    after, _ = run_bench(tmp_path / "after", _binary(bench_text(), f"max_dose_photons = {limit:.6g}"))
    assert after.state == State.stopped and "dose limit" in after.message
    with RunFile(after.output_path) as rf:
        camera = rf.frame_info()["photons"]
        masks = np.asarray(rf.masks())
    t_mask = float(np.mean(np.abs(masks) ** 2))  # mean |m|^2 of the masks the run showed
    assert 0.45 < t_mask < 0.56
    assert camera.sum() / t_mask <= limit  # the sample's photons stayed under the limit
    assert len(camera) == 2  # 2 frames of ~1.9 x per_frame on the sample; 5 with the old count
    assert "J/m^2" not in after.message and "no energy per area" in after.message
    before, _ = run_bench(tmp_path / "before", _binary(
        bench_text().replace('modulator_position = "after_sample"', 'modulator_position = "before_sample"'),
        f"max_dose_photons = {limit:.6g}"))
    with RunFile(before.output_path) as rf:
        assert rf.frame_count == 5


def test_plan_shows_fluence_in_j_per_cm2():
    plan = plan_photons((16, 16), 8, target_relative_error=0.05, wavelength_m=632.8e-9, illuminated_area_m2=1e-6,
                        quantum_efficiency=0.5)
    rows = {r[0]: r for r in plan.summary_rows()}
    assert rows["fluence on the sample"][2] == "J/cm^2"
    assert float(rows["fluence on the sample"][1]) == pytest.approx(plan.energy_per_area_j_per_m2 * 1e-4, rel=1e-3)
    no_area = plan_photons((16, 16), 8, target_relative_error=0.05, wavelength_m=632.8e-9)
    assert "photons only" in {r[0]: r for r in no_area.summary_rows()}["energy per area on the sample"][1]
