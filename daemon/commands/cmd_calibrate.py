"""Verbs `calibrate CONFIG` (EMVA 1288 photon transfer -> camera profile, then flat
frames -> flat-field map beside the profile) and
`plan CONFIG` (photon budget for a wanted precision)."""

from __future__ import annotations

import math
import time
from pathlib import Path

from rich.console import Console
from rich.markup import escape
from rich.table import Table

from maskrun.daemon.safety.safety import UNATTENDED_OPTION


def register(sub) -> None:
    p = sub.add_parser(
        "calibrate",
        help="measure the camera's gain, dark noise, saturation and linearity (EMVA 1288 photon transfer) "
        "and write a camera profile",
    )
    p.add_argument("config", help="bench config (TOML)")
    p.add_argument("--output", help="camera profile to write (default: <camera driver>-profile-<date>.json beside the config)")
    p.add_argument("--steps", type=int, default=50, help="exposure steps from dark to beyond saturation (default 50)")
    p.add_argument("--longest-exposure-s", type=float, help="longest exposure; default: probed with the shutter open")
    p.add_argument("--plot", help="PNG of the photon transfer and linearity plots (default: beside the profile)")
    p.add_argument("--flat-frames", type=int, default=16,
                   help="flat frames (and as many dark frames) averaged at about half of saturation for the "
                   "flat-field map <profile>.flat.npy (default 16; 0: no flat field)")
    p.add_argument(UNATTENDED_OPTION, dest="ack", action="store_true", help="acknowledge the laser-safety notice")
    p.add_argument("--uniform-light-ready", action="store_true",
                   help="real benches: confirm the camera sees uniform light (sample and mask removed, diffuser in)")
    p.add_argument("--photons-per-pixel-per-s", type=float,
                   help="known irradiance on the sensor as photons per pixel per second: the quantum efficiency is "
                   "then measured")
    p.add_argument("--power-w", type=float, help="power-meter reading at the sensor plane, watts (with --beam-area-m2 "
                   "and --pixel-pitch-m): gives the irradiance, so the quantum efficiency is measured")
    p.add_argument("--beam-area-m2", type=float, help="area the measured power is spread over at the sensor, m^2")
    p.add_argument("--pixel-pitch-m", type=float, help="the camera's pixel pitch (square pixels, before binning), m")
    p.set_defaults(func=cmd_calibrate)

    p = sub.add_parser("plan", help="photons, exposure and passes needed for a wanted precision (Cramér-Rao bound "
                       "or shot-noise rule), with saturation and dose warnings")
    p.add_argument("config", help="bench config (TOML)")
    g = p.add_mutually_exclusive_group(required=True)
    g.add_argument("--phase-precision", type=float, help="wanted phase standard deviation, radians")
    g.add_argument("--relative-error", type=float, help="wanted relative error of the field")
    p.add_argument("--photon-rate-per-s", type=float,
                   help="incident photons per second at the camera (default: the simulated bench's rate, or the laser power)")
    p.add_argument("--method", choices=("auto", "crb", "shot_noise"), default="auto")
    p.set_defaults(func=cmd_plan)


def _table(title: str, rows) -> Table:
    t = Table(title=title)
    t.add_column("quantity", style="bold")
    t.add_column("value", justify="right")
    t.add_column("unit")
    for r in rows:
        t.add_row(*r)
    return t


def _uniform_light(bench, console: Console, ready: bool) -> float | None:
    """EMVA 1288 asks for a uniform irradiance on the sensor: no sample, no mask.
    Returns the known irradiance in photons per pixel per second (simulated benches), else None."""
    from maskrun.daemon.commands.cli import CommandError

    if bench.simulated:
        import numpy as np

        point = np.zeros(bench.grid_shape, dtype=complex)
        point[0, 0] = 1.0  # a point source: its far field is uniform
        bench.optics.set_sample(point)
        bench.optics.shown_mask = None
        console.print("Simulated bench: sample replaced by a point source and the mask by a blank, "
                      "so the camera sees uniform light.")
        h, w = bench.grid_shape
        # blank mask, point source: every grid pixel gets |truth[0, 0]|^2 / (h w) photons per second
        return float(abs(bench.optics.truth_field()[0, 0]) ** 2) / (h * w)
    if not ready:
        raise CommandError(
            "photon transfer needs uniform light on the camera: remove the sample and the mask (or put a diffuser "
            "in the beam), then run again with --uniform-light-ready"
        )
    return None


