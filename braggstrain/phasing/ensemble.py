"""Many random starts: run, rank, align and average.

Each run is reproducible from (seed, run index) alone: the random start is
drawn from ``SeedSequence(seed, spawn_key=(0, run))``, the free voxels from
``SeedSequence(seed, spawn_key=(1,))`` (the same for all runs, so their free
log-likelihoods compare), every run uses the same thread count, and every
process makes the same FFT plan (estimated plans by default; with a measured
effort, the parent's wisdom is shipped to the workers, see
:mod:`braggstrain.phasing.fft`).  A run on a Dask cluster, a resumed run or
the default local pool therefore give bit-identical objects.
"""

from __future__ import annotations

import dataclasses
import multiprocessing
from concurrent.futures import ProcessPoolExecutor
from dataclasses import dataclass, field

import numpy as np

from braggstrain.errors import InputError, PhasingError
from braggstrain.phasing import kernels as _k
from braggstrain.phasing.coherence import AUTO, choose_model, kernel_principal_widths
from braggstrain.phasing.engine import (Metrics, Reconstruction, _as_seed, _options, _prepare, _run, _stages)
from braggstrain.phasing.fft import DEFAULT_EFFORT, FFTBackend, adopt_wisdom, default_threads, export_wisdom
from braggstrain.phasing.metrics import PRTF, align, prtf, twin

__all__ = ["ensemble", "partial_runs", "EnsembleResult", "RunSummary", "RANKING_METRICS", "DEFAULT_METRIC", "METRIC_LABELS",
           "metric_label",
           "worker_pool", "InProcess", "DEFAULT_RUNS", "DEFAULT_KEEP"]

#: Random starts and runs averaged when nothing else is asked (the pipeline's
#: ``[phasing] runs`` and ``keep`` default to these too).
DEFAULT_RUNS = 8
DEFAULT_KEEP = 4


def _watch_parent(parent_pid, interval=0.5):
    """In a pool worker: end this process as soon as its parent is gone.

    A parent killed by SIGKILL cannot shut its pool down; its workers would
    wait for tasks forever (and keep multiprocessing's resource tracker alive
    through the pipe they inherited). A daemon thread polls the parent's pid
    (portable: Linux and macOS) and exits hard when the worker has been
    re-parented."""
    import os
    import threading
    import time

    def watch():
        while True:
            if os.getppid() != parent_pid:
                os._exit(1)
            time.sleep(interval)
    threading.Thread(target=watch, name="braggstrain-parent-watch", daemon=True).start()


def worker_pool(workers):
    """A process pool (spawned workers) whose workers end when this process dies."""
    import os

    return ProcessPoolExecutor(max_workers=workers, mp_context=multiprocessing.get_context("spawn"),
                               initializer=_watch_parent, initargs=(os.getpid(),))

# metric name -> True when larger is better
RANKING_METRICS = {
    "free_nll": False,
    "nll": False,
    "free_amplitude_error": False,
    "amplitude_error": False,
    "sharpness": True,
}
#: The ranking metric unless ``metric`` (``[phasing] metric``) says otherwise.
DEFAULT_METRIC = "free_nll"

#: (name, meaning and unit) of each run metric, for axes and tables (the keys are the
#: columns of the runs table in results.h5).
METRIC_LABELS = {
    "nll": ("negative log-likelihood",
            "Poisson negative log-likelihood per measured voxel (nats)"),
    "free_nll": ("free negative log-likelihood",
                 "negative log-likelihood per measured voxel (free: held-out voxels), nats"),
    "amplitude_error": ("amplitude error", "Σ(|Ψ|−√I)² / ΣI over the constrained voxels (dimensionless)"),
    "free_amplitude_error": ("free amplitude error", "Σ(|Ψ|−√I)² / ΣI over the held-out voxels (dimensionless)"),
    "support_size": ("support size", "voxels"),
    "background": ("background", "flat background, counts per voxel"),
    "sharpness": ("sharpness", "N·Σ|ρ|⁴ / (Σ|ρ|²)², higher is more concentrated (dimensionless)"),
}


def metric_label(key, long=False):
    """Label of a phasing metric: its meaning and unit, or with ``long`` its
    name, a colon, and its meaning and unit (axis labels, report tables)."""
    name, unit = METRIC_LABELS.get(key, (key.replace("_", " "), ""))
    return f"{name}: {unit}" if long and unit else (unit or name)


