"""Positions on a grid whose origin is not zero (issue 17).

A crystal with one 60° dislocation is built from its analytic displacement
field (Volterra field, Hirth & Lothe, Theory of Dislocations, 2nd ed., 1982,
ch. 3) on sample-frame grids whose ``origin`` (the position of the voxel at
index n//2) is non-zero on every axis and not a multiple of the voxel, with
a non-cubic shape. It goes through the stages after phase retrieval
(registration, tensor, defects) and every output, and the line found is
checked against

* the true line (its position is known in the sample frame);
* the phase vortices found here, independently of the package, in the phase
  maps written to ``results.h5`` (winding of the wrapped phase around every
  elementary plaquette), placed with the file's own ``/grid/x, y, z``;
* the ParaView files read back with Kitware's VTK readers.

Positions here come from the documented definition (docs/results.md):
x_i = origin_x + (i − n_x//2)·voxel_x, written out below, not from the
package's grid.
"""

from __future__ import annotations

import csv
import json

import h5py
import numpy as np
import pytest
from scipy import ndimage
from scipy.spatial.transform import Rotation

from braggstrain.defects.lines import find_dislocations
from braggstrain.io.dislocations import write_dislocation_table
from braggstrain.geometry.crystal import Crystal
from braggstrain.io.results import read_results, write_results
from braggstrain.io.vtk import export_vtk
from braggstrain.simulate import forward as fw
from braggstrain.strain.objects import SampleObject
from braggstrain.strain.registration import register
from braggstrain.strain.tensor import strain_tensor

VS = 10.0                                   # voxel edge, Å
SHAPE = (40, 36, 31)                        # non-cubic
ORIGIN = np.array([123.4, -77.7, 158.2])    # Å: non-zero on every axis, not a multiple of the voxel
HKLS = [(1, 1, 1), (2, 0, 0), (0, 2, 0), (0, 0, 2)]
# an orientation that puts the line oblique to the grid axes (a line along a
# grid axis is traced through plaquette centres, ±0.5 voxel; invented value)
U = Rotation.from_rotvec(np.radians(23.0) * np.array([0.4, -0.7, 0.59]) / np.linalg.norm([0.4, -0.7, 0.59])).as_matrix()
B_LATTICE = np.array([0.0, 0.5, -0.5])      # 60° dislocation on (111), as in the demo


