"""Input checks for the reconstruction library.

Every public entry point passes its arrays through these helpers so that bad
input produces a typed error naming the problem and the fix, never a silent
wrong answer.

Policy (also stated in the package docstring):

* Masks must be a (K, H, W) array (or (H, W) for one mask), finite, and not
  zero everywhere. A pixel that no mask illuminates can never be recovered;
  this is allowed (it is how a support stop looks) but is reported by a
  warning and the estimate is set to zero there.
* Intensities must match the mask shape and be finite. Negative values are
  normal after dark-frame subtraction: they are clamped to 0 (documented
  behaviour, no warning). A frame set that is zero everywhere is an error.
* K = 1 is not uniquely solvable (twin image / shift ambiguities): a
  ``NotUniquelySolvableWarning`` is issued, and the solver still runs.
"""
from __future__ import annotations

import warnings

import numpy as np

__all__ = [
    "ReconstructionInputError",
    "NotUniquelySolvableWarning",
    "UnilluminatedPixelsWarning",
    "check_masks",
    "check_intensities",
    "check_object",
    "check_dtype",
    "working_dtype",
    "warn_single_pattern",
]


class ReconstructionInputError(ValueError):
    """Bad input to the reconstruction library (shape, values, dtype).

    The message says what was wrong and what to do about it.
    """


class NotUniquelySolvableWarning(UserWarning):
    """The measurement cannot determine the object uniquely (e.g. K = 1)."""


class UnilluminatedPixelsWarning(UserWarning):
    """Some object pixels have zero weight in every mask and cannot be recovered."""


_ALLOWED_COMPLEX = (np.complex64, np.complex128)


def check_dtype(dtype) -> np.dtype:
    """Return the working complex dtype (complex64 or complex128)."""
    dt = np.dtype(dtype)
    if dt not in [np.dtype(d) for d in _ALLOWED_COMPLEX]:
        raise ReconstructionInputError(
            f"dtype {dt} is not supported: use numpy.complex64 (fast default) "
            "or numpy.complex128 (for errors below ~1e-6)."
        )
    return dt


def working_dtype(dtype, *inputs) -> np.dtype:
    """The complex dtype to compute in: ``dtype`` when given, else the precision of the inputs.

    Precision follows the input, as numpy's own functions do: the working dtype is numpy's
    result type of the inputs' dtypes and complex64 (``numpy.result_type``), so float32 frames
    with complex64 masks compute in complex64 and anything in double precision (float64
    frames, complex128 masks, Python lists) computes in complex128. Integer counts follow
    numpy's promotion too (int16 with complex64 stays complex64, int64 goes to complex128).
    Wider types (longdouble) compute in complex128, the widest supported.
    """
    if dtype is not None:
        return check_dtype(dtype)
    kinds = []
    for a in inputs:
        if a is None:
            continue
        dt = getattr(a, "dtype", None)
        if dt is None:
            dt = np.asarray(a).dtype
        if dt == bool or not np.issubdtype(dt, np.number):
            continue
        kinds.append(dt)
    rt = np.result_type(np.complex64, *kinds)
    return np.dtype(np.complex64) if rt == np.complex64 else np.dtype(np.complex128)


