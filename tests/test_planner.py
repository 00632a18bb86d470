"""Tests of the measurement planner (braggstrain.planner.plan).

Each check names its outside source: xrayutilities (reference library) for
the diffractometer angles and structure factors, scipy for the least-squares
orientation, hand computations from textbook definitions for the rest.
"""

import itertools
import math
import os
import tomllib

import numpy as np
import pytest
from scipy.optimize import least_squares
from scipy.spatial.transform import Rotation

from braggstrain.geometry import orientation, rotation
from braggstrain.planner import plan as P
from braggstrain.geometry.crystal import Crystal, format_hkl
from braggstrain.errors import ConfigError
from braggstrain.geometry.instrument import Circle, Detector, Diffractometer

HC = 12.398419843320026  # keV·Å, CODATA 2018


def four_circle(energy=9.0, tt_limits=(-180.0, 180.0), chi_limits=(-180.0, 180.0)):
    """The standard four-circle geometry of xrayutilities' HXRD: sample circles
    omega (x+), chi (y+), phi (z−), detector two-theta (x+), beam along +y."""
    return Diffractometer([Circle("omega", "x+", (-180.0, 180.0)), Circle("chi", "y+", chi_limits),
                           Circle("phi", "z-", (-180.0, 180.0))],
                          [Circle("tt", "x+", tt_limits)], Detector(), energy)


def misorientation_deg(U1, U2):
    return math.degrees(Rotation.from_matrix(U1 @ U2.T).magnitude())


@pytest.fixture(scope="module")
def pt_oriented():
    U = Rotation.from_euler("zxz", [20.0, 30.0, 40.0], degrees=True).as_matrix()
    return Crystal("Pt", U)


# ---------------------------------------------------------------------------
# Angles
# ---------------------------------------------------------------------------

@pytest.mark.parametrize("pixel", [None, (100.0, 150.0)])
def test_planned_angles_put_Q_on_G(pt_oriented, pixel):
    # Reference: braggstrain.geometry.instrument.pixel_q, whose engine is
    # xrayutilities' QConversion.area; the planner solves its own equations.
    dif = four_circle()
    opt = P.PlanOptions(g_max=4.6, fixed_deg={"chi": 0.0}, surface_normal=None, pixel=pixel)
    res = P.plan(pt_oriented, dif, opt)
    reach = [r for r in res.reflections if r.reachable]
    assert len(reach) == len(res.reflections) == 26  # 8 {111} + 6 {200} + 12 {220}
    r0, c0 = (128, 128) if pixel is None else (int(pixel[0]), int(pixel[1]))
    for r in reach:
        q = dif.pixel_q(r.angles_deg, frame="sample", roi=(r0, r0 + 1, c0, c0 + 1))[:, 0, 0]
        assert np.max(np.abs(q - r.g_sample)) < 1e-6


def test_angles_agree_with_xrayutilities_four_circle(pt_oriented):
    # Reference: xrayutilities.experiment.HXRD.Q2Ang (coplanar angles of the
    # standard four-circle, 'hi_lo' branch) and HXRD.Ang2Q; HXRD documents
    # omega as the incidence angle to the surface (normal along z).
    import xrayutilities as xu

    dif = four_circle(tt_limits=(0.0, 180.0))
    opt = P.PlanOptions(g_max=5.6, free=("omega", "phi", "tt"), fixed_deg={"chi": 0.0}, surface_normal=None)
    res = P.plan(pt_oriented, dif, opt)
    qc = xu.experiment.QConversion(["x+", "y+", "z-"], "x+", [0, 1, 0])
    hx = xu.experiment.HXRD([0, 1, 0], [0, 0, 1], en=9000.0, qconv=qc)
    n = 0
    for r in res.reflections:
        assert r.reachable
        ref = hx.Q2Ang(r.g_sample, trans=False, geometry="hi_lo")  # [om, chi, phi, tt]
        sols = np.array([[s[c] for c in ("omega", "chi", "phi", "tt")] for s in r.solutions])
        diff = np.abs((sols - ref + 180.0) % 360.0 - 180.0).max(axis=1)
        assert diff.min() < 1e-6
        q = np.array(hx.Ang2Q(*[r.angles_deg[c] for c in ("omega", "chi", "phi", "tt")]))
        assert np.max(np.abs(q - r.g_sample)) < 1e-6
        n += 1
    assert n == 58  # 8 {111} + 6 {200} + 12 {220} + 24 {311} + 8 {222}
    # With a substrate of normal z, the incidence angle of the chosen setting
    # is omega and the exit angle tt − omega (HXRD's definitions).
    opt2 = P.PlanOptions(g_max=5.6, free=("omega", "phi", "tt"), fixed_deg={"chi": 0.0})
    for r in P.plan(pt_oriented, dif, opt2).reflections:
        if r.reachable:
            assert r.incidence_deg == pytest.approx(r.angles_deg["omega"], abs=1e-6)
            assert r.exit_deg == pytest.approx(r.angles_deg["tt"] - r.angles_deg["omega"], abs=1e-6)