def positions(shape, voxel, origin):
    """(3, *shape) sample-frame positions by the documented definition."""
    axes = [origin[k] + (np.arange(shape[k]) - shape[k] // 2) * voxel for k in range(3)]
    return np.stack(np.meshgrid(*axes, indexing="ij"))


def _crystal():
    return Crystal("Pt").with_orientation(U)


def _truth(cr):
    """The crystal (truncated octahedron on a flat, so it differs from its
    twin) centred near the grid's middle, and the dislocation line."""
    normals = [[i, j, k] for i in (1, -1) for j in (1, -1) for k in (1, -1)]
    normals += [[1, 0, 0], [-1, 0, 0], [0, 1, 0], [0, -1, 0], [0, 0, 1], [0, 0, -1]]
    size = 300.0
    dists = [size / (2 * np.sqrt(3))] * 8 + [0.75 * size / 2] * 6
    poly = fw.Polyhedron(np.array(normals, float) @ cr.U.T, dists)
    poly = fw.Polyhedron(np.vstack([poly.normals, [0.0, 0.0, -1.0]]), list(dists) + [65.0])
    centre = ORIGIN + np.array([6.0, -4.0, 13.0])
    poly.center = centre
    b = cr.burgers_to_sample(B_LATTICE)
    xi = cr.U @ (cr.A @ np.array([1.0, -1.0, 0.0]))
    xi /= np.linalg.norm(xi)
    p0 = centre + np.array([12.0, -17.0, 6.0])
    return poly, fw.StraightDislocation(point=p0, line=xi, burgers=b), p0, xi


def _object(cr, poly, field, hkl, shape, origin, twin=False):
    r = positions(shape, VS, origin)
    sup = poly.signed_distance(r) <= 0
    g = cr.g_sample(hkl)
    obj = fw.complex_object(sup, field.displacement(r), g)
    if twin:  # conj ρ(2·origin − r): index i ↔ 2(n//2) − i, inside the array for these shapes
        assert all(n % 2 == 1 for n in shape)
        obj = np.conj(obj[::-1, ::-1, ::-1])
        sup = sup[::-1, ::-1, ::-1]
    return SampleObject(obj, VS, g, sup, origin=origin, hkl=hkl)


def _run(tmp_path, twin_reference=False):
    """Registration, tensor, defects and every output, as the pipeline chains them."""
    cr = _crystal()
    poly, field, p0, xi = _truth(cr)
    shape = SHAPE if not twin_reference else (41, 37, 31)
    objs = [_object(cr, poly, field, HKLS[0], shape, ORIGIN, twin=twin_reference)]
    # the other reflections on grids of their own (other origin and shape,
    # voxels on one lattice): registration must place them through both grids
    for j, h in enumerate(HKLS[1:], start=1):
        o2 = ORIGIN + np.array([-2.0, 1.0, 1.0]) * VS * j  # same lattice, other origin
        objs.append(_object(cr, poly, field, h, (SHAPE[0] + 2 * j, SHAPE[1] - j, SHAPE[2] + j), o2))
    reg, report = register(objs, return_report=True)
    G = np.array([o.g_vector for o in reg])
    sup = np.logical_and.reduce([o.support for o in reg])
    tf = strain_tensor(reg, G, reg[0].voxel_size, support=sup, labels=[str(h) for h in HKLS])
    lines = find_dislocations(reg, crystal=cr, support=tf.support)
    refl = [dict(name=f"pt_{''.join(map(str, o.hkl))}", hkl=o.hkl, g_vector=o.g_vector,
                 amplitude=np.abs(o.obj), phase=np.angle(o.obj), support=o.support,
                 shift_vox=o.meta["registration"]["shift_voxels"], twin=o.meta["registration"]["twin"])
            for o in reg]
    bundle = dict(grid=dict(voxel_size=reg[0].voxel_size, origin=reg[0].origin, shape=reg[0].shape),
                  support=tf.support, amplitude=np.mean([x["amplitude"] for x in refl], axis=0),
                  reflections=refl, tensor=tf, dislocations=lines, registration=report,
                  mean_lattice={}, provenance={})
    path = write_results(tmp_path / "results.h5", bundle)
    vtk = export_vtk(path, tmp_path / "vtk")
    write_dislocation_table(read_results(path).dislocations, tmp_path / "dislocations.csv")
    write_dislocation_table(read_results(path).dislocations, tmp_path / "dislocations.json")
    if twin_reference:  # the reconstruction is the twin: the line is inverted about the reference's origin
        p0 = 2 * ORIGIN - p0
    return dict(path=path, vtk=vtk, p0=p0, xi=xi, report=report, lines=lines, dir=tmp_path)


def _perp(points, p0, xi):
    r = np.asarray(points, float) - p0
    return np.linalg.norm(r - np.outer(r @ xi, xi), axis=1)


def _file_vortices(path):
    """Centres (Å, from /grid/x, y, z) of the plaquettes around which a written
    phase map winds, per reflection, inside the crystal.

    The winding of a plaquette is the sum of the wrapped phase steps around
    it divided by 2π (a plaquette normal to axis a spans the two other axes
    from index i to i + 1); only plaquettes whose four corners lie in the
    written support eroded by one voxel are kept (the phase outside the
    crystal means nothing).
    """
    with h5py.File(path, "r") as f:
        ax = [f["grid"][k][()] for k in "xyz"]
        inner = ndimage.binary_erosion(f["crystal/support"][()].astype(bool))
        maps = {k: g["phase"][()].astype(float) for k, g in f["reflections"].items()}

    def wrap(a):
        return (a + np.pi) % (2 * np.pi) - np.pi

    def step(ph, k):
        return wrap(np.diff(ph, axis=k))

    def sl(**kw):  # slices by axis number: sl(b=(0, -1)) ...
        s = [slice(None)] * 3
        for k, (lo, hi) in kw.items():
            s[int(k[1:])] = slice(lo, hi)
        return tuple(s)

    out = {}
    for name, ph in maps.items():
        pts = []
        for a in range(3):
            b, c = [k for k in range(3) if k != a]
            db = wrap(np.diff(ph, axis=b))  # ph(i + e_b) − ph(i)
            dc = wrap(np.diff(ph, axis=c))
            lo, hi = (0, -1), (1, None)
            # loop i → i + e_b → i + e_b + e_c → i + e_c → i
            w = (db[sl(**{f"a{c}": lo})] + dc[sl(**{f"a{b}": hi})]
                 - db[sl(**{f"a{c}": hi})] - dc[sl(**{f"a{b}": lo})])
            n = np.rint(w / (2 * np.pi)).astype(int)
            corners = np.ones(n.shape, bool)
            for sb in (lo, hi):
                for sc in (lo, hi):
                    corners &= inner[sl(**{f"a{b}": sb, f"a{c}": sc})]
            for idx in np.argwhere((n != 0) & corners):
                pts.append([ax[k][idx[k]] if k == a else 0.5 * (ax[k][idx[k]] + ax[k][idx[k] + 1])
                            for k in range(3)])
        out[name] = np.array(pts, float).reshape(-1, 3)
    return out


def _fit_line(points):
    c = points.mean(axis=0)
    _, _, vt = np.linalg.svd(points - c)
    return c, vt[0]


@pytest.fixture(scope="module")
def straight(tmp_path_factory):
    return _run(tmp_path_factory.mktemp("origin"))


@pytest.fixture(scope="module")
def twinned(tmp_path_factory):
    return _run(tmp_path_factory.mktemp("origin_twin"), twin_reference=True)


def _check_line_positions(case):
    with h5py.File(case["path"], "r") as f:
        assert np.all(f["grid"].attrs["origin"] != 0)
        names = [k for k in f["dislocations"] if k.startswith("line_")]
        assert len(names) == 1, names
        pts = f["dislocations"][names[0]]["points"][()]
    # (a) the true line: median within 0.25 voxel, every point within one voxel
    d_true = _perp(pts, case["p0"], case["xi"]) / VS
    assert np.median(d_true) <= 0.25, f"median {np.median(d_true):.3f} voxels from the true line"
    assert d_true.max() <= 1.0, f"max {d_true.max():.3f} voxels from the true line"
    # ... and the vortices of the written phase maps (a straight line through
    # the plaquettes of every reflection that sees the line)
    vort = _file_vortices(case["path"])
    seen = np.vstack([v for v in vort.values() if len(v) >= 10])
    c, u = _fit_line(seen)
    assert _perp(seen, case["p0"], case["xi"]).mean() / VS < 0.6  # the test's own finder sees the truth
    d_vort = _perp(pts, c, u) / VS
    assert np.median(d_vort) <= 0.25, f"median {np.median(d_vort):.3f} voxels from the phase maps' vortices"
    return pts


def _check_vtk(case, pts):
    from vtk import vtkXMLImageDataReader, vtkXMLUnstructuredGridReader
    from vtk.util.numpy_support import vtk_to_numpy

    with h5py.File(case["path"], "r") as f:
        ax = [f["grid"][k][()] for k in "xyz"]
        vs = f["grid"].attrs["voxel_size"]
    vti = [p for p in case["vtk"] if p.suffix == ".vti"][0]
    vtu = [p for p in case["vtk"] if p.suffix == ".vtu"][0]
    r = vtkXMLImageDataReader()
    r.SetFileName(str(vti))
    r.Update()
    img = r.GetOutput()
    # .vti: nm; its first point is the voxel (0, 0, 0) of /grid
    np.testing.assert_allclose(np.array(img.GetOrigin()) * 10.0, [a[0] for a in ax], atol=1e-3)
    np.testing.assert_allclose(np.array(img.GetSpacing()) * 10.0, vs, rtol=1e-6)
    assert tuple(img.GetDimensions()) == tuple(len(a) for a in ax)
    for k in range(3):  # and its last point the last voxel
        lo, hi = img.GetBounds()[2 * k:2 * k + 2]
        assert lo * 10 == pytest.approx(ax[k][0], abs=1e-3) and hi * 10 == pytest.approx(ax[k][-1], abs=1e-3)
    u = vtkXMLUnstructuredGridReader()
    u.SetFileName(str(vtu))
    u.Update()
    p_vtu = vtk_to_numpy(u.GetOutput().GetPoints().GetData()) * 10.0
    np.testing.assert_allclose(p_vtu, pts, atol=1e-3)
    # the lines lie inside the crystal of the .vti (sampled with its own origin and spacing)
    sup = vtk_to_numpy(img.GetPointData().GetArray("support")).reshape(img.GetDimensions()[::-1]).T
    idx = (p_vtu / 10.0 - np.array(img.GetOrigin())) / np.array(img.GetSpacing())
    inside = ndimage.map_coordinates(sup.astype(float), idx.T, order=1) >= 0.5
    assert inside.mean() >= 0.8


def _check_tables(case, pts):
    rows = list(csv.DictReader(open(case["dir"] / "dislocations.csv", encoding="utf-8")))
    p_csv = np.array([[float(v) for v in p.split()] for p in rows[0]["points_A"].split(";")])
    np.testing.assert_allclose(p_csv, pts, atol=0.06)  # written with one decimal
    doc = json.loads((case["dir"] / "dislocations.json").read_text(encoding="utf-8"))
    np.testing.assert_allclose(np.array(doc["lines"][0]["points_A"]), pts, atol=6e-4)  # 0.001 Å


def test_line_on_a_grid_with_nonzero_origin(straight):
    # the other reflections were placed on their own grids at the right
    # positions, so registration had nothing to move
    assert np.abs(np.asarray(straight["report"].shifts_voxels)).max() <= 0.15
    pts = _check_line_positions(straight)
    _check_tables(straight, pts)


def test_paraview_files_agree_with_the_grid(straight):
    with h5py.File(straight["path"], "r") as f:
        pts = f["dislocations/line_001/points"][()]
    _check_vtk(straight, pts)


def test_twin_solution_on_a_grid_with_nonzero_origin(twinned):
    assert twinned["report"].twins == [False, True, True, True]
    pts = _check_line_positions(twinned)
    _check_tables(twinned, pts)
    _check_vtk(twinned, pts)


def test_older_results_files_get_the_origin_on_reading(straight, tmp_path):
    # A file written before the points carried the grid's origin has no
    # /dislocations.attrs["points_frame"] and points relative to index n//2:
    # made here from a new file, then read back.
    old = tmp_path / "old.h5"
    old.write_bytes(straight["path"].read_bytes())
    with h5py.File(old, "a") as f:
        origin = f["grid"].attrs["origin"]
        del f["dislocations"].attrs["points_frame"]
        true_pts = f["dislocations/line_001/points"][()]
        f["dislocations/line_001/points"][...] = true_pts - origin
    (d,) = read_results(old).dislocations
    np.testing.assert_allclose(d.points, true_pts, atol=1e-9)
    (d,) = read_results(straight["path"]).dislocations  # a new file is read as written
    np.testing.assert_allclose(d.points, true_pts, atol=1e-9)


def test_figures_and_report_place_the_lines_with_the_grid(straight, tmp_path):
    from braggstrain.report.dislocations import _isosurface, plot_dislocations
    from braggstrain.strain.grid import Grid
    from braggstrain.report.figures import central_index, plot_amplitude
    from braggstrain.report.html import write_report

    r = read_results(straight["path"])
    (d,) = r.dislocations
    g = r.grid
    # dislocation figure: the crystal's surface and the line in one frame (nm)
    fig = plot_dislocations(r.dislocations, r.support, g, tmp_path / "lines.png")
    ax = fig.axes[0]
    p = d.points / 10.0
    for k, lim in enumerate((ax.get_xlim(), ax.get_ylim(), ax.get_zlim())):
        assert lim[0] <= p[:, k].min() and p[:, k].max() <= lim[1]
    inside = positions(r.support.shape, VS, g.origin)[:, r.support] / 10.0  # (3, N) nm
    for k, lim in enumerate((ax.get_xlim(), ax.get_ylim(), ax.get_zlim())):
        assert lim[0] <= inside[k].min() and inside[k].max() <= lim[1]
        assert lim[1] - lim[0] <= np.ptp(inside[k]) + 5 * VS / 10.0  # the crystal and 2 voxels around it
    verts, _ = _isosurface(r.support, Grid.of(g), 1)  # the surface drawn
    np.testing.assert_allclose(verts.mean(axis=0), inside.mean(axis=1), atol=0.5)  # nm
    # slice figures: each plane's title gives the cut's sample-frame position
    fig = plot_amplitude(r, tmp_path / "amp.png")
    c = central_index(r.support)
    titles = [a.get_title() for a in fig.axes if a.get_title()]
    for k, name in enumerate("xyz"):
        want = (g.origin[k] + (c[k] - r.support.shape[k] // 2) * VS) / 10.0
        assert any(t.endswith(f"{name} = {want:.0f} nm") for t in titles), titles
    # report: the line's centre, in nm on the grid
    html = write_report(r, tmp_path).read_text(encoding="utf-8")
    assert "centre x, y, z (nm)" in html
    assert ", ".join(f"{v / 10:.1f}" for v in d.points.mean(axis=0)) in html


def test_plain_arrays_with_their_grid_give_the_same_lines():
    # the pipeline passes arrays and the common grid; an API consistency check
    from braggstrain.errors import InputError
    from braggstrain.strain.grid import Grid

    cr = _crystal()
    poly, field, p0, xi = _truth(cr)
    objs = [_object(cr, poly, field, h, SHAPE, ORIGIN) for h in HKLS]
    sup = np.logical_or.reduce([o.support for o in objs])
    a = find_dislocations(objs, crystal=cr)
    grid = Grid(SHAPE, VS, ORIGIN)
    b = find_dislocations([o.obj for o in objs], HKLS, [o.g_vector for o in objs], support=sup, crystal=cr,
                          grid=grid)
    assert len(a) == len(b) == 1
    np.testing.assert_allclose(a[0].points, b[0].points)
    assert np.median(_perp(b[0].points, p0, xi)) / VS <= 0.25
    with pytest.raises(InputError, match="grid"):
        find_dislocations(objs, crystal=cr, grid=Grid(SHAPE, VS, ORIGIN + 5.0))
    with pytest.raises(InputError, match="voxel_size"):
        find_dislocations([o.obj for o in objs], HKLS, [o.g_vector for o in objs], 12.0, sup, cr, grid=grid)
