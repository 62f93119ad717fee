"""The layout of the run file (written by ``store.RunStore``): its format, the frame flags, the row
dtypes, the header written once at creation, and the writing of that layout into a new file.

Layout (format ``maskrun-run`` version 2; documented in docs/run-file.md). Version 2 is version 1
plus the NeXus groups made by ``daemon.record.nexus`` (NXdata default plots ``/entry/data`` and
``/entry/reconstruction``, ``/entry/instrument`` with NXsource/NXdetector/modulator, NXsample, NXuser,
start_time/end_time, units), which hold hard links to the datasets below, never copies:

    /entry                      group, NX_class=NXentry; attributes below
    /entry/frames               (N, H, W) camera counts as delivered, one frame per chunk
    /entry/frame_info           (N,) compound: one row per frame (FRAME_INFO_DTYPE)
    /entry/darks                (D, H, W) dark frames (shutter closed)
    /entry/dark_info            (D,) compound, same fields as frame_info
    /entry/masks                (K, H, W) complex64, the mask set in grid orientation
    /entry/estimates            (P, H, W) complex64, sqrt(incident photons per second)
    /entry/estimate_info        (P,) compound (ESTIMATE_INFO_DTYPE)
    /entry/events               (E,) compound: the append-only run log (EVENT_DTYPE)
    /entry/refused              (R, H, W) frames taken but refused for the frame set (id gap, saturated
                                and retaken shorter, shutter found closed); kept, never used
    /entry/refused_info         (R,) compound, same fields as frame_info; ``flags`` says why
    /entry/truth                (H, W) complex128, simulated benches only, same units as estimates
    /entry/flat_field           (H, W) float32, per-pixel response (mean 1) from the camera profile, only
                                when the profile has one; electrons = (counts - dark) / flat / gain

Attributes of /entry (written once, before the file goes into single-writer /
multiple-reader mode): format, format_version, run_name, created_utc,
config_toml, safety_acknowledgement (JSON), grid_shape, mask_count,
frame_orientation, laser_wavelength_m, camera_bit_depth, and (written by
``session.run_header``) run_plan and the camera response actually used:
response_gain_dn_per_e, response_offset_dn, response_quantum_efficiency,
response_profile (the profile path, "" without one).
"""

from __future__ import annotations

import json
from dataclasses import dataclass

import h5py
import numpy as np

from maskrun.daemon.record.nexus import iso_utc, write_nexus

FORMAT_NAME = "maskrun-run"
FORMAT_VERSION = 2  # 2: NeXus (NXdata default plots, NXinstrument, NXsample, start/end time, units); 1: no NeXus groups
READABLE_VERSIONS = (1, 2)  # every version this code reads (a version 1 file keeps its layout when resumed)

# Per-frame flag bits (frame_info['flags']).
FLAG_SATURATED = 1 << 0  # saturated fraction above the limit
FLAG_PHOTONS_LOW = 1 << 1  # photons below the minimum
FLAG_PHOTONS_HIGH = 1 << 2  # photons above the maximum
FLAG_RETAKEN = 1 << 3  # this frame replaced a stale, dropped or failed attempt
FLAG_ID_GAP = 1 << 4  # the camera frame id jumped (a frame was dropped by the camera)
FLAG_TIMEOUT_RETRIED = 1 << 5  # one or more grab timeouts before this frame
FLAG_EXPOSURE_SHORTENED = 1 << 6  # exposure was shortened after saturation
FLAG_AFTER_RESUME = 1 << 7  # first frame set after a resume (a gap in time precedes it)
FLAG_MODULATOR_RETRIED = 1 << 8  # the modulator needed more than one command to show this mask
FLAG_RECONNECTED = 1 << 9  # a device was reconnected while taking this frame
FLAG_AFTER_PAUSE = 1 << 10  # the run was paused (fault or request) while taking this frame
FLAG_SHUTTER_CLOSED = 1 << 11  # refused frame: the shutter was found closed after the exposure

