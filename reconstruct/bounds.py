"""Precision limits set by the photon dose.

* ``shot_noise_relative_error(pixels, photons)`` - the rule of thumb for
  large problems: the recovered field has a mean-square error of about one
  photon per reconstructed pixel, so relative error ~ sqrt(pixels/photons)
  (common practice, no source). ``photons`` is the total detected in the
  data used (all masks, all passes averaged into the estimate).
* ``poisson_crb(x, masks, photon_scale)`` - the Cramér-Rao bound for Poisson
  data y_k ~ Poisson(photon_scale * |F(m_k x)|^2), computed from the exact
  Fisher information J = sum_i (d mu_i)(d mu_i)^T / mu_i over the 2N real
  parameters (Re x, Im x) (Kay, Fundamentals of Statistical Signal
  Processing: Estimation Theory, 1993, ch. 3). J is singular along the
  global phase direction i*x; that direction is projected out, so the bound
  applies to the error after global-phase alignment (the ``relative_error``
  metric). Dense linear algebra: only for grids up to ``CRB_MAX_PIXELS``.
* ``relative_error_bound(x, masks, photon_scale)`` - sqrt(CRB MSE)/||x|| for
  small grids, the shot-noise rule above for large ones.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .validation import ReconstructionInputError, check_masks, check_object

__all__ = [
    "shot_noise_relative_error",
    "poisson_crb",
    "relative_error_bound",
    "CRBResult",
    "CRB_MAX_PIXELS",
]

CRB_MAX_PIXELS = 32 * 32


def shot_noise_relative_error(pixels: int, photons: float) -> float:
    """sqrt(pixels / photons): predicted relative error of the recovered field.

    Common practice, no source: about one photon of mean-square error per
    reconstructed pixel.
    """
    if not np.isfinite(pixels) or pixels <= 0:
        raise ReconstructionInputError(f"pixels must be a positive count; got {pixels}.")
    if not np.isfinite(photons) or photons < 0:
        raise ReconstructionInputError(f"photons must be a finite non-negative count; got {photons}.")
    if photons == 0:
        return float("inf")
    return float(np.sqrt(pixels / photons))


@dataclass
class CRBResult:
    """Cramér-Rao bound for the field x (after global-phase alignment).

    variance_real, variance_imag : (H, W) lower bounds on the variance of
        Re x_hat and Im x_hat per pixel (photon-scaled units: sqrt(counts) of
        the unscaled field, i.e. the same units as x).
    total_mse : lower bound on E||x_hat - e^{i phi} x||^2 (sum of the above).
    relative_error : sqrt(total_mse) / ||x||.
    photons : expected total photon count sum(photon_scale * |A x|^2).
    covariance : the (2N, 2N) bound matrix, order [Re x.ravel(), Im x.ravel()].
    identifiable : False if J has null directions besides the global phase
        (then the bound is infinite for those directions and total_mse = inf).
    """

    variance_real: np.ndarray
    variance_imag: np.ndarray
    total_mse: float
    relative_error: float
    photons: float
    covariance: np.ndarray
    identifiable: bool

    @property
    def per_parameter_variance(self) -> np.ndarray:
        """Diagonal of the bound, [Re x.ravel(), Im x.ravel()]."""
        return np.diag(self.covariance).copy()


def _dft_matrix(n: int) -> np.ndarray:
    k = np.arange(n)
    return np.exp(-2j * np.pi * np.outer(k, k) / n) / np.sqrt(n)


def poisson_crb(x, masks, photon_scale: float = 1.0, *, max_pixels: int = CRB_MAX_PIXELS) -> CRBResult:
    """Poisson Cramér-Rao bound for y_k ~ Poisson(photon_scale * |F(m_k x)|^2).

    Raises ValueError (ReconstructionInputError) if H*W > max_pixels: the
    Fisher matrix is (2HW)^2 dense; use ``shot_noise_relative_error`` instead.
    Measurements with zero expected count carry no information and are
    skipped.
    """
    m = check_masks(masks, warn_k1=False).astype(np.complex128)
    K, H, W = m.shape
    n = H * W
    if n > max_pixels:
        raise ReconstructionInputError(
            f"poisson_crb is for small grids: {H}x{W} = {n} pixels exceeds the limit of {max_pixels} pixels "
            "(the Fisher matrix is dense). Use shot_noise_relative_error(pixels, photons) for large grids."
        )
    if not np.isfinite(photon_scale) or photon_scale <= 0:
        raise ReconstructionInputError(f"photon_scale must be positive; got {photon_scale}.")
    xx = check_object(x, (H, W)).astype(np.complex128)
    norm_x = np.linalg.norm(xx)
    if norm_x == 0:
        raise ReconstructionInputError("the CRB is undefined for an all-zero object.")
    F = np.kron(_dft_matrix(H), _dft_matrix(W))  # unitary 2-D DFT acting on x.ravel()
    xv = xx.ravel()
    J = np.zeros((2 * n, 2 * n))
    photons = 0.0
    for k in range(K):
        A = F * m[k].ravel()[None, :]  # rows a_i: z_i = sum_p A[i, p] x_p
        z = A @ xv
        mu = photon_scale * np.abs(z) ** 2
        photons += float(mu.sum())
        keep = mu > 1e-300
        if not keep.any():
            continue
        cz = np.conj(z[keep])[:, None]
        Ak = A[keep]
        g_re = 2 * photon_scale * np.real(cz * Ak)
        g_im = -2 * photon_scale * np.imag(cz * Ak)
        G = np.concatenate([g_re, g_im], axis=1) / np.sqrt(mu[keep])[:, None]
        J += G.T @ G
    u = np.concatenate([-xv.imag, xv.real]) / norm_x  # global-phase direction
    c = np.trace(J) / (2 * n)
    Jreg = J + c * np.outer(u, u)
    evals = np.linalg.eigvalsh(Jreg)
    identifiable = bool(evals[0] > 1e-10 * evals[-1])
    if identifiable:
        cov = np.linalg.inv(Jreg) - np.outer(u, u) / c
        cov = 0.5 * (cov + cov.T)
        total = float(np.trace(cov))
    else:
        cov = np.full((2 * n, 2 * n), np.inf)
        total = float("inf")
    var = np.diag(cov)
    return CRBResult(
        variance_real=var[:n].reshape(H, W).copy(),
        variance_imag=var[n:].reshape(H, W).copy(),
        total_mse=total,
        relative_error=float(np.sqrt(total) / norm_x) if np.isfinite(total) else float("inf"),
        photons=photons,
        covariance=cov,
        identifiable=identifiable,
    )


def relative_error_bound(x, masks, photon_scale: float = 1.0, *, max_pixels: int = CRB_MAX_PIXELS) -> float:
    """Best achievable relative error for this object, masks and dose.

    The Poisson CRB (``poisson_crb(...).relative_error``) when H*W <=
    max_pixels, else the shot-noise rule with the expected photon count.
    """
    m = check_masks(masks, warn_k1=False)
    K, H, W = m.shape
    if H * W <= max_pixels:
        return poisson_crb(x, m, photon_scale, max_pixels=max_pixels).relative_error
    xx = check_object(x, (H, W))
    w = np.sum(np.abs(m) ** 2, axis=0)
    photons = float(photon_scale * np.sum(w * np.abs(xx) ** 2))  # = sum_k ||A_k x||^2 (F unitary)
    return shot_noise_relative_error(H * W, photons)
