"""Scan files: one HDF5 file per rocking scan, and readers for plain frame stacks.

Layout of a braggstrain scan file (format version 1)::

    /                         attrs: format = "braggstrain-scan", format_version = 1
    /frames                   (F, R, C) counts, frames × rows × columns; attrs units = "counts"
    /mask                     (R, C) or (F, R, C) uint8, optional; 1 = not measured
    /instrument               attrs: energy_kev (keV), beam ("y+"), rocking_circle
    /instrument/circles/NAME  one dataset per circle: its angle, scalar or (F,) per frame;
                              attrs units = "deg", axis ("x+" ...), role ("sample" | "detector"),
                              order (int, outermost first within its role), limits (deg, 2)
    /instrument/detector      attrs: shape (R, C), pixel_size_m (2), distance_m,
                              direct_beam (row, column), row_direction, column_direction,
                              rotation_deg, gaps ((K, 3) int: axis, start, stop)
    /sample                   attrs (optional): hkl (3 int), material (str)

Every reader check raises :class:`~braggstrain.errors.ScanFileError` naming
the file, the field and what was expected. Writers go through a temporary
file that is renamed into place, so an earlier file is never half-overwritten.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from braggstrain.errors import ScanFileError
from braggstrain.geometry.instrument import Circle, Detector, Diffractometer
from braggstrain.io.files import atomic_path, mark_version, open_versioned

__all__ = ["FORMAT_NAME", "FORMAT_VERSION", "Scan", "write_scan", "read_scan", "read_frame_stack"]

FORMAT_NAME = "braggstrain-scan"
FORMAT_VERSION = 1


@dataclass
class Scan:
    """A rocking scan as read from a file.

    Attributes
    ----------
    frames : (F, R, C) ndarray of counts
    angles : dict circle name → degrees (float, or (F,) array)
    rocking_circle : name of the stepped sample circle
    instrument : Diffractometer
    mask : (R, C) or (F, R, C) bool, True = not measured, or None
    hkl : tuple or None
    material : str or None
    path : source file
    extra : dict, what the readers noted (sources of each value, detector
        region of interest, repeats)
    monitor : (F,) incident-beam monitor per frame, or None; the
        preparation divides each frame by monitor / mean(monitor)
    """

    frames: np.ndarray
    angles: dict
    rocking_circle: str
    instrument: Diffractometer
    mask: np.ndarray | None = None
    hkl: tuple | None = None
    material: str | None = None
    path: str = ""
    extra: dict = field(default_factory=dict)
    monitor: np.ndarray | None = None

    @property
    def rocking_angles(self):
        """The rocked circle's angle per frame, degrees."""
        return np.broadcast_to(np.asarray(self.angles[self.rocking_circle], float), (self.frames.shape[0],))

    @property
    def rocking_step(self):
        """Mean rocking step, degrees."""
        a = self.rocking_angles
        return float(np.mean(np.diff(a))) if len(a) > 1 else 0.0


def write_scan(path, frames, angles, rocking_circle, instrument, mask=None, hkl=None, material=None,
               compression="gzip"):
    """Write one rocking scan to a braggstrain scan file (atomically).

    Parameters
    ----------
    path : output file
    frames : (F, R, C) counts
    angles : dict circle name → degrees (scalar or (F,) array), one entry per
        circle of ``instrument``
    rocking_circle : name of the stepped sample circle
    instrument : Diffractometer
    mask : optional (R, C) or (F, R, C) bool, True = not measured
    hkl, material : optional sample description
    """
    import h5py

    frames = np.asarray(frames)
    with atomic_path(path) as tmp:
        with h5py.File(tmp, "w") as f:
            mark_version(f, FORMAT_NAME, FORMAT_VERSION)
            d = f.create_dataset("frames", data=frames, compression=compression, chunks=(1,) + frames.shape[1:])
            d.attrs["units"] = "counts"
            if mask is not None:
                f.create_dataset("mask", data=np.asarray(mask, dtype=np.uint8), compression=compression)
            g = f.create_group("instrument")
            g.attrs["energy_kev"] = instrument.energy_kev
            g.attrs["beam"] = instrument.beam
            g.attrs["rocking_circle"] = rocking_circle
            gc = g.create_group("circles")
            for role, circles in (("sample", instrument.sample_circles), ("detector", instrument.detector_circles)):
                for i, c in enumerate(circles):
                    ds = gc.create_dataset(c.name, data=np.asarray(angles[c.name], dtype=float))
                    ds.attrs["units"] = "deg"
                    ds.attrs["axis"] = c.axis
                    ds.attrs["role"] = role
                    ds.attrs["order"] = i
                    ds.attrs["limits"] = np.asarray(c.limits, float)
            det = instrument.detector
            gd = g.create_group("detector")
            gd.attrs["shape"] = np.asarray(det.shape, int)
            gd.attrs["pixel_size_m"] = np.asarray(det.pixel_size, float)
            gd.attrs["distance_m"] = float(det.distance)
            gd.attrs["direct_beam"] = np.asarray(det.direct_beam, float)
            gd.attrs["row_direction"] = det.row_direction
            gd.attrs["column_direction"] = det.column_direction
            gd.attrs["rotation_deg"] = float(det.rotation_deg)
            gd.attrs["gaps"] = np.asarray(det.gaps, int).reshape(-1, 3)
            gs = f.create_group("sample")
            if hkl is not None:
                gs.attrs["hkl"] = np.asarray(hkl, int)
            if material is not None:
                gs.attrs["material"] = str(material)
    return Path(path)


