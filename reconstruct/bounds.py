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
* ``poisson_crb_matrix_free(x, masks, photon_scale)`` - the same bound for any
  grid size without forming J: its total (trace of the inverse Fisher
  information, global phase projected out) is estimated by randomised probing
  (Hutchinson, "A stochastic estimator of the trace of the influence matrix
  for Laplacian smoothing splines", Commun. Statist. Simul. Comput. 18, 1989,
  with Rademacher probes) and each J^-1 v by preconditioned conjugate gradients
  (Hestenes & Stiefel, J. Res. Nat. Bur. Standards 49, 1952); J v costs two
  FFTs per mask. The estimate carries its own standard error.
* ``relative_error_bound(x, masks, photon_scale)`` - sqrt(CRB MSE)/||x||: the
  dense bound for small grids, the matrix-free estimate for large ones.
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
    "CRBEstimate",
    "poisson_crb_matrix_free",
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


@dataclass
class CRBEstimate:
    """Matrix-free Cramér-Rao bound (after global-phase alignment), estimated by probing.

    total_mse: estimate of the bound on E||x_hat - e^{i phi} x||^2 (trace of the inverse Fisher
        information with the global-phase direction projected out), inf if not identifiable.
    relative_error: sqrt(total_mse) / ||x||.
    relative_std: standard error of total_mse / total_mse (from the spread of the probes).
    photons: expected total photon count sum(photon_scale * |A x|^2).
    probes, iterations: probes used, conjugate-gradient iterations of the slowest probe.
    identifiable: False when a pixel is never lit or the solves do not converge (J near singular).
    """

    total_mse: float
    relative_error: float
    relative_std: float
    photons: float
    probes: int
    iterations: int
    identifiable: bool


