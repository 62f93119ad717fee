"""Forward models: far field (unitary DFT) and near field (angular spectrum).

Far field (Fraunhofer, or the back focal plane of a lens):
    y_k = |F(m_k * x)|**2, F the unitary 2-D DFT (numpy ``norm="ortho"``, no
    fftshift). The zero frequency is at index [0, 0].

Near field: angular-spectrum propagation over a distance ``distance_m`` with
wavelength ``wavelength_m`` and pixel pitch ``pixel_pitch_m`` (Goodman,
Introduction to Fourier Optics, 3rd ed. 2005, ch. 3.10). The transfer function
is H(fx, fy) = exp(i 2 pi z sqrt(1/lambda^2 - fx^2 - fy^2)), evanescent
components (fx^2 + fy^2 > 1/lambda^2) are dropped. The discrete
propagation is circular: light that leaves the grid window re-enters on the
other side. ``angular_spectrum`` warns (``AliasingWarning``) when the
field's occupied width plus its spread 2 z tan(theta) (theta from the
field's own bandwidth) exceeds the window. A field using the whole band is
safe only up to z = N dx^2 / lambda (``angular_spectrum_max_distance_m``,
the usual transfer-function sampling criterion).
"""
from __future__ import annotations

import warnings
from dataclasses import dataclass

import numpy as np

from .validation import ReconstructionInputError, check_masks, check_object

__all__ = [
    "forward",
    "angular_spectrum",
    "angular_spectrum_transfer",
    "angular_spectrum_max_distance_m",
    "AliasingWarning",
    "aliasing_margin_m",
    "NearField",
    "forward_near_field",
]


@dataclass(frozen=True)
class NearField:
    """Near-field geometry: the camera sits ``distance_m`` behind the mask plane.

    Pass as ``solve(..., propagation=NearField(...))`` (or to
    ``IncrementalEngine``). The measurement is then
    y_k = |P_z(m_k * x)|^2 with P_z the angular-spectrum propagator, a
    unitary operator as long as every grid frequency propagates
    (pixel_pitch_m > wavelength_m / sqrt(2)); ``transfer`` checks this.
    """

    wavelength_m: float
    pixel_pitch_m: float
    distance_m: float

    def transfer(self, shape, dtype=np.complex128) -> np.ndarray:
        """Unit-modulus transfer function on the unshifted grid; raises if any component is evanescent."""
        H, W = (int(s) for s in shape[-2:])
        h = angular_spectrum_transfer((H, W), self.wavelength_m, self.pixel_pitch_m, self.distance_m, dtype)
        if not np.all(np.abs(h) > 0.5):
            raise ReconstructionInputError(
                f"near-field model: with pixel_pitch_m={self.pixel_pitch_m} and wavelength_m={self.wavelength_m} "
                "some grid frequencies are evanescent, so the propagator is not unitary and the solvers' "
                "projection would be wrong. Use a pixel pitch above wavelength/sqrt(2) (bin the camera)."
            )
        return h


def forward_near_field(x, masks, near_field: NearField) -> np.ndarray:
    """y_k = |P_z(m_k * x)|^2: expected counts with the camera in the near field."""
    m = check_masks(masks, warn_k1=False)
    xx = check_object(x, m.shape[1:])
    h = near_field.transfer(m.shape)
    u = np.fft.ifft2(np.fft.fft2(m.astype(np.complex128) * xx, norm="ortho") * h, norm="ortho")
    return u.real**2 + u.imag**2


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


def _occupied_width_m(power_1d: np.ndarray, step: float, fraction: float) -> float:
    """Width holding ``fraction`` of the energy of a 1-D power profile (samples times step)."""
    p = np.sort(power_1d)[::-1]
    c = np.cumsum(p)
    return float(np.searchsorted(c, fraction * c[-1]) + 1) * step


