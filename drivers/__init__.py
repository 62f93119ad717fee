"""Device interfaces, the driver registry and the built-in drivers.

Third-party drivers subclass these and register under an entry point group
(``maskrun.cameras``, ``maskrun.modulators``, ``maskrun.safety_boxes``).
"""

from .base import BenchContext, Camera, Device, DriverSettings, Frame, Modulator, SafetyBox, TriggerMode
from .errors import (
    DeviceDisconnected,
    DeviceError,
    DeviceFault,
    DeviceMisconfigured,
    DeviceTimeout,
    DriverSettingsError,
    UnknownDriver,
)

__all__ = [
    "BenchContext",
    "Camera",
    "Device",
    "DeviceDisconnected",
    "DeviceError",
    "DeviceFault",
    "DeviceMisconfigured",
    "DeviceTimeout",
    "DriverSettings",
    "DriverSettingsError",
    "Frame",
    "Modulator",
    "SafetyBox",
    "TriggerMode",
    "UnknownDriver",
]
