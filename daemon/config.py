"""Bench and run configuration: TOML files validated by pydantic models.

Every table rejects unknown keys. ``load_config(path)`` raises ``ConfigError``
whose message names the file, the key path and what was expected, one line per
problem, so the CLI can print it without a traceback.

Units are in the key names: ``_s`` seconds, ``_m`` metres, ``_w`` watts.
"""

from __future__ import annotations

import importlib.resources
import math
import tomllib
from pathlib import Path
from typing import Any, Literal

from pydantic import BaseModel, ConfigDict, Field, ValidationError, PrivateAttr, field_validator, model_validator


class ConfigError(ValueError):
    """A bench config is missing, malformed or invalid. ``problems`` is a list of (key path, message)."""

    def __init__(self, source: str, problems: list[tuple[str, str]]):
        self.source = source
        self.problems = problems
        lines = [f"{source}: {path}: {msg}" if path else f"{source}: {msg}" for path, msg in problems]
        super().__init__("\n".join(lines))


class _Table(BaseModel):
    model_config = ConfigDict(extra="forbid", validate_assignment=True)


LaserClass = Literal["1", "1M", "2", "2M", "3R", "3B", "4"]


class LaserConfig(_Table):
    """The source. Shown in the safety notice before every run."""

    description: str = "laser"
    laser_class: LaserClass | None = Field(
        None, description="IEC 60825-1 class of the source; checked against wavelength and power (never below "
        "what they give); leave out for sources below 180 nm (X-ray, EUV): those get a radiation-protection notice")
    wavelength_m: float = Field(gt=1e-12, lt=1e-3)
    power_w: float = Field(gt=0)
    eyewear: str = Field(
        default="eyewear of the optical density required at this wavelength by the site's rules",
        description="what eyewear the site requires",
    )
    safety_officer: str = Field(default="the site's laser safety officer", description="who to contact")
    radiation_protection_officer: str = Field(
        default="the site's radiation protection officer", description="who to contact for ionising sources")

    @model_validator(mode="after")
    def _class_fits_the_beam(self):
        from maskrun.daemon.laser_hazard import declaration_problem

        problem = declaration_problem(self.laser_class, self.wavelength_m, self.power_w)
        if problem:
            raise ValueError(problem)
        return self


class GridConfig(_Table):
    """The reconstruction grid (rows, cols); the camera ROI is this size, centred."""

    shape: tuple[int, int] = (128, 128)

    @field_validator("shape")
    @classmethod
    def _positive(cls, v):
        if v[0] < 4 or v[1] < 4:
            raise ValueError("each grid dimension must be at least 4 pixels")
        return v


class MaskConfig(_Table):
    """The mask set shown by the modulator."""

    family: Literal["octanary", "random_phase", "quantized_phase", "binary_amplitude", "file", "blank"] = Field(
        "octanary", description="blank: one all-ones mask (count = 1), the plain far-field pattern of a bench "
        "without a modulator pattern (reconstructed by HIO with a support)")
    count: int = Field(8, description="number of masks K per frame set")
    seed: int = 0
    levels: int = Field(8, ge=2, description="phase levels for quantized_phase")
    path: str | None = Field(None, description="mask file (.npy/.npz) for family = 'file'")
    offset_px: tuple[float, float] = Field(
        (0.0, 0.0), description="(rows, cols) grid pixels by which the masks land displaced on the field, as measured "
        "by 'maskrun register-masks'; the stored and reconstructed masks are the designed ones shifted by this")

    @field_validator("count")
    @classmethod
    def _count(cls, v):
        if v < 1:
            raise ValueError("at least one mask is needed (K >= 1; K >= 4 recommended for a unique solution)")
        return v

    @model_validator(mode="after")
    def _file_needs_path(self):
        if self.family == "file" and not self.path:
            raise ValueError("family = 'file' needs path = '<masks.npy>'")
        if self.family == "blank" and self.count != 1:
            raise ValueError("family = 'blank' is one all-ones mask: set count = 1")
        return self


class DeviceConfig(_Table):
    """A device built by name from the driver registry; ``settings`` are the driver's own."""

    driver: str
    settings: dict[str, Any] = Field(default_factory=dict)


class ModulatorConfig(DeviceConfig):
    profile: str | None = Field(None, description="modulator phase-response profile (JSON, from 'maskrun "
                                "measure-response'); the masks are quantized through it, so the run file stores the "
                                "masks as really imposed")


class CameraConfig(DeviceConfig):
    exposure_s: float = Field(0.01, gt=0, le=3600)
    grab_timeout_s: float = Field(2.0, gt=0, description="longest wait for one frame beyond the exposure")


