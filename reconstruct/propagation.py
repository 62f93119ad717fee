"""Forward models: far field (unitary DFT) and near field (angular spectrum).

Far field (Fraunhofer, or the back focal plane of a lens):
    y_k = |F(m_k * x)|**2, F the unitary 2-D DFT (numpy ``norm="ortho"``, no
    fftshift). The zero frequency is at index [0, 0].

Near field: angular-spectrum propagation over a distance ``distance_m`` with
wavelength ``wavelength_m`` and pixel pitch ``pixel_pitch_m`` (Goodman,
Introduction to Fourier Optics, 3rd ed. 2005, ch. 3.10). The transfer function
is H(fx, fy) = exp(i 2 pi z sqrt(1/lambda^2 - fx^2 - fy^2)), evanescent
components (fx^2 + fy^2 > 1/lambda^2) are dropped. The discrete kernel is
free of aliasing when its chirp is sampled finely enough:
z <= N * dx^2 / lambda (for a square grid of N pixels of pitch dx), which is
equivalent to requiring that the beam's spread stays within the grid;
``angular_spectrum`` warns (``AliasingWarning``) when this is exceeded.
"""
from __future__ import annotations

import warnings

import numpy as np

from .validation import ReconstructionInputError, check_masks, check_object

__all__ = [
    "forward",
    "angular_spectrum",
    "angular_spectrum_transfer",
    "angular_spectrum_max_distance_m",
    "AliasingWarning",
]


class AliasingWarning(UserWarning):
    """The propagation distance is too large for the grid: the result wraps around."""


def forward(x, masks) -> np.ndarray:
    """Expected intensities y_k = |F(m_k * x)|^2 for a mask family.

    Parameters
    ----------
    x : complex (H, W) object field, in units of sqrt(photons).
    masks : complex (K, H, W) mask family.

    Returns
    -------
    Real (K, H, W) array of expected photon counts, float64 for complex128
    input, float32 when both inputs are single precision.
    """
    m = check_masks(masks, warn_k1=False)
    xx = check_object(x, m.shape[1:])
    single = m.dtype == np.complex64 and xx.dtype == np.complex64
    dt = np.complex64 if single else np.complex128
    z = np.fft.fft2(m.astype(dt, copy=False) * xx.astype(dt, copy=False), norm="ortho")
    return (z.real**2 + z.imag**2).astype(np.float32 if single else np.float64, copy=False)


def angular_spectrum_max_distance_m(shape, wavelength_m: float, pixel_pitch_m: float) -> float:
    """Largest distance (m) the discrete angular-spectrum kernel samples without aliasing.

    z_max = min(N) * dx^2 / lambda: beyond it the phase of the transfer
    function changes by more than pi between neighbouring frequency samples
    at the edge of the band (common practice criterion for the AS method).
    """
    n = min(int(s) for s in shape[-2:])
    return n * pixel_pitch_m**2 / wavelength_m


def angular_spectrum_transfer(shape, wavelength_m: float, pixel_pitch_m: float, distance_m: float,
                              dtype=np.complex128) -> np.ndarray:
    """The angular-spectrum transfer function H on the unshifted DFT frequency grid."""
    if wavelength_m <= 0 or pixel_pitch_m <= 0:
        raise ReconstructionInputError(
            f"wavelength_m ({wavelength_m}) and pixel_pitch_m ({pixel_pitch_m}) must be positive, in metres."
        )
    if not np.isfinite(distance_m):
        raise ReconstructionInputError(f"distance_m must be finite; got {distance_m}.")
    H, W = (int(s) for s in shape[-2:])
    fy = np.fft.fftfreq(H, d=pixel_pitch_m)[:, None]
    fx = np.fft.fftfreq(W, d=pixel_pitch_m)[None, :]
    arg = 1.0 / wavelength_m**2 - fx**2 - fy**2
    propagating = arg > 0
    kz = 2 * np.pi * np.sqrt(np.where(propagating, arg, 0.0))
    h = np.where(propagating, np.exp(1j * kz * distance_m), 0.0)
    return h.astype(dtype)


def angular_spectrum(field, wavelength_m: float, pixel_pitch_m: float, distance_m: float,
                     *, check_sampling: bool = True) -> np.ndarray:
    """Propagate a complex field (…, H, W) by ``distance_m`` (negative: back-propagate).

    Energy in propagating components is conserved (unitary on that band).
    Warns with ``AliasingWarning`` if |distance_m| exceeds
    ``angular_spectrum_max_distance_m``: the field then wraps around the
    grid edges; pad the field or use a larger pixel pitch.
    """
    u = np.asarray(field)
    if u.ndim < 2:
        raise ReconstructionInputError(f"field must be at least 2-D (H, W); got shape {u.shape}.")
    if not np.all(np.isfinite(u)):
        raise ReconstructionInputError("field contains NaN or infinite values.")
    if pixel_pitch_m >= wavelength_m / 2 * 1e6:
        raise ReconstructionInputError("pixel_pitch_m looks like it is not in metres (it is > 5e5 wavelengths).")
    if check_sampling:
        zmax = angular_spectrum_max_distance_m(u.shape, wavelength_m, pixel_pitch_m)
        if abs(distance_m) > zmax:
            warnings.warn(
                f"angular-spectrum propagation over {abs(distance_m):.4g} m aliases on this grid "
                f"(limit N*dx^2/lambda = {zmax:.4g} m): the field wraps around the edges. "
                "Zero-pad the field, enlarge the pixel pitch, or shorten the distance.",
                AliasingWarning,
                stacklevel=2,
            )
    dt = np.complex64 if u.dtype in (np.complex64, np.float32) else np.complex128
    h = angular_spectrum_transfer(u.shape, wavelength_m, pixel_pitch_m, distance_m, dtype=dt)
    return np.fft.ifft2(np.fft.fft2(u.astype(dt, copy=False), norm="ortho") * h, norm="ortho")
