"""The NeXus part of the run file (format version 2): groups, links, units, default plot.

Written once, at file creation, before the file goes into SWMR mode (``run_layout.write_layout``):
a SWMR writer may not create objects or attributes afterwards, so everything is made here and
later only *data* are written in place: ``/entry/end_time`` (a fixed-length string, at every
flush) and the latest reconstruction ``/entry/reconstruction/{amplitude,phase,...}`` (at every
estimate). The frames are never copied: the NeXus groups hold HDF5 **hard links** to the datasets
of version 1 (``/entry/frames`` is also ``/entry/data/data`` and ``/entry/instrument/detector/data``),
each carrying the NeXus ``target`` attribute naming the original path.

Default plot (NeXus manual, "NeXus Data Rules" / NXdata base class, NIAC 2014 rules: root
``@default`` -> NXentry, NXentry ``@default`` -> NXdata, NXdata ``@signal`` / ``@axes`` /
``@AXISNAME_indices``): the latest reconstruction when the run reconstructs live, else the frames.

Safety values that are not known (laser power, laser class) are written as the string
``"unknown"``; a source type is written only where the wavelength says it (a laser of IEC 60825-1
range), never guessed.
"""

from __future__ import annotations

import json
import re
import time

import h5py
import numpy as np

STR32 = h5py.string_dtype("ascii", 32)  # fixed length: may be rewritten in SWMR mode (variable length may not)
UNKNOWN = "unknown"

# units of the members of the compound tables (HDF5 has no attribute per member: one JSON attribute)
FRAME_INFO_UNITS = {"t_request_s": "s", "t_frame_s": "s", "exposure_s": "s", "peak_dn": "counts",
                    "photons": "photons", "saturated_fraction": "1"}
ESTIMATE_INFO_UNITS = {"photons": "photons", "elapsed_s": "s", "t_s": "s"}
EVENT_UNITS = {"t_s": "s"}
ESTIMATE_UNITS = "sqrt(photons/s)"  # sqrt(incident photons per second)


def iso_utc(t: float | None = None) -> str:
    return time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime(time.time() if t is None else t))


def _version() -> str:
    try:
        from importlib.metadata import version

        return version("maskrun")
    except Exception:
        return "unknown"


def _group(parent: h5py.Group, name: str, nx_class: str) -> h5py.Group:
    g = parent.create_group(name)
    g.attrs["NX_class"] = nx_class
    return g


def _field(g: h5py.Group, name: str, value, units: str | None = None, **attrs) -> h5py.Dataset:
    ds = g.create_dataset(name, data=value)
    if units is not None:
        ds.attrs["units"] = units
    for k, v in attrs.items():
        ds.attrs[k] = v
    return ds


def _link(g: h5py.Group, name: str, target: h5py.Dataset) -> None:
    """A NeXus link: an HDF5 hard link (the same object, no copy) whose ``target`` attribute names the original."""
    g[name] = target
    if "target" not in target.attrs:
        target.attrs["target"] = target.name


def _str_array(values) -> np.ndarray:
    return np.array(list(values), dtype=h5py.string_dtype())


def _nx_name(key: str) -> str:
    name = re.sub(r"[^a-z0-9_]", "_", str(key).lower())
    return name if re.match(r"[a-z_]", name) else "_" + name


def _units_for(key: str) -> str | None:
    for suffix, unit in (("_s", "s"), ("_m", "m"), ("_hz", "Hz"), ("_w", "W"), ("_px", "pixel")):
        if key.endswith(suffix):
            return unit
    return None


def source_type(wavelength_m: float) -> str | None:
    """NXsource/type from the wavelength, for lasers of IEC 60825-1 range (180 nm .. 1 mm); None otherwise."""
    if 180e-9 <= wavelength_m < 400e-9:
        return "UV Laser"
    if 400e-9 <= wavelength_m <= 1e-3:
        return "Optical Laser"
    return None


def probe(wavelength_m: float) -> str | None:
    """NXsource/probe (the enumeration's words) from the wavelength; None where it has no word (infrared)."""
    if wavelength_m < 10e-9:
        return "x-ray"
    if wavelength_m < 400e-9:
        return "ultraviolet"
    if wavelength_m <= 750e-9:
        return "visible light"
    return None


def write_root_attrs(f: h5py.File, created: str) -> None:
    f.attrs["NX_class"] = "NXroot"
    f.attrs["default"] = "entry"
    f.attrs["file_name"] = str(f.filename).rsplit("/", 1)[-1]
    f.attrs["file_time"] = created
    f.attrs["creator"] = f"maskrun {_version()}"
    f.attrs["HDF5_Version"] = h5py.version.hdf5_version
    f.attrs["h5py_version"] = h5py.version.version


