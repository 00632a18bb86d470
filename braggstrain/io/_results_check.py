"""The checks :class:`braggstrain.io.results.Results` runs once, where it is built.

Private to :mod:`braggstrain.io.results`: every part is checked against the
common grid (shapes), its type and its conventions, and normalised (dtypes,
defaults of optional parts, dataclasses as plain dicts). Every error names
the key and what was expected.
"""

from __future__ import annotations

import dataclasses

import numpy as np

from braggstrain.errors import InputError
from braggstrain.io.hdf5 import as_plain as _as_plain
from braggstrain.phasing.ensemble import DEFAULT_METRIC, RANKING_METRICS


def _vec3(value, where, positive=False, allow_nan=False):
    try:
        v = np.asarray(value, dtype=float).reshape(-1)
    except (TypeError, ValueError):
        raise InputError(f"{where}: expected three numbers, got {value!r}") from None
    if v.size == 1:
        v = np.repeat(v, 3)
    if v.size != 3 or not np.all(np.isfinite(v) | (allow_nan & np.isnan(v))):
        raise InputError(f"{where}: expected three finite numbers{' (or NaN)' if allow_nan else ''}, "
                         f"got {value!r}")
    if positive and np.any(v <= 0):
        raise InputError(f"{where}: expected three positive lengths in Å, got {value!r}")
    return v


def _grid_array(value, shape, where, kind="float"):
    if value is None:
        raise InputError(f"{where}: missing; expected a {kind} array of the grid shape {shape}")
    a = np.asarray(value)
    if a.shape != shape:
        raise InputError(f"{where}: expected an array of the grid shape {shape}, got shape {a.shape}")
    if kind == "bool":
        if a.dtype != bool:
            if not np.issubdtype(a.dtype, np.number) or not np.all(np.isin(a, (0, 1))):
                raise InputError(f"{where}: expected a boolean mask (True inside the crystal), got dtype {a.dtype}")
            a = a.astype(bool)
        return a
    if not (np.issubdtype(a.dtype, np.floating) or np.issubdtype(a.dtype, np.integer)):
        raise InputError(f"{where}: expected a real-valued array, got dtype {a.dtype}")
    return a.astype(np.float32, copy=False)


