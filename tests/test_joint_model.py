"""The joint forward model: the non-uniform far field at exact scattering
vectors, its adjoint, and the grids it is evaluated on."""

import numpy as np
import pytest

from braggstrain.joint.model import (FarField, MeasuredVoxels, direct_far_field, fine_grid, interpolation_matrix,
                                     subdivision)
from braggstrain.strain.grid import Grid
from braggstrain.errors import InputError


def _object(shape, seed=0):
    rng = np.random.default_rng(seed)
    obj = np.zeros(shape, complex)
    sl = tuple(slice(n // 4, n - n // 4) for n in shape)
    sub = obj[sl].shape
    obj[sl] = rng.uniform(0.5, 1.0, sub) * np.exp(1j * rng.uniform(-np.pi, np.pi, sub))
    return obj


def test_far_field_equals_the_direct_sum_at_arbitrary_q():
    # Reference: the definition A(q) = Σ_r ρ(r) exp(−i q·r) summed directly
    # (docs/design.md's sign convention). Points reach twice the grid's
    # Nyquist band, where the discrete sum is periodic and finufft folds them.
    # finufft's eps is a relative l2 error (its documentation, from memory);
    # measured here: 3e-7 at eps = 1e-6.
    grid = Grid((14, 16, 12), (5.0, 6.0, 7.0), (30.0, -20.0, 12.0))
    obj = _object(grid.shape)
    q = np.random.default_rng(1).uniform(-1, 1, (3, 600)) * (2 * np.pi / grid.voxel_size)[:, None]
    a = FarField(grid, q).forward(obj)
    b = direct_far_field(obj, grid, q)
    assert np.linalg.norm(a - b) / np.linalg.norm(b) < 1e-5


def test_far_field_on_the_dft_grid_is_numpys_centred_fft():
    # Reference: numpy.fft, A(k) = fftshift(fftn(ifftshift(ρ))) at
    # q = 2π k/(N d), with the object centred at n//2 (docs/design.md).
    grid = Grid((12, 10, 9), (4.0, 5.0, 6.0))
    obj = _object(grid.shape, seed=2)
    k = np.meshgrid(*[np.arange(n) - n // 2 for n in grid.shape], indexing="ij")
    q = np.stack([2 * np.pi * k[i].ravel() / (grid.shape[i] * grid.voxel_size[i]) for i in range(3)])
    a = FarField(grid, q).forward(obj).reshape(grid.shape)
    ref = np.fft.fftshift(np.fft.fftn(np.fft.ifftshift(obj)))
    assert np.linalg.norm(a - ref) / np.linalg.norm(ref) < 1e-5


def test_adjoint_is_the_adjoint():
    # Definition of the adjoint: <c, F x> = <Fᴴ c, x> (to finufft's precision).
    rng = np.random.default_rng(3)
    grid = Grid((10, 12, 8), (3.0, 3.0, 4.0), (5.0, 0.0, -3.0))
    q = rng.uniform(-1, 1, (3, 400))
    F = FarField(grid, q)
    x = rng.normal(size=grid.shape) + 1j * rng.normal(size=grid.shape)
    c = rng.normal(size=400) + 1j * rng.normal(size=400)
    lhs, rhs = np.vdot(c, F.forward(x)), np.vdot(F.adjoint(c), x)
    assert abs(lhs - rhs) / abs(lhs) < 1e-5


def _instrument():
    from braggstrain.geometry.crystal import Crystal
    from braggstrain.geometry.instrument import Circle, Detector, Diffractometer

    # Invented geometry: a short detector distance makes the pixel Q curve.
    det = Detector(shape=(200, 200), pixel_size=(75e-6, 75e-6), distance=0.25, direct_beam=(100, 100))
    ins = Diffractometer([Circle("eta", "x+"), Circle("phi", "z+")], [Circle("nu", "z+"), Circle("delta", "x+")],
                         det, 9.0)
    cr = Crystal("Pt").oriented_by((1, 1, 1), (0, 0, 1), (1, -1, 0), (1, 0, 0))
    g = cr.g_sample((1, 1, 1))
    ang = ins.solve_bragg(g, free=["eta", "delta", "nu"], fixed={"phi": 0.0}, starts=4)
    return ins, g, ang


def test_exact_q_beats_the_linear_map_against_the_direct_sum():
    # Reference: a direct sum over a small crystal at the instrument's own
    # per-pixel Q (xrayutilities' conversion). The model at the exact Q
    # matches it to finufft's precision; the linear map's q (what phasing in
    # the detector frame assumes) misses it by far more at the crop's edge.
    ins, g, ang = _instrument()
    step = np.degrees(1.2e-3 / np.linalg.norm(g))
    M, q_c, R = ins.linear_map(ang, "eta", step, (100, 100))
    frames = np.arange(-12, 13, 3)
    a = dict(ang)
    a["eta"] = ang["eta"] + step * frames
    Q = ins.pixel_q(a, frame="sample", roi=(70, 131, 70, 131))[:, :, ::4, ::4]  # (3, F, R, C)
    n = np.meshgrid(frames, np.arange(70, 131, 4) - 100, np.arange(70, 131, 4) - 100, indexing="ij")
    q_lin = R.T @ (q_c[:, None] + M @ np.stack([v.ravel() for v in n]))
    q_exact = Q.reshape(3, -1)
    grid = Grid((20, 20, 20), 40.0)
    obj = _object(grid.shape, seed=4)
    ref = direct_far_field(obj, grid, q_exact - g[:, None])
    exact = FarField(grid, q_exact - g[:, None]).forward(obj)
    linear = FarField(grid, q_lin - g[:, None]).forward(obj)
    err_exact = np.linalg.norm(exact - ref) / np.linalg.norm(ref)
    err_linear = np.linalg.norm(linear - ref) / np.linalg.norm(ref)
    assert err_exact < 1e-5
    assert err_linear > 100 * err_exact


def test_subdivision_puts_every_q_inside_the_nyquist_band():
    grid = Grid((8, 8, 8), (10.0, 12.0, 9.0))
    q = np.array([[0.5, -0.1], [0.2, 0.3], [-0.05, 0.0]])
    m = subdivision(grid, [q])
    fine = fine_grid(grid, m)
    assert np.all(np.abs(q).max(axis=1) * fine.voxel_size <= np.pi)
    assert np.all(np.abs(q).max(axis=1) * fine.voxel_size * m > np.pi * (m > 1))


def test_fine_grid_blocks_are_centred_on_the_coarse_voxels_and_interpolation_is_exact_for_linear_fields():
    grid = Grid((6, 7, 5), (10.0, 8.0, 12.0), (3.0, -2.0, 1.0))
    fine = fine_grid(grid, (2, 3, 1))
    fx = [fine.axis(k).reshape(grid.shape[k], -1).mean(axis=1) for k in range(3)]
    for k in range(3):
        np.testing.assert_allclose(fx[k], grid.axis(k), atol=1e-12)
    # trilinear interpolation reproduces a linear field between voxel centres
    X = grid.coordinates()
    f = 2.0 * X[0] - 0.5 * X[1] + 0.25 * X[2] + 1.0
    P = interpolation_matrix(grid, fine)
    Y = fine.coordinates()
    inside = np.ones(fine.shape, bool)
    for k in range(3):
        ax = fine.axis(k)
        ok = (ax >= grid.axis(k)[0]) & (ax <= grid.axis(k)[-1])
        sh = [1, 1, 1]
        sh[k] = -1
        inside &= ok.reshape(sh)
    got = (P @ f.ravel()).reshape(fine.shape)
    want = 2.0 * Y[0] - 0.5 * Y[1] + 0.25 * Y[2] + 1.0
    np.testing.assert_allclose(got[inside], want[inside], rtol=1e-10)


def test_measured_voxels_refuse_bad_input_with_the_field_named():
    with pytest.raises(InputError, match="q_sample"):
        MeasuredVoxels(counts=np.ones(4), q_sample=np.zeros((3, 5)), g_vector=[1, 0, 0], name="r0")
    with pytest.raises(InputError, match="counts"):
        MeasuredVoxels(counts=-np.ones(4), q_sample=np.zeros((3, 4)), g_vector=[1, 0, 0], name="r0")
