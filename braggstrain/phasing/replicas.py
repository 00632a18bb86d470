"""Poisson replicas of a measurement, each phased from the converged solution.

How much a reconstruction moves when the photon counts are drawn again is
the part of its error that the spread of the random starts cannot show (all
starts see the same counts). :func:`poisson_replicas` estimates it by a
parametric bootstrap (Efron & Tibshirani, An Introduction to the Bootstrap,
1993, ch. 6, the bootstrap estimate of a standard error): each replica draws
new counts I* ~ Poisson(λ) from the converged object's own model intensity λ
(|Ψ|², convolved with the coherence kernel when the object was phased with
one, scaled to the measured total), a fresh measurement of the fitted
object, and is phased from the converged object with its support held fixed
(RAAR, then ER, the closing stages of the default plan). Drawing from the
measured counts instead, I* ~ Poisson(I), gives the same scatter where
counts are many, but not where they are few: a pixel that counted 0 never
varies, and one that counted 3 varies as if its mean were 3. Measured on the
demo crystal at 10⁴ peak counts, that draw gave σ wider than the error
(docs/strain.md, "Measured error-bar coverage"). The same iterations on the measured counts give
the *baseline*; a replica's deviation from the baseline is then due to the
counts alone, not to the few closing iterations themselves.

Every replica is reproducible from (seed, replica index); each is one task
of ``executor.map`` so a process pool or a Dask client can run them.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from braggstrain.errors import InputError
from braggstrain.phasing.coherence import CoherenceModel, CoherenceSettings
from braggstrain.phasing import kernels as _k
from braggstrain.phasing.fft import FFTBackend

__all__ = ["ReplicaSet", "poisson_replicas"]


@dataclass
class ReplicaSet:
    """Objects phased from Poisson replicas of one measurement.

    Attributes
    ----------
    baseline : complex64 (n0, n1, n2)
        The converged object after the same iterations on the measured
        counts (same layout as the input object: crystal centred, phase ramp
        removed).
    replicas : complex64 (R, n0, n1, n2)
        One object per replica, same layout.
    iterations : int
        Iterations per replica (RAAR, then ER).
    seed : int
    """

    baseline: np.ndarray
    replicas: np.ndarray
    iterations: int
    seed: int


def _ramp_factor(shape, ramp, sign):
    """exp(sign·2πi q0 (x − n//2)/n) per axis, q0 the peak offset in voxels."""
    out = np.ones(shape, np.complex64)
    for axis, (n, q0) in enumerate(zip(shape, ramp)):
        f = np.exp(sign * 2j * np.pi * q0 / n * (np.arange(n) - n // 2)).astype(np.complex64)
        out *= f.reshape([n if a == axis else 1 for a in range(3)])
    return out


def _phase_one(args):
    """One replica (index ≥ 0) or the baseline (index −1); module level so it pickles."""
    intensity, mask, obj, support, ramp, iterations, seed, index, beta, raar_fraction, kernel = args
    shape = intensity.shape
    meas = np.fft.ifftshift(~mask)
    sup = np.fft.ifftshift(support)
    factor = _ramp_factor(shape, ramp, +1)
    x = np.fft.ifftshift(obj * factor).astype(np.complex64)
    fft = FFTBackend(shape, threads=1)
    buf = fft.buffer
    bflat = buf.reshape(-1)
    n = np.float32(1.0 / buf.size)
    n_raar = int(round(raar_fraction * iterations))
    coh = None
    if kernel is not None:  # the partial-coherence model the object was phased with, kernel fixed
        coh = CoherenceModel(shape, CoherenceSettings(half_width=kernel.shape[0] // 2))
        coh.kernel, coh.is_delta = np.asarray(kernel, float), False
        model = np.empty(buf.size, np.float32)
    measured_counts = np.fft.ifftshift(np.clip(intensity, 0, None)).astype(np.float32)
    if index >= 0:
        # parametric bootstrap: new counts from the converged object's own model intensity (the
        # modulus step's model: |Ψ|², convolved with the coherence kernel when there is one),
        # scaled to the measured total over the measured pixels
        buf[...] = x
        fft.forward()
        expected = (np.abs(bflat) ** 2).astype(np.float32)
        if coh is not None:
            coh.blur(expected)
        expected = np.where(meas.reshape(-1), expected, 0.0).reshape(shape)
        total = float(expected.sum())
        if total > 0:
            expected *= float(np.sum(measured_counts[meas])) / total
        rng = np.random.default_rng(np.random.SeedSequence(seed, spawn_key=(2, int(index))))
        counts = rng.poisson(expected).astype(np.float32)
    else:
        counts = measured_counts
    amp = np.sqrt(counts)
    if coh is not None:
        amp_model = np.where(meas, amp, -1).astype(np.float32).reshape(-1)  # < 0: left free
    for it in range(iterations):
        buf[...] = x
        fft.forward()
        if coh is None:
            scale = np.where(meas, amp / np.maximum(np.abs(buf), 1e-30), 1.0).astype(np.float32)
            buf *= scale
        else:  # the phasing engine's modulus step against |Psi|^2 convolved with the kernel
            _k.intensity_of(bflat, model)
            coh.blur(model)
            _k.modulus_step_model(bflat, amp_model, model, np.float32(0.0), np.float32(1.0))
        fft.backward()
        y = buf * n
        if it < n_raar:
            x = np.where(sup, y, beta * x + (1 - 2 * beta) * y).astype(np.complex64)
        else:
            x = np.where(sup, y, 0).astype(np.complex64)
    x[~sup] = 0
    return (np.fft.fftshift(x) * _ramp_factor(shape, ramp, -1)).astype(np.complex64)


def poisson_replicas(intensity, mask, obj, support, *, ramp=None, replicas=8, iterations=90, seed=0,
                     executor=None, beta=0.9, raar_fraction=1 / 3, coherence_kernel=None):
    """Phase Poisson replicas of ``intensity`` from the converged ``obj``.

    Parameters
    ----------
    intensity : (n0, n1, n2) array
        The measured counts the object was phased from, peak at n//2. The
        baseline is phased from them; the replicas' counts are drawn from the
        object's model intensity, scaled to their total (module docstring).
    mask : bool array or None
        True where not measured (left free, as in phasing).
    obj : complex (n0, n1, n2)
        The converged object (e.g. an ensemble's average), crystal centred,
        phase ramp ``ramp`` removed.
    support : bool (n0, n1, n2)
        Its support, held fixed.
    ramp : 3 floats, optional
        Peak offset in voxels whose phase ramp was removed from ``obj``
        (``EnsembleResult.ramp``); put back for the modulus step and removed
        again from the results.
    replicas : int
        Number of replicas (≥ 2).
    iterations : int
        Iterations per replica: the fraction ``raar_fraction`` RAAR (feedback
        ``beta``), then ER. With the default (the closing RAAR → ER of the
        default plan) the replicas bootstrap the procedure that made the
        object, whose wandering on noisy data grows faster than the linear
        response at low counts; ``raar_fraction=0`` (ER alone, which from the
        converged object settles into the nearest solution) gives the linear
        response to the counts only.
    seed : int
        Replica r draws its counts from ``SeedSequence(seed, spawn_key=(2, r))``.
    executor : object with ``map``, optional
        Where the replicas run (default: in this process).
    coherence_kernel : ndarray (2w+1,)*3, optional
        The coherence function the object was phased with (an ensemble's
        ``coherence_kernel`` when it kept the partial model): the modulus
        step then uses |Psi|^2 convolved with it, held fixed.

    Returns
    -------
    ReplicaSet
    """
    I = np.asarray(intensity, np.float32)
    if I.ndim != 3:
        raise InputError(f"intensity: expected a 3-D array of counts, got shape {I.shape}")
    shape = I.shape
    m = np.zeros(shape, bool) if mask is None else np.asarray(mask, bool)
    o = np.asarray(obj, np.complex64)
    s = np.asarray(support, bool)
    for name, a in (("mask", m), ("obj", o), ("support", s)):
        if a.shape != shape:
            raise InputError(f"{name}: expected the shape of intensity {shape}, got {a.shape}")
    if not s.any():
        raise InputError("support: empty; expected the voxels of the converged object")
    if isinstance(replicas, bool) or not isinstance(replicas, (int, np.integer)) or replicas < 2:
        raise InputError(f"replicas: expected an integer ≥ 2, got {replicas!r}")
    if isinstance(iterations, bool) or not isinstance(iterations, (int, np.integer)) or iterations < 3:
        raise InputError(f"iterations: expected an integer ≥ 3, got {iterations!r}")
    r = np.zeros(3) if ramp is None else np.asarray(ramp, float).reshape(3)
    I = np.where(m | ~np.isfinite(I), 0, I)
    if not 0 <= raar_fraction <= 1:
        raise InputError(f"raar_fraction: expected a fraction in [0, 1], got {raar_fraction!r}")
    kern = None
    if coherence_kernel is not None:
        kern = np.asarray(coherence_kernel, float)
        if kern.ndim != 3 or len(set(kern.shape)) != 1 or kern.shape[0] % 2 != 1 or np.any(kern < 0) \
                or not kern.sum() > 0 or kern.shape[0] > min(shape):
            raise InputError(f"coherence_kernel: expected a non-negative cube of odd size up to the array's, "
                             f"got shape {kern.shape}")
        kern = kern / kern.sum()
    tasks = [(I, m, o, s, r, int(iterations), int(seed), k, float(beta), float(raar_fraction), kern)
             for k in range(-1, int(replicas))]
    mapper = map if executor is None else executor.map
    out = list(mapper(_phase_one, tasks))
    if out and hasattr(out[0], "result"):
        out = list(executor.gather(out)) if hasattr(executor, "gather") else [f.result() for f in out]
    return ReplicaSet(baseline=out[0], replicas=np.stack(out[1:]), iterations=int(iterations), seed=int(seed))
