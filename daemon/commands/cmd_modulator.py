"""Verbs `measure-response CONFIG` (the modulator's grey level -> phase response, measured on the bench with
its camera, written as a modulator profile) and `register-masks CONFIG` (where the masks land on the field,
from one frame set; optionally written to [masks] offset_px)."""

from __future__ import annotations

from pathlib import Path

import numpy as np
from rich.console import Console
from rich.table import Table

from maskrun.daemon.safety.safety import UNATTENDED_OPTION


def register(sub) -> None:
    p = sub.add_parser("measure-response",
                       help="measure the phase modulator's grey level -> phase response with the bench camera "
                       "(half the aperture stepped against the other) and write a modulator profile")
    p.add_argument("config", help="bench config (TOML)")
    p.add_argument("--output", help="modulator profile to write (default: modulator-profile-<date>.json beside the config)")
    p.add_argument("--levels", type=int, default=256, help="grey levels the device accepts, 0 .. LEVELS-1 (default 256)")
    p.add_argument("--step", type=int, default=1, help="measure every STEP-th level (default 1: all)")
    p.add_argument("--reference-level", type=int, default=0, help="grey level of the reference half (default 0)")
    p.add_argument("--exposure-s", type=float, help="exposure per frame (default: [camera] exposure_s)")
    p.add_argument("--frames-per-level", type=int, default=1, help="frames averaged per level (default 1)")
    p.add_argument(UNATTENDED_OPTION, dest="ack", action="store_true", help="acknowledge the laser-safety notice")
    p.set_defaults(func=cmd_measure_response)

    p = sub.add_parser("register-masks",
                       help="estimate where the masks land on the field from one frame set (before a run) and "
                       "optionally write it to [masks] offset_px")
    p.add_argument("config", help="bench config (TOML)")
    p.add_argument("--from-run", metavar="RUN_FILE", help="use a frame set of this run file instead of taking one")
    p.add_argument("--set", dest="set_number", type=int, default=0, help="with --from-run: which complete frame set (0 = first)")
    p.add_argument("--reference-px", type=float, nargs=2, metavar=("ROW", "COL"),
                   help="where the object's intensity centroid is on the grid (default: the centre; right for the bare beam)")
    p.add_argument("--reference-run", metavar="RUN_FILE",
                   help="register the whole pixels on the last estimate of this (registered) run instead of a centroid")
    p.add_argument("--iterations", type=int, default=150, help="solver iterations per candidate offset (default 150)")
    p.add_argument("--exposure-s", type=float, help="exposure per frame (default: [camera] exposure_s)")
    p.add_argument("--apply", action="store_true", help="write the estimate to [masks] offset_px in CONFIG (old file kept as .bak)")
    p.add_argument(UNATTENDED_OPTION, dest="ack", action="store_true", help="acknowledge the laser-safety notice")
    p.set_defaults(func=cmd_register_masks)


def cmd_measure_response(args) -> int:
    import time

    from maskrun.daemon.acquire.bench import build_bench
    from maskrun.daemon.acquire.bench_frames import SaturatedFrames
    from maskrun.daemon.commands.cli import CommandError
    from maskrun.daemon.config import load_config
    from maskrun.daemon.acquire.modulator_response import ResponseMeasurementError, measure_response
    from maskrun.daemon.safety.safety import acknowledge

    console = Console(highlight=False)
    cfg = load_config(args.config)
    if cfg.modulator.profile:
        console.print(f"Note: \\[modulator] profile = {cfg.modulator.profile!r} is not used while measuring "
                      "(the grey levels are shown as they are).")
    bench = build_bench(cfg)
    from maskrun.drivers import Modulator

    if type(bench.modulator).show_grey is Modulator.show_grey:
        bench.close()
        raise CommandError(f"the {cfg.modulator.driver!r} modulator cannot show arbitrary grey images, which the "
                           "response measurement needs: use a modulator driven as a display ('display'), or "
                           "'simulated' on the simulated bench")
    try:
        acknowledge(cfg.laser, console, unattended=args.ack, operator=cfg.run.operator)
        bench.open()
        with console.status("measuring") as status:
            try:
                m = measure_response(bench, levels=args.levels, step=args.step, reference_level=args.reference_level,
                                     exposure_s=args.exposure_s, frames_per_level=args.frames_per_level,
                                     progress=lambda i, n: status.update(f"grey level {i}/{n}"))
            except (ValueError, ResponseMeasurementError, SaturatedFrames) as exc:
                raise CommandError(str(exc)) from None
    finally:
        bench.close()
    out = Path(args.output) if args.output else cfg.config_dir / f"modulator-profile-{time.strftime('%Y%m%d-%H%M%S')}.json"
    m.profile.save(out)
    prof = m.profile
    t = Table(title=f"Phase response at {cfg.laser.wavelength_m * 1e9:.1f} nm (measured)")
    t.add_column("grey level", justify="right")
    t.add_column("phase, rad", justify="right")
    t.add_column("phase / 2 pi", justify="right")
    grey, phase = prof.grey, prof.phase
    for i in np.unique(np.linspace(0, len(grey) - 1, 9).round().astype(int)):
        t.add_row(str(grey[i]), f"{phase[i]:.3f}", f"{phase[i] / (2 * np.pi):.3f}")
    console.print(t)
    reach = np.flatnonzero(phase >= 2 * np.pi)
    console.print(f"2 pi is reached at grey level {grey[reach[0]]}" if reach.size else
                  f"[yellow]warning:[/] the phase only reaches {phase.max() / (2 * np.pi):.2f} x 2 pi: masks needing more "
                  "are imposed by the nearest reachable phase")
    console.print(prof.notes)
    if bench.optics is not None and getattr(bench.optics, "slm_response", None) is not None:
        truth = bench.optics.slm_response.phase_of_grey(grey)
        console.print(f"Simulated bench: rms difference from the simulated true response "
                      f"{np.sqrt(np.mean((phase - truth) ** 2)):.4f} rad.")
    console.print(f"Modulator profile: [bold]{out}[/]")
    console.print(f'Use it: in the bench config, \\[modulator] profile = "{out}"')
    return 0


