"""One account of a run's state, read by every display: the service status, `maskrun watch`, `maskrun
view`, the stream's status messages, the run summary and the report. None of them computes or words
these figures on its own, so they cannot disagree.

Two sources, one shape (``RunState``):

* ``live_state(progress, plan, ...)``: during a run, from the sequencer's ``Progress`` and the run's
  ``RunPlan`` (the plan *as used*: command-line and request overrides included);
* ``state_from_file(path)``: from the run file alone (after the run, for the report, for a resumed run),
  with the plan from the file's ``run_plan`` attribute, the exposure actually used from ``frame_info``,
  every safety acknowledgement and every warning from the run log, and the last estimate's precision.

Numbering convention (everywhere a person reads it): passes (frame sets) and masks are counted from 1,
"pass 4/12", "mask 8/8". Fields ending in ``_index`` in JSON, the stream and the run file are the
0-based indices (pass_index 3 is "pass 4"); ``mask_label`` / ``pass_label`` convert.

Alerts are time-stamped (``t_s``, epoch seconds) and belong to a run: a new run clears them, a resume
clears the pause alerts it answers, and the end of a run moves them into the run's outcome
(``RunState.warnings``), so an idle service shows no stale alert as if it were current.
"""

from __future__ import annotations

import collections
import json
import time
from dataclasses import asdict, dataclass, field
from pathlib import Path

import numpy as np

PAUSE_KINDS = ("paused", "interlock", "resume_refused")  # alerts a resume answers
RUN_WARNING_LEVELS = ("warning", "error")


# --- numbering ------------------------------------------------------------------------------
def pass_label(pass_index: int | None, passes: int | None = None) -> str:
    """'pass 4/12' for pass_index 3 of 12 (counted from 1); '' before the first pass."""
    if pass_index is None or int(pass_index) < 0:
        return ""
    return f"pass {int(pass_index) + 1}" + (f"/{int(passes)}" if passes else "")


def mask_label(mask_index: int | None, masks: int | None = None) -> str:
    """'mask 8/8' for mask_index 7 of 8 (counted from 1); '' when not known."""
    if mask_index is None or int(mask_index) < 0:
        return ""
    return f"mask {int(mask_index) + 1}" + (f"/{int(masks)}" if masks else "")


def clock(t_s: float | None) -> str:
    return time.strftime("%H:%M:%S", time.localtime(t_s)) if t_s else "--:--:--"


def _finite(v) -> float | None:
    try:
        v = float(v)
    except (TypeError, ValueError):
        return None
    return v if np.isfinite(v) else None


# --- alerts ---------------------------------------------------------------------------------
class AlertBook:
    """Time-stamped alerts of the current run (newest last), cleared when they no longer hold."""

    def __init__(self, maxlen: int = 20):
        self._alerts: collections.deque = collections.deque(maxlen=maxlen)

    def add(self, meta: dict, t_s: float | None = None) -> None:
        self._alerts.append({"t_s": t_s or time.time(), "kind": str(meta.get("kind", "")),
                             "level": str(meta.get("level", "warning")), "message": str(meta.get("message", ""))})

    def clear(self, kinds: tuple[str, ...] | None = None) -> None:
        if kinds is None:
            self._alerts.clear()
            return
        kept = [a for a in self._alerts if a["kind"] not in kinds]
        self._alerts.clear()
        self._alerts.extend(kept)

    def active(self) -> list[dict]:
        return list(self._alerts)

    def on_event(self, topic: str, meta: dict) -> None:
        """Keep the book true to the stream: alerts are added; a resume clears what it answered."""
        kind = meta.get("kind")
        if topic == "alert":
            self.add(meta)
        elif kind == "resumed":
            self.clear(PAUSE_KINDS)


def alert_line(a: dict) -> str:
    return f"{clock(a.get('t_s'))} {a.get('level', 'warning')}: {a.get('message', '')}"


# --- precision ------------------------------------------------------------------------------
def _pct(v) -> str:
    v = _finite(v)
    return "unknown" if v is None else f"{v:.2%}"


