"""Modulator driver ``display``: a phase SLM or a DMD driven as a monitor of the X server.

Most liquid-crystal phase SLMs and many DMD kits take an 8-bit image on a display output
(common practice, no source). This driver shows mask k as a borderless full-screen image on one
chosen screen. The images are computed when the masks are loaded (``display_images``: phase
response, wavefront correction, blazed grating, mask -> device pixel mapping; or on/off levels
for a DMD) and uploaded into the X server, so ``show(k)`` is a buffer swap. ``show`` returns only
once the X server reports the image presented (Present extension: the refresh it reached the
screen); the sequencer then waits ``settle_s`` (liquid crystal: tens of milliseconds).

The X connection lives in a child process (``display_x11``), so the GUI loop cannot stall
acquisition or the control socket (the link to it: ``display_link``; the screen choice:
``display_screens``). When the window is closed, the screen unplugged or the X
server stops, ``show`` raises ``DeviceDisconnected``: the sequencer closes the shutter, tries
to reconnect (a new window) and pauses if it cannot.

Needs the optional extra ``display`` (python-xlib): ``pip install 'maskrun[display]'``.
"""

from __future__ import annotations

import collections
import hashlib
import json
import os
import queue
import re
import shutil
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path
from typing import Literal

import numpy as np
from pydantic import Field, model_validator

from .base import DriverSettings, Modulator
from .display_images import (BINARY, PHASE, binary_images, check_mask_family, grey_image, make_mapping,
                             phase_images)
from .display_link import DisplayLink
from .display_screens import _GEOMETRY, _screen_line, choose_screen, label_screens  # noqa: F401
from .errors import DeviceDisconnected, DeviceFault, DeviceMisconfigured, DeviceTimeout
from .modulator_profile import ModulatorProfile, ModulatorProfileError, linear_profile

__all__ = ["DisplayModulator", "choose_screen", "load_correction"]


def load_correction(path: Path, grey_levels_per_2pi: float) -> np.ndarray:
    """A wavefront-correction image as phase in radians (float64, device pixels).

    .npy of floats: radians. .npy of integers or an 8-bit .png (as makers supply them): grey
    levels, phase = 2π · grey / grey_levels_per_2pi."""
    try:
        if path.suffix.lower() == ".npy":
            img = np.load(path, allow_pickle=False)
        elif path.suffix.lower() == ".png":
            import matplotlib.image

            img = matplotlib.image.imread(str(path))
            if img.dtype.kind == "f":  # matplotlib gives PNG as floats in 0..1
                img = np.round(img * 255).astype(np.int64)
        else:
            raise DeviceMisconfigured(f"{path}: a correction image must be .npy or .png", device="modulator",
                                      hint="save it as .npy (radians, or integer grey levels) or as an 8-bit PNG")
    except (OSError, ValueError) as exc:
        raise DeviceMisconfigured(f"{path}: cannot read the wavefront-correction image ({exc})", device="modulator",
                                  hint="check the path in [modulator.settings] correction") from None
    if img.ndim == 3:
        if not (np.all(img[..., 0] == img[..., 1]) and np.all(img[..., 0] == img[..., 2])):
            raise DeviceMisconfigured(f"{path}: the correction image is in colour; it must be grey", device="modulator",
                                      hint="give a single-channel image")
        img = img[..., 0]
    if img.ndim != 2:
        raise DeviceMisconfigured(f"{path}: the correction image has shape {img.shape}, expected (rows, cols)",
                                  device="modulator", hint="give one 2-D image of the modulator's resolution")
    if img.dtype.kind == "f":
        if not np.all(np.isfinite(img)):
            raise DeviceMisconfigured(f"{path}: the correction image has NaN or infinite values", device="modulator",
                                      hint="give finite phases in radians")
        return img.astype(np.float64)
    return img.astype(np.float64) * (2 * np.pi / float(grey_levels_per_2pi))


