"""The laser-safety notice and its acknowledgement.

The notice is shown before every run. It reminds, it does not replace: local
laser-safety rules and the site's laser safety officer take precedence. The
classes and the controls they call for follow IEC 60825-1:2014 and
ANSI Z136.1-2022 in outline (Class 3B and 4: controlled area, interlocks,
eyewear of the right optical density; see ../shared/REFERENCES.md).
"""

from __future__ import annotations

import getpass
import hashlib
import socket
import sys
import time
from dataclasses import asdict, dataclass

from rich.console import Console
from rich.panel import Panel
from rich.table import Table
from rich.text import Text

from maskrun.daemon.config import LaserConfig
from maskrun.daemon.safety.dose import photon_energy_ev
from maskrun.daemon.laser_hazard import is_ionising, is_laser_standard_wavelength, lowest_class

UNATTENDED_OPTION = "--acknowledge-safety"

_CLASS_NOTES = {
    "1": "safe under reasonably foreseeable use; enclosed beams may be higher class when opened.",
    "1M": "hazardous when viewed with optical instruments (loupes, telescopes, microscope eyepieces).",
    "2": "visible beam; the blink reflex is not protection to rely on. Do not stare into the beam.",
    "2M": "visible beam; hazardous with optical instruments.",
    "3R": "direct intrabeam viewing is potentially hazardous. Avoid eye exposure; keep beams below eye level.",
    "3B": "direct viewing and specular reflections are hazardous; skin exposure near the top of the class can harm. "
    "Controlled area, interlocks and eyewear required.",
    "4": "direct, specular AND diffuse reflections are hazardous; skin and fire hazard. "
    "Controlled area, interlocks, eyewear and beam enclosures required.",
}


_REFLECTIONS = {
    "3B": "specular reflections are hazardous like the direct beam; diffuse reflections can be hazardous close "
    "to the diffuser and near the top of class 3B. Use matt beam stops; keep eyes away from where the beam lands.",
    "4": "diffuse reflections are hazardous too (not only direct and specular ones): enclose the beam path, "
    "use beam stops rated for the power, and keep eyes and skin out of the beam's and its reflections' reach.",
}
_SKIN_AND_FIRE = ("the beam and its reflections burn skin and can ignite paper, cloth, plastics and solvents: "
                  "non-flammable beam stops, no flammable material near the beam path, fire extinguisher at hand.")


def is_radiation_source(laser: LaserConfig) -> bool:
    """True for sources outside IEC 60825-1 (below 180 nm: VUV, EUV, X-ray): radiation protection applies."""
    return not is_laser_standard_wavelength(laser.wavelength_m)


def class_label(laser: LaserConfig) -> str:
    """The declared laser class, or what stands in for it on a source outside IEC 60825-1."""
    if is_radiation_source(laser):
        return "none (outside IEC 60825-1: radiation protection)"
    return str(laser.laser_class)


def _energy_text(wavelength_m: float) -> str:
    ev = photon_energy_ev(wavelength_m)
    return f"{ev / 1e3:.3g} keV" if ev >= 1e3 else f"{ev:.3g} eV"


def _radiation_items(laser: LaserConfig) -> list[tuple[str, str]]:
    wl_nm = laser.wavelength_m * 1e9
    kind = "IONISING RADIATION" if is_ionising(laser.wavelength_m) else "vacuum-ultraviolet radiation"
    return [
        ("Source", laser.description),
        ("Radiation", f"{kind}: wavelength {wl_nm:.4g} nm, photon energy {_energy_text(laser.wavelength_m)}, "
                      f"power {laser.power_w:.3g} W. Outside IEC 60825-1 (180 nm to 1 mm): no laser class applies."),
        ("Hazard", "dose to people from the direct beam AND from scattered radiation; invisible. Shielding, "
                   "interlocks, warning lights, dosimetry and area monitoring as the site's radiation-protection "
                   "rules and licence require."),
        ("Enclosure", "the beam stays inside its shielded enclosure; nobody inside it while the shutter can open."),
        ("Interlock", "the enclosure interlock must read CLOSED before the shutter opens; this program checks it and "
                      "closes the shutter on any fault."),
        ("Unattended", "warning signs and lights as the site requires; the area controlled as its rules say."),
        ("Rules", f"the site's radiation-protection rules and {laser.radiation_protection_officer} take precedence over "
                  f"this program; for any laser on the bench, {laser.safety_officer} and the local laser-safety rules."),
    ]


