"""Simulated benches with a phase SLM (in-process simulated modulator) for the response and registration tests."""

from __future__ import annotations

from benchcfg import small_bench_text

SIMULATED_MODULATOR = '[modulator]\ndriver = "simulated"\n'


def slm_bench_text(*, family="random_phase", response: str | None = "grey_levels_per_2pi = 220\ncurvature = 0.3",
                   profile: str | None = None, sample="phase_target", modulator_offset_px=None, offset_px=None,
                   masks=6, passes=2, output_dir=None) -> str:
    text = small_bench_text(masks=masks, passes=passes)
    old = '[modulator]\ndriver = "serial-line"\n\n[modulator.settings]\nport = "sim:modulator"'
    assert old in text
    mod = SIMULATED_MODULATOR + (f'profile = "{profile}"\n' if profile else "")
    text = text.replace(old, mod + "\n[modulator.settings]", 1)
    text = text.replace('family = "octanary"', f'family = "{family}"', 1)
    if offset_px is not None:
        text = text.replace("[masks]\n", f"[masks]\noffset_px = [{offset_px[0]}, {offset_px[1]}]\n", 1)
    sim = f'[simulation]\nsample = "{sample}"\n'
    if modulator_offset_px is not None:
        sim += f"modulator_offset_px = [{modulator_offset_px[0]}, {modulator_offset_px[1]}]\n"
    text = text.replace('[simulation]\nsample = "phase_target"\n', sim, 1)
    if output_dir is not None:
        text = text.replace('output_dir = "runs"', f'output_dir = "{output_dir}"', 1)
    if response:
        text += "\n[simulation.modulator_response]\n" + response + "\n"
    return text
