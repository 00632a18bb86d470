"""io/results: results.h5 written and read back with h5py, round trips,
refusals, and files of an earlier layout.

The bundle (tests/results_bundle.py) is built from analytic fields with the
project's simulator, invented for the tests."""

from __future__ import annotations

import hashlib
import os
import re
from pathlib import Path

import h5py
import numpy as np
import pytest

from braggstrain.simulate import forward as fw
from braggstrain.geometry.crystal import Crystal
from braggstrain.errors import InputError
from braggstrain.io.results import Results, read_results, write_results
from braggstrain.strain.components import STRAIN_COMPONENTS, strain_components, strain_from_components
from braggstrain.strain.tensor import strain_tensor

from conftest import assert_runs_columns_recorded  # noqa: E402
from results_bundle import N, VS  # noqa: E402

DOC = Path(__file__).resolve().parents[1] / "docs" / "results.md"


def _documented_datasets():
    """Dataset paths of the layout table in docs/results.md."""
    text = DOC.read_text(encoding="utf-8")
    block = text.split("### Datasets", 1)[1].split("### Attributes", 1)[0]
    return re.findall(r"^\| `(/[^`]+)` \|", block, flags=re.M)


# --------------------------------------------------------------------------
# results.h5
# --------------------------------------------------------------------------

