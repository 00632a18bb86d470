"""The phasing loop: one reconstruction from one random start.

:func:`reconstruct` validates the data, builds the initial support and runs
the stages of a plan.  Internally everything is in FFT order (origin at
index 0) so no shift is needed per iteration; the result is returned in the
user layout (crystal centred at index n//2).

Why one module of about 700 lines: the data validation, the loop and the
final figures of a run share its private state (_Data, _Options and the
buffers of one FFT backend); split, they would pass it around.
"""

from __future__ import annotations

import time
import warnings
from dataclasses import dataclass, field

import numba
import numpy as np
import scipy.fft
from scipy.special import gammaln

from braggstrain.errors import InputError, PhasingError
from braggstrain.phasing import kernels as _k
from braggstrain.phasing.coherence import CoherenceModel, CoherenceSettings, kernel_principal_widths
from braggstrain.phasing.fft import DEFAULT_EFFORT, FFTBackend, _EFFORTS, _check_threads
from braggstrain.phasing.metrics import centre_of_mass_shift, constrained_sums, nll_per_voxel, peak_offset, sharpness
from braggstrain.phasing.schedule import default_plan, plan_from_config
from braggstrain.phasing.support import (autocorrelation, autocorrelation_support, dilate_periodic, shrinkwrap,
                                         support_health)
from braggstrain.prepare.oversampling import estimate_oversampling

__all__ = [
    "reconstruct",
    "Reconstruction",
    "History",
    "Metrics",
    "OversamplingWarning",
    "STATUS_OK",
]

STATUS_OK = "ok"
_BACKGROUND_MODES = (None, "fit")


class OversamplingWarning(UserWarning):
    """The data look undersampled (oversampling ratio below 2) along an axis."""


@dataclass
class History:
    """Per-iteration record of a run.

    Attributes
    ----------
    amplitude_error : float32 (n_iter,)
        sum (|Psi| - sqrt(I))^2 / sum I over constrained voxels, before the
        modulus projection of each iteration (the Fourier-space R factor
        squared).
    free_amplitude_error : float32 (n_iter,)
        The same over the held-out voxels (NaN without a free set).
    support_size : int64 (n_iter,)
        Support size (voxels) during each iteration.
    stage : int16 (n_iter,)
        Index of the plan stage of each iteration.
    checkpoint : int64 (n_check,)
        Iterations at which the Poisson figures below were computed.
    nll, free_nll : float64 (n_check,)
        Poisson negative log-likelihood per voxel, constrained and free.
    background : float64 (n_check,)
        Flat background per voxel in effect at each checkpoint.
    """

    amplitude_error: np.ndarray
    free_amplitude_error: np.ndarray
    support_size: np.ndarray
    stage: np.ndarray
    checkpoint: np.ndarray
    nll: np.ndarray
    free_nll: np.ndarray
    background: np.ndarray


@dataclass
class Metrics:
    """Final figures of merit of a reconstruction (lower is better except sharpness).

    Attributes
    ----------
    nll : float
        Poisson negative log-likelihood per constrained voxel,
        mean(I_c - I ln I_c + ln Gamma(I+1)).
    free_nll : float
        The same on the held-out voxels (NaN when ``free_fraction`` is 0):
        the free log-likelihood with its sign flipped (Thibault &
        Guizar-Sicairos, New J. Phys. 14, 063004 (2012)).
    amplitude_error, free_amplitude_error : float
        sum (|Psi| - sqrt(I))^2 / sum I over constrained / free voxels.
    support_size : int
        Voxels in the final support.
    sharpness : float
        sum |rho|^4 / (sum |rho|^2)^2 * N (higher is sharper).
    background : float
        Flat background per voxel (fitted or given; 0 when off).
    """

    nll: float
    free_nll: float
    amplitude_error: float
    free_amplitude_error: float
    support_size: int
    sharpness: float
    background: float

    def get(self, name):
        """Value of a metric by name."""
        return getattr(self, name)


