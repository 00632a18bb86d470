"""Checks of braggstrain.strain.fields (one reflection) against analytic fields.

Objects are written directly as ρ = s·exp(−i G·u) (docs/design.md convention),
without phase retrieval, on 48³ grids with a voxel of a few nm.
"""

import numpy as np
import pytest
from scipy import ndimage as ndi

from braggstrain.strain import fields
from braggstrain.simulate import forward as fw
from braggstrain.errors import InputError
from braggstrain.strain.objects import SampleObject

N = 48
H = 40.0  # Å


@pytest.fixture(scope="module")
def grid():
    coords = fw.grid_coordinates((N,) * 3, H)
    support = fw.ellipsoid((N,) * 3, H, (20 * H, 18 * H, 17 * H))
    return coords, support


def _obj(support, phase):
    return (support * np.exp(1j * phase)).astype(np.complex64)


def test_linear_phase_gradient_is_exact_and_wrap_free(grid):
    # Central and one-sided differences are exact for a linear function
    # (Taylor's theorem; Abramowitz & Stegun, Handbook of Mathematical
    # Functions, 1964, §25.3, from memory). The ramp wraps many times over
    # the crystal and carries a constant offset; neither may matter.
    coords, support = grid
    q = np.array([0.021, -0.013, 0.034])  # rad/Å, up to 1.4 rad per voxel
    phase = np.tensordot(q, coords, axes=1) + 2.5
    assert np.ptp(phase[support]) > 6 * np.pi
    grad = fields.phase_gradient(_obj(support, phase), H, support)
    assert grad.dtype == np.float32 and grad.shape == (3,) + support.shape
    for k in range(3):
        # NaN only for voxels with neither neighbour along k in the support
        alone = support & ~np.roll(support, 1, k) & ~np.roll(support, -1, k)
        np.testing.assert_array_equal(np.isnan(grad[k]) & support, alone)
        np.testing.assert_allclose(grad[k][support & ~alone], q[k], atol=2e-6)
    assert np.all(np.isnan(grad[:, ~support]))


def test_phase_gradient_matches_numpy_gradient_in_the_interior(grid):
    # Reference library: numpy.gradient uses the same second-order central
    # difference in the interior, here on the (unwrapped) analytic phase.
    coords, support = grid
    x, y, z = coords / 1000.0
    phase = 3.0 * np.sin(x + 0.5 * y) + 2.0 * x * z - y**2
    grad = fields.phase_gradient(_obj(support, phase), H, support)
    ref = np.gradient(phase, H, H, H)
    inner = ndi.binary_erosion(support)
    for k in range(3):
        np.testing.assert_allclose(grad[k][inner], ref[k][inner], atol=2e-6)


def test_fourth_order_is_exact_for_a_quartic_phase(grid):
    # The five-point central difference is exact for polynomials up to
    # degree 4 (Abramowitz & Stegun 1964, eq. 25.3.6, from memory); where a
    # two-voxel neighbour is missing the code falls back to second order.
    coords, support = grid
    x = coords[0] / 1000.0
    phase = 0.7 * x**4 - 1.1 * x**3 + 0.4 * x**2 + 2.0 * x
    exact = (2.8 * x**3 - 3.3 * x**2 + 0.8 * x + 2.0) / 1000.0
    g4 = fields.phase_gradient(_obj(support, phase), H, support, order=4)
    g2 = fields.phase_gradient(_obj(support, phase), H, support, order=2)
    deep = ndi.binary_erosion(support, iterations=2)
    err4 = np.abs(g4[0] - exact)[deep]
    err2 = np.abs(g2[0] - exact)[deep]
    assert err4.max() < 1e-8
    assert err2.max() > 100 * err4.max()


