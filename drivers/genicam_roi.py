"""Region of interest on a GenICam camera: what the camera can read, and the nearest valid one.

A camera reads a window ``Width`` x ``Height`` at ``OffsetX``, ``OffsetY`` (SFNC names; after
binning), each a multiple of its step (``inc``) within its limits. ``plan_roi`` turns a ROI in
sensor pixels (row0, col0, rows, cols) into the window the camera reads plus the crop the host
cuts from it: exact when the camera takes the ROI; with ``host_crop`` the smallest window the
camera takes that covers it; otherwise ``RoiRefused`` naming the nearest ROI the camera takes.
"""

from __future__ import annotations

from dataclasses import dataclass

from .genicam_features import IntRange, nearest_step

__all__ = ["AxisLimits", "RoiPlan", "RoiRefused", "plan_roi"]


@dataclass(frozen=True)
class AxisLimits:
    """One axis (columns: Width/OffsetX, rows: Height/OffsetY), in camera (binned) pixels."""

    size: IntRange  # Width or Height with the offset at 0
    offset_inc: int | None  # None: the camera has no offset feature on this axis
    full: int  # sensor extent in binned pixels

    def describe(self) -> str:
        off = "no offset" if self.offset_inc is None else (
            f"offset in steps of {self.offset_inc}" if self.offset_inc > 1 else "any offset")
        return f"{self.size.describe()}, {off}"


@dataclass(frozen=True)
class RoiPlan:
    """camera: (offset_y, offset_x, height, width) in binned pixels; crop: (row0, col0, rows, cols) of the
    delivered window that make the frame (all of it when the camera takes the ROI exactly)."""

    camera: tuple[int, int, int, int]
    crop: tuple[int, int, int, int]

    @property
    def exact(self) -> bool:
        return self.crop == (0, 0, self.camera[2], self.camera[3])


class RoiRefused(ValueError):
    """The camera cannot take the ROI; ``nearest`` is the nearest one it takes (sensor pixels)."""

    def __init__(self, message: str, nearest: tuple[int, int, int, int]):
        super().__init__(message)
        self.nearest = nearest


def _exact(start: int, length: int, ax: AxisLimits) -> bool:
    if not ax.size.valid(length) or start + length > ax.full:
        return False
    if ax.offset_inc is None:
        return start == 0
    return start % ax.offset_inc == 0


def _cover(start: int, length: int, ax: AxisLimits) -> tuple[int, int]:
    """Smallest window (start, length) the camera takes that holds [start, start + length)."""
    inc = ax.offset_inc
    s = 0 if inc is None else (start // inc) * inc
    n = nearest_step(start + length - s, ax.size, upward=True)
    while s + n > ax.full and inc is not None and s >= inc:  # rounding up ran past the edge: move left
        s -= inc
    if s + n > ax.full or s + n < start + length:
        n = nearest_step(ax.full - s, ax.size, upward=False)
    return s, n


def _nearest(start: int, length: int, ax: AxisLimits) -> tuple[int, int]:
    n = nearest_step(length, ax.size)
    if ax.offset_inc is None:
        return 0, n
    inc = ax.offset_inc
    centre = start + length / 2
    s = int(round((centre - n / 2) / inc)) * inc
    s = max(0, min(s, ((ax.full - n) // inc) * inc))
    return s, n


def plan_roi(roi: tuple[int, int, int, int], binning: int, rows_ax: AxisLimits, cols_ax: AxisLimits,
             *, host_crop: bool) -> RoiPlan:
    """The camera window and host crop for ``roi`` (sensor pixels, already checked to fit the sensor)."""
    b = max(1, int(binning))
    r0, c0, rows, cols = roi
    if any(v % b for v in roi):
        nearest = tuple((v // b) * b if i < 2 else max(b, (v // b) * b) for i, v in enumerate(roi))
        raise RoiRefused(f"roi {roi} is not a multiple of the binning {b}", nearest)
    y, x, h, w = r0 // b, c0 // b, rows // b, cols // b
    if _exact(y, h, rows_ax) and _exact(x, w, cols_ax):
        return RoiPlan((y, x, h, w), (0, 0, h, w))
    if host_crop:
        ys, hs = _cover(y, h, rows_ax)
        xs, ws = _cover(x, w, cols_ax)
        if ys <= y and xs <= x and ys + hs >= y + h and xs + ws >= x + w:
            return RoiPlan((ys, xs, hs, ws), (y - ys, x - xs, h, w))
    ys, hs = _nearest(y, h, rows_ax)
    xs, ws = _nearest(x, w, cols_ax)
    nearest = (ys * b, xs * b, hs * b, ws * b)
    raise RoiRefused(f"roi {roi} does not suit the camera (columns: {cols_ax.describe()}; rows: "
                     f"{rows_ax.describe()}; in {'binned ' if b > 1 else ''}pixels); nearest it takes: {nearest}",
                     nearest)
