"""One run on an open bench: create the run file, start the reconstruction link,
sequence, and close what the run owns. Used by `maskrun run/demo` (foreground)
and by the service (`maskrun serve`), which keeps the bench and the publisher
open between runs.
"""

from __future__ import annotations

from typing import Callable

import numpy as np
import zmq

from .bench import Bench
from .recon_link import ReconLink
from .safety import Acknowledgement
from .sequencer import Progress, RunControl, RunPlan, RunSummary, Sequencer
from .store import RunHeader, RunStore
from .stream import Publisher


def run_header(bench: Bench, ack: Acknowledgement, run_name: str) -> RunHeader:
    cfg = bench.config
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
    )


def make_recon_link(bench: Bench, zmq_context: zmq.Context) -> ReconLink | None:
    cfg = bench.config
    if not cfg.reconstruction.enabled:
        return None
    spec = {"family": cfg.masks.family, "count": cfg.masks.count, "shape": bench.grid_shape,
            "seed": cfg.masks.seed, "levels": cfg.masks.levels}
    from .remote_workers import link_options

    return ReconLink(zmq_context, bench.masks, spec, cfg.reconstruction, **link_options(cfg))


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
) -> RunSummary:
    """Run ``plan`` on the (open) bench. The bench and the publisher stay open; the run file and a
    reconstruction link made here are closed before returning, whatever happens."""
    store = RunStore.create(plan.output_path, run_header(bench, ack, run_name))
    own_recon = recon is None
    try:
        store.log("safety_ack", f"laser-safety notice acknowledged by {ack.who} via {ack.how} at {ack.when_utc}")
        if own_recon:
            recon = make_recon_link(bench, zmq_context)
        else:
            recon.new_run()
        seq = Sequencer(bench, store, publisher, recon, plan, control, observer)
        return seq.run()
    finally:
        try:
            bench.safety.close_shutter()
        finally:
            if own_recon and recon is not None:
                recon.close()
            store.close()
