"""Tests of braggstrain.strain.frame: both routes to the sample frame.

The reconstructions are not phased here (phase retrieval is a separate
stage): each route gets the measured amplitudes (√ of the prepared or gridded
intensity) with the truth's phases — the far field of the simulator's crystal
sampled, as braggstrain.simulate.forward.simulate_scan does, on the route's own
conjugate grid — so the tests measure what the geometry and the gridding do,
not the phasing. Expected sizes, orientations, centres and displacement
fields are the simulator's inputs; the solid geometry used (regular
octahedron: vertex-to-vertex = edge·√2, face-to-face = edge·√(2/3)) is
standard, from memory.
"""

import numpy as np
import pytest
import scipy.fft as sfft
from scipy import ndimage
from scipy.optimize import least_squares

from braggstrain.geometry.rotation import rotation_from_rotvec
from braggstrain.simulate import forward as fw
from braggstrain.strain import frame as fr
from braggstrain.prepare import scan as pr
from braggstrain.prepare import regrid as rg
from braggstrain.geometry.crystal import Crystal
from braggstrain.errors import InputError
from braggstrain.geometry.instrument import Circle, Detector, Diffractometer
from braggstrain.strain.objects import SampleObject
from braggstrain.io.scans import Scan


def _instrument():
    det = Detector(shape=(150, 170), pixel_size=(55e-6, 55e-6), distance=0.5, direct_beam=(75, 85),
                   gaps=((1, 100, 103),))
    return Diffractometer([Circle("mu", "z+"), Circle("eta", "x+"), Circle("phi", "z+")],
                          [Circle("nu", "z+"), Circle("delta", "x+")], det, 9.0)


SCENES = {
    # Pt cube, edge 300 nm, reflection (1 1 1), detector 3° out of the vertical plane
    "cube": dict(kind="cube", hkl=(1, 1, 1), nu=3.0, orient=((1, 1, 1), (0, 0, 1), (1, -1, 0), (1, 0, 0)),
                 size=3000.0, center=(120.0, -60.0, 40.0)),
    # Pt octahedron, 420 nm vertex to vertex, reflection (0 0 2), detector −8° out of plane
    "octahedron": dict(kind="octahedron", hkl=(0, 0, 2), nu=-8.0,
                       orient=((0, 0, 1), (0.2, 0.1, 1), (1, 1, 0), (1, 0, 0)), size=4200.0,
                       center=(-80.0, 50.0, 90.0)),
}


def _scene(kind, hkl, nu, orient, size, center, field=None, seed=2):
    ins = _instrument()
    cr = Crystal("Pt").oriented_by(*orient)
    g = cr.g_sample(hkl)
    ang = ins.solve_bragg(g, free=["mu", "eta", "delta"], fixed={"phi": 0.0, "nu": nu}, starts=2)
    step = np.degrees(5e-4 / np.linalg.norm(g))
    if kind == "cube":
        normals, d, edge = fw._CUBE_FACES @ cr.U.T, np.full(6, size / 2), size
    else:
        normals, d, edge = fw._OCTA_FACES @ cr.U.T, np.full(8, size / (2 * np.sqrt(3))), size / np.sqrt(2)
    shape = fw.Polyhedron(normals, d, center=center)
    sim = fw.simulate_scan(ins, cr, hkl, shape, field, rocking_circle="eta", n_frames=72, step_deg=step,
                           free_circles=None, bragg_angles=ang, window=(80, 80), peak_counts=1e6, background=0.5,
                           hot_pixels=3, seed=seed)
    scan = Scan(frames=sim.frames, angles=sim.angles, rocking_circle="eta", instrument=ins, hkl=hkl,
                path=f"frame_{kind}.h5")
    return dict(kind=kind, scan=scan, sim=sim, g=g, shape=shape, normals=shape.normals, d=d, edge=edge,
                center=np.asarray(center, float), field=field)


def _ff(x):
    return sfft.fftshift(sfft.fftn(sfft.ifftshift(x)))


def _iff(x):
    return sfft.fftshift(sfft.ifftn(sfft.ifftshift(x)))


