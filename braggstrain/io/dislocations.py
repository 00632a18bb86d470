"""Dislocation lines on disk: a CSV or JSON table, and a group of an HDF5 file.

The records are :class:`braggstrain.defects.lines.Dislocation`; the table is
written beside the results (``dislocations.csv``, ``dislocations.json``, the
JSON with the version marker of :mod:`braggstrain.io.files`), the HDF5 group
is ``/dislocations`` of the results file. Lengths in Å, sample frame x, y, z.
"""

from __future__ import annotations

import csv
import io
import json
from pathlib import Path

import numpy as np

from braggstrain.defects.lines import POINTS_FRAME, Dislocation, dislocations_to_records
from braggstrain.errors import InputError
from braggstrain.geometry.crystal import format_hkl
from braggstrain.io.files import write_atomic

__all__ = ["write_dislocation_table", "write_dislocations_h5", "read_dislocations_h5", "TABLE_FORMAT",
           "TABLE_VERSION"]

TABLE_FORMAT = "braggstrain-dislocations"
TABLE_VERSION = 1

_CSV_COLUMNS = [
    "id", "closed", "length_A", "n_points", "burgers_label", "b_lattice_1", "b_lattice_2", "b_lattice_3",
    "b_x_A", "b_y_A", "b_z_A", "burgers_length_A", "character_deg", "character", "slip_planes",
    "confidence", "residual", "windings", "visible_in", "invisible_in", "ends_at_surface", "notes",
    "points_A",
]


def _write_into_existing_folder(path, data):
    path = Path(path)
    if not path.parent.exists():
        raise InputError(f"{path}: the folder {path.parent} does not exist")
    write_atomic(path, data)


def write_dislocation_table(lines, path, format=None):
    """Write the lines as a table, atomically (temporary file, then rename).

    Parameters
    ----------
    lines : list of Dislocation
    path : str or Path
        ``.csv`` (one row per line; the points in one column as
        ``x y z; x y z; ...`` in Å) or ``.json`` (every field, points and
        directions as lists).
    format : {'csv', 'json'}, optional
        Overrides the suffix.

    Columns
    -------
    id; closed; length_A; n_points; burgers_label (lattice coordinates as a
    fraction, e.g. 1/2[1 -1 0]); b_lattice_1..3; b_x_A, b_y_A, b_z_A (sample
    frame, Å); burgers_length_A; character_deg (0 screw, 90 edge);
    character; slip_planes; confidence; residual; windings (n_j per
    reflection); visible_in / invisible_in; ends_at_surface; notes; points_A.
    """
    path = Path(path)
    fmt = (format or path.suffix.lstrip(".")).lower()
    if fmt not in ("csv", "json"):
        raise InputError(f"{path}: expected a .csv or .json file name (or format='csv'/'json'), got '{fmt}'")
    recs = dislocations_to_records(lines)
    if fmt == "json":
        doc = {
            "format": TABLE_FORMAT,
            "format_version": TABLE_VERSION,
            "content": "braggstrain dislocation lines",
            "units": {"points_A": POINTS_FRAME,
                      "burgers_lattice": "lattice coordinates of the conventional cell",
                      "burgers_sample_A": "Å, sample frame", "length_A": "Å", "character_deg": "degrees"},
            "convention": "phase of reflection j gains 2π n_j = −G_j·b right-handed about ξ; h_j·b = −n_j",
            "lines": recs,
        }
        data = json.dumps(doc, indent=1, ensure_ascii=False).encode("utf-8")
        _write_into_existing_folder(path, data)
        return path
    buf = io.StringIO()
    wr = csv.writer(buf)
    wr.writerow(_CSV_COLUMNS)

    def num(x, fmt_="{:.4g}"):
        return "" if x is None else fmt_.format(x)

    for r in recs:
        bl = r["burgers_lattice"] or [None] * 3
        bs = r["burgers_sample_A"] or [None] * 3
        wr.writerow([
            r["id"], r["closed"], f"{r['length_A']:.1f}", r["n_points"], r["burgers_label"],
            *[num(v) for v in bl], *[num(v, "{:.4f}") for v in bs], num(r["burgers_length_A"], "{:.4f}"),
            num(r["character_deg"], "{:.1f}"), r["character"],
            " or ".join(format_hkl(p) for p in r["slip_planes"]),
            f"{r['confidence']:.3f}", num(r["residual"], "{:.3f}"),
            "; ".join(f"({k}): {'?' if v is None else v}" for k, v in r["windings"].items()),
            " ".join(format_hkl(h) for h in r["visible_in"]),
            " ".join(format_hkl(h) for h in r["invisible_in"]),
            "" if r["ends_at_surface"] is None else " ".join(str(e) for e in r["ends_at_surface"]),
            " | ".join(r["notes"]),
            "; ".join(" ".join(f"{v:.1f}" for v in p) for p in r["points_A"]),
        ])
    _write_into_existing_folder(path, buf.getvalue().encode("utf-8"))
    return path