def write_units(e: h5py.Group) -> None:
    """units on the version-1 datasets (and the per-member units of the compound tables)."""
    for name in ("frames", "darks", "refused"):
        e[name].attrs["units"] = "counts"
    e["masks"].attrs["units"] = "1"  # complex transmission, dimensionless
    e["estimates"].attrs["units"] = ESTIMATE_UNITS
    if "truth" in e:
        e["truth"].attrs["units"] = ESTIMATE_UNITS
    if "flat_field" in e:
        e["flat_field"].attrs["units"] = "1"
    for name in ("frame_info", "dark_info", "refused_info"):
        e[name].attrs["field_units"] = json.dumps(FRAME_INFO_UNITS)
    e["estimate_info"].attrs["field_units"] = json.dumps(ESTIMATE_INFO_UNITS)
    e["events"].attrs["field_units"] = json.dumps(EVENT_UNITS)


def write_nexus(f: h5py.File, e: h5py.Group, h, created: str) -> None:
    """Everything NeXus of version 2, below /entry (``h``: the RunHeader). Called before SWMR mode."""
    rows, cols = h.grid_shape
    extra = h.extra_attrs or {}
    write_root_attrs(f, created)
    write_units(e)
    _field(e, "title", h.run_name)
    _field(e, "start_time", created)
    end = e.create_dataset("end_time", shape=(), dtype=STR32)
    end[()] = created.encode()
    end.attrs["description"] = ("time of the last flush: the end of the run once it ended; after a crash, "
                                "the last moment data reached the file")
    prog = _field(e, "program_name", "maskrun")
    prog.attrs["version"] = _version()

    # --- the frames as an NXdata (links, no copy) -----------------------------------------------
    data = _group(e, "data", "NXdata")
    _link(data, "data", e["frames"])
    data.attrs["signal"] = "data"
    # no @axes: dimension 0 (frame number) has no axis field, and the "." placeholder of the NXdata rules is
    # refused as an invalid name by punx 0.3.5; the AXISNAME_indices attributes attach the two pixel axes
    data.attrs["y_pixel_indices"] = 1
    data.attrs["x_pixel_indices"] = 2
    data.attrs["title"] = "camera frames (counts), zero frequency at the centre"
    _field(data, "y_pixel", np.arange(rows, dtype=np.int32) - rows // 2,
           long_name="frame row, from the zero-frequency pixel")
    _field(data, "x_pixel", np.arange(cols, dtype=np.int32) - cols // 2,
           long_name="frame column, from the zero-frequency pixel")

    # --- the latest reconstruction, rewritten in place at every estimate ------------------------
    if h.live_reconstruction:
        rec = _group(e, "reconstruction", "NXdata")
        rec.attrs["signal"] = "amplitude"
        rec.attrs["auxiliary_signals"] = _str_array(["phase"])
        rec.attrs["axes"] = _str_array(["y", "x"])
        rec.attrs["y_indices"] = 0
        rec.attrs["x_indices"] = 1
        rec.attrs["title"] = "latest reconstructed field: amplitude and phase"
        nan = np.full((rows, cols), np.nan, np.float32)
        _field(rec, "amplitude", nan, ESTIMATE_UNITS, long_name="amplitude of the latest estimate (NaN before the "
               "first)")
        _field(rec, "phase", nan, "rad", long_name="phase of the latest estimate (NaN before the first)")
        _field(rec, "y", np.arange(rows, dtype=np.int32), long_name="grid row")
        _field(rec, "x", np.arange(cols, dtype=np.int32), long_name="grid column")
        _field(rec, "estimate_index", np.int32(-1), long_name="row of /entry/estimates shown (-1: none yet)")
        _field(rec, "pass_index", np.int32(-1), long_name="last pass included (-1: none yet)")
        _field(rec, "passes_used", np.int32(0))
        _field(rec, "error_reported", np.float64(np.nan), long_name="relative precision shown by the displays")
    e.attrs["default"] = "reconstruction" if h.live_reconstruction else "data"

    # --- the instrument -------------------------------------------------------------------------
    inst = _group(e, "instrument", "NXinstrument")
    src_info = h.source or {}
    src = _group(inst, "source", "NXsource")
    _field(src, "name", str(src_info.get("description") or "laser"))
    wl = float(h.laser_wavelength_m)
    kind = source_type(wl)
    if kind is not None:
        _field(src, "type", kind)
    pr = probe(wl)
    if pr is not None:
        _field(src, "probe", pr)
    _field(src, "wavelength", wl, "m")
    power = src_info.get("power_w")
    if power is None:
        _field(src, "power", UNKNOWN)
    else:
        _field(src, "power", float(power), "W")
    _field(src, "laser_class", str(src_info.get("laser_class") or UNKNOWN),
           long_name="IEC 60825-1 laser class as acknowledged before the run")

    det_info = h.detector or {}
    det = _group(inst, "detector", "NXdetector")
    _link(det, "data", e["frames"])
    _field(det, "description", str(det_info.get("driver") or UNKNOWN), long_name="camera driver")
    bits = int(h.camera_bit_depth)
    _field(det, "bit_depth_readout", np.int32(bits))
    _field(det, "saturation_value", np.int64((1 << bits) - 1), "counts")
    if det_info.get("exposure_s") is not None:
        _field(det, "count_time", float(det_info["exposure_s"]), "s",
               long_name="exposure set at the start; the exposure of each frame is /entry/frame_info['exposure_s']")
    if det_info.get("gain_setting") is not None:
        _field(det, "gain_setting", str(det_info["gain_setting"]))
    gain = extra.get("response_gain_dn_per_e")
    if gain is not None:
        _field(det, "system_gain", float(gain), "ADU/e-", long_name="camera counts per electron (EMVA 1288 K)")
        _field(det, "conversion_gain", 1.0 / float(gain), "e-/ADU")
    if extra.get("response_offset_dn") is not None:
        _field(det, "dark_offset", float(extra["response_offset_dn"]), "counts")
    if extra.get("response_quantum_efficiency") is not None:
        _field(det, "quantum_efficiency", float(extra["response_quantum_efficiency"]), "1")
    px = det_info.get("pixel_size_m")
    if px is not None:
        py_, px_ = (px, px) if np.ndim(px) == 0 else tuple(px)
        _field(det, "y_pixel_size", float(py_), "m")
        _field(det, "x_pixel_size", float(px_), "m")
    if "flat_field" in e:
        _link(det, "flatfield", e["flat_field"])
        _field(det, "flatfield_applied", False, long_name="the stored frames are as delivered; readers divide")
    _link(det, "dark_frames", e["darks"])

    mod_info = h.modulator or {}
    mod = _group(inst, "modulator", "NXcollection")
    _field(mod, "driver", str(mod_info.get("driver") or UNKNOWN), long_name="modulator driver (its kind)")
    if mod_info.get("mask_family"):
        _field(mod, "mask_family", str(mod_info["mask_family"]))
    _field(mod, "mask_count", np.int32(np.asarray(h.masks).shape[0]))
    _link(mod, "masks", e["masks"])
    if mod_info.get("settle_s") is not None:
        _field(mod, "settle_time", float(mod_info["settle_s"]), "s")
    for key, attr in (("masks_as_stored", "masks_as_stored"), ("profile", "modulator_profile"),
                      ("description", "modulator_json")):
        if extra.get(attr):
            _field(mod, key, str(extra[attr]))
    if "masks_offset_px" in extra:
        _field(mod, "offset", np.asarray(extra["masks_offset_px"], dtype=np.float64), "pixel")
    settings = mod_info.get("settings") or {}
    _field(mod, "settings_json", json.dumps(settings, default=str))
    if settings:
        sg = _group(mod, "settings", "NXcollection")
        for key, value in settings.items():
            name = _nx_name(key)
            if name in sg or not isinstance(value, (str, int, float, bool)):
                continue  # lists and tables only in settings_json
            _field(sg, name, value, _units_for(name) if isinstance(value, (int, float)) and
                   not isinstance(value, bool) else None)

    # --- the sample and who ran it --------------------------------------------------------------
    smp_info = h.sample or {}
    smp = _group(e, "sample", "NXsample")
    _field(smp, "name", str(smp_info.get("name") or UNKNOWN))
    if smp_info.get("description"):
        _field(smp, "description", str(smp_info["description"]))
    if "truth" in e:
        _link(smp, "simulated_field", e["truth"])
    user = _group(e, "user", "NXuser")
    _field(user, "name", str(h.operator or (h.safety_acknowledgement or {}).get("who") or UNKNOWN))


def write_latest(rec: h5py.Group, estimate: np.ndarray, index: int, info) -> None:
    """Rewrite /entry/reconstruction in place with the estimate just stored (SWMR: data only)."""
    rec["amplitude"][...] = np.abs(estimate).astype(np.float32)
    rec["phase"][...] = np.angle(estimate).astype(np.float32)
    rec["estimate_index"][()] = np.int32(index)
    names = getattr(getattr(info, "dtype", None), "names", None) or ()
    if "pass_index" in names:
        rec["pass_index"][()] = np.int32(info["pass_index"])
    if "passes_used" in names:
        rec["passes_used"][()] = np.int32(info["passes_used"])
    if "error_reported" in names:
        rec["error_reported"][()] = np.float64(info["error_reported"])