def test_smoothing_is_an_amplitude_weighted_mean(grid):
    # Averaging ρ(r+e)ρ*(r−e) before taking its argument leaves a uniform
    # gradient unchanged (the mean of a constant), whatever the amplitudes.
    coords, support = grid
    q = np.array([0.01, 0.002, -0.004])
    amp = support * (1.0 + 0.5 * np.cos(coords[1] / 300.0))
    obj = (amp * np.exp(1j * np.tensordot(q, coords, axes=1))).astype(np.complex64)
    grad = fields.phase_gradient(obj, H, support, smooth=1.5)
    inner = ndi.binary_erosion(support)
    for k in range(3):
        np.testing.assert_allclose(grad[k][inner], q[k], atol=1e-6)


def test_displacement_along_g_uniform_strain_and_ramp(grid, pt):
    # u_G = ĝ·u with u = D·r (analytic), from ρ = s·exp(−i G·u): docs/design.md
    # gives u_G = −φ/|G|. The reference voxel sits at u_G = 0.
    coords, support = grid
    g = pt.g_sample((2, 0, 0))
    D = 3 * np.array([[2e-3, 5e-4, 0], [-5e-4, -1e-3, 3e-4], [0, 1e-4, 1.5e-3]])
    u = fw.UniformStrain(D).displacement(coords)
    obj = fw.complex_object(support, u, g) * np.exp(1j * 1.3)
    assert np.ptp(np.tensordot(g, u, axes=1)[support]) > 6 * np.pi  # wraps
    ref = fields.reference_voxel(obj, support)
    ug = fields.displacement_along_g(obj, g, H, support)
    gh = g / np.linalg.norm(g)
    expect = np.tensordot(gh, u - u[(slice(None),) + ref][:, None, None, None], axes=1)
    np.testing.assert_allclose(ug[support], expect[support], atol=1e-4)
    assert ug[ref] == 0.0 and np.all(np.isnan(ug[~support]))
    # removing the ramp takes away the whole uniform field
    flat = fields.displacement_along_g(obj, g, H, support, remove_ramp=True)
    assert np.nanmax(np.abs(flat)) < 1e-3


