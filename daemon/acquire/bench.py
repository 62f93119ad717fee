"""Build a bench from its config: the mask set, the devices (by name from the
driver registry) and, for a simulated bench, the simulated optics and the
firmware simulators on pseudo-terminals.

``Bench.close()`` always closes the shutter first, then every device, then the
firmware; it is safe to call after a partial ``open()``.
"""

from __future__ import annotations

import contextlib
import logging
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from maskrun.drivers import BenchContext, Camera, DeviceError, Modulator, SafetyBox
from maskrun.drivers.errors import DriverSettingsError, UnknownDriver

from maskrun.daemon.record.checks import Response
from maskrun.daemon.config import BenchConfig, ConfigError
from maskrun.daemon.masks import make_masks, masks_as_imposed

log = logging.getLogger(__name__)


@dataclass
class Bench:
    config: BenchConfig
    masks: np.ndarray
    camera: Camera
    modulator: Modulator
    safety: SafetyBox
    response: Response
    context: BenchContext
    optics: Any = None  # SimulatedOptics on a simulated bench
    truth: np.ndarray | None = None  # sqrt(incident photons / s), simulated benches only
    firmware: list = field(default_factory=list)
    profile: Any = None  # CameraProfile from 'maskrun calibrate', when [response] profile names one
    flat_field: np.ndarray | None = None  # per-pixel response (float32, mean 1, frame shape) from the profile
    device_masks: np.ndarray | None = None  # designed masks, loaded into the modulator (None: same as masks)
    modulator_profile: Any = None  # ModulatorProfile from [modulator] profile, or None
    _opened: list = field(default_factory=list)

    @property
    def masks_adjusted(self) -> bool:
        """True when the stored/reconstructed masks differ from the designed ones (profile or offset)."""
        return self.device_masks is not None

    @property
    def grid_shape(self) -> tuple[int, int]:
        return tuple(self.config.grid.shape)

    @property
    def simulated(self) -> bool:
        return self.optics is not None

    def open(self) -> None:
        """Open the safety box first (and close its shutter), then modulator and camera."""
        for dev in (self.safety, self.modulator, self.camera):
            dev.open()
            self._opened.append(dev)
            if dev is self.safety:
                self.safety.close_shutter()
        self.camera.exposure_s = self.config.camera.exposure_s
        rows, cols = self.camera.sensor_shape
        h, w = self.grid_shape
        self.camera.roi = ((rows - h) // 2, (cols - w) // 2, h, w)
        if self.profile is not None:
            from maskrun.daemon.calibrate.camera_profile import check_profile_matches

            # a profile measured on another camera or mode would turn counts into wrong photon numbers
            check_profile_matches(self.profile, self.camera, path=self.config.response.profile,
                                  driver_name=self.config.camera.driver)
        if self.flat_field is not None and tuple(self.flat_field.shape) != tuple(self.camera.frame_shape):
            from maskrun.daemon.calibrate.camera_profile import ProfileMismatch

            raise ProfileMismatch([f"flat field shape {tuple(self.flat_field.shape)}, frames "
                                   f"{tuple(self.camera.frame_shape)} on the camera"], self.config.response.profile)
        self.modulator.load(self.masks if self.device_masks is None else self.device_masks)

    def firmware_info(self) -> list[dict]:
        """The simulated devices' firmware: name, port and (own process) pid."""
        out = []
        for fw in self.firmware:
            out += fw.info() if hasattr(fw, "info") else [{"name": fw.name, "port": fw.port, "pid": None}]
        return out

    def close(self) -> None:
        """Shutter closed first, whatever else fails; then devices; then simulators."""
        with contextlib.suppress(Exception):
            self.safety.close_shutter()
        for dev in reversed(self._opened):
            try:
                dev.close()
            except Exception as exc:  # keep closing the rest
                log.warning("closing %s failed: %s", dev.kind, exc)
        self._opened.clear()
        for fw in self.firmware:
            with contextlib.suppress(Exception):
                fw.stop()
        self.firmware.clear()

    def __enter__(self):
        try:
            self.open()
        except BaseException:
            self.close()
            raise
        return self

    def __exit__(self, *exc):
        self.close()
        return False


def _driver(kind: str, table: str, dev_cfg, context: BenchContext, source: str):
    from maskrun.drivers.registry import build_driver

    try:
        return build_driver(kind, dev_cfg.driver, dict(dev_cfg.settings), context)
    except UnknownDriver as exc:
        raise ConfigError(source, [(f"{table}.driver", str(exc))]) from None
    except DriverSettingsError as exc:
        raise ConfigError(source, [(f"{table}.{path}", msg) for path, msg in exc.problems]) from None


def build_bench(cfg: BenchConfig) -> Bench:
    """Construct (but do not open) the bench. Raises ConfigError for anything the config got wrong."""
    src = cfg.source_path
    grid = tuple(cfg.grid.shape)
    try:
        masks = make_masks(cfg.masks.family, cfg.masks.count, grid, cfg.masks.seed, cfg.masks.levels,
                           cfg.config_dir / cfg.masks.path if cfg.masks.path else None)
    except (ValueError, OSError) as exc:
        raise ConfigError(src, [("masks", str(exc))]) from None
    modulator_profile = _load_modulator_profile(cfg)
    device_masks = None
    if modulator_profile is not None or tuple(cfg.masks.offset_px) != (0.0, 0.0):
        device_masks = masks
        masks = masks_as_imposed(device_masks, modulator_profile, cfg.masks.offset_px)
    context = BenchContext(config_dir=str(cfg.config_dir), wavelength_m=cfg.laser.wavelength_m,
                           modulator_profile=modulator_profile)
    firmware = []
    try:
        camera = _driver("camera", "camera", cfg.camera, context, src)
        rows, cols = camera.sensor_shape
        if rows < grid[0] or cols < grid[1]:
            raise ConfigError(
                src,
                [("camera.settings.sensor_shape",
                  f"camera sensor {rows}x{cols} is smaller than the reconstruction grid {grid[0]}x{grid[1]} "
                  "([grid] shape); use a smaller grid or a larger sensor")],
            )
        optics = truth = None
        if cfg.simulation is not None:
            optics, truth = _simulated_optics(cfg, masks if device_masks is None else device_masks, (rows, cols))
            context.optics = optics
            if cfg.simulation.firmware_processes and cfg.simulation.firmware:
                from maskrun.daemon.acquire.firmware_procs import start_firmware_processes

                group = start_firmware_processes(cfg.simulation.firmware, optics, masks.shape[0])
                firmware.append(group)
                context.ports.update(group.ports)
            else:
                from maskrun.simulators.firmware import start_firmware

                for name, fw_cfg in cfg.simulation.firmware.items():
                    handle = start_firmware(name, optics, faults=fw_cfg.faults, settle_s=fw_cfg.settle_s, name=name)
                    firmware.append(handle)
                    context.ports[name] = handle.port
        modulator = _driver("modulator", "modulator", cfg.modulator, context, src)
        try:  # a mask family the device cannot impose is a config error, before any notice or device
            modulator.check_masks(cfg.masks.family, masks if device_masks is None else device_masks)
        except DeviceError as exc:
            raise ConfigError(src, [("masks.family" if "family" in exc.detail else "modulator.settings",
                                     f"{exc.detail} ({exc.hint})")]) from None
        safety = _driver("safety", "safety", cfg.safety, context, src)
    except BaseException:
        for fw in firmware:
            fw.stop()
        raise
    try:
        profile, flat = _load_profile(cfg)
        if profile is not None:
            qe = profile.quantum_efficiency or cfg.response.quantum_efficiency
            if qe is None:
                raise ConfigError(cfg.source_path, [("response.quantum_efficiency",
                                  f"the camera profile {cfg.response.profile} has no quantum efficiency (the "
                                  "irradiance was not known when it was measured); give quantum_efficiency here")])
            response = Response(profile.gain_dn_per_e, profile.offset_dn, qe)
        else:
            response = Response(cfg.response.gain_dn_per_e, cfg.response.offset_dn, cfg.response.quantum_efficiency)
        bench = Bench(cfg, masks, camera, modulator, safety, response, context, optics, truth, firmware,
                      profile=profile, flat_field=flat, device_masks=device_masks,
                      modulator_profile=modulator_profile)
        check_exposure(bench, cfg.camera.exposure_s)
        check_watchdog(bench, cfg.camera.exposure_s)
        if cfg.reconstruction.enabled:
            from maskrun.daemon.compute.remote_workers import link_options

            link_options(cfg)  # ConfigError for a worker address or keys that cannot work, before any notice
    except BaseException:
        for fw in firmware:
            fw.stop()
        raise
    return bench


def check_exposure(bench: Bench, exposure_s: float, where: str = "camera.exposure_s") -> None:
    """ConfigError when the camera cannot take ``exposure_s`` (its own limits, ``Camera.exposure_range_s``).

    Checked before anything is written or shown: a run with such an exposure would fault on its
    first frame, and a resume (same stored settings) would fault the same way."""
    lo, hi = bench.camera.exposure_range_s
    e = float(exposure_s)
    if not lo <= e <= hi:
        raise ConfigError(bench.config.source_path, [(where,
                          f"exposure {e:g} s is outside what the camera takes ({lo:g} to {hi:g} s, as its driver "
                          f"'{bench.config.camera.driver}' reports); choose an exposure in that range")])


def check_watchdog(bench: Bench, exposure_s: float) -> None:
    """ConfigError when the safety box's watchdog would close the shutter during a normal frame.

    Between two commands to the safety box a run waits at most the modulator's settle time, the
    exposure and the camera's grab timeout; the watchdog must be longer than that."""
    watchdog_s = float(getattr(bench.safety, "watchdog_s", 0.0) or 0.0)
    if watchdog_s <= 0:
        return
    cfg = bench.config
    needed = bench.modulator.settle_s + float(exposure_s) + cfg.camera.grab_timeout_s
    if watchdog_s <= needed:
        raise ConfigError(cfg.source_path, [("safety.settings.watchdog_s",
                          f"{watchdog_s:g} s is not longer than one frame's silence towards the safety box "
                          f"(settle {bench.modulator.settle_s:g} s + exposure {float(exposure_s):g} s + grab timeout "
                          f"{cfg.camera.grab_timeout_s:g} s = {needed:g} s): the box would close the shutter during "
                          "normal frames; make watchdog_s longer")])


def _load_profile(cfg: BenchConfig):
    """(profile, flat field) named in [response] profile (relative paths from the config's folder);
    (None, None) without a profile, flat None when the profile names no flat-field file."""
    if not cfg.response.profile:
        return None, None
    from maskrun.daemon.calibrate.camera_profile import CameraProfile, ProfileError, load_flat_field

    path = cfg.config_dir / cfg.response.profile
    try:
        profile = CameraProfile.load(path)
        return profile, load_flat_field(profile, path)
    except (ProfileError, OSError) as exc:
        raise ConfigError(cfg.source_path, [("response.profile", str(exc))]) from None


def _load_modulator_profile(cfg: BenchConfig):
    """The ModulatorProfile named in [modulator] profile (relative to the config's folder), or None."""
    if not cfg.modulator.profile:
        return None
    from maskrun.drivers.modulator_profile import ModulatorProfile, ModulatorProfileError

    try:
        profile = ModulatorProfile.load(cfg.config_dir / cfg.modulator.profile)
    except ModulatorProfileError as exc:
        raise ConfigError(cfg.source_path, [("modulator.profile", f"{exc}; measure one with 'maskrun "
                                             "measure-response CONFIG'")]) from None
    wl = cfg.laser.wavelength_m
    if abs(profile.wavelength_m - wl) > 1e-3 * wl:
        raise ConfigError(cfg.source_path, [("modulator.profile",
                          f"the profile holds for {profile.wavelength_m * 1e9:.1f} nm but [laser] is at {wl * 1e9:.1f} nm: "
                          "an SLM's response depends on the wavelength; measure it at this one")])
    return profile


def _simulated_optics(cfg: BenchConfig, masks: np.ndarray, sensor_shape):
    from maskrun.simulators.optics import SimulatedOptics
    from maskrun.simulators.sample import bare_beam, isolated_amplitude_target, phase_target

    sim = cfg.simulation
    grid = tuple(cfg.grid.shape)
    if sim.sample == "beam":
        sample = bare_beam(grid)
    elif sim.sample == "isolated_amplitude_target":  # single-pattern benches (no modulator pattern)
        sample = isolated_amplitude_target(grid).field
    else:
        sample = phase_target(grid, wavelength_m=cfg.laser.wavelength_m).field
    slm = None
    if sim.modulator_response is not None:
        if cfg.modulator.driver != "simulated":
            raise ConfigError(cfg.source_path, [("simulation.modulator_response",
                              f"a simulated SLM response needs [modulator] driver = 'simulated' (the in-process "
                              f"simulated SLM), not {cfg.modulator.driver!r}")])
        from maskrun.simulators.modulator import true_response_profile

        r = sim.modulator_response
        slm = true_response_profile(r.grey_levels_per_2pi, r.curvature, r.levels, cfg.laser.wavelength_m)
    optics = SimulatedOptics(sample, masks, sim.photon_rate_per_s, sensor_shape,
                             mask_offset_px=sim.modulator_offset_px, slm_response=slm)
    return optics, optics.truth_field()


def open_bench(cfg: BenchConfig) -> Bench:
    """build_bench + open, closing everything again if opening fails."""
    bench = build_bench(cfg)
    try:
        bench.open()
    except BaseException:
        bench.close()
        raise
    return bench


__all__ = ["Bench", "build_bench", "open_bench", "DeviceError"]
