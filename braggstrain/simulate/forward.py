"""The simulator: invented crystals, their displacement fields and the
coherent Bragg diffraction they give on a real rocking scan.

Everything here makes data of our own for tests and the demo. Conventions
(docs/design.md): lengths in Å, reciprocal lengths in Å⁻¹ with 2π included, the
complex object of a crystal near reflection G is ρ(r) = s(r)·exp(−i G·u(r)),
the far field is numpy's forward FFT. Real-space arrays made here have axes
0, 1, 2 along sample-frame x, y, z and their origin at index n//2 on each axis.

Three parts:

* shapes: :func:`polyhedron` and its named cases, :func:`ellipsoid`;
* displacement fields (superposable objects with ``displacement`` and
  ``gradient``): :class:`UniformStrain`, :class:`RigidRotation`,
  :class:`InterfaceGradient`, :class:`StraightDislocation`,
  :class:`DislocationLoop`, :class:`FieldSum`;
* diffraction: :func:`complex_object` (whose far field is
  :func:`braggstrain.phasing.metrics.far_field`) and, for a whole rocking
  scan on an instrument, :func:`simulate_scan`.

Why one module of about 700 lines: shapes, displacement fields and the scan
simulation are the simulator's three parts, each short and used together.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Sequence

import numpy as np

from braggstrain.errors import GeometryError, InputError
from braggstrain.geometry.rotation import rotation_from_rotvec

__all__ = [
    "grid_coordinates",
    "Polyhedron",
    "Ellipsoid",
    "polyhedron",
    "cube",
    "octahedron",
    "truncated_octahedron",
    "gaussian_coherence_kernel",
    "coherence_blur",
    "ellipsoid",
    "UniformStrain",
    "RigidRotation",
    "InterfaceGradient",
    "StraightDislocation",
    "DislocationLoop",
    "FieldSum",
    "PlacedShape",
    "PlacedField",
    "place_point",
    "complex_object",
    "SimulatedScan",
    "detector_frame_grid",
    "simulate_scan",
]


# --------------------------------------------------------------------------
# grids and shapes
# --------------------------------------------------------------------------

def _as3(value, name):
    arr = np.broadcast_to(np.asarray(value, dtype=float), (3,)).copy()
    if not np.all(np.isfinite(arr)) or np.any(arr <= 0):
        raise InputError(f"{name}: expected three positive lengths in Å, got {value!r}")
    return arr


def grid_coordinates(shape, voxel_size=1.0):
    """Positions of the voxels of a sample-frame grid.

    Parameters
    ----------
    shape : tuple of 3 int
        Array shape; axes 0, 1, 2 run along sample-frame x, y, z.
    voxel_size : float or 3 floats
        Voxel edge per axis, Å.

    Returns
    -------
    ndarray, shape (3, *shape), float64
        x, y, z of every voxel in Å, with the origin at index n//2 per axis.
    """
    from braggstrain.strain.grid import Grid

    shape = tuple(int(n) for n in shape)
    if len(shape) != 3 or min(shape) < 1:
        raise InputError(f"shape: expected three positive sizes, got {shape!r}")
    return Grid(shape, _as3(voxel_size, "voxel_size")).coordinates()


class Polyhedron:
    """Convex polyhedron {r : n_i·(r − c) ≤ d_i for every face i}, evaluable
    at any points (a shape the simulator can sample on any grid).

    Parameters
    ----------
    normals : (F, 3) array
        Outward face normals in the sample frame (normalised here).
    distances : (F,) array
        Distance of each face plane from the centre, Å.
    center : 3 floats
        Centre, Å.
    """

    def __init__(self, normals, distances, center=(0.0, 0.0, 0.0)):
        normals = np.atleast_2d(np.asarray(normals, dtype=float))
        distances = np.atleast_1d(np.asarray(distances, dtype=float))
        if normals.ndim != 2 or normals.shape[1] != 3 or len(distances) != len(normals):
            raise InputError("polyhedron: expected normals of shape (F, 3) and F distances")
        if np.any(distances <= 0):
            raise InputError("polyhedron: face distances must be positive (Å)")
        self.normals = normals / np.linalg.norm(normals, axis=1, keepdims=True)
        self.distances = distances
        self.center = np.asarray(center, dtype=float).reshape(3)

    def rotated(self, rotation):
        """The same polyhedron with its normals rotated by ``rotation`` (3×3)."""
        R = np.asarray(rotation, float)
        return Polyhedron(self.normals @ R.T, self.distances, R @ self.center)

    def signed_distance(self, coords):
        """max_i (n_i·(r − c) − d_i): negative inside, Å (exact near faces)."""
        coords = np.asarray(coords, float)
        r = coords - self.center.reshape((3,) + (1,) * (coords.ndim - 1))
        out = np.full(coords.shape[1:], -np.inf)
        for n, d in zip(self.normals, self.distances):
            np.maximum(out, np.tensordot(n, r, axes=1) - d, out=out)
        return out

    def density(self, coords, edge_width=0.0):
        """Electron density in [0, 1] at the points: 1 inside, 0 outside, a
        linear ramp of ``edge_width`` Å across the faces (to limit aliasing)."""
        sd = self.signed_distance(coords)
        if edge_width <= 0:
            return (sd <= 0).astype(np.float32)
        return np.clip(0.5 - sd / edge_width, 0.0, 1.0).astype(np.float32)

    def inscribed_extent(self):
        """Largest face distance, Å (an upper bound of the half-size)."""
        return float(np.max(self.distances))


class Ellipsoid:
    """Ellipsoid with semi-axes (a, b, c) Å along the (rotated) sample axes."""

    def __init__(self, semi_axes, center=(0.0, 0.0, 0.0), rotation=None):
        self.semi_axes = _as3(semi_axes, "semi_axes")
        self.center = np.asarray(center, float).reshape(3)
        self.rotation = np.eye(3) if rotation is None else np.asarray(rotation, float)

    def rotated(self, rotation):
        R = np.asarray(rotation, float)
        return Ellipsoid(self.semi_axes, R @ self.center, R @ self.rotation)

    def signed_distance(self, coords):
        coords = np.asarray(coords, float)
        r = coords - self.center.reshape((3,) + (1,) * (coords.ndim - 1))
        r = np.tensordot(self.rotation.T, r, axes=1)
        rho = np.sqrt(np.sum((r / self.semi_axes.reshape((3,) + (1,) * (coords.ndim - 1))) ** 2, axis=0))
        return (rho - 1.0) * float(np.min(self.semi_axes))

    def density(self, coords, edge_width=0.0):
        sd = self.signed_distance(coords)
        if edge_width <= 0:
            return (sd <= 0).astype(np.float32)
        return np.clip(0.5 - sd / edge_width, 0.0, 1.0).astype(np.float32)

    def inscribed_extent(self):
        return float(np.max(self.semi_axes))


def polyhedron(shape, voxel_size, normals, distances, center=(0.0, 0.0, 0.0),
               rotation=None, supersample=1):
    """Convex polyhedron {r : n_i·(r − c) ≤ d_i for every face i} on a grid.

    Parameters
    ----------
    shape, voxel_size
        The grid, as in :func:`grid_coordinates`.
    normals : (F, 3) array
        Outward face normals (need not be unit; they are normalised).
    distances : (F,) array
        Distance of each face plane from the centre, Å.
    center : 3 floats
        Centre of the polyhedron, Å.
    rotation : (3, 3) array, optional
        Rotation applied to the normals (crystal → sample frame).
    supersample : int
        Sub-samples per voxel edge; > 1 returns the filled fraction of each
        voxel (float32 in [0, 1]) instead of a bool mask.

    Returns
    -------
    ndarray of bool (supersample == 1) or float32
    """
    poly = Polyhedron(normals, distances, (0.0, 0.0, 0.0))
    if rotation is not None:
        poly = poly.rotated(rotation)
    poly.center = np.asarray(center, float).reshape(3)
    vs = _as3(voxel_size, "voxel_size")
    s = int(supersample)
    base = grid_coordinates(shape, vs)
    if s <= 1:
        return poly.signed_distance(base) <= 0
    frac = np.zeros(shape, dtype=np.float64)
    offsets = (np.arange(s) + 0.5) / s - 0.5
    for ox in offsets:
        for oy in offsets:
            for oz in offsets:
                r = base + (np.array([ox, oy, oz]) * vs)[:, None, None, None]
                frac += poly.signed_distance(r) <= 0
    return (frac / s**3).astype(np.float32)


_CUBE_FACES = np.array([[1, 0, 0], [-1, 0, 0], [0, 1, 0], [0, -1, 0], [0, 0, 1], [0, 0, -1]], float)
_OCTA_FACES = np.array([[i, j, k] for i in (1, -1) for j in (1, -1) for k in (1, -1)], float)


def cube(shape, voxel_size, edge, **kwargs):
    """Cube of edge ``edge`` Å with faces normal to the grid axes (or rotated)."""
    return polyhedron(shape, voxel_size, _CUBE_FACES, np.full(6, edge / 2.0), **kwargs)


def octahedron(shape, voxel_size, size, **kwargs):
    """Regular octahedron bounded by the eight {111} planes.

    ``size`` is the vertex-to-vertex distance, Å (so each {111} face lies at
    size/(2√3) from the centre).
    """
    return polyhedron(shape, voxel_size, _OCTA_FACES, np.full(8, size / (2.0 * np.sqrt(3.0))), **kwargs)


def truncated_octahedron(shape, voxel_size, size, truncation=0.6, flat=None, **kwargs):
    """Octahedron of vertex-to-vertex ``size`` Å truncated by {100} faces.

    The {100} faces lie at ``truncation * size / 2`` from the centre
    (truncation = 1 gives the plain octahedron). ``flat`` = (normal, distance)
    adds one more face, e.g. where the particle sits on a substrate.
    """
    normals = [*_OCTA_FACES, *_CUBE_FACES]
    dists = [size / (2.0 * np.sqrt(3.0))] * 8 + [truncation * size / 2.0] * 6
    if flat is not None:
        normals.append(np.asarray(flat[0], float))
        dists.append(float(flat[1]))
    return polyhedron(shape, voxel_size, np.array(normals), np.array(dists), **kwargs)


def ellipsoid(shape, voxel_size, semi_axes, center=(0.0, 0.0, 0.0), rotation=None):
    """Ellipsoid with semi-axes (a, b, c) Å along the (rotated) grid axes."""
    ax = _as3(semi_axes, "semi_axes")
    r = grid_coordinates(shape, voxel_size) - np.asarray(center, float)[:, None, None, None]
    if rotation is not None:
        r = np.tensordot(np.asarray(rotation, float).T, r, axes=1)
    return np.sum((r / ax[:, None, None, None]) ** 2, axis=0) <= 1.0


# --------------------------------------------------------------------------
# displacement fields
# --------------------------------------------------------------------------

class _Field:
    """Base of the displacement fields: ``displacement(coords)`` (Å) and
    ``gradient(coords)`` (D_ik = ∂u_i/∂x_k, dimensionless, shape (3, 3, ...))."""

    #: displacement jump across a cut surface (Å), or None for smooth fields
    jump = None

    def displacement(self, coords):  # pragma: no cover - abstract
        raise NotImplementedError

    def gradient(self, coords, step=1e-3):
        """Displacement gradient by central differences of step ``step`` Å,
        with the jump across the field's cut surface removed."""
        coords = np.asarray(coords, dtype=float)
        out = np.empty((3, 3) + coords.shape[1:])
        for k in range(3):
            e = np.zeros((3,) + (1,) * (coords.ndim - 1))
            e[k] = step
            du = self.displacement(coords + e) - self.displacement(coords - e)
            if self.jump is not None:
                b = np.asarray(self.jump, float)
                nb = np.tensordot(b, du, axes=1) / np.dot(b, b)
                du = du - np.round(nb)[None] * b.reshape((3,) + (1,) * (coords.ndim - 1))
            out[:, k] = du / (2 * step)
        return out

    def __add__(self, other):
        return FieldSum([self, other])


