"""In-process simulated modulator: drives the simulated bench (``context.optics``) directly.

No pseudo-terminal, no protocol: for fast unit tests and demos. ``show(k)`` sets
``optics.shown_mask = k``; the mask counts as in place ``settle_s`` after that, and then a
pulse goes out on the optics trigger line (if ``trigger_output``), so a camera in hardware
trigger mode exposes once per shown mask. Without a simulated bench (``context.optics`` is
None) it only keeps its own state, so it can still be exercised alone.

A phase SLM with a response that is not the nominal one: when the bench has a TRUE response
(``optics.slm_response``, from ``[simulation] modulator_response``), the modulator does what a
display-driven SLM does. It turns each mask's phase into a grey level through the table maskrun
believes (``[modulator] profile`` via ``context.modulator_profile``, else the nominal linear table
``grey_levels_per_2pi``), and the field then gets the phase of that grey level through the TRUE
curve (amplitudes are kept). ``show_grey`` shows a raw grey image through the true curve.
"""

from __future__ import annotations

import threading
import time

import numpy as np
from pydantic import Field

from maskrun.drivers.base import DriverSettings, Modulator
from maskrun.drivers.errors import DeviceDisconnected, DeviceMisconfigured
from maskrun.drivers.modulator_profile import ModulatorProfile, ModulatorProfileError, linear_profile

__all__ = ["SimulatedModulator", "true_response_profile"]


def true_response_profile(grey_levels_per_2pi: float, curvature: float = 0.0, levels: int = 256,
                          wavelength_m: float = 632.8e-9) -> ModulatorProfile:
    """The simulated SLM's true table: phase(g) = 2 pi u (1 + curvature (1 - u)), u = g / grey_levels_per_2pi.

    2 pi is reached at ``grey_levels_per_2pi`` whatever the curvature; curvature 0 is linear. A bowed,
    gamma-like curve of this kind is what liquid-crystal SLMs show before their look-up table is
    corrected (common practice, no source)."""
    g = np.arange(int(levels), dtype=np.float64)
    u = g / float(grey_levels_per_2pi)
    phase = 2 * np.pi * u * (1.0 + float(curvature) * (1.0 - u))
    return ModulatorProfile(wavelength_m=float(wavelength_m), grey_levels=g.astype(int).tolist(),
                            phase_rad=phase.tolist(), measured=False,
                            method=f"simulated truth: 2 pi at grey {grey_levels_per_2pi:g}, curvature {curvature:g}")


class SimulatedModulator(Modulator):
    """A modulator simulated in-process on the simulated bench."""

    class Settings(DriverSettings):
        settle_s: float = Field(default=0.0, ge=0, description="time after show() before the mask is in place, s")
        trigger_output: bool = Field(default=True, description="pulse the trigger line once a mask is in place")
        grey_levels_per_2pi: float = Field(
            default=256.0, gt=1, description="nominal response (used without [modulator] profile): phase = "
            "2 pi grey / grey_levels_per_2pi; matters only when the simulated SLM has a true response")
        grey_levels: int = Field(default=256, ge=2, le=65536, description="grey levels of the nominal table")

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

    # ------------------------------------------------------------ response
    @property
    def believed_response(self) -> ModulatorProfile:
        """The grey level -> phase table this device drives its grey levels with (what maskrun knows)."""
        if self.context.modulator_profile is not None:
            return self.context.modulator_profile
        # the wavelength does not enter the nominal mapping; the table is never written out
        return linear_profile(self.settings.grey_levels_per_2pi, 632.8e-9, levels=self.settings.grey_levels)

    def _true_response(self) -> ModulatorProfile | None:
        optics = self.context.optics
        return getattr(optics, "slm_response", None) if optics is not None else None

    def _phase_of_grey(self, grey: np.ndarray) -> np.ndarray:
        table = self._true_response() or self.believed_response
        try:
            return table.phase_of_grey(grey)
        except ModulatorProfileError:
            raise DeviceMisconfigured(
                f"grey levels {int(grey.min())}..{int(grey.max())} are not all levels the simulated SLM accepts "
                f"({table.grey_levels[0]}..{table.grey_levels[-1]})", device="modulator",
                hint="make the modulator profile's grey levels match the device's") from None

    def as_imposed(self, masks: np.ndarray) -> np.ndarray:
        """What the field gets when this device is asked for ``masks`` (complex (K, H, W))."""
        if self._true_response() is None:
            if self.context.modulator_profile is None:
                return masks  # an ideal modulator
            return self.context.modulator_profile.impose(masks)  # a device whose response is the profile
        grey = self.believed_response.grey_for_phase(np.angle(masks))
        return np.abs(masks) * np.exp(1j * self._phase_of_grey(grey))

    # ------------------------------------------------------------ masks
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
            shown = self.as_imposed(masks)
            current = optics.masks
            if current.shape != shown.shape or not np.array_equal(current, shown):
                optics.set_masks(shown)
        self._count = int(masks.shape[0])

    def show(self, index: int) -> None:
        self._check_open()
        index = int(index)
        if self._count is None:
            raise DeviceMisconfigured("no masks loaded", device="modulator", hint="call load(masks) before show()")
        if not 0 <= index < self._count:
            raise DeviceMisconfigured(f"mask {index} outside 0..{self._count - 1}", device="modulator")
        optics = self.context.optics
        self._cancel_timer()
        if optics is not None:
            optics.shown_mask = index
        self.shown = index
        self._shown()

    def show_grey(self, grey: np.ndarray) -> None:
        """Show a raw grey image (H, W) through the device's (true) response; see ``Modulator.show_grey``."""
        self._check_open()
        grey = np.asarray(grey)
        if grey.ndim != 2 or not np.issubdtype(grey.dtype, np.integer):
            raise DeviceMisconfigured(f"a grey image must be a 2-D integer array, got {grey.dtype} {grey.shape}",
                                      device="modulator")
        optics = self.context.optics
        if optics is not None and tuple(grey.shape) != tuple(optics.grid_shape):
            raise DeviceMisconfigured(f"grey image is {grey.shape[0]} x {grey.shape[1]} but the grid is "
                                      f"{optics.grid_shape[0]} x {optics.grid_shape[1]}", device="modulator")
        phase = self._phase_of_grey(grey)
        self._cancel_timer()
        if optics is not None:
            optics.show_image(np.exp(1j * phase))
        self.shown = None
        self._shown()

    def _cancel_timer(self) -> None:
        if self._timer is not None:
            self._timer.cancel()
            self._timer = None

    def _shown(self) -> None:
        optics = self.context.optics
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
