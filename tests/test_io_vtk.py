"""io/vtk: the ParaView files read back with Kitware's VTK XML readers."""

from __future__ import annotations


import numpy as np
import pytest

from braggstrain.io.vtk import export_vtk
from braggstrain.strain.components import STRAIN_COMPONENTS, strain_components


from results_bundle import N, VS


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
