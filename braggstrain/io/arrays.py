"""Arrays given as files: dark frames, flat fields and masks.

An option of the pipeline file (``[prepare] dark``, ``flat``, ``user_mask``,
``[[reflection]] mask``) may name a file holding one array: ``.npy``,
``.npz`` (its only array), ``.tif``/``.tiff`` (scikit-image) or HDF5 (its
only dataset, or ``file.h5#/path/in/file``). Numpy files are read with
``allow_pickle=False``. Paths in a pipeline file are resolved against that
file before they get here (:func:`braggstrain.config.resolve_path`).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from braggstrain.errors import InputError

__all__ = ["read_array", "split_dataset"]


def split_dataset(spec):
    """``"file.h5#/path"`` → ("file.h5", "/path"); a plain path → (path, None)."""
    spec = str(spec)
    if "#" in spec:
        path, ds = spec.split("#", 1)
        return path, ds
    return spec, None


def read_array(value, field_name, src):
    """An option that is an array, a number, or a file holding an array.

    Files: .npy, .npz (the only array in it), .tif/.tiff (scikit-image), or
    HDF5 (.h5, .hdf5, .nxs) as ``file.h5`` (its only dataset) or
    ``file.h5#/path/in/file``.
    """
    if value is None:
        return None
    if isinstance(value, (str, Path)):
        spec, ds = split_dataset(value)
        p = Path(spec)
        if not p.exists():
            raise InputError(f"{src}: option '{field_name}': file '{p}' not found")
        suf = p.suffix.lower()
        try:
            if suf == ".npy":
                return np.load(p, allow_pickle=False)
            if suf == ".npz":
                with np.load(p, allow_pickle=False) as z:
                    if len(z.files) != 1:
                        raise InputError(f"{p}: option '{field_name}': expected one array in the .npz, "
                                         f"found {z.files}")
                    return z[z.files[0]]
            if suf in (".tif", ".tiff"):
                from skimage import io

                return io.imread(str(p))
            if suf in (".h5", ".hdf5", ".nxs", ".hdf"):
                import h5py

                with h5py.File(p, "r") as f:
                    if ds is None:
                        names = []
                        f.visititems(lambda n, o: names.append(n) if isinstance(o, h5py.Dataset) else None)
                        if len(names) != 1:
                            raise InputError(f"{p}: option '{field_name}': expected one dataset, found "
                                             f"{names}; name it as '{p}#/path/to/dataset'")
                        ds = names[0]
                    if ds not in f:
                        raise InputError(f"{p}: option '{field_name}': dataset '{ds}' not found")
                    return f[ds][()]
        except InputError:
            raise
        except Exception as e:  # noqa: BLE001 - any reader failure becomes a clear error
            raise InputError(f"{p}: option '{field_name}': not readable ({e})") from None
        raise InputError(f"{p}: option '{field_name}': expected a .npy, .npz, .tif or HDF5 file")
    arr = np.asarray(value)
    if not np.issubdtype(arr.dtype, np.number) and arr.dtype != bool:
        raise InputError(f"{src}: option '{field_name}': expected numbers, got dtype {arr.dtype}")
    return arr