@dataclass
class FieldSum(_Field):
    """Superposition of displacement fields (linear elasticity)."""

    parts: list = field(default_factory=list)

    def displacement(self, coords):
        return sum(p.displacement(coords) for p in self.parts)

    def gradient(self, coords, step=1e-3):
        return sum(p.gradient(coords, step) for p in self.parts)

    def __add__(self, other):
        return FieldSum([*self.parts, other])


@dataclass
class UniformStrain(_Field):
    """Homogeneous displacement gradient u = D·(r − r0).

    ``tensor`` is the displacement gradient D (3×3); a symmetric D is a pure
    strain, positive diagonal = tensile.
    """

    tensor: np.ndarray
    origin: Sequence[float] = (0.0, 0.0, 0.0)

    def __post_init__(self):
        self.tensor = np.asarray(self.tensor, dtype=float).reshape(3, 3)

    def displacement(self, coords):
        r = np.asarray(coords, float) - np.asarray(self.origin, float).reshape((3,) + (1,) * (np.ndim(coords) - 1))
        return np.tensordot(self.tensor, r, axes=1)

    def gradient(self, coords, step=None):
        shape = np.shape(coords)[1:]
        return np.broadcast_to(self.tensor.reshape((3, 3) + (1,) * len(shape)), (3, 3) + shape).copy()


