"""Finding GenTL producers (``.cti`` files) and the cameras they see.

A camera maker ships a GenTL producer: a shared library with the ``.cti`` extension that
any GenTL consumer loads (here through ``harvesters`` on the official ``genicam`` binding,
optional extra ``genicam``). Where to look, in order:

1. the ``producer`` setting: ``.cti`` files or folders holding them;
2. else the folders in the standard ``GENICAM_GENTL64_PATH`` environment variable (the
   makers' installers set it; several folders separated by ``:``, ``;`` on Windows).

``producer = "sim:viky"`` names the simulated producer that ships inside the ``genicam``
wheel (``viky.cti``, three simulated cameras): for trying a config without a camera.
"""

from __future__ import annotations

import contextlib
import logging
import os
from dataclasses import asdict, dataclass
from pathlib import Path

from .errors import DeviceDisconnected, DeviceMisconfigured

__all__ = ["CameraInfo", "SIMULATED_PRODUCER", "choose_camera", "find_producers", "import_harvesters",
           "list_cameras", "simulated_producer_path", "check_producer_loads"]

ENV_VAR = "GENICAM_GENTL64_PATH"
SIMULATED_PRODUCER = "sim:viky"
EXTRA_HINT = "install the optional extra: pip install 'maskrun[genicam]' (it brings harvesters and genicam)"


def import_harvesters():
    """The harvesters ``Harvester`` class, or DeviceMisconfigured naming the extra that provides it."""
    try:
        from harvesters.core import Harvester  # noqa: PLC0415 - optional dependency, imported on use
    except ImportError as exc:
        raise DeviceMisconfigured(f"the genicam camera needs the GenTL consumer library, which is not installed "
                                  f"({exc})", device="camera", hint=EXTRA_HINT) from None
    # the consumer logs every GenTL error it re-raises with a traceback; the driver turns each into one
    # typed error with its message, so only the consumer's critical messages are left on the console
    for name in [n for n in logging.root.manager.loggerDict if n == "harvesters" or n.startswith("harvesters.")]:
        logging.getLogger(name).setLevel(logging.CRITICAL)
    return Harvester


def simulated_producer_path() -> Path | None:
    """The simulated producer inside the installed ``genicam`` wheel, or None."""
    try:
        import genicam  # noqa: PLC0415
    except ImportError:
        return None
    path = Path(genicam.__file__).parent / "viky.cti"
    return path if path.is_file() else None


def _split_env(value: str) -> list[str]:
    sep = ";" if os.name == "nt" else ":"
    return [p for p in value.split(sep) if p.strip()]


def find_producers(producer: str | list[str] | None, environ=None) -> list[Path]:
    """The ``.cti`` files to load; DeviceDisconnected (one line: where it looked, what to install) if none."""
    environ = os.environ if environ is None else environ
    if isinstance(producer, str):
        producer = [producer]
    looked: list[str] = []
    if producer:
        places, origin = list(producer), "the producer setting"
    else:
        places, origin = _split_env(environ.get(ENV_VAR, "")), f"${ENV_VAR}"
    found: list[Path] = []
    for place in places:
        if place == SIMULATED_PRODUCER:
            path = simulated_producer_path()
            looked.append(f"{place} (the genicam wheel)")
            if path is None:
                raise DeviceMisconfigured(f"{SIMULATED_PRODUCER} names the simulated producer of the genicam wheel, "
                                          "which is not installed", device="camera", hint=EXTRA_HINT)
            found.append(path)
            continue
        path = Path(place).expanduser()
        looked.append(str(path) if path.exists() else f"{path} (does not exist)")
        if path.is_dir():
            found.extend(sorted(p for p in path.iterdir() if p.suffix.lower() == ".cti" and p.is_file()))
        elif path.is_file():
            if path.suffix.lower() != ".cti":
                raise DeviceMisconfigured(f"producer {path} is not a GenTL producer (.cti file)", device="camera",
                                          hint="give the maker's .cti file or the folder holding it")
            found.append(path)
    if not found:
        if looked:
            where = f"none in {', '.join(looked)} (from {origin})"
        else:
            where = f"no producer setting, and ${ENV_VAR} is not set"
        raise DeviceDisconnected(
            f"no GenTL producer (.cti) found: {where}", device="camera",
            hint=f"install your camera maker's GenTL producer (its SDK or driver package) and set {ENV_VAR} "
            f"to its folder or give producer = \"/path/to/producer.cti\"; to try without a camera: "
            f"producer = \"{SIMULATED_PRODUCER}\"")
    unique: list[Path] = []
    for p in found:
        if p.resolve() not in [u.resolve() for u in unique]:
            unique.append(p)
    return unique


