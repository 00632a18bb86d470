"""Ensembles of random starts: ranking, alignment, averaging, PRTF, executors."""

import numpy as np
import pytest

from braggstrain.errors import InputError, PhasingError
from braggstrain.phasing import PhasingStage, align, ensemble, prtf, reconstruct, twin
from braggstrain.phasing.metrics import far_field

from test_phasing_helpers import clean_intensity, crystal, error_to_truth, noisy_intensity

SHORT = [PhasingStage("HIO", 60, 0.9, "shrinkwrap", 20, (2.0, 1.0), 0.15), PhasingStage("ER", 20, None, "none")]


class SerialExecutor:
    """The simplest executor: Python's map, in this process."""

    def map(self, fn, iterable):
        return map(fn, iterable)


def test_average_is_no_worse_than_the_best_run():
    # Acceptance check of the phasing issue, on the Poisson data of the
    # reconstruct check (1e5 peak counts); reference: the simulated truth.
    n = 48
    counts, scale = noisy_intensity(n, 1e5)
    truth = crystal(n) * np.float32(np.sqrt(scale))
    # the coherent model alone (the subject is ranking and averaging; the
    # choice of the model is tested in test_phasing_coherence.py)
    res = ensemble(counts, runs=4, keep=3, seed=21, coherence=False)
    assert len(res.runs) == 4 and len(res.kept) == 3 and res.kept[0] == res.best.run
    free = {r.run: r.metrics.free_nll for r in res.runs}
    assert [free[i] for i in res.ranking] == sorted(free[i] for i in res.ranking)
    e_avg = error_to_truth(res.obj, truth, res.ramp)
    e_best = error_to_truth(res.best.obj, truth, res.best.ramp)
    assert e_avg <= e_best, (e_avg, e_best)
    assert e_avg <= 0.08
    # PRTF of converged runs: close to 1 at low q, never above 1
    vals = res.prtf.values[res.prtf.counts > 0]
    assert np.all(vals <= 1 + 1e-6) and vals[:3].min() > 0.9
    assert all(a["overlap"] > 0.95 for a in res.alignment)


def test_noise_free_average_within_2_percent():
    # On noise-free data single runs converge to ~0.1 %, so averaging cannot
    # beat the best one by much; the average must still meet the 2 % figure.
    n = 48
    res = ensemble(clean_intensity(n), runs=2, keep=2, seed=22, executor=SerialExecutor(),
                   threads=2, coherence=False)
    assert error_to_truth(res.obj, crystal(n), res.ramp) <= 0.02
    assert res.support.sum() > 0 and res.obj.dtype == np.complex64


def test_prtf_of_identical_runs_in_different_poses_is_one():
    # PRTF (Chapman et al., JOSA A 23, 1179 (2006)) of runs that are the same
    # object up to a translation, the twin and a global phase: after
    # alignment every run has the same phases, so the PRTF is 1 at every q.
    obj = crystal(32)
    poses = [obj, np.roll(obj, (3, -2, 1), axis=(0, 1, 2)), twin(obj),
             obj * np.complex64(np.exp(1.1j))]
    aligned = [poses[0]] + [align(p, poses[0])[0] for p in poses[1:]]
    res = prtf(aligned, np.abs(far_field(obj)) ** 2)
    np.testing.assert_allclose(res.values[res.counts > 0], 1.0, atol=1e-4)
    # and runs with unrelated phases are far from 1
    rng = np.random.default_rng(0)
    noisy = [obj * np.exp(1j * rng.uniform(0, 2 * np.pi, obj.shape)).astype(np.complex64)
             for _ in range(4)]
    assert np.nanmean(prtf(noisy, np.abs(far_field(obj)) ** 2).values) < 0.8