def _least_squares_setting(dif, g, free, fixed, starts=12, seed=0):
    """Reference solver: scipy.optimize.least_squares from random starts
    within the limits, the exact solution of least Σ|θ| (home = 0)."""
    from scipy.optimize import least_squares

    lims = np.radians([dif.circle(n).limits for n in free])
    base = {c.name: float(fixed.get(c.name, 0.0)) for c in dif.circles}
    pixel = dif.detector.direct_beam

    def resid(x):
        a = dict(base, **{n: v for n, v in zip(free, np.degrees(x))})
        return dif.sample_rotation(a) @ g - dif.q_lab_of_pixel(pixel[0], pixel[1], a)

    rng = np.random.default_rng(seed)
    best = None
    for _ in range(starts):
        x0 = rng.uniform(lims[:, 0] + 1e-9, lims[:, 1] - 1e-9)
        r = least_squares(resid, x0, bounds=(lims[:, 0], lims[:, 1]), xtol=1e-15, ftol=1e-15, gtol=1e-15)
        if np.linalg.norm(r.fun) <= 1e-9 and (best is None or np.abs(r.x).sum() < np.abs(best).sum()):
            best = r.x
    return None if best is None else dict(base, **{n: float(v) for n, v in zip(free, np.degrees(best))})


def test_planned_settings_match_an_independent_solver(pt_oriented):
    # Reference: scipy.optimize.least_squares on the same three equations
    # (R_s·G = Q_lab of the pixel); the planner finds that setting among its
    # solutions, and its choice travels no more from home (0°).
    dif = four_circle()
    opt = P.PlanOptions(g_max=3.3, free=("omega", "phi", "tt"), fixed_deg={"chi": 0.0}, surface_normal=None)
    res = P.plan(pt_oriented, dif, opt)
    for r in res.reflections[::5]:
        ref = _least_squares_setting(dif, r.g_sample, ["omega", "phi", "tt"], {"chi": 0.0})
        assert ref is not None
        sols = np.array([[s[c] for c in res.circles] for s in r.solutions])
        d = np.abs((sols - [ref[c] for c in res.circles] + 180) % 360 - 180).max(axis=1)
        assert d.min() < 1e-5
        assert sum(abs(v) for v in r.angles_deg.values()) <= sum(abs(v) for v in ref.values()) + 1e-6
        # the instrument's solve_bragg is the same solver with the same rule
        sb = dif.solve_bragg(r.g_sample, free=["omega", "phi", "tt"], fixed={"chi": 0.0})
        np.testing.assert_allclose([sb[c] for c in res.circles], [r.angles_deg[c] for c in res.circles],
                                   atol=1e-6)


# ---------------------------------------------------------------------------
# Orientation
# ---------------------------------------------------------------------------

def test_bunge_matrix_hand_cases():
    # Bunge, Texture Analysis in Materials Science, 1982, ch. 2: g =
    # R_z(φ2) R_x(Φ) R_z(φ1), passive, R_z(a) = [[c, s, 0], [−s, c, 0], [0, 0, 1]].
    c30, s30 = math.sqrt(3) / 2, 0.5
    np.testing.assert_allclose(rotation.bunge_matrix([30, 0, 0]), [[c30, s30, 0], [-s30, c30, 0], [0, 0, 1]], atol=1e-12)
    np.testing.assert_allclose(rotation.bunge_matrix([0, 30, 0]), [[1, 0, 0], [0, c30, s30], [0, -s30, c30]], atol=1e-12)
    np.testing.assert_allclose(rotation.bunge_matrix([0, 0, 30]), [[c30, s30, 0], [-s30, c30, 0], [0, 0, 1]], atol=1e-12)
    # The written-out matrix of Bunge (1982), ch. 2 (from memory), expanded by hand.
    p1, F, p2 = np.radians([10.0, 50.0, 70.0])
    c1, s1, c2, s2, c, s = np.cos(p1), np.sin(p1), np.cos(p2), np.sin(p2), np.cos(F), np.sin(F)
    g = [[c1 * c2 - s1 * s2 * c, s1 * c2 + c1 * s2 * c, s2 * s],
         [-c1 * s2 - s1 * c2 * c, -s1 * s2 + c1 * c2 * c, c2 * s],
         [s1 * s, -c1 * s, c]]
    np.testing.assert_allclose(rotation.bunge_matrix([10, 50, 70]), g, atol=1e-12)


