"""Plain values in HDF5: the attribute/dataset conventions of the results file.

Dicts (and dataclasses) become groups, lists of dicts numbered groups, large
arrays datasets with ``units``, everything else attributes; a runs table is
one 1-D dataset per column. Only plain data goes in and comes out: nothing
is pickled or evaluated.
"""

from __future__ import annotations

import dataclasses

import numpy as np

from braggstrain.errors import InputError

__all__ = ["Trail", "raw_node", "GRID_AXES", "GZIP", "KNOWN_UNITS", "HISTORY_UNITS", "as_plain", "put_plain", "get_plain", "plain",
           "dataset", "mask", "run_table", "read_run_table"]

GRID_AXES = "x, y, z (sample frame; array index i along x, j along y, k along z; origin at index n//2)"
GZIP = dict(compression="gzip", compression_opts=4, shuffle=True)


def as_plain(value):
    """Dataclass instances (e.g. RegistrationReport, MeanLattice) as dicts."""
    if dataclasses.is_dataclass(value) and not isinstance(value, type):
        return {f.name: getattr(value, f.name) for f in dataclasses.fields(value)}
    return value


#: Units of the plain values the registration and mean-lattice stages report.
KNOWN_UNITS = {
    "shifts_voxels": "voxels", "shift_voxels": "voxels", "shifts_angstrom": "Å", "shift_angstrom": "Å",
    "voxel_size": "Å", "origin": "Å", "shape": "voxels", "overlap": "1 (Dice coefficient)",
    "overlap_dice": "1 (Dice coefficient)", "twin_scores": "1 (normalised correlation)",
    "displacement_gradient": "1 (dimensionless)", "strain": "1 (dimensionless)", "rotation": "rad",
    "lattice_parameter": "Å", "lattice_parameter_per_reflection": "Å", "residual": "Å⁻¹",
    "condition_number": "1", "reference_lattice_parameter": "Å",
    "nll_history": "1 (negative log-likelihood per fitted voxel)",
    "free_nll_history": "1 (negative log-likelihood per held-out voxel)",
}

HISTORY_UNITS = {
    "amplitude_error": "1 (dimensionless)",
    "free_amplitude_error": "1 (dimensionless)",
    "support_size": "voxels",
    "stage": "index of the phasing-plan stage",
    "checkpoint": "iteration number",
    "nll": "1 (negative log-likelihood per measured voxel)",
    "free_nll": "1 (negative log-likelihood per held-out voxel)",
    "background": "counts per voxel",
    "run": "1 (index of the random start)",
    "seed": "1 (random seed)",
    "status": "text",
    "message": "text",
    "kept": "1 (true when averaged into the result)",
    "rank": "1 (0 = best by the ranking metric; -1 = failed run)",
    "sharpness": "1 (dimensionless)",
    "iterations": "iterations",
    "elapsed": "s",
}


def _is_str_seq(v):
    return isinstance(v, (list, tuple)) and len(v) > 0 and all(isinstance(x, str) for x in v)


def put_plain(group, key, value, where):
    """Store a plain value under ``key``: dicts (and dataclasses) become
    subgroups, lists of dicts numbered subgroups, large arrays datasets,
    everything else attributes (None as an empty attribute)."""
    import h5py

    key = str(key)
    if "/" in key or key in ("", ".", ".."):
        raise InputError(f"{where}: key {key!r} cannot be stored (expected a name without '/')")
    value = as_plain(value)
    if isinstance(value, dict):
        g = group.create_group(key)
        g.attrs["stored_as"] = "mapping"
        for k, v in value.items():
            if not isinstance(k, str):
                raise InputError(f"{where}: key {k!r} is not a string; expected string keys")
            put_plain(g, k, v, f"{where}['{k}']")
        known = [f"{k}: {KNOWN_UNITS[k]}" for k in value if k in KNOWN_UNITS]
        if known and "units" not in value:
            g.attrs["units"] = "; ".join(known)
            g.attrs["units_summary"] = True
        return
    if isinstance(value, (list, tuple)) and value and all(isinstance(as_plain(x), dict) for x in value):
        g = group.create_group(key)
        g.attrs["stored_as"] = "list"
        for i, v in enumerate(value):
            put_plain(g, f"{i:03d}", v, f"{where}[{i}]")
        return
    if value is None:
        group.attrs[key] = h5py.Empty("f8")
        return
    if isinstance(value, (str, bytes)):
        group.attrs[key] = value if isinstance(value, str) else value.decode("utf-8", "replace")
        return
    if _is_str_seq(value):
        group.attrs.create(key, list(value), dtype=h5py.string_dtype())
        return
    if isinstance(value, (list, tuple)) and len(value) == 0:
        group.attrs[key] = np.zeros(0)
        return
    try:
        arr = np.asarray(value)
    except (TypeError, ValueError):
        arr = None
    if arr is None or arr.dtype == object or not (np.issubdtype(arr.dtype, np.number) or arr.dtype == bool):
        raise InputError(f"{where}: value of type {type(value).__name__} cannot be stored; expected numbers, "
                         f"strings, arrays, lists or dicts of these")
    if arr.size > 64:
        ds = group.create_dataset(key, data=arr, **(GZIP if arr.size > 1024 else {}))
        ds.attrs["units"] = KNOWN_UNITS.get(key, "as given by the producing stage")
    else:
        group.attrs[key] = arr


