"""One run on an open bench: create (or, for a resume, reopen) the run file, start the
reconstruction link, sequence, and close what the run owns. Used by `maskrun run/demo`
and `maskrun resume` (foreground) and by the service (`maskrun serve`), which keeps the
bench and the publisher open between runs.

Before a new file is created the disk is planned (``disk.plan_disk``): a run that
cannot fit is refused with ``DiskSpaceError`` and nothing is written.
"""

from __future__ import annotations

import json
import os
import socket
from typing import Callable

import numpy as np
import zmq

from maskrun.daemon.acquire.bench import Bench, check_exposure, check_watchdog
from maskrun.daemon.acquire.disk import MB, DiskPlan, expected_run_bytes, frame_itemsize, plan_disk
from maskrun.daemon.calibrate.budget import dark_frame_advice
from maskrun.daemon.compute.recon_link import LiveData, ReconLink
from maskrun.daemon.safety.safety import Acknowledgement
from maskrun.daemon.acquire.sequencer import Progress, RunControl, RunPlan, RunSummary, Sequencer
from maskrun.daemon.record.store import RunHeader, RunStore
from maskrun.daemon.record.stream import Publisher


def run_header(bench: Bench, ack: Acknowledgement, run_name: str, plan: RunPlan | None = None) -> RunHeader:
    cfg = bench.config
    extra = {"run_plan": json.dumps(plan.to_record())} if plan is not None else {}
    # the response actually used (a camera profile overrides [response]), so reprocessing needs no config
    resp = bench.response
    profile = str((cfg.config_dir / cfg.response.profile).resolve()) if cfg.response.profile else ""
    extra.update(response_gain_dn_per_e=float(resp.gain_dn_per_e), response_offset_dn=float(resp.offset_dn),
                 response_quantum_efficiency=float(resp.quantum_efficiency), response_profile=profile)
    describe = getattr(bench.modulator, "describe", None)  # e.g. the display modulator's response and mapping
    if callable(describe):
        extra["modulator_json"] = json.dumps(describe())
    extra.update(masks_provenance(bench))
    return RunHeader(
        run_name=run_name,
        config_toml=cfg.source_text,
        safety_acknowledgement=ack.to_dict(),
        grid_shape=bench.grid_shape,
        masks=bench.masks,
        frame_dtype=np.dtype(np.uint16 if bench.camera.bit_depth > 8 else np.uint8),
        laser_wavelength_m=cfg.laser.wavelength_m,
        camera_bit_depth=bench.camera.bit_depth,
        truth=bench.truth,
        extra_attrs=extra,
        flat_field=getattr(bench, "flat_field", None),
        **nexus_description(bench, ack),
    )


def nexus_description(bench: Bench, ack: Acknowledgement) -> dict:
    """What the NeXus groups of the run file say about source, detector, modulator and sample
    (RunHeader fields). A value maskrun does not know is left out (the file records it as unknown)."""
    cfg = bench.config
    cam = bench.camera
    try:
        gain = cam.gain
    except Exception:
        gain = None
    pixel = getattr(cam, "pixel_size_m", None)  # a driver that knows its pixel pitch may say it
    mod = bench.modulator
    try:
        settle = float(mod.settle_s)
    except Exception:
        settle = None
    sim = cfg.simulation
    sample = ({"name": sim.sample, "description": f"simulated bench: [simulation] sample = {sim.sample!r}"}
              if sim is not None else {})
    return {
        "live_reconstruction": bool(cfg.reconstruction.enabled),
        "source": {"description": cfg.laser.description, "power_w": ack.power_w, "laser_class": ack.laser_class},
        "detector": {"driver": cfg.camera.driver, "exposure_s": cfg.camera.exposure_s,
                     "gain_setting": None if gain is None else f"{float(gain):g}", "pixel_size_m": pixel},
        "modulator": {"driver": cfg.modulator.driver, "settings": dict(cfg.modulator.settings),
                      "settle_s": settle, "mask_family": cfg.masks.family},
        "sample": sample,
        "operator": ack.who,
    }


def masks_provenance(bench: Bench) -> dict:
    """Attributes of /entry saying what /entry/masks are: designed, or as really imposed (quantized through the
    modulator profile, whose JSON is kept, and shifted by the measured registration offset)."""
    cfg = bench.config
    mp = getattr(bench, "modulator_profile", None)
    offset = tuple(float(o) for o in cfg.masks.offset_px)
    parts = ["designed"]
    if mp is not None:
        parts.append(f"quantized through the modulator profile {cfg.modulator.profile}")
    if offset != (0.0, 0.0):
        parts.append(f"shifted by [masks] offset_px = ({offset[0]:g}, {offset[1]:g}) grid pixels")
    return {"masks_as_stored": ", ".join(parts), "masks_offset_px": np.asarray(offset, dtype=np.float64),
            "modulator_profile": mp.model_dump_json() if mp is not None else ""}


def make_recon_link(bench: Bench, zmq_context: zmq.Context) -> ReconLink | None:
    cfg = bench.config
    if not cfg.reconstruction.enabled:
        return None
    # masks as imposed (profile, offset) cannot be rebuilt from the family: they travel like file masks
    family = "file" if getattr(bench, "masks_adjusted", False) else cfg.masks.family
    spec = {"family": family, "count": cfg.masks.count, "shape": bench.grid_shape,
            "seed": cfg.masks.seed, "levels": cfg.masks.levels}
    from maskrun.daemon.compute.remote_workers import link_options  # worker address, local worker on/off, CURVE keys (scale-out)

    return ReconLink(zmq_context, bench.masks, spec, cfg.reconstruction, **link_options(cfg))


