"""Outputs stage: results.h5, VTK export, figures and the HTML report.

The bundle is built from analytic fields with the project's simulator (a
platinum octahedron with one 60° dislocation and an interface strain
gradient, invented for the tests), passed through braggstrain.strain.tensor and
braggstrain.defects.lines. Files are checked by reading them back with general
reference libraries: h5py for HDF5, Kitware's VTK XML readers for the
ParaView files, Pillow for the PNGs and the standard library's HTML parser
for the report.
"""

from __future__ import annotations

import base64
import hashlib
import os
import re
from html.parser import HTMLParser
from pathlib import Path

import h5py
import numpy as np
import pytest

from braggstrain.simulate import forward as fw
from braggstrain.geometry.crystal import Crystal
from braggstrain.defects.lines import find_dislocations
from braggstrain.errors import InputError
from braggstrain.report.figures import FIGURES, make_figures, plot_slices
from braggstrain.strain.objects import SampleObject
from braggstrain.io.results import Results, read_results, write_results
from braggstrain.io.vtk import export_vtk
from braggstrain.strain.components import STRAIN_COMPONENTS, strain_components, strain_from_components
from braggstrain.report.html import CAUTIONS, strain_statistics, write_report
from braggstrain.strain.lattice import mean_lattice_strain
from braggstrain.strain.tensor import strain_tensor

from conftest import assert_runs_columns_recorded  # noqa: E402

DOC = Path(__file__).resolve().parents[1] / "docs" / "results.md"
N = 32
VS = np.array([10.0, 10.0, 10.0])


