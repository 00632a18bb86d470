"""Detector frames as beamlines write them.

:func:`read_frames` reads a stack of area-detector frames (frames × rows ×
columns) from

* an HDF5 file and a dataset path in it (``"file.h5"`` with ``dataset =
  "/entry/data/data"``, or ``"file.h5#/entry/data/data"``), compressed with
  any filter area detectors use (bitshuffle-LZ4, LZ4, Blosc, Zstandard, ...:
  registered by ``hdf5plugin``, plus HDF5's own gzip, szip, shuffle),
  through external links and virtual datasets, whose target files HDF5
  looks up relative to the master file's folder;
* EDF, CBF or TIFF images through ``fabio``: one file (single- or
  multi-frame), a folder (every image file in it), or a glob pattern
  (``"scan_0042_*.cbf"``).

Several files are taken in *natural order* (:func:`natural_key`): names are
compared piece by piece, runs of digits as whole numbers, so ``img_9.edf``
comes before ``img_10.edf`` and ``scan2_frame10`` after ``scan2_frame9``;
the frames of a multi-frame file follow each other in the file's order.

:func:`describe_frames` says what a source holds (format, files, frames,
shape, dtype, compression) without reading every frame. Every failure is a
:class:`~braggstrain.errors.ScanFileError` naming the file, the dataset or
field, and what was expected.
"""

from __future__ import annotations

import glob
import os
import re
from pathlib import Path

import numpy as np

from braggstrain.errors import ScanFileError

__all__ = ["read_frames", "describe_frames", "frame_files", "natural_key", "split_source", "HDF5_SUFFIXES",
           "IMAGE_SUFFIXES", "FILTER_NAMES"]

HDF5_SUFFIXES = (".h5", ".hdf5", ".hdf", ".nxs", ".nx5", ".cxi")
IMAGE_SUFFIXES = (".edf", ".cbf", ".tif", ".tiff", ".edf.gz", ".cbf.gz")

# HDF5 filter identifiers (HDF Group's registry of filter plugins) → names
FILTER_NAMES = {1: "gzip", 2: "shuffle", 3: "fletcher32", 4: "szip", 5: "nbit", 6: "scaleoffset",
                307: "bzip2", 32001: "Blosc", 32004: "LZ4", 32008: "bitshuffle", 32013: "zfp",
                32015: "Zstandard", 32017: "SZ", 32026: "Blosc2", 32029: "SZ3"}


def natural_key(name):
    """Sort key of a file name in natural order: digit runs compare as numbers.

    >>> sorted(["f_10.edf", "f_9.edf", "f_100.edf"], key=natural_key)
    ['f_9.edf', 'f_10.edf', 'f_100.edf']
    """
    parts = re.split(r"(\d+)", str(name))
    return [(0, int(p), "") if p.isdigit() else (1, 0, p.lower()) for p in parts if p != ""]


def split_source(source, dataset=None):
    """``"file.h5#/path"`` → (Path("file.h5"), "/path"); otherwise (Path(source), dataset)."""
    s = str(source)
    if "#" in s and dataset is None:
        s, dataset = s.split("#", 1)
    return Path(s), dataset


def _is_hdf5(path):
    return path.suffix.lower() in HDF5_SUFFIXES


def _is_image(path):
    n = path.name.lower()
    return any(n.endswith(s) for s in IMAGE_SUFFIXES)


def frame_files(source):
    """Image files of a source in natural order: a file, a folder or a glob pattern.

    Returns
    -------
    list of Path

    Raises
    ------
    ScanFileError
        when nothing matches.
    """
    p = Path(source)
    if p.is_dir():
        files = [q for q in p.iterdir() if q.is_file() and _is_image(q)]
        if not files:
            raise ScanFileError(p, "(folder)", f"expected image files ({', '.join(IMAGE_SUFFIXES)}), found none")
    elif p.is_file():
        files = [p]
    elif any(ch in str(p) for ch in "*?["):
        files = [Path(q) for q in glob.glob(str(p)) if os.path.isfile(q)]
        if not files:
            raise ScanFileError(p, "(pattern)", "expected at least one file matching the pattern, found none")
    else:
        raise ScanFileError(p, "(file)", "file not found")
    return sorted(files, key=lambda q: natural_key(q.name))