def poisson_crb_matrix_free(
    x,
    masks,
    photon_scale: float = 1.0,
    *,
    target_relative_std: float = 0.01,
    probes_per_batch: int = 4,
    max_probes: int = 64,
    rtol: float = 1e-6,
    max_iterations: int = 2000,
    seed: int = 0,
) -> CRBEstimate:
    """Poisson CRB total for y_k ~ Poisson(photon_scale |F(m_k x)|^2) without forming J.

    J acts on a perturbation dx (complex, standing for the 2N real parameters Re/Im) as
    J dx = 4 s sum_k conj(m_k) F^H(u_k Re(conj(u_k) F(m_k dx))), u_k = z_k / |z_k|,
    z_k = F(m_k x), F the unitary 2-D DFT (the same J as ``poisson_crb``, Kay 1993 ch. 3).
    As in ``poisson_crb`` the global-phase direction g = i x / ||x|| is fixed by adding
    c g g^T (c = tr J / 2N) and the bound is tr((J + c g g^T)^-1) - 1/c. The trace is the mean
    of v^T A^-1 v over Rademacher probes v, solved by conjugate gradients preconditioned with
    the diagonal of the mask-energy term 2 s sum_k |m_k|^2. Probes are added in batches until
    the standard error is below ``target_relative_std`` or ``max_probes`` are used.
    """
    m = check_masks(masks, warn_k1=False).astype(np.complex128)
    K, H, W = m.shape
    n = H * W
    if not np.isfinite(photon_scale) or photon_scale <= 0:
        raise ReconstructionInputError(f"photon_scale must be positive; got {photon_scale}.")
    xx = check_object(x, (H, W)).astype(np.complex128)
    norm_x = float(np.linalg.norm(xx))
    if norm_x == 0:
        raise ReconstructionInputError("the CRB is undefined for an all-zero object.")
    s = float(photon_scale)
    z = np.fft.fft2(m * xx, norm="ortho")
    mag = np.abs(z)
    photons = float(s * np.sum(mag**2))
    lit = s * mag**2 > 1e-300
    u = np.where(lit, z / np.where(lit, mag, 1.0), 0.0)
    weight = np.sum(np.abs(m) ** 2, axis=0)
    # tr J: each lit measurement row has squared norm 4 s sum_p |m_kp|^2 / N (F unitary)
    trace_j = 4.0 * s * float(np.sum(lit.sum(axis=(1, 2)) * np.sum(np.abs(m) ** 2, axis=(1, 2)) / n))
    c = trace_j / (2 * n)
    g = 1j * xx / norm_x
    inf = CRBEstimate(float("inf"), float("inf"), 0.0, photons, 0, 0, False)
    if np.any(weight <= 1e-12 * float(weight.max())) or not c > 0:
        return inf
    precond = 1.0 / (2.0 * s * weight + c * np.abs(g) ** 2)

    def apply(v):  # (P, H, W) -> (J + c g g^T) v
        out = np.zeros_like(v)
        for k in range(K):
            t = np.fft.fft2(m[k] * v, norm="ortho")
            t = u[k] * np.real(np.conj(u[k]) * t)
            out += np.conj(m[k]) * np.fft.ifft2(t, norm="ortho")
        out *= 4.0 * s
        out += c * g * np.real(np.sum(np.conj(g) * v, axis=(1, 2)))[:, None, None]
        return out

    def dot(a, b):  # real inner product per probe
        return np.real(np.sum(np.conj(a) * b, axis=(1, 2)))

    rng = np.random.default_rng(seed)
    samples: list[float] = []
    worst = 0
    while len(samples) < max_probes:
        p = min(probes_per_batch, max_probes - len(samples))
        v = (rng.choice((-1.0, 1.0), size=(p, H, W)) + 1j * rng.choice((-1.0, 1.0), size=(p, H, W)))
        y = np.zeros_like(v)
        r = v.copy()
        zr = precond * r
        d = zr.copy()
        rz = dot(r, zr)
        b_norm = np.sqrt(dot(v, v))
        done = np.zeros(p, bool)
        it = 0
        while it < max_iterations:
            it += 1
            ad = apply(d)
            alpha = rz / dot(d, ad)
            alpha[done] = 0.0
            y += alpha[:, None, None] * d
            r -= alpha[:, None, None] * ad
            done |= np.sqrt(dot(r, r)) <= rtol * b_norm
            if done.all():
                break
            zr = precond * r
            rz_new = dot(r, zr)
            beta = np.where(done, 0.0, rz_new / np.where(rz > 0, rz, 1.0))
            d = zr + beta[:, None, None] * d
            rz = rz_new
        if not done.all():
            return CRBEstimate(float("inf"), float("inf"), 0.0, photons, len(samples) + p, it, False)
        worst = max(worst, it)
        samples.extend((dot(v, y) - 1.0 / c).tolist())
        q = np.asarray(samples)
        mean = float(q.mean())
        if len(q) >= 2 and mean > 0 and q.std(ddof=1) / np.sqrt(len(q)) <= target_relative_std * mean:
            break
    q = np.asarray(samples)
    total = float(q.mean())
    rel_std = float(q.std(ddof=1) / np.sqrt(len(q)) / total) if len(q) >= 2 and total > 0 else float("inf")
    return CRBEstimate(total, float(np.sqrt(total) / norm_x) if total > 0 else float("inf"), rel_std, photons,
                       len(q), worst, total > 0)


def relative_error_bound(x, masks, photon_scale: float = 1.0, *, max_pixels: int = CRB_MAX_PIXELS) -> float:
    """Best achievable relative error for this object, masks and dose.

    The Poisson CRB (``poisson_crb(...).relative_error``) when H*W <=
    max_pixels, else its matrix-free estimate (``poisson_crb_matrix_free``).
    """
    m = check_masks(masks, warn_k1=False)
    K, H, W = m.shape
    if H * W <= max_pixels:
        return poisson_crb(x, m, photon_scale, max_pixels=max_pixels).relative_error
    return poisson_crb_matrix_free(x, m, photon_scale).relative_error