@dataclass
class RigidRotation(_Field):
    """Rigid rotation of the lattice about ``origin``: u = (R − I)(r − r0)."""

    rotvec: Sequence[float]
    origin: Sequence[float] = (0.0, 0.0, 0.0)

    def displacement(self, coords):
        R = rotation_from_rotvec(self.rotvec)
        return UniformStrain(R - np.eye(3), self.origin).displacement(coords)

    def gradient(self, coords, step=None):
        R = rotation_from_rotvec(self.rotvec)
        return UniformStrain(R - np.eye(3), self.origin).gradient(coords)


@dataclass
class InterfaceGradient(_Field):
    """Strain that decays away from an interface (e.g. a substrate facet).

    The interface is the plane n·r = ``position`` with ``normal`` n pointing
    out of the crystal; at depth s = position − n·r inside the crystal the
    strain is ε_nn = ``strain`` · exp(−s/``decay``) along n (all other
    components zero), from u = strain · decay · exp(−s/decay) · n.
    """

    normal: Sequence[float]
    position: float
    strain: float
    decay: float

    def _n(self):
        n = np.asarray(self.normal, float)
        return n / np.linalg.norm(n)

    def displacement(self, coords):
        n = self._n()
        s = self.position - np.tensordot(n, np.asarray(coords, float), axes=1)
        f = self.strain * self.decay * np.exp(-s / self.decay)
        return n.reshape((3,) + (1,) * f.ndim) * f[None]

    def gradient(self, coords, step=None):
        n = self._n()
        s = self.position - np.tensordot(n, np.asarray(coords, float), axes=1)
        eps = self.strain * np.exp(-s / self.decay)
        return np.einsum("i,k,...->ik...", n, n, eps)


