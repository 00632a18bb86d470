"""Dislocations from phase vortices: the stage and its result record.

A dislocation line makes the phase of every reflection that sees it wind
around the line. With the conventions of docs/design.md
(ρ_j = s·exp(−i G_j·u)), the phase of reflection j gains −G_j·b = 2π n_j on
a loop taken right-handed about the line direction ξ, so with b in lattice
coordinates and h_j the Miller indices, h_j·b = −n_j (integer n_j). A
reflection with G·b = 0 shows no vortex: the g·b = 0 invisibility criterion
of transmission electron microscopy (Williams & Carter, Transmission
Electron Microscopy, 2nd ed., 2009, ch. 26).

:func:`find_dislocations` works in four steps, each in a module of its own:

1. :mod:`braggstrain.defects.vortices` — per reflection, the integer winding
   of the phase around every elementary plaquette of the grid, kept where
   the phase can be trusted (:func:`braggstrain.strain.fields.trusted_for_windings`);
2. :mod:`braggstrain.defects.tracing` — pierced plaquettes of all
   reflections mark the grid cells a line passes through; connected cells
   are traced into smooth polylines, open (ending at the surface) or closed
   (loops);
3. :mod:`braggstrain.defects.burgers` — around each line, small rings
   perpendicular to ξ give the windings n_j per reflection by a vote;
4. the same module solves h_j·b = −n_j and snaps b to the nearest short
   lattice translation; here the character (the angle between b and ξ) and
   the slip planes complete the :class:`Dislocation` record.

The records are written by :mod:`braggstrain.io.dislocations` (CSV/JSON
table, HDF5 group) and drawn by :func:`braggstrain.report.dislocations.plot_dislocations`.
Line points are sample-frame positions on the objects' grid
(:class:`braggstrain.strain.grid.Grid`).
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass, field

import numpy as np
from scipy import ndimage

from braggstrain import _validate as _v
from braggstrain.defects.burgers import format_lattice_vector, ring_windings, slip_planes, solve_burgers, vote
from braggstrain.defects.tracing import Tracer, directions, drop_duplicates, orient, path_length, smooth
from braggstrain.defects.vortices import pierced_cells, vortex_map
from braggstrain.errors import InputError
from braggstrain.strain.grid import Grid
from braggstrain.geometry.orientation import orientation_from_reflections
from braggstrain.strain.fields import trusted_for_windings
from braggstrain.strain.objects import SampleObject

__all__ = [
    "Dislocation",
    "BurgersWarning",
    "find_dislocations",
    "dislocations_to_records",
    "POINTS_FRAME",
]


#: What the line points are, written with every table and HDF5 group of lines.
POINTS_FRAME = ("Å, sample-frame x y z on the results' grid: the voxel at index i lies at "
                "origin + (i − n//2)·voxel_size, the positions of /grid/x, y, z")


class BurgersWarning(UserWarning):
    """A Burgers vector could not be solved (too few or coplanar reflections)."""


# --------------------------------------------------------------------------
# the result record
# --------------------------------------------------------------------------

@dataclass
class Dislocation:
    """One dislocation line found in the crystal.

    Attributes
    ----------
    points : (M, 3) float64 ndarray
        Points along the line: sample-frame positions x, y, z in Å on the
        objects' grid (:class:`~braggstrain.strain.grid.Grid`: the voxel at
        index i lies at origin + (i − n//2)·voxel_size, the results file's
        ``/grid/x, y, z``). Consecutive points are about one voxel apart;
        for a closed loop the last point joins the first.
    directions : (M, 3) float64 ndarray
        Unit line direction ξ at each point (the order of ``points``).
    length : float
        Length of the line, Å (including the closing segment of a loop).
    closed : bool
        True for a loop.
    windings : dict
        Phase winding n_j of each reflection (key: hkl tuple) around the line,
        right-handed about ξ; None where no ring around the line could be
        trusted for that reflection.
    agreement : dict
        For each reflection, the fraction of rings whose winding agreed with
        the reported n_j (1 = all rings agree).
    visible_in, invisible_in : list of hkl tuples
        Reflections with n_j ≠ 0 and with n_j = 0 (g·b = 0).
    burgers : (3,) float ndarray or None
        Burgers vector in lattice coordinates of the conventional cell, e.g.
        (0.5, −0.5, 0); None when it cannot be solved (fewer than three
        non-coplanar reflections see a trusted winding).
    burgers_sample : (3,) float ndarray or None
        The same vector in the sample frame, Å.
    burgers_fit : (3,) float ndarray or None
        Least-squares solution of h_j·b = −n_j before snapping to a lattice
        translation (lattice coordinates).
    residual : float
        RMS over reflections of h_j·b + n_j for the snapped b (0 for an exact
        fit; NaN when b is unknown).
    confidence : float
        In [0, 1]: min_j agreement_j / (1 + 4·residual²), halved for an open
        line that ends inside the crystal; 0 when b is unknown.
    character_deg : float
        Length-weighted mean over the line of the angle between b and ξ,
        folded into [0°, 90°]: 0° screw, 90° edge (NaN when b is unknown).
    local_character_deg : (M,) float ndarray
        That angle at each point.
    slip_planes : list of hkl tuples
        Planes of the crystal's slip family ({111} for fcc, {110} for bcc)
        that contain b and in which the line lies (two for a straight screw,
        one for a glide dislocation, none for e.g. a prismatic loop).
    ends_at_surface : tuple of 2 bool or None
        For an open line, whether its first and last points lie within three
        voxels of the support's surface; None for a loop.
    notes : list of str
        Plain-language remarks (e.g. why b is unknown).
    """

    points: np.ndarray
    directions: np.ndarray
    length: float
    closed: bool
    windings: dict
    agreement: dict
    visible_in: list
    invisible_in: list
    burgers: np.ndarray | None = None
    burgers_sample: np.ndarray | None = None
    burgers_fit: np.ndarray | None = None
    residual: float = float("nan")
    confidence: float = 0.0
    character_deg: float = float("nan")
    local_character_deg: np.ndarray = field(default_factory=lambda: np.zeros(0))
    slip_planes: list = field(default_factory=list)
    ends_at_surface: tuple | None = None
    notes: list = field(default_factory=list)

    @property
    def slip_plane(self):
        """The slip plane (Miller indices) when exactly one holds b and the
        line; None otherwise (see :attr:`slip_planes`)."""
        return self.slip_planes[0] if len(self.slip_planes) == 1 else None

    @property
    def in_slip_plane(self):
        """True when the line lies in a slip plane of the crystal containing b."""
        return len(self.slip_planes) > 0

    @property
    def character(self):
        """'screw' (< 10°), 'edge' (> 80°), 'mixed', or 'unknown' (common
        practice for naming, no source; the number is :attr:`character_deg`)."""
        c = self.character_deg
        if not np.isfinite(c):
            return "unknown"
        if c < 10.0:
            return "screw"
        if c > 80.0:
            return "edge"
        return "mixed"

    @property
    def center(self):
        """Mean of the line's points, Å."""
        return self.points.mean(axis=0)

    def to_dict(self):
        """Plain-Python record (lists, floats, str) for JSON and tables."""
        def vec(v):
            return None if v is None else [float(x) for x in v]

        def key(h):
            return " ".join(str(int(x)) for x in h)

        return {
            "closed": bool(self.closed),
            "length_A": float(self.length),
            "n_points": int(len(self.points)),
            "burgers_lattice": vec(self.burgers),
            "burgers_label": format_lattice_vector(self.burgers) if self.burgers is not None else "unknown",
            "burgers_sample_A": vec(self.burgers_sample),
            "burgers_length_A": (float(np.linalg.norm(self.burgers_sample))
                                 if self.burgers_sample is not None else None),
            "burgers_fit_lattice": vec(self.burgers_fit),
            "residual": _nan_to_none(self.residual),
            "confidence": float(self.confidence),
            "character_deg": _nan_to_none(self.character_deg),
            "character": self.character,
            "slip_planes": [list(int(x) for x in p) for p in self.slip_planes],
            "in_slip_plane": bool(self.in_slip_plane),
            "windings": {key(h): (None if n is None else int(n)) for h, n in self.windings.items()},
            "agreement": {key(h): float(a) for h, a in self.agreement.items()},
            "visible_in": [list(int(x) for x in h) for h in self.visible_in],
            "invisible_in": [list(int(x) for x in h) for h in self.invisible_in],
            "ends_at_surface": None if self.ends_at_surface is None else [bool(e) for e in self.ends_at_surface],
            "notes": list(self.notes),
            "points_A": np.round(self.points, 3).tolist(),
            "directions": np.round(self.directions, 5).tolist(),
            "local_character_deg": [_nan_to_none(round(float(c), 3)) for c in self.local_character_deg],
        }