def precision_rows(prec: dict | None, true_error=None, shot_error=None) -> list[tuple[str, str]]:
    """Labelled rows of the precision estimate, the same on every display (see reconstruct.precision)."""
    rows: list[tuple[str, str]] = []
    if not prec:
        if _finite(shot_error) is None and _finite(true_error) is None:
            rows.append(("precision", "no estimate yet"))
        if _finite(shot_error) is not None:
            rows.append(("predicted (photon count only)", _pct(shot_error)))
        if _finite(true_error) is not None:
            rows.append(("error vs truth (simulated)", _pct(true_error)))
        return rows
    from maskrun.reconstruct.precision import ADVICE, LABELS

    if prec.get("misfit"):
        rows.append(("precision", f"MISFIT: at least {_pct(prec.get('reported'))}, not trustworthy "
                                  f"(chi2/dof {prec.get('chi2_dof', float('nan')):.1f})"))
    else:
        rows.append(("precision", f"{_pct(prec.get('reported'))} (from the data)"))
    floors = ", ".join(f"{LABELS[k]} {_pct(prec.get(k))}" for k in ("shot", "read", "dark", "response", "quantisation")
                       if prec.get(k) is not None or k in (prec.get("unknown") or []))
    rows.append(("predicted", f"{_pct(prec.get('predicted'))} = {floors}"))
    chi = _finite(prec.get("chi2_dof"))
    rows.append(("from the data (misfit)", f"{_pct(prec.get('data'))}, chi2/dof {chi:.2f}" if chi is not None
                 else _pct(prec.get("data"))))
    dom = prec.get("dominant") or "shot"
    rows.append(("dominated by", f"{LABELS.get(dom, dom)}: lower it with {ADVICE.get(dom, '')}"
                 if not prec.get("misfit") else prec.get("advice", "")))
    if _finite(true_error) is not None:
        rows.append(("error vs truth (simulated)", _pct(true_error)))
    return rows


def precision_headline(prec: dict | None, shot_error=None) -> str:
    """One short phrase: 'precision 0.54 % (data), 0.46 % predicted' or 'MISFIT ...'."""
    if not prec:
        return f"predicted {_pct(shot_error)} (photon count only)" if _finite(shot_error) is not None else ""
    if prec.get("misfit"):
        return f"MISFIT (chi2/dof {prec.get('chi2_dof', 0):.1f}): error at least {_pct(prec.get('reported'))}"
    return f"precision {_pct(prec.get('reported'))} (data), {_pct(prec.get('predicted'))} predicted"


# --- the noise the precision estimate knows ---------------------------------------------------
def noise_model_for(bench, read_noise_e: float | None, dark_frames: int) -> dict:
    """reconstruct.precision.NoiseModel fields for a run on ``bench``: read noise from the run's dark
    frames (else the camera profile's), the dark frames averaged, the pixel-response spread left in the
    data (0 with a flat field, else the data-sheet ``[response] prnu_fraction``, else unknown), the gain."""
    cfg = bench.config
    if read_noise_e is None and getattr(bench, "profile", None) is not None:
        read_noise_e = getattr(bench.profile, "read_noise_e", None)
    if getattr(bench, "flat_field", None) is not None:
        spread = 0.0
    else:
        spread = cfg.response.prnu_fraction
    return {"read_noise_e": read_noise_e, "dark_frames": int(dark_frames), "response_spread": spread,
            "gain_dn_per_e": float(bench.response.gain_dn_per_e)}


# --- the run's state ------------------------------------------------------------------------
@dataclass
class RunState:
    state: str
    output_path: str
    passes: int  # planned, as used (overrides included)
    masks: int
    exposure_s: float | None  # in use (the last frame's; it may have been shortened)
    dark_frames: int  # planned dark frames (this session)
    first_pass: int = 0  # 0-based: a resumed session starts here
    resumed: bool = False
    pass_index: int = -1
    mask_index: int = -1
    frames_done: int = 0
    frames_total: int = 0
    sets_complete: int = 0  # complete frame sets in the file (all sessions)
    photons_total: float = 0.0  # incident photons, dark-subtracted (this session live; the whole file from a file)
    photons_last: float = 0.0
    saturated_last: float = 0.0
    estimates: int = 0
    estimates_waiting: int = 0
    residual: float | None = None
    error_estimate: float | None = None  # the photon-count prediction alone (the old figure)
    true_error: float | None = None  # simulated benches only
    precision: dict | None = None
    message: str = ""
    outcome: str = ""  # a sentence once the run has ended
    warnings: list = field(default_factory=list)  # time-stamped alerts of the run
    acknowledgements: list = field(default_factory=list)  # every safety acknowledgement (first + resumes)
    fps: float = 0.0
    eta_s: float | None = None
    elapsed_s: float = 0.0

    def to_dict(self) -> dict:
        d = asdict(self)
        for k, v in d.items():
            if isinstance(v, float) and not np.isfinite(v):
                d[k] = None
        # labels computed here once, so every display words them alike
        d["pass_label"] = pass_label(self.pass_index, self.passes)
        d["mask_label"] = mask_label(self.mask_index, self.masks)
        d["precision_headline"] = precision_headline(self.precision, self.error_estimate)
        return d