@dataclass(frozen=True)
class CameraInfo:
    """One camera a producer sees (strings empty where the producer does not say)."""

    producer: str
    id: str
    vendor: str
    model: str
    serial: str
    user_name: str
    transport: str
    access: str

    def config_line(self) -> str:
        """The camera table line that opens this camera (serial when unique, else the device id)."""
        return f'device = "{self.serial or self.id}"'

    def to_dict(self) -> dict:
        return asdict(self)


def _info(obj, name: str) -> str:
    try:
        value = getattr(obj, name)
    except Exception:  # noqa: BLE001 - producers raise NotAvailable for what they do not report
        return ""
    return "" if value is None else str(value)


def camera_infos(harvester) -> list[CameraInfo]:
    """CameraInfo for every entry of an updated Harvester's device list (same order)."""
    out = []
    for d in harvester.device_info_list:
        out.append(CameraInfo("", _info(d, "id_"), _info(d, "vendor"), _info(d, "model"),
                              _info(d, "serial_number"), _info(d, "user_defined_name"), _info(d, "tl_type"),
                              _access_text(_info(d, "access_status"))))
    return out


def _access_text(code: str) -> str:
    # GenTL DEVICE_ACCESS_STATUS (GenICam GenTL standard 1.6, DEVICE_ACCESS_STATUS_LIST)
    return {"0": "unknown", "1": "free", "2": "read-only", "3": "no access", "4": "busy",
            "5": "open (read/write)", "6": "open (read-only)"}.get(code, code)


def check_producer_loads(cti: Path) -> None:
    """DeviceMisconfigured when the GenTL producer cannot be loaded (the consumer would only skip it)."""
    from genicam.gentl import GenTLProducer, LoadLibraryException  # noqa: PLC0415

    producer = GenTLProducer.create_producer()
    try:
        producer.open(str(cti))
    except LoadLibraryException as exc:  # (already loaded in this process: "in use", which is fine)
        text = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
        raise DeviceMisconfigured(f"the GenTL producer {cti} cannot be loaded: {text}", device="camera",
                                  hint="reinstall the camera maker's producer (a 64-bit .cti for this system), "
                                  "or name another one") from None
    except Exception:  # noqa: BLE001 - loaded, or a fault the consumer reports when it opens the producer
        return
    with contextlib.suppress(Exception):
        producer.close()


def list_cameras(producers: list[Path]) -> list[CameraInfo]:
    """Every camera each producer sees, loading one producer at a time (its path in ``producer``)."""
    Harvester = import_harvesters()
    out: list[CameraInfo] = []
    for cti in producers:
        check_producer_loads(cti)
        h = Harvester()
        try:
            h.add_file(str(cti))
            h.update()
            out.extend(CameraInfo(**{**c.to_dict(), "producer": str(cti)}) for c in camera_infos(h))
        finally:
            h.reset()
    return out


def choose_camera(cameras: list[CameraInfo], device: str | None) -> int:
    """Index of the camera named by ``device`` (serial, user-defined name or device id).

    None and exactly one camera: that one. Otherwise DeviceDisconnected (none there) or
    DeviceMisconfigured listing the cameras, so the user can copy the right line."""
    listing = "; ".join(f"{c.vendor} {c.model} serial {c.serial or '?'}"
                        + (f" name {c.user_name!r}" if c.user_name else "") + f" id {c.id}" for c in cameras)
    if not cameras:
        raise DeviceDisconnected(
            "the GenTL producer sees no camera", device="camera",
            hint="check the camera's power and cable (and for GigE Vision that it is on the same subnet as this "
            "computer), and that no other program has it open (producers may leave an open camera out); "
            "'maskrun cameras' lists what each producer sees")
    if device is None:
        if len(cameras) == 1:
            return 0
        raise DeviceMisconfigured(f"{len(cameras)} cameras found and the config names none: {listing}",
                                  device="camera", hint="set device = \"SERIAL\" (or user name, or device id) in "
                                  "[camera.settings]; 'maskrun cameras' prints the line for each")
    for field in ("serial", "user_name", "id"):
        hits = [i for i, c in enumerate(cameras) if getattr(c, field) == device]
        if len(hits) == 1:
            return hits[0]
        if len(hits) > 1:
            raise DeviceMisconfigured(f"device {device!r} matches {len(hits)} cameras by {field.replace('_', ' ')}: "
                                      f"{listing}", device="camera", hint="name the camera by its device id")
    raise DeviceDisconnected(f"no camera with serial, user name or id {device!r}; found: {listing}",
                             device="camera", hint="check the device setting against 'maskrun cameras', and the "
                             "camera's power and cable")