@pytest.mark.parametrize("euler, plane, direction", [
    # Ideal texture components of fcc rolling textures, Bunge angles, from the
    # standard tables (e.g. Engler & Randle, Introduction to Texture
    # Analysis, 2nd ed., 2010, ch. 2; values from memory): ND ∥ plane, RD ∥ direction.
    ((0.0, 0.0, 0.0), (0, 0, 1), (1, 0, 0)),  # cube {001}<100>
    ((0.0, 45.0, 0.0), (0, 1, 1), (1, 0, 0)),  # Goss {011}<100>
    ((math.degrees(math.atan(1 / math.sqrt(2))), 45.0, 0.0), (0, 1, 1), (2, -1, 1)),  # brass {011}<211>
    ((90.0, math.degrees(math.atan(1 / math.sqrt(2))), 45.0), (1, 1, 2), (-1, -1, 1)),  # copper {112}<111>
])
def test_bunge_texture_components(euler, plane, direction):
    g = rotation.bunge_matrix(euler)
    nd, rd = g[:, 2], g[:, 0]  # specimen ND and RD in crystal coordinates
    np.testing.assert_allclose(nd, np.array(plane) / np.linalg.norm(plane), atol=1e-9)
    np.testing.assert_allclose(rd, np.array(direction) / np.linalg.norm(direction), atol=1e-9)
    # With the identity mounting, U takes those crystal directions to the
    # sample axes z and x (U = M gᵀ by definition of U: crystal → sample).
    U = orientation.orientation_from_euler(euler)
    np.testing.assert_allclose(U @ nd, [0, 0, 1], atol=1e-9)
    np.testing.assert_allclose(U @ rd, [1, 0, 0], atol=1e-9)


def test_mounting_places_specimen_axes():
    # Hand: RD along sample +y, TD along −x, ND along +z is a rotation of +90°
    # about z; the cube orientation then has crystal [100] along sample y.
    U = orientation.orientation_from_euler([0, 0, 0], orientation.mounting_matrix(["y+", "x-", "z+"]))
    np.testing.assert_allclose(U, [[0, -1, 0], [1, 0, 0], [0, 0, 1]], atol=1e-12)
    with pytest.raises(ConfigError, match="mounting"):
        orientation.mounting_matrix(["x+", "y+", "z-"])  # left-handed


def _measure(crystal, dif, hkls, opt, n=None):
    """Angles at which reflections of a crystal of known U are found: all of
    ``hkls``, or the first ``n`` reachable ones in distinct directions."""
    rs = P.reach(crystal, dif, hkls, opt)
    if n is None:
        assert all(r.reachable for r in rs)
    else:
        keep = []
        for r in rs:
            u = r.g_sample / r.g_norm
            if r.reachable and all(abs(u @ q.g_sample / q.g_norm) < 0.95 for q in keep):
                keep.append(r)
        rs = keep[:n]
        assert len(rs) == n
    return [orientation.MeasuredReflection(r.hkl, r.angles_deg, opt.pixel) for r in rs]


@pytest.mark.parametrize("pixel", [None, (90.0, 170.0)])
def test_orientation_from_two_reflections_recovers_U(pixel):
    # Busing & Levy, Acta Cryst. 22, 457 (1967): two reflections fix U; the
    # known U is recovered to 0.01°: far above what the solver's |Q − G| <
    # 1e-9 Å⁻¹ leaves (~1e-8°), far below a diffractometer's alignment
    # (common practice, no source).
    U_true = Rotation.random(random_state=7).as_matrix()
    pt = Crystal("Pt", U_true)
    dif = four_circle()
    opt = P.PlanOptions(surface_normal=None, pixel=pixel, fixed_deg={"phi": 10.0})
    meas = _measure(pt, dif, [(1, 1, 1), (0, 2, 0)], opt)
    U, res = orientation.orientation_from_measured(Crystal("Pt"), dif, meas)
    assert misorientation_deg(U, U_true) < 0.01
    assert np.all(res < 1e-6)
    meas3 = _measure(pt, dif, [(1, 1, 1), (0, 2, 0), (2, 0, 2)], opt)
    U3, res3 = orientation.orientation_from_measured(Crystal("Pt"), dif, meas3)
    assert misorientation_deg(U3, U_true) < 0.01