def check_masks(masks, *, warn_k1: bool = True) -> np.ndarray:
    """Validate a mask family; return it as a (K, H, W) complex array.

    A single (H, W) mask is promoted to K = 1 (and warned about).
    Raises ReconstructionInputError for wrong rank, non-finite entries, or a
    family that is zero everywhere.
    """
    m = np.asarray(masks)
    if m.ndim == 2:
        m = m[None]
    if m.ndim != 3:
        raise ReconstructionInputError(
            f"masks must have shape (K, H, W) (or (H, W) for one mask); got shape {m.shape}."
        )
    if min(m.shape) < 1:
        raise ReconstructionInputError(f"masks shape {m.shape} is empty; need K >= 1, H >= 1, W >= 1.")
    if not np.issubdtype(m.dtype, np.number) or m.dtype == bool:
        m = m.astype(np.complex128) if m.dtype == bool else m
        if not np.issubdtype(m.dtype, np.number):
            raise ReconstructionInputError(f"masks must be numeric; got dtype {m.dtype}.")
    if not np.iscomplexobj(m):
        m = m.astype(np.complex64 if m.dtype == np.float32 else np.complex128)
    if not np.all(np.isfinite(m)):
        raise ReconstructionInputError("masks contain NaN or infinite entries: fix the mask file or generator.")
    weight = np.sum(np.abs(m) ** 2, axis=0)
    if not np.any(weight > 0):
        raise ReconstructionInputError(
            "masks are zero everywhere: no light reaches the camera, nothing can be reconstructed. "
            "Check the mask file (wrong scaling or an all-off DMD pattern?)."
        )
    dark = int(np.count_nonzero(weight == 0))
    if dark:
        warnings.warn(
            f"{dark} of {weight.size} object pixels are dark in every mask and cannot be recovered; "
            "the estimate is set to 0 there.",
            UnilluminatedPixelsWarning,
            stacklevel=3,
        )
    if warn_k1 and m.shape[0] == 1:
        warn_single_pattern(stacklevel=4)
    return m


def warn_single_pattern(stacklevel: int = 3) -> None:
    """``NotUniquelySolvableWarning`` for K = 1 with a method other than HIO."""
    warnings.warn(
        "K = 1 mask: phase retrieval from a single pattern is not uniquely solvable without a support "
        "(twin-image and shift ambiguities): use method='hio' (support given or shrink-wrapped, pattern "
        "oversampled 2x), or K >= 4 masks (K = 6-8 octanary masks recover generic objects).",
        NotUniquelySolvableWarning,
        stacklevel=stacklevel,
    )


def check_intensities(intensities, mask_shape: tuple[int, int, int], *, dtype=np.float64) -> np.ndarray:
    """Validate a frame set against the mask shape; return a clamped real copy.

    Negative values (normal after dark subtraction) are clamped to 0.
    Raises ReconstructionInputError on shape mismatch, NaN/inf values or an
    all-zero frame set.
    """
    y = np.asarray(intensities)
    K, H, W = mask_shape
    if y.ndim == 2 and K == 1:
        y = y[None]
    if y.shape != (K, H, W):
        raise ReconstructionInputError(
            f"intensities shape {y.shape} does not match masks shape {(K, H, W)}: "
            "supply one frame per mask, in mask order, cropped to the reconstruction grid."
        )
    if np.iscomplexobj(y):
        raise ReconstructionInputError("intensities must be real photon counts; got a complex array.")
    if not np.issubdtype(y.dtype, np.number):
        raise ReconstructionInputError(f"intensities must be numeric; got dtype {y.dtype}.")
    finite = np.isfinite(y)
    if not finite.all():
        bad = np.argwhere(~finite)
        frames = sorted(set(int(b[0]) for b in bad))
        raise ReconstructionInputError(
            f"intensities contain {bad.shape[0]} NaN or infinite values (frames {frames[:10]}): "
            "drop or re-take these frames; saturated or corrupt frames must not be reconstructed."
        )
    out = np.array(y, dtype=dtype, copy=True)
    np.maximum(out, 0, out=out)
    if not np.any(out > 0):
        raise ReconstructionInputError(
            "the frame set is zero everywhere (after clamping negatives): no signal. "
            "Check the shutter, the exposure and the dark subtraction."
        )
    return out


def check_object(x, shape: tuple[int, int] | None = None, *, name: str = "x") -> np.ndarray:
    """Validate an object/estimate array (H, W), finite; return as a complex array."""
    a = np.asarray(x)
    if a.ndim != 2:
        raise ReconstructionInputError(f"{name} must be a 2-D (H, W) array; got shape {a.shape}.")
    if shape is not None and a.shape != tuple(shape):
        raise ReconstructionInputError(f"{name} shape {a.shape} does not match the mask grid {tuple(shape)}.")
    if not np.all(np.isfinite(a)):
        raise ReconstructionInputError(f"{name} contains NaN or infinite values.")
    if not np.iscomplexobj(a):
        a = a.astype(np.complex128)
    return a