def _given_irradiance(args, cfg, camera) -> tuple[float, str] | None:
    """(photons per pixel per second, how it was given) from the command line, or None."""
    from maskrun.daemon.calibrate.calibration import photons_per_pixel_per_s_from_power
    from maskrun.daemon.commands.cli import CommandError

    meter = (args.power_w, args.beam_area_m2, args.pixel_pitch_m)
    if args.photons_per_pixel_per_s is not None:
        if any(v is not None for v in meter):
            raise CommandError("give --photons-per-pixel-per-s or the power-meter reading (--power-w, "
                               "--beam-area-m2, --pixel-pitch-m), not both")
        if not args.photons_per_pixel_per_s > 0:
            raise CommandError(f"--photons-per-pixel-per-s must be > 0, got {args.photons_per_pixel_per_s}")
        return float(args.photons_per_pixel_per_s), "given on the command line"
    if all(v is None for v in meter):
        return None
    if any(v is None for v in meter):
        raise CommandError("the power-meter reading needs all three: --power-w, --beam-area-m2 and --pixel-pitch-m")
    binning = int(getattr(camera, "binning", 1) or 1)
    pixel_area = (args.pixel_pitch_m * binning) ** 2
    try:
        rate = photons_per_pixel_per_s_from_power(args.power_w, args.beam_area_m2, pixel_area, cfg.laser.wavelength_m)
    except ValueError as exc:
        raise CommandError(str(exc)) from None
    return rate, (f"from the power meter ({args.power_w:.4g} W over {args.beam_area_m2:.4g} m^2, pixel "
                  f"{args.pixel_pitch_m:.4g} m x binning {binning}, {cfg.laser.wavelength_m * 1e9:.1f} nm)")


def cmd_calibrate(args) -> int:
    from maskrun.daemon.acquire.bench import build_bench
    from maskrun.daemon.calibrate.calibration import (FlatFieldError, default_exposure_series, flat_exposure_s, measure_flat_field,
                              measure_photon_transfer)
    from maskrun.daemon.calibrate.camera_profile import CameraProfile, flat_field_path_for, save_flat_field
    from maskrun.daemon.commands.cli import CommandError
    from maskrun.daemon.config import load_config
    from maskrun.daemon.calibrate.calibration import CalibrationAborted
    from maskrun.daemon.calibrate.photon_transfer import PhotonTransferError, plot_photon_transfer
    from maskrun.daemon.safety.safety import acknowledge

    if args.flat_frames < 0:
        raise CommandError(f"--flat-frames must be 0 (no flat field) or more, got {args.flat_frames}")
    console = Console(highlight=False)
    cfg = load_config(args.config)
    bench = build_bench(cfg)
    try:
        acknowledge(cfg.laser, console, unattended=args.ack, operator=cfg.run.operator)
        bench.open()
        known_irradiance = _uniform_light(bench, console, args.uniform_light_ready)
        given = _given_irradiance(args, cfg, bench.camera)
        if given is not None:
            known_irradiance, how = given
            console.print(f"Irradiance {how}: {known_irradiance:.4g} photons per pixel per second.")
        if not bench.safety.interlock_closed():
            raise CommandError("interlock reads OPEN: close the enclosure before calibrating (the shutter must open)")
        try:
            exposures = default_exposure_series(bench.camera, bench.safety, steps=args.steps,
                                                longest_s=args.longest_exposure_s)
        except ValueError as exc:
            raise CommandError(str(exc)) from None
        console.print(f"Photon transfer: {len(exposures)} exposures from {exposures[0]:.3g} s to {exposures[-1]:.3g} s, "
                      "a dark pair and a bright pair at each.")
        with console.status("measuring") as status:
            try:
                result = measure_photon_transfer(bench.camera, bench.safety, exposures,
                                                 photons_per_pixel_per_s=known_irradiance,
                                                 progress=lambda done, total, msg: status.update(f"{done}/{total} frames: {msg}"))
            except (PhotonTransferError, CalibrationAborted) as exc:
                raise CommandError(str(exc)) from None
            flat = None
            if args.flat_frames > 0:
                try:
                    t_flat = flat_exposure_s(result)
                    status.update(f"flat field: {args.flat_frames} flat and dark frames at {t_flat:.4g} s")
                    flat = measure_flat_field(bench.camera, bench.safety, t_flat, frames=args.flat_frames,
                                              dark_frames=args.flat_frames)
                except (FlatFieldError, CalibrationAborted) as exc:
                    raise CommandError(f"flat field: {exc}") from None
    finally:
        bench.close()
    stamp = time.strftime("%Y%m%d-%H%M%S")
    out = Path(args.output) if args.output else cfg.config_dir / f"{cfg.camera.driver}-profile-{stamp}.json"
    flat_name = None
    if flat is not None:
        flat_path = save_flat_field(flat_field_path_for(out), flat.flat)
        flat_name = flat_path.name
    profile = CameraProfile.from_result(result, bench.camera, driver_name=cfg.camera.driver,
                                        wavelength_m=cfg.laser.wavelength_m, flat_field_file=flat_name)
    profile.save(out)
    png = Path(args.plot) if args.plot else out.with_suffix(".png")
    plot_photon_transfer(result, png)
    console.print(_table("Photon transfer (EMVA 1288 Release 4.0 Linear)", result.summary_rows()))
    for w in result.range_warnings:
        console.print(f"[yellow]warning:[/] {escape(w)}")
    if result.range_warnings:
        console.print("[yellow]The profile is marked NOT MEASURED[/] (measured = false): the camera is outside what "
                      "photon transfer can measure in this mode.")
    if result.quantum_efficiency is None:
        console.print("Quantum efficiency not measured (the irradiance is unknown): give --photons-per-pixel-per-s, "
                      "or --power-w with --beam-area-m2 and --pixel-pitch-m, to measure it.")
    if flat is not None:
        console.print(f"Flat field: {flat.frames} flat and {flat.dark_frames} dark frames at {flat.exposure_s:.4g} s, "
                      f"mean signal {flat.mean_signal_dn:.1f} DN, response spread (PRNU) {100 * flat.prnu_fraction:.2f} % "
                      f"-> [bold]{flat_field_path_for(out)}[/]")
    console.print(f"Camera profile: [bold]{out}[/]   plots: [bold]{png}[/]")
    console.print(f'Use it: in the bench config, \\[response] profile = "{out}"')
    return 0