def test_runs_are_identical_on_every_executor():
    # Reproducibility from (seed, run index): the local pool, a plain serial
    # map and a Dask client give bit-identical results; run 0 is the run that
    # reconstruct makes with the same seed and one thread.
    distributed = pytest.importorskip("distributed")
    inten = clean_intensity(32)
    kw = dict(runs=3, keep=2, plan=SHORT, seed=8)
    default = ensemble(inten, **kw)
    serial = ensemble(inten, executor=SerialExecutor(), **kw)
    with distributed.Client(processes=False, n_workers=1, threads_per_worker=1,
                            dashboard_address=None) as client:
        dask = ensemble(inten, executor=client, **kw)
    for other in (serial, dask):
        assert np.array_equal(other.obj, default.obj)
        assert [r.metrics for r in other.runs] == [r.metrics for r in default.runs]
    single = reconstruct(inten, plan=SHORT, seed=8, threads=1)
    assert single.metrics == default.runs[0].metrics


def test_ensemble_failures_are_reported():
    inten = clean_intensity(32)
    collapse = [PhasingStage("HIO", 30, 0.9, "shrinkwrap", 10, (0.5, 0.5), 0.98)]
    with pytest.raises(PhasingError, match="no run succeeded.*support collapsed"):
        ensemble(inten, runs=2, keep=1, plan=collapse, seed=1, executor=SerialExecutor())
    with pytest.raises(InputError, match="executor"):
        ensemble(inten, runs=2, keep=1, plan=SHORT, executor=object())
    with pytest.raises(InputError, match="keep"):
        ensemble(inten, runs=2, keep=3, plan=SHORT)
    with pytest.raises(InputError, match="metric"):
        ensemble(inten, runs=2, keep=1, plan=SHORT, metric="chi2")


def test_separate_processes_reproduce_a_run(tmp_path):
    # A resumed pipeline, a pool worker or a fresh machine runs in a new
    # process: with the default estimated FFT plans and no wisdom cache at
    # all, the same (seed, run) gives the same object bit for bit, whether the
    # numba kernels were just compiled or loaded from the disk cache (HIO
    # turns any rounding difference into a visibly different result within
    # tens of iterations; with measured plans, five processes at 48^3 made
    # five different objects).
    import os
    import subprocess
    import sys

    np.save(tmp_path / "intensity.npy", clean_intensity(48))
    code = (
        "import sys, numpy as np\n"
        "from braggstrain.phasing import reconstruct, PhasingStage\n"
        "plan = [PhasingStage('HIO', 60, 0.9, 'shrinkwrap', 20, (2.0, 1.0), 0.15)]\n"
        "rec = reconstruct(np.load(sys.argv[1]), plan=plan, seed=4, threads=2)\n"
        "np.save(sys.argv[2], rec.obj)\n"
    )
    # first numba cache: compiled, then loaded; second: compiled again
    caches = [tmp_path / "numba-a", tmp_path / "numba-a", tmp_path / "numba-b"]
    for k, cache in enumerate(caches):
        env = dict(os.environ, BRAGGSTRAIN_FFTW_WISDOM="", NUMBA_CACHE_DIR=str(cache))
        subprocess.run([sys.executable, "-c", code, str(tmp_path / "intensity.npy"),
                        str(tmp_path / f"obj{k}.npy")], check=True, env=env, timeout=300)
    objs = [np.load(tmp_path / f"obj{k}.npy") for k in range(len(caches))]
    assert all(np.array_equal(o, objs[0]) for o in objs[1:])


def test_average_within_1_3_of_the_noise_floor():
    # The noise floor: a run started from the true object (and its support)
    # running the closing stages of the default plan on the same Poisson
    # counts (1e5 peak counts) ends where the noise leaves it; the ensemble
    # average from random starts must come within 1.3x of it (acceptance
    # figure of the phasing issue; reference: the simulated truth).
    # Measured (seed 21): floor 4.72 %, average 4.96 % (ratio 1.05).
    from braggstrain.phasing import default_plan
    from braggstrain.phasing.metrics import remove_phase_ramp

    n = 48
    counts, scale = noisy_intensity(n, 1e5)
    truth = crystal(n) * np.float32(np.sqrt(scale))
    res = ensemble(counts, runs=4, keep=3, seed=21, coherence=False)  # the plan's floor, coherent model
    start = remove_phase_ramp(truth, res.ramp)
    floor_run = reconstruct(counts, start=start, plan=default_plan()[2:], seed=21)
    floor = error_to_truth(floor_run.obj, truth, floor_run.ramp)
    e_avg = error_to_truth(res.obj, truth, res.ramp)
    print(f"noise floor {floor:.4f}, ensemble average {e_avg:.4f}, ratio {e_avg / floor:.3f}")
    assert 0.01 < floor < 0.2  # the noise is really there
    assert e_avg <= 1.3 * floor, (e_avg, floor)