@dataclass
class Reconstruction:
    """Result of one phase-retrieval run (plain arrays, picklable).

    Attributes
    ----------
    obj : complex64 (n0, n1, n2)
        Complex object, crystal centred in the array (centre of mass at n//2),
        phase ramp of an off-centre peak removed (see ``ramp``).
    support : bool (n0, n1, n2)
        Final support, same layout.
    history : History
    metrics : Metrics
    status : str
        ``"ok"``, ``"support collapsed"``, ``"support exploded"`` or
        ``"diverged"``; only ``"ok"`` results carry a usable object.
    message : str
        What happened, in words (stage, iteration, sizes).
    seed, run : int
        The random start is reproducible from (seed, run).
    iterations : int
        Iterations done.
    ramp : float64 (3,)
        Offset of the diffraction peak's centre of mass from n//2 (voxels of
        the reciprocal grid) whose phase ramp exp(2 pi i ramp.(j - n//2)/n)
        was removed from ``obj`` (j the final array index);
        ``metrics.remove_phase_ramp(obj, -ramp)`` puts it back.
    shift : tuple of int
        Roll applied to centre the crystal, on top of the plain fftshift.
    coherence_kernel : float64 (2w+1,)*3 or None
        Estimated coherence function (reciprocal space, unit sum) when
        partial coherence was on.
    coherence_sigma : float64 (3,) or None
        Its standard deviation along each array axis (voxels of the
        reciprocal grid).
    coherence_widths : float64 (3,) or None
        Its standard deviations along its principal axes, largest first
        (voxels of the reciprocal grid; see
        :func:`~braggstrain.phasing.coherence.kernel_principal_widths`).
    coherence_axes : float64 (3, 3) or None
        The principal axes, as columns, in array axes.
    fft_backend : str
    threads : int
    elapsed : float
        Wall time of the run (s).
    plan : list of PhasingStage
    timings : dict
        Wall time (s) of ``setup`` (plans, start), ``iterations`` (the loop)
        and ``finish`` (final figures, centring).
    """

    obj: np.ndarray
    support: np.ndarray
    history: History
    metrics: Metrics
    status: str
    message: str
    seed: int
    run: int
    iterations: int
    ramp: np.ndarray
    shift: tuple
    coherence_kernel: np.ndarray | None
    coherence_sigma: np.ndarray | None
    fft_backend: str
    threads: int
    elapsed: float
    plan: list = field(default_factory=list)
    timings: dict = field(default_factory=dict)
    coherence_widths: np.ndarray | None = None
    coherence_axes: np.ndarray | None = None

    @property
    def ok(self) -> bool:
        """True when the run finished normally."""
        return self.status == STATUS_OK


@dataclass
class _Options:
    coherence: CoherenceSettings | None
    background: object  # None, "fit" or float
    threads: int
    fft_backend: str
    fft_effort: str
    remove_ramp: bool
    center: bool
    progress: bool


@dataclass
class _Data:
    """Validated data in FFT order, shared by all runs of an ensemble."""

    shape: tuple
    amp: np.ndarray          # float32 flat, sqrt(I), mask and free set folded in (projections)
    free_idx: np.ndarray     # int64 flat indices of held-out voxels
    lgamma: float            # sum ln Gamma(I+1) over constrained voxels
    free_lgamma: float
    n_constrained: int
    sum_i: float             # sum I over constrained voxels
    free_sum_i: float
    support0: np.ndarray     # bool flat, initial support
    ramp: np.ndarray         # (3,) peak offset, voxels
    seed: int


def _as_seed(seed):
    if seed is None:
        return int(np.random.SeedSequence().entropy)
    if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or seed < 0:
        raise InputError(f"seed: expected a non-negative integer or None, got {seed!r}")
    return int(seed)


def _run_rng(seed, run):
    return np.random.default_rng(np.random.SeedSequence(seed, spawn_key=(0, int(run))))


