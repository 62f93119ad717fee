"""Laser class from wavelength and power, the refusal of an understated class, the class-specific
cautions, and the radiation-protection notice for sources outside IEC 60825-1.

Limits: IEC 60825-1:2014, "Safety of laser products - Part 1: Equipment classification and
requirements", the class tables for continuous-wave emission over long exposures (point source,
C6 = 1, whole beam in the aperture). Every value below is from memory of those tables (the
standard is not at hand) and the summary in ../shared/REFERENCES.md; where memory is unsure the
stricter value is used (classify upwards).
"""

import math

import pytest
from hypothesis import given, settings, strategies as st
from rich.console import Console

from maskrun.daemon.config import ConfigError, demo_config_text, parse_config
from maskrun.daemon.laser_hazard import CLASS_ORDER, class_limits, declaration_problem, lowest_class
from maskrun.daemon.safety.safety import make_acknowledgement, notice_lines, render_notice

# Hand values of the correction factors (formulas from memory of IEC 60825-1:2014, table 10):
# C4 = 10^(0.002 (lambda/nm - 700)) for 700-1050 nm, 5 from 1050 to 1400 nm.
C4_808 = 10 ** (0.002 * 108)  # 1.644
C1_808 = 3.9e-4 * C4_808  # class 1 at 808 nm: 0.641 mW
C1_1064 = 3.9e-4 * 5.0  # class 1 at 1064 nm: 1.95 mW

# (wavelength m, power W, lowest class, where the deciding limit comes from)
TABLE = [
    (632.8e-9, 0.2e-3, "1", "class 1 visible 0.39 mW (IEC 60825-1:2014 class 1 table, C6 = 1, from memory)"),
    (632.8e-9, 0.8e-3, "2", "class 2 is 1 mW, 400-700 nm only (IEC 60825-1:2014 class 2 table, from memory)"),
    (632.8e-9, 4e-3, "3R", "class 3R visible 5 mW = 5 x the class 2 limit (IEC 60825-1:2014, from memory)"),
    (532e-9, 0.5, "3B", "class 3B CW 0.5 W, the limit itself included (IEC 60825-1:2014 class 3B table, from memory)"),
    (532e-9, 0.6, "4", "above the class 3B 0.5 W: class 4 (IEC 60825-1:2014, from memory)"),
    (532e-9, 2.0, "4", "above the class 3B 0.5 W: class 4 (IEC 60825-1:2014, from memory)"),
    (1064e-9, 1.5e-3, "1", f"class 1 at 1064 nm 3.9e-4 x C4 (C4 = 5) = {C1_1064:.3g} W (IEC 60825-1:2014, from memory)"),
    (1064e-9, 5e-3, "3R", f"class 3R outside 400-700 nm = 5 x class 1 = {5 * C1_1064:.3g} W (IEC 60825-1:2014, from memory)"),
    (1064e-9, 50e-3, "3B", "class 3B CW 0.5 W (IEC 60825-1:2014, from memory)"),
    (808e-9, 1e-3, "3R", f"class 1 at 808 nm 3.9e-4 x C4 = {C1_808:.3g} W, 3R = 5 x that (IEC 60825-1:2014, from memory)"),
    (1550e-9, 8e-3, "1", "class 1 from 1400 nm to 1 mm 10 mW (IEC 60825-1:2014, from memory)"),
    (10.6e-6, 30e-3, "3R", "class 3R at 10.6 um 5 x 10 mW = 50 mW (IEC 60825-1:2014, from memory)"),
    (10.6e-6, 100.0, "4", "above the class 3B 0.5 W (IEC 60825-1:2014, from memory)"),
    (405e-9, 0.1e-3, "2", "class 1 at 400-450 nm photochemical 39 uW (C3 = 1), class 2 1 mW (IEC 60825-1:2014, from memory)"),
    (355e-9, 20e-6, "3R", "class 1 at 315-400 nm 7.9 uW, 3R = 5 x that = 39.5 uW (IEC 60825-1:2014, from memory)"),
    (266e-9, 1e-3, "3B", "class 3B below 315 nm 1.5 mW (IEC 60825-1:2014, from memory)"),
    (266e-9, 10e-3, "4", "above the class 3B 1.5 mW below 315 nm (IEC 60825-1:2014, from memory)"),
]


@pytest.mark.parametrize("wavelength_m, power_w, expected, source", TABLE, ids=[f"{w * 1e9:.0f}nm-{p:g}W" for w, p, *_ in TABLE])
def test_lowest_class_from_wavelength_and_power(wavelength_m, power_w, expected, source):
    assert lowest_class(wavelength_m, power_w) == expected, source


def test_the_table_has_at_least_ten_cases_with_sources():
    assert len(TABLE) >= 10 and all("IEC 60825-1" in row[3] for row in TABLE)


def test_class_2_exists_only_in_the_visible():
    # IEC 60825-1:2014: class 2 and 2M are defined for 400-700 nm only (from memory).
    assert class_limits(550e-9).class2_w == pytest.approx(1e-3)
    assert class_limits(1064e-9).class2_w is None and class_limits(350e-9).class2_w is None


@settings(max_examples=60, deadline=None)
@given(wl=st.floats(180e-9, 1e-3), p1=st.floats(1e-12, 1e3), p2=st.floats(1e-12, 1e3))
def test_more_power_never_lowers_the_class(wl, p1, p2):
    lo, hi = sorted((p1, p2))
    assert CLASS_ORDER.index(lowest_class(wl, lo)) <= CLASS_ORDER.index(lowest_class(wl, hi))
    computed = lowest_class(wl, hi)
    assert declaration_problem(computed, wl, hi) is None  # the computed class is always accepted


