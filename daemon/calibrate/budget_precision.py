"""The planner's precision models: the relative error a number of detected photons buys, by the
Poisson Cramér-Rao bound or the shot-noise rule, the brightest-to-mean pixel ratio that goes with it,
and the checks of a plan request's numbers (``PlanError``). The models and their sources are
described in ``budget``, which re-exports every name here."""

from __future__ import annotations

import functools
import math
from dataclasses import dataclass

import numpy as np

try:  # the reconstruction package provides the bounds; see the docstring of budget
    from maskrun.reconstruct import bounds as _bounds
except ImportError:  # pragma: no cover - only when reconstruct/ is absent
    _bounds = None

_EULER_GAMMA = 0.5772156649015329
_CRB_MAX_PIXELS = getattr(_bounds, "CRB_MAX_PIXELS", 32 * 32)
_DENSE_MAX_PIXELS = 48 * 48  # estimator='dense' on request: J is (2 * 2304)^2 float64 = 170 MB at most


class PlanError(ValueError):
    """The plan request is malformed (missing or contradictory targets, bad numbers)."""

def speckle_peak_to_mean(pixels: int) -> float:
    """Expected brightest/mean intensity over ``pixels`` speckle pixels: H_n ~ ln n + gamma (n >= 1)."""
    n = max(int(pixels), 1)
    if n < 1000:
        return float(np.sum(1.0 / np.arange(1, n + 1)))
    return math.log(n) + _EULER_GAMMA + 1.0 / (2 * n)

def _shot_noise_relative_error(pixels: int, photons: float) -> float:
    if _bounds is not None:
        return _bounds.shot_noise_relative_error(pixels, photons)
    return math.sqrt(pixels / photons) if photons > 0 else math.inf

def representative_object(grid_shape: tuple[int, int], seed: int = 0) -> np.ndarray:
    """Uniform amplitude, uniformly random phase: the object the planner assumes by default."""
    rng = np.random.default_rng(seed)
    return np.exp(1j * rng.uniform(0.0, 2.0 * np.pi, size=grid_shape))

def _default_masks(mask_count: int, grid_shape, seed: int, family: str = "octanary", levels: int = 8) -> np.ndarray:
    from maskrun.daemon.masks import make_masks

    if family == "file":
        raise PlanError("masks family 'file': pass the loaded masks (masks=...) to plan for them")
    try:
        return make_masks(family, mask_count, tuple(grid_shape), seed=seed, levels=levels)
    except ValueError as exc:
        raise PlanError(str(exc)) from None

def _peak_to_mean(x, m) -> float:
    from maskrun.reconstruct.propagation import forward

    y = forward(x, m)
    return float(np.max(y.max(axis=(1, 2)) / y.mean(axis=(1, 2))))

def _crb_unit(x, m, mask_count, grid_shape, estimator: str = "auto") -> tuple[float, float, str]:
    """(photons * CRB relative error^2, brightest/mean pixel, how it was computed) for object x and masks m.

    Dense Fisher information up to CRB_MAX_PIXELS (unless ``estimator`` says 'matrix_free'),
    the matrix-free estimate above (``bounds.poisson_crb_matrix_free``, 0.5 % standard error).
    """
    if m.shape != (mask_count, *grid_shape):
        raise PlanError(f"masks must have shape {(mask_count, *grid_shape)}, got {m.shape}")
    if x.shape != tuple(grid_shape):
        raise PlanError(f"object_estimate must have the grid shape {tuple(grid_shape)}, got {x.shape}")
    pixels = grid_shape[0] * grid_shape[1]
    dense = estimator == "dense" or (estimator == "auto" and pixels <= _CRB_MAX_PIXELS)
    if estimator == "dense" and pixels > _DENSE_MAX_PIXELS:
        raise PlanError(f"the dense bound is for grids up to {_DENSE_MAX_PIXELS} pixels (its Fisher matrix is "
                        f"(2N)^2 numbers); {grid_shape[0]} x {grid_shape[1]} needs estimator='matrix_free' or 'auto'")
    if dense:
        crb = _bounds.poisson_crb(x, m, 1.0, max_pixels=max(pixels, _CRB_MAX_PIXELS))
        how = "dense Fisher information"
    else:
        crb = _bounds.poisson_crb_matrix_free(x, m, 1.0, target_relative_std=0.005)
        how = (f"matrix-free estimate: trace of the inverse Fisher information by {crb.probes} random probes "
               f"with conjugate gradients, standard error {100 * crb.relative_std:.2g} %")
    if not dense and crb.identifiable and crb.relative_std > 0.02:
        raise PlanError(
            f"the bound for these {mask_count} masks is poorly determined (standard error "
            f"{100 * crb.relative_std:.0f} % after {crb.probes} probes): the Fisher information is nearly singular; "
            "use more masks (K >= 4, octanary masks recommended)")
    if not crb.identifiable or not math.isfinite(crb.relative_error):
        raise PlanError(
            f"the object is not identifiable from these {mask_count} masks (the Fisher information is singular"
            f"{': some pixel is never lit' if not dense else ''}): use more masks (K >= 4, octanary masks "
            "recommended)"
        )
    return crb.photons * crb.relative_error**2, _peak_to_mean(x, m), how