def _nan_to_none(x):
    x = float(x)
    return None if not np.isfinite(x) else x


# --------------------------------------------------------------------------
# input checks
# --------------------------------------------------------------------------


# --------------------------------------------------------------------------
# orientation and Burgers vectors
# --------------------------------------------------------------------------


# --------------------------------------------------------------------------
# lines from pierced plaquettes
# --------------------------------------------------------------------------


# --------------------------------------------------------------------------
# rings around a line
# --------------------------------------------------------------------------


# --------------------------------------------------------------------------
# the stage
# --------------------------------------------------------------------------

def _gather(objects, hkls, g_vectors, voxel_size, support, grid):
    if isinstance(objects, (np.ndarray, SampleObject)):
        objects = [objects]
    objects = list(objects)
    if len(objects) == 0:
        raise InputError("objects: expected one complex object per reflection, got none")
    samples = [o for o in objects if isinstance(o, SampleObject)]
    arrays = [_v.complex3d(o, f"objects[{j}]", min_size=4) for j, o in enumerate(objects)]
    shape = arrays[0].shape
    for j, a in enumerate(arrays):
        if a.shape != shape:
            raise InputError(
                f"objects[{j}]: shape {a.shape} differs from objects[0] {shape}; the objects are not "
                f"registered onto one grid (expected every reflection resampled onto the common "
                f"sample-frame grid first)")
    if samples:
        vs0 = samples[0].voxel_size
        or0 = samples[0].origin
        for j, o in enumerate(objects):
            if not isinstance(o, SampleObject):
                continue
            if not np.allclose(o.voxel_size, vs0, rtol=1e-6):
                raise InputError(
                    f"objects[{j}].voxel_size {tuple(o.voxel_size)} Å differs from {tuple(vs0)} Å: the "
                    f"objects are not registered onto one grid")
            if not np.allclose(o.origin, or0, atol=1e-6 * float(vs0.max())):
                raise InputError(
                    f"objects[{j}].origin {tuple(o.origin)} Å differs from {tuple(or0)} Å: the objects "
                    f"are not registered onto one grid")
    if hkls is None:
        if len(samples) != len(objects) or any(o.hkl is None for o in samples):
            raise InputError("hkls: expected the Miller indices of every reflection (or SampleObjects "
                             "that carry .hkl)")
        hkls = [o.hkl for o in samples]
    if g_vectors is None:
        if len(samples) != len(objects):
            raise InputError("g_vectors: expected one G (Å⁻¹, sample frame) per reflection")
        g_vectors = [o.g_vector for o in samples]
    H = np.asarray(hkls, dtype=float)
    if H.ndim != 2 or H.shape[1] != 3 or len(H) != len(arrays):
        raise InputError(f"hkls: expected {len(arrays)} triples of Miller indices (one per object), "
                         f"got shape {np.shape(hkls)}")
    if not np.allclose(H, np.rint(H)) or np.any(np.all(H == 0, axis=1)):
        raise InputError("hkls: expected nonzero integer Miller indices")
    G = np.asarray(g_vectors, dtype=float)
    if G.shape != (len(arrays), 3) or not np.all(np.isfinite(G)):
        raise InputError(f"g_vectors: expected {len(arrays)} vectors of 3 finite components "
                         f"(Å⁻¹, sample frame), got shape {np.shape(g_vectors)}")
    if grid is not None:
        grid = Grid.of(grid, shape)
        if samples and not grid.same_as(samples[0].grid):
            raise InputError(f"grid: {grid} differs from the objects' own {samples[0].grid}")
    elif samples:
        grid = samples[0].grid
    if voxel_size is not None:
        vs = _v.voxel_size(voxel_size)
        if grid is None:
            grid = Grid(shape, vs)  # plain arrays: positions relative to the voxel at index n//2
        elif not np.allclose(vs, grid.voxel_size, rtol=1e-6):
            raise InputError(f"voxel_size {tuple(vs)} Å differs from the grid's {tuple(grid.voxel_size)} Å")
    if grid is None:
        raise InputError("grid: expected the objects' Grid (or SampleObjects, or at least voxel_size)")
    if support is None:
        if not samples:
            raise InputError("support: expected a bool mask of the crystal on the objects' grid")
        support = np.zeros(shape, bool)
        for o in samples:
            support |= o.support
    support = _v.mask_of_shape(support, shape, "support", nonempty=True)
    hk = [tuple(int(v) for v in h) for h in np.rint(H)]
    return arrays, hk, G, grid, support