def _line_frame(line, burgers):
    xi = np.asarray(line, float)
    xi = xi / np.linalg.norm(xi)
    b = np.asarray(burgers, float)
    b_edge = b - np.dot(b, xi) * xi
    if np.linalg.norm(b_edge) > 1e-12 * max(1.0, np.linalg.norm(b)):
        ex = b_edge / np.linalg.norm(b_edge)
    else:
        trial = np.array([1.0, 0, 0]) if abs(xi[0]) < 0.9 else np.array([0, 1.0, 0])
        ex = trial - np.dot(trial, xi) * xi
        ex /= np.linalg.norm(ex)
    ey = np.cross(xi, ex)
    return ex, ey, xi


@dataclass
class StraightDislocation(_Field):
    """Straight dislocation in an isotropic elastic medium (Volterra field).

    Hirth & Lothe, Theory of Dislocations, 2nd ed. (1982), ch. 3: with the
    line along local z (ξ), the screw part b_s = b·ξ gives u_z = b_s θ/2π
    (eq. 3-2) and the edge part b_e (local x) gives
    u_x = (b_e/2π)[θ + xy/(2(1−ν)r²)],
    u_y = −(b_e/2π)[(1−2ν)/(4(1−ν)) ln r² + (x²−y²)/(4(1−ν)r²)] (eq. 3-45).
    Around a right-handed loop about ξ the displacement gains b.

    Parameters
    ----------
    point : 3 floats
        A point on the line, Å (sample frame).
    line : 3 floats
        Line direction ξ (normalised here).
    burgers : 3 floats
        Burgers vector in Å, sample frame.
    poisson : float
        Poisson's ratio ν.
    core : float
        Core radius, Å: r² is regularised as r² + core² so the field stays
        finite on the line (the far field is unchanged).
    """

    point: Sequence[float]
    line: Sequence[float]
    burgers: Sequence[float]
    poisson: float = 0.39
    core: float = 0.5

    @property
    def jump(self):
        return np.asarray(self.burgers, float)

    def displacement(self, coords):
        coords = np.asarray(coords, float)
        ex, ey, ez = _line_frame(self.line, self.burgers)
        b = np.asarray(self.burgers, float)
        bs = float(np.dot(b, ez))
        be = float(np.linalg.norm(b - bs * ez))
        p = np.asarray(self.point, float).reshape((3,) + (1,) * (coords.ndim - 1))
        r = coords - p
        x = np.tensordot(ex, r, axes=1)
        y = np.tensordot(ey, r, axes=1)
        nu = self.poisson
        theta = np.arctan2(y, x)
        r2 = x * x + y * y + self.core**2
        ux = be / (2 * np.pi) * (theta + x * y / (2 * (1 - nu) * r2))
        uy = -be / (2 * np.pi) * ((1 - 2 * nu) / (4 * (1 - nu)) * np.log(r2)
                                  + (x * x - y * y) / (4 * (1 - nu) * r2))
        uz = bs * theta / (2 * np.pi)
        shp = (3,) + (1,) * x.ndim
        return ex.reshape(shp) * ux + ey.reshape(shp) * uy + ez.reshape(shp) * uz


