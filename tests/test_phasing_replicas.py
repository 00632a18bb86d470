"""Poisson replicas phased from the converged object (braggstrain.phasing.replicas).

The object is the test crystal of test_phasing_helpers (32³), its exact
intensity scaled to a peak count; replicas start from the true object.
"""

import numpy as np
import pytest

from braggstrain.errors import InputError
from braggstrain.phasing.replicas import poisson_replicas

from test_phasing_helpers import clean_intensity, crystal

N = 32


def _spread(counts):
    obj = crystal(N)
    clean = clean_intensity(N)
    scale = counts / clean.max()
    intensity = clean * scale
    obj = obj * np.float32(np.sqrt(scale))
    support = np.abs(obj) > 0.1 * np.abs(obj).max()
    rs = poisson_replicas(intensity, None, obj, support, replicas=4, iterations=60, seed=3, raar_fraction=0.0)
    inner = np.abs(obj) > 0.5 * np.abs(obj).max()
    dphi = np.angle(rs.replicas * np.conj(rs.baseline)[None])
    dphi -= np.mean(dphi[:, inner], axis=1).reshape(-1, 1, 1, 1)  # the global phase is free
    return rs, float(np.sqrt(np.mean(dphi[:, inner] ** 2)))


def test_replica_spread_scales_as_poisson_noise():
    # Poisson counts have variance equal to their mean (Bevington & Robinson,
    # Data Reduction and Error Analysis, 3rd ed., 2003, §2.2), so the relative
    # amplitude noise, and the phase noise it causes, falls as 1/√counts:
    # 100 times the counts, a tenth of the phase spread. ER alone from the
    # converged object gives the linear response to the counts (with the
    # default RAAR start the spread grows faster at low counts: measured 13×).
    rs_hi, hi = _spread(1e6)
    rs_lo, lo = _spread(1e4)
    assert rs_hi.replicas.shape == (4, N, N, N) and rs_hi.replicas.dtype == np.complex64
    assert 0.0 < hi < lo < 0.5
    assert 6.5 < lo / hi < 15.0, lo / hi


def test_replicas_are_reproducible_from_the_seed():
    obj = crystal(N)
    intensity = clean_intensity(N) * (1e4 / clean_intensity(N).max())
    obj = obj * np.float32(np.sqrt(1e4 / clean_intensity(N).max()))
    support = np.abs(obj) > 0.1 * np.abs(obj).max()
    a = poisson_replicas(intensity, None, obj, support, replicas=2, iterations=6, seed=9)
    b = poisson_replicas(intensity, None, obj, support, replicas=2, iterations=6, seed=9)
    np.testing.assert_array_equal(a.replicas, b.replicas)
    assert not np.array_equal(a.replicas[0], a.replicas[1])


def test_replica_counts_come_from_the_model_not_from_the_measured_counts():
    # Parametric bootstrap (Efron & Tibshirani, An Introduction to the
    # Bootstrap, 1993, §6.5, from memory): each replica is a new measurement
    # of the fitted object, so two measurements with the same total give the
    # same replicas (same seed), while their baselines, phased from the
    # measured counts themselves, differ.
    obj = crystal(N)
    scale = 1e4 / clean_intensity(N).max()
    clean = clean_intensity(N) * scale
    obj = obj * np.float32(np.sqrt(scale))
    support = np.abs(obj) > 0.1 * np.abs(obj).max()
    rng = np.random.default_rng(4)
    a_counts = rng.poisson(clean).astype(np.float32)
    b_counts = rng.poisson(clean).astype(np.float32)
    b_counts[N // 2, N // 2, N // 2] += a_counts.sum() - b_counts.sum()  # same total, whole counts
    assert a_counts.sum() == b_counts.sum() and not np.array_equal(a_counts, b_counts)
    a = poisson_replicas(a_counts, None, obj, support, replicas=2, iterations=6, seed=9)
    b = poisson_replicas(b_counts, None, obj, support, replicas=2, iterations=6, seed=9)
    np.testing.assert_allclose(a.replicas, b.replicas, atol=1e-6 * np.abs(a.replicas).max())
    assert not np.allclose(a.baseline, b.baseline)


def test_bad_arguments_name_the_argument():
    obj = crystal(N)
    support = np.abs(obj) > 0
    with pytest.raises(InputError, match="replicas"):
        poisson_replicas(clean_intensity(N), None, obj, support, replicas=1)
    with pytest.raises(InputError, match="support: expected the shape"):
        poisson_replicas(clean_intensity(N), None, obj, support[:-1])


def test_a_replica_phased_with_a_kernel_stays_finite():
    # A Gaussian crystal (its far field falls far below the float32 rounding
    # of the blurred model, about 1e-7 of the peak, at high q) and one stray
    # count per voxel, as a detector background gives: the modulus step
    # against the blurred model must not divide by a model rounded to zero.
    # The check is the bound of a convolution of non-negative terms,
    # (k * I)(q) >= k(0) I(q) (every term of the sum is >= 0), against the
    # reference convolution of scipy.ndimage (wrap mode, as the FFT's).
    import scipy.ndimage

    from braggstrain.phasing.coherence import CoherenceModel, CoherenceSettings
    from braggstrain.phasing.metrics import far_field
    from braggstrain.simulate.forward import gaussian_coherence_kernel

    r = np.indices((N, N, N)) - N // 2
    obj = (np.exp(-(r ** 2).sum(0) / (2 * 3.0 ** 2)) * np.exp(0.3j * r[0])).astype(np.complex64)
    kernel = gaussian_coherence_kernel(0.5, half_width=2)
    clean = np.abs(far_field(obj).astype(np.complex128)) ** 2
    blurred = scipy.ndimage.convolve(clean, kernel, mode="wrap")
    scale = 1e5 / blurred.max()
    rs = poisson_replicas(blurred * scale + 1.0, None, obj * np.float32(np.sqrt(scale)), np.abs(obj) > 1e-2,
                          replicas=2, iterations=12, seed=1, coherence_kernel=kernel)
    assert np.isfinite(rs.baseline).all() and np.isfinite(rs.replicas).all()
    coh = CoherenceModel((N, N, N), CoherenceSettings(half_width=2))
    coh.kernel, coh.is_delta = kernel, False
    model = np.fft.ifftshift(clean * scale).astype(np.float32)
    out = coh.blur(model.copy())
    assert np.all(out >= np.float32(kernel[2, 2, 2]) * model)
    ref = np.fft.ifftshift(blurred * scale)
    assert np.abs(out - ref).max() < 1e-5 * ref.max()