def test_orientation_least_squares_matches_scipy_fit():
    # Reference: scipy.optimize.least_squares over a rotation vector,
    # minimising the angles between U·B·h and the measured directions.
    U_true = Rotation.from_euler("xyz", [12.0, -33.0, 71.0], degrees=True).as_matrix()
    pt = Crystal("Pt", U_true)
    dif = four_circle()
    opt = P.PlanOptions(surface_normal=None, fixed_deg={"phi": 0.0})
    meas = _measure(pt, dif, [(1, 1, 1), (0, 2, 0), (2, 0, 2), (-1, 1, 1)], opt)
    noisy = []
    for i, m in enumerate(meas):  # errors of a few hundredths of a degree
        a = dict(m.angles_deg)
        a["omega"] += [0.03, -0.02, 0.01, 0.04][i]
        noisy.append(orientation.MeasuredReflection(m.hkl, a, None))
    U, res = orientation.orientation_from_measured(Crystal("Pt"), dif, noisy)
    assert np.all(res > 0) and np.all(res < 0.1)
    dirs, gcs = [], []
    for m in noisy:
        q = dif.sample_rotation(m.angles_deg).T @ dif.q_lab_of_pixel(128, 128, m.angles_deg)
        dirs.append(q / np.linalg.norm(q))
        g = Crystal("Pt").g_crystal(m.hkl)
        gcs.append(g / np.linalg.norm(g))
    dirs, gcs = np.array(dirs), np.array(gcs)

    def angles(rv):
        R = Rotation.from_rotvec(rv).as_matrix()
        return np.arccos(np.clip(np.einsum("ij,ij->i", (R @ gcs.T).T, dirs), -1, 1))

    fit = least_squares(angles, Rotation.from_matrix(U_true).as_rotvec(), xtol=1e-14, ftol=1e-14)
    assert misorientation_deg(U, Rotation.from_rotvec(fit.x).as_matrix()) < 1e-3
    assert misorientation_deg(U, U_true) < 0.05


# ---------------------------------------------------------------------------
# Choice
# ---------------------------------------------------------------------------

def test_four_111_better_conditioned_than_any_three():
    # Hand: the four ⟨111⟩ body diagonals n satisfy Σ n nᵀ = (4/3) I, so the
    # 4-set has condition number 1; any three of them do not.
    fcc = Crystal.from_lattice(4.0, centring="F")
    dif = four_circle()
    opt = P.PlanOptions(g_max=3.0, n_reflections=4, surface_normal=None)
    res = P.plan(fcc, dif, opt)
    assert len(res.reflections) == 8 and all(r.reachable for r in res.reflections)
    ch = res.chosen
    assert ch.condition_number == pytest.approx(1.0, abs=1e-9)
    g111 = 2 * np.pi * math.sqrt(3) / 4.0
    assert ch.score == pytest.approx(3 / (4 / 3 * g111 ** 2), rel=1e-9)
    lines = [(1, 1, 1), (-1, 1, 1), (1, -1, 1), (1, 1, -1)]
    for trio in itertools.combinations(lines, 3):
        G = np.array([fcc.g_sample(h) for h in trio])
        s = np.linalg.svd(G, compute_uv=False)
        assert s[0] / s[-1] > ch.condition_number + 0.5
        assert np.trace(np.linalg.inv(G.T @ G)) > ch.score


