"""Linear camera noise model (EMVA Standard 1288, Release 4.0 Linear, 2021).

The model turns the number of photons that fall on each pixel during one
exposure into the digital numbers (DN) a camera would deliver:

1. photons -> photo-electrons: Poisson with mean ``quantum_efficiency * photons``, times the
   pixel's own response factor when ``prnu_fraction`` > 0 (photo-response non-uniformity,
   PRNU: a fixed per-pixel gain map of mean 1 and spread ``prnu_fraction``, see ``prnu_gain_map``);
2. plus dark electrons: Poisson with mean ``dark_current_e_per_s * exposure_s``
   (hot pixels use ``hot_pixel_dark_current_e_per_s`` instead);
3. the well holds at most ``full_well_e`` electrons (clipped);
4. plus read noise: Gaussian, standard deviation ``read_noise_e`` electrons;
5. times the overall system gain ``gain_dn_per_e`` (EMVA's K), plus ``offset_dn``;
6. rounded to whole DN (this adds the EMVA quantisation noise of 1/12 DN^2)
   and clipped to ``[0, max_dn]`` with ``max_dn = 2**bit_depth - 1``.

Hence, before clipping, the EMVA linear relations hold (EMVA 1288 R4.0 Linear,
section 2, "Mathematical model"):

    mu_y      = mu_y.dark + K * eta * mu_p
    sigma_y^2 = K^2 * (sigma_d^2 + mu_e) + sigma_q^2,   sigma_q^2 = 1/12 DN^2
    sigma_d^2 = read_noise_e^2 + dark_current_e_per_s * exposure_s

Sums of independent Poisson variables are Poisson, so steps 1 and 2 are drawn
as one Poisson variable per pixel.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

__all__ = ["CameraNoiseModel"]


@dataclass
class CameraNoiseModel:
    """Linear camera model (EMVA 1288 Release 4.0 Linear): photons -> electrons (QE, Poisson),
    + dark current (Poisson), + read noise (Gaussian, electrons), x gain (DN/e-), + offset,
    quantized, clipped at full well and at the ADC max.

    Fields (units in the names):
        quantum_efficiency: fraction of incident photons converted to electrons, 0 < eta <= 1.
        gain_dn_per_e: overall system gain K, DN per electron, > 0.
        read_noise_e: read noise standard deviation, electrons, >= 0.
        dark_current_e_per_s: mean dark electrons per second per pixel, >= 0.
        offset_dn: dark offset (black level) in DN, 0 <= offset < max_dn.
        bit_depth: ADC bits, 1..16; frames are uint8 for <= 8 bits else uint16.
        full_well_e: electrons one pixel can hold, > 0.
        hot_pixel_fraction: fraction of pixels with a high dark current, 0..1.
        hot_pixel_dark_current_e_per_s: dark current of those hot pixels, >= 0.
        prnu_fraction: photo-response non-uniformity (EMVA 1288 R4.0 Linear: PRNU), the spatial
            spread (std / mean) of the per-pixel response to light, 0 <= prnu < 0.3. It scales
            the photo-electrons only (not the dark signal), as a per-pixel quantum efficiency would.
    """

    quantum_efficiency: float = 0.6
    gain_dn_per_e: float = 0.25
    read_noise_e: float = 3.0
    dark_current_e_per_s: float = 5.0
    offset_dn: float = 100.0
    bit_depth: int = 12
    full_well_e: float = 15000.0
    hot_pixel_fraction: float = 0.0
    hot_pixel_dark_current_e_per_s: float = 2000.0
    prnu_fraction: float = 0.0

    def __post_init__(self) -> None:
        self.validate()

    # ------------------------------------------------------------------ checks
    def validate(self) -> None:
        """Raise ValueError naming the first field that is out of range."""

        def finite(name: str) -> float:
            value = getattr(self, name)
            try:
                value = float(value)
            except (TypeError, ValueError):
                raise ValueError(f"{name} must be a number, got {value!r}") from None
            if not math.isfinite(value):
                raise ValueError(f"{name} must be finite, got {value!r}")
            return value

        qe = finite("quantum_efficiency")
        if not 0.0 < qe <= 1.0:
            raise ValueError(
                f"quantum_efficiency must be in (0, 1] (a fraction of photons), got {qe}"
            )
        if finite("gain_dn_per_e") <= 0.0:
            raise ValueError(f"gain_dn_per_e must be > 0 DN per electron, got {self.gain_dn_per_e}")
        if finite("read_noise_e") < 0.0:
            raise ValueError(f"read_noise_e must be >= 0 electrons, got {self.read_noise_e}")
        if finite("dark_current_e_per_s") < 0.0:
            raise ValueError(
                f"dark_current_e_per_s must be >= 0 electrons per second, got {self.dark_current_e_per_s}"
            )
        if isinstance(self.bit_depth, bool) or not isinstance(self.bit_depth, (int, np.integer)):
            raise ValueError(f"bit_depth must be an integer number of bits, got {self.bit_depth!r}")
        if not 1 <= int(self.bit_depth) <= 16:
            raise ValueError(f"bit_depth must be between 1 and 16 bits, got {self.bit_depth}")
        offset = finite("offset_dn")
        if not 0.0 <= offset < self.max_dn:
            raise ValueError(
                f"offset_dn must be in [0, {self.max_dn}) DN for a {self.bit_depth}-bit ADC, got {offset}"
            )
        if finite("full_well_e") <= 0.0:
            raise ValueError(f"full_well_e must be > 0 electrons, got {self.full_well_e}")
        frac = finite("hot_pixel_fraction")
        if not 0.0 <= frac <= 1.0:
            raise ValueError(f"hot_pixel_fraction must be in [0, 1], got {frac}")
        if finite("hot_pixel_dark_current_e_per_s") < 0.0:
            raise ValueError(
                "hot_pixel_dark_current_e_per_s must be >= 0 electrons per second, "
                f"got {self.hot_pixel_dark_current_e_per_s}"
            )

        prnu = finite("prnu_fraction")
        if not 0.0 <= prnu < 0.3:
            raise ValueError(
                f"prnu_fraction must be in [0, 0.3) (per-pixel response spread, std / mean), got {prnu}"
            )

    # -------------------------------------------------------------- properties
    @property
    def max_dn(self) -> int:
        """Largest value the ADC delivers (clipped pixels sit here), 2**bit_depth - 1."""
        return (1 << int(self.bit_depth)) - 1

    @property
    def dtype(self) -> np.dtype:
        """uint8 for bit depths up to 8, else uint16."""
        return np.dtype(np.uint8) if self.bit_depth <= 8 else np.dtype(np.uint16)

    @property
    def saturation_electrons(self) -> float:
        """Electrons at which the output saturates: the full well, or the ADC maximum if lower."""
        adc_limit_e = (self.max_dn - self.offset_dn) / self.gain_dn_per_e
        return float(min(self.full_well_e, adc_limit_e))

    def dark_noise_e(self, exposure_s: float) -> float:
        """Temporal dark noise sigma_d in electrons: sqrt(read^2 + dark_current * t) (no hot pixels)."""
        return math.sqrt(self.read_noise_e**2 + self.dark_current_e_per_s * exposure_s)

    def mean_dn(self, photons: float | np.ndarray, exposure_s: float) -> np.ndarray:
        """Expected output in DN before clipping: offset + K * (eta * mu_p + dark_current * t)."""
        electrons = self.quantum_efficiency * np.asarray(photons, dtype=float)
        electrons = electrons + self.dark_current_e_per_s * exposure_s
        return self.offset_dn + self.gain_dn_per_e * electrons

    # ------------------------------------------------------------------ render
    def hot_pixel_mask(self, shape: tuple[int, ...], seed: int | None) -> np.ndarray:
        """Boolean mask with exactly round(hot_pixel_fraction * n_pixels) True entries.

        Deterministic for a given ``seed`` and ``shape``: a camera keeps its hot pixels.
        """
        shape = tuple(int(s) for s in shape)
        n = int(np.prod(shape)) if shape else 1
        mask = np.zeros(n, dtype=bool)
        count = int(round(self.hot_pixel_fraction * n))
        if count > 0:
            rng = np.random.default_rng(seed)
            mask[rng.choice(n, size=count, replace=False)] = True
        return mask.reshape(shape)

    def prnu_gain_map(self, shape: tuple[int, ...], seed: int | None) -> np.ndarray | None:
        """Per-pixel response factors (float32) of mean exactly 1 and spread exactly ``prnu_fraction``
        over ``shape``; None when ``prnu_fraction`` is 0.

        Deterministic for a given ``seed`` and ``shape`` (a camera keeps its response map); drawn
        from its own random stream, so it does not change the hot pixels or the frame noise.
        """
        if self.prnu_fraction <= 0.0:
            return None
        shape = tuple(int(s) for s in shape)
        rng = np.random.default_rng(None if seed is None else [int(seed), 0x50524E55])  # 'PRNU'
        z = rng.standard_normal(size=shape)
        if z.size > 1 and z.std() > 0:
            z = (z - z.mean()) / z.std()
        gain = 1.0 + self.prnu_fraction * z
        return np.maximum(gain, 0.05).astype(np.float32)

    def render(
        self,
        photons: np.ndarray,
        exposure_s: float,
        rng: np.random.Generator,
        hot_pixels: np.ndarray | None = None,
        out: np.ndarray | None = None,
        prnu_map: np.ndarray | None = None,
    ) -> np.ndarray:
        """Render one frame in DN.

        photons: float array of INCIDENT photons per pixel during the exposure (>= 0).
        exposure_s: exposure time in seconds (>= 0); sets the dark electrons.
        rng: numpy Generator (seed it for reproducible frames).
        hot_pixels: optional boolean mask of photons' shape (see ``hot_pixel_mask``).
        out: optional preallocated array of photons' shape and ``self.dtype`` to write into.
        prnu_map: optional per-pixel response factors of photons' shape (see ``prnu_gain_map``);
            they multiply the mean photo-electrons.
        Returns the frame (``out`` if given) as uint16, or uint8 when bit_depth <= 8.
        """
        photons = np.asarray(photons)
        if photons.dtype.kind not in "fiu":
            raise ValueError(f"photons must be a real array, got dtype {photons.dtype}")
        exposure_s = float(exposure_s)
        if not math.isfinite(exposure_s) or exposure_s < 0.0:
            raise ValueError(f"exposure_s must be a finite time >= 0 seconds, got {exposure_s}")
        if photons.size and not (np.isfinite(photons).all() and photons.min() >= 0):
            raise ValueError(
                "photons must be finite and >= 0 (incident photons per pixel); "
                "check the illumination model for negative or NaN intensities"
            )
        if out is not None:
            if out.shape != photons.shape or out.dtype != self.dtype:
                raise ValueError(
                    f"out must have shape {photons.shape} and dtype {self.dtype}, "
                    f"got shape {out.shape} dtype {out.dtype}"
                )
        if hot_pixels is not None and hot_pixels.shape != photons.shape:
            raise ValueError(
                f"hot_pixels mask shape {hot_pixels.shape} does not match photons shape {photons.shape}"
            )

        if prnu_map is not None and prnu_map.shape != photons.shape:
            raise ValueError(f"prnu_map shape {prnu_map.shape} does not match photons shape {photons.shape}")

        # Mean electrons per pixel (signal + dark), float64 so the Poisson draw is exact.
        lam = np.multiply(photons, self.quantum_efficiency, dtype=np.float64)
        if prnu_map is not None:
            lam *= prnu_map
        lam += self.dark_current_e_per_s * exposure_s
        if hot_pixels is not None and self.hot_pixel_dark_current_e_per_s != self.dark_current_e_per_s:
            lam[hot_pixels] += (self.hot_pixel_dark_current_e_per_s - self.dark_current_e_per_s) * exposure_s
        electrons = rng.poisson(lam).astype(np.float32)
        np.minimum(electrons, np.float32(self.full_well_e), out=electrons)
        if self.read_noise_e > 0.0:
            noise = rng.standard_normal(size=photons.shape, dtype=np.float32)
            noise *= np.float32(self.read_noise_e)
            electrons += noise
        electrons *= np.float32(self.gain_dn_per_e)
        electrons += np.float32(self.offset_dn)
        np.rint(electrons, out=electrons)
        np.clip(electrons, 0.0, float(self.max_dn), out=electrons)
        if out is None:
            return electrons.astype(self.dtype)
        np.copyto(out, electrons, casting="unsafe")
        return out


# ---------------------------------------------------------------------------------------------
# Fast rendering (the simulated camera's ``noise_rendering = "fast"``)
# ---------------------------------------------------------------------------------------------
FAST_BANK_FACTOR = 3  # the normal bank holds this many frames' worth of values (plus a prime margin)


def fast_noise_bank(pixels: int, seed: int | None) -> np.ndarray:
    """A bank of standard normal float32 values for ``render_fast`` (drawn once per camera).

    Each frame reads a window of ``pixels`` consecutive values starting at a random offset, so
    two frames use different values at every pixel unless their offsets coincide (probability
    1 / (bank length - pixels) per pair of frames). The price of the speed: the noise of one
    frame is a shifted copy of part of another's, so the frames are not independent as whole
    images (pixel i of one frame can equal pixel i + d of another); the statistics at every pixel
    and between two frames at the same pixel are those of independent draws.
    """
    rng = np.random.default_rng(None if seed is None else (int(seed), 0x5EED))
    return rng.standard_normal(FAST_BANK_FACTOR * int(pixels) + 4099, dtype=np.float32)


def fast_levels(model: CameraNoiseModel, photons: np.ndarray, exposure_s: float,
                hot_pixels: np.ndarray | None = None, prnu_map: np.ndarray | None = None):
    """Per-pixel mean and standard deviation in DN for ``render_fast`` (float32), made once per light.

    Mean electrons mu_e = eta * mu_p (* PRNU) + dark electrons; the temporal variance in electrons
    is mu_e (shot noise, Poisson: variance = mean) + read_noise^2; both times K, plus the offset.
    Returns (mean_dn + 0.5, sd_dn, top): the 0.5 makes the truncating cast to integers round, and
    ``top`` is the highest value before the cast (full well or ADC maximum, whichever is lower).
    """
    lam = np.multiply(photons, model.quantum_efficiency, dtype=np.float32)
    if prnu_map is not None:
        lam *= prnu_map
    lam += np.float32(model.dark_current_e_per_s * exposure_s)
    if hot_pixels is not None and hot_pixels.any() and model.hot_pixel_dark_current_e_per_s != model.dark_current_e_per_s:
        lam[hot_pixels] += np.float32((model.hot_pixel_dark_current_e_per_s - model.dark_current_e_per_s) * exposure_s)
    np.minimum(lam, np.float32(model.full_well_e), out=lam)
    sd = lam + np.float32(model.read_noise_e ** 2)
    np.sqrt(sd, out=sd)
    sd *= np.float32(model.gain_dn_per_e)
    lam *= np.float32(model.gain_dn_per_e)
    lam += np.float32(model.offset_dn + 0.5)
    top = min(float(model.max_dn), model.full_well_e * model.gain_dn_per_e + model.offset_dn) + 0.5
    return lam, sd, np.float32(np.nextafter(np.float32(top), np.float32(0)))


def render_fast(mean_dn: np.ndarray, sd_dn: np.ndarray, top: float, bank: np.ndarray, offset: int,
                out: np.ndarray, scratch: np.ndarray) -> np.ndarray:
    """One frame in DN: mean + sd * z, z a window of the normal bank, clipped to [0, top], rounded.

    The Gaussian approximation of the shot noise keeps the EMVA 1288 linear relations exactly
    (mean mu_y = offset + K mu_e and variance sigma_y^2 = K^2 (read^2 + mu_e) + 1/12, the 1/12 from
    the rounding as in ``CameraNoiseModel.render``); it differs from Poisson in the higher moments
    (skew 1/sqrt(mu_e)), which matters only at a few electrons per pixel, where the read noise
    dominates. At the full well the frame is pinned to the full-well level (no read noise on top).
    Four passes over float32; no Python loop. ``out`` is uint8/uint16 of the frame's shape.
    """
    n = mean_dn.size
    z = bank[offset:offset + n].reshape(mean_dn.shape)
    np.multiply(sd_dn, z, out=scratch)
    scratch += mean_dn
    np.clip(scratch, np.float32(0.0), top, out=scratch)
    np.copyto(out, scratch, casting="unsafe")  # truncation of x + 0.5 (x >= 0): rounding
    return out