def test_reference_voxel_is_centre_of_mass(grid):
    coords, _ = grid
    s = fw.ellipsoid((N,) * 3, H, (8 * H, 6 * H, 5 * H), center=(5 * H, -3 * H, 2 * H))
    assert fields.reference_voxel(s.astype(np.complex64), s) == (N // 2 + 5, N // 2 - 3, N // 2 + 2)


def test_disconnected_part_is_nan(grid):
    # A second, separate blob has an unknown 2π offset after unwrapping.
    coords, support = grid
    main = fw.ellipsoid((N,) * 3, H, (14 * H, 12 * H, 12 * H), center=(-5 * H, 0, 0))
    blob = fw.ellipsoid((N,) * 3, H, (3 * H,) * 3, center=(17 * H, 0, 0))
    s = main | blob
    phase = 0.02 * coords[0]
    ph, ref = fields.unwrapped_phase(_obj(s, phase), s)
    assert main[ref]
    assert np.all(np.isnan(ph[blob])) and np.all(np.isfinite(ph[main]))
    np.testing.assert_allclose(ph[main], (phase - phase[ref])[main], atol=1e-5)


def test_strain_along_g_is_the_projected_tensor(pt, grid):
    # ε_GG = ĝᵀ ε ĝ (tensor transformation; Nye, Physical Properties of
    # Crystals, 1957, ch. 2, from memory) and ∂u_G/∂t = ĝᵀ D t.
    coords, support = grid
    D = np.array([[1e-3, 4e-4, -2e-4], [1e-4, -6e-4, 3e-4], [2e-4, -1e-4, 8e-4]])
    for hkl in [(1, 1, 1), (0, 0, 2), (-1, 1, 1)]:
        g = pt.g_sample(hkl)
        obj = fw.complex_object(support, fw.UniformStrain(D).displacement(coords), g)
        rf = fields.reflection_field(SampleObject(obj, H, g, support, hkl=hkl))
        gh = g / np.linalg.norm(g)
        t = rf.across_directions
        np.testing.assert_allclose(t @ gh, 0, atol=1e-12)
        np.testing.assert_allclose(np.linalg.det(np.vstack([gh, t])), 1.0, atol=1e-12)
        m = rf.trusted
        np.testing.assert_allclose(rf.strain[m], gh @ D @ gh, atol=1e-8)
        np.testing.assert_allclose(rf.across[0][m], gh @ D @ t[0], atol=1e-8)
        np.testing.assert_allclose(rf.across[1][m], gh @ D @ t[1], atol=1e-8)


def test_strain_along_g_interface_gradient(pt, grid):
    # Smooth interface field of the simulator vs its analytic gradient, away
    # from the one-voxel surface shell: measured 2.4e-6 RMS (the central
    # difference's h² error); 2e-5 leaves a margin of about 8.
    coords, support = grid
    f = fw.InterfaceGradient([0.3, 0.1, -1.0], 600.0, 3e-3, 250.0)
    g = pt.g_sample((1, 1, 1))
    obj = fw.complex_object(support, f.displacement(coords), g)
    rf = fields.reflection_field(obj, g, H, support)
    gh = g / np.linalg.norm(g)
    expect = np.einsum("i,ik...,k->...", gh, f.gradient(coords), gh)
    m = rf.trusted
    rms = np.sqrt(np.mean((rf.strain[m] - expect[m]) ** 2))
    assert rms < 2e-5
    assert np.abs(expect[m]).max() > 1e-3  # the field is not trivially small


def test_trusted_for_gradients_erodes_and_thresholds(grid):
    coords, support = grid
    amp = support.astype(float)
    low = support & (coords[0] > 10 * H)
    amp[low] = 0.1
    obj = amp.astype(np.complex64)
    t = fields.trusted_for_gradients(obj, support, amplitude_threshold=0.3)
    assert not t[low].any()
    assert not (t & ~ndi.binary_erosion(support)).any()
    assert t[N // 2, N // 2, N // 2]
    # a bright voxel whose central difference reads a dim neighbour is not trusted; one voxel further is
    c = N // 2
    i0 = int(np.argmax(low[:, c, c]))
    assert support[i0 - 2:i0, c, c].all() and not low[i0 - 1, c, c]
    assert not t[i0 - 1, c, c] and t[i0 - 2, c, c]
    # an amplitude array gives the same; threshold 0 leaves the eroded support
    np.testing.assert_array_equal(fields.trusted_for_gradients(amp, support, amplitude_threshold=0.3), t)
    np.testing.assert_array_equal(fields.trusted_for_gradients(amp, support, amplitude_threshold=0.0),
                                  ndi.binary_erosion(support))


def test_trusted_for_windings_dilates_and_thresholds(grid):
    coords, support = grid
    amp = np.where(support, 1.0, 0.5)  # the surroundings are dim, not dark
    amp[support & (coords[0] > 10 * H)] = 0.05
    obj = amp.astype(np.complex64)
    t = fields.trusted_for_windings(obj, support, amplitude_threshold=0.1, dilation=2)
    assert not (t & ~ndi.binary_dilation(support, iterations=2)).any()
    assert (t & ~support).any()  # reaches past the surface
    assert not t[support & (coords[0] > 10 * H)].any()


@pytest.mark.parametrize("bad, match", [
    (np.zeros((8, 8)), "3-D"),
    (np.ones((8, 8, 8)), "complex"),
])
def test_bad_objects(bad, match):
    with pytest.raises(InputError, match=match):
        fields.phase_gradient(bad, 10.0)


def test_bad_arguments(grid):
    _, support = grid
    obj = support.astype(np.complex64)
    with pytest.raises(InputError, match="support"):
        fields.phase_gradient(obj, H, support[:-1])
    with pytest.raises(InputError, match="voxel_size"):
        fields.phase_gradient(obj, -1.0, support)
    with pytest.raises(InputError, match="order"):
        fields.phase_gradient(obj, H, support, order=3)
    with pytest.raises(InputError, match="g_vector"):
        fields.displacement_along_g(obj, [1.0, 0.0], H, support)
    with pytest.raises(InputError, match="reference"):
        fields.unwrapped_phase(obj, support, reference=(0, 0, 0))