def test_coplanar_set_scores_ill_conditioned_and_is_never_chosen():
    # Hand: (2 2 2) = (2 2 0) + (0 0 2), so the three G are coplanar.
    fcc = Crystal.from_lattice(4.0, centring="F")
    G = np.array([fcc.g_sample(h) for h in [(2, 2, 0), (0, 0, 2), (2, 2, 2)]])
    score, C, sig = P.score_set(G, np.ones(3))
    assert score == math.inf and C is None and np.all(np.isinf(sig))
    dif = four_circle()
    opt = P.PlanOptions(g_max=7.0, n_reflections=3, surface_normal=None,
                        score_set=((2, 2, 0), (0, 0, 2), (2, 2, 2)))
    res = P.plan(fcc, dif, opt)
    assert res.user.score == math.inf and res.user.condition_number == math.inf
    assert np.isfinite(res.chosen.score) and res.chosen.condition_number < 10
    chosen = np.array([fcc.g_sample(h) for h in res.chosen.hkls])
    assert abs(np.linalg.det(chosen)) > 1e-3 * np.prod(np.linalg.norm(chosen, axis=1))
    # Only these three candidates (plus a collinear twin): nothing can be chosen.
    refl = [r for r in res.reflections if r.hkl in [(2, 2, 0), (0, 0, 2), (2, 2, 2), (-2, -2, 0)]]
    ch, _, msg = P.choose_set(refl, 3)
    assert ch is None and "coplanar" in msg


def test_strain_sigma_of_orthogonal_set():
    # Hand: G = g·(x, y, z), unit weights: C = I/g², σ(ε_ii) = 1/g,
    # σ(ε_ik) = √((1/g² + 1/g²)/4) = 1/(g√2).
    g = 3.0
    score, C, sig = P.score_set(g * np.eye(3), np.ones(3))
    assert score == pytest.approx(3 / g ** 2)
    np.testing.assert_allclose(sig, [1 / g] * 3 + [1 / (g * math.sqrt(2))] * 3)


def test_exchange_search_finds_the_exhaustive_optimum(pt_oriented):
    # Reference: the exhaustive enumeration of every 4-set.
    dif = four_circle()
    base = dict(g_max=5.4, n_reflections=4, fixed_deg={"chi": 0.0}, surface_normal=None)
    full = P.plan(pt_oriented, dif, P.PlanOptions(**base))
    exch = P.plan(pt_oriented, dif, P.PlanOptions(**base, exhaustive_limit=0))
    assert exch.chosen.score == pytest.approx(full.chosen.score, rel=1e-9)
    assert full.best_sigma is not None and np.all(full.chosen.relative_sigma >= 1 - 1e-12)


def test_travel_cap_and_hand_travel(pt_oriented):
    # Hand: settings 0°, 30°, 10° on one circle are visited best as 0, 10, 30:
    # 30° of travel.
    t, order = P.set_travel([[0.0, 5.0], [30.0, 5.0], [10.0, 5.0]])
    assert t == pytest.approx(30.0) and order in ([0, 2, 1], [1, 2, 0])
    dif = four_circle()
    base = dict(g_max=4.6, n_reflections=3, fixed_deg={"chi": 0.0}, surface_normal=None)
    free = P.plan(pt_oriented, dif, P.PlanOptions(**base))
    cap = 0.8 * free.chosen.travel_deg
    capped = P.plan(pt_oriented, dif, P.PlanOptions(**base, max_travel_deg=cap))
    assert capped.chosen.travel_deg <= cap
    assert capped.chosen.score >= free.chosen.score
    none = P.plan(pt_oriented, dif, P.PlanOptions(**base, max_travel_deg=1e-3))
    assert none.chosen is None and "max_travel_deg" in none.message


def test_weights_follow_xrayutilities_structure_factor():
    # Reference: xrayutilities Crystal.StructureFactor. With the detector arm
    # scattering in the vertical plane and the beam polarised along x, the
    # polarisation factor is 1 (Thomson scattering, ê ⟂ scattering plane), so
    # w ∝ |F|².
    import xrayutilities as xu

    pt = Crystal("Pt")
    dif = four_circle()
    res = P.plan(pt, dif, P.PlanOptions(g_max=4.6, fixed_deg={"chi": 0.0}, surface_normal=None))
    m = xu.materials.Pt
    f = {h: abs(m.StructureFactor(m.Q(*h), 9000.0)) for h in [(1, 1, 1), (2, 0, 0), (2, 2, 0)]}
    by = {r.hkl: r for r in res.reflections}
    assert by[(1, 1, 1)].weight == pytest.approx(1.0)
    for h in [(2, 0, 0), (2, 2, 0)]:
        assert by[h].weight == pytest.approx((f[h] / f[(1, 1, 1)]) ** 2, rel=1e-6)
    flat = P.plan(pt, dif, P.PlanOptions(g_max=4.6, fixed_deg={"chi": 0.0}, surface_normal=None,
                                         count_model=P.CountModel(noise_exponent=0.0)))
    assert all(r.weight == 1.0 for r in flat.reflections)