def _check_reflection(r, j, shape, names):
    where = f"results['reflections'][{j}]"
    from braggstrain.io.results import ReflectionResult

    if isinstance(r, ReflectionResult):
        r = dataclasses.asdict(r)
    if not isinstance(r, dict):
        raise InputError(f"{where}: expected a dict, got {type(r).__name__}")
    unknown = set(r) - {f.name for f in dataclasses.fields(ReflectionResult)}
    if unknown:
        raise InputError(f"{where}: unknown key(s) {sorted(unknown)}")
    out = dict(r)
    for key in ("name", "hkl", "g_vector", "amplitude", "phase", "support"):
        if key not in r:
            raise InputError(f"{where}: missing key '{key}'")
    name = r["name"]
    if not isinstance(name, str) or not name or "/" in name or name in (".", ".."):
        raise InputError(f"{where}['name']: expected a non-empty string without '/', got {name!r}")
    if name in names:
        raise InputError(f"{where}['name']: '{name}' is used by another reflection; expected unique names")
    names.add(name)
    where = f"results['reflections'][{j}] ('{name}')"
    try:
        hkl = tuple(int(v) for v in r["hkl"])
        ok = len(hkl) == 3 and np.allclose(np.asarray(r["hkl"], float), hkl)
    except (TypeError, ValueError):
        ok = False
    if not ok or hkl == (0, 0, 0):
        raise InputError(f"{where}['hkl']: expected three integers (not all zero), got {r['hkl']!r}")
    out["hkl"] = hkl
    out["g_vector"] = _vec3(r["g_vector"], f"{where}['g_vector']")
    out["amplitude"] = _grid_array(r["amplitude"], shape, f"{where}['amplitude']")
    out["phase"] = _grid_array(r["phase"], shape, f"{where}['phase']")
    out["support"] = _grid_array(r["support"], shape, f"{where}['support']", "bool")
    if r.get("displacement") is not None:
        out["displacement"] = _grid_array(r["displacement"], shape, f"{where}['displacement']")
    else:
        out["displacement"] = None
    out["scan"] = str(r.get("scan", ""))
    for key in ("max_counts",):
        v = r.get(key, np.nan)
        try:
            out[key] = float(v)
        except (TypeError, ValueError):
            raise InputError(f"{where}['{key}']: expected a number, got {v!r}") from None
    for key in ("runs", "kept"):
        v = r.get(key, 0)
        if isinstance(v, bool) or not isinstance(v, (int, np.integer)) or v < 0:
            raise InputError(f"{where}['{key}']: expected a non-negative integer, got {v!r}")
        out[key] = int(v)
    if out["kept"] > out["runs"] > 0:
        raise InputError(f"{where}['kept']: {out['kept']} runs kept out of {out['runs']}; expected kept ≤ runs")
    out["oversampling"] = (_vec3(r["oversampling"], f"{where}['oversampling']", allow_nan=True)
                           if r.get("oversampling") is not None else np.full(3, np.nan))
    out["shift_vox"] = (_vec3(r["shift_vox"], f"{where}['shift_vox']")
                        if r.get("shift_vox") is not None else np.zeros(3))
    out["twin"] = bool(r.get("twin", False))
    metric = r.get("ranking_metric", DEFAULT_METRIC)
    if metric not in RANKING_METRICS:
        raise InputError(f"{where}['ranking_metric']: expected one of {sorted(RANKING_METRICS)}, got {metric!r}")
    out["ranking_metric"] = metric
    rm = r.get("run_metrics", []) or []
    if not isinstance(rm, (list, tuple)) or not all(isinstance(m, dict) for m in rm):
        raise InputError(f"{where}['run_metrics']: expected a list of dicts (one per random start)")
    out["run_metrics"] = [dict(m) for m in rm]
    pr = r.get("prtf")
    if pr is not None:
        if not isinstance(pr, dict) or "q" not in pr or "values" not in pr:
            raise InputError(f"{where}['prtf']: expected a dict with 'q' (Å⁻¹), 'values' and 'resolution' (Å)")
        q = np.asarray(pr["q"], float).reshape(-1)
        v = np.asarray(pr["values"], float).reshape(-1)
        if q.shape != v.shape:
            raise InputError(f"{where}['prtf']: 'q' has {q.size} values and 'values' {v.size}; expected the same")
        pr = {"q": q, "values": v, "resolution": float(pr.get("resolution", np.nan))}
    out["prtf"] = pr
    hist = r.get("history", {}) or {}
    if not isinstance(hist, dict):
        raise InputError(f"{where}['history']: expected a dict name → 1-D array")
    h2 = {}
    for k, v in hist.items():
        a = np.asarray(v)
        if not isinstance(k, str) or "/" in k or a.ndim != 1 or not np.issubdtype(a.dtype, np.number):
            raise InputError(f"{where}['history'][{k!r}]: expected a 1-D numeric array under a name without '/'")
        h2[k] = a
    out["history"] = h2
    return out


def _check_tensor(tf, shape):
    from braggstrain.strain.tensor import TensorField

    if not isinstance(tf, TensorField):
        raise InputError(f"results['tensor']: expected a braggstrain.strain.tensor.TensorField, got {type(tf).__name__}")
    checks = {"strain": (3, 3), "rotation": (3,), "residual": (), "strain_uncertainty": (3, 3),
              "rotation_uncertainty": (3,), "support": (), "trusted": ()}
    for name, lead in checks.items():
        a = np.asarray(getattr(tf, name))
        if a.shape != lead + shape:
            raise InputError(f"results['tensor'].{name}: expected shape {lead + shape}, got {a.shape}")
    J = len(tf.labels)
    if np.asarray(tf.g_vectors).shape != (J, 3):
        raise InputError(f"results['tensor'].g_vectors: expected shape ({J}, 3), got {np.asarray(tf.g_vectors).shape}")
    if np.asarray(tf.residual_per_reflection).shape != (J,) + shape:
        raise InputError(f"results['tensor'].residual_per_reflection: expected shape {(J,) + shape}, "
                         f"got {np.asarray(tf.residual_per_reflection).shape}")
    if tf.displacement is not None and np.asarray(tf.displacement).shape != (3,) + shape:
        raise InputError(f"results['tensor'].displacement: expected shape {(3,) + shape}, "
                         f"got {np.asarray(tf.displacement).shape}")
    return tf


