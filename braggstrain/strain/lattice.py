"""Absolute versus relative strain: the mean lattice of the crystal from its peak positions.

The reconstructions give strain relative to the lattice whose G vectors
centred them; the peak positions themselves measure the mean homogeneous
deformation (docs/methods.md, mean lattice).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from braggstrain.errors import TensorError
from braggstrain.strain.components import split_gradient
from braggstrain.strain.tensor import MAX_CONDITION, _check_set

__all__ = ["MeanLattice", "mean_lattice_strain"]


@dataclass
class MeanLattice:
    """Mean homogeneous deformation of the crystal from its peak positions.

    Attributes
    ----------
    displacement_gradient : (3, 3) float
        D₀ (exact for a homogeneous deformation: F = I + D₀ with
        G_meas = F⁻ᵀ G_ref).
    strain : (3, 3) float
        (D₀ + D₀ᵀ)/2.
    rotation : (3,) float
        Axial vector of (D₀ − D₀ᵀ)/2, radians.
    lattice_parameter : float or None
        Mean cubic lattice parameter a_ref·det(F)^{1/3}, Å (when a
        reference lattice parameter was given).
    lattice_parameter_per_reflection : (J,) float or None
        a_ref·|G_ref,j|/|G_meas,j|, Å: what each peak alone says for a
        cubic lattice.
    residual : float
        RMS misfit |G_meas − F⁻ᵀG_ref| over the reflections, Å⁻¹ (zero for
        three reflections).
    condition_number : float
        Of the reference G set.
    """

    displacement_gradient: np.ndarray
    strain: np.ndarray
    rotation: np.ndarray
    lattice_parameter: float | None
    lattice_parameter_per_reflection: np.ndarray | None
    residual: float
    condition_number: float


def mean_lattice_strain(g_measured, g_reference, lattice_parameter=None, *, max_condition=MAX_CONDITION):
    """Mean displacement gradient D₀ from measured and reference G vectors.

    Derivation: a homogeneous deformation F = I + D₀ takes the real-space
    lattice vectors a_i to F a_i, so the reciprocal basis B = 2π A⁻ᵀ becomes
    2π (F A)⁻ᵀ = F⁻ᵀ B and every reflection moves to G_meas = F⁻ᵀ G_ref,
    i.e. G_meas ≈ (I − D₀ᵀ) G_ref to first order. A tensile strain therefore
    shortens G (Bragg's law: d grows, |G| = 2π/d falls). Here M = F⁻ᵀ is
    found by least squares over the J ≥ 3 reflections,
    M = argmin Σ_j |G_meas,j − M G_ref,j|², and D₀ = M⁻ᵀ − I.

    Parameters
    ----------
    g_measured : (J, 3) array
        G from the measured peak positions, sample frame, Å⁻¹.
    g_reference : (J, 3) array
        G of the same reflections from the reference lattice, Å⁻¹.
    lattice_parameter : float, optional
        Cubic reference lattice parameter, Å, for the implied mean a.
    max_condition : float
        Refuse ill-conditioned sets.

    Returns
    -------
    MeanLattice
    """
    Gm = np.asarray(g_measured, dtype=float)
    Gr = np.asarray(g_reference, dtype=float)
    for name, g in (("g_measured", Gm), ("g_reference", Gr)):
        if g.ndim != 2 or g.shape[1] != 3 or not np.all(np.isfinite(g)):
            raise TensorError(f"{name}: expected a (J, 3) array of finite G vectors in Å⁻¹, got shape {g.shape}")
    if Gm.shape != Gr.shape:
        raise TensorError(f"g_measured: shape {Gm.shape} differs from g_reference {Gr.shape}; expected one pair per reflection")
    J = Gm.shape[0]
    labels = [f"G_ref[{j}]" for j in range(J)]
    if J < 3:
        raise TensorError(f"g_reference: {J} reflection(s); the mean deformation needs at least three non-coplanar reflections")
    cond = _check_set(Gr, labels, max_condition)
    # Gm_j = M Gr_j for all j  <=>  Gr @ Mᵀ = Gm
    Mt, *_ = np.linalg.lstsq(Gr, Gm, rcond=None)
    M = Mt.T
    F = np.linalg.inv(M).T
    D0 = F - np.eye(3)
    res = float(np.sqrt(np.mean(np.sum((Gm - Gr @ M.T) ** 2, axis=1))))
    a, a_j = None, None
    if lattice_parameter is not None:
        a_ref = float(lattice_parameter)
        if not np.isfinite(a_ref) or a_ref <= 0:
            raise TensorError(f"lattice_parameter: expected a positive length in Å, got {lattice_parameter!r}")
        a = a_ref * float(np.linalg.det(F)) ** (1.0 / 3.0)
        a_j = a_ref * np.linalg.norm(Gr, axis=1) / np.linalg.norm(Gm, axis=1)
    eps, rot = split_gradient(D0)
    return MeanLattice(D0, eps, rot, a, a_j, res, cond)
