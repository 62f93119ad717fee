"""When an iteration loop stops: the solvers' stoppers (tolerance, stall, precision floor) and the
hybrid's switch from RAAR to error reduction."""
from __future__ import annotations

import numpy as np

# stop reasons that mean "converged" (the others: "iterations", "time budget", "stalled", ...)
CONVERGED_REASONS = ("tolerance", "converged", "precision floor")


class _Stopper:
    """When to stop: residual <= tol ("tolerance"); residual improving by less than stall_tol
    over ``window`` iterations ("stalled"); and, when ``floor`` > 0, residual below the rounding
    floor of the working precision and no longer improving by 1 % over the window
    ("precision floor": the tolerance cannot be met in this precision, more iterations only
    spend the budget)."""

    def __init__(self, tol: float, stall_tol: float, window: int = 20, floor: float = 0.0):
        self.tol, self.stall_tol, self.window, self.floor = tol, stall_tol, window, floor
        self.reason = ""

    def done(self, residuals: list) -> bool:
        r = residuals[-1]
        if not np.isfinite(r):
            return False
        if r <= self.tol:
            self.reason = "tolerance"
            return True
        if self.floor > 0 and r <= self.floor and len(residuals) > self.window \
                and residuals[-1 - self.window] - r <= 0.01 * residuals[-1 - self.window]:
            self.reason = "precision floor"
            return True
        if self.stall_tol > 0 and len(residuals) > self.window:
            prev = residuals[-1 - self.window]
            if prev - r <= self.stall_tol * prev:
                self.reason = "stalled"
                return True
        return False


class _SwitchStopper(_Stopper):
    """Stops the RAAR phase of the hybrid: overall tolerance met, in the ER basin, or RAAR stalled."""

    def __init__(self, outer: _Stopper, switch_residual: float, stall_fraction: float, window: int = 20):
        super().__init__(outer.tol, 0.0, window)
        self.outer = outer
        self.switch_residual = switch_residual
        self.stall_fraction = stall_fraction

    def done(self, residuals: list) -> bool:
        if self.outer.done(residuals):
            self.reason = self.outer.reason
            return True
        r = residuals[-1]
        if np.isfinite(r) and r <= self.switch_residual:
            self.reason = "switch"
            return True
        if len(residuals) > self.window:
            prev = residuals[-1 - self.window]
            if prev - r <= self.stall_fraction * prev:
                self.reason = "switch"
                return True
        return False