@dataclass
class DislocationLoop(_Field):
    """Planar dislocation loop, displacement from the solid-angle term of
    Burgers' formula, u = b Ω/(4π) (Hirth & Lothe, Theory of Dislocations,
    2nd ed., 1982, ch. 4, first term of Burgers' formula; the overall sign
    depends on how Ω is signed and is fixed here so that the circulation
    convention of docs/design.md holds), with Ω the solid angle the loop
    subtends at r. The two line-integral (elastic) terms of that formula are
    left out: they are smooth and small away from the core, and the loop's
    topology, a circulation b around its line, is carried by the Ω term.

    The loop is a circle of ``radius`` Å about ``center`` in the plane of
    unit ``normal``; it is traversed right-handed about the normal, so the
    circulation around the line taken right-handed about ξ (the traversal
    direction) gains b.
    """

    center: Sequence[float]
    normal: Sequence[float]
    radius: float
    burgers: Sequence[float]
    segments: int = 48

    @property
    def jump(self):
        return np.asarray(self.burgers, float)

    def vertices(self):
        """Points of the loop polygon, (segments, 3), Å, in traversal order."""
        n = np.asarray(self.normal, float)
        n /= np.linalg.norm(n)
        e1, e2, _ = _line_frame(n, np.cross(n, [0.31, 0.57, 0.76]))
        t = np.linspace(0, 2 * np.pi, self.segments, endpoint=False)
        c = np.asarray(self.center, float)
        return c + self.radius * (np.cos(t)[:, None] * e1 + np.sin(t)[:, None] * e2)

    def solid_angle(self, coords):
        """Solid angle (sr) of the loop seen from every point; signed, jumping by
        4π across the loop's flat disc (triangle formula of Van Oosterom &
        Strackee, IEEE Trans. Biomed. Eng. 30, 125, 1983)."""
        coords = np.asarray(coords, float)
        v = self.vertices()
        c = np.asarray(self.center, float)
        shp = (3,) + (1,) * (coords.ndim - 1)
        R0 = c.reshape(shp) - coords
        n0 = np.linalg.norm(R0, axis=0)
        omega = np.zeros(coords.shape[1:])
        for i in range(len(v)):
            R1 = v[i].reshape(shp) - coords
            R2 = v[(i + 1) % len(v)].reshape(shp) - coords
            n1 = np.linalg.norm(R1, axis=0)
            n2 = np.linalg.norm(R2, axis=0)
            num = np.sum(R0 * np.cross(R1, R2, axis=0), axis=0)
            den = (n0 * n1 * n2 + np.sum(R0 * R1, axis=0) * n2
                   + np.sum(R0 * R2, axis=0) * n1 + np.sum(R1 * R2, axis=0) * n0)
            omega += 2 * np.arctan2(num, den)
        return omega

    def displacement(self, coords):
        om = self.solid_angle(coords)
        b = np.asarray(self.burgers, float).reshape((3,) + (1,) * om.ndim)
        return b * om[None] / (4 * np.pi)


# --------------------------------------------------------------------------
# placement: a specimen moved in the beam, or point-inverted (its twin)
# --------------------------------------------------------------------------

def _placed_coords(coords, offset, invert):
    """Where a point of the placed specimen was in the original one:
    r₀ = r − t, or −(r − t) for the point-inverted specimen."""
    coords = np.asarray(coords, float)
    r = coords - np.asarray(offset, float).reshape((3,) + (1,) * (coords.ndim - 1))
    return -r if invert else r


def place_point(point, offset=(0.0, 0.0, 0.0), invert=False):
    """Where a point of the original specimen goes: t + p, or t − p inverted."""
    p = np.asarray(point, float)
    return np.asarray(offset, float) + (-p if invert else p)


