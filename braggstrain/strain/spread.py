"""The spread of one reflection's reconstructions as a phase-gradient covariance.

A reconstruction's phase gradient ∇φ differs from the truth's through the
noise of the counts, through where the random start led it, and through how
far it sits from the point that the phasing iterations settle to. Each of
these is measured from the data alone (no truth) and turned into a 3×3
covariance per voxel, in (rad/Å)², which :func:`~braggstrain.strain.tensor.strain_tensor`
propagates through the solve (docs/strain.md, "Error bars"):

* the kept random starts, K ≥ 2: their sample covariance over K, the
  variance of their mean (JCGM 100:2008, §4.2.3);
* the Poisson replicas, R ≥ 2: their sample covariance about their own
  mean, the bootstrap estimate of the standard error (Efron & Tibshirani,
  An Introduction to the Bootstrap, 1993, eq. 6.6);
* the offset δ = ∇φ_reconstruction − ∇φ_baseline, where the baseline is the
  reconstruction after the replicas' iterations on the measured counts.
  The reported reconstruction is not a fixed point of those iterations; how
  far they move it is an error that the replicas' spread does not show (the
  counts are the same for both). Two spreads see part of |δ|² already: if
  each run stops short in its own direction, their mean stops short by about
  C_runs/K; and the iterations' own wander (RAAR on noisy counts) moves the
  baseline as it moves every replica, so it is in C_rep. So only the excess
  is added, the method-of-moments estimate of a systematic offset
  (DerSimonian & Laird, Control. Clin. Trials 7, 177, 1986, as for the
  misfit between reflections in :mod:`braggstrain.strain.tensor`):

      f = max(0, 1 − ⟨tr C_runs/K + tr C_rep⟩ / ⟨|δ|²⟩),   C += f δδᵀ

  with ⟨·⟩ the Gaussian-weighted mean over the voxels around
  (:data:`POOL_SIGMA` voxels, :func:`local_mean`); C_runs/K is left out
  when fewer than two runs were kept. An offset added in
  quadrature is an uncorrected systematic effect (JCGM 100:2008, F.2.4.5,
  from memory).
"""

from __future__ import annotations

import numpy as np
from scipy import ndimage as ndi

from braggstrain.errors import InputError
from braggstrain.strain.fields import phase_gradient_covariance

__all__ = ["POOL_SIGMA", "local_mean", "reconstruction_covariance"]

#: Gaussian σ (voxels) of the neighbourhood over which variance estimates are pooled (common practice,
#: no source)
POOL_SIGMA = 1.5


def local_mean(values, usable, sigma=POOL_SIGMA):
    """Gaussian-weighted mean of ``values`` over the ``usable`` voxels around each voxel.

    ``values`` and ``usable`` have the grid's shape; NaN where no usable
    voxel is near.
    """
    usable = np.asarray(usable, bool) & np.isfinite(values)
    num = ndi.gaussian_filter(np.where(usable, values, 0.0).astype(float), sigma, mode="constant")
    den = ndi.gaussian_filter(usable.astype(float), sigma, mode="constant")
    with np.errstate(invalid="ignore", divide="ignore"):
        return num / den


def reconstruction_covariance(reconstruction, voxel_size, support, *, runs=(), replicas=(), baseline=None,
                              order=2):
    """Phase-gradient covariance of one reflection's reconstruction, per voxel.

    Parameters
    ----------
    reconstruction : complex 3-D array
        The reported object (the average of the kept runs), on the grid the
        tensor uses.
    voxel_size : float or 3 floats, Å
    support : bool array
        Voxels where gradients are taken (the tensor's common support).
    runs : sequence of complex 3-D arrays
        The kept random starts, same grid; used when there are at least two.
    replicas : sequence of complex 3-D arrays
        Poisson replicas, each phased from the reconstruction; used when
        there are at least two.
    baseline : complex 3-D array, optional
        The same iterations as the replicas', on the measured counts. Needed
        with replicas (it gives δ).
    order : {2, 4}
        Finite-difference order, as the tensor uses.

    Returns
    -------
    covariance : float32 (3, 3, nx, ny, nz) or None
        (rad/Å)²; None when nothing was given to estimate it from.
    parts : list of str
        What the covariance includes, in words.

    Notes
    -----
    C = C_runs/K + C_replicas + f δδᵀ (module docstring for each term, f and
    their sources). Gradient differences are folded into ±π/(2h), as in
    :func:`~braggstrain.strain.fields.phase_gradient_covariance`.
    """
    runs, replicas = list(runs), list(replicas)
    if replicas and baseline is None:
        raise InputError("baseline: expected the replicas' iterations on the measured counts, got None")
    C, parts = None, []

    def add(c):
        nonlocal C
        C = c if C is None else C + c

    c_runs = None
    if len(runs) >= 2:
        c_runs = phase_gradient_covariance(runs, voxel_size, support, order=order) / len(runs)
        add(c_runs)
        parts.append(f"the spread of the {len(runs)} kept random starts (variance of their mean)")
    if len(replicas) >= 2:
        c_rep = phase_gradient_covariance(replicas, voxel_size, support, order=order)
        add(c_rep)
        dd = phase_gradient_covariance([reconstruction], voxel_size, support, center=baseline, order=order)
        # what the spreads already explain of |δ|²: the runs' stopping short (C_runs/K) and the
        # iterations' own wander, which moves the baseline as it moves every replica (C_rep)
        seen = np.trace(c_rep) if c_runs is None else np.trace(c_rep) + np.trace(c_runs)
        inside = np.asarray(support, bool)
        with np.errstate(invalid="ignore", divide="ignore"):
            f = np.clip(1.0 - local_mean(seen.astype(float), inside) / local_mean(np.trace(dd).astype(float), inside),
                        0.0, 1.0)
        add(dd * np.where(np.isfinite(f), f, 0.0).astype(np.float32))
        parts.append(f"the spread of {len(replicas)} Poisson replicas of the counts, each phased from the "
                     f"converged object, and the reconstruction's offset from the point those iterations "
                     f"settle to on the measured counts (beyond what the kept runs' and the replicas' "
                     f"spreads show)")
    return C, parts
