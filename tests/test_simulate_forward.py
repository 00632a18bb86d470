"""Simulator: analytic form factors, Parseval, strain shifts, dislocation windings."""

import numpy as np
import pytest

from braggstrain.phasing.metrics import far_field
from braggstrain.simulate import forward as fw
from braggstrain.geometry.crystal import Crystal
from braggstrain.geometry.instrument import Circle, Detector, Diffractometer


def test_cube_far_field_is_sinc_cubed():
    # Form factor of a cube of edge L: L³ Π sinc(q_i L/2) (Als-Nielsen & McMorrow,
    # Elements of Modern X-ray Physics, 2nd ed., 2011, §4.4); the grid sum of a cube
    # of n voxels is the Dirichlet kernel, equal to it to O((πk/N)²) near the centre.
    N, n = 160, 15
    # edge 14.5 voxels: |x| ≤ 7.25 keeps offsets −7…7, i.e. n = 15 voxels per edge
    s = fw.cube((N, N, N), 1.0, n - 0.5).astype(np.float32)
    assert s.sum() == n**3
    A = np.abs(far_field(s))
    k = np.arange(-2, 3)
    q = 2 * np.pi * k / N
    sinc = np.sinc(q * n / (2 * np.pi))  # numpy sinc(x) = sin(πx)/(πx)
    ref = n**3 * sinc[:, None, None] * sinc[None, :, None] * sinc[None, None, :]
    got = A[N // 2 - 2:N // 2 + 3, N // 2 - 2:N // 2 + 3, N // 2 - 2:N // 2 + 3]
    big = np.abs(ref) > 0.05 * ref.max()
    np.testing.assert_allclose(got[big], np.abs(ref[big]), rtol=1e-3)


def test_sphere_far_field_form_factor():
    # Sphere of radius R: F(q) = V·3(sin x − x cos x)/x³, x = qR (Guinier, X-ray
    # Diffraction in Crystals, 1963, §10; Als-Nielsen & McMorrow §4.4).
    N, R = 128, 14.0
    coords = fw.grid_coordinates((N, N, N), 1.0)
    sph = fw.Ellipsoid((R, R, R), center=(0.25, -0.25, 0.125))
    dens = np.zeros((N, N, N))
    off = (np.arange(4) + 0.5) / 4 - 0.5
    for ox in off:
        for oy in off:
            for oz in off:
                dens += sph.density(coords + np.array([ox, oy, oz])[:, None, None, None])
    dens /= 64
    A = np.abs(far_field(dens))
    V = 4 / 3 * np.pi * R**3
    # the grid sum of the sampled density is its volume to the sub-sampling's accuracy
    assert A[N // 2, N // 2, N // 2] == pytest.approx(V, rel=3e-3)
    for k in (1, 2, 3):
        x = 2 * np.pi * k / N * R
        f = 3 * (np.sin(x) - x * np.cos(x)) / x**3
        assert A[N // 2 + k, N // 2, N // 2] / A[N // 2, N // 2, N // 2] == pytest.approx(abs(f), rel=1e-3)


def test_parseval():
    # Parseval's theorem for the DFT: Σ|ρ|² = Σ|A|²/N (numpy's unnormalised forward FFT)
    rng = np.random.default_rng(0)
    s = fw.octahedron((48, 48, 48), 1.0, 30.0)
    u = fw.StraightDislocation([1, 2, 0], [0, 0, 1], [2.0, 0, 1.0]).displacement(fw.grid_coordinates((48,) * 3, 1.0))
    obj = fw.complex_object(s, u, rng.normal(size=3))
    A = far_field(obj)
    assert np.sum(np.abs(A.astype(np.complex128)) ** 2) / obj.size == pytest.approx(np.sum(np.abs(obj) ** 2), rel=1e-5)


def test_uniform_tension_moves_peak_to_smaller_q():
    # A lattice under uniform tension ε has d → d(1+ε), so |Q| of the peak falls
    # to |G|/(1+ε) (Bragg's law; Warren, X-ray Diffraction, 1969, §13.1).
    det = Detector(shape=(96, 96), pixel_size=(75e-6, 75e-6), distance=1.0, direct_beam=(48.0, 48.0))
    inst = Diffractometer([Circle("eta", "x+"), Circle("phi", "z-")], [Circle("delta", "x+")], det, 9.0)
    cr = Crystal("Pt")
    shape = fw.Polyhedron(np.array([[i, j, k] for i in (1, -1) for j in (1, -1) for k in (1, -1)], float),
                          np.full(8, 600.0))
    eps = 1e-3
    peaks = []
    for e in (0.0, eps):
        sc = fw.simulate_scan(inst, cr, (1, 1, 1), shape, fw.UniformStrain(np.eye(3) * e), rocking_circle="eta",
                              n_frames=48, step_deg=0.012, free_circles=["eta", "phi", "delta"],
                              window=(64, 64), background=0.0, hot_pixels=0, peak_counts=1e6, seed=1)
        Q = inst.pixel_q(sc.angles, frame="sample")  # (3, F, R, C)
        I = sc.frames.astype(float)
        sel = I > 0.05 * I.max()
        w = I[sel]
        peaks.append(np.array([np.sum(Q[i][sel] * w) / w.sum() for i in range(3)]))
    g = np.linalg.norm(cr.g_sample((1, 1, 1)))
    assert np.linalg.norm(peaks[0]) == pytest.approx(g, rel=2e-5)
    assert np.linalg.norm(peaks[1]) == pytest.approx(g / (1 + eps), rel=2e-5)


def _loop_circulation(field_, center, axis, radius=4.0, n=2001):
    axis = np.asarray(axis, float) / np.linalg.norm(axis)
    e1 = np.cross(axis, [0.3, 0.5, 0.8])
    e1 /= np.linalg.norm(e1)
    e2 = np.cross(axis, e1)
    t = np.linspace(0, 2 * np.pi, n)
    pts = np.asarray(center, float)[:, None] + radius * (np.cos(t) * e1[:, None] + np.sin(t) * e2[:, None])
    return pts


@pytest.mark.parametrize("kind", ["screw", "edge", "mixed"])
def test_dislocation_circulation_and_phase_winding(kind):
    # Circulation of u around the line is b (Hirth & Lothe, Theory of Dislocations,
    # 2nd ed., 1982, eq. 1-1); the phase φ = −G·u of reflection h then winds by
    # −G·b = −2π h·b with b in lattice coordinates (docs/design.md sign convention);
    # h·b = 0 shows no winding (g·b = 0 invisibility, Williams & Carter,
    # Transmission Electron Microscopy, 2nd ed., 2009, ch. 26).
    cr = Crystal("Pt")
    b_lat = np.array([0.5, -0.5, 0.0])
    line = {"screw": [1, -1, 0], "edge": [1, 1, -2], "mixed": [0, 1, -1]}[kind]
    xi = cr.A @ np.asarray(line, float)
    b = cr.burgers_to_sample(b_lat)
    d = fw.StraightDislocation([3.0, -2.0, 1.0], xi, b, poisson=0.38)
    pts = _loop_circulation(d, [3.0, -2.0, 1.0], xi)
    u = d.displacement(pts)
    du = np.diff(u, axis=1)
    jumps = np.round((b @ du) / (b @ b))
    du -= jumps * b[:, None]
    np.testing.assert_allclose(du.sum(axis=1), b, atol=1e-6)
    for hkl in [(1, 1, 1), (2, 0, 0), (0, 2, 0), (1, 1, -1), (2, 2, 0)]:
        g = cr.g_sample(hkl)
        phase = np.angle(np.exp(-1j * (g @ u)))
        winding = np.sum(np.angle(np.exp(1j * np.diff(phase)))) / (2 * np.pi)
        assert winding == pytest.approx(-np.dot(hkl, b_lat), abs=1e-6)


def test_loop_circulation():
    # Circulation around a loop's line right-handed about its traversal direction is b.
    b = np.array([1.0, -0.5, 2.0])
    loop = fw.DislocationLoop([0, 0, 0], [0, 0, 1], 20.0, b)
    v = loop.vertices()
    mid = 0.5 * (v[0] + v[1])
    xi = v[1] - v[0]
    pts = _loop_circulation(loop, mid, xi, radius=2.0)
    du = np.diff(loop.displacement(pts), axis=1)
    du -= np.round((b @ du) / (b @ b)) * b[:, None]
    np.testing.assert_allclose(du.sum(axis=1), b, atol=1e-6)


def test_analytic_gradients_match_finite_differences():
    coords = np.array([[5.0, -3.0], [2.0, 7.0], [1.0, -4.0]])
    f = fw.InterfaceGradient([0, 0, -1], 10.0, 2e-3, 8.0) + fw.UniformStrain(np.diag([1e-3, -5e-4, 2e-4])) \
        + fw.RigidRotation([0.0, 0.0, 1e-3])
    D = f.gradient(coords)
    h = 1e-4
    for k in range(3):
        e = np.zeros((3, 1))
        e[k] = h
        fd = (f.displacement(coords + e) - f.displacement(coords - e)) / (2 * h)
        np.testing.assert_allclose(D[:, k], fd, atol=1e-9)


def _small_scan(shape, field_, **kw):
    det = Detector(shape=(64, 64), pixel_size=(75e-6, 75e-6), distance=0.5, direct_beam=(32.0, 32.0))
    inst = Diffractometer([Circle("eta", "x+"), Circle("phi", "z-")], [Circle("delta", "x+")], det, 9.0)
    args = dict(rocking_circle="eta", n_frames=32, step_deg=0.03, free_circles=["eta", "phi", "delta"],
                window=(40, 40), background=0.0, hot_pixels=0, peak_counts=1e9, seed=3)
    args.update(kw)
    return fw.simulate_scan(inst, Crystal("Pt"), (1, 1, 1), shape, field_, **args)


def _octahedron_with_dislocation():
    shape = fw.Polyhedron(np.array([[i, j, k] for i in (1, -1) for j in (1, -1) for k in (1, -1)], float),
                          np.full(8, 300.0))
    cr = Crystal("Pt")
    d = fw.StraightDislocation([20.0, -10.0, 5.0], cr.A @ np.array([1.0, -1.0, 0.0]),
                               cr.burgers_to_sample([0.0, 0.5, -0.5]), poisson=0.39, core=1.0)
    return shape, d


def test_moved_or_inverted_specimen_gives_the_same_intensity():
    # A translation multiplies the far field by exp(−i q·t) (Fourier shift
    # theorem; Bracewell, The Fourier Transform and Its Applications, 3rd ed.,
    # 2000, ch. 6) and the twin conj ρ(−r) has the far field conj A(q), so
    # neither changes |A|² (Fienup, Appl. Opt. 21, 2758, 1982, on the twin
    # ambiguity of phase retrieval). Expected counts of 10⁹ make Poisson noise
    # negligible. The moved crystal's soft edges are sampled at other points:
    # measured 2.8 % with 2 sub-samples per voxel edge, 0.4 % with 4 (it
    # converges with the sampling); the inverted one samples the same points
    # (measured 6·10⁻⁵).
    shape, d = _octahedron_with_dislocation()
    ref = _small_scan(shape, d, supersample=4).frames.astype(float)
    for offset, invert, tol in (((37.0, -23.0, 41.0), False, 0.01), ((0.0, 0.0, 0.0), True, 1e-3)):
        moved = _small_scan(fw.PlacedShape(shape, offset, invert), fw.PlacedField(d, offset, invert),
                            supersample=4).frames
        err = np.linalg.norm(moved - ref) / np.linalg.norm(ref)
        assert err < tol, (offset, invert, err)
    # and another crystal (one face moved out by 30 %) does change it (measured
    # 10 %): the check has teeth
    other = fw.PlacedShape(fw.Polyhedron(shape.normals, shape.distances * np.r_[1.3, np.ones(7)]))
    err = np.linalg.norm(_small_scan(other, d, supersample=4).frames - ref) / np.linalg.norm(ref)
    assert err > 0.05


def test_inverted_dislocation_is_the_twin():
    # The twin u′(r) = −u(−r) (docs/design.md) has D′(r) = D(−r), and a circuit
    # right-handed about ξ around the inverted line (through −p) gains −b
    # (Hirth & Lothe, Theory of Dislocations, 2nd ed., 1982, eq. 1-1, applied
    # to u′).
    _, d = _octahedron_with_dislocation()
    tw = fw.PlacedField(d, (0.0, 0.0, 0.0), True)
    r = np.array([[30.0, -60.0], [7.0, 44.0], [-15.0, 20.0]])
    np.testing.assert_allclose(tw.gradient(r), d.gradient(-r), atol=1e-12)
    p = -np.asarray(d.point, float)
    assert np.allclose(fw.place_point(d.point, invert=True), p)
    pts = _loop_circulation(tw, p, d.line)
    du = np.diff(tw.displacement(pts), axis=1)
    b = np.asarray(d.burgers, float)
    du -= np.round((b @ du) / (b @ b)) * b[:, None]
    np.testing.assert_allclose(du.sum(axis=1), -b, atol=1e-6)


def test_a_rocking_circle_about_g_is_refused_before_any_work():
    # The real-space grid conjugate to q ≈ M·n needs M invertible (docs/methods.md);
    # a rocking circle turning about G leaves the frame column of M zero.
    from braggstrain.errors import GeometryError

    M = np.array([[0.0, 1e-3, 0.0], [0.0, 0.0, 1e-3], [0.0, 2e-4, 1e-4]])
    with pytest.raises(GeometryError, match="rocking circle"):
        fw.detector_frame_grid(M, (32, 32, 32))
    ok = np.diag([1e-3, 2e-3, 3e-3])
    np.testing.assert_allclose(fw.detector_frame_grid(ok, (32, 32, 32)) @ ok.T, 2 * np.pi / 32 * np.eye(3), atol=1e-12)