def _check_registered(arrays, support):
    """Each object's bright part must sit on the common support (not shifted).

    The bright part is where |ρ| is at least 0.3 of its 99.5th percentile
    (robust to noise spread over the array); its centre must lie within
    max(3 voxels, 15% of the support's extent) of the support's centre on
    every axis (common practice, no source).
    """
    idx_s = np.argwhere(support).astype(float)
    com_s = idx_s.mean(axis=0)
    extent = np.ptp(idx_s, axis=0) + 1
    limit = np.maximum(3.0, 0.15 * extent)
    for j, a in enumerate(arrays):
        amp = np.abs(a)
        top = float(np.percentile(amp, 99.5))
        if not top > 0:
            raise InputError(f"objects[{j}]: the object is zero (almost) everywhere")
        shift = np.argwhere(amp >= 0.3 * top).mean(axis=0) - com_s
        if np.any(np.abs(shift) > limit):
            raise InputError(
                f"objects[{j}]: its bright part is centred {np.round(shift, 1).tolist()} voxels from the "
                f"support's centre (at most {np.round(limit, 1).tolist()} expected); the objects are not "
                f"registered onto one grid (expected each reflection aligned onto the common "
                f"sample-frame grid and support)")


def find_dislocations(objects, hkls=None, g_vectors=None, voxel_size=None, support=None, crystal=None, *,
                      grid=None, amplitude_threshold=0.1, support_dilation=2, ring_radii=(2.0, 3.0, 4.0),
                      min_length=4.0, smoothing=1.5):
    """Dislocation lines of a crystal from the phase vortices of its reflections.

    Parameters
    ----------
    objects : sequence of complex ndarrays or SampleObjects
        One object per reflection, all on one common sample-frame grid (axes
        x, y, z).
    hkls : (J, 3) ints
        Miller indices of the reflections (taken from SampleObject.hkl if None).
    g_vectors : (J, 3) floats
        The reflections' G in the sample frame, Å⁻¹ (2π included); with the
        hkls they fix the orientation U (taken from SampleObject.g_vector if
        None).
    voxel_size : float or 3 floats
        Voxel edge along x, y, z, Å (taken from ``grid`` or the
        SampleObjects if None).
    support : bool ndarray
        The crystal on the common grid (union of the SampleObjects' supports
        if None).
    crystal : braggstrain.geometry.crystal.Crystal
        The lattice and its translations and slip planes; its own orientation
        is not used.
    grid : Grid, optional
        The common grid (:class:`~braggstrain.strain.grid.Grid`), whose
        positions the line points are given in; default the SampleObjects'
        grid, or for plain arrays a grid of ``voxel_size`` with origin zero
        (positions relative to the voxel at index n//2).
    amplitude_threshold : float
        Phases are trusted where the amplitude is at least this fraction of
        the median amplitude in the support (see :func:`vortex_map`).
    support_dilation : int
        The support is widened by this many voxels before plaquettes and rings
        are trusted.
    ring_radii : floats
        Radii of the rings around a line, voxels; smaller rings (1.5 and 1
        voxel) are tried when none of these fits inside the crystal.
    min_length : float
        Shorter lines are dropped, voxels.
    smoothing : float
        Gaussian smoothing of the traced points along the line, in points
        (about voxels).

    Returns
    -------
    list of Dislocation
        Sorted by decreasing length.

    Warns
    -----
    BurgersWarning
        When b cannot be solved (fewer than three non-coplanar reflections
        with a trusted winding): the line is still reported with its
        windings and ``burgers=None``.
    """
    if crystal is None:
        raise InputError("crystal: expected a braggstrain.geometry.crystal.Crystal (lattice and its translations)")
    arrays, hk, G, grid, support = _gather(objects, hkls, g_vectors, voxel_size, support, grid)
    vs = grid.voxel_size
    _check_registered(arrays, support)
    U = orientation_from_reflections(crystal, hk, G)
    shape = arrays[0].shape
    J = len(arrays)
    solvable = J >= 3 and np.linalg.matrix_rank(np.asarray(hk, float), tol=1e-6) == 3
    if not solvable:
        why = f"only {J} reflection(s)" if J < 3 else "the reflections " + ", ".join(map(str, hk)) + " are coplanar"
        warnings.warn(
            f"find_dislocations: {why}: h_j·b = −n_j needs three non-coplanar reflections, so "
            f"Burgers vectors are left unknown; lines are reported with their windings per "
            f"reflection", BurgersWarning, stacklevel=2)

    cell_shape = tuple(n - 1 for n in shape)
    cells = np.zeros(cell_shape, bool)
    fields, trust = [], []
    for a in arrays:
        w = vortex_map(a, support, amplitude_threshold=amplitude_threshold, dilation=support_dilation)
        cells |= pierced_cells(w, cell_shape)
        tr = trusted_for_windings(a, support, amplitude_threshold, support_dilation)
        fields.append((a.real.astype(np.float32), a.imag.astype(np.float32)))
        trust.append(tr.astype(np.float32))
    if not cells.any():
        return []

    depth = ndimage.distance_transform_edt(support, sampling=vs)
    vmean = float(np.exp(np.log(vs).mean()))
    labels, nlab = ndimage.label(ndimage.binary_dilation(cells, structure=np.ones((3, 3, 3), bool)),
                                 structure=np.ones((3, 3, 3), bool))
    lines = []
    for lab in range(1, nlab + 1):
        pts = np.argwhere(cells & (labels == lab)).astype(float) + 0.5
        if len(pts) < 2:
            continue
        for path, closed in Tracer(pts).trace():
            if len(path) < 2:
                continue
            path = smooth(path, closed, smoothing)
            pts_A = grid.position(path)
            if closed and len(path) < 8:
                continue
            pts_A = orient(pts_A, closed)
            path = grid.index(pts_A)
            length = path_length(pts_A, closed)
            if length < min_length * vmean:
                continue
            dirs = directions(pts_A, closed)
            d = _describe(path, pts_A, dirs, closed, length, fields, trust, hk, U, crystal, vs, vmean,
                          ring_radii, depth, solvable)
            if d is not None:
                lines.append(d)
    return drop_duplicates(lines, 2.5 * vmean)


