"""Rotations through scipy's Rotation agree with the hand-written matrices they replaced.

The references below are the textbook formulas the project used before
(issue 20): elementary rotations about the lab axes, Rodrigues' rotation
formula R = I + sin θ K + (1 − cos θ) K² (e.g. Goldstein, Poole & Safko,
Classical Mechanics, 3rd ed., 2002, §4.7), and Bunge's passive
g = R_z(φ2)·R_x(Φ)·R_z(φ1) (Bunge, Texture Analysis in Materials Science,
1982, ch. 2). Agreement to 1e-12 for random angles.
"""

import math

import numpy as np
import pytest

from braggstrain.errors import InputError
from braggstrain.geometry import rotation as R


def _elementary(spec, a):
    a = -a if spec[1] == "-" else a
    c, s = math.cos(a), math.sin(a)
    return {"x": [[1, 0, 0], [0, c, -s], [0, s, c]],
            "y": [[c, 0, s], [0, 1, 0], [-s, 0, c]],
            "z": [[c, -s, 0], [s, c, 0], [0, 0, 1]]}[spec[0]]


def _rodrigues(axis, angle):
    k = np.asarray(axis, float) / np.linalg.norm(axis)
    K = np.array([[0, -k[2], k[1]], [k[2], 0, -k[0]], [-k[1], k[0], 0]])
    return np.eye(3) + np.sin(angle) * K + (1 - np.cos(angle)) * K @ K


def _bunge(e):
    p1, P, p2 = np.radians(e)

    def rz(a):
        return np.array([[math.cos(a), math.sin(a), 0], [-math.sin(a), math.cos(a), 0], [0, 0, 1]])

    def rx(a):
        return np.array([[1, 0, 0], [0, math.cos(a), math.sin(a)], [0, -math.sin(a), math.cos(a)]])

    return rz(p2) @ rx(P) @ rz(p1)


@pytest.mark.parametrize("spec", ["x+", "x-", "y+", "y-", "z+", "z-"])
def test_axis_rotation_matches_the_elementary_rotations(spec):
    rng = np.random.default_rng(0)
    angles = rng.uniform(-2 * np.pi, 2 * np.pi, size=(7, 5))
    m = R.axis_rotation(spec, angles)
    assert m.shape == (7, 5, 3, 3)
    for idx in np.ndindex(angles.shape):
        np.testing.assert_allclose(m[idx], _elementary(spec, angles[idx]), atol=1e-12)
    np.testing.assert_allclose(R.axis_rotation(spec, 0.4), _elementary(spec, 0.4), atol=1e-12)
    # right-handed: a quarter turn about x+ takes y to z
    np.testing.assert_allclose(R.axis_rotation("x+", np.pi / 2) @ [0, 1, 0], [0, 0, 1], atol=1e-12)


def test_rotation_vectors_and_axes_match_rodrigues():
    rng = np.random.default_rng(1)
    for _ in range(50):
        axis = rng.normal(size=3)
        angle = rng.uniform(-2 * np.pi, 2 * np.pi)
        np.testing.assert_allclose(R.rotation_about(axis, angle), _rodrigues(axis, angle), atol=1e-12)
        v = axis / np.linalg.norm(axis) * angle
        np.testing.assert_allclose(R.rotation_from_rotvec(v), _rodrigues(axis, angle), atol=1e-12)
    np.testing.assert_array_equal(R.rotation_from_rotvec([0, 0, 0]), np.eye(3))
    with pytest.raises(InputError):
        R.rotation_about([0, 0, 0], 1.0)


def test_bunge_matrix_matches_the_passive_product():
    rng = np.random.default_rng(2)
    for _ in range(50):
        e = rng.uniform([0, 0, 0], [360, 180, 360])
        np.testing.assert_allclose(R.bunge_matrix(e), _bunge(e), atol=1e-12)
    with pytest.raises(InputError, match="euler_deg"):
        R.bunge_matrix([1, 2])


def test_axis_vector():
    np.testing.assert_array_equal(R.axis_vector("y-"), [0, -1, 0])
    with pytest.raises(InputError, match="q\\+"):
        R.axis_vector("q+")
