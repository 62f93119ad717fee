"""A private Xvfb for display tests, and X screenshots read back with GetImage."""

from __future__ import annotations

import contextlib
import os
import shutil
import subprocess

import numpy as np
import pytest


@contextlib.contextmanager
def xvfb_server(*screens: str):
    """Start ``Xvfb -screen 0 S0 -screen 1 S1 ...`` on a free display number; yield (display, process)."""
    exe = shutil.which("Xvfb")
    if exe is None:
        if os.environ.get("CI"):
            pytest.fail("Xvfb is not installed: .ci/run must install it (apt-get install xvfb)")
        pytest.skip("Xvfb not installed (apt-get install xvfb)")
    args = [exe, "-displayfd", None, "-nolisten", "tcp"]
    for i, geom in enumerate(screens):
        args += ["-screen", str(i), geom]
    r, w = os.pipe()
    args[2] = str(w)
    proc = subprocess.Popen(args, pass_fds=(w,), stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    os.close(w)
    with os.fdopen(r) as f:
        number = f.readline().strip()
    if not number:
        proc.kill()
        proc.wait(10)
        pytest.fail("Xvfb did not start")
    try:
        yield ":" + number, proc
    finally:
        if proc.poll() is None:
            proc.terminate()
            try:
                proc.wait(10)
            except subprocess.TimeoutExpired:
                proc.kill()
                proc.wait(10)


def screenshot(display: str, x_screen: int, x: int, y: int, width: int, height: int) -> np.ndarray:
    """The screen's pixels as (rows, cols, 3) uint8 (R, G, B), read back from the X server (GetImage
    of the root window: what the screen shows, whatever window is on top)."""
    from Xlib import X, display as xdisplay

    d = xdisplay.Display(display)
    try:
        scr = d.screen(x_screen)
        img = scr.root.get_image(x, y, width, height, X.ZPixmap, 0xFFFFFFFF)
        visual = next(v for dep in scr.allowed_depths for v in dep.visuals if v.visual_id == scr.root_visual)
        order = "<" if d.display.info.image_byte_order == X.LSBFirst else ">"
        px = np.frombuffer(img.data, dtype=order + "u4").reshape(height, width)
        out = np.empty((height, width, 3), dtype=np.uint8)
        for i, mask in enumerate((visual.red_mask, visual.green_mask, visual.blue_mask)):
            shift = (mask & -mask).bit_length() - 1
            out[..., i] = (px & np.uint32(mask)) >> np.uint32(shift)
        return out
    finally:
        d.close()



def expected_phase_image(mask, profile, screen_shape, superpixel, offset, active, outside, correction=None,
                         blaze=(0.0, 0.0)) -> np.ndarray:
    """The grey image a phase SLM should show for ``mask``, computed the test's own way: upsample
    with a Kronecker product, paste at the offset, add the correction and ramp over the whole
    screen, look the phase up in the response table, put the fixed level outside."""
    sr, sc = superpixel
    up = np.kron(np.angle(mask), np.ones((sr, sc)))
    phase = np.zeros(screen_shape)
    r0, c0 = offset
    phase[r0:r0 + up.shape[0], c0:c0 + up.shape[1]] = up
    rr, cc = np.indices(screen_shape)
    if correction is not None:
        phase = phase + correction
    if blaze[0]:
        phase = phase + 2 * np.pi * rr / blaze[0]
    if blaze[1]:
        phase = phase + 2 * np.pi * cc / blaze[1]
    grey = profile.grey_for_phase(phase).astype(np.uint8)
    a0, b0, ah, aw = active
    inside = (rr >= a0) & (rr < a0 + ah) & (cc >= b0) & (cc < b0 + aw)
    inside &= (rr >= r0) & (rr < r0 + up.shape[0]) & (cc >= c0) & (cc < c0 + up.shape[1])
    return np.where(inside, grey, np.uint8(outside))
