"""Invented dislocation test cases shared by the tests of defects/, io/dislocations
and report/dislocations: textbook displacement fields (Hirth & Lothe, Theory
of Dislocations, 2nd ed., 1982, ch. 3–4, from memory) in a platinum crystal
(a = 3.92 Å), objects ρ_j = s·exp(−i G_j·u) built directly (no phase
retrieval).
"""

from __future__ import annotations


import numpy as np
from scipy.spatial.transform import Rotation

from braggstrain.simulate import forward as fw
from braggstrain.geometry.crystal import Crystal
from braggstrain.defects.lines import find_dislocations


VS = 30.0  # voxel edge, Å



HKLS = [(1, 1, 1), (-1, 1, 1), (2, 0, 0), (0, 0, 2)]



U_TILT = Rotation.from_rotvec(np.radians(17.0) * np.array([0.3, 0.8, 0.5]) / np.linalg.norm([0.3, 0.8, 0.5])).as_matrix()



def _pt(U=U_TILT):
    return Crystal("Pt").with_orientation(U)



def _plane_normal(cr, p):
    n = cr.U @ cr.B @ np.asarray(p, float)
    return n / np.linalg.norm(n)



def _objects(field, support, gs):
    u = field.displacement(fw.grid_coordinates(support.shape, VS))
    return [fw.complex_object(support, u, g) for g in gs]



def _angle_deg(a, b):
    c = abs(np.dot(a, b)) / (np.linalg.norm(a) * np.linalg.norm(b))
    return float(np.degrees(np.arccos(np.clip(c, 0.0, 1.0))))



def _perp_dist(points, p0, xi):
    r = points - p0
    return np.linalg.norm(r - np.outer(r @ xi, xi), axis=1)



B_TRUE = np.array([0.5, -0.5, 0.0])  # ½[1 -1 0] in (111): |b| = a/√2



def _line_direction(cr, kind):
    bs = cr.burgers_to_sample(B_TRUE)
    bh = bs / np.linalg.norm(bs)
    n = _plane_normal(cr, (1, 1, 1))
    e = np.cross(n, bh)  # in (111), ⟂ b
    angle = {"screw": 0.0, "mixed": 60.0, "edge": 90.0}[kind]
    xi = np.cos(np.radians(angle)) * bh + np.sin(np.radians(angle)) * e
    return xi / np.linalg.norm(xi), angle



def loop_and_lines_case():
    """A loop and two straight lines (screw, edge) in one 56³ crystal: the
    lines found, the truth, support, crystal, objects, hkls and G."""
    cr = _pt()
    hkls = [(1, 1, 1), (-1, 1, 1), (2, 0, 0), (0, 2, 0)]
    gs = [cr.g_sample(h) for h in hkls]
    shape = (56, 56, 56)
    sup = fw.ellipsoid(shape, VS, (25 * VS, 24 * VS, 23 * VS))
    b_loop = np.array([0.5, 0.0, -0.5])  # glide loop on (111)
    loop = fw.DislocationLoop((0.0, 0.0, -11 * VS), _plane_normal(cr, (1, 1, 1)), 8 * VS,
                              cr.burgers_to_sample(b_loop))
    b_a = np.array([0.0, 0.5, 0.5])  # screw
    xa = cr.burgers_to_sample(b_a)
    xa /= np.linalg.norm(xa)
    pa = np.array([-9.0, 9.0, 9.0]) * VS
    b_b = np.array([0.5, 0.5, 0.0])  # edge on (1 -1 1)
    xb = np.cross(_plane_normal(cr, (1, -1, 1)), cr.burgers_to_sample(b_b))
    xb /= np.linalg.norm(xb)
    pb = np.array([10.0, -9.0, 8.0]) * VS
    field = (loop + fw.StraightDislocation(pa, xa, cr.burgers_to_sample(b_a))
             + fw.StraightDislocation(pb, xb, cr.burgers_to_sample(b_b)))
    objs = _objects(field, sup, gs)
    lines = find_dislocations(objs, hkls, gs, VS, sup, cr)
    truth = {"loop": (loop, b_loop), "a": (pa, xa, b_a), "b": (pb, xb, b_b)}
    return lines, truth, sup, cr, objs, hkls, gs