@functools.lru_cache(maxsize=16)
def _crb_default(grid_shape, mask_count, seed, family, mask_seed, levels, estimator) -> tuple[float, float, str]:
    """_crb_unit for the default object and the family's masks (cached: the dense bound costs seconds at 32 x 32)."""
    return _crb_unit(representative_object(grid_shape, seed), _default_masks(mask_count, grid_shape, mask_seed,
                     family, levels), mask_count, grid_shape, estimator)

@dataclass
class _Precision:
    method: str
    note: str
    photons_for_unit_error: float  # photons * relative_error^2 (constant for both models)
    peak_to_mean: float

_ESTIMATORS = ("auto", "dense", "matrix_free")

def _precision_model(grid_shape, mask_count, method, object_estimate, masks, seed, family="octanary",
                     mask_seed=None, levels=8, estimator="auto") -> _Precision:
    pixels = grid_shape[0] * grid_shape[1]
    mask_seed = seed if mask_seed is None else int(mask_seed)
    if estimator not in _ESTIMATORS:
        raise PlanError(f"estimator must be one of {_ESTIMATORS}, got {estimator!r}")
    if method == "auto":
        method = "crb" if _bounds is not None else "shot_noise"
    if method == "crb":
        if _bounds is None:
            raise PlanError("the Cramér-Rao bound needs maskrun.reconstruct.bounds, which is not installed")
        if object_estimate is None and masks is None:
            unit, peak, how = _crb_default(tuple(grid_shape), mask_count, seed, family, mask_seed, levels, estimator)
        else:
            x = representative_object(grid_shape, seed) if object_estimate is None else np.asarray(object_estimate)
            m = _default_masks(mask_count, grid_shape, mask_seed, family, levels) if masks is None else np.asarray(masks)
            unit, peak, how = _crb_unit(x, m, mask_count, grid_shape, estimator)
        what = "the given masks" if masks is not None else f"{family.replace('_', '-')} masks"
        note = (f"Poisson Cramér-Rao bound for {mask_count} {what} and "
                f"{'the given object' if object_estimate is not None else 'a uniform-amplitude random-phase object'}"
                f" ({how}): {unit / pixels:.3g} detected photons per pixel for a relative error of 1")
        return _Precision("crb", note, unit, peak)
    if method == "shot_noise":
        if object_estimate is not None:
            x = np.asarray(object_estimate)
            m = _default_masks(mask_count, grid_shape, mask_seed, family, levels) if masks is None else np.asarray(masks)
            peak = _peak_to_mean(x, m)
        else:
            peak = speckle_peak_to_mean(pixels)
        # relative error = sqrt(pixels / photons)  =>  photons * error^2 = pixels
        probe = 1e6 * pixels
        unit = probe * _shot_noise_relative_error(pixels, probe) ** 2
        return _Precision("shot_noise", "shot-noise rule: relative error ~ sqrt(pixels / photons) (it asks for "
                          "fewer photons than the Cramér-Rao bound: a lower estimate)", unit, peak)
    raise PlanError(f"method must be 'auto', 'crb' or 'shot_noise', got {method!r}")

def predict_relative_error(
    grid_shape: tuple[int, int],
    mask_count: int,
    photons_total: float,
    *,
    method: str = "auto",
    object_estimate: np.ndarray | None = None,
    masks: np.ndarray | None = None,
    seed: int = 0,
    mask_family: str = "octanary",
    mask_seed: int | None = None,
    mask_levels: int = 8,
    estimator: str = "auto",
) -> float:
    """Expected relative error of the recovered field for ``photons_total`` detected photons
    (all frames that go into the estimate), by the same models as ``plan_photons``."""
    grid_shape = _grid(grid_shape)
    model = _precision_model(grid_shape, _count(mask_count), method, object_estimate, masks, seed, mask_family,
                             mask_seed, mask_levels, estimator)
    if not photons_total > 0:
        return math.inf
    return math.sqrt(model.photons_for_unit_error / float(photons_total))

def _grid(grid_shape) -> tuple[int, int]:
    try:
        h, w = (int(v) for v in grid_shape)
    except (TypeError, ValueError):
        raise PlanError(f"grid_shape must be (rows, cols), got {grid_shape!r}") from None
    if h < 1 or w < 1:
        raise PlanError(f"grid_shape must be two positive sizes, got {grid_shape!r}")
    return h, w

def _count(mask_count) -> int:
    if int(mask_count) != mask_count or mask_count < 1:
        raise PlanError(f"mask_count must be a whole number >= 1, got {mask_count!r}")
    return int(mask_count)

def _opt_positive(name: str, value) -> float | None:
    if value is None:
        return None
    value = float(value)
    if not (math.isfinite(value) and value > 0):
        raise PlanError(f"{name} must be a finite number > 0, got {value}")
    return value