class DisplayModulator(DisplayLink, Modulator):
    """Phase SLM or DMD driven as a display: full-screen grey images on one screen of the X server."""

    class Settings(DriverSettings):
        screen: int | str | None = Field(None, description="the modulator's screen: index, name (e.g. 'HDMI-1', "
                                         "'1/screen') or geometry 'WxH+X+Y'; 'maskrun screens' lists them")
        x_display: str | None = Field(None, description="X display, e.g. ':0' (default: $DISPLAY)")
        device: Literal["phase", "binary_amplitude"] = Field(
            "phase", description="'phase': a phase-only SLM (grey level = phase); 'binary_amplitude': a DMD (on/off)")
        grey_levels_per_2pi: float = Field(256.0, gt=0, description="nominal linear response: grey levels for 2 pi "
                                           "(used when no profile is given)")
        profile: str | None = Field(None, description="measured phase response (modulator profile JSON); overrides "
                                    "grey_levels_per_2pi")
        correction: str | None = Field(None, description="wavefront-correction image (.npy radians or integer grey, "
                                       ".png 8-bit grey), full screen size, added modulo 2 pi")
        correction_grey_levels_per_2pi: float | None = Field(
            None, gt=0, description="grey levels for 2 pi in an integer correction image (default grey_levels_per_2pi)")
        blaze_period_px: tuple[float, float] = Field(
            (0.0, 0.0), description="blazed grating period (rows, cols) in device pixels; 0 = no ramp on that axis")
        superpixel_px: tuple[int, int] = Field((1, 1), description="device pixels (rows, cols) per mask pixel")
        offset_px: tuple[int, int] | None = Field(None, description="device pixel (row, col) of the mask's top-left "
                                                  "corner (default: centred)")
        active_region_px: tuple[int, int, int, int] | None = Field(
            None, description="modulated region (row0, col0, rows, cols) in device pixels (default: the mask's footprint)")
        outside_grey: int = Field(0, ge=0, le=255, description="grey level outside the active region")
        on_grey: int = Field(255, ge=0, le=255, description="DMD: grey level of an 'on' mask pixel")
        off_grey: int = Field(0, ge=0, le=255, description="DMD: grey level of an 'off' mask pixel")
        settle_s: float = Field(0.03, ge=0, description="wait after the image is presented, s (liquid crystal: tens "
                                "of ms; DMD: about 0)")
        present_timeout_s: float = Field(2.0, gt=0, description="longest wait for the X server to present an image, s")
        open_timeout_s: float = Field(30.0, gt=0, description="longest wait to open the screen and upload the images, s")
        readback_check: bool = Field(False, description="read the screen back after every show and refuse a "
                                     "mismatch (commissioning; costs a screen read per mask)")
        covered_check: bool = Field(False, description="refuse a show while the X server reports another window "
                                    "covering the modulator's window (desktops without a compositing manager only: "
                                    "a compositor's overlay always counts as covering)")
        presented_log: str | None = Field(None, description="append one JSON line per presented image to this file")

        @model_validator(mode="after")
        def _device_options(self):
            if self.device == BINARY:
                used = [k for k in ("profile", "correction", "correction_grey_levels_per_2pi")
                        if getattr(self, k) is not None]
                if any(self.blaze_period_px):
                    used.append("blaze_period_px")
                if used:
                    raise ValueError(f"{', '.join(used)}: a binary-amplitude device (DMD) shows only on/off levels; "
                                     "these settings are for a phase SLM (device = 'phase')")
            return self

    def __init__(self, settings, context=None):
        super().__init__(settings, context)
        self._proc: subprocess.Popen | None = None
        self._replies: queue.Queue = queue.Queue()
        self._lost: str | None = None
        self._next_id = 0
        self._stderr: collections.deque = collections.deque(maxlen=40)
        self.screens: list[dict] = []
        self.screen: dict | None = None
        self.mapping = None
        self.images: np.ndarray | None = None
        self._images_key = None
        self.image_sha256: list[str] = []
        self.presented: collections.deque = collections.deque(maxlen=100000)
        self.shown: int | None = None
        self._presented_at = -float("inf")
        self._profile: ModulatorProfile | None = None
        self._correction: np.ndarray | None = None
        self._grey_shown = False  # a show_grey image, not the masks, is in the display process

    # ------------------------------------------------------------ config time (the child process: display_link)
    def _path(self, name: str) -> Path:
        p = Path(name).expanduser()
        return p if p.is_absolute() else Path(self.context.config_dir) / p

    @property
    def wavelength_m(self) -> float | None:
        return getattr(self.context, "wavelength_m", None)

    def phase_profile(self) -> ModulatorProfile:
        """The phase response in use: the profile file, or the linear table at the laser's wavelength."""
        if self._profile is None:
            s = self.settings
            if s.profile:
                try:
                    prof = ModulatorProfile.load(self._path(s.profile))
                except ModulatorProfileError as exc:
                    raise DeviceMisconfigured(str(exc), device="modulator",
                                              hint="measure the response or fix the path in [modulator.settings] profile") from None
                lam = self.wavelength_m
                if lam is not None and abs(prof.wavelength_m - lam) > 1e-3 * lam:
                    raise DeviceMisconfigured(
                        f"the phase response {s.profile} holds for {prof.wavelength_m * 1e9:.1f} nm, the laser is "
                        f"{lam * 1e9:.1f} nm (the response depends on the wavelength)", device="modulator",
                        hint="measure the response at this laser's wavelength, or check [laser] wavelength_m")
                self._profile = prof
            elif getattr(self.context, "modulator_profile", None) is not None:
                self._profile = self.context.modulator_profile  # [modulator] profile (checked against the laser)
            else:
                self._profile = linear_profile(s.grey_levels_per_2pi, self.wavelength_m or 1.0)
        return self._profile

    def check_masks(self, family: str, masks: np.ndarray) -> None:
        """Refuse (DeviceMisconfigured) a mask family this device cannot impose; read the profile and the
        correction image now, so their errors come when the config is read."""
        check_mask_family(self.settings.device, family, masks)
        if self.settings.device == PHASE:
            self.phase_profile()
            if self.settings.correction and self._correction is None:
                s = self.settings
                self._correction = load_correction(self._path(s.correction),
                                                   s.correction_grey_levels_per_2pi or s.grey_levels_per_2pi)

    # ------------------------------------------------------------ life cycle
    def open(self) -> None:
        if self._proc is not None and self._proc.poll() is None and not self._lost:
            return
        self.close()
        self._spawn()
        try:
            hello = self._wait(None, self.settings.open_timeout_s, "connecting to the X server")
            self.screens = label_screens(hello["screens"])
            self.screen = choose_screen(self.settings.screen, self.screens)
            self._request(self.settings.open_timeout_s, f"opening screen {self.screen['label']}", op="open",
                          screen=self.screen["index"])
        except BaseException:
            self.close()
            raise

    def _kill(self) -> None:
        proc = self._proc
        if proc is not None and proc.poll() is None:
            proc.kill()
            proc.wait(5)
        self.close()

    def close(self) -> None:
        proc, self._proc = self._proc, None
        if proc is None:
            return
        if proc.poll() is None:
            try:
                proc.stdin.write(json.dumps({"op": "quit"}) + "\n")
                proc.stdin.flush()
            except (BrokenPipeError, OSError, ValueError):
                pass
            try:
                proc.wait(5)
            except subprocess.TimeoutExpired:
                proc.kill()
                proc.wait(5)
        for stream in (proc.stdin, proc.stdout, proc.stderr):
            try:
                stream.close()
            except (OSError, ValueError):
                pass

    # ------------------------------------------------------------ masks
    def device_images(self, masks: np.ndarray) -> np.ndarray:
        """The (K, rows, cols) uint8 images for ``masks`` on the chosen screen (needs open())."""
        if self.screen is None:
            raise DeviceDisconnected("the display modulator is not open", device="modulator", hint="open it first")
        masks = np.asarray(masks)
        if masks.ndim != 3 or masks.shape[0] < 1:
            raise DeviceMisconfigured(f"mask set must have shape (K, H, W) with K >= 1, got {masks.shape}",
                                      device="modulator", hint="check the mask family settings of the run")
        s = self.settings
        self.mapping = make_mapping((self.screen["height"], self.screen["width"]), masks.shape[1:], s.superpixel_px,
                                    s.offset_px, s.active_region_px, s.outside_grey)
        if s.device == BINARY:
            return binary_images(masks, self.mapping, s.on_grey, s.off_grey)
        if s.correction and self._correction is None:
            self._correction = load_correction(self._path(s.correction),
                                               s.correction_grey_levels_per_2pi or s.grey_levels_per_2pi)
        return phase_images(masks, self.mapping, self.phase_profile(), self._correction, s.blaze_period_px)

    def load(self, masks: np.ndarray) -> None:
        masks = np.asarray(masks)
        key = (hashlib.sha256(np.ascontiguousarray(masks).tobytes()).hexdigest(), masks.shape, masks.dtype.str,
               None if self.screen is None else (self.screen["width"], self.screen["height"]))
        if self.images is not None and key == self._images_key:
            images = self.images  # a reconnect to the same screen: the images are already computed
        else:
            images = self.device_images(masks)
        self._upload(images, "uploading the mask images")
        self._grey_shown = False
        self.images, self._images_key = images, key
        self.image_sha256 = [hashlib.sha256(np.ascontiguousarray(im).tobytes()).hexdigest() for im in images]

    def _upload(self, images: np.ndarray, what: str) -> None:
        folder = tempfile.mkdtemp(prefix="maskrun-display-")
        try:
            path = os.path.join(folder, "images.npy")
            np.save(path, images)
            reply = self._request(self.settings.open_timeout_s, what, op="load", path=path)
        finally:
            shutil.rmtree(folder, ignore_errors=True)
        if reply.get("count") != images.shape[0]:
            raise DeviceFault(f"uploaded {images.shape[0]} images, the display process holds {reply.get('count')}",
                              device="modulator")

    def show_grey(self, grey: np.ndarray) -> None:
        """Show raw grey levels (H, W), mapped to device pixels like a mask; see ``Modulator.show_grey``.
        The display process then holds this one image; the next ``show(k)`` uploads the masks again."""
        if self.images is None or self.mapping is None:
            raise DeviceMisconfigured("no masks loaded", device="modulator", hint="call load(masks) before show_grey()")
        image = grey_image(grey, self.mapping)
        self._grey_shown = True
        self.shown = None
        self._upload(image[None], "uploading a grey image")
        s = self.settings
        reply = self._request(s.present_timeout_s, "showing a grey image", op="show", index=0, readback=s.readback_check)
        self._presented_at = time.monotonic()
        record = {"time_s": time.time(), "index": None, "grey_sha256": hashlib.sha256(image.tobytes()).hexdigest(),
                  **{k: reply[k] for k in ("serial", "msc", "ust", "mode") if k in reply}}
        self.presented.append(record)
        if reply.get("mode") == "skip":
            raise DeviceFault("the X server skipped the grey image", device="modulator")
        if s.readback_check and not (reply.get("match") and reply.get("grey")):
            raise DeviceFault("the screen read back after showing a grey image is not that image", device="modulator",
                              hint="another window may cover the modulator's screen, or the X server alters colours")

    def show(self, index: int) -> None:
        index = int(index)
        if self.images is None:
            raise DeviceMisconfigured("no masks loaded", device="modulator", hint="call load(masks) before show()")
        if self._grey_shown:  # a calibration image replaced the masks in the display process
            self._upload(self.images, "uploading the mask images again")
            self._grey_shown = False
        if not 0 <= index < len(self.images):
            raise DeviceMisconfigured(f"mask {index} outside 0..{len(self.images) - 1}", device="modulator",
                                      hint="the run asked for a mask that was not loaded")
        s = self.settings
        reply = self._request(s.present_timeout_s, f"showing mask {index}", op="show", index=index,
                              readback=s.readback_check)
        self._presented_at = time.monotonic()
        record = {"time_s": time.time(), "index": index, **{k: reply[k] for k in ("serial", "msc", "ust", "mode", "sha256")
                                                              if k in reply}}
        self.presented.append(record)
        if s.presented_log:
            with open(self._path(s.presented_log), "a", encoding="utf-8") as f:
                f.write(json.dumps(record) + "\n")
        if reply.get("mode") == "skip":
            self.shown = None
            raise DeviceFault(f"the X server skipped the image of mask {index} (another image replaced it before "
                              "it reached the screen)", device="modulator")
        if s.covered_check and reply.get("covered"):
            self.shown = None
            raise DeviceFault(f"another window covers part of the modulator's screen (mask {index})", device="modulator",
                              hint="close the window, notification or screen saver on the modulator's screen; "
                              "keep the desktop off that screen")
        if s.readback_check and not (reply.get("match") and reply.get("grey")):
            self.shown = None
            raise DeviceFault(f"the screen read back after showing mask {index} is not its image "
                              f"({'not grey' if not reply.get('grey') else 'other grey levels'})", device="modulator",
                              hint="another window may cover the modulator's screen, or the X server alters colours "
                              "(colour management, a compositor's effects); close them")
        self.shown = index

    @property
    def settle_s(self) -> float:
        return float(self.settings.settle_s)

    def ready(self) -> bool:
        if self._lost:
            raise self._disconnected(f"display lost: {self._lost}")
        return self.shown is not None and time.monotonic() - self._presented_at >= self.settings.settle_s

    # ------------------------------------------------------------ record
    def describe(self) -> dict:
        """What the run file records: the screen, the mapping, the response and correction used."""
        s = self.settings
        out = {"driver": "display", "device": s.device, "settle_s": s.settle_s,
               "screen": {k: self.screen[k] for k in ("label", "name", "x_screen", "x", "y", "width", "height")}
               if self.screen else None,
               "mapping": self.mapping.as_dict() if self.mapping else None,
               "image_sha256": self.image_sha256}
        if s.device == BINARY:
            out.update(on_grey=s.on_grey, off_grey=s.off_grey)
        else:
            prof = self.phase_profile()
            if s.profile:
                source = str(self._path(s.profile))
            elif getattr(self.context, "modulator_profile", None) is not None:
                source = "[modulator] profile of the bench config"
            else:
                source = f"linear, {s.grey_levels_per_2pi:g} grey levels per 2 pi"
            out["response"] = {"source": source, **prof.model_dump()}
            out["blaze_period_px"] = list(s.blaze_period_px)
            if s.correction:
                corr = self._correction
                out["correction"] = {"path": str(self._path(s.correction)),
                                     "sha256_rad_float64": hashlib.sha256(corr.tobytes()).hexdigest() if corr is not None else None}
        return out