# ---------------------------------------------------------------------------
# Listing and reasons
# ---------------------------------------------------------------------------

def test_forbidden_reflections_never_listed(pt_oriented):
    # fcc: F ≠ 0 only for h, k, l all even or all odd (Cullity & Stock,
    # Elements of X-ray Diffraction, 3rd ed., 2001, ch. 4; from memory).
    res = P.plan(pt_oriented, four_circle(), P.PlanOptions(g_max=6.5, fixed_deg={"chi": 0.0}))
    listed = {r.hkl for r in res.reflections}
    assert (1, 0, 0) not in listed and (1, 1, 0) not in listed and (2, 1, 0) not in listed
    assert all(len({v % 2 for v in h}) == 1 for h in listed)
    assert len(listed) == 8 + 6 + 12 + 24 + 8 + 6  # {111} {200} {220} {311} {222} {400}


def test_unreachable_reasons(pt_oriented):
    dif = four_circle(energy=9.0, tt_limits=(0.0, 50.0))
    lam = HC / 9.0
    res = P.plan(pt_oriented, dif, P.PlanOptions(g_max=9.5, fixed_deg={"chi": 0.0}, surface_normal=None))
    for r in res.reflections:
        # Bragg's law λ = 2d sin θ (hand): beyond |G| = 4π/λ nothing is reachable.
        if r.g_norm > 4 * np.pi / lam:
            assert r.reason.startswith("energy too low") and not r.reachable
            assert f"{HC * r.g_norm / (4 * np.pi):.2f} keV" in r.reason
        elif 2 * math.degrees(math.asin(lam / (2 * r.d_spacing))) > 50.0 + 1e-6:
            assert r.reason.startswith("circle limit") and "tt" in r.reason
        else:
            assert r.reachable
    # Substrate: Q·n = k (sin α_in + sin α_out) for any setting (hand, from
    # Q = k_f − k_i), so every G pointing into the substrate is blocked.
    res = P.plan(pt_oriented, four_circle(), P.PlanOptions(g_max=5.6, fixed_deg={"chi": 0.0}))
    for r in res.reflections:
        if r.g_sample[2] < 0:
            assert not r.reachable and r.reason.startswith("beam blocked by the substrate")
        if r.reachable:
            assert r.incidence_deg >= -1e-9 and r.exit_deg >= -1e-9
    assert any(r.reachable for r in res.reflections)


# ---------------------------------------------------------------------------
# Pipeline file
# ---------------------------------------------------------------------------

CONFIG = """
[instrument]
energy_kev = 9.0
sample_circles = [
  {name = "mu", axis = "z+", limits = [-5.0, 60.0]},
  {name = "eta", axis = "x+", limits = [-5.0, 120.0]},
  {name = "chi", axis = "y+", limits = [-95.0, 95.0]},
  {name = "phi", axis = "z+", limits = [-180.0, 180.0]},
]
detector_circles = [
  {name = "nu", axis = "z+", limits = [-5.0, 120.0]},
  {name = "delta", axis = "x+", limits = [-5.0, 130.0]},
]
[instrument.detector]
shape = [256, 256]
direct_beam = [128, 128]

[crystal]
material = "Pt"

[plan]
g_max = 6.0
n_reflections = 4
fixed = {mu = 0.0, nu = 0.0}
rocking_circle = "eta"
rocking_range_deg = 1.0
min_incidence_deg = 0.5
min_exit_deg = 0.5
score_set = [[1, 1, 1], [0, 2, 0], [2, 0, 2]]

[plan.orientation]
euler_bunge_deg = [30.0, 54.7356, 45.0]
"""


def _objects(cfg):
    from braggstrain.config import build_crystal, build_instrument

    v = P._validated(cfg)
    return build_crystal(v), build_instrument(v)


