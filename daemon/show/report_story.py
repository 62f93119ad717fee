"""What a run did, read from its file for the run report (``RunStory``, ``read_story``), and the text
about it both report pages show (flag meanings, settings, overrides, acknowledgements)."""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from maskrun.daemon.record.runfile import RunFile
from maskrun.daemon.record.store import FLAG_NAMES

FLAG_EXPLANATIONS = {
    "saturated": "more pixels at full scale than the limit allows",
    "photons_low": "fewer photons than [checks] min_photons_per_frame",
    "photons_high": "more photons than [checks] max_photons_per_frame",
    "retaken": "replaced a stale, dropped or failed attempt",
    "frame_id_gap": "the camera's frame counter jumped (a frame lost in the camera)",
    "timeout_retried": "the camera timed out at least once before this frame",
    "exposure_shortened": "exposure shortened after saturation",
    "after_resume": "first frame set after the run file was resumed (a gap in time precedes it)",
    "modulator_retried": "the modulator needed more than one command to show this mask",
    "reconnected": "a device was reconnected while taking this frame",
    "after_pause": "the run was paused (fault or request) while taking this frame",
    "shutter_closed": "refused frame: the shutter was found closed after the exposure",
}

@dataclass
class RunStory:
    """What a run did, read from its file. Times are epoch seconds; ``t0_s`` is the run start."""

    path: Path
    run_name: str
    created_utc: str
    outcome: str  # "finished", "stopped", "fault", or "incomplete (no end recorded)"
    outcome_message: str
    t0_s: float
    grid_shape: tuple[int, int]
    mask_count: int
    wavelength_m: float
    bit_depth: int
    estimate_units: str
    frame_info: np.ndarray
    dark_count: int
    estimate_info: np.ndarray
    last_estimate: np.ndarray | None
    truth: np.ndarray | None
    last_frame: np.ndarray | None
    last_frame_info: np.void | None
    events: list[dict]
    acknowledgement: dict
    config_toml: str
    complete_sets: int
    flag_counts: dict[str, int] = field(default_factory=dict)
    state: dict = field(default_factory=dict)  # run_state.state_from_file: the account every display shows
    run_plan: dict = field(default_factory=dict)  # the plan as used (overrides included), from the file

    @property
    def warnings(self) -> list[dict]:
        return [e for e in self.events if e["level"] in ("warning", "error")]

    @property
    def max_dn(self) -> int:
        return (1 << self.bit_depth) - 1

def _outcome(events: list[dict]) -> tuple[str, str]:
    ends = [e for e in events if e["kind"] == "run_end"]
    if not ends:
        return "incomplete (no end recorded)", "the file has no 'run_end' entry: the run was cut off or is still running"
    msg = ends[-1]["message"]
    for word in ("finished", "stopped", "fault"):
        if msg.startswith(f"run {word}"):
            return word, msg
    return "ended", msg

def read_story(run_path: str | Path) -> RunStory:
    """Read everything the report shows from a run file (works on growing and crashed files)."""
    run_path = Path(run_path)
    with RunFile(run_path) as rf:
        attrs = rf.attrs
        info = rf.frame_info()
        einfo = rf.estimate_info()
        est = rf.entry["estimates"][rf.estimate_count - 1] if rf.estimate_count else None
        last_frame = rf.frame(rf.frame_count - 1) if rf.frame_count else None
        events = rf.events()
        try:
            ack = rf.safety_acknowledgement
        except (KeyError, ValueError):
            ack = {}
        story = RunStory(
            path=run_path,
            run_name=str(attrs.get("run_name", run_path.stem)),
            created_utc=str(attrs.get("created_utc", "")),
            outcome="",
            outcome_message="",
            t0_s=0.0,
            grid_shape=rf.grid_shape,
            mask_count=rf.mask_count,
            wavelength_m=float(attrs.get("laser_wavelength_m", float("nan"))),
            bit_depth=int(attrs.get("camera_bit_depth", 16)),
            estimate_units=str(attrs.get("estimate_units", "sqrt(incident photons per second)")),
            frame_info=info,
            dark_count=rf.dark_count,
            estimate_info=einfo,
            last_estimate=est,
            truth=rf.truth(),
            last_frame=last_frame,
            last_frame_info=info[-1] if len(info) else None,
            events=events,
            acknowledgement=ack,
            config_toml=rf.config_toml if "config_toml" in attrs else "",
            complete_sets=len(rf.complete_sets()),
            run_plan=rf.run_plan or {},
        )
    story.outcome, story.outcome_message = _outcome(events)
    from maskrun.daemon.record.run_state import state_from_file

    story.state = state_from_file(run_path).to_dict()
    starts = [e["t_s"] for e in events] + ([float(info["t_request_s"][0])] if len(info) else [])
    story.t0_s = min(starts) if starts else 0.0
    for bit, name in FLAG_NAMES.items():
        n = int(np.count_nonzero(info["flags"] & bit)) if len(info) else 0
        if n:
            story.flag_counts[name] = n
    return story