def aliasing_margin_m(field, wavelength_m: float, pixel_pitch_m: float, distance_m: float,
                      energy_fraction: float = 1 - 1e-4) -> float:
    """Grid width left over after propagation (m, per worst axis); negative means wrap-around.

    Content-aware check: the field occupies a width D (holding
    ``energy_fraction`` of its energy) and its spectrum reaches a frequency
    f (same fraction); over a distance z light at that frequency moves
    sideways by z*tan(theta), sin(theta) = lambda*f, on both sides. The
    result stays on the grid of width N*dx while D + 2 z tan(theta) <= N*dx.
    """
    u = np.asarray(field)
    I = np.abs(u.reshape(-1, *u.shape[-2:])) ** 2
    I = I.sum(axis=0)
    S = np.abs(np.fft.fft2(u.reshape(-1, *u.shape[-2:]), norm="ortho")) ** 2
    S = S.sum(axis=0)
    margins = []
    for axis in (0, 1):
        n = u.shape[-2 + axis]
        width = _occupied_width_m(I.sum(axis=1 - axis), pixel_pitch_m, energy_fraction)
        spec = S.sum(axis=1 - axis)
        f = np.abs(np.fft.fftfreq(n, d=pixel_pitch_m))
        order = np.argsort(-spec)
        c = np.cumsum(spec[order])
        k = int(np.searchsorted(c, energy_fraction * c[-1]))
        fmax = float(f[order[: k + 1]].max())
        s = min(wavelength_m * fmax, 0.999999)
        spread = 2 * abs(distance_m) * s / np.sqrt(1 - s * s)
        margins.append(n * pixel_pitch_m - width - spread)
    return float(min(margins))


def angular_spectrum(field, wavelength_m: float, pixel_pitch_m: float, distance_m: float,
                     *, check_sampling: bool = True) -> np.ndarray:
    """Propagate a complex field (..., H, W) by ``distance_m`` (negative: back-propagate).

    Energy in propagating components is conserved (unitary on that band).
    With ``check_sampling`` (default) it warns with ``AliasingWarning`` when
    the propagated light would not fit on the grid (``aliasing_margin_m`` < 0,
    which uses the field's actual extent and bandwidth); the result then wraps
    around the edges: zero-pad the field, or shorten the distance.
    ``angular_spectrum_max_distance_m`` gives the content-independent
    worst case (a field using the whole band).
    """
    if not (np.isfinite(wavelength_m) and np.isfinite(pixel_pitch_m)) or wavelength_m <= 0 or pixel_pitch_m <= 0:
        raise ReconstructionInputError(
            f"wavelength_m ({wavelength_m}) and pixel_pitch_m ({pixel_pitch_m}) must be positive, in metres."
        )
    u = np.asarray(field)
    if u.ndim < 2:
        raise ReconstructionInputError(f"field must be at least 2-D (H, W); got shape {u.shape}.")
    if not np.all(np.isfinite(u)):
        raise ReconstructionInputError("field contains NaN or infinite values.")
    if pixel_pitch_m > 1e5 * wavelength_m:
        raise ReconstructionInputError(
            f"pixel_pitch_m = {pixel_pitch_m} is over 1e5 wavelengths: give both lengths in metres."
        )
    if check_sampling and distance_m != 0 and np.any(u != 0):
        margin = aliasing_margin_m(u, wavelength_m, pixel_pitch_m, distance_m)
        if margin < 0:
            warnings.warn(
                f"angular-spectrum propagation over {abs(distance_m):.4g} m aliases on this grid: the light "
                f"spreads {-margin:.3g} m beyond the {u.shape[-1]}x{pixel_pitch_m:.3g} m window and wraps around "
                f"the edges (band-edge limit N*dx^2/lambda = "
                f"{angular_spectrum_max_distance_m(u.shape, wavelength_m, pixel_pitch_m):.4g} m). "
                "Zero-pad the field or shorten the distance.",
                AliasingWarning,
                stacklevel=2,
            )
    dt = np.complex64 if u.dtype in (np.complex64, np.float32) else np.complex128
    h = angular_spectrum_transfer(u.shape, wavelength_m, pixel_pitch_m, distance_m, dtype=dt)
    return np.fft.ifft2(np.fft.fft2(u.astype(dt, copy=False), norm="ortho") * h, norm="ortho")