def _describe(path, pts_A, dirs, closed, length, fields, trust, hk, U, crystal, vs, vmean, ring_radii,
              depth, solvable):
    """Windings, Burgers vector, character and slip plane of one traced line."""
    radii_A = [r * vmean for r in ring_radii]
    per = ring_windings(fields, trust, path, dirs, radii_A, vs)
    if all(len(v) == 0 for v in per):
        per = ring_windings(fields, trust, path, dirs, [1.5 * vmean, 1.0 * vmean], vs)
    windings, agreement = {}, {}
    for h, vals in zip(hk, per):
        n, a = vote(vals)
        windings[h] = n
        agreement[h] = a
    measured = [h for h in hk if windings[h] is not None]
    if not any(windings[h] for h in measured):
        return None  # no net winding anywhere: not a dislocation (e.g. a noise vortex pair)
    visible = [h for h in measured if windings[h] != 0]
    invisible = [h for h in measured if windings[h] == 0]
    notes = []
    ends = None
    if not closed:
        dep = ndimage.map_coordinates(depth, (path[[0, -1]]).T, order=1, mode="nearest")
        ends = tuple(bool(v <= 3.0 * vmean) for v in dep)
        if not all(ends):
            notes.append("the line ends inside the crystal (a line can end only at the surface): "
                         "part of it may be hidden by low amplitude or noise")
    missing = [h for h in hk if windings[h] is None]
    if missing:
        notes.append("no trusted ring around the line for " + ", ".join(map(str, missing)))
    b, b_fit, res = solve_burgers(measured, [windings[h] for h in measured], crystal) \
        if len(measured) >= 3 else (None, None, float("nan"))
    d = Dislocation(points=pts_A, directions=dirs, length=length, closed=closed, windings=windings,
                    agreement=agreement, visible_in=visible, invisible_in=invisible,
                    local_character_deg=np.full(len(pts_A), np.nan), ends_at_surface=ends, notes=notes)
    if b is None:
        if len(hk) < 3:
            why = f"only {len(hk)} reflection(s) were given"
        elif not solvable:
            why = "the reflections given are coplanar"
        elif len(measured) < 3:
            why = f"only {len(measured)} reflection(s) have a trusted winding around this line"
        else:
            why = "the reflections with a trusted winding around this line are coplanar"
        msg = f"Burgers vector unknown: {why}; h_j·b = −n_j needs three non-coplanar reflections"
        notes.append(msg)
        if solvable:  # otherwise the stage already warned once for all lines
            warnings.warn(f"find_dislocations: line of length {length:.0f} Å: {msg}", BurgersWarning,
                          stacklevel=3)
        return d
    if U is None:  # pragma: no cover - three non-coplanar hkls always fix U
        return d
    bs = U @ crystal.A @ b
    bhat = bs / np.linalg.norm(bs)
    local = np.degrees(np.arccos(np.clip(np.abs(dirs @ bhat), 0.0, 1.0)))
    seg = np.linalg.norm(np.gradient(pts_A, axis=0), axis=1)
    character = float(np.sum(local * seg) / np.sum(seg)) if seg.sum() > 0 else float(local.mean())
    agree_min = min(agreement[h] for h in measured)
    conf = agree_min / (1.0 + 4.0 * res ** 2)
    if ends is not None and not all(ends):
        conf *= 0.5
    d.burgers = b
    d.burgers_sample = bs
    d.burgers_fit = b_fit
    d.residual = res
    d.confidence = float(conf)
    d.character_deg = character
    d.local_character_deg = local
    d.slip_planes = slip_planes(b, pts_A, dirs, length, U, crystal, vmean)
    return d


# --------------------------------------------------------------------------
# outputs
# --------------------------------------------------------------------------


def dislocations_to_records(lines):
    """The lines as a list of plain dicts (see :meth:`Dislocation.to_dict`),
    each with a 1-based ``id``."""
    out = []
    for k, d in enumerate(lines):
        if not isinstance(d, Dislocation):
            raise InputError(f"lines[{k}]: expected a Dislocation, got {type(d).__name__}")
        rec = {"id": k + 1}
        rec.update(d.to_dict())
        out.append(rec)
    return out