def write_dislocations_h5(group, lines):
    """Store the lines in an open h5py group (one subgroup ``line_001``, ...).

    Each subgroup holds datasets ``points`` (M×3, Å), ``directions`` (M×3),
    ``local_character_deg`` (M), ``hkl`` (J×3) and ``windings`` (J; −128 where
    unknown), ``agreement`` (J), and attributes ``burgers`` (lattice
    coordinates; NaN when unknown), ``burgers_sample`` (Å), ``burgers_fit``,
    ``length``, ``closed``, ``character_deg``, ``confidence``, ``residual``,
    ``slip_planes`` (K×3, may be empty), ``ends_at_surface`` and ``notes``.
    The group's attribute ``count`` is the number of lines. Existing
    ``line_*`` subgroups are replaced.
    """
    import h5py

    if not isinstance(group, h5py.Group):
        raise InputError(f"group: expected an open h5py Group, got {type(group).__name__}")
    recs = dislocations_to_records(lines)  # checks the types
    for name in [k for k in group.keys() if k.startswith("line_")]:
        del group[name]
    group.attrs["count"] = len(lines)
    group.attrs["units"] = "points: Å; burgers: lattice coordinates"
    group.attrs["points_frame"] = POINTS_FRAME
    group.attrs["convention"] = "h_j·b = −n_j, n_j the phase winding right-handed about ξ"
    for k, (d, r) in enumerate(zip(lines, recs)):
        g = group.create_group(f"line_{k + 1:03d}")
        g.create_dataset("points", data=np.asarray(d.points, float))
        g["points"].attrs["units"] = "Å"
        g.create_dataset("directions", data=np.asarray(d.directions, float))
        g.create_dataset("local_character_deg", data=np.asarray(d.local_character_deg, float))
        hk = list(d.windings.keys())
        g.create_dataset("hkl", data=np.asarray(hk, dtype=np.int32).reshape(-1, 3))
        g.create_dataset("windings", data=np.asarray([-128 if d.windings[h] is None else d.windings[h]
                                                      for h in hk], dtype=np.int32))
        g.create_dataset("agreement", data=np.asarray([d.agreement.get(h, 0.0) for h in hk], float))
        nan3 = np.full(3, np.nan)
        g.attrs["burgers"] = nan3 if d.burgers is None else np.asarray(d.burgers, float)
        g.attrs["burgers_sample"] = nan3 if d.burgers_sample is None else np.asarray(d.burgers_sample, float)
        g.attrs["burgers_fit"] = nan3 if d.burgers_fit is None else np.asarray(d.burgers_fit, float)
        g.attrs["length"] = float(d.length)
        g.attrs["closed"] = bool(d.closed)
        g.attrs["character_deg"] = float(d.character_deg)
        g.attrs["confidence"] = float(d.confidence)
        g.attrs["residual"] = float(d.residual)
        g.attrs["slip_planes"] = np.asarray(d.slip_planes, dtype=np.int32).reshape(-1, 3)
        g.attrs["ends_at_surface"] = (np.zeros(0, bool) if d.ends_at_surface is None
                                      else np.asarray(d.ends_at_surface, bool))
        g.attrs["notes"] = " | ".join(d.notes)


def read_dislocations_h5(group):
    """Lines stored by :func:`write_dislocations_h5`, as Dislocation records."""
    import h5py

    if not isinstance(group, h5py.Group):
        raise InputError(f"group: expected an open h5py Group, got {type(group).__name__}")
    out = []
    for name in sorted(k for k in group.keys() if k.startswith("line_")):
        g = group[name]
        for key in ("points", "directions", "hkl", "windings"):
            if key not in g:
                raise InputError(f"{g.name}: missing dataset '{key}'")
        hk = [tuple(int(v) for v in h) for h in g["hkl"][()]]
        wn = g["windings"][()]
        ag = g["agreement"][()] if "agreement" in g else np.zeros(len(hk))
        windings = {h: (None if int(n) == -128 else int(n)) for h, n in zip(hk, wn)}
        b = np.asarray(g.attrs["burgers"], float)
        bs = np.asarray(g.attrs["burgers_sample"], float)
        bf = np.asarray(g.attrs["burgers_fit"], float)
        ends = np.asarray(g.attrs["ends_at_surface"], bool)
        notes = str(g.attrs.get("notes", ""))
        out.append(Dislocation(
            points=g["points"][()], directions=g["directions"][()], length=float(g.attrs["length"]),
            closed=bool(g.attrs["closed"]), windings=windings,
            agreement={h: float(a) for h, a in zip(hk, ag)},
            visible_in=[h for h in hk if windings[h]], invisible_in=[h for h in hk if windings[h] == 0],
            burgers=None if np.isnan(b).any() else b,
            burgers_sample=None if np.isnan(bs).any() else bs,
            burgers_fit=None if np.isnan(bf).any() else bf,
            residual=float(g.attrs["residual"]), confidence=float(g.attrs["confidence"]),
            character_deg=float(g.attrs["character_deg"]),
            local_character_deg=g["local_character_deg"][()],
            slip_planes=[tuple(int(v) for v in p) for p in np.asarray(g.attrs["slip_planes"]).reshape(-1, 3)],
            ends_at_surface=None if ends.size == 0 else tuple(bool(e) for e in ends),
            notes=[s for s in notes.split(" | ") if s]))
    return out