def _options(coherence, background, threads, fft_backend, remove_ramp, center, progress,
             fft_effort=DEFAULT_EFFORT):
    coh = CoherenceSettings.from_value(coherence)
    if background is not None and background != "fit":
        if isinstance(background, bool) or not isinstance(background, (int, float, np.floating,
                                                                       np.integer)):
            raise InputError(f"background: expected None, 'fit' or counts per voxel, got {background!r}")
        background = float(background)
        if not np.isfinite(background) or background < 0:
            raise InputError(f"background: expected a finite value >= 0, got {background}")
    if fft_backend not in ("auto", "pyfftw", "scipy"):
        raise InputError(f"fft_backend: expected 'auto', 'pyfftw' or 'scipy', got {fft_backend!r}")
    if fft_effort not in _EFFORTS:
        raise InputError(f"fft_effort: expected one of {_EFFORTS}, got {fft_effort!r}")
    return _Options(coh, background, _check_threads(threads), fft_backend, fft_effort,
                    bool(remove_ramp), bool(center), bool(progress))


def _prepare(intensity, mask, support, seed, free_fraction, initial_threshold, threads):
    """Validate inputs and build the shared data; raises InputError on bad input."""
    arr = np.asarray(intensity)
    if arr.ndim != 3:
        raise InputError(f"intensity: expected a 3-D array, got {arr.ndim}-D of shape {arr.shape}")
    if min(arr.shape) < 8:
        raise InputError(f"intensity: expected at least 8 voxels per axis, got shape {arr.shape}")
    if np.iscomplexobj(arr) or not np.issubdtype(arr.dtype, np.number):
        raise InputError(f"intensity: expected real counts, got dtype {arr.dtype}")
    shape = arr.shape
    if mask is None:
        masked = np.zeros(shape, dtype=bool)
    else:
        masked = np.asarray(mask)
        if masked.shape != shape:
            raise InputError(f"mask: expected the shape of intensity {shape}, got {masked.shape}")
        if masked.dtype != bool:
            if not np.issubdtype(masked.dtype, np.integer) or not np.isin(masked, (0, 1)).all():
                raise InputError(f"mask: expected booleans (True = not measured), got dtype {masked.dtype}")
            masked = masked.astype(bool)
    measured = ~masked
    if not measured.any():
        raise InputError("mask: every voxel is masked; nothing is measured")
    data = arr.astype(np.float32)
    bad_nan = ~np.isfinite(data) & measured
    if bad_nan.any():
        where = tuple(int(v) for v in np.argwhere(bad_nan)[0])
        raise InputError(f"intensity: {int(bad_nan.sum())} measured voxel(s) are NaN or infinite "
                         f"(first at index {where}); mask them or fix the data")
    bad_neg = (data < 0) & measured
    if bad_neg.any():
        where = tuple(int(v) for v in np.argwhere(bad_neg)[0])
        raise InputError(f"intensity: {int(bad_neg.sum())} measured voxel(s) have negative counts "
                         f"(first at index {where}, value {float(data[where]):.3g}); counts must be >= 0")
    data[masked] = 0
    if not data.any():
        raise InputError("intensity: all measured voxels are zero; there is no diffraction to phase")
    if not 0 <= free_fraction <= 0.2:
        raise InputError(f"free_fraction: expected a fraction in [0, 0.2], got {free_fraction}")
    if not 0 < initial_threshold < 1:
        raise InputError(f"initial_threshold: expected a fraction in (0, 1), got {initial_threshold}")

    ramp = peak_offset(data, masked)
    ratios = estimate_oversampling(data, mask=masked)
    data_f = scipy.fft.ifftshift(data)
    meas_f = scipy.fft.ifftshift(measured)
    del data

    ac = autocorrelation(data_f, meas_f, threads=threads)
    for axis, r in enumerate(ratios):
        if r < 2:
            warnings.warn(f"intensity: oversampling along axis {axis} is about {r:.2f} (< 2 needed "
                          f"for phase retrieval); the crystal fills too much of the array along "
                          f"that axis: crop less or bin the frames less", OversamplingWarning,
                          stacklevel=3)

    if support is None:
        sup_f = autocorrelation_support(data_f, meas_f, initial_threshold, threads=threads, ac=ac)
        frac = sup_f.mean()
        if frac > 0.5:
            raise PhasingError(f"initial support: the thresholded autocorrelation covers "
                               f"{100 * frac:.0f}% of the array (> 50%); the crystal is too large "
                               f"for the array or the data carry a strong background; give "
                               f"'support' or raise 'initial_threshold'")
    else:
        sup = np.asarray(support)
        if sup.shape != shape:
            raise InputError(f"support: expected the shape of intensity {shape}, got {sup.shape}")
        sup = sup.astype(bool)
        frac = sup.mean()
        if not sup.any():
            raise InputError("support: it is empty; expected the voxels that may hold the crystal")
        if frac > 0.5:
            raise InputError(f"support: covers {100 * frac:.1f}% of the array; expected at most 50% "
                             f"(a support larger than half the array cannot be oversampled)")
        sup_f = scipy.fft.ifftshift(sup)
    del ac

    # Free (held-out) voxels: a fixed random set given the seed, the same for
    # every run of an ensemble; the few voxels around the peak stay constrained.
    free_rng = np.random.default_rng(np.random.SeedSequence(seed, spawn_key=(1,)))
    meas_flat = meas_f.reshape(-1)
    near_peak = _near_origin_indices(shape, radius2=4)
    candidates = np.flatnonzero(meas_flat)
    candidates = candidates[~np.isin(candidates, near_peak)]
    n_free = int(round(free_fraction * meas_flat.sum()))
    free_idx = np.sort(free_rng.choice(candidates, size=min(n_free, candidates.size), replace=False))
    del candidates

    amp = data_f.reshape(-1)  # data_f is our own float32 copy: reuse it in place
    np.sqrt(amp, out=amp)
    amp[~meas_flat] = -1.0
    free_amp = amp[free_idx].copy()
    amp[free_idx] = _k.encode_free(free_amp)
    n_con, sum_i, lgam = constrained_sums(amp)
    i_free = free_amp.astype(np.float64) ** 2
    return _Data(
        shape=shape,
        amp=amp,
        free_idx=free_idx.astype(np.int64),
        lgamma=lgam,
        free_lgamma=float(gammaln(i_free + 1).sum()),
        n_constrained=n_con,
        sum_i=sum_i,
        free_sum_i=float(i_free.sum()),
        support0=np.ascontiguousarray(sup_f.reshape(-1)),
        ramp=ramp,
        seed=seed,
    )