#: The shortest exposure most scientific and machine-vision cameras offer, s (common practice, no source).
SHORTEST_USUAL_EXPOSURE_S = 1e-5


def _plan_bit_depth(cfg) -> int | None:
    """ADC bits for the saturation capacity without a profile: [response] bit_depth, else the driver setting."""
    if cfg.response.bit_depth is not None:
        return int(cfg.response.bit_depth)
    value = cfg.camera.settings.get("bit_depth")
    if isinstance(value, int) and not isinstance(value, bool):
        return int(value)
    fmt = cfg.camera.settings.get("pixel_format")  # a GenICam camera: the bits of its (mono) pixel format
    if cfg.camera.driver == "genicam" and isinstance(fmt, str):
        from maskrun.drivers.genicam_pixels import MONO_FORMATS

        if fmt in MONO_FORMATS:
            return MONO_FORMATS[fmt][0]
    return None


def cmd_plan(args) -> int:
    from maskrun.daemon.calibrate.budget import PlanError, dark_frame_advice, plan_photons
    from maskrun.daemon.calibrate.camera_profile import CameraProfile, ProfileError
    from maskrun.daemon.commands.cli import CommandError
    from maskrun.daemon.config import ConfigError, load_config

    console = Console(highlight=False)
    cfg = load_config(args.config)
    profile = None
    if cfg.response.profile:
        try:
            profile = CameraProfile.load(cfg.config_dir / cfg.response.profile)
        except ProfileError as exc:
            raise CommandError(str(exc)) from None
    from maskrun.daemon.safety.dose import mask_mean_transmission
    from maskrun.daemon.masks import make_masks

    try:
        built = make_masks(cfg.masks.family, cfg.masks.count, tuple(cfg.grid.shape), cfg.masks.seed, cfg.masks.levels,
                           cfg.config_dir / cfg.masks.path if cfg.masks.path else None)
    except (OSError, ValueError) as exc:
        raise CommandError(str(ConfigError(cfg.source_path, [("masks", str(exc))]))) from None
    masks = built if cfg.masks.family == "file" else None  # the other families are rebuilt (and cached) by the planner
    # the fraction of the sample's photons the camera counts (before its QE): optics, and the masks when after the sample
    to_camera = cfg.checks.transmission_sample_to_camera
    if cfg.checks.modulator_position == "after_sample":
        to_camera *= mask_mean_transmission(built)
    profile_warning = ""
    if profile is not None and not profile.measured:
        profile_warning = ("the camera profile is marked not measured (the photon transfer found the camera outside "
                           "its range: " + "; ".join(profile.range_warnings or ["no reason recorded"]) + "): its "
                           "saturation capacity and noise may be wrong")
    bit_depth = None if profile else _plan_bit_depth(cfg)
    if profile is None and bit_depth is None:
        raise CommandError(
            f"{cfg.source_path}: the saturation capacity is unknown (no camera profile, no bit depth), so the plan "
            "could recommend an exposure that saturates: give [response] profile = '<file from maskrun calibrate>' "
            "or [response] bit_depth = <ADC bits>")
    rate = args.photon_rate_per_s
    if rate is not None:
        kwargs, rate_note = dict(photon_rate_per_s=rate), "given on the command line"
    elif cfg.simulation is not None:
        kwargs = dict(photon_rate_per_s=cfg.simulation.photon_rate_per_s)
        rate_note = "from \\[simulation] photon_rate_per_s"
    else:
        kwargs = dict(laser_power_w=cfg.laser.power_w)
        rate_note = ("from the laser power, assuming all of it reaches the camera (give --photon-rate-per-s for "
                     "the measured rate)")
    try:
        plan = plan_photons(
            tuple(cfg.grid.shape),
            cfg.masks.count,
            target_phase_precision_rad=args.phase_precision,
            target_relative_error=args.relative_error,
            method=args.method,
            masks=masks,
            mask_family=cfg.masks.family,
            mask_seed=cfg.masks.seed,
            mask_levels=cfg.masks.levels,
            profile=profile,
            quantum_efficiency=None if profile else cfg.response.quantum_efficiency,
            bit_depth=bit_depth,
            offset_dn=cfg.response.offset_dn,
            gain_dn_per_e=None if profile else cfg.response.gain_dn_per_e,
            wavelength_m=cfg.laser.wavelength_m,
            illuminated_area_m2=cfg.checks.illuminated_area_m2,
            optical_transmission=to_camera,
            max_energy_per_area_j_per_m2=cfg.checks.max_dose_energy_per_area_j_per_m2,
            max_photons=cfg.checks.max_dose_photons,
            **kwargs,
        )
    except PlanError as exc:
        raise CommandError(str(exc)) from None
    console.print(_table(f"Photon budget for {cfg.grid.shape[0]}x{cfg.grid.shape[1]}, K = {cfg.masks.count} "
                         f"{cfg.masks.family} masks", plan.summary_rows()))
    console.print(f"Photon rate: {rate_note}.")
    warnings = ([profile_warning] if profile_warning else []) + list(plan.warnings)
    darks = dark_frame_advice(cfg.run.dark_frames, plan.passes,
                              accumulating=cfg.reconstruction.enabled and cfg.reconstruction.mode == "accumulate")
    if darks:
        warnings.append(darks)
    short = plan.exposure_per_frame_s
    if short is not None and 0 < short < SHORTEST_USUAL_EXPOSURE_S:
        od = math.log10(SHORTEST_USUAL_EXPOSURE_S / short)
        warnings.append(f"the exposure per frame would be {short:.3g} s, shorter than most cameras can expose "
                        f"(about {SHORTEST_USUAL_EXPOSURE_S * 1e6:g} us): far more light than needed reaches the camera. "
                        f"Attenuate the beam (neutral density of about OD {od:.1f} for a {SHORTEST_USUAL_EXPOSURE_S * 1e6:g} "
                        "us exposure), or measure the photon rate and give --photon-rate-per-s")
    for w in warnings:
        console.print(f"[yellow]warning:[/] {escape(w)}")
    if not plan.feasible:
        raise CommandError(f"the precision cannot be reached under the dose limit: {plan.infeasible_reason}")
    return 0
