"""Reconstruction accuracy of `reconstruct` on simulated crystals (48^3).

The truth is the complex object the project's simulator made; the errors are
the amplitude-weighted complex error after alignment (sub-voxel shift by
phase correlation from scikit-image, twin, global phase), with the same
phase-ramp convention applied to the truth.
"""

import numpy as np
import pytest
import scipy.ndimage

from braggstrain.phasing import PhasingStage, complex_error, reconstruct
from braggstrain.phasing.metrics import far_field

from test_phasing_helpers import clean_intensity, crystal, error_to_truth, gap_mask, noisy_intensity, soft_crystal

N = 48


def test_noise_free_default_plan_within_2_percent():
    # Acceptance figure of the phasing issue (2 %); reference: the simulated truth.
    rec = reconstruct(clean_intensity(N), seed=11)
    assert rec.ok, rec.message
    err = error_to_truth(rec.obj, crystal(N), rec.ramp)
    assert err <= 0.02, f"complex error {err:.4f}"
    # the object is centred and the history is filled in
    com = np.array(np.nonzero(rec.support)).mean(axis=1)
    assert np.all(np.abs(com - N // 2) <= 1.5)
    assert rec.history.amplitude_error.size == rec.iterations == 1000
    assert rec.history.amplitude_error[-1] < 1e-3 * rec.history.amplitude_error[0]
    assert np.isfinite(rec.metrics.free_nll) and rec.metrics.support_size == rec.support.sum()


def test_poisson_noise_1e5_counts_within_8_percent():
    # Acceptance figure (8 % at 1e5 peak counts); Poisson counts drawn by numpy.
    counts, scale = noisy_intensity(N, 1e5)
    rec = reconstruct(counts, seed=5)
    assert rec.ok, rec.message
    err = error_to_truth(rec.obj, crystal(N) * np.float32(np.sqrt(scale)), rec.ramp)
    assert err <= 0.08, f"complex error {err:.4f}"
    # Poisson figures: for a model that fits, the free NLL per voxel is close
    # to the constrained one (held-out voxels behave like the others).
    assert abs(rec.metrics.free_nll - rec.metrics.nll) < 0.2 * abs(rec.metrics.nll) + 0.1


def test_partial_coherence_estimates_the_kernel_width():
    # Clark et al., Nat. Commun. 3, 993 (2012): measured intensity = coherent
    # intensity convolved with the coherence function.  The data here are
    # blurred by a known Gaussian (sigma = 1 voxel) with scipy.ndimage
    # (reference library).  A success rate over four random starts (32^3, the
    # issue's 20 % on the widths; measured over seeds 0-5: widths within
    # 0.88-1.12 voxel, complex error 22-39 % against 72-76 % for the coherent
    # model): at least three of four runs estimate the kernel's principal
    # widths within 20 % and end at less than half the coherent run's error.
    n, sigma = 32, 1.0
    blurred = scipy.ndimage.gaussian_filter(clean_intensity(n), sigma, mode="wrap")
    coherent = reconstruct(blurred, seed=0, raise_on_failure=False)
    e_coh = error_to_truth(coherent.obj, crystal(n), coherent.ramp) if coherent.ok else np.inf
    assert coherent.coherence_widths is None
    good = []
    for seed in range(4):
        partial = reconstruct(blurred, seed=seed, coherence=True, raise_on_failure=False)
        if not partial.ok:
            good.append(False)
            continue
        assert partial.coherence_kernel.shape == (9, 9, 9) and partial.coherence_axes.shape == (3, 3)
        assert partial.coherence_kernel.sum() == pytest.approx(1.0)
        e_part = error_to_truth(partial.obj, crystal(n), partial.ramp)
        good.append(bool(np.all(np.abs(partial.coherence_widths / sigma - 1) <= 0.2)
                         and np.all(np.abs(partial.coherence_sigma / sigma - 1) <= 0.2) and e_part < 0.5 * e_coh))
    assert sum(good) >= 3, good


def test_flat_background_is_fitted():
    # Poisson counts of (coherent intensity + b) with a known flat b (numpy's
    # Poisson generator); the maximum-likelihood fit must find b within 10 %
    # and still reconstruct; with b given the error bound is the same.
    counts, scale = noisy_intensity(N, 1e5)
    b = 2.0
    rng = np.random.default_rng(3)
    data = counts + rng.poisson(b, counts.shape)
    rec = reconstruct(data, seed=5, background="fit")
    assert rec.ok, rec.message
    assert rec.metrics.background == pytest.approx(b, rel=0.1)
    err = error_to_truth(rec.obj, crystal(N) * np.float32(np.sqrt(scale)), rec.ramp)
    assert err <= 0.12, f"complex error {err:.4f}"
    given = reconstruct(data, seed=5, background=b)
    e_given = error_to_truth(given.obj, crystal(N) * np.float32(np.sqrt(scale)), given.ramp)
    assert given.metrics.background == b and e_given <= 0.12


def test_masked_gap_is_filled_in():
    # A detector gap (two planes) is left free by the modulus constraint; the
    # reconstruction still matches the truth.
    n = N
    inten = clean_intensity(n).copy()
    mask = np.zeros(inten.shape, bool)
    mask[:, n // 2 + 3:n // 2 + 5, :] = True
    inten[mask] = np.nan  # values in the mask are ignored
    rec = reconstruct(inten, mask, seed=4)
    err = error_to_truth(rec.obj, crystal(n), rec.ramp)
    assert err <= 0.03, f"complex error {err:.4f}"


def test_soft_edge_needs_a_support_that_keeps_it():
    # Noise-free data of a soft-edged crystal (test_phasing_helpers.soft_crystal,
    # 40^3, edge blurred by 0.6 voxel, a two-column gap), started from the
    # truth; reference: the simulated truth, compared with complex_error
    # (alignment by scikit-image phase correlation).  Error reduction never
    # increases the misfit (Fienup, Appl. Opt. 21, 2758 (1982)), so from the
    # truth on a support that holds it, the closing ER must stay at the truth;
    # measured 0.12 %.  Cut at 1 % of the maximum density, the same ER moves
    # the truth to 1.9 % (measured): the soft edge outside a tight final
    # support is enough to keep a reconstruction away from 1 %.
    n = 40
    obj = soft_crystal(n)
    amp = np.abs(obj)
    intensity = np.abs(far_field(obj).astype(np.complex128)) ** 2
    errors = {}
    for fraction in (1e-3, 1e-2):
        support = amp > fraction * amp.max()
        rec = reconstruct(intensity, gap_mask(n), support=support, start=obj * support, seed=0,
                          plan=[PhasingStage("ER", 200, support_update="none")], remove_ramp=False)
        errors[fraction] = complex_error(rec.obj, obj)
    assert errors[1e-3] <= 0.005, errors
    assert errors[1e-2] >= 0.01, errors