def _near_origin_indices(shape, radius2):
    """Flat FFT-order indices of the voxels within sqrt(radius2) of the origin."""
    r = int(np.floor(np.sqrt(radius2)))
    d = np.arange(-r, r + 1)
    g = np.stack(np.meshgrid(d, d, d, indexing="ij"), axis=-1).reshape(-1, 3)
    g = g[(g ** 2).sum(axis=1) <= radius2]
    return np.ravel_multi_index(tuple((g % np.asarray(shape)).T), shape)


def _fit_background(model, amp, current):
    """Maximum-likelihood flat background b for Poisson counts I ~ P(model + b).

    Solves sum I / (m + b) = n over constrained voxels by Newton's method
    from the left (the left side is convex and decreasing in b, so the
    iterates rise monotonically to the root).
    """
    con = amp >= 0
    m = model[con].astype(np.float64)
    i = amp[con].astype(np.float64) ** 2
    n = m.size
    if n == 0:
        return 0.0
    pos = i > 0
    if np.all(m[pos] > 0) and (i / np.maximum(m, 1e-300))[pos].sum() <= n:
        return 0.0
    b = 1e-9 * max(i.mean(), 1e-30)
    for _ in range(50):
        d = m + b
        g = (i / d).sum() - n
        gp = -(i / d ** 2).sum()
        step = -g / gp
        b += step
        if abs(step) <= 1e-7 * max(b, 1e-12):
            break
    return float(max(b, 0.0))


