"""From a GenTL buffer to a frame: pixels (format check, unpacking, host crop), frame id and time stamp.

``FrameCounter`` gives the ids and time stamps a ``Frame`` needs: the camera's own frame counter
and time stamp where the producer reports them, else the host's count and clock, and says which.
The camera's counter may restart (acquisition restarted after a ROI change, camera reopened):
ids are rebased then so they keep advancing, while a gap within one acquisition (a dropped
frame) stays a gap, for the daemon to see. The camera's time stamp counts from the camera's own
epoch, so it is put on the host clock at the first frame of each acquisition.
"""

from __future__ import annotations

import numpy as np

from .errors import DeviceFault, DeviceMisconfigured

__all__ = ["FrameCounter", "buffer_pixels", "buffer_value"]


def buffer_value(buf, name: str):
    """A buffer's info value, or None where the producer does not give it."""
    try:
        return getattr(buf, name)
    except Exception:  # noqa: BLE001 - producers raise NotAvailable for what they do not deliver
        return None


def buffer_pixels(buf, layout, features, camera_window, crop) -> np.ndarray:
    """The frame's pixels (a new array) from a filled GenTL buffer.

    camera_window: (offset_y, offset_x, height, width) the camera reads; crop: (row0, col0, rows, cols)
    of it that make the frame. DeviceMisconfigured if the camera delivers another pixel format than
    the one set, DeviceFault if the buffer is too short for the image it claims."""
    code = buffer_value(buf, "pixel_format")
    if code is not None:
        name = features.enum_symbol_of("PixelFormat", code)
        if name and name != layout.name:
            raise DeviceMisconfigured(f"the camera delivered {name} instead of {layout.name}", device="camera",
                                      hint="another program may have changed the camera's settings; reopen it")
    width = buffer_value(buf, "width") or camera_window[3]
    height = buffer_value(buf, "height") or camera_window[2]
    start = buffer_value(buf, "image_offset") or 0
    raw = memoryview(buf.raw_buffer)[start:]
    try:
        image = layout.to_frame(raw, width, height, buffer_value(buf, "padding_x") or 0)
    except ValueError as exc:
        raise DeviceFault(f"corrupt frame: {exc}", device="camera") from None
    r0, c0, rows, cols = crop
    if (r0, c0, rows, cols) == (0, 0, height, width):
        return image
    return image[r0 : r0 + rows, c0 : c0 + cols].copy()


class FrameCounter:
    """Frame ids and time stamps across acquisitions (see the module docstring)."""

    def __init__(self):
        self.last_id = 0
        self._base: int | None = None
        self._ts_ref: tuple[int, float] | None = None

    def restart(self) -> None:
        """A new acquisition: the camera may restart its counter and its clock."""
        self._base = None
        self._ts_ref = None

    def frame_id(self, camera_id: int | None, *, count_kept: bool = False) -> tuple[int, str]:
        """(id for the Frame, where it comes from). ``count_kept``: count delivered frames even when the
        camera numbers them (free-running: the frames skipped on purpose are not drops)."""
        if camera_id is None:
            self.last_id += 1
            return self.last_id, "host counter (the producer gives no frame id)"
        if count_kept:
            self.last_id += 1
            return self.last_id, "host counter of kept frames (free-running: skipped frames not counted)"
        camera_id = int(camera_id)
        if self._base is None or camera_id + self._base <= self.last_id:
            # first frame of an acquisition, or the camera restarted its counter on its own
            self._base = self.last_id + 1 - camera_id
        self.last_id = camera_id + self._base
        return self.last_id, "camera"

    def timestamp_s(self, camera_ns: int | None, host_s: float) -> tuple[float, str]:
        """(seconds since the epoch, where it comes from) for a frame delivered at host time ``host_s``."""
        if camera_ns is None:
            return host_s, "host clock at delivery (the producer gives no time stamp)"
        if self._ts_ref is None:
            self._ts_ref = (int(camera_ns), host_s)
        return self._ts_ref[1] + (int(camera_ns) - self._ts_ref[0]) * 1e-9, \
            "camera clock, put on the host clock at acquisition start"
