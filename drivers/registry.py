"""The driver registry: drivers are found by name through Python entry points.

A package provides a driver by declaring an entry point in its pyproject.toml:

```toml
[project.entry-points."maskrun.cameras"]
my-camera = "my_package.my_module:MyCamera"
```

Groups: ``maskrun.cameras`` (kind "camera"), ``maskrun.modulators`` ("modulator"),
``maskrun.safety_boxes`` ("safety"). The class must subclass the matching base
(``maskrun.drivers.Camera`` / ``Modulator`` / ``SafetyBox``) and declare a pydantic
``Settings`` model (subclass of ``DriverSettings``).

An entry point that fails to import (missing module, missing optional dependency,
wrong base class) is skipped when listing, and ``broken_drivers`` says why; asking
for it by name raises ``DriverUnavailable`` with the reason.
"""

from __future__ import annotations

import inspect
import logging
from importlib.metadata import EntryPoint, entry_points
from typing import Any, NamedTuple

from pydantic import BaseModel, ValidationError

from .base import BenchContext, Camera, Device, Modulator, SafetyBox
from .errors import DriverSettingsError, UnknownDriver

__all__ = [
    "DRIVER_GROUPS",
    "DriverDescription",
    "DriverUnavailable",
    "broken_drivers",
    "build_driver",
    "describe_drivers",
    "installed_drivers",
    "load_driver",
    "settings_problems",
]

log = logging.getLogger(__name__)
_WARNED: set[tuple[str, str]] = set()

#: kind -> entry point group
DRIVER_GROUPS = {"camera": "maskrun.cameras", "modulator": "maskrun.modulators", "safety": "maskrun.safety_boxes"}
_BASES: dict[str, type[Device]] = {"camera": Camera, "modulator": Modulator, "safety": SafetyBox}


class DriverUnavailable(UnknownDriver):
    """A driver is registered under the name but cannot be loaded (``reason`` says why)."""

    def __init__(self, kind: str, name: str, target: str, reason: str, installed: list[str]):
        self.kind, self.name, self.installed = kind, name, installed
        self.target, self.reason = target, reason
        names = ", ".join(sorted(installed)) or "(none)"
        LookupError.__init__(
            self,
            f"{kind} driver {name!r} is registered ({target}) but cannot be loaded: {reason}; "
            f"install what it needs or pick another; loadable {kind} drivers: {names}",
        )


class DriverDescription(NamedTuple):
    """One line of ``maskrun drivers``: name, first line of the class docstring, JSON schema of its settings.

    For a driver that cannot be loaded, summary starts with 'unavailable:' and schema is {}.
    """

    name: str
    summary: str
    schema: dict


def _check_kind(kind: str) -> str:
    if kind not in DRIVER_GROUPS:
        raise ValueError(f"unknown driver kind {kind!r}; kinds are: {', '.join(DRIVER_GROUPS)}")
    return DRIVER_GROUPS[kind]


def _entry_points(kind: str) -> dict[str, EntryPoint]:
    group = _check_kind(kind)
    found: dict[str, EntryPoint] = {}
    for ep in entry_points(group=group):
        found.setdefault(ep.name, ep)  # first registration of a name wins
    return found


def _load(kind: str, ep: EntryPoint) -> type[Device]:
    """Import one entry point and check it is a proper driver class; raise ValueError with the reason."""
    try:
        cls = ep.load()
    except Exception as exc:  # noqa: BLE001 - any import failure makes the driver unavailable
        raise ValueError(f"{type(exc).__name__}: {exc}") from exc
    base = _BASES[kind]
    if not (inspect.isclass(cls) and issubclass(cls, base)):
        raise ValueError(f"{ep.value} is not a subclass of maskrun.drivers.{base.__name__}")
    if inspect.isabstract(cls):
        missing = ", ".join(sorted(cls.__abstractmethods__))
        raise ValueError(f"{ep.value} does not implement: {missing}")
    settings = getattr(cls, "Settings", None)
    if not (inspect.isclass(settings) and issubclass(settings, BaseModel)):
        raise ValueError(f"{ep.value} has no pydantic Settings model")
    return cls