def notice_items(laser: LaserConfig) -> list[tuple[str, str]]:
    """The notice as (label, text) pairs: a laser notice, or a radiation-protection notice below 180 nm."""
    if is_radiation_source(laser):
        return _radiation_items(laser)
    wl_nm = laser.wavelength_m * 1e9
    visible = 400 <= wl_nm <= 700
    declared = str(laser.laser_class)
    computed = lowest_class(laser.wavelength_m, laser.power_w)
    items = [
        ("Source", laser.description),
        (
            "Laser",
            f"class {declared} (IEC 60825-1), wavelength {wl_nm:.1f} nm "
            f"({'visible' if visible else 'INVISIBLE: no visible warning of the beam'}), power {laser.power_w:.3g} W; "
            f"from wavelength and power at least class {computed} (continuous-wave limits, from memory)",
        ),
        ("Hazard", f"class {declared}: {_CLASS_NOTES[declared]}"),
    ]
    if declared in _REFLECTIONS:
        items.append(("Reflections", _REFLECTIONS[declared]))
    if declared == "4":
        items.append(("Skin, fire", _SKIN_AND_FIRE))
    items += [
        ("Eyewear", f"{laser.eyewear}."),
        ("Enclosure", "beam paths enclosed or terminated; no reflective jewellery or tools in the beam."),
        (
            "Interlock",
            "the door/enclosure interlock must read CLOSED before the shutter opens; "
            "this program checks it and closes the shutter on any fault.",
        ),
        ("Unattended", "warning signs posted and the area controlled as the site requires."),
        ("Rules", f"local laser-safety rules and {laser.safety_officer} take precedence over this program."),
    ]
    return items


def notice_lines(laser: LaserConfig) -> list[str]:
    """The notice as plain lines (stored in the run file with the acknowledgement)."""
    return [f"{label}: {text}" for label, text in notice_items(laser)]


def render_notice(laser: LaserConfig, console: Console) -> None:
    table = Table.grid(padding=(0, 2))
    table.add_column(style="bold", no_wrap=True)
    table.add_column()
    for label, text in notice_items(laser):
        table.add_row(label, text)
    console.print(
        Panel(
            table,
            title=Text(" RADIATION SAFETY NOTICE " if is_radiation_source(laser) else " LASER SAFETY NOTICE ",
                       style="bold black on yellow"),
            subtitle="read before every run",
            border_style="yellow",
            padding=(1, 2),
        )
    )


@dataclass
class Acknowledgement:
    who: str
    when_utc: str
    how: str  # "interactive prompt" or the unattended option
    host: str
    laser_class: str
    wavelength_m: float
    power_w: float
    notice_sha256: str
    notice: list[str]

    def to_dict(self) -> dict:
        return asdict(self)


class SafetyNotAcknowledged(RuntimeError):
    """The run may not start before the laser-safety notice is acknowledged."""


def make_acknowledgement(laser: LaserConfig, *, who: str, how: str) -> Acknowledgement:
    lines = notice_lines(laser)
    return Acknowledgement(
        who=who or _whoami(),
        when_utc=time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
        how=how,
        host=socket.gethostname(),
        laser_class=class_label(laser),
        wavelength_m=laser.wavelength_m,
        power_w=laser.power_w,
        notice_sha256=hashlib.sha256("\n".join(lines).encode()).hexdigest(),
        notice=lines,
    )


def _whoami() -> str:
    try:
        return getpass.getuser()
    except Exception:
        return "unknown"


def acknowledge(laser: LaserConfig, console: Console, *, unattended: bool, operator: str = "", stdin=None) -> Acknowledgement:
    """Show the notice and obtain the acknowledgement.

    unattended=True records that the operator acknowledged on the command line
    (the option UNATTENDED_OPTION). Otherwise the operator must type 'yes' at the
    prompt; without a terminal the run is refused with instructions.
    """
    render_notice(laser, console)
    if unattended:
        console.print(f"[bold]Acknowledged[/] with {UNATTENDED_OPTION} by {operator or _whoami()}.")
        return make_acknowledgement(laser, who=operator, how=f"command-line option {UNATTENDED_OPTION}")
    stdin = stdin or sys.stdin
    if not stdin.isatty():
        raise SafetyNotAcknowledged(
            "the laser-safety notice needs an acknowledgement and there is no terminal to ask at; "
            f"read the notice above and run again with {UNATTENDED_OPTION} to acknowledge it"
        )
    console.print("Type [bold]yes[/] to confirm you have read the notice and the area is safe to run: ", end="")
    answer = stdin.readline().strip().lower()
    if answer != "yes":
        raise SafetyNotAcknowledged(f"the notice was not acknowledged (answer {answer!r}); nothing was started")
    return make_acknowledgement(laser, who=operator, how="interactive prompt")