FLAG_NAMES = {
    FLAG_SATURATED: "saturated",
    FLAG_PHOTONS_LOW: "photons_low",
    FLAG_PHOTONS_HIGH: "photons_high",
    FLAG_RETAKEN: "retaken",
    FLAG_ID_GAP: "frame_id_gap",
    FLAG_TIMEOUT_RETRIED: "timeout_retried",
    FLAG_EXPOSURE_SHORTENED: "exposure_shortened",
    FLAG_AFTER_RESUME: "after_resume",
    FLAG_MODULATOR_RETRIED: "modulator_retried",
    FLAG_RECONNECTED: "reconnected",
    FLAG_AFTER_PAUSE: "after_pause",
    FLAG_SHUTTER_CLOSED: "shutter_closed",
}

FRAME_INFO_DTYPE = np.dtype(
    [
        ("pass_index", "<i4"),  # -1 for dark frames
        ("set_index", "<i4"),  # frame-set attempt; a pass restarted after a fault gets a new one; -1 for darks
        ("mask_index", "<i4"),  # -1 for dark frames
        ("frame_id", "<i8"),  # the camera's own counter
        ("t_request_s", "<f8"),  # epoch seconds when the frame was requested
        ("t_frame_s", "<f8"),  # epoch seconds the camera stamped on the frame
        ("exposure_s", "<f8"),  # exposure actually used
        ("saturated_fraction", "<f4"),
        ("peak_dn", "<u4"),
        ("photons", "<f8"),  # incident photons in the frame (dark-subtracted, from the response)
        ("flags", "<u4"),
        ("attempts", "<u2"),  # grabs it took to get this frame
    ]
)

ESTIMATE_INFO_DTYPE = np.dtype(
    [
        ("pass_index", "<i4"),  # the last pass included
        ("passes_used", "<i4"),
        ("residual", "<f8"),  # relative data residual
        ("error_estimate", "<f8"),  # predicted relative error from the photon count
        ("true_error", "<f8"),  # relative error against the stored truth (NaN without truth)
        ("iterations", "<i4"),
        ("photons", "<f8"),
        ("elapsed_s", "<f8"),
        ("t_s", "<f8"),
        # the precision estimate without a truth (reconstruct.precision; NaN when not computed)
        ("error_predicted", "<f8"),  # photon count + read noise + floors (dark frame, pixel response, quantisation)
        ("error_data", "<f8"),  # from the data misfit (amplitude residual, corrected for the fitted parameters)
        ("misfit_chi2_dof", "<f8"),  # chi^2 per degree of freedom against the noise model (~1: explained)
        ("error_reported", "<f8"),  # what the displays show as the precision
    ]
)

EVENT_MESSAGE_BYTES = 240
EVENT_DTYPE = np.dtype([("t_s", "<f8"), ("level", "S8"), ("kind", "S24"), ("message", f"S{EVENT_MESSAGE_BYTES}")])


class StoreError(OSError):
    """The run file cannot be created, written or read."""


class StoreWriteError(StoreError):
    """Appending to the run file failed (``disk_full`` True for ENOSPC). Rows flushed before are intact."""

    def __init__(self, message: str, disk_full: bool = False):
        super().__init__(message)
        self.disk_full = disk_full


@dataclass
class RunHeader:
    """Everything written once when the file is created."""

    run_name: str
    config_toml: str
    safety_acknowledgement: dict
    grid_shape: tuple[int, int]
    masks: np.ndarray  # (K, H, W) complex
    frame_dtype: np.dtype
    laser_wavelength_m: float
    camera_bit_depth: int
    truth: np.ndarray | None = None
    extra_attrs: dict | None = None
    flat_field: np.ndarray | None = None  # (H, W) per-pixel response, mean 1; stored as /entry/flat_field
    # --- NeXus description (version 2); None / missing keys are recorded as unknown, never guessed ---------
    live_reconstruction: bool = True  # estimates are expected: /entry/reconstruction is made and is the default plot
    source: dict | None = None  # description, power_w, laser_class (the class label of the acknowledgement)
    detector: dict | None = None  # driver, exposure_s, gain_setting, pixel_size_m ((y, x) or one number)
    modulator: dict | None = None  # driver, settings (dict), settle_s, mask_family
    sample: dict | None = None  # name, description
    operator: str = ""  # who ran the bench (the safety acknowledgement's 'who')



