"""Small dataclasses that travel between stages."""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from braggstrain.errors import InputError
from braggstrain.strain.grid import Grid

__all__ = ["SampleObject"]


@dataclass
class SampleObject:
    """One reflection's reconstruction on an orthonormal sample-frame grid.

    Attributes
    ----------
    obj : complex64 ndarray, shape (nx, ny, nz)
        Complex object ρ = s·exp(−i G·u); axes 0, 1, 2 along sample-frame
        x, y, z.
    voxel_size : (3,) float ndarray
        Voxel edge along x, y, z, Å.
    g_vector : (3,) float ndarray
        The reflection's G in the sample frame, Å⁻¹ (2π included).
    support : bool ndarray, same shape as ``obj``
        Voxels inside the crystal.
    origin : (3,) float ndarray
        Sample-frame position (Å) of the voxel at index n//2 on each axis;
        :attr:`grid` converts between indices and positions.
    hkl : tuple of 3 int, optional
        Miller indices of the reflection.
    meta : dict
        Free-form provenance (route, shifts, twin choice, ...); plain values only.
    """

    obj: np.ndarray
    voxel_size: np.ndarray
    g_vector: np.ndarray
    support: np.ndarray
    origin: np.ndarray = field(default_factory=lambda: np.zeros(3))
    hkl: tuple | None = None
    meta: dict = field(default_factory=dict)

    def __post_init__(self):
        self.obj = np.asarray(self.obj)
        if self.obj.ndim != 3:
            raise InputError(f"SampleObject.obj: expected a 3-D complex array, got shape {self.obj.shape}")
        self.obj = self.obj.astype(np.complex64, copy=False)
        self.voxel_size = np.broadcast_to(np.asarray(self.voxel_size, float), (3,)).copy()
        if np.any(self.voxel_size <= 0):
            raise InputError(f"SampleObject.voxel_size: expected positive Å, got {self.voxel_size}")
        self.g_vector = np.asarray(self.g_vector, float).reshape(3)
        self.support = np.asarray(self.support, dtype=bool)
        if self.support.shape != self.obj.shape:
            raise InputError(f"SampleObject.support: shape {self.support.shape} differs from obj {self.obj.shape}")
        self.origin = np.asarray(self.origin, float).reshape(3)
        if self.hkl is not None:
            self.hkl = tuple(int(v) for v in self.hkl)

    @property
    def shape(self):
        return self.obj.shape

    @property
    def grid(self):
        """The object's :class:`~braggstrain.strain.grid.Grid` (shape, voxel
        size, origin): the one index ↔ position conversion."""
        return Grid(self.obj.shape, self.voxel_size, self.origin)