def expected_bytes(bench: Bench, plan: RunPlan) -> int:
    """Expected growth of the run file for the passes still to take (plus the fixed parts for a new file)."""
    cfg = bench.config
    est = expected_run_bytes(grid_shape=bench.grid_shape, mask_count=bench.masks.shape[0],
                             passes=plan.passes - plan.first_pass, dark_frames=plan.dark_frames,
                             frame_itemsize=frame_itemsize(bench.camera.bit_depth),
                             estimates=cfg.reconstruction.enabled, truth=bench.truth is not None,
                             flat_field=bench.flat_field is not None)
    return est.bytes_total


def dark_advice(bench: Bench, plan: RunPlan) -> str:
    """The too-few-dark-frames warning for this plan ("" when fine); see budget.dark_frame_advice."""
    rcfg = bench.config.reconstruction
    return dark_frame_advice(plan.dark_frames, plan.passes - plan.first_pass,
                             accumulating=rcfg.enabled and rcfg.mode == "accumulate")


def plan_run_disk(bench: Bench, plan: RunPlan) -> DiskPlan:
    """Disk check for ``plan`` (raises DiskSpaceError when it cannot fit above the reserve)."""
    return plan_disk(plan.output_path.parent, expected_bytes(bench, plan),
                     int(bench.config.run.min_free_disk_mb * MB))


def _earlier_live_data(path, rcfg) -> LiveData:
    """The frame sets already in a run file that a resumed run's live estimate starts from."""
    from maskrun.daemon.offline.reprocess import live_frame_sets

    live = LiveData(rcfg.mode, rcfg.window)
    live.preload(live_frame_sets(path, last=None if rcfg.mode == "accumulate" else rcfg.window))
    return live


def execute_run(
    bench: Bench,
    plan: RunPlan,
    ack: Acknowledgement,
    *,
    publisher: Publisher | None,
    zmq_context: zmq.Context,
    control: RunControl | None = None,
    observer: Callable[[Progress], None] | None = None,
    run_name: str = "run",
    recon: ReconLink | None = None,
    append: bool = False,
    resume_note: str = "",
    extra_events: tuple = (),
) -> RunSummary:
    """Run ``plan`` on the (open) bench. The bench and the publisher stay open; the run file and a
    reconstruction link made here are closed before returning, whatever happens.

    append=True continues an existing (closed or repaired, see daemon.acquire.recovery) run file: the
    'resume' event (with ``resume_note``: the gap) and the new acknowledgement are logged, and the
    plan's first_pass / first_set_index say where to continue. ``extra_events`` are (kind, message,
    level) logged after the acknowledgement (e.g. the repair report)."""
    check_exposure(bench, plan.exposure_s, "exposure_s")  # ConfigError: nothing written yet
    check_watchdog(bench, plan.exposure_s)
    disk = plan_run_disk(bench, plan)  # DiskSpaceError: nothing written yet
    own_recon = recon is None
    earlier = None
    if append and own_recon and bench.config.reconstruction.enabled:
        earlier = _earlier_live_data(plan.output_path, bench.config.reconstruction)  # read before reopening
    if own_recon:
        # ConfigError here (worker address, keys, a port in use): nothing written yet
        recon = make_recon_link(bench, zmq_context)
    else:
        recon.new_run()
    try:
        if append:
            store = RunStore.reopen(plan.output_path)
        else:
            store = RunStore.create(plan.output_path, run_header(bench, ack, run_name, plan))
    except BaseException:
        if own_recon and recon is not None:
            recon.close()
        raise
    def log(kind: str, message: str, level: str = "info") -> None:
        """Into the run log, and onto the stream as the sequencer's events are (warnings as alerts)."""
        store.log(kind, message, level)
        if publisher is not None:
            publisher.publish("alert" if level in ("warning", "error") else "event",
                              {"kind": kind, "level": level, "message": message})

    try:
        if publisher is not None:  # first on the stream for this run: displays clear the last run's alerts here
            publisher.publish("event", {"kind": "run_open", "level": "info", "resumed": bool(append),
                                        "message": "run file reopened to resume" if append else "new run file"})
        if append:
            log("resume", f"resumed at pass {plan.first_pass + 1} (set index {plan.first_set_index}); {resume_note}".rstrip("; "),
                      "warning")
        log("safety_ack", f"laser-safety notice acknowledged by {ack.who} via {ack.how} at {ack.when_utc}")
        store.log("writer", f"pid {os.getpid()} on {socket.gethostname()}")
        for kind, message, level in extra_events:
            log(kind, message, level)
        store.log("disk_plan", disk.describe(), "info")
        if disk.warning:
            log("disk_warning", disk.warning, "warning")
        darks = dark_advice(bench, plan)
        if darks:
            log("dark_frames_few", darks, "warning")
        if recon is not None and earlier is not None and earlier.held:
            recon.preload(earlier)
            store.log("recon_preload", f"live reconstruction continues from the {earlier.held} frame set(s) "
                      "already in the file", "info")
        seq = Sequencer(bench, store, publisher, recon, plan, control, observer)
        return seq.run()
    finally:
        try:
            bench.safety.close_shutter()
        finally:
            try:
                if own_recon and recon is not None:
                    recon.close()
            finally:
                try:
                    store.close()
                except OSError:
                    pass  # a full disk: what was flushed before is in the file
