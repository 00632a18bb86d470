"""The sample-frame grid: the one conversion between array indices and positions.

Every array of the frame, registration, tensor, defects and output stages
lies on a :class:`Grid`: axes 0, 1, 2 along sample-frame x, y, z, a voxel
edge ``voxel_size`` (Å) per axis, and an ``origin``, the sample-frame
position (Å) of the voxel at index n//2 on each axis. The voxel at
(fractional) index i lies at

    r = origin + (i − n//2) · voxel_size          (per axis)

and this module is the only place where that formula is written: stages
and outputs convert with :meth:`Grid.position` and :meth:`Grid.index`
(and :meth:`Grid.axis`, :meth:`Grid.coordinates`, :attr:`Grid.corner`), so
a grid whose origin is not zero gives the same positions in the results
file's ``/grid/x, y, z``, the dislocation lines, the tables, the VTK files,
the figures and the report (docs/results.md).

What position zero means: the phasing stage centres each reconstruction's
centre of mass at the array centre, and the frame stage maps that centre to
position 0, so positions are relative to the reference reflection's
centre of mass (within half a voxel), unless the pipeline file sets
``[frame] origin_nm``.
"""

from __future__ import annotations

from collections.abc import Mapping

import numpy as np

from braggstrain.errors import InputError

__all__ = ["Grid"]


def _vec3(value, name, positive=False):
    try:
        v = np.broadcast_to(np.asarray(value, dtype=float), (3,)).copy()
    except (TypeError, ValueError):
        raise InputError(f"{name}: expected one or three numbers in Å, got {value!r}") from None
    if not np.all(np.isfinite(v)) or (positive and np.any(v <= 0)):
        kind = "positive lengths" if positive else "finite numbers"
        raise InputError(f"{name}: expected three {kind} in Å, got {value!r}")
    return v


class Grid:
    """A sample-frame grid: shape, voxel edge per axis (Å) and origin (Å).

    Parameters
    ----------
    shape : 3 ints
        Array shape; axes 0, 1, 2 along sample-frame x, y, z.
    voxel_size : float or 3 floats
        Voxel edge along x, y, z, Å.
    origin : 3 floats
        Sample-frame position (Å) of the voxel at index n//2 on each axis.
    """

    __slots__ = ("shape", "voxel_size", "origin")

    def __init__(self, shape, voxel_size, origin=(0.0, 0.0, 0.0)):
        try:
            shp = tuple(int(n) for n in shape)
        except (TypeError, ValueError):
            raise InputError(f"shape: expected three positive integers, got {shape!r}") from None
        if len(shp) != 3 or min(shp) < 1:
            raise InputError(f"shape: expected three positive integers, got {shape!r}")
        self.shape = shp
        self.voxel_size = _vec3(voxel_size, "voxel_size", positive=True)
        self.origin = _vec3(origin, "origin")

    @classmethod
    def of(cls, source, shape=None):
        """The grid of ``source``.

        ``source`` may be a Grid, anything with a ``grid`` attribute (a
        :class:`~braggstrain.strain.objects.SampleObject`), a mapping with
        ``voxel_size``, ``shape`` and optionally ``origin`` (the results
        bundle's ``grid``), or a voxel size (float or 3 floats) together
        with ``shape``: then the origin is zero, i.e. positions are relative
        to the voxel at index n//2.
        """
        if isinstance(source, Grid):
            g = source
        elif hasattr(source, "grid") and isinstance(source.grid, Grid):
            g = source.grid
        elif isinstance(source, Mapping):
            if "voxel_size" not in source:
                raise InputError("grid: expected a mapping with 'voxel_size', 'origin' and 'shape'")
            shp = source.get("shape", shape)
            if shp is None:
                raise InputError("grid: expected a mapping with 'voxel_size', 'origin' and 'shape'")
            g = cls(shp, source["voxel_size"], source.get("origin", (0.0, 0.0, 0.0)))
        else:
            if shape is None:
                raise InputError(f"grid: expected a Grid, a SampleObject or a mapping with voxel_size, origin "
                                 f"and shape, got {type(source).__name__}")
            g = cls(shape, source)
        if shape is not None and tuple(int(n) for n in shape) != g.shape:
            raise InputError(f"grid: shape {g.shape} differs from the arrays' shape {tuple(shape)}")
        return g

    # ------------------------------------------------------------------
    # the conversion
    # ------------------------------------------------------------------

    @property
    def centre_index(self):
        """(3,) int: the index n//2 on each axis, the voxel at ``origin``."""
        return np.array([n // 2 for n in self.shape])

    def _along(self, a, axis):
        a = np.asarray(a, dtype=float)
        if a.ndim == 0 or a.shape[axis] != 3:
            raise InputError(f"expected an array with 3 components (x, y, z) along axis {axis}, got shape {a.shape}")
        shape = [1] * a.ndim
        shape[axis] = 3
        return a, tuple(shape)

    def position(self, index, axis=-1):
        """Sample-frame position (Å) of (fractional) array indices.

        ``index`` has its three components (along array axes 0, 1, 2) on
        ``axis``; the result has the same shape.
        """
        a, s = self._along(index, axis)
        return self.origin.reshape(s) + (a - self.centre_index.reshape(s)) * self.voxel_size.reshape(s)

    def index(self, position, axis=-1):
        """Fractional array index of sample-frame positions (Å); the inverse
        of :meth:`position`."""
        a, s = self._along(position, axis)
        return (a - self.origin.reshape(s)) / self.voxel_size.reshape(s) + self.centre_index.reshape(s)

    def axis(self, k):
        """Positions (Å) of the voxel centres along array axis ``k`` (the
        results file's ``/grid/x``, ``y`` or ``z``)."""
        k = int(k)
        return self.origin[k] + (np.arange(self.shape[k]) - self.shape[k] // 2) * self.voxel_size[k]

    @property
    def axes(self):
        """(x, y, z): the three 1-D position arrays of :meth:`axis`."""
        return tuple(self.axis(k) for k in range(3))

    def coordinates(self):
        """(3, nx, ny, nz) float64: x, y, z (Å) of every voxel."""
        return np.stack(np.meshgrid(*self.axes, indexing="ij"))

    @property
    def corner(self):
        """(3,) position (Å) of the voxel at index (0, 0, 0), e.g. the
        origin of a VTK image."""
        return self.position(np.zeros(3))

    # ------------------------------------------------------------------

    def to_dict(self):
        """``{"voxel_size", "origin", "shape"}``: the results bundle's ``grid``."""
        return {"voxel_size": self.voxel_size.copy(), "origin": self.origin.copy(), "shape": self.shape}

    def same_as(self, other, rtol=1e-6):
        """True when ``other`` has the same shape, voxel and origin (origins
        within ``rtol`` of the smallest voxel)."""
        other = Grid.of(other)
        return (self.shape == other.shape and np.allclose(self.voxel_size, other.voxel_size, rtol=rtol, atol=0)
                and np.allclose(self.origin, other.origin, rtol=0, atol=rtol * float(self.voxel_size.min())))

    def __repr__(self):
        return (f"Grid(shape={self.shape}, voxel_size={self.voxel_size.tolist()}, "
                f"origin={self.origin.tolist()})")