def cmd_register_masks(args) -> int:
    from maskrun.daemon.acquire.bench import build_bench
    from maskrun.daemon.acquire.bench_frames import SaturatedFrames
    from maskrun.daemon.commands.cli import CommandError
    from maskrun.daemon.config import load_config
    from maskrun.daemon.acquire.mask_registration import apply_offset, frame_set_from_run, register, take_frame_set
    from maskrun.daemon.safety.safety import acknowledge

    console = Console(highlight=False)
    cfg = load_config(args.config)
    reference_image = None
    if args.reference_run:
        from maskrun.daemon.record.runfile import RunFile

        with RunFile(args.reference_run) as rf:
            if rf.estimate_count == 0:
                raise CommandError(f"{args.reference_run}: holds no estimate to register on")
            reference_image = rf.estimates()[-1]
    optics = None
    if args.from_run:  # no devices needed: the frames are in the file
        from maskrun.daemon.acquire.bench import _load_modulator_profile

        modulator_profile = _load_modulator_profile(cfg)
        try:
            y = frame_set_from_run(args.from_run, args.set_number)
        except ValueError as exc:
            raise CommandError(str(exc)) from None
        source = f"frame set {args.set_number} of {args.from_run}"
    else:
        bench = build_bench(cfg)
        modulator_profile, optics = bench.modulator_profile, bench.optics
        try:
            acknowledge(cfg.laser, console, unattended=args.ack, operator=cfg.run.operator)
            bench.open()
            try:
                y = take_frame_set(bench, args.exposure_s)
            except SaturatedFrames as exc:
                raise CommandError(str(exc)) from None
            source = "one frame set taken now"
        finally:
            bench.close()
    with console.status(f"searching offsets ({source})"):
        try:
            r = register(cfg, y, modulator_profile, reference_px=args.reference_px,
                         reference_image=reference_image, iterations=args.iterations)
        except ValueError as exc:
            raise CommandError(str(exc)) from None
    t = Table(title="Mask registration")
    t.add_column("quantity", style="bold")
    t.add_column("rows", justify="right")
    t.add_column("cols", justify="right")
    t.add_row("offset, grid pixels", f"{r.offset_px[0]:+.3f}", f"{r.offset_px[1]:+.3f}")
    t.add_row("  of which the fraction (from the data)", f"{r.fraction_px[0]:.3f}", f"{r.fraction_px[1]:.3f}")
    ref_note = "reference run's estimate" if reference_image is not None else "intensity centroid"
    t.add_row(f"  whole pixels (from the {ref_note})", f"{r.offset_px[0] - r.fraction_px[0]:+.0f}",
              f"{r.offset_px[1] - r.fraction_px[1]:+.0f}")
    t.add_row("now in \\[masks] offset_px", f"{cfg.masks.offset_px[0]:+.3f}", f"{cfg.masks.offset_px[1]:+.3f}")
    console.print(t)
    console.print(f"Data residual: {r.residual:.4f} at the estimate, {r.residual_designed:.4f} with the masks as designed "
                  f"({r.evaluations} reconstructions). Whole-pixel shifts leave the data unchanged (they move the "
                  "object instead), so the whole pixels rest on the position reference: "
                  + ("the reference run's estimate." if reference_image is not None else
                     f"the centroid, taken to be at ({r.reference_px[0]:g}, {r.reference_px[1]:g}) - right for the bare "
                     "beam centred on the grid; with a sample in, use --reference-px or --reference-run."))
    if optics is not None:
        true = optics.mask_offset_px
        console.print(f"Simulated bench: the modulator is displaced by ({true[0]:g}, {true[1]:g}); estimate error "
                      f"{np.hypot(r.offset_px[0] - true[0], r.offset_px[1] - true[1]):.3f} px.")
    if args.apply:
        backup = apply_offset(cfg.source_path, r.offset_px)
        console.print(f"Written: \\[masks] offset_px = [{r.offset_px[0]:.3f}, {r.offset_px[1]:.3f}] in "
                      f"[bold]{cfg.source_path}[/] (the old file is {backup}). Runs now store and reconstruct "
                      "with the masks as they land.")
    else:
        console.print(f"To apply it: run again with --apply, or set \\[masks] offset_px = "
                      f"[{r.offset_px[0]:.3f}, {r.offset_px[1]:.3f}] in the config.")
    return 0
