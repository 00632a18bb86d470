"""Instrument: pixel Q against a hand-written rotation computation, Bragg solver."""

import numpy as np
import pytest

from braggstrain.geometry.crystal import Crystal
from braggstrain.errors import GeometryError, InputError
from braggstrain.geometry.instrument import Circle, Detector, Diffractometer


def _rx(a):
    c, s = np.cos(a), np.sin(a)
    return np.array([[1, 0, 0], [0, c, -s], [0, s, c]])


def _rz(a):
    c, s = np.cos(a), np.sin(a)
    return np.array([[c, -s, 0], [s, c, 0], [0, 0, 1]])


def _instrument(rotation=0.0):
    det = Detector(shape=(40, 50), pixel_size=(55e-6, 55e-6), distance=0.9, direct_beam=(20.0, 25.0),
                   row_direction="z-", column_direction="x+", rotation_deg=rotation)
    return Diffractometer([Circle("eta", "x+"), Circle("phi", "z-")],
                          [Circle("nu", "z-"), Circle("delta", "x+")], det, 8.7)


@pytest.mark.parametrize("angles", [(0.0, 0.0, 0.0, 0.0), (12.0, 30.0, 4.0, 35.0),
                                    (-3.0, 100.0, 17.0, 22.5), (40.0, -60.0, -8.0, 70.0)])
def test_pixel_q_matches_hand_rotation(angles):
    eta, phi, nu, delta = angles
    inst = _instrument()
    a = {"eta": eta, "phi": phi, "nu": nu, "delta": delta}
    Q = inst.pixel_q(a, frame="lab")
    Qs = inst.pixel_q(a, frame="sample")
    # Hand computation (any diffraction text, e.g. Als-Nielsen & McMorrow, Elements of
    # Modern X-ray Physics, 2nd ed., 2011, §1.3: Q = k_f − k_i, |k| = 2π/λ):
    # pixel (i, j) at D·ŷ + (i − i0)·p·(−ẑ) + (j − j0)·p·x̂, then the detector
    # circles nu (left-handed about z) and delta (right-handed about x), outermost first.
    lam = 12.398419843320026 / 8.7
    k = 2 * np.pi / lam
    Rd = _rz(-np.radians(nu)) @ _rx(np.radians(delta))
    Rs = _rx(np.radians(eta)) @ _rz(-np.radians(phi))
    for i, j in [(0, 0), (20, 25), (39, 49), (7, 31)]:
        P = np.array([0, 0.9, 0]) + (i - 20) * 55e-6 * np.array([0, 0, -1.0]) + (j - 25) * 55e-6 * np.array([1.0, 0, 0])
        P = Rd @ P
        q = k * (P / np.linalg.norm(P) - np.array([0, 1.0, 0]))
        np.testing.assert_allclose(Q[:, i, j], q, rtol=1e-9, atol=1e-12)
        np.testing.assert_allclose(Qs[:, i, j], Rs.T @ q, rtol=1e-9, atol=1e-12)


def test_own_geometry_matches_xrayutilities_with_inplane_rotation():
    inst = _instrument(rotation=5.0)
    a = {"eta": 3.0, "phi": 10.0, "nu": 6.0, "delta": 31.0}
    Q = inst.pixel_q(a, frame="lab")
    for i, j in [(0, 0), (39, 49), (10, 40)]:
        np.testing.assert_allclose(Q[:, i, j], inst.q_lab_of_pixel(i, j, a), rtol=1e-9)


@pytest.mark.parametrize("hkl", [(1, 1, 1), (2, 0, 0), (0, 2, 2), (-1, 1, 3)])
def test_solved_angles_put_q_on_g(hkl):
    inst = _instrument()
    c = Crystal("Pt").oriented_by((1, 1, 1), (0, 0, 1), (1, -1, 0), (1, 0, 0))
    g = c.g_sample(hkl)
    sol = inst.solve_bragg(g, free=["eta", "phi", "delta"], fixed={"nu": 0.0})
    Qs = inst.pixel_q(sol, frame="sample")[:, 20, 25]
    assert np.linalg.norm(Qs - g) < 1e-6


def test_unreachable_g_and_bad_input():
    inst = _instrument()
    with pytest.raises(GeometryError):
        inst.solve_bragg([0, 0, 20.0], free=["eta", "phi", "delta"])
    with pytest.raises(InputError):
        inst.pixel_q({"eta": 0.0})
    with pytest.raises(InputError):
        Circle("bad", "w+")
    with pytest.raises(InputError):
        Circle("lim", "x+", (10.0, -10.0))


def test_linear_map_predicts_neighbouring_pixels():
    inst = _instrument()
    c = Crystal("Pt")
    g = c.g_sample((1, 1, 1))
    sol = inst.solve_bragg(g, free=["eta", "phi", "delta"], fixed={"nu": 0.0})
    M, q0, Rp = inst.linear_map(sol, "eta", 0.01, (20, 25))
    np.testing.assert_allclose(q0, Rp @ g, atol=1e-9)
    a = dict(sol)
    a["eta"] = sol["eta"] + 0.01 * 2.0
    Qs = inst.pixel_q(a, frame="sample")
    pred = Rp @ g + M @ np.array([2, 3, -4])
    assert np.linalg.norm(Rp @ Qs[:, 23, 21] - pred) < 1e-3 * np.linalg.norm(M)


def _four_circle_sample():
    det = Detector(shape=(40, 50), pixel_size=(55e-6, 55e-6), distance=0.9, direct_beam=(20.0, 25.0),
                   row_direction="z-", column_direction="x+")
    return Diffractometer([Circle("eta", "x+", (-10.0, 120.0)), Circle("chi", "y+", (-95.0, 95.0)),
                           Circle("phi", "z-")], [Circle("nu", "z-"), Circle("delta", "x+", (0.0, 120.0))],
                          det, 8.7)


@pytest.mark.parametrize("hkl", [(1, 1, 1), (2, 0, 0), (0, 2, 0), (0, 0, 2), (1, -1, 3)])
def test_four_free_circles_give_one_defined_setting(hkl):
    # With four free circles the Bragg condition (three equations) leaves a
    # one-parameter family of settings; solve_bragg must return the member of
    # least travel from 0°, so that round-off in G (here 1e-12 relative) or a
    # different seed cannot move the answer along the family. The condition
    # itself is checked against xrayutilities' pixel Q (pixel_q).
    inst = _four_circle_sample()
    c = Crystal("Pt").oriented_by((1, 1, 1), (0, 0, 1), (1, -1, 0), (1, 0, 0))
    g = c.g_sample(hkl)
    free = ["eta", "chi", "phi", "delta"]
    a = inst.solve_bragg(g, free=free, fixed={"nu": 0.0})
    b = inst.solve_bragg(g * (1 + 1e-12), free=free, fixed={"nu": 0.0}, seed=5)
    np.testing.assert_allclose([a[n] for n in free], [b[n] for n in free], atol=1e-6)
    assert np.linalg.norm(inst.pixel_q(a, frame="sample")[:, 20, 25] - g) < 1e-6
    for seed in range(3):
        o = inst.solve_bragg(g, free=free, fixed={"nu": 0.0}, seed=seed, starts=16)
        np.testing.assert_allclose([o[n] for n in free], [a[n] for n in free], atol=1e-6)
