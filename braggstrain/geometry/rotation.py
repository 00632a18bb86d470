"""Rotations: every rotation matrix of the project, through scipy's ``Rotation``.

``scipy.spatial.transform.Rotation`` builds and composes the rotations
(``from_rotvec``, ``from_euler``, ``as_matrix``); this module only states the
project's conventions once:

* a diffractometer circle's axis is written ``"x+"``, ``"y-"``, …: the lab
  axis and the sense; ``+`` turns right-handed about the axis (a positive
  angle turns y towards z about x+), ``-`` left-handed (docs/design.md,
  frames; the convention of xrayutilities' ``QConversion``, which computes
  the pixel Q from the same strings);
* a rotation vector is the axis times the angle in radians, right-handed
  (Rodrigues' rotation);
* Bunge Euler angles (φ1, Φ, φ2) give the *passive* rotation g taking
  specimen components to crystal components,
  g = R_z(φ2)ᵀ·R_x(Φ)ᵀ·R_z(φ1)ᵀ with R the active rotations (H.-J. Bunge,
  Texture Analysis in Materials Science, 1982, ch. 2), i.e. the transpose
  of scipy's intrinsic "ZXZ" rotation.

Matrices act on column vectors: v_lab = R·v.
"""

from __future__ import annotations

import numpy as np
from scipy.spatial.transform import Rotation

from braggstrain.errors import InputError

__all__ = ["AXES", "axis_vector", "axis_rotation", "rotation_about", "rotation_from_rotvec", "bunge_matrix"]

#: Unit vectors of the lab axes.
AXES = {"x": np.array([1.0, 0, 0]), "y": np.array([0, 1.0, 0]), "z": np.array([0, 0, 1.0])}


def axis_vector(spec):
    """Unit vector of an axis string ``"x+"`` … ``"z-"`` (sense included)."""
    if not isinstance(spec, str) or len(spec) != 2 or spec[0] not in AXES or spec[1] not in "+-":
        raise InputError(f"axis '{spec}': expected one of x+, x-, y+, y-, z+, z-")
    return AXES[spec[0]] * (1.0 if spec[1] == "+" else -1.0)


def _matrices(rotvecs, shape):
    m = Rotation.from_rotvec(rotvecs.reshape(-1, 3)).as_matrix()
    return m.reshape(shape + (3, 3))


def axis_rotation(spec, angle_rad):
    """Rotation matrices about a lab axis (``"x+"``, ``"z-"``, …) for angles in radians.

    Right-handed about the signed axis, so ``("x-", a)`` equals ``("x+", −a)``.

    Returns an array of shape (..., 3, 3) for an array of angles of shape (...).
    """
    a = np.asarray(angle_rad, dtype=float)
    return _matrices(a[..., None] * axis_vector(spec), a.shape)


def rotation_about(axis, angle_rad):
    """Rotation matrix (3, 3) by ``angle_rad`` right-handed about a 3-vector ``axis`` (any length)."""
    k = np.asarray(axis, float).reshape(3)
    n = np.linalg.norm(k)
    if not np.isfinite(n) or n == 0:
        raise InputError(f"axis: expected a non-zero 3-vector, got {axis!r}")
    return Rotation.from_rotvec(k / n * float(angle_rad)).as_matrix()


def rotation_from_rotvec(rotvec):
    """Rotation matrix (3, 3) of a rotation vector (axis × angle in radians, right-handed)."""
    v = np.asarray(rotvec, dtype=float).reshape(3)
    return Rotation.from_rotvec(v).as_matrix()


def bunge_matrix(euler_deg):
    """Rotation g (specimen → crystal) of Bunge Euler angles (φ1, Φ, φ2), degrees.

    The passive rotation g = R_z(φ2)·R_x(Φ)·R_z(φ1) of Bunge's convention
    (H.-J. Bunge, Texture Analysis in Materials Science, 1982, ch. 2), with
    R_z(a) = [[cos a, sin a, 0], [−sin a, cos a, 0], [0, 0, 1]] and R_x
    alike: a vector with specimen components v_s has crystal components
    g·v_s. The rows of g are the crystal axes in specimen coordinates, its
    third column the specimen normal (ND) in crystal coordinates. Computed as
    the transpose of scipy's intrinsic ``from_euler("ZXZ", (φ1, Φ, φ2))``.
    """
    e = np.asarray(euler_deg, dtype=float).reshape(-1)
    if e.shape != (3,) or not np.all(np.isfinite(e)):
        raise InputError(f"euler_deg: expected three finite Bunge angles (φ1, Φ, φ2) in degrees, got {euler_deg!r}")
    return Rotation.from_euler("ZXZ", e, degrees=True).as_matrix().T
