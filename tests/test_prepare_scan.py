"""Tests of braggstrain.prepare.scan: cleaning, peak, crop, binning, linear map.

The reference for every Q is xrayutilities' per-pixel conversion
(``QConversion.area``, a general-purpose reference library); the data are
rocking scans made by the project's simulator (braggstrain.simulate.forward), whose
injected hot pixels and gaps are known.
"""

import warnings
from dataclasses import replace

import numpy as np
import pytest

from braggstrain.io.prepared import read_prepared, write_prepared
from braggstrain.simulate import forward as fw
from braggstrain.prepare import scan as pr
from braggstrain.prepare.oversampling import estimate_oversampling
from braggstrain.geometry.crystal import Crystal
from braggstrain.errors import BraggStrainError, InputError, ScanFileError
from braggstrain.geometry.instrument import Circle, Detector, Diffractometer
from braggstrain.io.scans import Scan


def _instrument():
    # a flat 150 x 170 detector at 0.5 m, 55 µm pixels, 9 keV, one gap of 3 columns
    det = Detector(shape=(150, 170), pixel_size=(55e-6, 55e-6), distance=0.5, direct_beam=(75, 85),
                   gaps=((1, 100, 103),))
    return Diffractometer([Circle("mu", "z+"), Circle("eta", "x+"), Circle("phi", "z+")],
                          [Circle("nu", "z+"), Circle("delta", "x+")], det, 9.0)


@pytest.fixture(scope="module")
def cube():
    """Pt cube, edge 300 nm, reflection (1 1 1), 72 frames; 6 hot pixels."""
    ins = _instrument()
    cr = Crystal("Pt").oriented_by((1, 1, 1), (0, 0, 1), (1, -1, 0), (1, 0, 0))
    g = cr.g_sample((1, 1, 1))
    ang = ins.solve_bragg(g, free=["mu", "eta", "delta"], fixed={"phi": 0.0, "nu": 3.0}, starts=2)
    step = np.degrees(5e-4 / np.linalg.norm(g))  # ≈ one pixel's q step per frame
    shape = fw.Polyhedron(fw._CUBE_FACES @ cr.U.T, np.full(6, 1500.0), center=(120.0, -60.0, 40.0))
    sim = fw.simulate_scan(ins, cr, (1, 1, 1), shape, None, rocking_circle="eta", n_frames=72, step_deg=step,
                           free_circles=None, bragg_angles=ang, window=(80, 80), peak_counts=1e6, background=0.5,
                           hot_pixels=6, seed=3)
    scan = Scan(frames=sim.frames, angles=sim.angles, rocking_circle="eta", instrument=ins, mask=None,
                hkl=(1, 1, 1), path="cube_111.h5")
    return dict(scan=scan, sim=sim, shape=shape, g=g, crystal=cr)


@pytest.fixture(scope="module")
def prepared(cube):
    return pr.prepare_scan(cube["scan"], crop=(64, 64, 64))


def test_fast_size():
    # products of 2, 3, 5 (definition; common practice, no source)
    assert pr.fast_size(61) == 64 and pr.fast_size(63, up=False) == 60
    assert pr.fast_size(49, multiple=2) == 50 and pr.fast_size(7, up=False) == 6
    assert pr.fast_size(1, up=False) == 1


def test_peak_at_centre_and_geometry(cube, prepared):
    p = prepared
    sim = cube["sim"]
    assert p.shape == (64, 64, 64)
    # the simulator puts the Bragg condition at its peak pixel; the brightest voxel is there
    assert tuple(int(v) for v in p.peak_max) == sim.peak_pixel
    n = np.array(p.shape) // 2
    assert np.unravel_index(np.argmax(p.intensity), p.shape) == tuple(n)
    # the linear map is the instrument's at the same pixel and frame (same engine)
    np.testing.assert_allclose(p.linear_map, sim.linear_map, rtol=1e-9, atol=1e-12)
    # Q of the centre is G of the crystal (xrayutilities' Pt lattice) to 1e-9 relative
    g = cube["g"]
    assert np.linalg.norm(p.q_center_sample - g) / np.linalg.norm(g) < 1e-9


