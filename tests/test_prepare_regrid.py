"""Tests of braggstrain.prepare.regrid: the prepared stack on an orthogonal q grid.

References: G of the Pt lattice from xrayutilities' materials database
(a = 3.9242 Å) and Bragg's law for the peak position; xrayutilities'
per-pixel Q conversion for the voxels' Q; the discrete Fourier transform's
sampling relation Δr = 2π/(N Δq) (common practice, no source needed).
"""

import numpy as np
import pytest

from braggstrain.simulate import forward as fw
from braggstrain.prepare import scan as pr
from braggstrain.prepare import regrid as rg
from braggstrain.geometry.crystal import Crystal
from braggstrain.errors import InputError
from braggstrain.geometry.instrument import Circle, Detector, Diffractometer
from braggstrain.io.scans import Scan

EDGE = 3000.0  # Å, cube edge


def _instrument():
    det = Detector(shape=(150, 170), pixel_size=(55e-6, 55e-6), distance=0.5, direct_beam=(75, 85),
                   gaps=((1, 100, 103),))
    return Diffractometer([Circle("mu", "z+"), Circle("eta", "x+"), Circle("phi", "z+")],
                          [Circle("nu", "z+"), Circle("delta", "x+")], det, 9.0)


def _scan(field=None, seed=5):
    ins = _instrument()
    cr = Crystal("Pt").oriented_by((1, 1, 1), (0, 0, 1), (1, -1, 0), (1, 0, 0))
    g = cr.g_sample((1, 1, 1))
    ang = ins.solve_bragg(g, free=["mu", "eta", "delta"], fixed={"phi": 0.0, "nu": 3.0}, starts=2)
    step = np.degrees(5e-4 / np.linalg.norm(g))
    shape = fw.Polyhedron(fw._CUBE_FACES @ cr.U.T, np.full(6, EDGE / 2), center=(120.0, -60.0, 40.0))
    sim = fw.simulate_scan(ins, cr, (1, 1, 1), shape, field, rocking_circle="eta", n_frames=80, step_deg=step,
                           free_circles=None, bragg_angles=ang, window=(96, 96), peak_counts=1e6, background=0.5,
                           hot_pixels=2, seed=seed)
    scan = Scan(frames=sim.frames, angles=sim.angles, rocking_circle="eta", instrument=ins, hkl=(1, 1, 1),
                path="regrid_cube.h5")
    return dict(scan=scan, sim=sim, crystal=cr, g=g, shape=shape)


@pytest.fixture(scope="module")
def plain():
    d = _scan()
    d["prepared"] = pr.prepare_scan(d["scan"], crop=(64, 64, 64))
    d["gridded"] = rg.regrid(d["prepared"], frame="sample")
    return d


@pytest.fixture(scope="module")
def expanded():
    # uniform lattice expansion of 1e-3: u = ε r
    d = _scan(fw.UniformStrain(np.eye(3) * 1e-3), seed=6)
    d["prepared"] = pr.prepare_scan(d["scan"], crop=(64, 64, 64))
    d["gridded"] = rg.regrid(d["prepared"], frame="sample")
    return d


def test_centre_of_mass_at_G(plain):
    """The gridded peak's centre of mass lies at G = U·B·h of the Pt lattice
    (xrayutilities' Pt, a = 3.9242 Å) to 1e-4 relative."""
    gi = plain["gridded"]
    g = plain["g"]
    com = rg.peak_center_of_mass(gi)
    assert np.linalg.norm(com - g) / np.linalg.norm(g) < 1e-4
    # |G| of (1 1 1) is 2π√3/a (cubic d = a/√(h²+k²+l²))
    assert abs(np.linalg.norm(g) - 2 * np.pi * np.sqrt(3) / 3.9242) < 1e-4


def test_lattice_expansion_from_the_peak(expanded):
    """A uniform expansion ε = 1e-3 moves the peak to |G|/(1+ε); the lattice
    parameter a = 2π√(h²+k²+l²)/|Q| (Bragg's law, cubic d-spacing) is recovered
    to 5e-5 in ε from the calibrated geometry."""
    gi = expanded["gridded"]
    q = rg.peak_center_of_mass(gi)
    a0 = expanded["crystal"].lattice_parameters[0]
    a = 2 * np.pi * np.sqrt(3) / np.linalg.norm(q)
    assert abs((a / a0 - 1) - 1e-3) < 5e-5
    # the direction is unchanged by an isotropic expansion (within 1e-4 rad)
    g = expanded["g"]
    assert np.linalg.norm(np.cross(q / np.linalg.norm(q), g / np.linalg.norm(g))) < 1e-4