def _filters(dset):
    pl = dset.id.get_create_plist()
    out = []
    for i in range(pl.get_nfilters()):
        fid = int(pl.get_filter(i)[0])
        out.append((fid, FILTER_NAMES.get(fid, "an unknown filter")))
    return out


def _open_h5(path):
    import h5py

    try:
        import hdf5plugin  # noqa: F401 - registers the detector compression filters with HDF5
    except ImportError:  # pragma: no cover - a declared dependency
        pass
    if not path.exists():
        raise ScanFileError(path, "(file)", "file not found")
    try:
        return h5py.File(path, "r")
    except OSError as e:
        raise ScanFileError(path, "(file)", f"not a readable HDF5 file ({e})") from None


def _h5_dataset(f, path, dataset):
    import h5py

    if not dataset:
        names = []
        f.visititems(lambda n, o: names.append(n) if isinstance(o, h5py.Dataset) and o.ndim == 3 else None)
        if len(names) != 1:
            raise ScanFileError(path, "dataset", f"expected the path of the frames dataset inside the HDF5 file "
                                                 f"(3-D datasets found: {names or 'none'})")
        dataset = names[0]
    try:
        obj = f.get(dataset)
    except (KeyError, OSError) as e:  # a dangling external link raises here
        raise ScanFileError(path, dataset, f"cannot be opened ({e}); an external link's target file is looked "
                                           f"up relative to {path.parent}") from None
    if obj is None:
        link = None
        try:
            link = f.get(dataset, getlink=True)
        except (KeyError, OSError):
            pass
        if isinstance(link, h5py.ExternalLink):
            raise ScanFileError(path, dataset, f"external link to '{link.filename}#{link.path}' cannot be "
                                               f"resolved; expected that file beside {path.parent}")
        raise ScanFileError(path, dataset, "dataset not found")
    if not isinstance(obj, h5py.Dataset):
        raise ScanFileError(path, dataset, f"expected a dataset, found a {type(obj).__name__}")
    if obj.is_virtual:
        for vs in obj.virtual_sources():
            fn = vs.file_name
            if fn == ".":
                continue
            q = Path(fn) if os.path.isabs(fn) else path.parent / fn
            if not q.exists():
                raise ScanFileError(path, dataset, f"virtual dataset source file '{fn}' not found (looked for {q})")
    for fid, name in _filters(obj):
        if not h5py.h5z.filter_avail(fid):
            raise ScanFileError(path, dataset, f"compressed with {name} (HDF5 filter {fid}), which is not "
                                               f"available; expected a filter registered with HDF5 (install "
                                               f"hdf5plugin, a braggstrain dependency, or a newer version of it)")
    return obj, dataset


def _check_counts(out, path, where):
    if out.ndim == 2:
        out = out[None]
    if out.ndim != 3:
        raise ScanFileError(path, where, f"expected 3 dimensions (frames, rows, columns), got shape {out.shape}")
    if not np.issubdtype(out.dtype, np.number):
        raise ScanFileError(path, where, f"expected numeric counts, got dtype {out.dtype}")
    if np.issubdtype(out.dtype, np.floating) and not np.all(np.isfinite(out)):
        raise ScanFileError(path, where, "expected finite counts, found NaN or infinity")
    if np.issubdtype(out.dtype, np.signedinteger) or np.issubdtype(out.dtype, np.floating):
        if np.any(out < 0):
            raise ScanFileError(path, where, "expected non-negative counts, found negative values")
    return out


def _image_frames(p):
    import fabio

    try:
        img = fabio.open(str(p))
    except Exception as e:  # noqa: BLE001 - any decoder failure
        raise ScanFileError(p, "(image)", f"not a readable EDF, CBF or TIFF image ({e})") from None
    with img:
        n = int(getattr(img, "nframes", 1) or 1)
        if n == 1:
            return [np.asarray(img.data)], type(img).__name__
        frames = []
        for i in range(n):
            try:
                frames.append(np.asarray(img.getframe(i).data))
            except Exception as e:  # noqa: BLE001
                raise ScanFileError(p, f"(frame {i})", f"not readable ({e})") from None
        return frames, type(img).__name__