def _attr(path, obj, name, where, kind=None, shape=None):
    if name not in obj.attrs:
        raise ScanFileError(path, f"{where}@{name}", "missing attribute")
    v = obj.attrs[name]
    if isinstance(v, bytes):
        v = v.decode()
    if kind is str:
        if not isinstance(v, str):
            raise ScanFileError(path, f"{where}@{name}", f"expected a string, got {type(v).__name__}")
        return v
    try:
        a = np.asarray(v, dtype=float)
    except (TypeError, ValueError):
        raise ScanFileError(path, f"{where}@{name}", f"expected a number, got {v!r}") from None
    if shape is not None and a.shape != shape:
        raise ScanFileError(path, f"{where}@{name}", f"expected shape {shape}, got {a.shape}")
    if not np.all(np.isfinite(a)):
        raise ScanFileError(path, f"{where}@{name}", "expected finite values")
    return a


def read_scan(path):
    """Read and validate a braggstrain scan file.

    Returns
    -------
    Scan

    Raises
    ------
    ScanFileError
        naming the file and the field, for a missing or corrupt file, a wrong
        format or version, missing fields, wrong shapes, NaN or negative
        counts, angle arrays whose length differs from the number of frames,
        or a rocked circle that does not change.
    """
    import h5py

    path = str(path)
    with open_versioned(path, FORMAT_NAME, FORMAT_VERSION, error=ScanFileError) as f:
        if "frames" not in f or not isinstance(f["frames"], h5py.Dataset):
            raise ScanFileError(path, "frames", "missing dataset of counts (frames × rows × columns)")
        frames = f["frames"][()]
        if frames.ndim != 3:
            raise ScanFileError(path, "frames", f"expected 3 dimensions (frames, rows, columns), got shape {frames.shape}")
        if not np.issubdtype(frames.dtype, np.number):
            raise ScanFileError(path, "frames", f"expected numeric counts, got dtype {frames.dtype}")
        if np.issubdtype(frames.dtype, np.floating):
            if not np.all(np.isfinite(frames)):
                raise ScanFileError(path, "frames", "expected finite counts, found NaN or infinity")
        if np.any(frames < 0):
            raise ScanFileError(path, "frames", "expected non-negative counts, found negative values")
        nf = frames.shape[0]
        mask = None
        if "mask" in f:
            mask = f["mask"][()].astype(bool)
            if mask.shape not in (frames.shape[1:], frames.shape):
                raise ScanFileError(path, "mask", f"expected shape {frames.shape[1:]} or {frames.shape}, got {mask.shape}")
        if "instrument" not in f:
            raise ScanFileError(path, "instrument", "missing group")
        g = f["instrument"]
        energy = float(_attr(path, g, "energy_kev", "instrument"))
        if energy <= 0:
            raise ScanFileError(path, "instrument@energy_kev", f"expected a positive energy in keV, got {energy}")
        beam = _attr(path, g, "beam", "instrument", str)
        rocking = _attr(path, g, "rocking_circle", "instrument", str)
        if "circles" not in g or len(g["circles"]) == 0:
            raise ScanFileError(path, "instrument/circles", "missing group of circle angles")
        circles = {"sample": [], "detector": []}
        angles = {}
        for name, ds in g["circles"].items():
            where = f"instrument/circles/{name}"
            role = _attr(path, ds, "role", where, str)
            if role not in circles:
                raise ScanFileError(path, f"{where}@role", f"expected 'sample' or 'detector', got {role!r}")
            axis = _attr(path, ds, "axis", where, str)
            order = int(_attr(path, ds, "order", where))
            limits = tuple(ds.attrs.get("limits", (-180.0, 180.0)))
            a = np.asarray(ds[()], dtype=float)
            if a.ndim > 1 or (a.ndim == 1 and len(a) != nf):
                raise ScanFileError(path, where, f"expected a scalar or {nf} angles (one per frame), got shape {a.shape}")
            if not np.all(np.isfinite(a)):
                raise ScanFileError(path, where, "expected finite angles (degrees)")
            try:
                circles[role].append((order, Circle(name, axis, limits)))
            except Exception as e:  # InputError from Circle
                raise ScanFileError(path, where, str(e)) from None
            angles[name] = float(a) if a.ndim == 0 else a
        if rocking not in angles:
            raise ScanFileError(path, "instrument@rocking_circle", f"'{rocking}' is not one of the circles {sorted(angles)}")
        ra = np.asarray(angles[rocking])
        if ra.ndim == 0 or nf < 2 or np.ptp(ra) == 0:
            raise ScanFileError(path, f"instrument/circles/{rocking}",
                                f"the rocked circle must change from frame to frame ({nf} angles expected)")
        if "detector" not in g:
            raise ScanFileError(path, "instrument/detector", "missing group")
        gd = g["detector"]
        dshape = tuple(int(v) for v in _attr(path, gd, "shape", "instrument/detector", shape=(2,)))
        if dshape != frames.shape[1:]:
            raise ScanFileError(path, "instrument/detector@shape", f"expected the frames' shape {frames.shape[1:]}, got {dshape}")
        gaps = np.asarray(gd.attrs.get("gaps", np.zeros((0, 3))), int).reshape(-1, 3)
        try:
            det = Detector(shape=dshape,
                           pixel_size=tuple(_attr(path, gd, "pixel_size_m", "instrument/detector", shape=(2,))),
                           distance=float(_attr(path, gd, "distance_m", "instrument/detector")),
                           direct_beam=tuple(_attr(path, gd, "direct_beam", "instrument/detector", shape=(2,))),
                           row_direction=_attr(path, gd, "row_direction", "instrument/detector", str),
                           column_direction=_attr(path, gd, "column_direction", "instrument/detector", str),
                           rotation_deg=float(_attr(path, gd, "rotation_deg", "instrument/detector")),
                           gaps=tuple(tuple(int(x) for x in r) for r in gaps))
            inst = Diffractometer([c for _, c in sorted(circles["sample"], key=lambda t: t[0])],
                                  [c for _, c in sorted(circles["detector"], key=lambda t: t[0])],
                                  det, energy, beam)
        except ScanFileError:
            raise
        except Exception as e:
            raise ScanFileError(path, "instrument", str(e)) from None
        hkl = material = None
        if "sample" in f:
            if "hkl" in f["sample"].attrs:
                hkl = tuple(int(v) for v in f["sample"].attrs["hkl"])
            if "material" in f["sample"].attrs:
                m = f["sample"].attrs["material"]
                material = m.decode() if isinstance(m, bytes) else str(m)
    return Scan(frames=frames, angles=angles, rocking_circle=rocking, instrument=inst, mask=mask,
                hkl=hkl, material=material, path=path)