def test_plan_from_config_writes_figure_and_fragment(tmp_path):
    cfg = tomllib.loads(CONFIG)
    res = P.plan_from_config(cfg, tmp_path / "out")
    assert res.chosen is not None and len(res.chosen.hkls) == 4
    with open(res.figure_path, "rb") as fh:
        assert fh.read(8) == b"\x89PNG\r\n\x1a\n"  # PNG signature (PNG specification, sec. 5.2)
    frag = tomllib.loads(open(res.fragment_path).read())
    assert [tuple(r["hkl"]) for r in frag["reflections"]] == res.chosen.hkls
    crystal, dif = _objects(cfg)
    crystal = crystal.with_orientation(orientation.orientation_from_euler([30.0, 54.7356, 45.0]))
    for r in frag["reflections"]:
        # the pasted angles put Q on G (xrayutilities QConversion via instrument)
        q = dif.pixel_q(r["angles_deg"], frame="sample", roi=(128, 129, 128, 129))[:, 0, 0]
        assert np.max(np.abs(q - crystal.g_sample(r["hkl"]))) < 1e-6
        assert r["angles_deg"]["eta"] >= -5.0 + 0.5 - 1e-9  # rocking margin
    table = P.format_plan_table(res)
    for h in res.chosen.hkls:
        assert format_hkl(h) in table
    assert "condition number" in table and "your set" in table and "unreachable" in table
    assert "Bunge" in table
    assert sorted(os.listdir(tmp_path / "out")) == ["plan.png", "plan_reflections.toml"]  # no temp files left
    assert res.chosen.score < res.user.score


def test_plan_from_validated_demo_file(tmp_path):
    # The project's demo pipeline file read by braggstrain.config.load_config,
    # as the command line does; its four reflections are scored as a user set.
    from braggstrain.config import load_config

    from conftest import DEMO

    cfg = load_config(DEMO)  # tracked in the repository: a missing file fails
    cfg["plan"] = {"fixed": {"nu": 0.0}, "g_max": 5.0, "n_reflections": 4,
                   "score_set": [r["hkl"] for r in cfg["reflection"]]}
    res = P.plan_from_config(cfg, tmp_path)
    assert res.chosen is not None and res.user is not None
    assert res.chosen.score <= res.user.score + 1e-12
    assert res.chosen.condition_number < 10


def test_config_orientation_from_measured_reflections(tmp_path):
    U_true = Rotation.random(random_state=3).as_matrix()
    cfg = tomllib.loads(CONFIG)
    _, dif = _objects(cfg)
    opt = P.PlanOptions(fixed_deg={"mu": 0.0, "nu": 0.0}, surface_normal=None)
    pt = Crystal("Pt", U_true)
    meas = _measure(pt, dif, pt.allowed_reflections(4.6), opt, n=2)
    cfg["plan"]["orientation"] = {"measured": [{"hkl": list(m.hkl), "angles_deg": dict(m.angles_deg)}
                                               for m in meas]}
    res = P.plan_from_config(cfg, tmp_path)
    assert misorientation_deg(res.U, U_true) < 0.01
    assert "two-reflection" in " ".join(res.notes)
    # A wrong hkl is caught by its |Q| (named key).
    cfg["plan"]["orientation"]["measured"][0]["hkl"] = [2, 0, 0]
    with pytest.raises(ConfigError, match=r"plan\.orientation\.measured\[0\].*differs"):
        P.plan_from_config(cfg, tmp_path)


@pytest.mark.parametrize("edit, key", [
    (lambda c: c["instrument"]["sample_circles"][1].update(limits=[120.0, -5.0]),
     r"instrument\.sample_circles\[1\]\.limits"),
    (lambda c: c["plan"].update(fixed={"mu": 0.0, "nu": 0.0, "kappa": 3.0}), r"plan\.fixed.*'kappa'"),
    (lambda c: c["plan"].update(free=["eta", "chi", "theta"]), r"plan\.free.*'theta'"),
    (lambda c: c["instrument"].update(energy_kev=2.0), r"instrument\.energy_kev"),
    (lambda c: c["plan"].update(n_reflections=7), r"plan\.n_reflections"),
    (lambda c: c["plan"].update(n_reflection=3), r"plan: unknown key"),
    (lambda c: c["plan"].update(rocking_circle="delta"), r"plan\.rocking_circle"),
    (lambda c: c["plan"]["orientation"].update(measured=[]), r"plan\.orientation"),
    (lambda c: c["instrument"]["sample_circles"][0].update(axes="x+"), r"instrument\.sample_circles\[0\]\.axes"),
    (lambda c: c["plan"].update(fixed={"mu": 90.0, "nu": 0.0}), r"plan\.fixed\.mu"),
])
def test_bad_config_names_the_key(tmp_path, edit, key):
    cfg = tomllib.loads(CONFIG)
    edit(cfg)
    with pytest.raises(ConfigError, match=key):
        P.plan_from_config(cfg, tmp_path)
