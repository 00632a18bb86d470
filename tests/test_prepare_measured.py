"""Tests of braggstrain.prepare.measured: monitor normalisation, read-back
rocking angles, repeated scans.

References: the Poisson thinning property (keeping each count of a
Poisson(λ) variable with probability p gives Poisson(pλ); Kingman, Poisson
Processes, 1993, ch. 5, from memory) makes a halved beam exactly; numpy's
least-squares polyfit is the reference line of the rocking angles; the
scenes come from the project's simulator.
"""

import warnings
from dataclasses import replace

import numpy as np
import pytest
from scipy import ndimage

from braggstrain.errors import ScanFileError
from braggstrain.phasing import PhasingStage, reconstruct
from braggstrain.prepare import scan as pr
from braggstrain.prepare.measured import fit_rocking_step, monitor_scale, sum_repeats

from conftest import simulated_cube


def _prepare(scan, **kw):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return pr.prepare_scan(scan, **{"crop": (48, 64, 64), **kw})


def test_monitor_scale_and_bad_values():
    s, bad = monitor_scale([2.0, 4.0, 0.0, 6.0], 4, warn=False)
    np.testing.assert_allclose(s, [0.5, 1.0, 1.0, 1.5])  # monitor / mean of the positive values
    assert bad == [2]
    with pytest.warns(UserWarning, match=r"run\.h5: field 'monitor': zero or negative monitor in frame\(s\) \[1\]"):
        monitor_scale([1.0, -1.0, 1.0], 3, source="run.h5")
    with pytest.raises(ScanFileError, match="monitor of 3 values; expected 4"):
        monitor_scale([1.0, 1.0, 1.0], 4)