def test_voxel_size_is_2pi_over_N_dq(plain):
    """Δr = 2π/(N Δq) per axis (DFT sampling; common practice, no source)."""
    gi = plain["gridded"]
    for k in range(3):
        ax = gi.axes[k]
        dq = np.diff(ax)
        np.testing.assert_allclose(dq, gi.q_step[k], rtol=1e-9)
        assert abs(gi.voxel_size[k] - 2 * np.pi / (len(ax) * dq.mean())) < 1e-6 * gi.voxel_size[k]
        # the grid's centre (index n//2) is the prepared array's centre
        assert abs(ax[len(ax) // 2] - gi.q_center[k]) < 1e-12
    np.testing.assert_allclose(gi.q_center, plain["prepared"].q_center_sample, rtol=1e-12)


def test_grid_keeps_the_oversampling(plain):
    """The grid's steps keep the data's oversampling: σ = 2π/(L Δq) along
    each sample axis, with L the truth's extent, is at least 0.9 of the
    detector-frame data's smallest (docs/methods.md), and ≥ 2."""
    p = plain["prepared"]
    gi = plain["gridded"]
    T = p.rotation.T @ p.real_space_basis()
    pos = np.tensordot(T, fw.grid_coordinates(p.shape, 1.0), axes=1)
    inside = plain["shape"].signed_distance(pos) <= 0
    L_det = np.array([np.ptp(np.nonzero(inside.any(axis=tuple(a for a in range(3) if a != k)))[0]) + 1
                      for k in range(3)])
    sigma_det = (np.array(p.shape) / L_det).min()
    c = fw.grid_coordinates((96, 96, 96), 50.0) + plain["shape"].center[:, None, None, None]
    ins = plain["shape"].signed_distance(c) <= 0
    L = np.array([np.ptp(c[k][ins]) for k in range(3)])
    sigma_grid = 2 * np.pi / (gi.q_step * L)
    assert np.all(sigma_grid >= 0.9 * sigma_det)
    assert np.all(sigma_grid >= 2.0)


def test_fuzzy_gridding_fills_sparse_bins(plain):
    p = plain["prepared"]
    fine = rg.default_q_step(p, "sample") * 0.7  # finer bins than the pixels fill
    plain_grid = rg.regrid(p, frame="sample", q_step=fine, fuzzy=False)
    assert plain_grid.holes > 0
    fuzzy_grid = rg.regrid(p, frame="sample", q_step=fine, fuzzy=True)
    assert fuzzy_grid.holes == 0 and fuzzy_grid.fuzzy
    auto = rg.regrid(p, frame="sample", q_step=fine)
    assert auto.fuzzy and auto.holes == 0
    # gridding moves no intensity: the centre of mass is the same either way (1e-5 relative)
    c1 = rg.peak_center_of_mass(plain_grid)
    c2 = rg.peak_center_of_mass(fuzzy_grid)
    assert np.linalg.norm(c1 - c2) / np.linalg.norm(c1) < 1e-5
    # empty bins are masked and hold nothing; with fuzzy gridding none is left in the measured region
    assert np.all(plain_grid.intensity[plain_grid.mask] == 0)
    assert np.count_nonzero(fuzzy_grid.mask & fuzzy_grid.footprint) == 0


def test_lab_frame_grid(plain):
    p = plain["prepared"]
    gl = rg.regrid(p, frame="lab")
    com = rg.peak_center_of_mass(gl)
    g_lab = p.rotation @ plain["g"]
    assert np.linalg.norm(com - g_lab) / np.linalg.norm(g_lab) < 1e-4
    np.testing.assert_allclose(gl.q_center, p.q_center)


def test_linear_and_exact_q_agree(plain):
    """Gridding with the linear map's Q instead of xrayutilities' per-pixel Q
    moves the peak's centre of mass by less than 1e-5 relative (the map is
    good to 1e-4 at the crop's corners and far better where the counts are)."""
    p = plain["prepared"]
    gi = rg.regrid(p, frame="sample", q_source="linear", q_step=plain["gridded"].q_step)
    c1 = rg.peak_center_of_mass(gi)
    c2 = rg.peak_center_of_mass(plain["gridded"])
    assert np.linalg.norm(c1 - c2) / np.linalg.norm(c2) < 1e-5


def test_bad_arguments(plain):
    p = plain["prepared"]
    with pytest.raises(InputError, match="frame"):
        rg.regrid(p, frame="crystal")
    with pytest.raises(InputError, match="q_step"):
        rg.regrid(p, q_step=-1e-4)
    with pytest.raises(InputError, match="max_shape"):
        rg.regrid(p, q_step=1e-5)
    with pytest.raises(InputError, match="PreparedScan"):
        rg.regrid(np.zeros((4, 4, 4)))