def progress_line(run: dict) -> str:
    """'27/96 frames, pass 4/12, mask 3/8' (+ the wait for the last estimates)."""
    parts = [f"{run.get('frames_done', 0)}/{run.get('frames_total', 0)} frames"]
    for key in ("pass_label", "mask_label"):
        if run.get(key):
            parts.append(run[key])
    if run.get("state") == "finishing" and run.get("estimates_waiting"):
        parts.append(f"computing the last {run['estimates_waiting']} estimate(s)")
    return ", ".join(parts)


def run_rows(run: dict) -> list[tuple[str, str]]:
    """The labelled figures of a run (live or ended) for text displays."""
    rows = [("run file", str(run.get("output_path", ""))),
            ("exposure (as used)", f"{run['exposure_s']:g} s" if run.get("exposure_s") else "unknown"),
            ("passes planned", str(run.get("passes"))
             + (f" (resumed at pass {run.get('first_pass', 0) + 1})" if run.get("resumed") else "")),
            ("dark frames", str(run.get("dark_frames"))),
            ("photons (incident)", f"{run.get('photons_total') or 0:.3g}")]
    rows += precision_rows(run.get("precision"), run.get("true_error"), run.get("error_estimate"))
    return rows


def live_state(progress, plan, masks: int, *, fps: float = 0.0, eta_s: float | None = None, elapsed_s: float = 0.0,
               warnings: list | None = None, acknowledgements: list | None = None) -> RunState:
    """The state of a running run from the sequencer's Progress and the plan as used."""
    exposure = _finite(getattr(progress, "exposure_s", None)) or float(plan.exposure_s)
    return RunState(
        state=progress.state.value, output_path=str(plan.output_path), passes=plan.passes, masks=masks,
        exposure_s=exposure, dark_frames=plan.dark_frames, first_pass=plan.first_pass, resumed=plan.resumed,
        pass_index=progress.pass_index, mask_index=progress.mask_index, frames_done=progress.frames_done,
        frames_total=progress.frames_total, sets_complete=plan.first_pass + max(progress.pass_index - plan.first_pass, 0),
        photons_total=progress.photons_total, photons_last=progress.photons_last,
        saturated_last=progress.saturated_last, estimates_waiting=progress.estimates_waiting,
        residual=_finite(progress.estimate_residual), error_estimate=_finite(progress.estimate_error_estimate),
        true_error=_finite(progress.estimate_true_error), precision=progress.precision, message=progress.message,
        warnings=list(warnings or []), acknowledgements=list(acknowledgements or []), fps=fps, eta_s=eta_s,
        elapsed_s=elapsed_s)


def outcome_sentence(state: str, message: str, sets: int, passes: int | None) -> str:
    """'Finished: 12 of 12 frame sets.' / 'Stopped by a control request after 5 of 12 frame sets.'"""
    of = f"{sets} of {passes}" if passes else f"{sets}"
    if state == "finished":
        return f"Finished: {of} frame sets complete."
    why = message.strip()
    if why.startswith(f"run {state}: "):
        why = why[len(f"run {state}: "):]
    why = why.split("; ")[0].strip()  # the reason; the counts and the advice are said below
    if why.lower().startswith(state):
        head = why[0].upper() + why[1:]  # 'Stopped by a control request', not 'stopped stopped ...'
    else:
        head = state.capitalize() + (f" ({why})" if why else "")
    return f"{head} after {of} frame sets; continue with 'maskrun resume FILE'."