def _planned_passes(story: RunStory) -> int | None:
    """Passes asked for when the run started (from the 'run_start' log entry; a service run may override the
    config)."""
    import re

    for e in story.events:
        if e["kind"] == "run_start":
            m = re.search(r"(\d+) passes", e["message"])
            if m:
                return int(m.group(1))
    return None

def _exposure_used(story: RunStory, cam: dict) -> str:
    """The exposure the run used (its frames'), not the config file's when an override changed it."""
    used = story.state.get("exposure_s")
    if used:
        return f"{used:g}" + (f" (config {cam.get('exposure_s')})" if cam.get("exposure_s") not in (None, used) else "")
    return str(cam.get("exposure_s", "?"))

def overrides_used(story: RunStory) -> list[tuple[str, str, str]]:
    """(setting, value the run used, value in the stored config) for the run settings an override may change."""
    import tomllib

    try:
        cfg = tomllib.loads(story.config_toml) if story.config_toml else {}
    except tomllib.TOMLDecodeError:
        cfg = {}
    plan = story.run_plan
    rows = []
    for key, table in (("passes", "run"), ("dark_frames", "run"), ("exposure_s", "camera"), ("interval_s", "run")):
        if key in plan:
            rows.append((f"{key}", str(plan[key]), str(cfg.get(table, {}).get(key, "(not set)"))))
    used = story.state.get("exposure_s")
    if used and str(used) != str(plan.get("exposure_s")):
        rows.append(("exposure_s at the end (shortened after saturation)", f"{used:g}", "-"))
    return rows

def _acknowledgement_lines(story: RunStory) -> list[str]:
    """Every safety acknowledgement of the run: the first (stored in full) and one per resume (run log)."""
    acks = story.state.get("acknowledgements") or []
    if not acks:
        return []
    return [f"  {i + 1}. {a['message'][len('laser-safety notice '):] if a['message'].startswith('laser-safety notice ') else a['message']}"
            for i, a in enumerate(acks)]

def _config_summary(story: RunStory) -> list[str]:
    import tomllib

    try:
        cfg = tomllib.loads(story.config_toml) if story.config_toml else {}
    except tomllib.TOMLDecodeError:
        cfg = {}
    cam, mod, saf, run = cfg.get("camera", {}), cfg.get("modulator", {}), cfg.get("safety", {}), cfg.get("run", {})
    rec = cfg.get("reconstruction", {})
    lines = [
        f"grid {story.grid_shape[0]} x {story.grid_shape[1]} pixels, {story.mask_count} masks "
        f"({cfg.get('masks', {}).get('family', '?')})",
        f"laser {story.wavelength_m * 1e9:.1f} nm, {cfg.get('laser', {}).get('power_w', '?')} W, "
        f"class {cfg.get('laser', {}).get('laser_class', '?')}",
        f"camera '{cam.get('driver', '?')}', exposure {_exposure_used(story, cam)} s, {story.bit_depth} bit",
        f"modulator '{mod.get('driver', '?')}', safety box '{saf.get('driver', '?')}'",
        f"passes planned {story.state.get('passes') or _planned_passes(story) or run.get('passes', '?')}, "
        f"dark frames {story.dark_count} taken ({story.run_plan.get('dark_frames', '?')} per session planned)",
        f"reconstruction {rec.get('mode', 'default')}, {rec.get('iterations_per_update', '?')} iterations per update",
    ]
    if "simulation" in cfg:
        lines.append(f"SIMULATED bench (sample '{cfg['simulation'].get('sample', '?')}')")
    return lines