@dataclass
class RunSummary:
    """Outcome of one run of an ensemble."""

    run: int
    seed: int
    status: str
    message: str
    metrics: Metrics
    iterations: int
    elapsed: float


@dataclass
class EnsembleResult:
    """Average of the best runs of an ensemble (plain arrays, picklable).

    Attributes
    ----------
    obj : complex64 (n0, n1, n2)
        Mean of the kept runs after alignment to the best one (same layout as
        :attr:`Reconstruction.obj`).
    support : bool
        Voxels inside the support of at least half the kept runs (aligned).
    runs : list of RunSummary
        Every run, in run order, with its status and metrics.
    ranking : list of int
        Run indices of the successful runs, best first.
    kept : list of int
        The runs averaged: the first ``keep`` of ``ranking`` that are not
        ``outliers``.
    outliers : dict
        Run index -> reason, for finished runs left out because they are far
        from the others (see :func:`_outliers`): a stagnated run, or a support
        that collapsed or swelled without tripping the run's own limits.
    alignment : list of dict
        Per kept run: ``shift`` (voxels), ``twin``, ``phase`` (rad) and
        ``overlap`` with the best run.
    prtf : PRTF
        Phase-retrieval transfer function of the kept runs.
    best : Reconstruction
        The best single run.
    metric : str
        Ranking metric.
    seed : int
    ramp : ndarray (3,)
        Phase ramp removed (see :attr:`Reconstruction.ramp`).
    coherence_kernel : ndarray or None
        With partial coherence on: the mean of the kept runs' coherence
        kernels (reciprocal space, unit sum), the one estimate per reflection.
    coherence_widths, coherence_axes : ndarray or None
        Its standard deviations along its principal axes (voxels of the
        reciprocal grid, largest first) and those axes (columns, array
        axes); see :func:`~braggstrain.phasing.coherence.kernel_principal_widths`.
    coherence_widths_spread : ndarray (3,) or None
        Standard deviation of the principal widths over the kept runs: the
        estimate's own spread, against which estimates from other
        reflections measured with the same beam can be compared.
        When ``coherence="auto"`` chose the coherent model, the kernel is a
        delta, its widths and spread zero.
    coherence_model : str
        ``"partial"`` when the kept runs model partial coherence, else
        ``"coherent"``.
    coherence_choice : dict
        With ``coherence="auto"``: ``metric`` (the likelihood compared),
        ``coherent`` and ``partial`` (the best run of each model by it, NaN
        without a successful run), ``runs`` ({"coherent": [...], "partial":
        [...]} run indices), ``partial_widths`` (principal widths, voxels, of
        the mean kernel of the best partial runs, NaN without any) and
        ``model``; empty otherwise.
    kept_objects : complex64 (K, n0, n1, n2)
        The kept runs themselves, aligned to the best one (their spread is
        part of the error bars, see :mod:`braggstrain.strain.tensor`).
    """

    obj: np.ndarray
    support: np.ndarray
    runs: list
    ranking: list
    kept: list
    alignment: list
    prtf: PRTF
    best: Reconstruction
    metric: str
    seed: int
    ramp: np.ndarray = field(default_factory=lambda: np.zeros(3))
    outliers: dict = field(default_factory=dict)
    coherence_kernel: np.ndarray | None = None
    coherence_widths: np.ndarray | None = None
    coherence_axes: np.ndarray | None = None
    coherence_widths_spread: np.ndarray | None = None
    kept_objects: np.ndarray | None = None
    coherence_model: str = "coherent"
    coherence_choice: dict = field(default_factory=dict)


def _task(args):
    """Worker entry point (module level so it pickles): one run of an ensemble."""
    data, stages, opts, run, wisdom = args
    adopt_wisdom(wisdom)
    return _run(data, stages, opts, run)


class InProcess:
    """An executor that runs every task in the calling process, one after another."""

    def map(self, fn, iterable):
        return map(fn, iterable)


def _collect(executor, results):
    """Materialise the results of ``executor.map``; gather futures (Dask) if needed."""
    results = list(results)
    if results and not isinstance(results[0], Reconstruction) and hasattr(results[0], "result"):
        if hasattr(executor, "gather"):
            results = list(executor.gather(results))
        else:
            results = [f.result() for f in results]
    return results