@dataclass
class PlacedShape:
    """A shape translated by ``offset`` (Å, sample frame) and, with
    ``invert``, point-inverted about its original origin first:
    density′(r) = density(±(r − t)).

    A translation only multiplies the far field by a phase ramp
    exp(−i q·t) (the Fourier shift theorem; Bracewell, The Fourier
    Transform and Its Applications, 3rd ed., 2000, ch. 6), so the measured
    intensity does not change; the inversion gives the twin, whose
    intensity is the same too (see :class:`PlacedField`)."""

    base: object
    offset: Sequence[float] = (0.0, 0.0, 0.0)
    invert: bool = False

    def signed_distance(self, coords):
        return self.base.signed_distance(_placed_coords(coords, self.offset, self.invert))

    def density(self, coords, edge_width=0.0):
        return self.base.density(_placed_coords(coords, self.offset, self.invert), edge_width)

    def inscribed_extent(self):
        return self.base.inscribed_extent()


@dataclass
class PlacedField(_Field):
    """A displacement field moved with its specimen (:class:`PlacedShape`).

    Translated: u′(r) = u(r − t), D′(r) = D(r − t). Point-inverted (the
    twin: ρ′(r) = conj ρ(−r) = s(−r)·exp(−i G·u′(r)) with u′(r) = −u(−r)):
    D′(r) = D(−r), the same strain at the mirrored point, and a
    dislocation through p with line ξ and Burgers vector b becomes one
    through −p with the same ξ and −b (a circuit right-handed about ξ maps
    to one right-handed about ξ, and u changes sign)."""

    base: object
    offset: Sequence[float] = (0.0, 0.0, 0.0)
    invert: bool = False

    def displacement(self, coords):
        u = self.base.displacement(_placed_coords(coords, self.offset, self.invert))
        return -u if self.invert else u

    def gradient(self, coords, step=1e-3):
        return self.base.gradient(_placed_coords(coords, self.offset, self.invert), step)


# --------------------------------------------------------------------------
# diffraction
# --------------------------------------------------------------------------

def complex_object(support, displacement, g_vector):
    """Complex object of a crystal near reflection G: ρ = s·exp(−i G·u).

    Parameters
    ----------
    support : ndarray (bool or float density), shape grid
    displacement : ndarray, shape (3, *grid), Å
    g_vector : 3 floats, Å⁻¹ (2π included), same frame as ``displacement``

    Returns
    -------
    ndarray complex64
    """
    s = np.asarray(support)
    u = np.asarray(displacement, float)
    if u.shape != (3,) + s.shape:
        raise InputError(f"displacement: expected shape {(3,) + s.shape}, got {u.shape}")
    g = np.asarray(g_vector, float).reshape(3)
    phase = -np.tensordot(g, u, axes=1)
    return (s * np.exp(1j * phase)).astype(np.complex64)


# --------------------------------------------------------------------------
# rocking scans
# --------------------------------------------------------------------------

@dataclass
class SimulatedScan:
    """A simulated rocking scan and what made it.

    Attributes
    ----------
    frames : (F, R, C) uint32 ndarray
        Detector counts, frames × rows × columns (the whole detector).
    angles : dict name → degrees (array over frames for the rocked circle,
        floats for the others)
    rocking_circle : str
    mask : (R, C) bool ndarray, True on detector gaps (hot pixels are *not*
        flagged: finding them is the preparation stage's job)
    hkl : tuple
    g_sample : (3,) Å⁻¹
    peak_pixel : (frame, row, column) of the Bragg condition
    linear_map : (3, 3) q steps per (frame, row, column) index, Å⁻¹, lab frame
        at the peak angles
    hot_pixels : (K, 2) int array of the injected hot pixels (row, column)
    """

    frames: np.ndarray
    angles: dict
    rocking_circle: str
    mask: np.ndarray
    hkl: tuple
    g_sample: np.ndarray
    peak_pixel: tuple
    linear_map: np.ndarray
    hot_pixels: np.ndarray