def read_frame_stack(source, dataset=None):
    """Read a plain stack of detector frames (your own data format).

    Parameters
    ----------
    source : path of an HDF5 file (then ``dataset`` names the frames inside
        it, e.g. "/entry/data/data") or of a folder of TIFF files (one frame
        per file, sorted by name; read with scikit-image)
    dataset : HDF5 dataset path

    Returns
    -------
    (F, R, C) ndarray of counts

    The angles then come from the pipeline file (see the README).
    """
    src = Path(source)
    if src.is_dir():
        from skimage import io

        files = sorted(p for p in src.iterdir() if p.suffix.lower() in (".tif", ".tiff"))
        if not files:
            raise ScanFileError(src, "(folder)", "expected TIFF files (*.tif, *.tiff), found none")
        frames = []
        for p in files:
            try:
                im = io.imread(str(p))
            except Exception as e:  # noqa: BLE001 - any decoder failure
                raise ScanFileError(p, "(image)", f"not a readable TIFF ({e})") from None
            if im.ndim != 2:
                raise ScanFileError(p, "(image)", f"expected one 2-D frame, got shape {im.shape}")
            if frames and im.shape != frames[0].shape:
                raise ScanFileError(p, "(image)", f"expected shape {frames[0].shape} like the first frame, got {im.shape}")
            frames.append(im)
        out = np.stack(frames)
    else:
        import h5py

        if not src.exists():
            raise ScanFileError(src, "(file)", "file not found")
        if not dataset:
            raise ScanFileError(src, "dataset", "expected the path of the frames dataset inside the HDF5 file")
        try:
            f = h5py.File(src, "r")
        except OSError as e:
            raise ScanFileError(src, "(file)", f"not a readable HDF5 file ({e})") from None
        with f:
            if dataset not in f or not isinstance(f[dataset], h5py.Dataset):
                raise ScanFileError(src, dataset, "dataset not found")
            out = f[dataset][()]
        if out.ndim != 3:
            raise ScanFileError(src, dataset, f"expected 3 dimensions (frames, rows, columns), got shape {out.shape}")
    if not np.issubdtype(out.dtype, np.number):
        raise ScanFileError(src, dataset or "(frames)", f"expected numeric counts, got dtype {out.dtype}")
    if np.issubdtype(out.dtype, np.floating) and not np.all(np.isfinite(out)):
        raise ScanFileError(src, dataset or "(frames)", "expected finite counts, found NaN or infinity")
    if np.any(out < 0):
        raise ScanFileError(src, dataset or "(frames)", "expected non-negative counts, found negative values")
    return out
