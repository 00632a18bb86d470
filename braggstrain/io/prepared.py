"""Prepared scans on disk: the phasing-ready array, its mask and geometry, in HDF5.

Written by ``braggstrain prepare`` and by the pipeline's checkpoints; read
back by :func:`read_prepared`. Format "braggstrain-prepared", version 1
(the version marker of :mod:`braggstrain.io.files`).
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np

from braggstrain.errors import ScanFileError
from braggstrain.io.files import atomic_path, mark_version, nbytes_of, open_versioned

__all__ = ["PREPARED_FORMAT", "PREPARED_VERSION", "write_prepared", "read_prepared"]

PREPARED_FORMAT = "braggstrain-prepared"
PREPARED_VERSION = 1


def _json_default(o):
    if isinstance(o, np.ndarray):
        return o.tolist()
    if isinstance(o, (np.integer,)):
        return int(o)
    if isinstance(o, (np.floating,)):
        return float(o)
    return str(o)


def write_prepared(prepared, path):
    """Write a prepared scan to HDF5 (atomically).

    Layout (format "braggstrain-prepared", version 1)::

        /              attrs: format, format_version, source, rocking_circle,
                       rocking_step_deg, background, max_counts, hkl (optional),
                       instrument (JSON), options (JSON), mask_counts (JSON)
        /intensity     (N0, N1, N2) float32, counts; attrs axes = "frame,row,column"
        /mask          (N0, N1, N2) uint8, 1 = not measured
        /geometry      datasets linear_map (3, 3) Å⁻¹, q_center (3) Å⁻¹, rotation (3, 3),
                       center_index (3), crop (3, 2), binning (3), padding (3, 2),
                       peak_max (3), peak_com (3), oversampling (3)
        /cleaning      hot_pixels (K, 2), dead_pixels (L, 2), zero_frames (Z)
        /angles/NAME   degrees of the crop's raw frames (scalar or array); centre angles
                       as attribute "centre"
    """
    import h5py

    p = prepared
    with atomic_path(path, size_hint=nbytes_of([p.intensity, p.mask])) as tmp:
        with h5py.File(tmp, "w") as f:
            mark_version(f, PREPARED_FORMAT, PREPARED_VERSION)
            f.attrs["source"] = str(p.source)
            f.attrs["rocking_circle"] = p.rocking_circle
            f.attrs["rocking_step_deg"] = float(p.rocking_step)
            f.attrs["background"] = float(p.background)
            f.attrs["max_counts"] = float(p.max_counts)
            if p.hkl is not None:
                f.attrs["hkl"] = np.asarray(p.hkl, int)
            f.attrs["instrument"] = json.dumps(p.instrument.to_dict(), default=_json_default)
            f.attrs["options"] = json.dumps(p.options, default=_json_default)
            f.attrs["mask_counts"] = json.dumps(p.mask_counts, default=_json_default)
            f.attrs["crop_choice"] = json.dumps(p.crop_choice, default=_json_default)
            d = f.create_dataset("intensity", data=p.intensity.astype(np.float32), compression="gzip")
            d.attrs["units"] = "counts"
            d.attrs["axes"] = "frame,row,column"
            f.create_dataset("mask", data=p.mask.astype(np.uint8), compression="gzip")
            g = f.create_group("geometry")
            for name in ("linear_map", "q_center", "rotation", "center_index", "crop", "binning", "padding",
                         "peak_max", "peak_com", "oversampling"):
                g.create_dataset(name, data=np.asarray(getattr(p, name)))
            g["linear_map"].attrs["units"] = "1/angstrom per index step"
            g["q_center"].attrs["units"] = "1/angstrom"
            c = f.create_group("cleaning")
            c.create_dataset("hot_pixels", data=np.asarray(p.hot_pixels, int).reshape(-1, 2))
            c.create_dataset("dead_pixels", data=np.asarray(p.dead_pixels, int).reshape(-1, 2))
            c.create_dataset("zero_frames", data=np.asarray(p.zero_frames, int).reshape(-1))
            a = f.create_group("angles")
            for k, v in p.angles.items():
                ds = a.create_dataset(k, data=np.asarray(v, float))
                ds.attrs["units"] = "deg"
                ds.attrs["centre"] = float(p.centre_angles[k])
    return Path(path)


def read_prepared(path):
    """Read a prepared scan written by :func:`write_prepared`.

    Raises
    ------
    ScanFileError
        naming the file and the field for a missing file, a wrong format or
        version, missing or mis-shaped fields.
    """
    from braggstrain.geometry.instrument import Diffractometer
    from braggstrain.prepare.scan import PreparedScan

    path = str(path)
    with open_versioned(path, PREPARED_FORMAT, PREPARED_VERSION, error=ScanFileError) as f:
        for name in ("intensity", "mask", "geometry", "cleaning", "angles"):
            if name not in f:
                raise ScanFileError(path, name, "missing")
        inten = f["intensity"][()]
        if inten.ndim != 3:
            raise ScanFileError(path, "intensity", f"expected a 3-D array, got shape {inten.shape}")
        mask = f["mask"][()].astype(bool)
        if mask.shape != inten.shape:
            raise ScanFileError(path, "mask", f"expected shape {inten.shape}, got {mask.shape}")
        geo = {}
        shapes = dict(linear_map=(3, 3), q_center=(3,), rotation=(3, 3), center_index=(3,), crop=(3, 2),
                      binning=(3,), padding=(3, 2), peak_max=(3,), peak_com=(3,), oversampling=(3,))
        for name, shp in shapes.items():
            if name not in f["geometry"]:
                raise ScanFileError(path, f"geometry/{name}", "missing")
            v = f["geometry"][name][()]
            if v.shape != shp:
                raise ScanFileError(path, f"geometry/{name}", f"expected shape {shp}, got {v.shape}")
            geo[name] = v
        try:
            inst = Diffractometer.from_dict(json.loads(f.attrs["instrument"]))
        except Exception as e:  # noqa: BLE001 - any decoding problem
            raise ScanFileError(path, "@instrument", f"expected a JSON instrument description ({e})") from None
        angles, centre = {}, {}
        for k, ds in f["angles"].items():
            v = ds[()]
            angles[k] = float(v) if np.ndim(v) == 0 else np.asarray(v, float)
            centre[k] = float(ds.attrs.get("centre", np.nan))
        hkl = tuple(int(v) for v in f.attrs["hkl"]) if "hkl" in f.attrs else None
        c = f["cleaning"]
        out = PreparedScan(
            intensity=inten.astype(np.float32), mask=mask, linear_map=geo["linear_map"], q_center=geo["q_center"],
            rotation=geo["rotation"], center_index=geo["center_index"], crop=geo["crop"].astype(int),
            binning=geo["binning"].astype(int), padding=geo["padding"].astype(int), peak_max=geo["peak_max"],
            peak_com=geo["peak_com"], max_counts=float(f.attrs.get("max_counts", np.nan)),
            background=float(f.attrs.get("background", 0.0)), hot_pixels=c["hot_pixels"][()].astype(int),
            dead_pixels=c["dead_pixels"][()].astype(int), zero_frames=[int(v) for v in c["zero_frames"][()]],
            mask_counts=json.loads(f.attrs.get("mask_counts", "{}")), oversampling=geo["oversampling"],
            angles=angles, centre_angles=centre, rocking_circle=str(f.attrs["rocking_circle"]),
            rocking_step=float(f.attrs["rocking_step_deg"]), instrument=inst, hkl=hkl,
            source=str(f.attrs.get("source", "")), options=json.loads(f.attrs.get("options", "{}")),
            crop_choice=json.loads(f.attrs.get("crop_choice", "{}")))
    return out
