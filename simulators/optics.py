"""The simulated optical bench shared by all simulated devices.

One ``SimulatedOptics`` object is the "world" of a simulated bench: the
sample, the mask set, the laser power, the state of the beam shutter, of the
interlock chain and of the modulator, and the hardware trigger line between
the modulator and the camera. Firmware threads (``simulators.firmware``) and
in-process drivers write it; the simulated camera reads it. Every piece of
state is protected by one lock, so it can be shared between threads.

Physics (far field, Fraunhofer): with mask k shown, the detector sees the
intensity ``|F(m_k * x)|^2`` where F is the unitary 2-D DFT (``norm='ortho'``)
and x the field leaving the sample on the reconstruction grid. On the sensor
the pattern is drawn with the zero frequency in the middle (``fftshift``) and
placed in the centred region ``grid_roi``; pixels outside receive no light.

Convention shared with the reconstruction: cropping ``grid_roi`` from a
frame and applying ``np.fft.ifftshift`` gives back ``y_k = |F(m_k * x)|^2``
in the unshifted layout that ``maskrun.reconstruct`` uses, and
``truth_field()`` is the x for which that y_k is in incident photons per
second.
"""

from __future__ import annotations

import threading
import time
from typing import Callable

import numpy as np

__all__ = ["SimulatedOptics", "CUSTOM_IMAGE"]

#: ``shown_mask`` value while the modulator shows an image outside the mask set (``show_image``).
CUSTOM_IMAGE = -1

StateListener = Callable[[str, object], None]


