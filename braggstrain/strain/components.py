"""The strain tensor's components: one order, one split of the displacement gradient.

Conventions (docs/design.md): D_ik = ∂u_i/∂x_k, strain ε = (D + Dᵀ)/2
(dimensionless, tensile positive), rotation ω the axial vector of
(D − Dᵀ)/2 in radians (ω_x = (D_zy − D_yz)/2, ω_y = (D_xz − D_zx)/2,
ω_z = (D_yx − D_xy)/2). The six independent components of a symmetric
tensor are stored and reported in the order of :data:`STRAIN_COMPONENTS`
everywhere (results file, VTK, figures, report, planner).
"""

from __future__ import annotations

import numpy as np

from braggstrain.errors import InputError

__all__ = ["STRAIN_COMPONENTS", "STRAIN_PAIRS", "strain_components", "strain_from_components",
           "split_gradient", "gradient_from"]

#: Order of the six independent components of a symmetric tensor (sample frame).
STRAIN_COMPONENTS = ("xx", "yy", "zz", "yz", "xz", "xy")
#: The (i, k) index pair of each name of :data:`STRAIN_COMPONENTS`.
STRAIN_PAIRS = ((0, 0), (1, 1), (2, 2), (1, 2), (0, 2), (0, 1))


def strain_components(strain):
    """The six independent components (xx, yy, zz, yz, xz, xy) of a
    symmetric (3, 3, ...) field, stacked along a new first axis."""
    e = np.asarray(strain)
    if e.shape[:2] != (3, 3):
        raise InputError(f"strain: expected a (3, 3, ...) tensor field, got shape {e.shape}")
    return np.stack([e[i, k] for i, k in STRAIN_PAIRS])


def strain_from_components(components):
    """Inverse of :func:`strain_components`: (6, ...) → symmetric (3, 3, ...)."""
    c = np.asarray(components)
    if c.shape[0] != 6:
        raise InputError(f"components: expected 6 components (xx, yy, zz, yz, xz, xy) first, got shape {c.shape}")
    e = np.empty((3, 3) + c.shape[1:], dtype=c.dtype)
    for m, (i, k) in enumerate(STRAIN_PAIRS):
        e[i, k] = c[m]
        e[k, i] = c[m]
    return e


def split_gradient(gradient):
    """Strain ε = (D + Dᵀ)/2 and rotation vector ω of D = ∂u_i/∂x_k, (3, 3, ...).

    Returns
    -------
    strain : (3, 3, ...) array
    rotation : (3, ...) array, radians (ω_x = (D_zy − D_yz)/2, ...)
    """
    D = np.asarray(gradient)
    eps = 0.5 * (D + np.swapaxes(D, 0, 1))
    rot = 0.5 * np.stack([D[2, 1] - D[1, 2], D[0, 2] - D[2, 0], D[1, 0] - D[0, 1]])
    return eps, rot


def gradient_from(strain, rotation):
    """Inverse of :func:`split_gradient`: D = ε + W, W the antisymmetric
    tensor of the rotation vector ω."""
    D = np.array(strain, copy=True)
    wx, wy, wz = rotation
    D[2, 1] += wx
    D[1, 2] -= wx
    D[0, 2] += wy
    D[2, 0] -= wy
    D[1, 0] += wz
    D[0, 1] -= wz
    return D