class ResponseConfig(_Table):
    """Conversion of camera counts to photons (from a calibration profile or the data sheet)."""

    gain_dn_per_e: float | None = Field(None, gt=0, description="data-sheet gain; required without a profile")
    offset_dn: float = Field(0.0, ge=0)
    quantum_efficiency: float | None = Field(
        None, gt=0, le=1, description="data-sheet QE; required without a profile, or when the profile has none")
    profile: str | None = Field(None, description="camera profile file from 'maskrun calibrate'; overrides the values above")
    bit_depth: int | None = Field(None, ge=1, le=32, description="ADC bits: without a profile, 'maskrun plan' takes "
                                  "the saturation capacity from them, the offset and the gain (default: "
                                  "[camera.settings] bit_depth when the driver has one)")
    prnu_fraction: float | None = Field(
        None, ge=0, lt=0.3, description="data-sheet pixel-response spread (PRNU, std/mean); used for the precision "
        "floor when no flat field is applied (unknown when not given)")

    @model_validator(mode="after")
    def _values_or_profile(self):
        if self.profile is None:
            missing = [k for k in ("gain_dn_per_e", "quantum_efficiency") if getattr(self, k) is None]
            if missing:
                raise ValueError(f"give {' and '.join(missing)} (data sheet), or profile = '<camera profile from "
                                 "maskrun calibrate>'")
        return self


class ChecksConfig(_Table):
    """Per-frame checks."""

    saturation_level: float = Field(
        0.98, gt=0, le=1, description="a pixel counts as saturated at this fraction of the ADC maximum"
    )
    max_saturated_fraction: float = Field(0.001, ge=0, le=1)
    min_photons_per_frame: float = Field(0.0, ge=0)
    max_photons_per_frame: float = Field(math.inf, gt=0)
    saturation_action: Literal["flag", "shorten", "stop"] = "flag"
    stale_retakes: int = Field(3, ge=0, description="retakes allowed when a frame id does not advance")
    saturation_shorten_factor: float = Field(
        0.5, gt=0, lt=1, description="saturation_action = 'shorten': the exposure is multiplied by this and the frame retaken")
    saturation_max_shortenings: int = Field(4, ge=1, description="shortenings tried for one frame before it is kept, flagged")
    max_dose_photons: float | None = Field(
        None, gt=0, description="stop the run before the cumulative incident photons on the sample pass this")
    max_dose_energy_per_area_j_per_m2: float | None = Field(
        None, gt=0, description="stop the run before the cumulative energy per area passes this (needs illuminated_area_m2)")
    illuminated_area_m2: float | None = Field(
        None, gt=0, description="beam area on the sample, for the energy-per-area dose; without it the dose is "
        "counted in photons and joules only")
    modulator_position: Literal["before_sample", "after_sample"] = Field(
        "after_sample", description="where the modulator sits: 'after_sample' (between sample and camera: the "
        "masks' mean transmission is divided out of the dose) or 'before_sample'")
    transmission_sample_to_camera: float = Field(
        1.0, gt=0, le=1, description="fraction of the light leaving the sample that reaches the camera through "
        "the optics (lenses, apertures, filters; not the masks), for the dose at the sample")

    @model_validator(mode="after")
    def _order(self):
        if self.min_photons_per_frame >= self.max_photons_per_frame:
            raise ValueError("min_photons_per_frame must be below max_photons_per_frame")
        if self.max_dose_energy_per_area_j_per_m2 is not None and self.illuminated_area_m2 is None:
            raise ValueError("max_dose_energy_per_area_j_per_m2 needs illuminated_area_m2 (the beam area on the sample, m^2)")
        return self


class ReconstructionConfig(_Table):
    enabled: bool = True
    method: str = "auto"
    mode: Literal["accumulate", "follow"] = "accumulate"
    window: int = Field(1, ge=1)
    iterations_per_update: int = Field(100, ge=1)
    time_budget_s: float | None = Field(None, gt=0)
    nonnegative: bool = Field(False, description="the object is real and non-negative (an absorbing sample): "
                              "a constraint for HIO on single patterns; used by 'maskrun reconstruct'")
    local_worker: bool = Field(True, description="start the reconstruction worker on this machine; false: only "
                               "remote workers ('maskrun worker --connect ADDRESS') reconstruct")
    worker_address: str = Field("tcp://127.0.0.1:0", description="frame sets are offered here, estimates come back "
                                "on the next port; port 0 = any free port (local worker only); not on loopback "
                                "needs [service] server_secret_key and authorized_clients_dir")


