"""Argument checks shared by the stages (private: one place, no sibling imports).

Every check raises :class:`~braggstrain.errors.InputError` naming the
argument and what was expected, and returns the value in the form the
stages compute with. The stages import these instead of each other's
private helpers (scikit-image keeps its shared checks in ``skimage/_shared``
the same way).
"""

from __future__ import annotations

import numpy as np

from braggstrain.errors import InputError

__all__ = ["complex3d", "voxel_size", "g_vector", "mask_of_shape"]


def complex3d(obj, name="obj", min_size=1):
    """A finite complex 3-D array (complex64), from an array or a SampleObject.

    Parameters
    ----------
    obj : complex ndarray, shape (nx, ny, nz), or an object with ``.obj``
        ρ = s·exp(−i G·u), axes along sample-frame x, y, z.
    name : str
        The argument's name, for messages.
    min_size : int
        Fewest voxels accepted along each axis.
    """
    from braggstrain.strain.objects import SampleObject

    if isinstance(obj, SampleObject):
        obj = obj.obj
    arr = np.asarray(obj)
    if arr.ndim != 3:
        raise InputError(f"{name}: expected a 3-D complex array (axes x, y, z), got shape {arr.shape}")
    if not np.iscomplexobj(arr):
        raise InputError(f"{name}: expected a complex array ρ = s·exp(−i G·u), got dtype {arr.dtype}")
    if not np.all(np.isfinite(arr)):
        raise InputError(f"{name}: contains NaN or infinite values; expected finite complex values")
    if min(arr.shape) < min_size:
        raise InputError(f"{name}: expected at least {min_size} voxels along each axis, got shape {arr.shape}")
    return arr.astype(np.complex64, copy=False)


def voxel_size(value, name="voxel_size"):
    """One or three positive voxel edges in Å, as a (3,) float array."""
    try:
        vs = np.broadcast_to(np.asarray(value, dtype=float), (3,)).copy()
    except (ValueError, TypeError):
        raise InputError(f"{name}: expected one or three voxel edges in Å, got {value!r}") from None
    if not np.all(np.isfinite(vs)) or np.any(vs <= 0):
        raise InputError(f"{name}: expected positive voxel edges in Å, got {value!r}")
    return vs


def g_vector(value, name="g_vector"):
    """A non-zero G vector of three finite components in Å⁻¹, as a (3,) float array."""
    g = np.asarray(value, dtype=float)
    if g.shape != (3,) or not np.all(np.isfinite(g)) or np.linalg.norm(g) == 0:
        raise InputError(f"{name}: expected a non-zero G vector of 3 finite components in Å⁻¹, got {value!r}")
    return g


def mask_of_shape(mask, shape, name="support", nonempty=False):
    """A boolean mask of the given shape (non-zero values count as True).

    With ``nonempty`` an all-False mask is refused.
    """
    s = np.asarray(mask)
    if s.shape != tuple(shape):
        raise InputError(f"{name}: expected a boolean array of shape {tuple(shape)}, got shape {s.shape}")
    s = s.astype(bool, copy=False) if s.dtype == bool else (s > 0.5) if s.dtype.kind == "f" else s != 0
    if nonempty and not s.any():
        raise InputError(f"{name}: the mask is empty; expected True inside the crystal")
    return s