def _truth_far_field(basis, N, sc, q_ref, s=2):
    """Far field on an N grid of the truth sampled s× finer on the real-space
    grid of ``basis`` (sample frame, Å per index step of the N grid), with
    the phase reference of data centred at q_ref (as simulate_scan does)."""
    big = s * np.asarray(N)
    fine = basis / s
    mi = np.meshgrid(*[np.arange(n) - n // 2 for n in big], indexing="ij", sparse=True)
    coords = np.empty((3,) + tuple(big))
    for i in range(3):
        coords[i] = fine[i, 0] * mi[0] + fine[i, 1] * mi[1] + fine[i, 2] * mi[2]
    edge = float(np.mean(np.linalg.norm(fine, axis=0)))
    rho = sc["shape"].density(coords, edge_width=edge).astype(np.complex128)
    phase = -np.tensordot(q_ref - sc["g"], coords, axes=1)
    if sc["field"] is not None:
        inside = rho.real > 0
        phase[inside] -= sc["g"] @ sc["field"].displacement(coords[:, inside])
    rho *= np.exp(1j * phase)
    del coords
    sl = tuple(slice(b // 2 - n // 2, b // 2 - n // 2 + n) for b, n in zip(big, N))
    return _ff(rho)[sl]


def _oracle(A, intensity, mask, unmeasured=None):
    """Measured amplitudes with the truth's phases; masked voxels inside the
    measured region take the truth (phasing fills those from the support),
    those never measured are zero."""
    i = np.maximum(np.asarray(intensity, float), 0)
    use = ~mask
    scale = (np.abs(A[use]) ** 2).sum() / i[use].sum()
    B = np.where(use, np.sqrt(i * scale) * np.exp(1j * np.angle(A)), A)
    if unmeasured is not None:
        B = np.where(unmeasured, 0, B)
    return _iff(B).astype(np.complex64)


def _detector_recon(p, sc):
    A = _truth_far_field(fr.detector_sample_basis(p), p.shape, sc, p.q_center_sample)
    return _oracle(A, p.intensity, p.mask)


def _orthogonal_recon(gi, sc):
    A = _truth_far_field(fr.orthogonal_sample_basis(gi), gi.shape, sc, gi.q_center)
    return _oracle(A, gi.intensity, gi.mask, gi.mask & ~gi.footprint)


def _lab_recon(gl, sc):
    # positions of a lab-frame grid, expressed in the sample frame: Rᵀ·diag(2π/(N Δq))
    A = _truth_far_field(fr.orthogonal_sample_basis(gl), gl.shape, sc, gl.rotation.T @ gl.q_center)
    return _oracle(A, gl.intensity, gl.mask, gl.mask & ~gl.footprint)


def _crop(so, margin=3):
    idx = np.argwhere(so.support)
    lo = np.maximum(idx.min(0) - margin, 0)
    hi = np.minimum(idx.max(0) + margin + 1, so.shape)
    sl = tuple(slice(a, b) for a, b in zip(lo, hi))
    n, new = np.array(so.shape), hi - lo
    origin = so.origin + so.voxel_size * (lo + new // 2 - n // 2)
    return SampleObject(so.obj[sl], so.voxel_size, so.g_vector, so.support[sl], origin, so.hkl, so.meta)


def _fit(so, sc):
    """Least-squares fit of the truth's polyhedron to |ρ|: a rotation, a
    centre and one half-size per pair of opposite faces (plus scale and edge
    width). Returns the rotation, centre and face-to-face distances."""
    so = _crop(so)
    normals = sc["normals"]
    pairs = [(i, int(np.argmin(np.linalg.norm(normals + n, axis=1)))) for i, n in enumerate(normals)]
    pairs = [(i, j) for i, j in pairs if i < j]
    coords = fw.grid_coordinates(so.shape, so.voxel_size) + so.origin[:, None, None, None]
    a = np.abs(so.obj).astype(float)
    a /= np.percentile(a[so.support], 90)

    def model(p):
        dd = np.empty(len(normals))
        for k, (i, j) in enumerate(pairs):
            dd[i] = dd[j] = p[6 + k]
        poly = fw.Polyhedron(normals @ rotation_from_rotvec(p[:3]).T, dd, sc["center"] + p[3:6])
        return p[-2] * poly.density(coords, edge_width=abs(p[-1]))

    p0 = np.r_[np.zeros(6), [sc["d"][i] for i, _ in pairs], 1.0, float(np.mean(so.voxel_size))]
    scale = np.r_[[0.01] * 3, [10.0] * 3, [10.0] * len(pairs), 0.1, 10.0]
    p = least_squares(lambda q: (model(q) - a).ravel(), p0, x_scale=scale, diff_step=1e-3).x
    return dict(rotation=rotation_from_rotvec(p[:3]), center=sc["center"] + p[3:6], ff=2 * p[6:6 + len(pairs)])


def _edges(ff, kind):
    return ff if kind == "cube" else ff * np.sqrt(1.5)


def _phase_rms(so, sc, erode=2):
    """rms of the phase error (rad) inside the eroded support and the truth,
    after removing the mean phase."""
    coords = fw.grid_coordinates(so.shape, so.voxel_size) + so.origin[:, None, None, None]
    inner = (sc["shape"].signed_distance(coords) < -erode * float(np.max(so.voxel_size))) & \
        ndimage.binary_erosion(so.support, iterations=erode)
    truth = np.zeros(inner.sum()) if sc["field"] is None else -(sc["g"] @ sc["field"].displacement(coords[:, inner]))
    d = np.angle(so.obj[inner] * np.exp(-1j * truth))
    d = np.angle(np.exp(1j * (d - np.angle(np.mean(np.exp(1j * d))))))
    return float(np.sqrt(np.mean(d ** 2)))


@pytest.fixture(scope="module", params=sorted(SCENES))
def routes(request):
    sc = _scene(**SCENES[request.param])
    p = pr.prepare_scan(sc["scan"], crop=(64, 64, 64))
    gi = rg.regrid(p, frame="sample")
    out = dict(scene=sc, prepared=p, gridded=gi, recon_detector=_detector_recon(p, sc),
               recon_orthogonal=_orthogonal_recon(gi, sc))
    out["detector"] = fr.detector_to_sample(out["recon_detector"], p, g_vector=sc["g"])
    out["orthogonal"] = fr.orthogonal_to_sample(out["recon_orthogonal"], gi, g_vector=sc["g"])
    out["fits"] = {r: _fit(out[r], sc) for r in fr.ROUTES}
    return out


def test_routes_recover_the_crystal(routes):
    """Edge lengths within one voxel, orientation within 0.5°, centre within
    one voxel of the simulator's truth, for both routes."""
    sc = routes["scene"]
    for route in fr.ROUTES:
        so, f = routes[route], routes["fits"][route]
        voxel = float(np.max(so.voxel_size))
        assert isinstance(so, SampleObject) and so.meta["route"] == route
        np.testing.assert_allclose(so.g_vector, sc["g"])
        assert np.all(np.abs(_edges(f["ff"], sc["kind"]) - sc["edge"]) < voxel), route
        angle = np.degrees(np.arccos(np.clip((np.trace(f["rotation"]) - 1) / 2, -1, 1)))
        assert angle < 0.5, route
        assert np.linalg.norm(f["center"] - sc["center"]) < voxel, route
        # the support holds the crystal: its volume is the truth's within 10 %
        vol = so.support.sum() * np.prod(so.voxel_size)
        true_vol = sc["edge"] ** 3 if sc["kind"] == "cube" else np.sqrt(2) / 3 * sc["edge"] ** 3
        assert abs(vol / true_vol - 1) < 0.1, route


def test_the_two_routes_agree(routes):
    fd, fo = routes["fits"]["detector"], routes["fits"]["orthogonal"]
    voxel = max(float(np.max(routes[r].voxel_size)) for r in fr.ROUTES)
    assert np.all(np.abs(fd["ff"] - fo["ff"]) < voxel)
    assert np.linalg.norm(fd["center"] - fo["center"]) < voxel
    rel = fd["rotation"].T @ fo["rotation"]
    assert np.degrees(np.arccos(np.clip((np.trace(rel) - 1) / 2, -1, 1))) < 0.5


def test_default_route_is_the_more_accurate(routes):
    """The default route gives the smaller phase error against the truth on
    the simulator's data (the numbers are in docs/frames.md)."""
    sc = routes["scene"]
    err = {r: _phase_rms(routes[r], sc) for r in fr.ROUTES}
    other = [r for r in fr.ROUTES if r != fr.DEFAULT_ROUTE][0]
    assert err[fr.DEFAULT_ROUTE] < err[other]
    assert err[fr.DEFAULT_ROUTE] < 0.02


def test_detector_basis_is_the_simulators_grid(routes):
    """The detector route's voxel positions are those the simulator sampled
    the crystal on (forward.detector_frame_grid, rotated by R_peakᵀ)."""
    p, sim = routes["prepared"], routes["scene"]["sim"]
    T = fw.detector_frame_grid(sim.linear_map, p.shape)
    np.testing.assert_allclose(fr.detector_sample_basis(p), p.rotation.T @ T, rtol=1e-9)


def test_point_lands_where_the_basis_puts_it(routes):
    """A small blob at detector index offset m lands at Rᵀ·T·m in the sample
    frame (to a tenth of a voxel)."""
    p = routes["prepared"]
    m0 = np.array([5.0, -7.0, 3.0])
    idx = np.stack(np.meshgrid(*[np.arange(n) - n // 2 for n in p.shape], indexing="ij"))
    blob = np.exp(-np.sum((idx - m0[:, None, None, None]) ** 2, axis=0) / (2 * 1.5 ** 2)).astype(np.complex64)
    so = fr.detector_to_sample(blob, p, support_threshold=0.05)
    w = np.abs(so.obj) ** 2
    pos = fw.grid_coordinates(so.shape, so.voxel_size) + so.origin[:, None, None, None]
    centroid = np.array([(w * pos[k]).sum() / w.sum() for k in range(3)])
    expect = fr.detector_sample_basis(p) @ m0
    assert np.linalg.norm(centroid - expect) < 0.1 * so.voxel_size[0]


def test_orthogonal_native_grid(routes):
    """On a sample-frame q grid with no output grid asked for, the route keeps
    the array: voxel 2π/(N Δq), origin 0 at n//2, no interpolation."""
    gi = routes["gridded"]
    recon = routes["recon_orthogonal"]
    so = fr.orthogonal_to_sample(recon, gi)
    np.testing.assert_allclose(so.voxel_size, 2 * np.pi / (np.array(gi.shape) * gi.q_step))
    assert so.shape == gi.shape and not so.meta["resampled"]
    np.testing.assert_array_equal(so.obj, recon)  # G defaults to the grid centre's Q: no rephasing
    np.testing.assert_array_equal(so.origin, 0.0)


def test_removed_ramp_is_put_back(routes):
    """A ramp the phasing removed (peak offset ρ·exp(−2πi Σ r_k m_k/N_k), given
    back as ``ramp``) gives the same sample-frame object."""
    p, sc = routes["prepared"], routes["scene"]
    recon = routes["recon_detector"]
    ramp = np.array([0.7, -1.2, 0.4])
    idx = np.meshgrid(*[np.arange(n) - n // 2 for n in p.shape], indexing="ij", sparse=True)
    ph = sum(2 * np.pi * r * i / n for r, i, n in zip(ramp, idx, p.shape))
    a = fr.detector_to_sample(recon, p, g_vector=sc["g"])
    b = fr.detector_to_sample(recon * np.exp(-1j * ph), p, g_vector=sc["g"], ramp=ramp,
                              support=np.abs(recon) >= 0.25 * np.abs(recon).max())
    inner = ndimage.binary_erosion(a.support, iterations=2)
    assert a.shape == b.shape
    assert np.abs(np.angle(a.obj[inner] * np.conj(b.obj[inner]))).max() < 2e-2


def test_uniform_strain_gives_the_phase_gradient():
    """u = D·r gives φ = −G·D·r, so ∇φ = −Dᵀ G in the sample frame (the
    convention ρ = s·exp(−i G·u) of docs/design.md), through both routes. The
    gradient is taken wrap-free, arg(ρ(r+e)ρ*(r−e))/(2h)."""
    D = np.array([[1e-3, 2e-4, 0.0], [0.0, -5e-4, 0.0], [1e-4, 0.0, 5e-4]])
    sc = _scene(**SCENES["cube"], field=fw.UniformStrain(D), seed=4)
    p = pr.prepare_scan(sc["scan"], crop=(64, 64, 64))
    gi = rg.regrid(p, frame="sample")
    gl = rg.regrid(p, frame="lab")  # a lab-frame grid: the route rotates it into the sample frame
    expect = -D.T @ sc["g"]
    for so in (fr.detector_to_sample(_detector_recon(p, sc), p, g_vector=sc["g"]),
               fr.orthogonal_to_sample(_orthogonal_recon(gi, sc), gi, g_vector=sc["g"]),
               fr.orthogonal_to_sample(_lab_recon(gl, sc), gl, g_vector=sc["g"])):
        inner = ndimage.binary_erosion(so.support, iterations=3)
        grad = []
        for k in range(3):
            fwd, bwd = np.roll(so.obj, -1, axis=k), np.roll(so.obj, 1, axis=k)
            grad.append(np.angle(fwd * np.conj(bwd))[inner].mean() / (2 * so.voxel_size[k]))
        assert np.linalg.norm(np.array(grad) - expect) < 0.03 * np.linalg.norm(expect), so.meta["route"]


def test_bad_input(routes):
    p, gi = routes["prepared"], routes["gridded"]
    with pytest.raises(InputError, match=r"recon: expected .*\(64, 64, 64\)"):
        fr.detector_to_sample(np.zeros((32, 32, 32), np.complex64), p)
    with pytest.raises(InputError, match="support"):
        fr.detector_to_sample(np.ones(p.shape, np.complex64), p, support=np.ones((4, 4, 4), bool))
    with pytest.raises(InputError, match="all zero"):
        fr.detector_to_sample(np.zeros(p.shape, np.complex64), p)
    with pytest.raises(InputError, match="GriddedIntensity"):
        fr.orthogonal_to_sample(np.ones(p.shape, np.complex64), p)
    with pytest.raises(InputError, match="PreparedScan or a GriddedIntensity"):
        fr.to_sample_frame(np.ones(p.shape, np.complex64), object())
    assert fr.to_sample_frame(routes["recon_detector"], p).meta["route"] == "detector"
    assert fr.to_sample_frame(routes["recon_orthogonal"], gi).meta["route"] == "orthogonal"
    with pytest.raises(InputError, match="voxel_size"):
        fr.detector_to_sample(routes["recon_detector"], p, voxel_size=-1)