class SimulatedOptics:
    """The simulated bench: sample, masks, laser, shutter, interlock, modulator state, trigger line.

    sample: complex (H, W) field leaving the sample on the reconstruction grid (any scale).
    masks: complex (K, H, W) mask set the modulator can show.
    photon_rate_per_s: incident photons per second reaching the detector with the
        shutter open, averaged over the K masks (the sample is rescaled so that
        ``mean_k sum_pixels |F(m_k x)|^2 == photon_rate_per_s``; for unit-energy
        masks this is the photon rate with a blank mask too).
    sensor_shape: (rows, cols) of the camera sensor; must be at least the grid shape.
    mask_offset_px: (rows, cols) displacement of the modulator image on the field, in grid
        pixels: a misregistered modulator. The masks given are the designed ones; the field
        sees ``maskrun.reconstruct.masks.shift_masks(masks, mask_offset_px)``. (0, 0) = registered.
    slm_response: the simulated SLM's TRUE grey level -> phase table (a ``ModulatorProfile``), or None
        (the modulator imposes what it is given). The optics only carries it; the simulated modulator
        (``simulators.modulator``) turns the grey levels it is driven with into phases through it.

    State (properties, lock-protected): ``shutter_open`` (False at start),
    ``interlock_closed`` (True at start = doors shut, safe), ``shown_mask``
    (None at start = blank, all-ones mask).

    Listeners registered with ``subscribe`` are called as ``listener(name, value)``
    after a state change (outside the lock); the safety firmware uses this to
    close the shutter the moment the interlock opens.
    """

    def __init__(self, sample, masks, photon_rate_per_s: float, sensor_shape, mask_offset_px=(0.0, 0.0),
                 slm_response=None):
        sample = np.asarray(sample)
        masks = np.asarray(masks)
        if sample.ndim != 2:
            raise ValueError(f"sample must be a 2-D complex field (H, W), got shape {sample.shape}")
        if masks.ndim != 3 or masks.shape[1:] != sample.shape:
            raise ValueError(
                f"masks must have shape (K, H, W) = (K, {sample.shape[0]}, {sample.shape[1]}) "
                f"to match the sample, got {masks.shape}"
            )
        if masks.shape[0] < 1:
            raise ValueError("masks must hold at least one mask (K >= 1)")
        rate = float(photon_rate_per_s)
        if not np.isfinite(rate) or rate < 0:
            raise ValueError(f"photon_rate_per_s must be a finite number >= 0, got {photon_rate_per_s!r}")
        sensor = tuple(int(s) for s in sensor_shape)
        if len(sensor) != 2:
            raise ValueError(f"sensor_shape must be (rows, cols), got {sensor_shape!r}")
        if sensor[0] < sample.shape[0] or sensor[1] < sample.shape[1]:
            raise ValueError(
                f"sensor_shape {sensor} is smaller than the grid shape {tuple(sample.shape)}: "
                "the sensor must be at least as large as the reconstruction grid in both directions"
            )
        self._lock = threading.RLock()
        self._trigger = threading.Condition(threading.Lock())
        self._pending_triggers = 0
        self._triggers_fired = 0
        self._listeners: list[StateListener] = []
        self._grid_shape = (int(sample.shape[0]), int(sample.shape[1]))
        self._sensor_shape = sensor
        self._photon_rate_per_s = rate
        self._mask_offset_px = (float(mask_offset_px[0]), float(mask_offset_px[1]))
        self.slm_response = slm_response
        self._masks = self._landed(masks)
        self._sample = sample.astype(np.complex128, copy=True)
        self._scale = self._compute_scale()
        self._patterns: dict[int | None, np.ndarray] = {}
        self._shutter_open = False
        self._interlock_closed = True
        self._shown_mask: int | None = None
        self._shared = None  # SharedBenchState when the firmware runs in its own processes
        self._triggers_consumed = 0
        self._custom: np.ndarray | None = None

    def attach_shared(self, shared) -> None:
        """Keep the shutter, interlock, shown mask and trigger line in ``shared`` (a
        simulators.shared_state.SharedBenchState), where firmware processes read and change them."""
        with self._lock:
            shared.shutter_open = self._shutter_open
            shared.interlock_closed = self._interlock_closed
            shared.shown_mask = self._shown_mask
            self._triggers_consumed = shared.triggers_fired
            self._shared = shared

    # ------------------------------------------------------------ geometry
    @property
    def grid_shape(self) -> tuple[int, int]:
        """(H, W) of the reconstruction grid."""
        return self._grid_shape

    @property
    def sensor_shape(self) -> tuple[int, int]:
        """(rows, cols) of the sensor."""
        return self._sensor_shape

    @property
    def mask_count(self) -> int:
        """K, the number of masks in the set."""
        with self._lock:
            return int(self._masks.shape[0])

    @property
    def photon_rate_per_s(self) -> float:
        return self._photon_rate_per_s

    @property
    def grid_roi(self) -> tuple[int, int, int, int]:
        """(row0, col0, rows, cols): the centred sensor region where the diffraction pattern lands."""
        h, w = self._grid_shape
        rows, cols = self._sensor_shape
        return ((rows - h) // 2, (cols - w) // 2, h, w)

    # --------------------------------------------------------------- state
    def subscribe(self, listener: StateListener) -> Callable[[], None]:
        """Call ``listener(name, value)`` after each state change; returns an unsubscribe function."""
        with self._lock:
            self._listeners.append(listener)

        def unsubscribe() -> None:
            with self._lock:
                if listener in self._listeners:
                    self._listeners.remove(listener)

        return unsubscribe

    def _set(self, name: str, value) -> None:
        with self._lock:
            changed = self._get(name) != value
            setattr(self, "_" + name, value)
            if self._shared is not None:
                setattr(self._shared, name, value)
            listeners = list(self._listeners) if changed else []
        for listener in listeners:
            listener(name, value)

    def _get(self, name: str):
        return getattr(self._shared if self._shared is not None else self, ("" if self._shared is not None else "_")
                       + name)

    @property
    def shutter_open(self) -> bool:
        with self._lock:
            return self._get("shutter_open")

    @shutter_open.setter
    def shutter_open(self, value: bool) -> None:
        self._set("shutter_open", bool(value))

    @property
    def interlock_closed(self) -> bool:
        """True while the interlock chain is complete (doors shut): the only state in which light may pass."""
        with self._lock:
            return self._get("interlock_closed")

    @interlock_closed.setter
    def interlock_closed(self, value: bool) -> None:
        self._set("interlock_closed", bool(value))

    @property
    def shown_mask(self) -> int | None:
        """Index of the mask on the modulator, or None for a blank (all-ones) mask."""
        with self._lock:
            return self._get("shown_mask")

    @shown_mask.setter
    def shown_mask(self, value: int | None) -> None:
        if value is not None:
            value = int(value)
            if value == CUSTOM_IMAGE and self._custom is None:
                raise ValueError("no custom image to show: use show_image(mask) first")
            if value != CUSTOM_IMAGE and not 0 <= value < self.mask_count:
                raise ValueError(f"mask index {value} out of range 0..{self.mask_count - 1}")
        self._set("shown_mask", value)

    # -------------------------------------------------------- sample/masks
    def _compute_scale(self) -> float:
        """Factor s so that mean_k sum |F(m_k (sqrt(s) x))|^2 = photon rate (F unitary: = sum |m_k x|^2)."""
        energy = np.mean(np.sum(np.abs(self._masks * self._sample[None]) ** 2, axis=(1, 2)))
        if energy <= 0:
            return 0.0
        return self._photon_rate_per_s / float(energy)

    @property
    def sample(self) -> np.ndarray:
        """A copy of the sample field as given (not rescaled)."""
        with self._lock:
            return self._sample.copy()

    def set_sample(self, field, *, rescale: bool = True) -> None:
        """Replace the sample (same grid shape).

        rescale=True (default) rescales so the mean photon rate stays ``photon_rate_per_s``;
        rescale=False keeps the current scale factor (laser power fixed: a darker sample
        then sends fewer photons, as on a real bench).
        """
        field = np.asarray(field)
        if field.shape != self._grid_shape:
            raise ValueError(f"sample shape {field.shape} does not match the grid shape {self._grid_shape}")
        with self._lock:
            self._sample = field.astype(np.complex128, copy=True)
            if rescale:
                self._scale = self._compute_scale()
            self._patterns.clear()

    def _landed(self, masks) -> np.ndarray:
        """The masks as they land on the field (the designed ones shifted by the offset)."""
        if self._mask_offset_px == (0.0, 0.0):
            return np.asarray(masks).astype(np.complex128, copy=True)
        from maskrun.reconstruct.masks import shift_masks

        return shift_masks(masks, self._mask_offset_px)

    @property
    def mask_offset_px(self) -> tuple[float, float]:
        """(rows, cols) displacement of the modulator image on the field (the simulated truth)."""
        return self._mask_offset_px

    @property
    def masks(self) -> np.ndarray:
        """The masks as they land on the field (designed masks shifted by ``mask_offset_px``)."""
        with self._lock:
            return self._masks.copy()

    def set_masks(self, masks) -> None:
        """Replace the mask set (same grid shape; K may change). Rescales to keep the mean photon rate."""
        masks = np.asarray(masks)
        if masks.ndim != 3 or masks.shape[1:] != self._grid_shape or masks.shape[0] < 1:
            raise ValueError(f"masks must have shape (K, {self._grid_shape[0]}, {self._grid_shape[1]}), got {masks.shape}")
        with self._lock:
            self._masks = self._landed(masks)
            self._scale = self._compute_scale()
            self._patterns.clear()
            if self._shown_mask is not None and self._shown_mask >= masks.shape[0]:
                self._shown_mask = None

    def show_image(self, mask) -> None:
        """Put one complex (H, W) modulator image outside the mask set on the field (it lands displaced by
        ``mask_offset_px`` like the masks); ``shown_mask`` becomes ``CUSTOM_IMAGE``. The photon scale is
        the mask set's (same laser power), so a unit-modulus image sends the same photons as phase masks."""
        mask = np.asarray(mask)
        if mask.shape != self._grid_shape:
            raise ValueError(f"image shape {mask.shape} does not match the grid shape {self._grid_shape}")
        landed = self._landed(mask[None])[0]
        with self._lock:
            self._custom = landed
            self._patterns.pop(CUSTOM_IMAGE, None)
        self._set("shown_mask", CUSTOM_IMAGE)

    def truth_field(self) -> np.ndarray:
        """The sample in units of sqrt(photons/s) (complex128, grid shape).

        ``sum(|F(m_k * truth)|^2)`` is the incident photon rate with mask k, and
        ``|F(m_k * truth)|^2 * exposure_s`` is what ``expected_photons`` places (fftshifted)
        in ``grid_roi``.
        """
        with self._lock:
            return self._sample * np.sqrt(self._scale)

    # ------------------------------------------------------------- photons
    def _pattern_per_s(self, mask: int | None) -> np.ndarray:
        """Fftshifted photon rate per grid pixel for one mask (cached; caller holds the lock)."""
        pattern = self._patterns.get(mask)
        if pattern is None:
            if mask is None:
                field = self._sample
            elif mask == CUSTOM_IMAGE:
                field = self._custom * self._sample
            else:
                field = self._masks[mask] * self._sample
            pattern = np.abs(np.fft.fft2(field, norm="ortho")) ** 2
            pattern *= self._scale
            pattern = np.fft.fftshift(pattern)
            pattern.setflags(write=False)
            self._patterns[mask] = pattern
        return pattern

    def light_now(self) -> np.ndarray | None:
        """The photon rate per grid pixel (fftshifted, read-only, cached) for the light at this moment,
        or None while the shutter is closed. ``expected_photons`` is this times the exposure, placed in
        ``grid_roi``. The array is replaced (a new object) when the sample or the masks change, so
        its identity can key a cache (the fast simulated camera does)."""
        with self._lock:
            return self._pattern_per_s(self._shown_mask) if self._shutter_open else None

    def expected_photons(self, exposure_s: float, out: np.ndarray | None = None) -> np.ndarray:
        """Incident photons per sensor pixel during an exposure (float64, sensor_shape).

        Zeros when the shutter is closed; otherwise the fftshifted pattern of the shown
        mask (blank mask if none) times ``exposure_s`` in ``grid_roi``, zero elsewhere.
        ``out`` (float64, sensor_shape) may be given to avoid an allocation.
        """
        exposure_s = float(exposure_s)
        if not np.isfinite(exposure_s) or exposure_s < 0:
            raise ValueError(f"exposure_s must be a finite time >= 0 seconds, got {exposure_s}")
        if out is None:
            out = np.zeros(self._sensor_shape, dtype=np.float64)
        else:
            if out.shape != self._sensor_shape or out.dtype != np.float64:
                raise ValueError(f"out must be float64 of shape {self._sensor_shape}")
            out.fill(0.0)
        with self._lock:
            if not self._get("shutter_open"):
                return out
            pattern = self._pattern_per_s(self._get("shown_mask"))
        r0, c0, h, w = self.grid_roi
        np.multiply(pattern, exposure_s, out=out[r0 : r0 + h, c0 : c0 + w])
        return out

    # -------------------------------------------------------- trigger line
    def fire_trigger(self) -> None:
        """Send one pulse on the trigger line. Pulses are latched until a camera consumes them."""
        with self._trigger:
            self._pending_triggers += 1
            self._triggers_fired += 1
            self._trigger.notify_all()

    def wait_trigger(self, timeout_s: float) -> bool:
        """Wait for (and consume) one trigger pulse; False if none arrives within timeout_s."""
        if self._shared is not None:  # the pulses come from the modulator's process: watch its counter
            deadline = time.monotonic() + max(0.0, float(timeout_s))
            while True:
                with self._trigger:
                    if self._shared.triggers_fired > self._triggers_consumed:
                        self._triggers_consumed += 1
                        return True
                if time.monotonic() >= deadline:
                    return False
                time.sleep(0.0005)
        with self._trigger:
            ok = self._trigger.wait_for(lambda: self._pending_triggers > 0, timeout=max(0.0, float(timeout_s)))
            if ok:
                self._pending_triggers -= 1
            return bool(ok)

    def clear_triggers(self) -> int:
        """Drop latched trigger pulses (a camera does this when it is armed); returns how many."""
        with self._trigger:
            if self._shared is not None:
                fired = self._shared.triggers_fired
                n, self._triggers_consumed = fired - self._triggers_consumed, fired
                return n
            n, self._pending_triggers = self._pending_triggers, 0
            return n

    @property
    def triggers_fired(self) -> int:
        """Total trigger pulses sent since creation."""
        with self._trigger:
            return self._shared.triggers_fired if self._shared is not None else self._triggers_fired
