"""Phase steps from a series of interference patterns: the numerics of the modulator response measurement.

A phase modulator shows one region at a reference grey level and the rest (the "stepped" region) at
grey level g_n, for n = 0 .. N-1. Whatever the sample and the split, the far-field intensity is

    I_n(u) = |A(u) + e^{i D_n} B(u)|^2 = a(u) + cos(D_n) p(u) + sin(D_n) q(u),

with A, B the far fields of the two regions, a = |A|^2 + |B|^2, p - i q = 2 B conj(A), and D_n the
phase of level g_n minus that of the reference level. This is phase-shifting interferometry with
unknown steps. ``phase_steps`` solves it by the advanced iterative algorithm of Wang and Han
(Opt. Lett. 29, 1671, 2004): alternate least squares for (a, p, q) per pixel given the steps, and
for (cos D_n, sin D_n) per frame given (a, p, q), started from the principal-component estimate of
Vargas, Quiroga and Belenguer (Opt. Lett. 36, 1326, 2011). Every pixel of every frame is used.

The model is unchanged by D -> -D with q -> -q, so the data alone do not give the sign of the
steps. ``split_orientation`` fixes it from the geometry: the cross term 2 B conj(A), transformed
back to the modulator plane, is the cross-correlation of the two regions' fields, which lies on
the side of positive lags along the split axis when the stepped region is at the higher indices
and the sign is right (mirror image when the sign is wrong). Frames must be in the
reconstruction's grid convention (zero frequency at [0, 0]: ``ifftshift`` of a camera frame).
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .validation import ReconstructionInputError

__all__ = ["PhaseSteps", "phase_steps", "split_orientation"]


@dataclass
class PhaseSteps:
    """phase_rad: (N,) step of each frame relative to the reference frame, wrapped to (-pi, pi];
    background, cross_p, cross_q: (H, W) the per-pixel a, p, q of the model; residual_rms: rms of the
    model misfit over all pixels and frames, relative to the rms of the frames' variation;
    iterations: alternations run."""

    phase_rad: np.ndarray
    background: np.ndarray
    cross_p: np.ndarray
    cross_q: np.ndarray
    residual_rms: float
    iterations: int

    @property
    def cross_term(self) -> np.ndarray:
        """2 B conj(A) (complex (H, W)): the interference term of the stepped and reference regions."""
        return self.cross_p - 1j * self.cross_q

    def flipped(self) -> "PhaseSteps":
        """The same solution with the other sign of the steps (D -> -D, q -> -q)."""
        return PhaseSteps(-self.phase_rad, self.background, self.cross_p, -self.cross_q, self.residual_rms,
                          self.iterations)


def _wrap(p):
    return np.angle(np.exp(1j * np.asarray(p)))


def phase_steps(frames, *, reference: int = 0, iterations: int = 3000, tol_rad: float = 1e-7,
                valid=None) -> PhaseSteps:
    """Recover the phase steps D_n from N frames (N, H, W) (any linear units, offset allowed).

    valid: optional boolean (H, W) map of the pixels to use (e.g. not saturated in any frame); the
    others are left out of the fit and get a, p, q = 0.

    reference: index of the frame taken with the stepped region at the reference level (D = 0 there).
    Needs N >= 4 frames whose steps point in at least three directions on the circle (four quarter
    steps, two antipodal pairs, are degenerate: skewed quadratures fit as well). Steps that go round
    the circle, as in the response measurement, converge in tens of alternations; few steps crowded
    together (or spanning well under pi) converge slowly, up to the ``iterations`` cap.
    """
    f = np.asarray(frames, dtype=np.float64)
    if f.ndim != 3 or f.shape[0] < 3:
        raise ReconstructionInputError(f"frames must be (N, H, W) with N >= 3 frames; got shape {f.shape}.")
    if not np.all(np.isfinite(f)):
        raise ReconstructionInputError("frames hold non-finite values.")
    n, h, w = f.shape
    if not 0 <= reference < n:
        raise ReconstructionInputError(f"reference frame {reference} outside 0..{n - 1}.")
    keep = np.ones(h * w, dtype=bool) if valid is None else np.asarray(valid, dtype=bool).reshape(-1)
    if keep.size != h * w or keep.sum() < 3:
        raise ReconstructionInputError(f"valid must be a boolean (H, W) = ({h}, {w}) map with at least 3 pixels set.")
    d = f.reshape(n, h * w)[:, keep]
    centred = d - d.mean(axis=0)
    scale = float(np.sqrt(np.mean(centred**2)))
    if scale == 0:
        raise ReconstructionInputError("the frames do not change: the stepped region changes nothing on the camera "
                                       "(is the modulator showing the images, and the beam on it?)")
    # principal-component start: the two leading temporal components are (a mix of) cos D and sin D
    u, s, _ = np.linalg.svd(centred, full_matrices=False)
    steps = np.arctan2(u[:, 1] * s[1], u[:, 0] * s[0])
    done = 0
    for done in range(1, int(iterations) + 1):
        basis = np.stack([np.ones(n), np.cos(steps), np.sin(steps)], axis=1)  # (N, 3)
        coef, *_ = np.linalg.lstsq(basis, d, rcond=None)  # (3, P): a, p, q
        a, p, q = coef
        pq = np.stack([p, q], axis=1)  # (P, 2)
        cs, *_ = np.linalg.lstsq(pq, (d - a).T, rcond=None)  # (2, N)
        new = np.arctan2(cs[1], cs[0])
        change = float(np.max(np.abs(_wrap(new - steps))))
        steps = new
        if change < tol_rad:
            break
    basis = np.stack([np.ones(n), np.cos(steps), np.sin(steps)], axis=1)
    coef, *_ = np.linalg.lstsq(basis, d, rcond=None)
    misfit = d - basis @ coef
    # steps measured from the reference frame: cos(D' + r) p + sin(D' + r) q with r = D_ref is
    # cos D' (p cos r + q sin r) + sin D' (q cos r - p sin r)
    r = float(steps[reference])
    p = np.cos(r) * coef[1] + np.sin(r) * coef[2]
    q = np.cos(r) * coef[2] - np.sin(r) * coef[1]
    steps = _wrap(steps - r)
    def full(v):
        out = np.zeros(h * w)
        out[keep] = v
        return out.reshape(h, w)

    return PhaseSteps(phase_rad=steps, background=full(coef[0]), cross_p=full(p),
                      cross_q=full(q), residual_rms=float(np.sqrt(np.mean(misfit**2))) / scale,
                      iterations=done)


def split_orientation(steps: PhaseSteps, axis: int = 1) -> float:
    """Evidence for the sign of the steps when the stepped region lies at the higher indices along ``axis``
    (1 = columns) of the modulator image: the energy of the cross-correlation of the two regions at positive
    lags over that at negative lags. > 1: the sign is right; < 1: use ``steps.flipped()``; near 1: the
    geometry does not tell (a field symmetric under half-grid translation)."""
    if axis not in (0, 1):
        raise ReconstructionInputError(f"axis must be 0 (rows) or 1 (columns); got {axis}.")
    corr = np.fft.ifft2(steps.cross_term)  # sum_s x_stepped(s + lag) conj(x_ref(s))
    e = np.abs(corr) ** 2
    if axis == 0:
        e = e.T
    w = e.shape[1]
    half = w // 2
    positive = float(e[:, 1:half].sum())
    negative = float(e[:, w - half + 1:].sum())
    if negative == 0:
        return float("inf") if positive > 0 else 1.0
    return positive / negative