def _laser(**keys) -> str:
    text = demo_config_text()
    start, end = text.index("[laser]"), text.index("[grid]")
    body = "\n".join(f"{k} = {v!r}" if isinstance(v, str) else f"{k} = {v}" for k, v in keys.items())
    return text[:start] + "[laser]\n" + body + "\n\n" + text[end:]


@pytest.mark.parametrize("keys, names", [
    # findings of issue 16: each config was accepted before, with the declared class on the notice
    (dict(laser_class="1", wavelength_m=632.8e-9, power_w=0.004), ("class 1", "class 3R")),
    (dict(laser_class="3R", wavelength_m=532e-9, power_w=0.5), ("class 3R", "class 3B")),
    (dict(laser_class="3B", wavelength_m=532e-9, power_w=2.0), ("class 3B", "class 4")),
    (dict(laser_class="1M", wavelength_m=632.8e-9, power_w=0.003), ("class 1M", "class 3R")),
])
def test_a_class_below_the_beam_is_refused_naming_both(keys, names):
    with pytest.raises(ConfigError) as exc:
        parse_config(_laser(**keys), "bench.toml")
    msg = str(exc.value)
    assert len(msg.splitlines()) == 1 and msg.startswith("bench.toml: laser: ")
    assert all(n in msg for n in names), msg


def test_class_2_outside_the_visible_is_refused():
    with pytest.raises(ConfigError) as exc:
        parse_config(_laser(laser_class="2", wavelength_m=1064e-9, power_w=0.5e-3), "bench.toml")
    assert "only from 400 to 700 nm" in str(exc.value) and "1064 nm" in str(exc.value)
    with pytest.raises(ConfigError):
        parse_config(_laser(laser_class="2M", wavelength_m=355e-9, power_w=1e-6), "bench.toml")


def test_a_higher_class_than_needed_is_accepted():
    cfg = parse_config(_laser(laser_class="3B", wavelength_m=632.8e-9, power_w=0.2e-3))
    text = "\n".join(notice_lines(cfg.laser))
    assert "class 3B" in text and "at least class 1" in text


def _notice(cfg) -> str:
    return "\n".join(notice_lines(cfg.laser))


def test_class_4_notice_warns_of_skin_fire_and_diffuse_reflections():
    cfg = parse_config(_laser(laser_class="4", wavelength_m=532e-9, power_w=2.0))
    text = _notice(cfg).lower()
    assert "skin" in text and "ignite" in text and "fire" in text
    assert "diffuse reflections are hazardous" in text
    assert "laser safety officer" in text


def test_class_3b_notice_warns_of_diffuse_reflections():
    cfg = parse_config(_laser(laser_class="3B", wavelength_m=1064e-9, power_w=0.1))
    text = _notice(cfg).lower()
    assert "diffuse reflections" in text and "invisible" in text and "visible beam" not in text


def test_an_xray_source_gets_a_radiation_notice_not_a_laser_class():
    # 8 keV: lambda = h c / E = 6.62607015e-34 * 299792458 / (8000 * 1.602176634e-19) = 1.5498e-10 m
    # (exact SI constants, SI brochure 9th ed. 2019). X-rays are outside IEC 60825-1 (180 nm - 1 mm,
    # from memory) and ionising: radiation protection applies.
    wl = 6.62607015e-34 * 299792458 / (8000 * 1.602176634e-19)
    with pytest.raises(ConfigError) as exc:
        parse_config(_laser(laser_class="3R", wavelength_m=wl, power_w=1e-3), "xray.toml")
    assert "ionising" in str(exc.value) and "remove laser_class" in str(exc.value)
    cfg = parse_config(_laser(description="copper-anode X-ray tube", wavelength_m=wl, power_w=1e-3))
    text = _notice(cfg)
    assert "IONISING RADIATION" in text and "8 keV" in text
    assert "radiation protection officer" in text and "radiation-protection rules" in text
    assert "laser safety officer" in text  # still deferred to
    assert "class 3R" not in text and "IEC 60825-1 (180 nm to 1 mm)" in text
    ack = make_acknowledgement(cfg.laser, who="t", how="test")
    assert ack.laser_class.startswith("none")
    console = Console(record=True, width=120)
    render_notice(cfg.laser, console)
    assert "RADIATION SAFETY NOTICE" in console.export_text()


def test_euv_is_outside_the_laser_standard_too():
    # 13.5 nm: 91.8 eV by E = h c / lambda (SI brochure 2019 constants); ionising above ~10 eV (common practice, no source)
    cfg = parse_config(_laser(wavelength_m=13.5e-9, power_w=1e-3))
    text = _notice(cfg)
    assert "IONISING" in text and f"{6.62607015e-34 * 299792458 / 13.5e-9 / 1.602176634e-19:.3g} eV" in text


def test_a_laser_without_a_class_is_refused():
    with pytest.raises(ConfigError) as exc:
        parse_config(_laser(wavelength_m=632.8e-9, power_w=4e-3), "bench.toml")
    assert "laser_class is missing" in str(exc.value) and "class 3R" in str(exc.value)


@settings(max_examples=40, deadline=None)
@given(wl=st.floats(1e-11, 9.9e-4), p=st.floats(1e-9, 1e2))
def test_every_notice_defers_to_the_laser_safety_officer(wl, p):
    cls = None if wl < 180e-9 else lowest_class(wl, p)
    cfg = parse_config(_laser(**({} if cls is None else {"laser_class": cls}), wavelength_m=wl, power_w=p))
    text = _notice(cfg)
    assert "laser safety officer" in text and "take precedence" in text
    assert math.isfinite(cfg.laser.power_w)