def state_from_file(path: str | Path) -> RunState:
    """The run's state as the run file records it (works on growing and crashed files)."""
    from maskrun.daemon.record.runfile import RunFile

    with RunFile(str(path)) as rf:
        plan = rf.run_plan or {}
        finfo = rf.frame_info()
        events = rf.events()
        einfo = rf.estimate_info()
        sets = len(rf.complete_sets())
        masks = rf.mask_count
        truth_known = rf.truth() is not None
        dark_count = rf.dark_count
    ev = [{"t_s": float(e["t_s"]), "level": _s(e["level"]), "kind": _s(e["kind"]), "message": _s(e["message"])}
          for e in events]
    warnings = [e for e in ev if e["level"] in RUN_WARNING_LEVELS and e["kind"] != "run_end"]
    acks = [{"t_s": e["t_s"], "message": e["message"]} for e in ev if e["kind"] == "safety_ack"]
    ends = [e for e in ev if e["kind"] in ("run_end", "resume")]
    state, message = "running", ""
    if ends and ends[-1]["kind"] == "run_end":
        msg = ends[-1]["message"]
        state = msg.split(":")[0].replace("run ", "").strip() or "unknown"
        message = msg
    passes = int(plan.get("passes") or 0) or None
    prec = None
    true_err = err_est = resid = None
    if len(einfo):
        last = einfo[-1]
        names = last.dtype.names
        err_est, resid = _finite(last["error_estimate"]), _finite(last["residual"])
        true_err = _finite(last["true_error"]) if truth_known else None
        if "error_reported" in names and _finite(last["error_reported"]) is not None:
            chi = _finite(last["misfit_chi2_dof"])
            from maskrun.reconstruct.precision import MISFIT_CHI2_DOF

            prec = {"reported": _finite(last["error_reported"]), "predicted": _finite(last["error_predicted"]),
                    "data": _finite(last["error_data"]), "chi2_dof": chi, "shot": err_est,
                    "misfit": bool(chi is not None and chi > MISFIT_CHI2_DOF)}
            prec.update(_precision_detail(ev))
    resumes = [e for e in ev if e["kind"] == "resume"]
    st = RunState(
        state=state, output_path=str(path), passes=passes or 0, masks=masks,
        exposure_s=float(finfo["exposure_s"][-1]) if len(finfo) else _finite(plan.get("exposure_s")),
        dark_frames=int(plan.get("dark_frames", dark_count)), first_pass=int(plan.get("first_pass", 0)),
        resumed=bool(resumes), pass_index=int(finfo["pass_index"][-1]) if len(finfo) else -1,
        mask_index=int(finfo["mask_index"][-1]) if len(finfo) else -1, frames_done=len(finfo),
        frames_total=(passes or 0) * masks, sets_complete=sets,
        photons_total=float(np.sum(np.maximum(finfo["photons"], 0.0))) if len(finfo) else 0.0,
        estimates=len(einfo), residual=resid, error_estimate=err_est, true_error=true_err, precision=prec,
        message=message, warnings=warnings, acknowledgements=acks)
    if state not in ("running", "unknown"):
        st.outcome = outcome_sentence(state, message, sets, passes)
    return st


def precision_terms_message(precision: dict | None) -> str:
    """The message of the run log's 'precision' event: the last estimate's terms, compact JSON ('' without)."""
    if not precision:
        return ""
    terms = {k: (round(v, 6) if isinstance(v, float) else v) for k, v in precision.items()
             if k in ("shot", "read", "dark", "response", "quantisation", "dominant", "unknown")}
    return "terms " + json.dumps(terms, separators=(",", ":"))


def _precision_detail(events: list[dict]) -> dict:
    """The last 'precision' event's terms (the run log keeps the breakdown the file's columns do not)."""
    for e in reversed(events):
        if e["kind"] == "precision":
            try:
                return json.loads(e["message"].split(" ", 1)[1])
            except (IndexError, ValueError):
                return {}
    return {}


def _s(v) -> str:
    return v.decode("utf-8", "replace") if isinstance(v, bytes) else str(v)