def read_frames(source, dataset=None):
    """Read a stack of detector frames.

    Parameters
    ----------
    source : str or Path
        An HDF5 file (``.h5``, ``.hdf5``, ``.hdf``, ``.nxs``, ``.cxi``; the
        dataset given by ``dataset`` or as ``"file.h5#/path"``, or its only
        3-D dataset), an EDF/CBF/TIFF file, a folder of them, or a glob
        pattern (natural order, see :func:`natural_key`).
    dataset : str, optional
        Path of the frames inside an HDF5 file.

    Returns
    -------
    (F, R, C) ndarray of counts (a single 2-D image gives F = 1)

    Raises
    ------
    ScanFileError
        naming the file and the dataset or frame: file or dataset missing,
        an unavailable compression filter, a dangling external link or
        virtual-dataset source, images of different shapes, non-numeric,
        non-finite or negative counts.
    """
    path, dataset = split_source(source, dataset)
    if path.is_file() and _is_hdf5(path):
        with _open_h5(path) as f:
            d, where = _h5_dataset(f, path, dataset)
            try:
                out = d[()]
            except OSError as e:
                raise ScanFileError(path, where, f"cannot be read ({e})") from None
        return _check_counts(np.asarray(out), path, where)
    files = frame_files(path)
    frames, first = [], None
    for p in files:
        if _is_hdf5(p):
            raise ScanFileError(p, "(file)", "expected EDF, CBF or TIFF images in a folder or pattern; "
                                             "name an HDF5 file directly")
        ims, _ = _image_frames(p)
        for k, im in enumerate(ims):
            if im.ndim != 2:
                raise ScanFileError(p, f"(frame {k})", f"expected a 2-D image, got shape {im.shape}")
            if first is None:
                first = (p, im.shape)
            elif im.shape != first[1]:
                raise ScanFileError(p, f"(frame {k})", f"expected shape {first[1]} like {first[0].name}, "
                                                       f"got {im.shape}")
            frames.append(im)
    out = np.stack(frames)
    return _check_counts(out, files[0] if len(files) == 1 else path, "(frames)")


def describe_frames(source, dataset=None):
    """What a frame source holds, without reading every frame.

    Returns
    -------
    dict with ``format`` ("HDF5" or the fabio image class), ``files`` (list
    of str), ``frames``, ``shape`` (rows, columns), ``dtype``, ``compression``
    (list of filter names; empty when uncompressed), ``dataset``, and for
    HDF5 whether the dataset is ``virtual`` or behind an ``external_link``.
    """
    import h5py

    path, dataset = split_source(source, dataset)
    if path.is_file() and _is_hdf5(path):
        with _open_h5(path) as f:
            d, where = _h5_dataset(f, path, dataset)
            link = f.get(where, getlink=True)
            files = [str(path)]
            if isinstance(link, h5py.ExternalLink):
                files.append(str(path.parent / link.filename))
            if d.is_virtual:
                files += sorted({str(path.parent / vs.file_name) for vs in d.virtual_sources()
                                 if vs.file_name != "."}, key=natural_key)
            shape = d.shape if d.ndim == 3 else (1,) + d.shape
            return {"format": "HDF5", "files": files, "frames": int(shape[0]), "shape": tuple(shape[1:]),
                    "dtype": str(d.dtype), "compression": [n for _, n in _filters(d)], "dataset": where,
                    "virtual": bool(d.is_virtual), "external_link": isinstance(link, h5py.ExternalLink)}
    files = frame_files(path)
    n = 0
    kind = shape = dtype = None
    import fabio

    for p in files:
        try:
            with fabio.open(str(p)) as img:
                n += int(getattr(img, "nframes", 1) or 1)
                if kind is None:
                    kind, shape, dtype = type(img).__name__, tuple(img.data.shape), str(img.data.dtype)
        except Exception as e:  # noqa: BLE001
            raise ScanFileError(p, "(image)", f"not a readable EDF, CBF or TIFF image ({e})") from None
    return {"format": kind, "files": [str(p) for p in files], "frames": n, "shape": shape, "dtype": dtype,
            "compression": [], "dataset": None, "virtual": False, "external_link": False}