def write_layout(f: h5py.File, h: RunHeader) -> None:
    """Write the attributes, the empty datasets and the NeXus groups of a new run file (before SWMR mode)."""
    rows, cols = h.grid_shape
    masks = np.asarray(h.masks)
    f.attrs["format"] = FORMAT_NAME
    f.attrs["format_version"] = FORMAT_VERSION
    e = f.create_group("entry")
    e.attrs["NX_class"] = "NXentry"
    e.attrs["format"] = FORMAT_NAME
    e.attrs["format_version"] = FORMAT_VERSION
    e.attrs["run_name"] = h.run_name
    created = iso_utc()
    e.attrs["created_utc"] = created
    e.attrs["config_toml"] = h.config_toml
    e.attrs["safety_acknowledgement"] = json.dumps(h.safety_acknowledgement)
    e.attrs["grid_shape"] = np.asarray(h.grid_shape, dtype=np.int64)
    e.attrs["mask_count"] = masks.shape[0]
    e.attrs["frame_orientation"] = "centred (zero frequency at the centre; ifftshift to reach the grid convention)"
    e.attrs["laser_wavelength_m"] = float(h.laser_wavelength_m)
    e.attrs["camera_bit_depth"] = int(h.camera_bit_depth)
    e.attrs["estimate_units"] = "sqrt(incident photons per second)"
    for k, v in (h.extra_attrs or {}).items():
        e.attrs[k] = v
    fd = np.dtype(h.frame_dtype)
    e.create_dataset("frames", (0, rows, cols), maxshape=(None, rows, cols), chunks=(1, rows, cols), dtype=fd)
    e.create_dataset("frame_info", (0,), maxshape=(None,), chunks=(256,), dtype=FRAME_INFO_DTYPE)
    e.create_dataset("darks", (0, rows, cols), maxshape=(None, rows, cols), chunks=(1, rows, cols), dtype=fd)
    e.create_dataset("dark_info", (0,), maxshape=(None,), chunks=(64,), dtype=FRAME_INFO_DTYPE)
    e.create_dataset("masks", data=masks.astype(np.complex64))
    e.create_dataset(
        "estimates", (0, rows, cols), maxshape=(None, rows, cols), chunks=(1, rows, cols), dtype=np.complex64
    )
    e.create_dataset("estimate_info", (0,), maxshape=(None,), chunks=(64,), dtype=ESTIMATE_INFO_DTYPE)
    e.create_dataset("events", (0,), maxshape=(None,), chunks=(128,), dtype=EVENT_DTYPE)
    e.create_dataset("refused", (0, rows, cols), maxshape=(None, rows, cols), chunks=(1, rows, cols), dtype=fd)
    e.create_dataset("refused_info", (0,), maxshape=(None,), chunks=(64,), dtype=FRAME_INFO_DTYPE)
    if h.truth is not None:
        e.create_dataset("truth", data=np.asarray(h.truth, dtype=np.complex128))
    if h.flat_field is not None:
        flat = np.asarray(h.flat_field, dtype=np.float32)
        if flat.shape != (rows, cols):
            raise StoreError(f"flat field shape {flat.shape} does not match the frames {(rows, cols)}")
        e.create_dataset("flat_field", data=flat)
    write_nexus(f, e, h, created)  # NeXus groups, links and units (version 2): all before SWMR mode


def frame_info_record(**fields) -> np.void:
    """A FRAME_INFO_DTYPE record; unspecified fields are zero."""
    rec = np.zeros((), dtype=FRAME_INFO_DTYPE)
    for k, v in fields.items():
        rec[k] = v
    return rec


def estimate_info_record(**fields) -> np.void:
    rec = np.zeros((), dtype=ESTIMATE_INFO_DTYPE)
    for name in ("true_error", "error_predicted", "error_data", "misfit_chi2_dof", "error_reported"):
        rec[name] = np.nan
    for k, v in fields.items():
        rec[k] = v
    return rec


def flag_names(flags: int) -> list[str]:
    return [name for bit, name in FLAG_NAMES.items() if flags & bit]