def test_a_halved_monitor_is_undone():
    scan, _ = simulated_cube(1e5, seed=11)
    F = scan.frames.shape[0]
    rng = np.random.default_rng(3)
    keep = np.where(np.arange(F) < F // 2, 1.0, 0.5)  # the beam halves half-way through
    halved = rng.binomial(scan.frames, keep[:, None, None]).astype(np.uint32)  # Poisson(λ·keep), exactly
    # the same block for all, no background removed, so the prepared counts are the scaled counts
    opts = dict(crop=(32, 64, 64), center=(F // 2, 75, 85), background=None)
    ref = _prepare(scan, **opts)
    corrected = _prepare(replace(scan, frames=halved, monitor=1e6 * keep), **opts)
    raw = _prepare(replace(scan, frames=halved), **opts)
    # counts per mean monitor (0.75 of the full beam): the first half is 0.75 × the full-beam counts
    np.testing.assert_allclose(corrected.options["monitor_scale"], keep / 0.75)
    h = F // 2 - int(ref.crop[0][0])
    np.testing.assert_allclose(corrected.intensity[:h], 0.75 * ref.intensity[:h], rtol=1e-6, atol=1e-4)
    # the second half: 1.5 × Binomial(n, ½) against 0.75 n, equal in mean; the difference
    # 0.75 (2B − n) has variance 0.5625 n, so χ² per voxel ≈ 1 and the total within √(2/n)
    n_ref = 0.75 * ref.intensity[h:].sum(dtype=np.float64)
    n_cor = corrected.intensity[h:].sum(dtype=np.float64)
    assert abs(n_cor / n_ref - 1) < 5 * np.sqrt(2 / n_ref)
    n = ref.intensity[h:].astype(np.float64)
    d = corrected.intensity[h:] - 0.75 * n
    chi2 = np.mean(d[n > 0] ** 2 / (0.5625 * n[n > 0]))  # given n, exactly variance 0.5625 n
    assert 0.7 < chi2 < 1.3
    # without the monitor, the second half is half as bright as the first's level
    assert abs(raw.intensity[h:].sum(dtype=np.float64) / ref.intensity[h:].sum() - 0.5) < 0.01


def test_rocking_jitter_accepted_and_refused():
    rng = np.random.default_rng(0)
    step = 0.01
    nominal = 20.0 + step * np.arange(64)
    jitter = rng.uniform(-0.08, 0.08, 64) * step  # up to 8 % of the step
    s, dev = fit_rocking_step(nominal + jitter)
    ref = np.polyfit(np.arange(64), nominal + jitter, 1)
    assert s == pytest.approx(ref[0], rel=1e-12) and abs(s - step) < 0.01 * step
    np.testing.assert_allclose(dev, nominal + jitter - np.polyval(ref, np.arange(64)), atol=1e-12)
    bad = nominal.copy()
    bad[[5, 40]] += 0.2 * step
    with pytest.raises(ScanFileError, match=r"scan\.h5: field 'eta'.*frame\(s\) 5 \(\+0\.00.*40 \(\+0\.00"):
        fit_rocking_step(bad, source="scan.h5", field="eta")


def test_jittered_scan_prepares_and_the_orthogonal_route_uses_the_true_angles():
    scan, _ = simulated_cube(1e5, seed=12)
    eta = np.asarray(scan.angles["eta"])
    step = np.mean(np.diff(eta))
    jittered = eta + np.random.default_rng(1).uniform(-0.09, 0.09, eta.size) * step
    p = _prepare(replace(scan, angles=dict(scan.angles, eta=jittered)))
    assert p.rocking_step == pytest.approx(np.polyfit(np.arange(eta.size), jittered, 1)[0], rel=1e-12)
    f0, f1 = (int(v) for v in p.crop[0])
    assert np.array_equal(p.angles["eta"], jittered[f0:f1])  # exact_q (orthogonal route) reads these
    with pytest.raises(ScanFileError, match="uniform rocking step"):
        _prepare(replace(scan, angles=dict(scan.angles, eta=eta + np.where(np.arange(eta.size) == 9, 0.3 * step, 0))))


@pytest.fixture(scope="module")
def weak_repeats():
    """Three repeats of a weak scan (10⁴ peak counts, background 0.5), the second
    shifted by two rows, the third by half a frame; and one scan of 3·10⁴."""
    scan, _ = simulated_cube(1e9, background=0.0)
    lam = scan.frames.astype(np.float64) * (1e4 / 1e9)  # the expected counts, noise 3·10⁻⁵ at the peak
    rng = np.random.default_rng(7)
    shifted = [lam, np.roll(lam, 2, axis=1), np.maximum(ndimage.shift(lam, (0.5, 0, 0), order=3), 0)]
    reps = [replace(scan, frames=rng.poisson(x + 0.5).astype(np.uint32), path=f"repeat_{k}.h5")
            for k, x in enumerate(shifted)]
    single = replace(scan, frames=rng.poisson(3 * lam + 1.5).astype(np.uint32))
    return dict(reps=reps, single=single, truth=3 * lam)


def test_repeats_are_aligned_and_summed(weak_repeats):
    summed, rep = sum_repeats(weak_repeats["reps"])
    np.testing.assert_allclose(rep["shifts"], [[0, 0, 0], [0, -2, 0], [-0.5, 0, 0]], atol=0.05)
    assert summed.frames.dtype == np.float32 and summed.extra["repeats"]["sources"][1] == "repeat_1.h5"
    # counts are kept: on the voxels measured in all three, the sum holds three times the
    # unshifted scan's counts (same expected counts after alignment)
    m = ~summed.mask
    ratio = float(summed.frames[m].sum(dtype=np.float64)) / float(weak_repeats["reps"][0].frames[m].sum())
    assert abs(ratio - 3) < 0.03
    # the third scan, moved back by half a frame, gives the last frame at most half of it
    assert not summed.mask[:-1].all(axis=(1, 2)).any()
    with pytest.raises(ScanFileError, match=r"repeat_1\.h5: field 'frames': repeat 1: peak moved .* at most 1\.5"):
        sum_repeats(weak_repeats["reps"], max_shift=1.5)


def test_summed_repeats_phase_as_well_as_one_long_scan(weak_repeats):
    # a reconstruction's far-field amplitude against the truth's, over three seeds
    # (a rate over seeds, not one lucky start)
    plan = [PhasingStage("HIO", 300, 0.9, "shrinkwrap", 20, (3.0, 1.5), 0.15),
            PhasingStage("ER", 100, None, "shrinkwrap", 20, (1.0, 1.0), 0.2)]
    summed, _ = sum_repeats(weak_repeats["reps"])
    errors = {}
    for name, s in (("sum", summed), ("single", weak_repeats["single"])):
        p = _prepare(s)
        amp = np.sqrt(weak_repeats["truth"][tuple(slice(a, b) for a, b in p.crop)])
        m = ~p.mask
        e = []
        for seed in range(3):
            r = reconstruct(p.intensity, p.mask, plan=plan, seed=seed, threads=1, remove_ramp=False,
                            raise_on_failure=False)
            far = np.abs(np.fft.fftshift(np.fft.fftn(np.fft.ifftshift(r.obj))))
            e.append(np.linalg.norm((far - amp)[m]) / np.linalg.norm(amp[m]) if r.status == "ok" else np.inf)
        errors[name] = np.median(e)
    assert errors["sum"] <= 1.05 * errors["single"], errors