def _run(data: _Data, stages, opts: _Options, run: int, start=None) -> Reconstruction:
    """One run from the random start (data.seed, run), or from ``start`` (flat, FFT
    order) when given; never raises on failure."""
    t0 = time.perf_counter()
    rng = _run_rng(data.seed, run)
    old_threads = numba.get_num_threads()
    numba.set_num_threads(max(1, min(opts.threads, numba.config.NUMBA_NUM_THREADS)))
    try:
        return _iterate(data, stages, opts, run, rng, t0, start)
    finally:
        numba.set_num_threads(old_threads)


def _iterate(data, stages, opts, run, rng, t0, start=None):
    from tqdm import tqdm

    shape = data.shape
    fft = FFTBackend(shape, threads=opts.threads, backend=opts.fft_backend, effort=opts.fft_effort)
    if any(st.support_update == "shrinkwrap" for st in stages):
        fft.real_buffer  # plan the real transforms of the shrink-wrap blur now, not in the loop
    buf = fft.buffer
    bflat = buf.reshape(-1)
    n_vox = fft.size
    inv_n = np.float32(1.0 / n_vox)
    amp = data.amp
    support = data.support0.copy()
    initial_size = int(support.sum())

    x = np.empty(n_vox, dtype=np.complex64)  # the iterate
    if start is None:
        # Random start: measured moduli with random phases, back in real space,
        # restricted to the support (common practice, no source).
        bflat.real = _k.decode_amplitude(amp)
        bflat.imag = 0
        phases = rng.random(n_vox, dtype=np.float32)
        phases *= np.float32(2.0 * np.pi)
        bflat *= np.exp(1j * phases)
        del phases
        fft.backward()
        np.multiply(bflat, inv_n, out=x)
    else:
        x[:] = start
    x[~support] = 0
    bflat[:] = x

    bg_mode = opts.background
    background = np.float32(bg_mode if isinstance(bg_mode, float) else 0.0)
    coh = CoherenceModel(shape, opts.coherence, opts.threads) if opts.coherence else None
    needs_model = coh is not None or bg_mode is not None
    model = np.empty(n_vox, dtype=np.float32) if needs_model else None
    intensity = np.where(amp >= 0, amp, 0) ** 2 if coh is not None else None
    constrained = amp >= 0 if coh is not None else None

    total = sum(st.iterations for st in stages)
    amp_err = np.full(total, np.nan, dtype=np.float32)
    free_err = np.full(total, np.nan, dtype=np.float32)
    sup_hist = np.zeros(total, dtype=np.int64)
    stage_hist = np.zeros(total, dtype=np.int16)
    ck_it, ck_nll, ck_free, ck_bg = [], [], [], []
    n_free = data.free_idx.size
    sum_i = max(data.sum_i, 1e-300)
    free_sum_i = max(data.free_sum_i, 1e-300)
    nan = float("nan")

    def poisson(sums):
        s_con, s_free = sums
        return (nll_per_voxel(s_con, data.lgamma, data.n_constrained),
                nll_per_voxel(s_free, data.free_lgamma, n_free))

    def figures(checkpoint, it_now):
        """Forward-transformed iterate in bflat -> (err, free_err) after the modulus step."""
        nonlocal background
        if needs_model:
            _k.intensity_of(bflat, model)
            if (checkpoint and coh is not None and it_now is not None and stage_coh
                    and it_now >= opts.coherence.start):
                coh.update(model, intensity, constrained, float(background))
            if checkpoint and bg_mode == "fit" and it_now:
                if coh is not None:
                    blurred = coh.blur(model.copy())
                    background = np.float32(_fit_background(blurred, amp, background))
                    del blurred
                else:
                    background = np.float32(_fit_background(model, amp, background))
            if coh is not None:
                coh.blur(model)
            if checkpoint:
                record(poisson(_k.poisson_sum_model(model, amp, background)), it_now)
            return _k.modulus_step_model(bflat, amp, model, background, inv_n)
        if checkpoint:
            record(poisson(_k.poisson_sum_field(bflat, amp, background)), it_now)
        return _k.modulus_step(bflat, amp, inv_n)

    last = {}

    def record(nlls, it_now):
        last["nll"], last["free_nll"] = nlls
        if it_now is not None:
            ck_it.append(it_now)
            ck_nll.append(nlls[0])
            ck_free.append(nlls[1])
            ck_bg.append(float(background))

    status, message = STATUS_OK, ""
    it_global = 0
    stage_coh = False
    t_loop = time.perf_counter()
    bar = tqdm(total=total, disable=not opts.progress, unit="it", leave=False)
    try:
        for si, stage in enumerate(stages):
            code = _k.ALGORITHM_CODES[stage.algorithm]
            beta = np.float32(stage.feedback)
            every = stage.update_every
            n_updates = max(stage.iterations // every, 1)
            s0, s1 = stage.sigma
            stage_coh = stage.coherence_update
            k_update = 0
            if stage.dilate:
                dilate_periodic(support, shape, stage.dilate)
            sup_size = int(support.sum())
            # Averaging stage: the running mean of the estimate P_M x on the
            # support replaces the iterate at the end of the stage.
            mean = np.zeros(n_vox, np.complex64) if stage.average else None
            for it in range(stage.iterations):
                fft.forward()
                err, ferr = figures(it % every == 0, it_global)
                amp_err[it_global] = err / sum_i
                if n_free:
                    free_err[it_global] = ferr / free_sum_i
                fft.backward()
                if mean is not None:
                    mean += bflat
                _k.support_step(x, bflat, support, code, beta)
                sup_hist[it_global] = sup_size
                stage_hist[it_global] = si
                it_global += 1
                bar.update(1)
                if not np.isfinite(err):
                    status = "diverged"
                    message = (f"stage {si} ({stage.algorithm}), iteration {it_global}: the "
                               f"amplitude misfit became {err}; the data or the plan drive the "
                               f"iterate to overflow")
                    break
                if stage.support_update == "shrinkwrap" and (it + 1) % every == 0:
                    frac = k_update / max(n_updates - 1, 1)
                    sigma = s0 * (s1 / s0) ** min(frac, 1.0)
                    sup_size = shrinkwrap(x, support, fft, sigma, stage.threshold)
                    if stage.dilate:
                        sup_size = dilate_periodic(support, shape, stage.dilate)
                    k_update += 1
                    health = support_health(sup_size, initial_size, n_vox)
                    if health != STATUS_OK:
                        status = health
                        message = (f"stage {si} ({stage.algorithm}), iteration {it_global}: the "
                                   f"shrink-wrap support has {sup_size} voxels (initial "
                                   f"{initial_size}, array {n_vox}); {health} - try another "
                                   f"threshold ({stage.threshold}) or blur ({sigma:.2f} voxels)")
                        break
                    if opts.progress:
                        bar.set_postfix_str(f"stage {si} {stage.algorithm} "
                                            f"err {amp_err[it_global - 1]:.3g} support {sup_size}")
            if status != STATUS_OK:
                break
            if mean is not None:
                np.multiply(mean, np.float32(1.0 / stage.iterations), out=x)
                x[~support] = 0
                bflat[:] = x
                del mean
    finally:
        bar.close()

    # Final object: the iterate restricted to the support, and its figures.
    t_finish = time.perf_counter()
    x[~support] = 0
    bflat[:] = x
    fft.forward()
    err, ferr = figures(True, None)
    nll, fnll = last["nll"], last["free_nll"]
    fe = ferr / free_sum_i if n_free else nan

    # One roll takes FFT order to the centred layout and centres the crystal
    # (circular centre of mass of |rho|^2 to n//2); the ramp is then removed
    # in place, relative to the array centre.
    x3 = x.reshape(shape)
    if opts.center and support.any():
        weight = np.abs(x3)
        np.square(weight, out=weight)
        roll = centre_of_mass_shift(weight)
        del weight
    else:
        roll = tuple(n // 2 for n in shape)  # plain fftshift
    shift = tuple(int((r - n // 2) % n) for r, n in zip(roll, shape))
    obj = np.roll(x3, roll, axis=(0, 1, 2))
    sup = np.roll(support.reshape(shape), roll, axis=(0, 1, 2))
    ramp = np.asarray(data.ramp if opts.remove_ramp else np.zeros(3), dtype=float)
    if opts.remove_ramp:
        for axis, (n, q0) in enumerate(zip(shape, ramp)):
            factor = np.exp(-2j * np.pi * q0 / n * (np.arange(n) - n // 2)).astype(np.complex64)
            obj *= factor.reshape([n if a == axis else 1 for a in range(3)])
    if status != STATUS_OK:
        obj = np.zeros(shape, dtype=np.complex64)  # never hand out a broken object
    metrics = Metrics(
        nll=float(nll), free_nll=float(fnll), amplitude_error=float(err / sum_i),
        free_amplitude_error=float(fe), support_size=int(sup.sum()),
        sharpness=sharpness(obj), background=float(background))
    history = History(amp_err[:it_global], free_err[:it_global], sup_hist[:it_global],
                      stage_hist[:it_global], np.asarray(ck_it, dtype=np.int64),
                      np.asarray(ck_nll, dtype=float), np.asarray(ck_free, dtype=float),
                      np.asarray(ck_bg, dtype=float))
    if status == STATUS_OK:
        message = f"{it_global} iterations, final support {metrics.support_size} voxels"
    return Reconstruction(
        obj=obj, support=sup, history=history, metrics=metrics, status=status, message=message,
        seed=data.seed, run=run, iterations=it_global, ramp=ramp, shift=tuple(int(s) for s in shift),
        coherence_kernel=None if coh is None else coh.kernel.copy(),
        coherence_sigma=None if coh is None else coh.sigma,
        fft_backend=fft.name, threads=opts.threads, elapsed=time.perf_counter() - t0,
        plan=list(stages),
        timings={"setup": t_loop - t0, "iterations": t_finish - t_loop,
                 "finish": time.perf_counter() - t_finish},
        coherence_widths=None if coh is None else kernel_principal_widths(coh.kernel)[0],
        coherence_axes=None if coh is None else kernel_principal_widths(coh.kernel)[1])


def _stages(plan):
    return default_plan() if plan is None else plan_from_config(plan)


def _start_in_fft_order(start, shape, ramp):
    """A user-layout object (as :attr:`Reconstruction.obj`) in FFT order with the ramp put back."""
    from braggstrain.phasing.metrics import remove_phase_ramp

    arr = np.asarray(start)
    if arr.shape != shape:
        raise InputError(f"start: expected the shape of intensity {shape}, got {arr.shape}")
    if not np.issubdtype(arr.dtype, np.number):
        raise InputError(f"start: expected a complex object, got dtype {arr.dtype}")
    if not np.all(np.isfinite(arr)):
        raise InputError("start: it holds NaN or infinite values")
    if not np.any(arr):
        raise InputError("start: it is all zeros; expected an object to start from")
    obj = remove_phase_ramp(arr.astype(np.complex64), -np.asarray(ramp, dtype=float))
    return np.ascontiguousarray(scipy.fft.ifftshift(obj).reshape(-1))


def reconstruct(intensity, mask=None, *, support=None, start=None, plan=None, seed=None, progress=False,
                coherence=False, background=None, free_fraction=0.03, threads=None,
                fft_backend="auto", fft_effort=DEFAULT_EFFORT, initial_threshold=0.04,
                remove_ramp=True, center=True, raise_on_failure=True) -> Reconstruction:
    """Reconstruct the complex object of one Bragg peak by iterative phase retrieval.

    Parameters
    ----------
    intensity : ndarray, shape (n0, n1, n2)
        Measured counts with the Bragg peak at index n//2 on every axis (not
        FFT-shifted): intensity = |fftshift(fftn(ifftshift(obj)))|^2.
    mask : ndarray of bool, optional
        True where a voxel was not measured (gaps, hot pixels, beam stop);
        those voxels are left free by the modulus constraint, and their
        values (even NaN) are ignored.
    support : ndarray of bool, optional
        Initial support (crystal centred layout); default: the thresholded
        autocorrelation of the data, or the non-zero voxels of ``start``
        when that is given.  At most half the array.
    start : complex ndarray, optional
        Object to start from instead of a random start, in the layout of
        :attr:`Reconstruction.obj` (centred, phase ramp removed): a previous
        result to refine, or, in a test, the true object (the noise floor of
        a plan: how far its stages take the truth on noisy data).
    plan : list of PhasingStage or dict, optional
        Stages to run (see :mod:`braggstrain.phasing.schedule`); default
        :func:`default_plan`.
    seed : int, optional
        Seed of the random start; with the same seed, data and thread count
        the result is identical.  Drawn at random (and recorded in the result)
        when None.
    progress : bool
        Show a tqdm bar over the iterations, with the stage and the misfit.
    coherence : bool or dict or CoherenceSettings
        Switch on the partial-coherence model (Clark et al. 2012): the
        coherence function is estimated by Richardson-Lucy during stages with
        ``coherence_update``.  Off by default (``"auto"``, the choice between
        the models, needs the runs of :func:`~braggstrain.phasing.ensemble`).
    background : None, "fit" or float
        Flat background per voxel in counts: None means none, a number is
        used as given, ``"fit"`` estimates it by maximum likelihood during the
        run.
    free_fraction : float
        Fraction of measured voxels held out of the modulus constraint for
        the free log-likelihood (0 to disable).
    threads : int, optional
        Threads for the FFTs and kernels; default all cores.
    fft_backend : {"auto", "pyfftw", "scipy"}
    fft_effort : str
        FFTW planner effort.  The default ``"FFTW_ESTIMATE"`` makes the same
        plan in every process, so a run depends only on the data, options,
        seed and thread count; ``"FFTW_MEASURE"`` plans faster FFTs by timing
        them, whose last bits (and so, after many iterations, the outcome)
        may differ between processes (see :mod:`braggstrain.phasing.fft`).
    initial_threshold : float
        Threshold of the autocorrelation for the initial support (fraction of
        its maximum).
    remove_ramp : bool
        Remove the phase ramp due to an off-centre peak (the peak's centre of
        mass offset, recorded in ``ramp``).
    center : bool
        Roll the object so its centre of mass lies at n//2.
    raise_on_failure : bool
        Raise :class:`PhasingError` when the run stops on a collapsing or
        exploding support or diverges (default); with False the result is
        returned with its ``status`` and a zero object.

    Returns
    -------
    Reconstruction

    Raises
    ------
    InputError
        Bad arrays or arguments (the message names the argument).
    PhasingError
        The run failed (``raise_on_failure``).

    Warns
    -----
    OversamplingWarning
        The oversampling ratio estimated from the data is below 2 along an
        axis (the message names the axis and the ratio).
    """
    stages = _stages(plan)
    seed = _as_seed(seed)
    opts = _options(coherence, background, threads, fft_backend, remove_ramp, center, progress,
                    fft_effort)
    if opts.coherence is not None and opts.coherence.choose:
        raise InputError("coherence: 'auto' chooses between the coherent and the partial-coherence "
                         "model over the random starts of an ensemble; one run needs true or false")
    if start is not None and support is None:
        support = np.asarray(start) != 0
    data = _prepare(intensity, mask, support, seed, free_fraction, initial_threshold, opts.threads)
    x0 = None if start is None else _start_in_fft_order(start, data.shape,
                                                        data.ramp if opts.remove_ramp else np.zeros(3))
    if opts.coherence is not None and any(2 * opts.coherence.half_width + 1 > n for n in data.shape):
        raise InputError(f"coherence.half_width: {opts.coherence.half_width} is too wide for "
                         f"an array of shape {data.shape}")
    rec = _run(data, stages, opts, 0, x0)
    if not rec.ok and raise_on_failure:
        raise PhasingError(f"phase retrieval stopped: {rec.message}")
    return rec
