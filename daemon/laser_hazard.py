"""Laser class from wavelength and power, and the check of the class a config declares.

The limits are the continuous-wave accessible emission limits (AEL) of
IEC 60825-1:2014 for long exposures, for a point source (C6 = 1) and with the
whole beam entering the measurement aperture: the worst case when nothing is
known about the beam diameter or divergence. All values are **from memory** of
the standard's class tables and must not be taken as a classification: the
laser safety officer classifies, this module only refuses a config that
declares a class *below* the one these limits give. Where the memory is unsure
the lower (stricter) limit is used, so a beam is classified upwards, never down:

* class 1: 180-302.5 nm 7.9e-10 W (30 J/m^2 through a 1 mm aperture over the
  3e4 s UV time base); 302.5-315 nm unsure, the 180-302.5 nm value is used;
  315-400 nm 7.9e-6 W; 400-450 nm 3.9e-5 W and 450-500 nm 3.9e-5 C3 W with
  C3 = 10^(0.02 (lambda/nm - 450)) (photochemical limit over the 100 s time
  base), capped at the thermal 3.9e-4 W that holds from 500 to 700 nm;
  700-1050 nm 3.9e-4 C4 W with C4 = 10^(0.002 (lambda/nm - 700)); 1050-1400 nm
  3.9e-4 x 5 W (C7 taken as 1, its lowest value); 1400 nm - 1 mm 1e-2 W.
* class 2 (400-700 nm only): 1e-3 W.
* class 3R: 5 x the class 2 limit in 400-700 nm (5e-3 W), 5 x the class 1 limit elsewhere.
* class 3B: 0.5 W from 315 nm to 1 mm; 1.5e-3 W below 315 nm.
* above the class 3B limit: class 4.

1M and 2M depend on the beam's diameter and divergence (the M classes are the
beams that pass class 1 or 2 only because the eye's aperture catches part of
them). The config carries no beam geometry, so the whole beam is assumed to
reach the eye and a declared 1M/2M is accepted only where class 1/2 would be.
Pulsed sources are not modelled: the limits are the CW ones for the average
power, which a pulsed beam's classification can only raise.

Below 180 nm (vacuum ultraviolet, EUV, X-rays) the standard does not apply
(its scope is 180 nm to 1 mm, from memory): such a source gets a
radiation-protection notice instead of a laser class; photons above about 10 eV
(below about 124 nm) ionise (common practice, no source).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

__all__ = [
    "CLASS_ORDER",
    "LASER_STANDARD_MIN_WAVELENGTH_M",
    "LASER_STANDARD_MAX_WAVELENGTH_M",
    "IONISING_BELOW_WAVELENGTH_M",
    "ClassLimits",
    "class_limits",
    "lowest_class",
    "declaration_problem",
    "is_laser_standard_wavelength",
    "is_ionising",
]

#: Classes from the least to the most hazardous (IEC 60825-1:2014, clause 4).
CLASS_ORDER = ("1", "1M", "2", "2M", "3R", "3B", "4")
#: IEC 60825-1 covers 180 nm to 1 mm (from memory).
LASER_STANDARD_MIN_WAVELENGTH_M = 180e-9
LASER_STANDARD_MAX_WAVELENGTH_M = 1e-3
#: Photon energies above about 10 eV ionise (common practice, no source): lambda = hc / 10 eV ~ 124 nm.
IONISING_BELOW_WAVELENGTH_M = 124e-9

_VISIBLE_NM = (400.0, 700.0)


@dataclass(frozen=True)
class ClassLimits:
    """CW accessible emission limits [W] at one wavelength (None where the class does not exist)."""

    wavelength_m: float
    class1_w: float
    class2_w: float | None
    class3r_w: float
    class3b_w: float
    band: str  # which band's limits these are, for messages


def is_laser_standard_wavelength(wavelength_m: float) -> bool:
    return LASER_STANDARD_MIN_WAVELENGTH_M <= float(wavelength_m) <= LASER_STANDARD_MAX_WAVELENGTH_M


def is_ionising(wavelength_m: float) -> bool:
    return float(wavelength_m) < IONISING_BELOW_WAVELENGTH_M


def _class1_w(nm: float) -> tuple[float, str]:
    if nm < 315.0:  # 180-302.5 nm; 302.5-315 nm unsure: the lower 180-302.5 nm value (classify upwards)
        return 7.9e-10, "180-315 nm"
    if nm < 400.0:
        return 7.9e-6, "315-400 nm"
    if nm < 450.0:
        return 3.9e-5, "400-450 nm"
    if nm < 500.0:
        return min(3.9e-5 * 10 ** (0.02 * (nm - 450.0)), 3.9e-4), "450-500 nm"
    if nm <= 700.0:
        return 3.9e-4, "500-700 nm"
    if nm < 1050.0:
        return 3.9e-4 * 10 ** (0.002 * (nm - 700.0)), "700-1050 nm"
    if nm < 1400.0:
        return 3.9e-4 * 5.0, "1050-1400 nm"
    return 1e-2, "1400 nm - 1 mm"


def class_limits(wavelength_m: float) -> ClassLimits:
    """The CW limits at ``wavelength_m`` (180 nm to 1 mm; ValueError outside)."""
    wl = float(wavelength_m)
    if not (math.isfinite(wl) and is_laser_standard_wavelength(wl)):
        raise ValueError(f"{wl * 1e9:.4g} nm is outside IEC 60825-1 (180 nm to 1 mm): no laser class applies")
    nm = wl * 1e9
    c1, band = _class1_w(nm)
    visible = _VISIBLE_NM[0] <= nm <= _VISIBLE_NM[1]
    c2 = 1e-3 if visible else None
    c3r = 5.0 * (c2 if visible else c1)
    c3b = 1.5e-3 if nm < 315.0 else 0.5
    return ClassLimits(wl, c1, c2, c3r, c3b, band)


def lowest_class(wavelength_m: float, power_w: float) -> str:
    """The lowest class a CW beam of ``power_w`` can be in at ``wavelength_m`` (whole beam in the aperture)."""
    p = float(power_w)
    if not (math.isfinite(p) and p >= 0):
        raise ValueError(f"power must be a finite number >= 0 W, got {power_w}")
    lim = class_limits(wavelength_m)
    if p <= lim.class1_w:
        return "1"
    if lim.class2_w is not None and p <= lim.class2_w:
        return "2"
    if p <= lim.class3r_w:
        return "3R"
    if p <= lim.class3b_w:
        return "3B"
    return "4"


def _fmt_w(w: float) -> str:
    for unit, scale in (("W", 1.0), ("mW", 1e-3), ("uW", 1e-6), ("nW", 1e-9)):
        if w >= scale:
            return f"{w / scale:.3g} {unit}"
    return f"{w:.3g} W"


def declaration_problem(declared: str | None, wavelength_m: float, power_w: float) -> str | None:
    """One line saying why the declared class cannot be right, or None when it can.

    Refused: no class for a source inside IEC 60825-1; a class for one outside it (ionising,
    EUV, VUV); class 2/2M outside 400-700 nm; a class below the lowest the beam can be in.
    """
    wl = float(wavelength_m)
    nm = wl * 1e9
    if not is_laser_standard_wavelength(wl):
        if declared is not None:
            kind = "ionising radiation" if is_ionising(wl) else "outside the laser standard"
            return (f"laser_class = {declared!r} was declared but {nm:.4g} nm is {kind} (IEC 60825-1 covers 180 nm "
                    "to 1 mm): remove laser_class; the site's radiation-protection rules apply to this source")
        return None
    if declared is None:
        return (f"laser_class is missing: a {nm:.4g} nm source needs its IEC 60825-1 class (ask the laser safety "
                f"officer; at {_fmt_w(power_w)} the beam is at least class {lowest_class(wl, power_w)})")
    if declared in ("2", "2M") and not (_VISIBLE_NM[0] <= nm <= _VISIBLE_NM[1]):
        return (f"class {declared} exists only from 400 to 700 nm (IEC 60825-1:2014), the source is at {nm:.4g} nm: "
                f"declare its real class (at {_fmt_w(power_w)} at least class {lowest_class(wl, power_w)})")
    computed = lowest_class(wl, power_w)
    if CLASS_ORDER.index(declared) < CLASS_ORDER.index(computed):
        return (f"declared class {declared} is below class {computed}, the lowest a {nm:.4g} nm beam of "
                f"{_fmt_w(power_w)} can be in (IEC 60825-1:2014 CW limits, whole beam in the aperture): declare "
                f"class {computed} or higher, as the laser safety officer classifies it")
    return None
