"""Orientation of the crystal (braggstrain.geometry.orientation): every way of getting U.

References beside each test: Busing & Levy's two-reflection orientation,
the Kabsch SVD solution of the least-squares rotation, hand cases.
(Bunge Euler angles and found reflections are tested with the planner, in
tests/test_planner.py, whose reachability finds their angles.)
"""

import numpy as np
import pytest
from scipy.spatial.transform import Rotation

from braggstrain.errors import InputError
from braggstrain.geometry.crystal import Crystal
from braggstrain.geometry.orientation import (check_rotation, orientation_from_directions,
                                              orientation_from_reflections, orientation_from_two_reflections)

HKLS = [(1, 1, 1), (-1, 1, 1), (2, 0, 0), (0, 0, 2)]
U_TILT = Rotation.from_rotvec(np.radians(17.0) * np.array([0.3, 0.8, 0.5]) / np.linalg.norm([0.3, 0.8, 0.5])).as_matrix()


def misorientation_deg(U1, U2):
    return float(np.degrees(Rotation.from_matrix(U1 @ U2.T).magnitude()))


def test_orientation_from_two_reflections_recovers_u():
    rng = np.random.default_rng(1)
    c = Crystal("Au")
    U = Rotation.from_rotvec(rng.normal(size=3)).as_matrix()  # reference library rotation
    g1, g2 = c.g_crystal((1, 1, 1)), c.g_crystal((2, 0, 0))
    U2 = orientation_from_two_reflections(g1, g2, U @ g1 * 3.0, U @ g2)
    np.testing.assert_allclose(U2, U, atol=1e-12)
    oc = c.oriented_by((1, 1, 1), U @ g1, (2, 0, 0), U @ g2)
    np.testing.assert_allclose(oc.g_sample((0, 2, 2)), U @ c.g_crystal((0, 2, 2)), atol=1e-12)
    with pytest.raises(InputError, match="parallel"):
        orientation_from_two_reflections(g1, 2 * g1, g1, g1)


def test_orientation_from_reflections_matches_the_kabsch_svd():
    # Reference: the orthogonal Procrustes solution through the SVD of
    # Σ G_j (B h_j)ᵀ (Kabsch, Acta Cryst. A32, 922, 1976), the hand-written
    # fit this replaced (issue 20), on noisy G vectors; agreement to 1e-12.
    rng = np.random.default_rng(4)
    cr = Crystal("Pt").with_orientation(U_TILT)
    gs = np.array([cr.g_sample(h) for h in HKLS]) * (1 + 1e-3 * rng.normal(size=(4, 1)))
    gs += 1e-3 * rng.normal(size=gs.shape)
    P = np.array(HKLS, float) @ cr.B.T
    V, _, Wt = np.linalg.svd(gs.T @ P)
    ref = V @ np.diag([1.0, 1.0, np.sign(np.linalg.det(V @ Wt))]) @ Wt
    U = orientation_from_reflections(Crystal("Pt"), HKLS, gs)
    np.testing.assert_allclose(U, ref, atol=1e-12)
    assert misorientation_deg(U, U_TILT) < 0.1
    assert orientation_from_reflections(Crystal("Pt"), [(1, 1, 1), (2, 2, 2)], gs[:2] * [[1], [2]]) is None
    with pytest.raises(InputError, match="does not match"):
        orientation_from_reflections(Crystal("Pt"), [(1, 1, 1), (2, 0, 0), (0, 0, 2)], gs[[0, 2, 3]] * [[1], [1], [2]])


def test_orientation_from_directions_reports_its_residual_angles():
    # Three unit directions fitted exactly except one tilted by 0.5°:
    # the fit spreads the misfit and reports each angle.
    dirs = np.eye(3)
    tilted = dirs.copy()
    tilted[2] = Rotation.from_rotvec(np.radians(0.5) * np.array([1.0, 0, 0])).apply(dirs[2])
    U, res = orientation_from_directions(dirs, tilted)
    # y and z share the 0.5° tilt about x (measured: 0.25° each, x untouched)
    np.testing.assert_allclose(res, [0.0, 0.25, 0.25], atol=1e-9)
    U, res = orientation_from_directions(dirs, (U_TILT @ dirs.T).T)
    np.testing.assert_allclose(U, U_TILT, atol=1e-12)
    assert np.all(res < 1e-9)
    with pytest.raises(InputError, match="non-parallel"):
        orientation_from_directions(dirs[:1], dirs[:1])



def test_check_rotation_refuses_improper_matrices():
    np.testing.assert_array_equal(check_rotation(np.eye(3)), np.eye(3))
    with pytest.raises(InputError, match="proper rotation"):
        check_rotation(np.diag([1.0, 1.0, -1.0]))
    with pytest.raises(InputError, match="3×3"):
        check_rotation(np.eye(2), "U")