def _bundle():
    """An invented crystal: 28 nm Pt octahedron, [111] up, one ½[0 1 -1]
    dislocation along [1 -1 0], and a strain gradient under the base."""
    cr = Crystal("Pt").oriented_by((1, 1, 1), (0, 0, 1), (1, -1, 0), (1, 0, 0))
    shape = (N, N, N)
    coords = fw.grid_coordinates(shape, VS)
    sup = fw.octahedron(shape, VS, 280.0, rotation=cr.U)
    b = cr.U @ (cr.A @ np.array([0.0, 0.5, -0.5]))
    line = cr.U @ (cr.A @ np.array([1.0, -1.0, 0.0]))
    field = (fw.StraightDislocation(point=(10.0, -15.0, 5.0), line=line, burgers=b)
             + fw.InterfaceGradient(normal=(0, 0, -1), position=80.0, strain=2e-3, decay=40.0))
    u = field.displacement(coords)
    hkls = [(1, 1, 1), (2, 0, 0), (0, 2, 0), (0, 0, 2)]
    G = np.array([cr.g_sample(h) for h in hkls])
    objs = [fw.complex_object(sup, u, g) for g in G]
    tf = strain_tensor(objs, G, VS, support=sup, labels=hkls)
    lines = find_dislocations([SampleObject(o, VS, g, sup, hkl=h) for o, g, h in zip(objs, G, hkls)],
                              crystal=cr)
    c = tuple(n // 2 for n in shape)
    refl = []
    for j, (h, g, o) in enumerate(zip(hkls, G, objs)):
        ug = np.tensordot(g, u, axes=1) / np.linalg.norm(g)
        disp = np.where(sup, ug - ug[c], np.nan).astype(np.float32)
        q = np.linspace(0.002, 0.06, 24)
        it = np.arange(300)
        q_cut = 0.03 + 0.005 * j
        refl.append(dict(
            name=f"pt_{''.join(map(str, h))}", hkl=h, g_vector=g, scan=f"scans/pt_{j}.h5",
            max_counts=2e5 / (j + 1), oversampling=(2.4, 2.6 + 0.1 * j, 3.1), runs=4, kept=2,
            run_metrics=[dict(run=k, nll=1.2 + 0.1 * k + 0.05 * j, free_nll=1.3 + 0.1 * k,
                              support_size=900 + k, sharpness=0.8 - 0.01 * k,
                              status="ok" if k < 3 else "support collapsed", kept=k < 2,
                              rank=k if k < 3 else -1)
                         for k in range(4)],
            prtf=dict(q=q, values=np.exp(-(q / q_cut) ** 2), resolution=2 * np.pi / q_cut),
            history=dict(amplitude_error=((0.5 + 0.1 * j) * np.exp(-it / (40.0 + 10 * j)) + 0.02).astype(np.float32),
                         support_size=(2000 - (2 + j) * np.minimum(it, 200)).astype(np.int64),
                         stage=(it >= 200).astype(np.int16), checkpoint=np.arange(0, 300, 50),
                         nll=np.linspace(3.0, 1.0 + 0.2 * j, 6)),
            amplitude=np.abs(o).astype(np.float32), phase=np.angle(o).astype(np.float32),
            displacement=disp, support=sup, shift_vox=(0.1 * j, -0.2, 0.05), twin=(j == 2)))
    ml = mean_lattice_strain(G * (1 - 1e-3), G, lattice_parameter=3.9242)
    reg = dict(reference=0, shifts_voxels=[x["shift_vox"] for x in refl], twins=[x["twin"] for x in refl],
               overlap=[1.0, 0.97, 0.96, 0.95], twin_decided_by=["reference", "amplitude", "amplitude", "residual"])
    prov = dict(pipeline_text='[crystal]\nmaterial = "Pt"\n# <b>not html</b> & more\n',
                versions={"numpy": np.__version__, "h5py": h5py.__version__}, seeds={"phasing": 11},
                timings={"phase": 12.5, "tensor": 0.4}, command="braggstrain run demo.toml --out out",
                created="2026-01-01T00:00:00+00:00")
    return dict(grid=dict(voxel_size=VS, origin=(0.0, 0.0, 0.0), shape=shape), support=sup,
                amplitude=np.mean([x["amplitude"] for x in refl], axis=0), reflections=refl, tensor=tf,
                dislocations=lines, registration=reg, mean_lattice=ml, provenance=prov)


@pytest.fixture(scope="module")
def bundle():
    return _bundle()


@pytest.fixture(scope="module")
def results_file(bundle, tmp_path_factory):
    return write_results(tmp_path_factory.mktemp("res") / "results.h5", bundle)


@pytest.fixture(scope="module")
def figures(results_file, tmp_path_factory):
    # made from the file read back, as `braggstrain report RESULTS` does
    out = tmp_path_factory.mktemp("fig")
    return make_figures(read_results(results_file), out)


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

def test_vtk_files_read_back_with_vtk(bundle, results_file, tmp_path):
    vtk = pytest.importorskip("vtk", reason="Kitware's vtk package is the reference reader of .vti/.vtu")
    from vtk.util.numpy_support import vtk_to_numpy

    paths = export_vtk(results_file, tmp_path)
    assert [p.name for p in paths] == ["crystal.vti", "crystal_dislocations.vtu"]
    rd = vtk.vtkXMLImageDataReader()
    rd.SetFileName(str(paths[0]))
    rd.Update()
    img = rd.GetOutput()
    assert img.GetDimensions() == (N, N, N)
    np.testing.assert_allclose(img.GetSpacing(), VS / 10.0)  # nm
    np.testing.assert_allclose(img.GetOrigin(), -(N // 2) * VS / 10.0)  # voxel (0,0,0); index n//2 at 0
    pd = img.GetPointData()

    def arr(name):
        a = pd.GetArray(name)
        assert a is not None, name
        v = vtk_to_numpy(a)
        # VTK stores x fastest (VTK User's Guide, 11th ed., ch. 19 "VTK File Formats")
        if v.ndim == 2:
            return np.stack([v[:, k].reshape((N, N, N), order="F") for k in range(v.shape[1])])
        return v.reshape((N, N, N), order="F")

    tf = bundle["tensor"]
    comps = strain_components(tf.strain)
    for m, c in enumerate(STRAIN_COMPONENTS):
        np.testing.assert_array_equal(arr(f"strain_{c}"), comps[m])
    np.testing.assert_array_equal(arr("support"), bundle["support"].astype(np.uint8))
    np.testing.assert_array_equal(arr("amplitude"), bundle["amplitude"].astype(np.float32))
    np.testing.assert_array_equal(arr("rotation_rad"), tf.rotation)
    np.testing.assert_allclose(arr("displacement_nm"), tf.displacement / 10.0, rtol=1e-6, equal_nan=True)
    np.testing.assert_array_equal(arr("hydrostatic_strain"), tf.hydrostatic)
    np.testing.assert_array_equal(arr("von_mises_strain"), tf.von_mises)
    for x in bundle["reflections"]:
        np.testing.assert_array_equal(arr(f"phase_rad_{x['name']}"), x["phase"])
    lr = vtk.vtkXMLUnstructuredGridReader()
    lr.SetFileName(str(paths[1]))
    lr.Update()
    ug = lr.GetOutput()
    lines = bundle["dislocations"]
    assert ug.GetNumberOfCells() == len(lines)
    assert ug.GetCellType(0) == vtk.VTK_POLY_LINE
    pts = vtk_to_numpy(ug.GetPoints().GetData())
    first = lines[0]
    np.testing.assert_allclose(pts[: len(first.points)], first.points / 10.0)
    ids = vtk_to_numpy(ug.GetPointData().GetArray("line_id"))
    assert set(ids.tolist()) == set(range(1, len(lines) + 1))


# --------------------------------------------------------------------------
# figures
# --------------------------------------------------------------------------

def test_every_figure_is_a_valid_png(figures):
    from PIL import Image

    assert [p.name for p in figures] == list(FIGURES)
    for p in figures:
        # PNG signature: W3C PNG Specification, 2nd ed. (2003), §5.2
        assert p.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n", p
        with Image.open(p) as im:
            im.verify()  # Pillow checks the chunk CRCs
        with Image.open(p) as im:
            assert im.format == "PNG" and min(im.size) >= 300, (p, im.size)
    assert not [q for q in figures[0].parent.iterdir() if ".part" in q.name]


def test_slice_colour_limits_ignore_outliers(tmp_path):
    # robust limits at the 99th percentile inside the support (common practice, no source)
    sup = fw.octahedron((N, N, N), VS, 280.0)
    rng = np.random.default_rng(1)
    f = np.where(sup, rng.normal(0, 1e-3, (N, N, N)), np.nan)
    c = tuple(np.argwhere(sup).mean(axis=0).round().astype(int))
    f[c] = 1.0  # one wild voxel in the central planes
    fig = plot_slices([f], sup, VS, tmp_path / "s.png", names=["ε"], units=[""])
    ims = [a.images[0] for a in fig.axes if a.images]
    assert len(ims) == 3
    lo, hi = ims[0].get_clim()
    assert lo == -hi  # centred on zero
    p99 = np.percentile(np.abs(f[sup]), 99)
    assert hi == pytest.approx(p99 * 1e3, rel=1e-6)  # shown in units of 10⁻³
    assert (tmp_path / "s.png").is_file()


# --------------------------------------------------------------------------
# report
# --------------------------------------------------------------------------

class _Links(HTMLParser):
    def __init__(self):
        super().__init__()
        self.refs, self.imgs, self.tables, self.tags = [], 0, 0, set()

    def handle_starttag(self, tag, attrs):
        self.tags.add(tag)
        self.imgs += tag == "img"
        self.tables += tag == "table"
        for k, v in attrs:
            if k in ("src", "href", "srcset", "data", "poster"):
                self.refs.append(v or "")


def test_report_is_self_contained_and_holds_the_tables(bundle, results_file, figures, tmp_path):
    back = read_results(results_file)
    page = write_report(back, tmp_path, figures)
    text = page.read_text(encoding="utf-8")
    parser = _Links()
    parser.feed(text)
    assert parser.refs and all(r.startswith("data:image/png;base64,") for r in parser.refs)
    assert "<link" not in text and "<script" not in text and "url(" not in text
    assert parser.imgs == len(figures)
    # the embedded images are the figure files, byte for byte
    embedded = [base64.b64decode(r.split(",", 1)[1]) for r in parser.refs]
    assert embedded == [p.read_bytes() for p in figures]
    assert parser.tables >= 6
    for x in bundle["reflections"]:
        assert f"<td class=\"text\">{x['name']}</td>" in text
    assert "(1 1 1)" in text and "PRTF resolution" in text and "oversampling" in text
    assert f"{bundle['tensor'].condition_number:.3f}" in text
    d = bundle["dislocations"][0]
    assert "1/2[0 1 -1]" in text and "Burgers vector" in text and f"{d.character_deg:.0f}" in text
    # strain statistics: the median of ε_zz inside the crystal, as numpy computes it
    stats = {s["name"]: s for s in strain_statistics(bundle["tensor"])}
    v = bundle["tensor"].strain[2, 2][bundle["tensor"].support]
    v = v[np.isfinite(v)]
    assert stats["ε_zz"]["p50"] == pytest.approx(float(np.median(v)))
    assert f"{stats['ε_zz']['p50']:.3e}" in text
    assert CAUTIONS.split(".")[0] in text and "facility" in text
    # the pipeline text is shown escaped, never as markup
    assert "<b>not html</b>" not in text and "&lt;b&gt;not html&lt;/b&gt; &amp; more" in text
    assert not [q for q in tmp_path.iterdir() if ".part" in q.name]


def test_report_makes_its_own_figures(bundle, tmp_path):
    small = dict(bundle, reflections=[dict(x, history={}, prtf=None, run_metrics=[]) for x in bundle["reflections"]],
                 dislocations=[])
    page = write_report(Results.from_dict(small), tmp_path)
    names = sorted(p.name for p in tmp_path.glob("*.png"))
    # nothing recorded, no empty figure
    expected = sorted(set(FIGURES) - {"prtf.png", "history.png", "runs.png"})
    assert names == expected
    text = page.read_text(encoding="utf-8")
    assert "No dislocation line was found" in text
    assert text.count("<img ") == len(expected)


def test_documentation_lists_every_figure():
    text = DOC.read_text(encoding="utf-8")
    for name in FIGURES:
        assert f"`{name}`" in text, name


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
