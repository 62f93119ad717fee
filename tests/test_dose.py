"""Dose accounting: photon energy from exact SI constants, DN -> photons, the dose ledger."""

from __future__ import annotations

import math
from fractions import Fraction

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from maskrun.daemon.calibrate.camera_profile import CameraProfile
from maskrun.daemon.safety.dose import (
    ELEMENTARY_CHARGE_C,
    PLANCK_J_S,
    SPEED_OF_LIGHT_M_PER_S,
    DoseLedger,
    DoseLimitExceeded,
    dn_to_photons,
    frame_photons,
    photon_energy_ev,
    photon_energy_j,
    photon_rate_per_s,
)
from maskrun.simulators.camera_model import CameraNoiseModel

# Exact defining constants, SI Brochure, 9th edition (BIPM, 2019), table 1, written out as
# exact decimal fractions so the expected values below are computed independently of the module.
H_EXACT = Fraction("6.62607015e-34")  # J s
C_EXACT = Fraction(299792458)  # m/s
E_EXACT = Fraction("1.602176634e-19")  # C


def test_constants_are_the_exact_si_values():
    # SI Brochure 9th ed. (2019), table 1.
    assert Fraction(PLANCK_J_S) == pytest.approx(H_EXACT, rel=1e-16)
    assert SPEED_OF_LIGHT_M_PER_S == 299792458
    assert Fraction(ELEMENTARY_CHARGE_C) == pytest.approx(E_EXACT, rel=1e-16)


@pytest.mark.parametrize(
    "wavelength, expected_j, expected_ev",
    [
        # E = h c / lambda with exact h, c (SI Brochure 2019): exact rational arithmetic gives
        # 3.139136942e-19 J = 1.959295171 eV at the helium-neon line 632.8 nm ...
        ("632.8e-9", H_EXACT * C_EXACT / Fraction("632.8e-9"), H_EXACT * C_EXACT / Fraction("632.8e-9") / E_EXACT),
        # ... and 1.866960392e-19 J = 1.165265023 eV at the Nd:YAG line 1064 nm.
        ("1064e-9", H_EXACT * C_EXACT / Fraction("1064e-9"), H_EXACT * C_EXACT / Fraction("1064e-9") / E_EXACT),
    ],
)
def test_photon_energy(wavelength, expected_j, expected_ev):
    assert photon_energy_j(float(wavelength)) == pytest.approx(float(expected_j), rel=1e-14)
    assert photon_energy_ev(float(wavelength)) == pytest.approx(float(expected_ev), rel=1e-14)


def test_photon_energy_against_the_hc_rule_of_thumb():
    # hc = 1239.841984 eV nm (CODATA 2018 derived value, from memory): E[eV] = 1239.841984 / lambda[nm].
    assert photon_energy_ev(632.8e-9) == pytest.approx(1239.841984 / 632.8, rel=1e-9)
    assert photon_energy_ev(1064e-9) == pytest.approx(1239.841984 / 1064, rel=1e-9)
    # A 1 mW helium-neon beam carries about 3.2e15 photons per second (common practice, no source).
    assert photon_rate_per_s(1e-3, 632.8e-9) == pytest.approx(3.19e15, rel=0.01)


@pytest.mark.parametrize("bad", [0.0, -1e-9, float("nan"), float("inf")])
def test_bad_wavelength(bad):
    with pytest.raises(ValueError, match="wavelength_m"):
        photon_energy_j(bad)


def profile(**kw):
    values = dict(gain_dn_per_e=0.25, offset_dn=100.0, dark_noise_e=3.0, saturation_capacity_e=15000.0,
                  quantum_efficiency=0.6, linearity_error_pct=0.1, bit_depth=12, frame_shape=(64, 64),
                  camera_driver="simulated")
    values.update(kw)
    return CameraProfile(**values)


def test_dn_to_photons_formula():
    # (sum DN - n * offset) / K / eta
    assert dn_to_photons(100 * 100.0 + 1500.0, profile(), n_pixels=100) == pytest.approx(1500.0 / 0.25 / 0.6)
    # keyword overrides (QE at another wavelength) and dark-subtracted sums
    assert dn_to_photons(1500.0, profile(), n_pixels=100, offset_dn=0.0, quantum_efficiency=0.3) == \
        pytest.approx(1500.0 / 0.25 / 0.3)
    assert dn_to_photons(50.0, n_pixels=1, gain_dn_per_e=0.5, offset_dn=100.0, quantum_efficiency=1.0) == 0.0
    with pytest.raises(ValueError, match="quantum efficiency is unknown"):
        dn_to_photons(1.0, profile(quantum_efficiency=None), n_pixels=1)
    with pytest.raises(ValueError, match="gain_dn_per_e"):
        dn_to_photons(1.0, n_pixels=1)