#: A run is an outlier when its support size is off the median of the
#: finished runs by more than this factor, or its ranking metric is worse than
#: the best run's by more than OUTLIER_SPREAD times the typical spread of the
#: runs (common practice, no source: an ensemble keeps the runs that agree).
OUTLIER_SUPPORT_FACTOR = 1.5
OUTLIER_SPREAD = 10.0
#: ... or, for the Poisson log-likelihoods (``nll``, ``free_nll``), its
#: negative log-likelihood per voxel is more than this many times the best's.
OUTLIER_LIKELIHOOD_RATIO = 2.0


def _outliers(ranked, metric):
    """Finished runs that disagree with the others: {run: reason}.

    * support size below median / 1.5 or above 1.5 x median (collapsed or
      swollen, though within the per-run limits of
      :func:`~braggstrain.phasing.support.support_health`), in a run whose
      ranking metric is no better than the median run's;
    * ranking metric worse than the best run's by more than 10 times the
      median distance of the runs from the best (with at least three runs;
      for the log-likelihoods this is the gap between a converged and a
      stagnated run, for ``sharpness`` the sign is flipped);
    * for ``nll`` and ``free_nll``: a negative log-likelihood per voxel more
      than twice the best run's (this catches a majority of failed runs, which
      the previous rule cannot: measured on blurred data, one run at 3.2 and
      five at 20-34).

    The best run is never an outlier by the metric, nor is any run better than
    the median by its support.
    """
    out = {}
    if not ranked:
        return out
    sizes = np.array([r.metrics.support_size for r in ranked], dtype=float)
    med = float(np.median(sizes))
    vals = np.array([r.metrics.get(metric) for r in ranked], dtype=float)
    if RANKING_METRICS[metric]:
        vals = -vals
    finite = np.isfinite(vals)
    med_val = float(np.median(vals[finite])) if finite.any() else np.nan
    for r, sz, v in zip(ranked, sizes, vals):
        # a support unlike the others' is suspect only in a run that also fits
        # no better than the middle run: when most runs went wrong the same way
        # (a support shrunk under blurred data), the lone run that fits best
        # with a different support is the one to keep
        if (sz < med / OUTLIER_SUPPORT_FACTOR or sz > med * OUTLIER_SUPPORT_FACTOR) \
                and not (np.isfinite(v) and v < med_val):
            out[r.run] = (f"support of {int(sz)} voxels against a median of {med:.0f} over "
                          f"{len(ranked)} runs")
    best_value = np.nan
    if finite.any():
        best_value = ranked[int(np.flatnonzero(finite)[np.argmin(vals[finite])])].metrics.get(metric)
    if finite.sum() >= 3:
        best = vals[finite].min()
        gaps = vals[finite] - best
        typical = float(np.median(gaps))
        scale = max(typical, 1e-6 * max(abs(best), 1e-12))
        for r, v in zip(ranked, vals):
            if np.isfinite(v) and v - best > OUTLIER_SPREAD * scale and r.run not in out:
                out[r.run] = (f"{metric} {r.metrics.get(metric):.6g} is far from the best "
                              f"run's {best_value:.6g} (typical distance from the best "
                              f"{typical:.3g})")
    if metric in ("nll", "free_nll") and finite.any():
        best = vals[finite].min()
        for r, v in zip(ranked, vals):
            if best > 0 and np.isfinite(v) and v > OUTLIER_LIKELIHOOD_RATIO * best and r.run not in out:
                out[r.run] = (f"{metric} {r.metrics.get(metric):.6g} is more than "
                              f"{OUTLIER_LIKELIHOOD_RATIO:g} times the best run's {best_value:.6g}")
    return out