def _check(results):
    """Check the parts of :class:`Results` and return them normalised.

    Arrays become numpy arrays of the documented dtypes, optional keys get
    their defaults (empty lists and dicts, NaN numbers), dataclasses in
    ``registration`` and ``mean_lattice`` become dicts.

    Raises
    ------
    InputError
        Naming the key and what was expected.
    """
    from braggstrain.defects.lines import Dislocation

    grid = results["grid"]
    from braggstrain.io.results import Grid

    if isinstance(grid, Grid):
        grid = {"voxel_size": grid.voxel_size, "origin": grid.origin, "shape": grid.shape}
    if not isinstance(grid, dict):
        raise InputError("results['grid']: expected a dict with voxel_size, origin and shape")
    for key in ("voxel_size", "shape"):
        if key not in grid:
            raise InputError(f"results['grid']: missing key '{key}'")
    try:
        shape = tuple(int(n) for n in grid["shape"])
    except (TypeError, ValueError):
        raise InputError(f"results['grid']['shape']: expected three positive integers, got {grid['shape']!r}") from None
    if len(shape) != 3 or min(shape) < 2:
        raise InputError(f"results['grid']['shape']: expected three integers ≥ 2, got {grid['shape']!r}")
    out = dict(results)
    out["grid"] = {"voxel_size": _vec3(grid["voxel_size"], "results['grid']['voxel_size']", positive=True),
                   "origin": _vec3(grid.get("origin", (0.0, 0.0, 0.0)), "results['grid']['origin']"),
                   "shape": shape}
    out["support"] = _grid_array(results["support"], shape, "results['support']", "bool")
    if not out["support"].any():
        raise InputError("results['support']: the support is empty; expected True inside the crystal")
    out["amplitude"] = _grid_array(results["amplitude"], shape, "results['amplitude']")
    refl = results["reflections"]
    if not isinstance(refl, (list, tuple)) or not refl:
        raise InputError("results['reflections']: expected a non-empty list of reflection dicts")
    names = set()
    out["reflections"] = [_check_reflection(r, j, shape, names) for j, r in enumerate(refl)]
    out["tensor"] = _check_tensor(results["tensor"], shape)
    ti = results.get("tensor_independent")
    out["tensor_independent"] = None if ti is None else _check_tensor(ti, shape)
    jo = results.get("joint")
    if jo is not None:
        jo = _as_plain(jo)
        if not isinstance(jo, dict):
            raise InputError(f"results['joint']: expected a dict of plain values, got {type(jo).__name__}")
    out["joint"] = jo
    lines = results.get("dislocations") or []
    for k, d in enumerate(lines):
        if not isinstance(d, Dislocation):
            raise InputError(f"results['dislocations'][{k}]: expected a braggstrain.defects.lines.Dislocation, "
                             f"got {type(d).__name__}")
    out["dislocations"] = list(lines)
    for key in ("registration", "mean_lattice", "provenance"):
        v = _as_plain(results.get(key) or {})
        if not isinstance(v, dict):
            raise InputError(f"results['{key}']: expected a dict of plain values, got {type(v).__name__}")
        out[key] = v
    prov = dict(out["provenance"])
    for key in ("versions", "seeds", "timings"):
        v = prov.get(key) or {}
        if not isinstance(v, dict):
            raise InputError(f"results['provenance']['{key}']: expected a dict, got {type(v).__name__}")
        prov[key] = dict(v)
    for key in ("pipeline_text", "command", "created"):
        v = prov.get(key, "")
        if not isinstance(v, str):
            raise InputError(f"results['provenance']['{key}']: expected a string, got {type(v).__name__}")
        prov[key] = v
    out["provenance"] = prov
    return out
