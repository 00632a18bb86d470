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
  reconstruction after the replicas' iterations on the measured counts:
  δδᵀ. The reported reconstruction is not a fixed point of those
  iterations; how far they move it is an error that no spread about the
  baseline shows. Its square is added as a systematic effect not corrected
  for (mean squared error = variance + bias², JCGM 100:2008, F.2.4.5, from
  memory).
"""

from __future__ import annotations

import numpy as np

from braggstrain.errors import InputError
from braggstrain.strain.fields import phase_gradient_covariance

__all__ = ["reconstruction_covariance"]


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
    C = C_runs/K + C_replicas + δδᵀ (module docstring for each term and its
    source). Gradient differences are folded into ±π/(2h), as in
    :func:`~braggstrain.strain.fields.phase_gradient_covariance`.
    """
    runs, replicas = list(runs), list(replicas)
    if replicas and baseline is None:
        raise InputError("baseline: expected the replicas' iterations on the measured counts, got None")
    C, parts = None, []

    def add(c):
        nonlocal C
        C = c if C is None else C + c

    if len(runs) >= 2:
        add(phase_gradient_covariance(runs, voxel_size, support, order=order) / len(runs))
        parts.append(f"the spread of the {len(runs)} kept random starts (variance of their mean)")
    if len(replicas) >= 2:
        add(phase_gradient_covariance(replicas, voxel_size, support, order=order))
        add(phase_gradient_covariance([reconstruction], voxel_size, support, center=baseline, order=order))
        parts.append(f"the spread of {len(replicas)} Poisson replicas of the counts, each phased from the "
                     f"converged object, and the reconstruction's offset from the point those iterations "
                     f"settle to on the measured counts")
    return C, parts