def detector_frame_grid(linear_map, shape):
    """Real-space basis conjugate to a detector-frame q map (docs/methods.md).

    With q ≈ M·n for index offsets n = (frame, row, column), the DFT of an
    N₀×N₁×N₂ array has real-space voxel positions r = T·m (m integer index
    offsets from n//2) with T = 2π M⁻ᵀ diag(1/N₀, 1/N₁, 1/N₂). Returns T
    (3×3, Å per index step; columns along the array's axes)."""
    M = np.asarray(linear_map, float)
    N = np.asarray(shape, float)
    cols = np.linalg.norm(M, axis=0)
    if not np.all(cols > 0) or abs(np.linalg.det(M)) <= 1e-9 * np.prod(cols):
        raise GeometryError(
            f"linear map {np.round(M, 8).tolist()} (Å⁻¹ per frame, row, column) is singular: the rocking circle "
            "does not move Q out of the detector plane at these settings (for example it turns about G itself); "
            "expected a rocking circle whose axis is not parallel to G (fix another circle or rock another one)")
    return 2 * np.pi * np.linalg.inv(M).T / N[None, :]


def gaussian_coherence_kernel(sigma, rotvec=None, half_width=None):
    """Normalised Gaussian exp(-n^T C^-1 n / 2) on a (2w+1)^3 voxel grid.

    C = R diag(sigma^2) R^T: standard deviations ``sigma`` (voxels, one or
    three, each > 0) along axes rotated from the array axes by the rotation
    vector ``rotvec`` (rad; none: the array axes).  ``half_width`` w defaults
    to four of the largest sigma, rounded up.  The partial-coherence blur of
    an invented beam: the measured intensity is the coherent one convolved
    with such a kernel (Clark et al., Nat. Commun. 3, 993 (2012)).
    """
    sig = np.broadcast_to(np.asarray(sigma, float), (3,))
    if not np.all(np.isfinite(sig)) or np.any(sig <= 0):
        raise InputError(f"coherence_sigma: expected widths > 0 voxels, got {np.asarray(sigma).tolist()}")
    R = np.eye(3) if rotvec is None else rotation_from_rotvec(np.asarray(rotvec, float))
    C = R @ np.diag(sig ** 2) @ R.T
    w = int(np.ceil(4 * sig.max())) if half_width is None else int(half_width)
    d = np.arange(-w, w + 1)
    g = np.stack(np.meshgrid(d, d, d, indexing="ij"), -1).astype(float)
    k = np.exp(-0.5 * np.einsum("...i,ij,...j->...", g, np.linalg.inv(C), g))
    return k / k.sum()


def coherence_blur(intensity, sigma, rotvec=None, mode="constant"):
    """``intensity`` convolved with :func:`gaussian_coherence_kernel` (scipy.ndimage,
    ``mode`` at the array's edges: "constant" for a detector window, "wrap"
    for a periodic FFT array)."""
    from scipy import ndimage

    return ndimage.convolve(np.asarray(intensity, float), gaussian_coherence_kernel(sigma, rotvec), mode=mode)