def partial_runs(runs):
    """Random starts of the partial-coherence model that ``coherence="auto"``
    adds to the ``runs`` of the coherent model: half as many (rounded up), at
    least two, because the model's runs fail more often (docs/phasing.md)."""
    return max(2, (int(runs) + 1) // 2)


def _choose_model(good, has_free, keep):
    """Split the successful runs of a ``coherence="auto"`` ensemble by the model
    :func:`~braggstrain.phasing.coherence.choose_model` picks: (chosen runs,
    the others, the record of the choice)."""
    metric = "free_nll" if has_free else "nll"
    plain = [r for r in good if r.coherence_kernel is None]
    partial = [r for r in good if r.coherence_kernel is not None]

    def best(rs):
        v = [r.metrics.get(metric) for r in rs]
        v = [x for x in v if np.isfinite(x)]
        return float(min(v)) if v else float("nan")

    model = choose_model(best(plain), best(partial))
    top = sorted(partial, key=lambda r: (np.isnan(r.metrics.get(metric)), r.metrics.get(metric)))[:keep]
    partial_widths = (kernel_principal_widths(np.mean([r.coherence_kernel for r in top], axis=0))[0]
                      if top else np.full(3, np.nan))
    choice = {"metric": metric, "coherent": best(plain), "partial": best(partial), "model": model,
              "runs": {"coherent": [r.run for r in plain], "partial": [r.run for r in partial]},
              "partial_widths": partial_widths}
    return (partial, plain, choice) if model == "partial" else (plain, partial, choice)


def _align_support(sup, info):
    s = twin(sup.astype(np.complex64)).real > 0.5 if info["twin"] else sup
    return np.roll(s, tuple(int(round(v)) for v in info["shift"]), axis=(0, 1, 2))


def ensemble(intensity, mask=None, *, runs=DEFAULT_RUNS, keep=DEFAULT_KEEP, plan=None, seed=None, executor=None,
             progress=False, metric=DEFAULT_METRIC, threads=1, coherence=AUTO, background=None,
             free_fraction=0.03, fft_backend="auto", fft_effort=DEFAULT_EFFORT,
             initial_threshold=0.04, remove_ramp=True, center=True) -> EnsembleResult:
    """Independent random starts, ranked, aligned and averaged.

    Parameters
    ----------
    intensity, mask, plan, background, free_fraction, fft_backend,
    fft_effort, initial_threshold, remove_ramp, center
        As for :func:`~braggstrain.phasing.reconstruct`.
    coherence : "auto" (default), bool, dict or CoherenceSettings
        ``"auto"`` (or settings with ``choose``): the ``runs`` random starts
        use the coherent model and :func:`partial_runs` more the
        partial-coherence one, and the model whose best run fits the
        held-out voxels clearly better is kept
        (:func:`~braggstrain.phasing.coherence.choose_model`); its runs alone
        are ranked, averaged and reported, the other model's are listed in
        ``outliers``.  True (or settings) uses the partial model in every
        run, False the coherent one (and then ``runs`` starts only).
    runs : int
        Number of random starts (of the coherent model with ``"auto"``).
    keep : int
        Number of best runs averaged (at most the number of successful runs).
    seed : int, optional
        Base seed; run ``i`` is reproducible from (seed, i), and run 0 is the
        run :func:`reconstruct` makes with the same seed and threads.
    executor : object with ``map(fn, iterable)``, optional
        Where the runs execute.  Default: a local process pool (spawned
        workers, one per core, at most ``runs``; a script calling this must
        then guard its entry point with ``if __name__ == "__main__":``).  A ``concurrent.futures``
        pool or a ``dask.distributed.Client`` (whose ``map`` returns futures,
        gathered here) work as well.
    progress : bool
        A tqdm bar over finished runs.
    metric : str
        Ranking metric, one of ``free_nll`` (default), ``nll``,
        ``free_amplitude_error``, ``amplitude_error`` (lower is better) or
        ``sharpness`` (higher is better).
    threads : int
        Threads per run (default 1: the runs themselves are the parallel
        unit).  Keep it fixed to reproduce results across executors.

    Returns
    -------
    EnsembleResult

    Raises
    ------
    PhasingError
        When no run succeeds (the message lists the statuses).
    """
    if isinstance(runs, bool) or not isinstance(runs, (int, np.integer)) or runs < 1:
        raise InputError(f"runs: expected a positive integer, got {runs!r}")
    if isinstance(keep, bool) or not isinstance(keep, (int, np.integer)) or not 1 <= keep <= runs:
        raise InputError(f"keep: expected an integer in 1..runs ({runs}), got {keep!r}")
    if metric not in RANKING_METRICS:
        raise InputError(f"metric: expected one of {sorted(RANKING_METRICS)}, got {metric!r}")
    if executor is not None and not callable(getattr(executor, "map", None)):
        raise InputError(f"executor: expected an object with a map(fn, iterable) method, "
                         f"got {type(executor).__name__}")
    stages = _stages(plan)
    seed = _as_seed(seed)
    opts = _options(coherence, background, threads, fft_backend, remove_ramp, center, False,
                    fft_effort)
    data = _prepare(intensity, mask, None, seed, free_fraction, initial_threshold, opts.threads)
    if metric.startswith("free") and data.free_idx.size == 0:
        raise InputError(f"metric: '{metric}' needs held-out voxels, but free_fraction is 0")

    # Plan the FFT once here so that every worker imports the same wisdom,
    # and load (or compile) the kernels before workers start.
    FFTBackend(data.shape, threads=opts.threads, backend=opts.fft_backend,
               effort=opts.fft_effort).real_buffer
    wisdom = export_wisdom() if opts.fft_effort != "FFTW_ESTIMATE" else None
    _k.warm_up()
    choose = opts.coherence is not None and opts.coherence.choose
    # With the choice, runs 0 .. runs-1 are the coherent model's (the very runs
    # coherence=False makes) and partial_runs(runs) more the partial model's.
    n_total = runs + partial_runs(runs) if choose else runs
    plain_opts = dataclasses.replace(opts, coherence=None) if choose else opts
    tasks = [(data, stages, plain_opts if r < runs else opts, r, wisdom) for r in range(n_total)]

    own_pool = None
    if executor is None:
        workers = min(n_total, default_threads())
        if workers > 1:
            own_pool = worker_pool(workers)
            executor = own_pool
        else:
            executor = InProcess()
    try:
        raw = executor.map(_task, tasks)
        if progress:
            from tqdm import tqdm

            raw = tqdm(raw, total=n_total, unit="run", desc="phasing runs")
        results = _collect(executor, raw)
    finally:
        if own_pool is not None:
            own_pool.shutdown()

    summaries = [RunSummary(r.run, r.seed, r.status, r.message, r.metrics, r.iterations,
                            r.elapsed) for r in results]
    good = [r for r in results if r.ok]
    if not good:
        raise PhasingError("ensemble: no run succeeded: " +
                           "; ".join(f"run {r.run}: {r.status} ({r.message})" for r in results))
    higher = RANKING_METRICS[metric]

    def score(r):
        v = r.metrics.get(metric)
        return (np.isnan(v), -v if higher else v)

    choice = {}
    others = []
    if choose:
        good, others, choice = _choose_model(good, data.free_idx.size > 0, keep)
    ranked = sorted(good, key=score)
    outliers = _outliers(ranked, metric)
    for r in others:
        outliers[r.run] = (f"the {'coherent' if r.coherence_kernel is None else 'partial-coherence'} "
                           f"model was not chosen ({choice['metric']}: coherent "
                           f"{choice['coherent']:.6g}, partial {choice['partial']:.6g})")
    usable = [r for r in ranked if r.run not in outliers] or ranked[:1]
    kept = usable[:keep]
    ref = kept[0]
    aligned = [ref.obj]
    supports = [ref.support]
    infos = [{"run": ref.run, "shift": np.zeros(3), "twin": False, "phase": 0.0, "overlap": 1.0}]
    for r in kept[1:]:
        obj, info = align(r.obj, ref.obj)
        info["run"] = r.run
        aligned.append(obj)
        supports.append(_align_support(r.support, info))
        infos.append(info)
    avg = np.mean(np.stack(aligned), axis=0).astype(np.complex64)
    votes = np.sum(np.stack(supports), axis=0)
    support = votes * 2 >= len(supports)
    intensity_arr = np.asarray(intensity, dtype=np.float64)
    mask_arr = None if mask is None else np.asarray(mask, bool)
    trf = prtf(aligned, np.where(np.isfinite(intensity_arr), intensity_arr, 0), mask_arr,
               ramp=ref.ramp)
    coh = {}
    if all(r.coherence_kernel is not None for r in kept):
        kernel = np.mean([r.coherence_kernel for r in kept], axis=0)
        widths, axes = kernel_principal_widths(kernel)
        coh = dict(coherence_kernel=kernel, coherence_widths=widths, coherence_axes=axes,
                   coherence_widths_spread=np.std([r.coherence_widths for r in kept], axis=0),
                   coherence_model="partial")
    elif choose:  # the coherent model won: its coherence function is a delta
        w = opts.coherence.half_width
        kernel = np.zeros((2 * w + 1,) * 3)
        kernel[w, w, w] = 1.0
        coh = dict(coherence_kernel=kernel, coherence_widths=np.zeros(3), coherence_axes=np.eye(3),
                   coherence_widths_spread=np.zeros(3))
    return EnsembleResult(**coh, coherence_choice=choice, obj=avg, support=support, runs=summaries,
                          ranking=[r.run for r in ranked + sorted(others, key=score)],
                          kept=[r.run for r in kept],
                          outliers=outliers,
                          alignment=infos, prtf=trf, best=ref, metric=metric, seed=seed,
                          ramp=ref.ramp, kept_objects=np.stack(aligned).astype(np.complex64))