def test_results_file_holds_every_documented_dataset_with_units(bundle, results_file):
    # reference reader: h5py (the HDF5 library's own Python binding)
    documented = _documented_datasets()
    assert len(documented) >= 30
    names = [x["name"] for x in bundle["reflections"]]
    with h5py.File(results_file, "r") as f:
        assert f.attrs["format"] == "braggstrain-results" and f.attrs["format_version"] == 2
        for pattern in documented:
            paths = [pattern.replace("<name>", n) for n in names] if "<name>" in pattern else [pattern]
            paths = [p.replace("line_NNN", "line_001") for p in paths]
            for p in paths:
                if "<" in p:  # a group of columns/metrics: it must hold at least one dataset
                    grp = f[p.rsplit("/", 1)[0]]
                    assert len(grp) > 0, p
                    continue
                assert p in f, f"documented dataset {p} missing"
                assert isinstance(f[p], h5py.Dataset), p
        missing = []

        def visit(name, obj):
            if isinstance(obj, h5py.Dataset) and "units" not in obj.attrs:
                missing.append(name)

        f.visititems(visit)
        assert not missing, f"datasets without a units attribute: {missing}"
        # the strain is stored as six components, in the order the attribute states
        eps = f["tensor/strain"]
        assert eps.shape == (6, N, N, N) and eps.dtype == np.float32
        assert list(eps.attrs["components"]) == ["xx", "yy", "zz", "yz", "xz", "xy"]
        assert eps.compression == "gzip"
        tf = bundle["tensor"]
        np.testing.assert_array_equal(eps[3], tf.strain[1, 2])  # ε_yz
        np.testing.assert_array_equal(eps[4], tf.strain[2, 0])  # ε_xz
        np.testing.assert_array_equal(eps[5], tf.strain[0, 1])  # ε_xy
        # the axis coordinates put index n//2 at the origin
        assert f["grid/x"][N // 2] == 0.0 and f["grid/x"][N // 2 + 1] == pytest.approx(VS[0])
        np.testing.assert_array_equal(f["grid"].attrs["voxel_size"], VS)
        assert f["reflections"].attrs["order"].tolist() == names
        assert f["provenance/pipeline_text"][()].decode() == bundle["provenance"]["pipeline_text"]


def test_read_results_round_trip(bundle, results_file):
    back = read_results(results_file)
    np.testing.assert_array_equal(back.support, bundle["support"])
    np.testing.assert_array_equal(back.amplitude, bundle["amplitude"].astype(np.float32))
    assert back.grid.shape == (N, N, N)
    a, b = back.tensor, bundle["tensor"]
    for name in ("strain", "rotation", "residual", "residual_per_reflection", "strain_uncertainty",
                 "rotation_uncertainty", "displacement", "support", "trusted", "g_vectors"):
        np.testing.assert_array_equal(getattr(a, name), getattr(b, name), err_msg=name)
    # D rebuilt from ε and ω agrees with the solver's D to float32 round-off
    np.testing.assert_allclose(a.displacement_gradient, b.displacement_gradient, atol=2e-7 * np.nanmax(
        np.abs(b.displacement_gradient)), equal_nan=True)
    assert a.condition_number == b.condition_number and a.labels == b.labels
    assert a.reference == b.reference
    for x, y in zip(back.reflections, bundle["reflections"]):
        assert x.name == y["name"] and x.hkl == y["hkl"]
        for key in ("amplitude", "phase", "displacement", "support"):
            np.testing.assert_array_equal(getattr(x, key), y[key], err_msg=key)
        assert x.run_metrics == y["run_metrics"]
        np.testing.assert_array_equal(x.prtf["q"], y["prtf"]["q"])
        assert x.prtf["resolution"] == y["prtf"]["resolution"]
        assert set(x.history) == set(y["history"])
        for k in y["history"]:
            np.testing.assert_array_equal(x.history[k], y["history"][k])
        assert x.twin == y["twin"] and x.max_counts == y["max_counts"]
        assert set(x.coherence) == set(y["coherence"])
        for k, v in y["coherence"].items():
            if k == "choice":
                assert x.coherence[k]["coherent"] == v["coherent"] and x.coherence[k]["metric"] == v["metric"]
                np.testing.assert_array_equal(x.coherence[k]["partial_widths_voxels"], v["partial_widths_voxels"])
            elif isinstance(v, str):
                assert x.coherence[k] == v
            else:
                np.testing.assert_array_equal(x.coherence[k], v, err_msg=k)
    assert len(back.dislocations) == len(bundle["dislocations"]) >= 1
    for d, e in zip(back.dislocations, bundle["dislocations"]):
        np.testing.assert_array_equal(d.points, e.points)
        np.testing.assert_array_equal(d.burgers, e.burgers)
    np.testing.assert_array_equal(back.registration["shifts_voxels"], bundle["registration"]["shifts_voxels"])
    assert back.registration["twin_decided_by"] == bundle["registration"]["twin_decided_by"]
    np.testing.assert_array_equal(back.mean_lattice["strain"], bundle["mean_lattice"].strain)
    assert back.mean_lattice["lattice_parameter"] == bundle["mean_lattice"].lattice_parameter
    assert back.provenance == bundle["provenance"]


def test_strain_components_round_trip():
    # the six independent components of a symmetric tensor (any mechanics text; common practice)
    rng = np.random.default_rng(0)
    a = rng.normal(size=(3, 3, 4))
    e = 0.5 * (a + np.swapaxes(a, 0, 1))
    c = strain_components(e)
    assert c.shape == (6, 4)
    np.testing.assert_array_equal(c[list(STRAIN_COMPONENTS).index("yz")], e[1, 2])
    np.testing.assert_array_equal(strain_from_components(c), e)


def test_minimal_bundle_round_trip(tmp_path):
    # only the required keys, three reflections, no displacement maps: the defaults survive a round trip
    cr = Crystal("Pt")
    shape, vs = (24, 20, 28), np.array([8.0, 12.0, 6.0])
    sup = fw.ellipsoid(shape, vs, (60.0, 80.0, 50.0), center=(8.0, 0.0, -6.0))
    u = fw.UniformStrain(np.diag([1e-3, -5e-4, 0.0])).displacement(fw.grid_coordinates(shape, vs))
    hkls = [(1, 1, 1), (2, 0, 0), (0, 2, 0)]
    G = np.array([cr.g_sample(h) for h in hkls])
    objs = [fw.complex_object(sup, u, g) for g in G]
    tf = strain_tensor(objs, G, vs, support=sup, labels=hkls, displacement=False)
    refl = [dict(name=f"r{j}", hkl=h, g_vector=g, amplitude=np.abs(o), phase=np.angle(o), support=sup)
            for j, (h, g, o) in enumerate(zip(hkls, G, objs))]
    b = dict(grid=dict(voxel_size=vs, origin=(5.0, 0.0, 0.0), shape=shape), support=sup,
             amplitude=np.abs(objs[0]), reflections=refl, tensor=tf)
    back = read_results(write_results(tmp_path / "results.h5", b))
    assert back.tensor.displacement is None and back.dislocations == []
    x = back.reflection("r1")
    assert x.displacement is None and x.prtf is None and x.run_metrics == [] and x.history == {}
    assert np.isnan(x.oversampling).all() and np.isnan(x.max_counts) and x.best_run() is None
    # ε_xx = 1e-3 of the uniform field, read back from the file (float32 solve)
    e = back.strain("xx")[back.tensor.trusted]
    assert np.allclose(e, 1e-3, atol=1e-8)
    with h5py.File(tmp_path / "results.h5", "r") as f:
        assert f["grid/x"][shape[0] // 2] == 5.0  # origin = position of index n//2
    write_results(tmp_path / "again.h5", back)  # what was read can be written again


def test_failed_write_keeps_earlier_file_and_leaves_no_partial(bundle, tmp_path):
    target = tmp_path / "results.h5"
    bad = dict(bundle)
    bad["provenance"] = dict(bundle["provenance"], host=object())  # cannot be stored: fails mid-write
    with pytest.raises(InputError, match="host"):
        write_results(target, bad)
    assert os.listdir(tmp_path) == []  # no partial file, no temporary left
    write_results(target, bundle)
    before = hashlib.sha256(target.read_bytes()).hexdigest()
    with pytest.raises(InputError, match="host"):
        write_results(target, bad)
    assert hashlib.sha256(target.read_bytes()).hexdigest() == before
    assert os.listdir(tmp_path) == ["results.h5"]
    read_results(target)  # still a complete file


def test_bad_bundle_names_the_field(bundle, tmp_path):
    bad = dict(bundle)
    bad["reflections"] = [dict(x) for x in bundle["reflections"]]
    bad["reflections"][2]["phase"] = np.zeros((N, N, N - 1), np.float32)
    with pytest.raises(InputError, match=r"\['reflections'\]\[2\] \('pt_020'\)\['phase'\].*shape"):
        write_results(tmp_path / "r.h5", bad)
    with pytest.raises(InputError, match="missing key 'tensor'"):
        write_results(tmp_path / "r.h5", {k: v for k, v in bundle.items() if k != "tensor"})
    bad = dict(bundle, reflections=[dict(bundle["reflections"][0])] * 2)
    with pytest.raises(InputError, match="unique names"):
        write_results(tmp_path / "r.h5", bad)
    assert not (tmp_path / "r.h5").exists()


def test_read_rejects_other_hdf5(tmp_path):
    p = tmp_path / "other.h5"
    with h5py.File(p, "w") as f:
        f["data"] = np.zeros(3)
    with pytest.raises(InputError, match="format"):
        read_results(p)
    with pytest.raises(InputError, match="file not found"):
        read_results(tmp_path / "missing.h5")


# --------------------------------------------------------------------------
# VTK
# --------------------------------------------------------------------------



# --------------------------------------------------------------------------
# figures
# --------------------------------------------------------------------------





# --------------------------------------------------------------------------
# report
# --------------------------------------------------------------------------









# --------------------------------------------------------------------------
# the Results object, files of earlier versions, the runs columns used
# --------------------------------------------------------------------------

LEGACY = Path(__file__).resolve().parent / "data" / "results_layout1.h5"


def test_results_answer_questions(bundle):
    r = Results.from_dict(bundle)
    assert r.names == [x["name"] for x in bundle["reflections"]]
    assert r.reflection("pt_200").hkl == (2, 0, 0)
    with pytest.raises(InputError, match="did you mean 'pt_200'"):
        r.reflection("pt_2OO")
    np.testing.assert_array_equal(r.strain("xz"), bundle["tensor"].strain[0, 2])
    np.testing.assert_array_equal(r.strain("zx"), r.strain("xz"))
    with pytest.raises(InputError, match="strain component"):
        r.strain("xw")
    np.testing.assert_array_equal(r.trusted, bundle["tensor"].trusted & bundle["support"])
    # the best run is the one the ensemble ranked first (rank 0), not a guess
    assert r.best_run("pt_111")["run"] == 0
    assert r.reflection("pt_111").ranking_metric == "free_nll"


def test_a_results_file_of_layout_1_still_opens():
    # written by braggstrain at commit 27e9039 (tests/data/README.md)
    r = read_results(LEGACY)
    assert r.names == ["r0", "r1", "r2", "r3"]
    assert r.grid.shape == r.support.shape == r.tensor.strain.shape[2:]
    assert r.tensor.condition_number > 1 and r.dislocations == []
    for x in r.reflections:
        # no rank column: ranked again by the pipeline file's metric (the default, free_nll)
        assert x.ranking_metric == "free_nll" and "rank" not in x.run_metrics[0]
        ok = [m for m in x.run_metrics if m["status"] == "ok"]
        assert x.best_run() == min(ok, key=lambda m: m["free_nll"])
        assert x.best_run()["kept"]
    assert np.isfinite(r.strain("yz")[r.trusted]).all()


def test_every_runs_column_the_outputs_use_is_in_a_layout_1_file():
    # issue 16: the figures and the report read only columns that runs record
    # (a file written by today's pipeline: tests/test_pipeline.py)
    assert_runs_columns_recorded(LEGACY)
