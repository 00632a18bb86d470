"""The spread of one reflection's reconstructions as a gradient covariance
(braggstrain.strain.spread)."""

import numpy as np
import pytest

from braggstrain.errors import InputError
from braggstrain.strain.spread import reconstruction_covariance

H = 40.0  # Å
SHAPE = (24, 24, 24)
S = 0.02  # rad: the replicas' phase noise per voxel
# the central difference (φ(r+h) − φ(r−h))/(2h) of independent noise S has
# variance 2S²/(2h)² (the variance of a difference of independent variables is
# the sum of theirs; Bevington & Robinson, Data Reduction and Error Analysis,
# 3rd ed., 2003, eq. 3.13, from memory), and no covariance between axes
NOISE = 2 * S**2 / (2 * H) ** 2
INNER = np.zeros(SHAPE, bool)
INNER[5:-5, 5:-5, 5:-5] = True
OFFSET = np.array([2e-4, -1e-4, 3e-4])  # rad/Å


def _case(offset):
    """A smooth object; the reconstruction carries a constant gradient offset
    (rad/Å per axis) relative to the baseline."""
    x = np.indices(SHAPE).astype(float) * H
    phase = 0.3 * np.sin(x[0] / 300.0) + 0.2 * np.cos(x[2] / 250.0)
    support = np.zeros(SHAPE, bool)
    support[3:-3, 3:-3, 3:-3] = True
    base = np.where(support, np.exp(1j * phase), 0).astype(np.complex64)
    recon = (base * np.exp(1j * np.tensordot(offset, x, axes=1))).astype(np.complex64)
    return support, base, recon


def _replicas(rng, base, n=40, s=S):
    return [(base * np.exp(1j * rng.normal(0, s, SHAPE))).astype(np.complex64) for _ in range(n)]


# quiet replicas (phase noise S/10): their gradient variance is a small part of |δ|²
QUIET = NOISE / 100
# the share of δδᵀ the replicas' spread does not explain, f = 1 − 3·QUIET/|δ|² (0.973)
F_QUIET = 1 - 3 * QUIET / np.sum(OFFSET ** 2)


def test_replicas_and_the_offset_from_the_baseline():
    # C = C_replicas + f δδᵀ, δ the constant gradient offset of the reconstruction,
    # f = max(0, 1 − ⟨tr C_replicas⟩/⟨|δ|²⟩) (method of moments, DerSimonian & Laird 1986)
    rng = np.random.default_rng(3)
    support, base, recon = _case(OFFSET)
    C, parts = reconstruction_covariance(recon, H, support, replicas=_replicas(rng, base, s=S / 10),
                                         baseline=base)
    for a in range(3):
        for b in range(3):
            want = F_QUIET * OFFSET[a] * OFFSET[b] + (QUIET if a == b else 0.0)
            got = float(np.mean(C[a, b][INNER]))
            # 40 replicas over 2744 voxels: measured within 1.2 % of the noise variance
            assert got == pytest.approx(want, rel=0.05, abs=0.05 * QUIET), (a, b, got, want)
    assert any("Poisson replicas" in p and "offset" in p for p in parts)
    # replicas that scatter more than δ (3·NOISE = 2.7 |δ|²) explain it all: the
    # iterations' own wander moves the baseline as it moves every replica (f = 0)
    C, _ = reconstruction_covariance(recon, H, support, replicas=_replicas(rng, base), baseline=base)
    for a in range(3):
        assert float(np.mean(C[a, a][INNER])) == pytest.approx(NOISE, rel=0.05), a


def test_the_offset_counts_only_beyond_the_runs_spread():
    # The kept runs' spread C_runs/K already sees an offset of their mean that
    # comes from each run stopping short in its own direction; only the
    # excess f = max(0, 1 − ⟨tr C_runs/K + tr C_replicas⟩/⟨|δ|²⟩) of δδᵀ is added
    # (method of moments, DerSimonian & Laird 1986). Identical runs explain
    # nothing (f as with the replicas alone); runs whose spread exceeds the
    # offset explain it all (f = 0).
    rng = np.random.default_rng(6)
    support, base, recon = _case(OFFSET)
    reps = _replicas(rng, base, s=S / 10)
    same, _ = reconstruction_covariance(recon, H, support, runs=[recon, recon], replicas=reps, baseline=base)
    assert float(np.mean(same[2, 2][INNER])) == pytest.approx(F_QUIET * OFFSET[2] ** 2 + QUIET, rel=0.05)
    wide = [(recon * np.exp(1j * rng.normal(0, 0.2, SHAPE))).astype(np.complex64) for _ in range(2)]
    # the runs' spread (variance of the mean of K = 2) dwarfs |δ|²
    assert np.mean(np.trace(_cov(wide))[INNER]) / 2 > 10 * np.sum(OFFSET ** 2)
    C, _ = reconstruction_covariance(recon, H, support, runs=wide, replicas=reps, baseline=base)
    no_dd, _ = reconstruction_covariance(recon, H, support, runs=wide, replicas=reps, baseline=recon)
    np.testing.assert_allclose(C[:, :, INNER], no_dd[:, :, INNER], rtol=1e-6)


def _cov(samples):
    from braggstrain.strain.fields import phase_gradient_covariance

    support = np.abs(samples[0]) > 0
    return phase_gradient_covariance(samples, H, support)


def test_runs_enter_as_the_variance_of_their_mean():
    # C_runs/K: the variance of the mean of K observations (JCGM 100:2008, §4.2.3)
    rng = np.random.default_rng(4)
    support, base, _ = _case(np.zeros(3))
    runs = _replicas(rng, base, 30)
    C, parts = reconstruction_covariance(base, H, support, runs=runs)
    for a in range(3):
        assert float(np.mean(C[a, a][INNER])) == pytest.approx(NOISE / len(runs), rel=0.05)
    assert parts == ["the spread of the 30 kept random starts (variance of their mean)"]


def test_nothing_to_estimate_from_gives_none_and_replicas_need_a_baseline():
    rng = np.random.default_rng(5)
    support, base, recon = _case(np.zeros(3))
    assert reconstruction_covariance(recon, H, support, runs=[base]) == (None, [])
    with pytest.raises(InputError, match="baseline"):
        reconstruction_covariance(recon, H, support, replicas=[base, base])