def simulate_scan(instrument, crystal, hkl, shape, field_, *, rocking_circle, n_frames,
                  step_deg, free_circles, fixed_angles=None, peak_pixel=None, window=(128, 128),
                  peak_counts=1e5, background=0.5, hot_pixels=4, coherence_sigma=None,
                  coherence_rotation=None, supersample=2, seed=0, bragg_angles=None):
    """Simulate the rocking scan of one reflection of a crystal.

    The crystal (``shape`` with ``density(coords)`` and the displacement
    ``field_``, both in the sample frame, Å) is sampled on the real-space grid
    conjugate to the detector's local linear q map at the peak
    (:func:`detector_frame_grid`), ``supersample`` times finer per axis to
    keep the faceted edges from aliasing, and its far field is the forward
    FFT (docs/design.md), so A(n) = Σ ρ(r) exp(−i q(n)·r) with q(n) = M·n. The
    window of ``window`` pixels around the peak pixel and ``n_frames`` frames
    holds the signal; the rest of the detector sees background only.

    Parameters
    ----------
    instrument : braggstrain.geometry.instrument.Diffractometer
    crystal : braggstrain.geometry.crystal.Crystal (with its orientation)
    hkl : 3 ints
    shape : object with ``density(coords, edge_width)`` (e.g. :class:`Polyhedron`)
    field_ : displacement field (``displacement(coords)``), or None
    rocking_circle : name of the sample circle that is stepped
    n_frames : number of frames; the Bragg condition is at frame n_frames//2
    step_deg : rocking step, degrees
    free_circles : circles solved to reach the Bragg condition
    fixed_angles : the other circles' angles, degrees
    peak_pixel : (row, column) where the Bragg peak falls (default: the
        direct-beam pixel)
    window : (rows, columns) of the simulated signal
    peak_counts : expected counts in the brightest voxel
    background : mean flat background, counts per pixel per frame
    hot_pixels : number of hot pixels injected (very high counts in every frame)
    coherence_sigma : optional (3,) Gaussian width (voxels, frame, row,
        column) of a partial-coherence blur applied to the intensity before
        counting (:func:`coherence_blur`)
    coherence_rotation : optional rotation vector (rad) of that Gaussian's
        axes from the array axes
    seed : random seed (Poisson noise, hot pixels)
    bragg_angles : optional pre-solved angles dict (skips the solver)

    Returns
    -------
    SimulatedScan
    """
    rng = np.random.default_rng(seed)
    refl = crystal.reflection(hkl, instrument.energy_kev)
    g = refl.g_sample
    det = instrument.detector
    pk = det.direct_beam if peak_pixel is None else peak_pixel
    pk = (int(round(pk[0])), int(round(pk[1])))
    if bragg_angles is None:
        bragg_angles = instrument.solve_bragg(g, free=free_circles, fixed=fixed_angles or {}, pixel=pk)
    M, _, Rp = instrument.linear_map(bragg_angles, rocking_circle, step_deg, pk)
    win = (int(n_frames), int(window[0]), int(window[1]))
    if pk[0] - win[1] // 2 < 0 or pk[0] - win[1] // 2 + win[1] > det.shape[0] or \
            pk[1] - win[2] // 2 < 0 or pk[1] - win[2] // 2 + win[2] > det.shape[1]:
        raise InputError(f"simulate: a window of {window} pixels around the peak pixel {pk} does not fit "
                         f"on the detector of shape {det.shape}")
    s = int(supersample)
    big = tuple(n * s for n in win)
    T = detector_frame_grid(M, big)  # lab frame at the peak, Å per index
    axes = [np.arange(n) - n // 2 for n in big]
    # positions, lab frame at the peak → sample frame
    Ts = Rp.T @ T
    coords = np.empty((3,) + big)
    mi = np.meshgrid(*axes, indexing="ij", sparse=True)
    for i in range(3):
        coords[i] = Ts[i, 0] * mi[0] + Ts[i, 1] * mi[1] + Ts[i, 2] * mi[2]
    edge = float(np.mean(np.linalg.norm(Ts, axis=0)))
    rho = shape.density(coords, edge_width=edge).astype(np.complex64)
    if field_ is not None:
        inside = rho.real > 0
        u = field_.displacement(coords[:, inside])
        rho[inside] *= np.exp(-1j * (g @ u)).astype(np.complex64)
    del coords
    import scipy.fft

    # complex64 transform on every core (scipy.fft, the reference library)
    amp = scipy.fft.fftshift(scipy.fft.fftn(scipy.fft.ifftshift(rho), workers=-1, overwrite_x=True))
    del rho
    sl = tuple(slice(n * s // 2 - n // 2, n * s // 2 - n // 2 + n) for n in win)
    inten = np.abs(amp[sl]) ** 2
    del amp
    if coherence_sigma is not None:
        inten = coherence_blur(inten, coherence_sigma, coherence_rotation)
    inten *= float(peak_counts) / inten.max()
    frames = np.full((win[0],) + tuple(det.shape), float(background))
    r0, c0 = pk[0] - win[1] // 2, pk[1] - win[2] // 2
    frames[:, r0:r0 + win[1], c0:c0 + win[2]] += inten
    counts = rng.poisson(frames).astype(np.uint32)
    gaps = det.gap_mask()
    counts[:, gaps] = 0
    hp = np.empty((0, 2), int)
    if hot_pixels:
        rows = rng.integers(r0, r0 + win[1], size=int(hot_pixels))
        cols = rng.integers(c0, c0 + win[2], size=int(hot_pixels))
        hp = np.column_stack([rows, cols])
        for r, c in hp:
            counts[:, r, c] = rng.integers(int(peak_counts) * 5, int(peak_counts) * 20, size=win[0])
    angles = {k: float(v) for k, v in bragg_angles.items()}
    angles[rocking_circle] = bragg_angles[rocking_circle] + step_deg * (np.arange(win[0]) - win[0] // 2)
    return SimulatedScan(frames=counts, angles=angles, rocking_circle=rocking_circle, mask=gaps,
                         hkl=tuple(int(v) for v in hkl), g_sample=g, peak_pixel=(win[0] // 2, pk[0], pk[1]),
                         linear_map=M, hot_pixels=hp)
