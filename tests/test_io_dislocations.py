"""io/dislocations: the dislocation table (CSV, JSON, HDF5) read back with the
standard library's csv/json readers and h5py."""

from __future__ import annotations

import csv
import json
import os

import h5py
import numpy as np
import pytest

from braggstrain.defects.burgers import format_lattice_vector
from braggstrain.io.dislocations import read_dislocations_h5, write_dislocation_table, write_dislocations_h5
from braggstrain.errors import InputError



def test_table_csv_json_and_h5_round_trip(loop_and_lines, tmp_path):
    # Round trip through the standard-library csv/json readers and h5py.
    lines = loop_and_lines[0]
    csv_path = write_dislocation_table(lines, tmp_path / "lines.csv")
    json_path = write_dislocation_table(lines, tmp_path / "lines.json")
    assert sorted(os.listdir(tmp_path)) == ["lines.csv", "lines.json"]  # no temporary files left
    rows = list(csv.DictReader(open(csv_path, encoding="utf-8")))
    assert len(rows) == len(lines)
    for r, d in zip(rows, lines):
        assert r["burgers_label"] == format_lattice_vector(d.burgers)
        assert float(r["b_x_A"]) == pytest.approx(d.burgers_sample[0], abs=1e-4)
        assert float(r["length_A"]) == pytest.approx(d.length, abs=0.1)
        pts = np.array([[float(v) for v in p.split()] for p in r["points_A"].split(";")])
        assert np.allclose(pts, d.points, atol=0.06)
        assert r["closed"] == str(d.closed)
    doc = json.load(open(json_path, encoding="utf-8"))
    assert len(doc["lines"]) == len(lines)
    for r, d in zip(doc["lines"], lines):
        assert r["burgers_lattice"] == list(d.burgers)
        assert np.allclose(r["points_A"], d.points, atol=1e-3)
        assert r["slip_planes"] == [list(p) for p in d.slip_planes]
    with h5py.File(tmp_path / "res.h5", "w") as f:
        write_dislocations_h5(f.create_group("dislocations"), lines)
    with h5py.File(tmp_path / "res.h5", "r") as f:
        assert f["dislocations"].attrs["count"] == len(lines)
        back = read_dislocations_h5(f["dislocations"])
    for a, b in zip(back, lines):
        assert np.array_equal(a.burgers, b.burgers) and np.allclose(a.points, b.points)
        assert a.windings == b.windings and a.closed == b.closed and a.slip_planes == b.slip_planes
        assert a.character_deg == pytest.approx(b.character_deg)



def test_table_rejects_bad_paths(loop_and_lines, tmp_path):
    # Input handling, no outside source.
    lines = loop_and_lines[0]
    with pytest.raises(InputError, match=r"\.csv or \.json"):
        write_dislocation_table(lines, tmp_path / "lines.txt")
    with pytest.raises(InputError, match="does not exist"):
        write_dislocation_table(lines, tmp_path / "missing" / "lines.csv")
    with pytest.raises(InputError, match="Dislocation"):
        write_dislocation_table([{"points": []}], tmp_path / "lines.csv")
