"""Single frames for the bench-calibration verbs (modulator response, mask registration): show something
on the modulator, wait until it is in place, trigger, grab, check saturation. The run sequencer has its own
loop with retries and the run file; these verbs take a few hundred frames and stop at the first fault,
closing the shutter (the caller's ``finally``)."""

from __future__ import annotations

import time
from typing import Callable

import numpy as np

from maskrun.drivers import DeviceTimeout

from maskrun.daemon.acquire.bench import Bench


class SaturatedFrames(RuntimeError):
    """Too many saturated pixels for a measurement; the message says how to fix it."""


def open_shutter_checked(bench: Bench) -> None:
    """Open the shutter, refusing while the interlock reads open."""
    from maskrun.daemon.errors import CommandError

    if not bench.safety.interlock_closed():
        raise CommandError("interlock reads OPEN: close the enclosure/door interlock first (the shutter stays closed)")
    bench.safety.open_shutter()


def wait_in_place(bench: Bench, timeout_s: float = 5.0) -> None:
    """After a show: the modulator's settle time, then until it reports ready (DeviceTimeout past timeout_s)."""
    mod = bench.modulator
    if mod.settle_s > 0:
        time.sleep(mod.settle_s)
    deadline = time.monotonic() + timeout_s
    while not mod.ready():
        if time.monotonic() > deadline:
            raise DeviceTimeout(f"the modulator did not report the image in place within {timeout_s:g} s",
                                device="modulator", hint="check its settle time and connection")
        time.sleep(0.001)


def check_light_path(bench: Bench) -> None:
    """Before each lit frame: the interlock still reads closed and the shutter open (a fault closed it?).
    Talking to the safety box also keeps its watchdog from closing the shutter during a long series."""
    from maskrun.drivers import DeviceFault

    if not bench.safety.interlock_closed():
        raise DeviceFault("the interlock opened during the measurement", device="safety",
                          hint="the shutter is closed; close the enclosure and measure again")
    if not bench.safety.shutter_is_open():
        raise DeviceFault("the shutter closed during the measurement (the safety box closed it)", device="safety",
                          hint="check the safety box (watchdog, interlock) and measure again")


def saturated_pixels(bench: Bench, pixels: np.ndarray) -> np.ndarray:
    """Boolean map of the pixels at or above the saturation level ([checks] saturation_level of the ADC maximum)."""
    return pixels >= bench.config.checks.saturation_level * bench.camera.max_dn


def grab_frame(bench: Bench, exposure_s: float, check_saturation: bool = True) -> np.ndarray:
    """One frame (float64, sensor ROI as delivered: zero frequency in the centre), saturation checked."""
    cam = bench.camera
    cam.trigger()
    frame = cam.grab(exposure_s + bench.config.camera.grab_timeout_s)
    pixels = np.asarray(frame.pixels, dtype=np.float64)
    checks = bench.config.checks
    saturated = float(np.mean(saturated_pixels(bench, pixels))) if check_saturation else 0.0
    if saturated > checks.max_saturated_fraction:
        raise SaturatedFrames(f"{100 * saturated:.2f} % of the pixels are saturated (limit "
                              f"{100 * checks.max_saturated_fraction:.2f} %, [checks] max_saturated_fraction): "
                              f"use a shorter exposure than {exposure_s:g} s (--exposure-s) or less light")
    return pixels


def frame_after(bench: Bench, show: Callable[[], None], exposure_s: float, check_saturation: bool = True) -> np.ndarray:
    """Show (a callable that puts the image on the modulator), wait until in place, grab one lit frame."""
    show()
    wait_in_place(bench)
    check_light_path(bench)
    return grab_frame(bench, exposure_s, check_saturation)


def to_grid(bench: Bench, pixels: np.ndarray, dark: np.ndarray | float = 0.0) -> np.ndarray:
    """Camera frame -> detected electrons in the reconstruction's grid convention (ifftshift, float64)."""
    e = bench.response.electrons(pixels, dark, getattr(bench, "flat_field", None)).astype(np.float64)
    return np.fft.ifftshift(e)