def _scan(kind: str) -> tuple[dict[str, type[Device]], dict[str, tuple[str, str]]]:
    good: dict[str, type[Device]] = {}
    bad: dict[str, tuple[str, str]] = {}
    for name, ep in sorted(_entry_points(kind).items()):
        try:
            good[name] = _load(kind, ep)
        except ValueError as exc:
            bad[name] = (ep.value, str(exc))
            if (kind, name) not in _WARNED:  # say why once per process
                _WARNED.add((kind, name))
                log.warning("%s driver %r (%s) skipped: %s", kind, name, ep.value, exc)
    return good, bad


def installed_drivers(kind: str) -> dict[str, type[Device]]:
    """Loadable drivers of ``kind`` ('camera', 'modulator', 'safety'), name -> class, sorted by name."""
    return _scan(kind)[0]


def broken_drivers(kind: str) -> dict[str, str]:
    """Registered drivers of ``kind`` that cannot be loaded: name -> reason."""
    return {name: f"{target}: {reason}" for name, (target, reason) in _scan(kind)[1].items()}


def load_driver(kind: str, name: str) -> type[Device]:
    """The driver class registered as ``name``.

    Raises UnknownDriver (listing the installed drivers) if no such name is registered, or
    DriverUnavailable (a subclass of UnknownDriver) if it is registered but cannot be loaded.
    """
    eps = _entry_points(kind)
    ep = eps.get(name)
    if ep is None:
        raise UnknownDriver(kind, name, sorted(installed_drivers(kind)))
    try:
        return _load(kind, ep)
    except ValueError as exc:
        others = sorted(n for n in installed_drivers(kind) if n != name)
        raise DriverUnavailable(kind, name, ep.value, str(exc), others) from exc


def settings_problems(error: ValidationError, settings_model: type[BaseModel], prefix: str = "settings") -> list[tuple[str, str]]:
    """Turn a pydantic ValidationError into (key path, readable message) pairs."""
    known = sorted(settings_model.model_fields)
    problems: list[tuple[str, str]] = []
    for err in error.errors(include_url=False):
        loc = [str(p) for p in err.get("loc", ())]
        path = ".".join([prefix, *loc]) if prefix else ".".join(loc)
        kind = err.get("type", "")
        if kind == "extra_forbidden":
            message = f"unknown setting; known settings here: {', '.join(known) if len(loc) == 1 else 'see maskrun drivers'}"
        elif kind == "missing":
            message = "required setting is missing"
        else:
            message = err.get("msg", "invalid value")
            if message.startswith("Value error, "):
                message = message[len("Value error, "):]
            if "input" in err and not isinstance(err["input"], (dict, list)):
                message += f" (got {err['input']!r})"
        problems.append((path or prefix, message))
    return problems


def build_driver(kind: str, name: str, settings: dict[str, Any] | None, context: BenchContext | None = None,
                 *, path_prefix: str = "settings") -> Device:
    """Look up driver ``name``, validate ``settings`` with its Settings model and construct it (no I/O).

    Raises UnknownDriver / DriverUnavailable for a bad name, DriverSettingsError with
    (key path, message) pairs such as ('settings.exposure_s', 'Input should be greater than 0 (got -1)')
    for bad settings. ``path_prefix`` is put in front of each key path.
    """
    cls = load_driver(kind, name)
    try:
        validated = cls.Settings.model_validate(dict(settings or {}))
    except ValidationError as exc:
        raise DriverSettingsError(kind, name, settings_problems(exc, cls.Settings, path_prefix)) from None
    return cls(validated, context or BenchContext())


def _summary(cls: type) -> str:
    doc = inspect.getdoc(cls) or ""
    return doc.strip().splitlines()[0] if doc.strip() else cls.__name__


def describe_drivers(kind: str) -> list[DriverDescription]:
    """Every registered driver of ``kind``: (name, summary, JSON schema of its settings), sorted by name."""
    good, bad = _scan(kind)
    out = [DriverDescription(name, _summary(cls), cls.Settings.model_json_schema()) for name, cls in good.items()]
    out += [DriverDescription(name, f"unavailable: {reason} ({target})", {}) for name, (target, reason) in bad.items()]
    return sorted(out, key=lambda d: d.name)