def plain(v):
    import h5py

    if isinstance(v, h5py.Empty):
        return None
    if isinstance(v, bytes):
        return v.decode("utf-8", "replace")
    if isinstance(v, np.ndarray):
        if v.dtype.kind in ("O", "S"):
            return [x.decode("utf-8", "replace") if isinstance(x, bytes) else str(x) for x in v.tolist()]
        return v
    if isinstance(v, np.generic):
        return v.item()
    return v


def get_plain(group):
    """Inverse of :func:`_put` for a group stored as a mapping or list."""
    import h5py

    kind = group.attrs.get("stored_as", "mapping")
    if kind == "list":
        return [get_plain(group[k]) for k in sorted(group.keys())]
    out = {}
    summary = bool(group.attrs.get("units_summary", False))
    for k, v in group.attrs.items():
        if k == "stored_as" or (summary and k in ("units", "units_summary")):
            continue
        out[k] = plain(v)
    for k, node in group.items():
        out[k] = get_plain(node) if isinstance(node, h5py.Group) else node[()]
    return out


def dataset(group, name, data, units, axes, description, dtype=np.float32, compress=True):
    a = np.asarray(data)
    if dtype is not None:
        a = a.astype(dtype, copy=False)
    ds = group.create_dataset(name, data=a, **(GZIP if compress and a.size > 1024 else {}))
    ds.attrs["units"] = units
    ds.attrs["axes"] = axes
    ds.attrs["description"] = description
    return ds


def mask(group, name, data, description):
    ds = dataset(group, name, np.asarray(data, bool).astype(np.uint8), "1 (mask: 1 inside, 0 outside)",
                  GRID_AXES, description, dtype=np.uint8)
    return ds


def run_table(group, runs, where):
    """Store a list of per-run dicts as one 1-D dataset per column."""
    import h5py

    g = group.create_group("runs")
    g.attrs["count"] = len(runs)
    g.attrs["description"] = "one row per random start; one dataset per column"
    cols = []
    for m in runs:
        for k in m:
            if k not in cols:
                cols.append(k)
    g.attrs["columns"] = cols if cols else np.zeros(0)
    for c in cols:
        if not isinstance(c, str) or "/" in c:
            raise InputError(f"{where}: column {c!r}: expected a string name without '/'")
        vals = [m.get(c) for m in runs]
        present = [v for v in vals if v is not None]
        if all(isinstance(v, str) for v in present):
            ds = g.create_dataset(c, data=["" if v is None else v for v in vals], dtype=h5py.string_dtype())
            ds.attrs["kind"] = "text"
        elif all(isinstance(v, (bool, np.bool_)) for v in present):
            ds = g.create_dataset(c, data=np.array([bool(v) if v is not None else False for v in vals]))
            ds.attrs["kind"] = "bool"
        elif all(isinstance(v, (int, np.integer)) and not isinstance(v, (bool, np.bool_)) for v in present) \
                and len(present) == len(vals):
            ds = g.create_dataset(c, data=np.array(vals, dtype=np.int64))
            ds.attrs["kind"] = "int"
        else:
            try:
                data = np.array([np.nan if v is None else float(v) for v in vals])
            except (TypeError, ValueError):
                raise InputError(f"{where}: column '{c}' mixes numbers and other values; expected one kind "
                                 f"per column") from None
            ds = g.create_dataset(c, data=data)
            ds.attrs["kind"] = "float"
        ds.attrs["units"] = HISTORY_UNITS.get(c, "as given by the phasing stage")
        ds.attrs["axes"] = "run"


def read_run_table(g):
    n = int(g.attrs["count"])
    cols = [str(c) for c in plain(g.attrs["columns"])] if "columns" in g.attrs else []
    rows = [dict() for _ in range(n)]
    for c in cols:
        ds = g[c]
        kind = ds.attrs.get("kind", "float")
        if kind == "text":
            vals = [x.decode("utf-8") if isinstance(x, bytes) else str(x) for x in ds[()]]
        elif kind == "int":
            vals = [int(x) for x in ds[()]]
        elif kind == "bool":
            vals = [bool(x) for x in ds[()]]
        else:
            vals = [float(x) for x in ds[()]]
        for i in range(n):
            rows[i][c] = vals[i]
    return rows


class Trail:
    """Wraps an open file so every group, dataset and attribute read is
    remembered: a read that fails then names what it was reading."""

    def __init__(self, node, trail=None):
        self._node = node
        self._trail = trail if trail is not None else self
        if trail is None:
            self.last = "/"

    def _wrap(self, obj):
        import h5py

        if isinstance(obj, (h5py.Group, h5py.Dataset)):
            return Trail(obj, self._trail)
        return obj

    def __getitem__(self, key):
        self._trail.last = (self._node.name.rstrip("/") + "/" + key) if isinstance(key, str) else self._node.name
        if isinstance(key, str):
            return self._wrap(self._node[key])
        return self._node[key]

    def __contains__(self, key):
        self._trail.last = self._node.name.rstrip("/") + "/" + str(key)
        return key in self._node

    def __iter__(self):
        return iter(self._node)

    def __len__(self):
        return len(self._node)

    def items(self):
        self._trail.last = self._node.name
        return [(k, self._wrap(v)) for k, v in self._node.items()]

    @property
    def attrs(self):
        self._trail.last = self._node.name + " (attributes)"
        return self._node.attrs

    def __getattr__(self, name):
        return getattr(self._node, name)


def raw_node(node):
    """The h5py object inside a :class:`Trail` (or ``node`` itself)."""
    return node._node if isinstance(node, Trail) else node