def test_frame_photons_recovers_the_simulated_photons():
    model = CameraNoiseModel()
    rng = np.random.default_rng(5)
    photons = rng.uniform(0, 10000, size=(128, 128))
    frame = model.render(photons, 0.001, rng)
    estimate = frame_photons(frame, profile())
    # Shot + read noise on 16384 pixels averages out; dark current over 1 ms is negligible.
    assert estimate == pytest.approx(photons.sum(), rel=0.002)
    dark = model.render(np.zeros_like(photons), 0.001, rng)
    assert frame_photons(frame, profile(), dark_dn=dark) == pytest.approx(photons.sum(), rel=0.002)


def test_ledger_accumulates_per_position_and_run():
    ledger = DoseLedger(illuminated_area_m2=1e-6, wavelength_m=632.8e-9, optical_transmission=0.5)
    e = float(H_EXACT * C_EXACT / Fraction("632.8e-9"))
    ledger.add(1e9, position="A")
    ledger.add(1e9, position="A")
    ledger.add(3e9, position="B")
    # photons on the sample = camera photons / transmission
    assert ledger.positions["A"].photons == pytest.approx(4e9)
    assert ledger.positions["B"].photons == pytest.approx(6e9)
    assert ledger.run.photons == pytest.approx(10e9)
    assert ledger.run.frames == 3
    assert ledger.positions["A"].energy_per_area_j_per_m2 == pytest.approx(4e9 * e / 1e-6)
    summary = ledger.as_dict()
    assert summary["positions"]["B"]["frames"] == 1
    assert summary["run"]["energy_per_area_j_per_m2"] == pytest.approx(10e9 * e / 1e-6)


def test_energy_limit_stops_with_the_numbers():
    e = photon_energy_j(632.8e-9)
    area = 1e-6
    limit = 1e-3  # J/m^2 -> 1e-9 J over the area -> about 3.19e9 photons
    ledger = DoseLedger(illuminated_area_m2=area, wavelength_m=632.8e-9, max_energy_per_area_j_per_m2=limit)
    allowed = limit * area / e
    assert ledger.remaining_photons("P1") == pytest.approx(allowed)
    per_frame = allowed / 3.5
    for _ in range(3):
        ledger.add(per_frame, position="P1")
    assert ledger.would_exceed(per_frame, "P1")
    assert not ledger.would_exceed(per_frame, "P2")  # a fresh position has its own budget
    with pytest.raises(DoseLimitExceeded) as info:
        ledger.add(per_frame, position="P1")
    err = info.value
    assert err.position == "P1" and err.unit == "J/m^2"
    assert err.value == pytest.approx(4 / 3.5 * limit)
    assert "0.001143 J/m^2 exceeds the limit 0.001 J/m^2" in str(err)
    assert "Lower the exposure or the laser power" in str(err)
    assert ledger.positions["P1"].frames == 4  # the delivered dose is recorded


def test_photon_limit_over_the_whole_run():
    ledger = DoseLedger(illuminated_area_m2=1e-6, wavelength_m=1064e-9, max_photons=1e10, limit_scope="run")
    ledger.add(6e9, position="A")
    with pytest.raises(DoseLimitExceeded, match=r"'\(whole run\)': cumulative photons 1.2e\+10 photons exceeds"):
        ledger.add(6e9, position="B")
    assert ledger.remaining_photons("C") == 0.0


def test_bad_ledger_input():
    with pytest.raises(ValueError, match="illuminated_area_m2"):
        DoseLedger(illuminated_area_m2=0.0, wavelength_m=632.8e-9)
    with pytest.raises(ValueError, match="optical_transmission"):
        DoseLedger(illuminated_area_m2=1e-6, wavelength_m=632.8e-9, optical_transmission=1.5)
    with pytest.raises(ValueError, match="max_photons"):
        DoseLedger(illuminated_area_m2=1e-6, wavelength_m=632.8e-9, max_photons=-1)
    ledger = DoseLedger(illuminated_area_m2=1e-6, wavelength_m=632.8e-9)
    with pytest.raises(ValueError, match="frame_photons"):
        ledger.add(float("nan"))


@settings(max_examples=30, deadline=None)
@given(frames=st.lists(st.floats(0, 1e12), min_size=1, max_size=20), wavelength=st.floats(200e-9, 2e-6))
def test_ledger_energy_is_photons_times_photon_energy(frames, wavelength):
    ledger = DoseLedger(illuminated_area_m2=2e-6, wavelength_m=wavelength)
    for f in frames:
        ledger.add(f)
    assert ledger.run.photons == pytest.approx(math.fsum(frames), rel=1e-9)
    assert ledger.run.energy_per_area_j_per_m2 == pytest.approx(
        math.fsum(frames) * float(H_EXACT * C_EXACT) / wavelength / 2e-6, rel=1e-9)
