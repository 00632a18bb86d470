"""Plain-data trees in HDF5, for stage checkpoints, and the stage outputs as trees.

A tree is a dict whose values are numpy arrays, numbers, strings, booleans,
None, lists, tuples or dicts of the same. It is stored as HDF5 groups,
datasets and JSON attributes; nothing is ever pickled or evaluated, so a
checkpoint from an untrusted folder is only ever read as data.
"""

from __future__ import annotations

import hashlib
import json
from pathlib import Path

import numpy as np

from braggstrain.errors import BraggStrainError
from braggstrain.io.files import atomic_path, mark_version, nbytes_of, open_versioned

__all__ = ["save_tree", "load_tree", "hash_inputs", "file_digest", "plain_tree", "sample_to_tree", "tree_to_sample",
           "tree_to_tensor", "dislocation_to_tree", "tree_to_dislocation"]

_KIND = "__kind__"
#: Version marker of a checkpoint file (:mod:`braggstrain.io.files`); the
#: version is :data:`CHECKPOINT_FORMAT`.
CHECKPOINT_NAME = "braggstrain-checkpoint"


def _is_plain(v):
    return v is None or isinstance(v, (bool, int, float, str, np.integer, np.floating, np.bool_))


def _jsonable(v):
    if isinstance(v, (np.integer,)):
        return int(v)
    if isinstance(v, (np.floating,)):
        return float(v)
    if isinstance(v, np.bool_):
        return bool(v)
    return v


def _write(group, key, value):
    if isinstance(value, dict):
        g = group.create_group(key)
        g.attrs[_KIND] = "dict"
        for k, v in value.items():
            if not isinstance(k, str):
                raise BraggStrainError(f"checkpoint: dict keys must be strings, got {k!r}")
            _write(g, k, v)
    elif isinstance(value, (list, tuple)):
        if all(_is_plain(v) for v in value):
            g = group.create_group(key)
            g.attrs[_KIND] = "plainlist" if isinstance(value, list) else "plaintuple"
            g.attrs["json"] = json.dumps([_jsonable(v) for v in value])
        else:
            g = group.create_group(key)
            g.attrs[_KIND] = "list" if isinstance(value, list) else "tuple"
            g.attrs["length"] = len(value)
            for i, v in enumerate(value):
                _write(g, str(i), v)
    elif isinstance(value, np.ndarray):
        if value.dtype == object:
            raise BraggStrainError(f"checkpoint: object arrays cannot be stored ({key})")
        comp = "gzip" if value.size > 1024 else None
        d = group.create_dataset(key, data=value, compression=comp)
        d.attrs[_KIND] = "array"
    elif _is_plain(value):
        g = group.create_group(key)
        g.attrs[_KIND] = "plain"
        g.attrs["json"] = json.dumps(_jsonable(value))
    else:
        raise BraggStrainError(f"checkpoint: cannot store a {type(value).__name__} ({key})")


def _read(node):
    import h5py

    kind = node.attrs.get(_KIND)
    if isinstance(node, h5py.Dataset):
        return node[()]
    if kind == "dict":
        return {k: _read(v) for k, v in node.items()}
    if kind in ("list", "tuple"):
        n = int(node.attrs["length"])
        out = [_read(node[str(i)]) for i in range(n)]
        return out if kind == "list" else tuple(out)
    if kind in ("plainlist", "plaintuple"):
        out = json.loads(node.attrs["json"])
        return out if kind == "plainlist" else tuple(out)
    if kind == "plain":
        return json.loads(node.attrs["json"])
    raise BraggStrainError(f"checkpoint {node.file.filename}: unknown node kind {kind!r} at {node.name}")


def save_tree(path, tree, attrs=None):
    """Write a tree to ``path`` atomically; ``attrs`` go on the root."""
    import h5py

    with atomic_path(path, size_hint=nbytes_of(tree)) as tmp:
        with h5py.File(tmp, "w") as f:
            mark_version(f, CHECKPOINT_NAME, CHECKPOINT_FORMAT)
            for k, v in (attrs or {}).items():
                f.attrs[k] = v
            f.attrs[_KIND] = "dict"
            for k, v in tree.items():
                _write(f, k, v)
            f.attrs["complete"] = 1
    return Path(path)


def load_tree(path):
    """Read a tree written by :func:`save_tree` (returns (tree, root attrs))."""
    with open_versioned(path, CHECKPOINT_NAME, CHECKPOINT_FORMAT) as f:
        if int(f.attrs.get("complete", 0)) != 1:
            raise BraggStrainError(f"{path}: checkpoint is incomplete")
        attrs = {k: v for k, v in f.attrs.items()}
        return {k: _read(v) for k, v in f.items()}, attrs