class RunConfig(_Table):
    name: str = "run"
    passes: int = Field(1, ge=1)
    dark_frames: int = Field(4, ge=0, description="dark frames (shutter closed) taken before the first pass")
    output_dir: str = "runs"
    operator: str = Field("", description="who runs the bench; recorded with the safety acknowledgement")
    interval_s: float | None = Field(None, gt=0, description="time series: start a frame set every interval_s seconds")
    duration_s: float | None = Field(
        None, gt=0, description="time series: keep taking frame sets for this long (needs interval_s; replaces passes)")
    min_free_disk_mb: float = Field(
        200.0, ge=0, description="refuse to start, or stop safely, when the run would leave less free disk than this")
    writer_queue_frames: int = Field(
        32, ge=1, le=4096, description="frames waiting for the writer thread at most; a full queue holds acquisition back")
    flush_interval_s: float = Field(
        0.5, gt=0, le=60, description="the run file is flushed after every complete frame set and at least this often")

    @model_validator(mode="after")
    def _series(self):
        if self.duration_s is not None and self.interval_s is None:
            raise ValueError("duration_s needs interval_s (e.g. interval_s = 600 for a frame set every 10 minutes)")
        return self


class RecoveryConfig(_Table):
    """Fault handling during a run: retries with backoff, reconnects, pauses."""

    retries: int = Field(3, ge=0, description="retries of a camera grab or a modulator command before the run pauses")
    backoff_initial_s: float = Field(0.1, ge=0, description="wait before the first retry, seconds")
    backoff_factor: float = Field(2.0, ge=1, description="each further retry waits this many times longer")
    backoff_max_s: float = Field(5.0, ge=0, description="longest wait between retries, seconds")
    reconnect_attempts: int = Field(5, ge=0, description="reconnects of a lost device before the run pauses")
    pause_timeout_s: float = Field(
        3600.0, ge=0, description="a paused run not resumed within this time stops safely (0 = wait for ever)")


class StreamConfig(_Table):
    publish_address: str = Field("tcp://127.0.0.1:0", description="ZeroMQ PUB address; port 0 picks a free port")
    preview_hwm: int = Field(10, ge=1, description="queued messages per subscriber before previews are dropped")
    curve: Literal["auto", "on", "off"] = Field(
        "auto", description="CURVE on the stream: 'auto' = when bound off loopback (needs the [service] keys), "
        "'on' = always, 'off' = never (unencrypted; identities and paths are withheld from its messages)")


class ServiceConfig(_Table):
    """The long-running daemon (`maskrun serve`): control and stream sockets, keys, status rate.

    Control binds to loopback unless CURVE keys are configured (server_secret_key and
    authorized_clients_dir, made by `maskrun keys DIR`); the stream (read-only) may bind anywhere.
    Relative key paths are taken from the config file's folder.
    """

    control_address: str = Field("tcp://127.0.0.1:5650", description="ZeroMQ control (request/reply) address")
    publish_address: str = Field("tcp://127.0.0.1:5651", description="ZeroMQ stream (publish) address")
    server_secret_key: str | None = Field(None, description="server.key_secret from 'maskrun keys DIR'")
    authorized_clients_dir: str | None = Field(None, description="folder of client public keys (*.key) allowed in")
    status_interval_s: float = Field(0.5, gt=0, le=60, description="status message period on the stream")
    max_request_bytes: int = Field(65536, ge=1024, le=1 << 20, description="largest control request answered")
    acknowledgement_valid_s: float = Field(43200.0, gt=0, description="how long a safety acknowledgement holds")

    @field_validator("control_address", "publish_address")
    @classmethod
    def _zmq_address(cls, v):
        transport = v.split("://", 1)[0] if "://" in v else ""
        if transport not in ("tcp", "ipc", "inproc") or v.endswith("://"):
            raise ValueError(f"{v!r} is not a ZeroMQ address; write e.g. 'tcp://127.0.0.1:5650'")
        return v


class FirmwareConfig(_Table):
    faults: list[dict[str, Any]] = Field(default_factory=list)
    settle_s: float = Field(0.0, ge=0)


class SimulatedResponseConfig(_Table):
    """The simulated SLM's TRUE grey level -> phase curve (maskrun itself only knows the nominal or measured one):
    phase(g) = 2 pi u (1 + curvature (1 - u)), u = g / grey_levels_per_2pi, for g = 0 .. levels - 1."""

    grey_levels_per_2pi: float = Field(gt=1, description="grey level at which the true phase reaches 2 pi")
    curvature: float = Field(0.0, gt=-1, lt=1, description="0 = linear; > 0 bows the curve up (steeper at low grey)")
    levels: int = Field(256, ge=2, le=65536, description="grey levels the device accepts (0 .. levels - 1)")