class _OneBadRun:
    """Serial executor that cuts run 1 short (30 HIO iterations): a deliberately
    bad start whose run finishes with status "ok" but far from the others."""

    def map(self, fn, tasks):
        out = []
        for data, stages, opts, run, wisdom in tasks:
            if run == 1:
                stages = [PhasingStage("HIO", 30, 0.9, "shrinkwrap", 10, (2.0, 1.0), 0.15)]
            out.append(fn((data, stages, opts, run, wisdom)))
        return out


@pytest.mark.parametrize("noisy", [False, True])
def test_a_failed_run_is_recognised_and_never_kept(noisy):
    # keep = runs: without the outlier rule the bad run would be averaged in.
    n = 32
    inten = noisy_intensity(n, 1e5)[0] if noisy else clean_intensity(n)
    res = ensemble(inten, runs=4, keep=4, seed=21, coherence=False,
                   executor=_OneBadRun())
    assert res.runs[1].status == "ok"  # the run itself did not notice
    assert 1 in res.outliers and 1 not in res.kept, (res.outliers, res.kept)
    assert sorted(res.kept) == [0, 2, 3]
    assert "free_nll" in res.outliers[1]


def test_outlier_rule_flags_a_collapsed_support():
    from braggstrain.phasing.ensemble import _outliers
    from braggstrain.phasing.engine import Metrics

    def fake(run, size, nll):
        m = Metrics(nll=nll, free_nll=nll, amplitude_error=0.0, free_amplitude_error=0.0,
                    support_size=size, sharpness=1.0, background=0.0)
        return RunSummaryLike(run, m)

    class RunSummaryLike:
        def __init__(self, run, metrics):
            self.run, self.metrics = run, metrics

    runs = [fake(0, 1000, 1.0), fake(1, 1010, 1.001), fake(2, 400, 1.002), fake(3, 990, 1.0015)]
    out = _outliers(runs, "free_nll")
    assert list(out) == [2] and "support of 400 voxels" in out[2]
    # ... but a run that fits clearly better than the middle one is kept even
    # with a support unlike the others' (measured: blurred data, where most
    # runs shrank their support and the one that did not fitted best)
    runs = [fake(0, 2400, 3.2), fake(1, 1500, 20.5), fake(2, 1600, 21.6), fake(3, 1550, 22.3)]
    out = _outliers(runs, "free_nll")
    assert 0 not in out
    # and the majority that failed alike is left out by the likelihood ratio
    assert sorted(out) == [1, 2, 3] and "more than 2 times" in out[1]


def test_ensemble_reports_one_coherence_kernel_with_its_spread():
    # The kept runs' kernels are averaged into one estimate per reflection,
    # with its principal widths and their spread over the runs (data blurred
    # by a known Gaussian of 1 voxel with scipy.ndimage, reference library).
    import scipy.ndimage

    n = 32
    blurred = scipy.ndimage.gaussian_filter(clean_intensity(n), 1.0, mode="wrap")
    res = ensemble(blurred, runs=2, keep=2, seed=3, executor=SerialExecutor(),
                   coherence={"start": 20}, plan=SHORT)
    assert res.coherence_kernel.shape == (9, 9, 9)
    assert res.coherence_kernel.sum() == pytest.approx(1.0)
    assert res.coherence_widths.shape == (3,) and res.coherence_axes.shape == (3, 3)
    assert np.all(np.diff(res.coherence_widths) <= 0) and res.coherence_widths_spread.shape == (3,)
    assert np.all(res.coherence_widths > 0.3)
    plain = ensemble(clean_intensity(n), runs=2, keep=1, seed=3, executor=SerialExecutor(), plan=SHORT,
                     coherence=False)
    assert plain.coherence_kernel is None and plain.coherence_widths is None
