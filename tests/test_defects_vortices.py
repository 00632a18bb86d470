"""defects/vortices: phase vortices of analytic dislocation fields, checked
against an independent winding count (numpy.unwrap along a circuit) and
Hirth & Lothe, Theory of Dislocations, 2nd ed. (1982), eq. 3-2 (from memory)."""

from __future__ import annotations


import numpy as np

from braggstrain.simulate import forward as fw
from braggstrain.geometry.crystal import Crystal
from braggstrain.defects.vortices import vortex_map

from defect_cases import HKLS, VS, _objects, _pt


def test_vortex_map_screw_along_z_matches_an_unwrapped_circuit():
    # Screw along +z with b = a[001] (a lattice translation of fcc): Hirth &
    # Lothe eq. 3-2, u_z = bθ/2π. Reflection (111): h·b = 1, so every z-layer
    # has one plaquette of winding n = −1 about +z at the line (docs/design.md);
    # (002): h·b = 2, total −2 per layer (a double vortex may show as two
    # neighbouring unit vortices on the grid). Checked against an independent
    # count: numpy.unwrap of the phase along a square circuit.
    cr = Crystal("Pt")
    shape = (40, 40, 40)
    sup = fw.cube(shape, VS, 30 * VS)
    p0 = np.array([2.3, -1.6, 0.0]) * VS
    b = cr.burgers_to_sample([0, 0, 1])
    field = fw.StraightDislocation(p0, (0, 0, 1), b)
    c = np.array([n // 2 for n in shape])
    lo, hi = 8, 31  # square x, y ∈ [8, 31], counter-clockwise about +z
    ring = ([(i, lo) for i in range(lo, hi)] + [(hi, j) for j in range(lo, hi)]
            + [(i, hi) for i in range(hi, lo, -1)] + [(lo, j) for j in range(hi, lo, -1)] + [(lo, lo)])
    for hkl, n_true in (((1, 1, 1), -1), ((0, 0, 2), -2)):
        (obj,) = _objects(field, sup, [cr.g_sample(hkl)])
        w = vortex_map(obj, sup)
        assert np.all(w[0] == 0) and np.all(w[1] == 0)  # no plaquette of normal x or y is pierced
        for z in range(8, 32):
            layer = w[2, :, :, z]
            nz = np.argwhere(layer != 0)
            assert layer.sum() == n_true
            if n_true == -1:
                assert len(nz) == 1
            centres = (nz + 0.5 - c[:2]) * VS  # plaquette centres, Å
            assert np.all(np.linalg.norm(centres - p0[:2], axis=1) <= 1.5 * VS)
            ph = np.unwrap(np.angle([obj[i, j, z] for i, j in ring]))
            assert round((ph[-1] - ph[0]) / (2 * np.pi)) == n_true



def test_vortex_map_is_empty_for_smooth_strain():
    # A smooth (curl-free phase) field has no vortex (common practice, no
    # source: the plaquette sum of wrapped steps of a smooth phase is zero).
    cr = _pt()
    shape = (40, 40, 40)
    sup = fw.truncated_octahedron(shape, VS, 34 * VS, rotation=cr.U)
    field = (fw.UniformStrain(np.array([[2e-3, 5e-4, 0], [5e-4, -1e-3, 3e-4], [0, 3e-4, 1e-3]]))
             + fw.RigidRotation(np.radians([0.1, -0.05, 0.2])))
    for obj in _objects(field, sup, [cr.g_sample(h) for h in HKLS]):
        assert not vortex_map(obj, sup).any()