class SimulationConfig(_Table):
    """The simulated optical bench (present only when the bench is simulated)."""

    sample: Literal["phase_target", "isolated_amplitude_target", "beam"] = Field(
        "phase_target", description="phase_target: the etched test plate filling the grid; isolated_amplitude_target: "
        "an isolated absorbing object for single-pattern benches (masks family 'blank'); beam: the bare Gaussian "
        "beam (sample removed), e.g. to register the masks")
    photon_rate_per_s: float = Field(gt=0, description="incident photons per second on the detector, shutter open")
    seed: int = 0
    firmware: dict[Literal["modulator", "safety"], FirmwareConfig] = Field(default_factory=dict)
    firmware_processes: bool = Field(
        False, description="run each simulated device's firmware as its own process (so killing or freezing "
        "maskrun is seen by the box: link loss, watchdog); false: threads inside maskrun")
    modulator_offset_px: tuple[float, float] = Field(
        (0.0, 0.0), description="(rows, cols) grid pixels by which the simulated modulator image is displaced "
        "on the field: a misregistered bench (the reconstruction still assumes the designed masks)")
    modulator_response: SimulatedResponseConfig | None = Field(
        None, description="true grey -> phase curve of the simulated SLM (needs [modulator] driver = 'simulated'); "
        "absent: the simulated modulator imposes the masks exactly")


class BenchConfig(_Table):
    """A whole bench + run description (one TOML file)."""

    laser: LaserConfig
    grid: GridConfig = GridConfig()
    masks: MaskConfig = MaskConfig()
    camera: CameraConfig
    response: ResponseConfig
    modulator: ModulatorConfig
    safety: DeviceConfig
    checks: ChecksConfig = ChecksConfig()
    reconstruction: ReconstructionConfig = ReconstructionConfig()
    run: RunConfig = RunConfig()
    recovery: RecoveryConfig = RecoveryConfig()
    stream: StreamConfig = StreamConfig()
    service: ServiceConfig = ServiceConfig()
    simulation: SimulationConfig | None = None

    # where the file came from (not TOML keys)
    _source_path: str = PrivateAttr("<memory>")
    _source_text: str = PrivateAttr("")

    @property
    def source_path(self) -> str:
        return self._source_path

    @property
    def source_text(self) -> str:
        """The TOML text as read; stored verbatim in the run file."""
        return self._source_text

    @property
    def config_dir(self) -> Path:
        return Path(self.source_path).parent if self.source_path != "<memory>" else Path.cwd()


def _format_loc(loc: tuple) -> str:
    parts: list[str] = []
    for item in loc:
        if isinstance(item, int):
            parts[-1:] = [f"{parts[-1]}[{item}]"] if parts else [f"[{item}]"]
        else:
            parts.append(str(item))
    return ".".join(parts)


def _problems_from(err: ValidationError) -> list[tuple[str, str]]:
    out = []
    for e in err.errors():
        loc = tuple(x for x in e["loc"] if not (isinstance(x, str) and x.startswith("function-")))
        msg = e["msg"]
        if e["type"] == "extra_forbidden":
            msg = "unknown key (check the spelling; see configs/demo.toml for the keys that exist)"
        elif e["type"] == "missing":
            msg = "required key is missing"
        elif "input" in e and e["type"] not in ("value_error",):
            msg = f"{msg} (got {e['input']!r})"
        out.append((_format_loc(loc), msg.removeprefix("Value error, ")))
    return out


def parse_config(text: str, source: str = "<memory>") -> BenchConfig:
    """Parse and validate TOML text. Raises ConfigError naming ``source``."""
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(source, [("", f"not valid TOML: {exc}")]) from None
    try:
        cfg = BenchConfig.model_validate(data)
    except ValidationError as exc:
        raise ConfigError(source, _problems_from(exc)) from None
    cfg._source_path = source
    cfg._source_text = text
    return cfg


def load_config(path: str | Path) -> BenchConfig:
    """Read and validate a bench config file."""
    p = Path(path)
    if not p.exists():
        raise ConfigError(str(p), [("", "file not found (give the path of a bench config, e.g. configs/demo.toml)")])
    if p.is_dir():
        raise ConfigError(str(p), [("", "is a folder, expected a .toml file")])
    try:
        text = p.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as exc:
        raise ConfigError(str(p), [("", f"cannot read: {exc}")]) from None
    return parse_config(text, str(p))


def demo_config_text() -> str:
    """The embedded default bench (all simulated)."""
    return importlib.resources.files("maskrun.configs").joinpath("demo.toml").read_text(encoding="utf-8")


def load_demo_config() -> BenchConfig:
    return parse_config(demo_config_text(), "configs/demo.toml")
