"""In-process simulated modulator: drives the simulated bench (``context.optics``) directly.

No pseudo-terminal, no protocol: for fast unit tests and demos. ``show(k)`` sets
``optics.shown_mask = k``; the mask counts as in place ``settle_s`` after that, and then a
pulse goes out on the optics trigger line (if ``trigger_output``), so a camera in hardware
trigger mode exposes once per shown mask. Without a simulated bench (``context.optics`` is
None) it only keeps its own state, so it can still be exercised alone.
"""

from __future__ import annotations

import threading
import time

import numpy as np
from pydantic import Field

from maskrun.drivers.base import DriverSettings, Modulator
from maskrun.drivers.errors import DeviceDisconnected, DeviceMisconfigured

__all__ = ["SimulatedModulator"]


class SimulatedModulator(Modulator):
    """A modulator simulated in-process on the simulated bench."""

    class Settings(DriverSettings):
        settle_s: float = Field(default=0.0, ge=0, description="time after show() before the mask is in place, s")
        trigger_output: bool = Field(default=True, description="pulse the trigger line once a mask is in place")

    def __init__(self, settings, context=None):
        super().__init__(settings, context)
        self._is_open = False
        self._count: int | None = None
        self._shown_at = -float("inf")
        self._timer: threading.Timer | None = None
        self.shown: int | None = None

    def open(self) -> None:
        self._is_open = True

    def close(self) -> None:
        self._is_open = False
        timer, self._timer = self._timer, None
        if timer is not None:
            timer.cancel()

    def _check_open(self) -> None:
        if not self._is_open:
            raise DeviceDisconnected("the simulated modulator is not open", device="modulator",
                                     hint="open the modulator first")

    def load(self, masks: np.ndarray) -> None:
        self._check_open()
        masks = np.asarray(masks)
        if masks.ndim != 3 or masks.shape[0] < 1:
            raise DeviceMisconfigured(f"mask set must have shape (K, H, W) with K >= 1, got {masks.shape}",
                                      device="modulator")
        optics = self.context.optics
        if optics is not None:
            if tuple(masks.shape[1:]) != tuple(optics.grid_shape):
                raise DeviceMisconfigured(
                    f"masks are {masks.shape[1]} x {masks.shape[2]} but the simulated bench's grid is "
                    f"{optics.grid_shape[0]} x {optics.grid_shape[1]}",
                    device="modulator", hint="make the run's grid shape match [simulation] grid_shape")
            current = optics.masks
            if current.shape != masks.shape or not np.array_equal(current, masks):
                optics.set_masks(masks)
        self._count = int(masks.shape[0])

    def show(self, index: int) -> None:
        self._check_open()
        index = int(index)
        if self._count is None:
            raise DeviceMisconfigured("no masks loaded", device="modulator", hint="call load(masks) before show()")
        if not 0 <= index < self._count:
            raise DeviceMisconfigured(f"mask {index} outside 0..{self._count - 1}", device="modulator")
        optics = self.context.optics
        if self._timer is not None:
            self._timer.cancel()
            self._timer = None
        if optics is not None:
            optics.shown_mask = index
        self.shown = index
        self._shown_at = time.monotonic()
        if optics is not None and self.settings.trigger_output:
            if self.settings.settle_s <= 0:
                optics.fire_trigger()
            else:
                self._timer = threading.Timer(self.settings.settle_s, optics.fire_trigger)
                self._timer.daemon = True
                self._timer.start()

    @property
    def settle_s(self) -> float:
        return float(self.settings.settle_s)

    def ready(self) -> bool:
        self._check_open()
        return time.monotonic() - self._shown_at >= self.settings.settle_s