def test_linear_map_matches_xrayutilities(prepared):
    """Every voxel's Q from the linear map agrees with xrayutilities' per-pixel
    conversion to 1e-4 relative, and the disagreement grows quadratically
    with the distance from the centre (the map is the first-order Taylor
    term, so the remainder is second order; any calculus text)."""
    qe = pr.exact_q(prepared, "lab")
    ql = pr.linear_q(prepared, "lab")
    rel = np.linalg.norm(qe - ql, axis=0) / np.linalg.norm(qe, axis=0)
    assert rel.max() < 1e-4
    n = np.array(prepared.shape) // 2
    assert rel[tuple(n)] < 1e-9
    # max error within cubes of half-width h about the centre
    idx = np.abs(np.stack(np.meshgrid(*[np.arange(s) - s // 2 for s in prepared.shape], indexing="ij"))).max(axis=0)
    e = {h: rel[idx <= h].max() for h in (8, 16, 31)}
    assert 0.75 < (e[16] / e[8]) / (16 / 8) ** 2 < 1.25
    assert 0.75 < (e[31] / e[16]) / (31 / 16) ** 2 < 1.25
    # sample-frame versions are the same vectors rotated by Rᵀ
    qs = pr.exact_q(prepared, "sample")
    np.testing.assert_allclose(np.einsum("ji,j...->i...", prepared.rotation, qe), qs, atol=1e-12)


def test_binning_scales_the_map(cube, prepared):
    pb = pr.prepare_scan(cube["scan"], crop=(64, 64, 64), bin=(2, 2, 2), min_oversampling=1.0)
    assert pb.shape == (32, 32, 32)
    np.testing.assert_allclose(pb.linear_map, prepared.linear_map * 2, rtol=1e-9)
    # the centre of a 2-voxel bin lies half a raw step past the peak voxel
    np.testing.assert_allclose(pb.center_index, np.asarray(cube["sim"].peak_pixel) + 0.5)
    qe = pr.exact_q(pb, "lab")
    ql = pr.linear_q(pb, "lab")
    assert (np.linalg.norm(qe - ql, axis=0) / np.linalg.norm(qe, axis=0)).max() < 1e-4
    # counts are conserved by binning (sum of the measured voxels, background off)
    p1 = pr.prepare_scan(cube["scan"], crop=(64, 64, 64), background=None)
    p2 = pr.prepare_scan(cube["scan"], crop=(64, 64, 64), bin=(2, 2, 2), background=None, min_oversampling=1.0)
    assert abs(p2.intensity.sum() / p1.intensity.sum() - 1) < 0.01
    # halving the oversampling below 2 is refused, naming the file and the option
    with pytest.raises(ScanFileError, match=r"cube_111\.h5.*'bin'"):
        pr.prepare_scan(cube["scan"], crop=(64, 64, 64), bin=(1, 2, 2))


def test_hot_pixels_and_gaps_are_masked(cube, prepared):
    sim = cube["sim"]
    found = {tuple(r) for r in prepared.hot_pixels}
    injected = {tuple(int(v) for v in r) for r in sim.hot_pixels}
    assert injected <= found
    # extras only where the simulator's signal window ends abruptly (its edge, 80 × 80 about the peak)
    r0, c0 = sim.peak_pixel[1] - 40, sim.peak_pixel[2] - 40
    for r, c in found - injected:
        assert r in (r0, r0 + 79) or c in (c0, c0 + 79)
    assert len(found - injected) <= 4
    (f0, f1), (a0, a1), (b0, b1) = prepared.crop
    for r, c in injected:
        if a0 <= r < a1 and b0 <= c < b1:
            assert prepared.mask[:, r - a0, c - b0].all()
    # the gap (columns 100-102 of the detector) is masked in every frame
    for c in range(100, 103):
        if b0 <= c < b1:
            assert prepared.mask[:, :, c - b0].all()
    assert prepared.mask_counts["gaps"] == 3 * 150
    assert prepared.mask_counts["hot"] == len(found)


def test_find_hot_pixels_dead_pixel():
    rng = np.random.default_rng(0)
    frames = rng.poisson(30.0, size=(20, 40, 40)).astype(float)
    frames[:, 5, 7] = 0  # dead
    frames[:, 30, 31] += 2000  # hot
    hot, dead = pr.find_hot_pixels(frames)
    assert [tuple(r) for r in hot] == [(30, 31)]
    assert [tuple(r) for r in dead] == [(5, 7)]


def test_zero_frame_is_reported_not_used(cube):
    scan = cube["scan"]
    frames = scan.frames.copy()
    frames[10] = 0
    s2 = replace(scan, frames=frames)
    with pytest.warns(UserWarning, match=r"frame\(s\) \[10\]"):
        p = pr.prepare_scan(s2, crop=(64, 64, 64))
    assert p.zero_frames == [10]
    f0 = int(p.crop[0][0])
    assert p.mask[10 - f0].all()
    assert "zero frames (masked): [10]" in pr.summarize_prepared(p)
    with pytest.raises(ScanFileError, match=r"cube_111\.h5.*'frames'.*\[10\]"):
        pr.prepare_scan(s2, crop=(64, 64, 64), zero_frames="error")


def test_dark_and_flat(cube, prepared):
    """Counts = (raw − dark)/flat (definition of the corrections; common
    practice, no source): a scan with a known dark and gain gives back the
    plain preparation."""
    scan = cube["scan"]
    rng = np.random.default_rng(1)
    flat = rng.uniform(0.8, 1.25, size=scan.frames.shape[1:])
    flat[2, 3] = 0.0  # a dead region of the flat field is masked
    raw = scan.frames.astype(np.float64) * flat[None] + 5.0
    s2 = replace(scan, frames=raw)
    p = pr.prepare_scan(s2, crop=(64, 64, 64), dark=5.0, flat=flat)
    np.testing.assert_allclose(p.intensity, prepared.intensity, rtol=1e-4, atol=1e-2)
    assert p.mask_counts["flat_field"] == 1
    with pytest.raises(ScanFileError, match="'flat'"):
        pr.prepare_scan(s2, crop=(64, 64, 64), flat=flat[:10])


def test_saturation_masks_voxels(cube):
    p = pr.prepare_scan(cube["scan"], crop=(64, 64, 64), saturation=5e5)
    n = tuple(np.array(p.shape) // 2)
    assert p.mask[n]
    assert p.mask_counts["saturated"] >= 1
    assert p.peak_max is not None


def test_auto_crop_and_com_centre(cube):
    p = pr.prepare_scan(cube["scan"])  # crop="auto"
    for k, n in enumerate(p.shape):
        assert pr.fast_size(n) == n and n >= 16  # a product of 2, 3 and 5
        # the crop keeps the peak at n//2 and stays on the data
        assert p.crop[k][0] >= 0 and p.crop[k][1] <= cube["scan"].frames.shape[k]
    assert np.unravel_index(np.argmax(p.intensity), p.shape) == tuple(np.array(p.shape) // 2)
    pf = pr.prepare_scan(cube["scan"], crop="full")
    # the largest centred block of 2·3·5 sizes n (n//2 before the peak, n − 1 − n//2 after it):
    # 72 frames (all; peak at 36), 150 rows (peak at row 75 of 150), 162 = 2·3⁴ columns (peak at
    # column 85 of 170: n ≤ 170, and none of 163–170 is a 2·3·5 product)
    assert pf.shape == (72, 150, 162)
    pc = pr.prepare_scan(cube["scan"], crop=(48, 48, 48), center="com")
    # a symmetric crystal's centre of mass is at its peak (to a voxel)
    assert np.all(np.abs(pc.peak_com - np.asarray(cube["sim"].peak_pixel)) < 1.0)


def test_padding_is_masked(cube):
    p = pr.prepare_scan(cube["scan"], crop=(48, 48, 48), pad=(64, 64, 64))
    assert p.shape == (64, 64, 64)
    assert p.mask[:8].all() and p.mask[-8:].all()
    assert np.unravel_index(np.argmax(p.intensity), p.shape) == (32, 32, 32)
    q = pr.exact_q(p)
    assert np.isnan(q[:, 0, 0, 0]).all() and np.isfinite(q[:, 32, 32, 32]).all()


def test_oversampling_estimate_against_the_truth(cube, prepared):
    """σ_k = N_k/L_k with L_k the crystal's extent in voxels along array axis k
    (docs/methods.md); the truth's extent comes from the simulator's shape sampled
    on the conjugate grid T = 2π M⁻ᵀ diag(1/N). The estimate is rough: within
    20 %."""
    p = prepared
    T = p.rotation.T @ p.real_space_basis()
    pos = np.tensordot(T, fw.grid_coordinates(p.shape, 1.0), axes=1)
    inside = cube["shape"].signed_distance(pos) <= 0
    L = np.array([np.ptp(np.nonzero(inside.any(axis=tuple(a for a in range(3) if a != k)))[0]) + 1
                  for k in range(3)])
    true = np.array(p.shape) / L
    assert np.all(np.abs(p.oversampling / true - 1) < 0.2)
    assert np.all(true > 2)


@pytest.mark.parametrize("axis", [1, 2])
def test_a_masked_gap_beside_the_peak_keeps_the_oversampling_estimate(prepared, axis):
    # Three masked detector rows (axis 1) or columns (axis 2), 3 pixels from
    # the peak: the masked values are extrapolated so that the
    # autocorrelation stays compact (Gerchberg 1974, Papoulis 1975, from
    # memory); a smoothed fill alone gave 1.95 (the undersampling cap) for
    # a σ of 2.96. Measured after: 2.50 (rows), 2.36 (columns).
    m = prepared.mask.copy()
    sl = [slice(None)] * 3
    sl[axis] = slice(prepared.shape[axis] // 2 + 3, prepared.shape[axis] // 2 + 6)
    m[tuple(sl)] = True
    full = estimate_oversampling(prepared.intensity, mask=prepared.mask)
    gap = estimate_oversampling(np.where(m, 0.0, prepared.intensity), mask=m)
    assert gap[axis] > 2.2 and abs(gap[axis] / full[axis] - 1) < 0.25, (gap, full)


def test_summary_lines(prepared):
    s = pr.summarize_prepared(prepared)
    for word in ("cleaned peak", "max counts", "masked", "hot pixels found", "zero frames",
                 "estimated oversampling"):
        assert word in s
    assert f"{prepared.max_counts:.6g}" in s


def test_write_read_round_trip(tmp_path, prepared):
    path = tmp_path / "out" / "cube_prepared.h5"
    write_prepared(prepared, path)
    back = read_prepared(path)
    np.testing.assert_array_equal(back.intensity, prepared.intensity)
    np.testing.assert_array_equal(back.mask, prepared.mask)
    for name in ("linear_map", "q_center", "rotation", "center_index", "crop", "binning", "padding",
                 "oversampling", "hot_pixels"):
        np.testing.assert_array_equal(getattr(back, name), getattr(prepared, name))
    assert back.hkl == prepared.hkl and back.rocking_circle == "eta"
    np.testing.assert_allclose(back.angles["eta"], prepared.angles["eta"])
    # the instrument read back gives the same Q
    np.testing.assert_allclose(pr.exact_q(back), pr.exact_q(prepared), rtol=1e-12)
    # no temporary file is left beside the output
    assert [p.name for p in path.parent.iterdir()] == [path.name]
    # overwriting goes through a temporary file too, and a foreign file is refused
    write_prepared(prepared, path)
    import h5py

    bad = tmp_path / "foreign.h5"
    with h5py.File(bad, "w") as f:
        f.attrs["format"] = "something-else"
    with pytest.raises(ScanFileError, match=r"foreign\.h5.*'@format'"):
        read_prepared(bad)
    with pytest.raises(ScanFileError, match="file not found"):
        read_prepared(tmp_path / "missing.h5")


# --------------------------------------------------------------------------
# bad input: each a clear error naming the file and the field
# --------------------------------------------------------------------------

def test_angles_of_wrong_length(cube):
    scan = cube["scan"]
    ang = dict(scan.angles)
    ang["eta"] = np.asarray(ang["eta"])[:-3]
    with pytest.raises(ScanFileError, match=r"cube_111\.h5: field 'instrument/circles/eta'.*72 angles"):
        pr.prepare_scan(replace(scan, angles=ang))


def test_rocked_circle_that_does_not_change(cube):
    scan = cube["scan"]
    ang = dict(scan.angles)
    ang["eta"] = np.full(72, 18.0)
    with pytest.raises(ScanFileError, match=r"cube_111\.h5: field 'instrument/circles/eta'.*must change"):
        pr.prepare_scan(replace(scan, angles=ang))
    ang["eta"] = np.r_[np.linspace(0, 1, 36), np.linspace(1.1, 3, 36)]
    with pytest.raises(ScanFileError, match="uniform rocking step"):
        pr.prepare_scan(replace(scan, angles=ang))


def test_peak_at_the_detector_edge(cube):
    scan = cube["scan"]
    pk = cube["sim"].peak_pixel
    frames = np.roll(scan.frames, -(pk[1] - 3), axis=1)  # peak now on row 3
    with pytest.raises(ScanFileError, match=r"cube_111\.h5: field 'frames': crop impossible.*row 3"):
        pr.prepare_scan(replace(scan, frames=frames), crop="auto")
    with pytest.raises(ScanFileError, match="crop impossible"):
        pr.prepare_scan(replace(scan, frames=frames), crop=(64, 64, 64))


def test_mask_of_wrong_shape(cube):
    scan = cube["scan"]
    with pytest.raises(ScanFileError, match=r"cube_111\.h5: field 'user_mask'.*\(150, 170\)"):
        pr.prepare_scan(scan, user_mask=np.zeros((10, 10), bool))
    with pytest.raises(ScanFileError, match=r"cube_111\.h5: field 'mask'"):
        pr.prepare_scan(replace(scan, mask=np.zeros((150, 171), bool)))


def test_bad_options(cube, tmp_path):
    scan = cube["scan"]
    with pytest.raises(InputError, match="'crop'"):
        pr.prepare_scan(scan, crop=(63, 64, 64))
    with pytest.raises(InputError, match="'background'"):
        pr.prepare_scan(scan, background="edges")
    with pytest.raises(InputError, match="'dark'.*not found"):
        pr.prepare_scan(scan, dark=str(tmp_path / "nope.npy"))
    assert issubclass(ScanFileError, BraggStrainError)


def test_user_mask_from_file(cube, tmp_path):
    m = np.zeros((150, 170), bool)
    pk = cube["sim"].peak_pixel
    m[pk[1] + 15, :] = True
    np.save(tmp_path / "m.npy", m)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        p = pr.prepare_scan(cube["scan"], crop=(64, 64, 64), user_mask=str(tmp_path / "m.npy"))
    assert p.mask[:, 32 + 15, :].all()
    assert p.mask_counts["user_mask"] == 170


def test_from_a_scan_file(cube, prepared, tmp_path):
    from braggstrain.io.scans import write_scan

    scan = cube["scan"]
    path = tmp_path / "cube_111.h5"
    write_scan(path, scan.frames, scan.angles, "eta", scan.instrument, hkl=(1, 1, 1), material="Pt")
    p = pr.prepare_scan(str(path), crop=(64, 64, 64))
    np.testing.assert_array_equal(p.intensity, prepared.intensity)
    assert p.source == str(path)
    # a file whose rocked circle has the wrong number of angles is refused, naming file and field
    ang = dict(scan.angles)
    ang["eta"] = np.asarray(ang["eta"])[:-1]
    bad = tmp_path / "bad.h5"
    write_scan(bad, scan.frames, ang, "eta", scan.instrument)
    with pytest.raises(ScanFileError, match=r"bad\.h5: field 'instrument/circles/eta'"):
        pr.prepare_scan(str(bad))
