"""How the simulated camera turns light into a frame: the exact EMVA 1288 rendering, the fast mode
(levels computed once per light, noise from a precomputed bank), binning, and the noise model made
from the camera settings. A mixin of ``camera.SimulatedCamera``, which holds the state it uses."""
from __future__ import annotations

import numpy as np

from .camera_model import CameraNoiseModel
from .camera_model import fast_levels as _fast_levels
from .camera_model import fast_noise_bank as _fast_noise_bank
from .camera_model import render_fast as _render_fast


class SimulatedCameraRendering:
    """Frame rendering for ``SimulatedCamera`` (see the module docstring); callers hold the camera's lock."""

    def _render(self, photons: np.ndarray, exposure_s: float) -> np.ndarray:
        r0, c0, rows, cols = self._roi
        b = self._binning
        rows, cols = (rows // b) * b, (cols // b) * b
        crop = photons[r0 : r0 + rows, c0 : c0 + cols]
        hot = self._hot_full[r0 : r0 + rows, c0 : c0 + cols]
        prnu = None if self._prnu_full is None else self._prnu_full[r0 : r0 + rows, c0 : c0 + cols]
        dn = self.noise_model.render(crop, exposure_s, self._rng, hot_pixels=hot, prnu_map=prnu)
        if b == 1:
            return dn
        summed = dn.reshape(rows // b, b, cols // b, b).sum(axis=(1, 3), dtype=np.uint32)
        np.minimum(summed, self.noise_model.max_dn, out=summed)
        return summed.astype(dn.dtype)


    def _render_fast(self, pattern: np.ndarray | None, exposure_s: float) -> np.ndarray:
        """The fast mode's frame (see the module docstring); caller holds the lock."""
        r0, c0, rows, cols = self._roi
        b = self._binning
        rows, cols = (rows // b) * b, (cols // b) * b
        key = (id(pattern), exposure_s, self._roi, b, self._gain)
        levels = self._fast_levels.get(key)
        if levels is None:
            if len(self._fast_levels) > 64:
                self._fast_levels.clear()
            optics = self.context.optics
            if optics is None:
                photons = np.full(self._sensor_shape, self.settings.standalone_photon_rate_per_s * exposure_s, np.float32)
            else:
                photons = np.zeros(self._sensor_shape, np.float32)
                if pattern is not None:
                    g0, h0, gh, gw = optics.grid_roi
                    np.multiply(pattern, exposure_s, out=photons[g0:g0 + gh, h0:h0 + gw], casting="unsafe")
            crop = photons[r0:r0 + rows, c0:c0 + cols]
            hot = self._hot_full[r0:r0 + rows, c0:c0 + cols]
            prnu = None if self._prnu_full is None else self._prnu_full[r0:r0 + rows, c0:c0 + cols]
            if b > 1:  # binned pixels: the sums of b x b pixels (means and variances add)
                model = self.noise_model
                lam = np.multiply(crop, model.quantum_efficiency, dtype=np.float32)
                if prnu is not None:
                    lam *= prnu
                dark = np.where(hot, model.hot_pixel_dark_current_e_per_s, model.dark_current_e_per_s) * exposure_s
                lam += dark.astype(np.float32)
                np.minimum(lam, np.float32(model.full_well_e), out=lam)
                lam_b = lam.reshape(rows // b, b, cols // b, b).sum(axis=(1, 3))
                var_b = (lam_b + b * b * model.read_noise_e ** 2) * model.gain_dn_per_e ** 2
                mean = (lam_b * model.gain_dn_per_e + b * b * model.offset_dn + 0.5).astype(np.float32)
                top = np.float32(np.nextafter(np.float32(model.max_dn + 0.5), np.float32(0)))
                levels = (mean, np.sqrt(var_b).astype(np.float32), top, pattern)
            else:
                mean, sd, top = _fast_levels(self.noise_model, crop, exposure_s, hot, prnu)
                levels = (mean, sd, top, pattern)
            self._fast_levels[key] = levels
        mean, sd, top, _ = levels
        if self._fast_bank is None or self._fast_bank.size < 3 * mean.size:
            self._fast_bank = _fast_noise_bank(int(np.prod(self._sensor_shape)), self.settings.seed)
        offset = int(self._rng.integers(0, self._fast_bank.size - mean.size + 1))
        out = np.empty(mean.shape, self.noise_model.dtype)
        return _render_fast(mean, sd, top, self._fast_bank, offset, out, np.empty(mean.shape, np.float32))


def _noise_model_from(settings, gain: float) -> CameraNoiseModel:
    """The noise model with the analog gain factor applied to the system gain."""
    return CameraNoiseModel(
        quantum_efficiency=settings.quantum_efficiency,
        gain_dn_per_e=settings.gain_dn_per_e * gain,
        read_noise_e=settings.read_noise_e,
        dark_current_e_per_s=settings.dark_current_e_per_s,
        offset_dn=settings.offset_dn,
        bit_depth=settings.bit_depth,
        full_well_e=settings.full_well_e,
        hot_pixel_fraction=settings.hot_pixel_fraction,
        hot_pixel_dark_current_e_per_s=settings.hot_pixel_dark_current_e_per_s,
        prnu_fraction=settings.prnu_fraction,
    )
