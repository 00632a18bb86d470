"""Test data for the phasing tests, made by the project's simulator.

The crystal is an invented one: a truncated octahedron (supersampled, so its
facets have partial-voxel density) with a smooth, asymmetric displacement
along z giving a phase that spans about 2.3 rad, seen at a reflection with
d = 2 Å.  The intensity layout is the one `reconstruct` expects: the Bragg
peak at index n//2 (braggstrain.phasing.metrics.far_field).
"""

from functools import lru_cache

import numpy as np

from braggstrain.phasing.metrics import far_field
from braggstrain.simulate import forward


@lru_cache(maxsize=None)
def crystal(n=48):
    """Complex object (complex64, centred at n//2) of the test crystal on an n^3 grid."""
    shape = (n, n, n)
    vs = 10.0  # Å
    density = forward.truncated_octahedron(shape, vs, size=0.5 * n * vs, truncation=0.7,
                                           supersample=2)
    r = forward.grid_coordinates(shape, vs)
    length = n * vs / 4
    uz = (1.2 * np.exp(-((r[0] - 0.3 * length) ** 2 + (r[1] + 0.2 * length) ** 2 + r[2] ** 2)
                       / (2 * (0.8 * length) ** 2))
          + 0.3 * (r[0] / length) ** 2)
    u = np.zeros((3,) + shape)
    u[2] = uz
    return forward.complex_object(density, u, (0.0, 0.0, 2 * np.pi / 2.0))


@lru_cache(maxsize=None)
def soft_crystal(n=40, edge=0.6):
    """A soft-edged crystal (complex64, centred at n//2): a rotated truncated
    octahedron 0.4 of the array across (oversampling about 3.5) with one flat
    facet, its density blurred by a Gaussian of ``edge`` voxels (the soft edge
    that resolution gives every real crystal), and a smooth displacement whose
    phase spans about 3 rad inside it (d = 2 Å)."""
    import scipy.ndimage

    from braggstrain.geometry.rotation import rotation_from_rotvec

    shape = (n, n, n)
    vs = 10.0  # Å
    size = 0.4 * n * vs
    density = forward.truncated_octahedron(shape, vs, size=size, truncation=0.7, supersample=2,
                                           flat=((0.3, -0.5, 0.8), 0.3 * size),
                                           rotation=rotation_from_rotvec(np.array([0.3, -0.2, 0.45])))
    density = scipy.ndimage.gaussian_filter(density.astype(np.float64), edge)
    r = forward.grid_coordinates(shape, vs)
    half = size / 2
    u = np.zeros((3,) + shape)
    u[2] = (1.0 * np.exp(-((r[0] - 0.3 * half) ** 2 + (r[1] + 0.2 * half) ** 2 + r[2] ** 2)
                         / (2 * (0.8 * half) ** 2))
            + 0.15 * (r[0] / half) * (r[1] / half))
    return forward.complex_object(density, u, (0.0, 0.0, 2 * np.pi / 2.0)).astype(np.complex64)


def gap_mask(n):
    """Two masked detector columns, 3 and 4 voxels from the peak along axis 2."""
    mask = np.zeros((n, n, n), bool)
    mask[:, :, n // 2 + 3:n // 2 + 5] = True
    return mask


@lru_cache(maxsize=None)
def clean_intensity(n=48):
    """Noise-free intensity |far field|^2 (float64) of :func:`crystal`."""
    return np.abs(far_field(crystal(n)).astype(np.complex128)) ** 2


@lru_cache(maxsize=None)
def noisy_intensity(n=48, peak=1e5, seed=7):
    """Poisson counts with ``peak`` expected counts at the maximum, and their scale."""
    clean = clean_intensity(n)
    scale = peak / clean.max()
    counts = np.random.default_rng(seed).poisson(clean * scale).astype(np.float64)
    return counts, scale


def error_to_truth(rec_obj, truth, ramp):
    """Complex error of a reconstruction against the truth given the same ramp removal."""
    from braggstrain.phasing import complex_error
    from braggstrain.phasing.metrics import remove_phase_ramp

    return complex_error(rec_obj, remove_phase_ramp(truth, ramp))


def test_helper_layout_matches_reconstruct_contract():
    # The contract of reconstruct: intensity = |fftshift(fftn(ifftshift(obj)))|^2
    # (numpy.fft as the reference library).
    obj = crystal(32)
    ref = np.abs(np.fft.fftshift(np.fft.fftn(np.fft.ifftshift(obj.astype(np.complex128))))) ** 2
    np.testing.assert_allclose(clean_intensity(32), ref, rtol=1e-4, atol=1e-6 * ref.max())
    assert np.unravel_index(np.argmax(ref), ref.shape) == (16, 16, 16) or ref[16, 16, 16] > 0.5 * ref.max()
