"""The pipelined loop starts the next exposure before the frame just taken is checked, but only when
the check cannot change what comes next (``saturation_action = 'flag'``). With 'shorten' or 'stop' a
check may ask for a retake or a stop, so the next mask is shown only after the check.

The order is read from the real run: the simulated optics report every mask the modulator shows, and
the frame check is wrapped (it still runs) to note when each frame is checked."""

import numpy as np
import pytest
import zmq

from maskrun.daemon.acquire import sequencer_frames
from maskrun.daemon.acquire.bench import build_bench
from maskrun.daemon.config import parse_config
from maskrun.daemon.record.runfile import RunFile
from maskrun.daemon.safety.safety import make_acknowledgement
from maskrun.daemon.acquire.sequencer import RunControl, RunPlan, State
from maskrun.daemon.acquire.session import execute_run
from test_faults import bench_text


def _run_and_record(tmp_path, monkeypatch, action):
    text = bench_text(passes=2).replace('saturation_action = "flag"', f'saturation_action = "{action}"', 1)
    cfg = parse_config(text, str(tmp_path / "bench.toml"))
    order = []
    real_check = sequencer_frames.check_frame

    def check_noted(*args, **kwargs):
        order.append(("check", None))
        return real_check(*args, **kwargs)

    monkeypatch.setattr(sequencer_frames, "check_frame", check_noted)
    bench = build_bench(cfg)
    bench.optics.subscribe(lambda name, value: order.append(("shown", int(value))) if name == "shown_mask" else None)
    ctx = zmq.Context()
    try:
        bench.open()
        ack = make_acknowledgement(cfg.laser, who="tester", how="test")
        plan = RunPlan(passes=cfg.run.passes, dark_frames=cfg.run.dark_frames, exposure_s=cfg.camera.exposure_s,
                       output_path=tmp_path / "run.h5")
        summary = execute_run(bench, plan, ack, publisher=None, zmq_context=ctx, control=RunControl())
    finally:
        bench.close()
        ctx.term()
    assert summary.state == State.finished, summary.message
    return summary, order


def _shown_before_each_check(order):
    """For each frame check in the run, the mask shown last before it."""
    shown, out = None, []
    for what, value in order:
        if what == "shown":
            shown = value
        elif shown is not None:  # dark frames are checked with no mask shown yet
            out.append(shown)
    return out


@pytest.mark.parametrize("action, expect_early", [("flag", True), ("shorten", False)])
def test_the_next_mask_is_shown_before_the_check_only_when_the_check_cannot_change_it(
        tmp_path, monkeypatch, action, expect_early):
    summary, order = _run_and_record(tmp_path, monkeypatch, action)
    masks = 4
    frames = 2 * masks
    seen = _shown_before_each_check(order)[-frames:]  # the frames of the two passes
    taken = [k for _ in range(2) for k in range(masks)]  # mask of each frame, in order
    following = [(k + 1) % masks for k in taken]  # the mask shown for the exposure after it
    if expect_early:
        # each frame but the run's last is checked after the next mask is shown (its exposure running);
        # the first frame of the run is checked first when a dose limit is set, not here (none is)
        assert seen[:-1] == following[:-1], seen
        assert seen[-1] == taken[-1]  # nothing follows the last frame
    else:
        assert seen == taken, seen  # every frame is checked while its own mask is still shown
    with RunFile(summary.output_path) as rf:  # the same frames are stored either way
        info = rf.frame_info()
        assert info["mask_index"].tolist() == taken
        assert len(rf.complete_sets()) == 2
        assert np.all(info["attempts"] >= 1)
