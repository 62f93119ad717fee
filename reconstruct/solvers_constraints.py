"""The solvers' optional object constraints: a support (zero outside) and nonnegativity (real, >= 0
after removing the global phase), applied in place to an estimate."""
from __future__ import annotations

import numpy as np

from .validation import ReconstructionInputError


class _Constraints:
    """Support and nonnegativity checked against the grid once; calling it applies them to x in place."""

    def __init__(self, support, nonnegative: bool, shape, dtype):
        self.support = None
        if support is not None:
            s = np.asarray(support)
            if s.shape != tuple(shape):
                raise ReconstructionInputError(f"support shape {s.shape} does not match the grid {tuple(shape)}.")
            s = s.astype(bool)
            if not s.any():
                raise ReconstructionInputError("support is empty (all False): nothing would be reconstructed.")
            self.support = s.astype(np.float32 if dtype == np.complex64 else np.float64)
        self.nonnegative = bool(nonnegative)

    @property
    def active(self) -> bool:
        return self.support is not None or self.nonnegative

    def __call__(self, x: np.ndarray) -> np.ndarray:
        if self.support is not None:
            x *= self.support
        if self.nonnegative:
            s = x.sum()
            if s != 0:
                x *= np.conj(s) / abs(s)
            np.maximum(x.real, 0, out=x.real)
            x.imag[...] = 0
        return x