def file_digest(path, chunk=1 << 20):
    """SHA-256 of a file's bytes (hex)."""
    h = hashlib.sha256()
    with open(path, "rb") as f:
        while True:
            b = f.read(chunk)
            if not b:
                break
            h.update(b)
    return h.hexdigest()


def _canon(v):
    if isinstance(v, dict):
        return {str(k): _canon(x) for k, x in sorted(v.items(), key=lambda kv: str(kv[0]))}
    if isinstance(v, (list, tuple)):
        return [_canon(x) for x in v]
    if isinstance(v, np.ndarray):
        return {"__array__": hashlib.sha256(np.ascontiguousarray(v).tobytes()).hexdigest(),
                "dtype": str(v.dtype), "shape": list(v.shape)}
    if isinstance(v, Path):
        return str(v)
    if hasattr(v, "to_dict"):
        return _canon(v.to_dict())
    return _jsonable(v)


#: bump when the content or layout of any stage checkpoint changes
CHECKPOINT_FORMAT = 2


def hash_inputs(*parts):
    """A short stable hash of stage inputs (dicts, lists, arrays, numbers),
    including the checkpoint format and the package version."""
    from braggstrain import __version__

    text = json.dumps(_canon([CHECKPOINT_FORMAT, __version__, *parts]), sort_keys=True, default=str)
    return hashlib.sha256(text.encode()).hexdigest()[:16]


# --------------------------------------------------------------------------
# stage outputs <-> checkpoint trees
# --------------------------------------------------------------------------

def sample_to_tree(so):
    return {"obj": so.obj, "voxel_size": so.voxel_size, "g_vector": so.g_vector, "support": so.support,
            "origin": so.origin, "hkl": list(so.hkl) if so.hkl is not None else None, "meta": plain_tree(so.meta)}


def tree_to_sample(t):
    from braggstrain.strain.objects import SampleObject

    return SampleObject(t["obj"], t["voxel_size"], t["g_vector"], t["support"], t["origin"],
                        tuple(t["hkl"]) if t["hkl"] is not None else None, t.get("meta", {}))


def plain_tree(v):
    """Convert a nested structure to checkpoint-storable plain values."""
    if isinstance(v, dict):
        return {str(k): plain_tree(x) for k, x in v.items()}
    if isinstance(v, (list, tuple)):
        return [plain_tree(x) for x in v]
    if isinstance(v, np.ndarray):
        return v
    if isinstance(v, (np.integer, np.floating, np.bool_)):
        return v.item()
    if v is None or isinstance(v, (bool, int, float, str)):
        return v
    if hasattr(v, "__dataclass_fields__"):
        return {k: plain_tree(getattr(v, k)) for k in v.__dataclass_fields__}
    return str(v)


def tree_to_tensor(t):
    from braggstrain.strain.tensor import TensorField

    kw = {}
    for k in TensorField.__dataclass_fields__:
        if k in t:
            v = t[k]
            if k == "reference":
                v = tuple(int(x) for x in v)
            elif k == "labels":
                v = list(v)
            elif k in ("condition_number",):
                v = float(v)
            kw[k] = v
    return TensorField(**kw)


def dislocation_to_tree(d):
    """A Dislocation as a checkpoint tree (hkl-keyed dicts become pair lists)."""
    t = {}
    for k in d.__dataclass_fields__:
        v = getattr(d, k)
        if k in ("windings", "agreement"):
            v = [[list(int(x) for x in h), (None if n is None else float(n))] for h, n in v.items()]
        elif k in ("visible_in", "invisible_in", "slip_planes"):
            v = [list(int(x) for x in h) for h in v]
        elif k == "ends_at_surface" and v is not None:
            v = [bool(e) for e in v]
        t[k] = plain_tree(v)
    return t


def tree_to_dislocation(t):
    from braggstrain.defects.lines import Dislocation

    kw = {}
    for k in Dislocation.__dataclass_fields__:
        if k not in t:
            continue
        v = t[k]
        if k == "windings":
            v = {tuple(int(x) for x in h): (None if n is None else int(round(n))) for h, n in v}
        elif k == "agreement":
            v = {tuple(int(x) for x in h): float(n) for h, n in v}
        elif k in ("visible_in", "invisible_in", "slip_planes"):
            v = [tuple(int(x) for x in h) for h in v]
        elif k == "ends_at_surface" and v is not None:
            v = tuple(bool(e) for e in v)
        elif k in ("points", "directions", "local_character_deg"):
            v = np.asarray(v, float)
        elif k in ("burgers", "burgers_sample", "burgers_fit") and v is not None:
            v = np.asarray(v, float)
        elif k == "notes":
            v = list(v)
        kw[k] = v
    return Dislocation(**kw)
