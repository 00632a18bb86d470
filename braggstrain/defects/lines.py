"""Dislocations from phase vortices: lines, Burgers vectors and character.

A dislocation line makes the phase of every reflection that sees it wind
around the line. With the conventions of DESIGN.md (ρ_j = s·exp(−i G_j·u)),
the phase of reflection j gains −G_j·b = 2π n_j on a loop taken right-handed
about the line direction ξ, so with b in lattice coordinates and h_j the
Miller indices, h_j·b = −n_j (integer n_j). A reflection with G·b = 0 shows
no vortex: the g·b = 0 invisibility criterion of transmission electron
microscopy (Williams & Carter, Transmission Electron Microscopy, 2nd ed.,
2009, ch. 26).

The stage works in four steps:

1. :func:`vortex_map` — per reflection, the integer winding of the phase
   around every elementary plaquette of the grid, computed wrap-free from the
   complex values (sum of the angles of products of neighbours), kept where
   the amplitude can be trusted inside a slightly dilated support;
2. pierced plaquettes of all reflections mark the grid cells a line passes
   through; connected cells (:func:`scipy.ndimage.label`) are traced into
   smooth polylines, open (ending at the surface) or closed (loops);
3. around each line, small rings perpendicular to ξ are sampled by trilinear
   interpolation of each complex object and their phase windings voted on,
   giving n_j per reflection;
4. h_j·b = −n_j is solved by least squares over all reflections and snapped
   to the nearest short lattice translation of the crystal; the character is
   the angle between b and ξ, and the slip plane is a plane of the crystal's
   slip family that holds both b and the line.

Outputs: :class:`Dislocation` records, a CSV/JSON table
(:func:`write_dislocation_table`), an HDF5 group
(:func:`write_dislocations_h5`, read back by :func:`read_dislocations_h5`) and
a figure (:func:`braggstrain.report.dislocations.plot_dislocations`). Line points
are sample-frame positions on the objects' grid (:class:`braggstrain.strain.grid.Grid`).
"""

from __future__ import annotations

import csv
import io
import json
import warnings
from dataclasses import dataclass, field
from fractions import Fraction
from pathlib import Path

import numpy as np
from scipy import ndimage
from scipy.spatial import cKDTree

from braggstrain import _validate as _v
from braggstrain.geometry.crystal import format_hkl
from braggstrain.geometry.orientation import orientation_from_reflections
from braggstrain.errors import InputError
from braggstrain.strain.grid import Grid
from braggstrain.strain.fields import trusted_for_windings
from braggstrain.strain.objects import SampleObject

__all__ = [
    "Dislocation",
    "BurgersWarning",
    "vortex_map",
    "find_dislocations",
    "solve_burgers",
    "format_lattice_vector",
    "dislocations_to_records",
    "write_dislocation_table",
    "write_dislocations_h5",
    "read_dislocations_h5",
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

def _edge_phase(obj, axis):
    """arg(ρ(i + e_axis) ρ*(i)), shape one shorter along ``axis`` (radians)."""
    n = obj.shape[axis]
    hi = np.take(obj, np.arange(1, n), axis=axis)
    lo = np.take(obj, np.arange(0, n - 1), axis=axis)
    return np.angle(hi * np.conj(lo)).astype(np.float32)


def vortex_map(obj, support, *, amplitude_threshold=0.1, dilation=2):
    """Phase winding number around every elementary plaquette of the grid.

    The plaquette with normal along array axis ``n`` and lower corner at index
    ``i`` has corners i, i + e_a, i + e_a + e_b, i + e_b with
    (n, a, b) a cyclic permutation of (0, 1, 2); it is traversed in that order,
    right-handed about +e_n. Its winding is the sum of the four wrapped phase
    steps arg(ρ(q) ρ*(p)) along its edges divided by 2π: an integer computed
    without any phase unwrapping.

    Parameters
    ----------
    obj : complex ndarray (3-D) or SampleObject
        One reflection's object on the sample-frame grid.
    support : bool ndarray, same shape
    amplitude_threshold : float
        A plaquette is kept when the amplitude at each of its four corners is
        at least this fraction of the median amplitude inside the support (a
        corner of near-zero amplitude has no phase to speak of). Keep it low:
        at a core the amplitude dips, and a plaquette lost there leaves a
        one-cell gap that the line tracing bridges.
    dilation : int
        Plaquettes are kept when all four corners lie inside the support
        dilated by this many voxels (cores have low amplitude, so the support
        is widened rather than eroded).

    Returns
    -------
    windings : int8 ndarray, shape (3, nx, ny, nz)
        ``windings[n][i]``: winding of the plaquette of normal axis ``n`` and
        lower corner ``i``; 0 where untrusted or outside the grid (the last
        index along a and b). With the phase −G·u, a line of direction ξ and
        Burgers vector b pierces a plaquette of normal +e_n with winding
        n = −G·b/2π · sign(ξ·e_n).
    """
    obj = _v.complex3d(obj, "obj", min_size=4)
    trusted = trusted_for_windings(obj, support, amplitude_threshold, dilation)
    d = [_edge_phase(obj, ax) for ax in range(3)]
    out = np.zeros((3,) + obj.shape, dtype=np.int8)
    for n in range(3):
        a, b = (n + 1) % 3, (n + 2) % 3

        def sl(arr, sa, sb):
            idx = [slice(None)] * 3
            idx[a] = slice(sa, sa + obj.shape[a] - 1)
            idx[b] = slice(sb, sb + obj.shape[b] - 1)
            return arr[tuple(idx)]

        # d_a is one shorter along a and d_b along b; sl() fits both.
        da = d[a]
        db = d[b]
        # W(i) = d_a(i) + d_b(i + e_a) − d_a(i + e_b) − d_b(i)
        w = sl(da, 0, 0) + sl(db, 1, 0) - sl(da, 0, 1) - sl(db, 0, 0)
        wind = np.rint(w / (2 * np.pi)).astype(np.int8)
        # a plaquette is kept when all four corners are trusted
        keep = sl(trusted, 0, 0) & sl(trusted, 1, 0) & sl(trusted, 1, 1) & sl(trusted, 0, 1)
        region = [slice(None)] * 3
        region[a] = slice(0, obj.shape[a] - 1)
        region[b] = slice(0, obj.shape[b] - 1)
        out[n][tuple(region)] = np.where(keep, wind, 0)
    return out


# --------------------------------------------------------------------------
# orientation and Burgers vectors
# --------------------------------------------------------------------------

def solve_burgers(hkls, windings, crystal, max_length=None):
    """Burgers vector from the windings: least squares of h_j·b = −n_j, then
    snapped to the short lattice translation that fits best.

    Parameters
    ----------
    hkls : (J, 3) ints
        Miller indices of the reflections with a measured winding.
    windings : (J,) ints
    crystal : Crystal
        Supplies the translations (centring included).
    max_length : float, optional
        Longest candidate translation, Å (default √2 × the longest cell edge,
        so fcc offers ½⟨110⟩, ⟨100⟩, ½⟨112⟩, ⟨110⟩ and bcc ½⟨111⟩, ⟨100⟩,
        ⟨110⟩).

    Returns
    -------
    b : (3,) ndarray or None
        Snapped Burgers vector, lattice coordinates (None when the
        reflections span fewer than three directions).
    b_fit : (3,) ndarray or None
        Least-squares solution before snapping.
    residual : float
        RMS of h_j·b + n_j for the snapped b.
    """
    H = np.asarray(hkls, float).reshape(-1, 3)
    n = np.asarray(windings, float).reshape(-1)
    if len(H) < 3 or np.linalg.matrix_rank(H, tol=1e-6) < 3:
        return None, None, float("nan")
    b_fit = np.linalg.lstsq(H, -n, rcond=None)[0]
    if max_length is None:
        max_length = np.sqrt(2.0) * max(crystal.lattice_parameters) * (1 + 1e-6)
    cands = np.array(crystal.translations(max_length))  # sorted by length
    res = np.sqrt(np.mean((cands @ H.T + n[None, :]) ** 2, axis=1))
    best = np.flatnonzero(res <= res.min() + 1e-9)[0]  # shortest of the best
    return cands[best].copy(), b_fit, float(res[best])


def format_lattice_vector(t):
    """A lattice vector as text with a common fraction, e.g. '1/2[1 -1 0]'."""
    t = np.asarray(t, float)
    fr = [Fraction(float(v)).limit_denominator(12) for v in t]
    den = int(np.lcm.reduce([f.denominator for f in fr]))
    ints = [int(round(float(f) * den)) for f in fr]
    body = "[" + " ".join(str(v) for v in ints) + "]"
    return body if den == 1 else f"1/{den}{body}"


# --------------------------------------------------------------------------
# lines from pierced plaquettes
# --------------------------------------------------------------------------

def _pierced_cells(windings, cell_shape):
    """Cells (cubes of 8 voxels, indexed by lower corner) that a line crosses."""
    cells = np.zeros(cell_shape, dtype=bool)
    for n in range(3):
        w = windings[n] != 0
        idx = np.nonzero(w)
        if len(idx[0]) == 0:
            continue
        for shift in (0, -1):
            c = [ix.copy() for ix in idx]
            c[n] = c[n] + shift
            ok = np.ones(len(c[0]), bool)
            for ax in range(3):
                ok &= (c[ax] >= 0) & (c[ax] < cell_shape[ax])
            cells[tuple(ci[ok] for ci in c)] = True
    return cells


def _principal_axis(pts):
    c = pts - pts.mean(axis=0)
    if len(pts) < 2:
        return None
    _, s, vt = np.linalg.svd(c, full_matrices=False)
    if s[0] <= 1e-9:
        return None
    return vt[0]


class _Tracer:
    """Follows a cloud of cell centres (index units) into polylines."""

    def __init__(self, pts, step=1.0, radius=1.5, axis_radius=2.5, cover_radius=2.5):
        self.P = pts
        self.tree = cKDTree(pts)
        self.step = step
        self.radius = radius
        self.axis_radius = axis_radius
        self.cover_radius = cover_radius

    def _axis_at(self, x, prev):
        idx = self.tree.query_ball_point(x, self.axis_radius)
        ax = _principal_axis(self.P[idx]) if len(idx) >= 2 else None
        if ax is None:
            return prev
        if prev is not None and np.dot(ax, prev) < 0:
            ax = -ax
        return ax

    def _march(self, start, direction, max_steps):
        path = [start]
        pos = start
        d = direction
        travelled = 0.0
        closed = False
        for _ in range(max_steps):
            pred = pos + self.step * d
            idx = self.tree.query_ball_point(pred, self.radius)
            if not idx:
                break
            near = self.P[idx]
            if not np.any((near - pos) @ d > 0.25 * self.step):
                break
            c = near.mean(axis=0) - pred
            new = pred + c - np.dot(c, d) * d  # correct sideways only
            travelled += np.linalg.norm(new - pos)
            d_new = self._axis_at(new, d)
            pos = new
            d = d_new
            if travelled > 4 * self.axis_radius and np.linalg.norm(pos - start) < self.step:
                closed = True
                break
            path.append(pos)
        return np.array(path), closed

    def _trim(self, path):
        # drop end points that overshot the cloud
        dist, _ = self.tree.query(path)
        keep = np.flatnonzero(dist <= 1.0)
        if len(keep) == 0:
            return path[:0]
        return path[keep[0]:keep[-1] + 1]

    def trace(self, min_points=3):
        covered = np.zeros(len(self.P), bool)
        out = []
        max_steps = 3 * len(self.P) + 20
        counts = np.array([len(v) for v in self.tree.query_ball_point(self.P, self.axis_radius)])
        while (~covered).sum() >= min_points:
            free = np.flatnonzero(~covered)
            seed = free[np.argmax(counts[free])]
            idx = self.tree.query_ball_point(self.P[seed], self.radius)
            start = self.P[idx].mean(axis=0)
            d0 = self._axis_at(start, None)
            if d0 is None:
                covered[seed] = True
                continue
            fwd, closed = self._march(start, d0, max_steps)
            if closed:
                path = fwd
            else:
                bwd, _ = self._march(start, -d0, max_steps)
                path = np.concatenate([bwd[::-1], fwd[1:]])
                path = self._trim(path)
            if len(path) >= 1:
                near = self.tree.query_ball_point(path, self.cover_radius)
                hit = np.unique(np.concatenate([np.asarray(v, int) for v in near]))
            else:
                hit = np.array([seed])
            newly = hit[~covered[hit]]
            covered[hit] = True
            covered[seed] = True
            if len(newly) == 0:
                continue
            out.append((path, closed))
        return out


def _smooth(path, closed, sigma):
    if sigma <= 0 or len(path) < 3:
        return path
    mode = "wrap" if closed else "nearest"
    return ndimage.gaussian_filter1d(path, sigma, axis=0, mode=mode)


def _directions(points, closed, half_window=4, end_skip=2):
    """Unit tangents from a principal-axis fit over 2·half_window + 1
    consecutive points (a window of the same size, shifted inwards, at the
    ends of an open line), signed along the order of the points.

    The ``end_skip`` outermost points of an open line are left out of the
    fits (their cells are cut by the surface, so they sit up to half a voxel
    off the line); they take the tangent of the nearest fitted point.
    """
    m = len(points)
    if not closed and end_skip > 0 and m >= 2 * end_skip + 2 * half_window + 1:
        inner = _directions(points[end_skip:m - end_skip], False, half_window, 0)
        return np.concatenate([np.repeat(inner[:1], end_skip, axis=0), inner,
                               np.repeat(inner[-1:], end_skip, axis=0)])
    w = int(min(half_window, max((m - 1) // 2, 1)))
    out = np.empty_like(points)
    for k in range(m):
        if closed:
            idx = np.arange(k - w, k + w + 1) % m
        else:
            lo = int(np.clip(k - w, 0, max(m - 1 - 2 * w, 0)))
            idx = np.arange(lo, min(lo + 2 * w + 1, m))
        seg = points[idx]
        ax = _principal_axis(seg)
        chord = seg[-1] - seg[0]
        if ax is None:
            ax = chord / (np.linalg.norm(chord) or 1.0)
        out[k] = ax if np.dot(ax, chord) >= 0 else -ax
    return out


def _path_length(points, closed):
    seg = np.linalg.norm(np.diff(points, axis=0), axis=1).sum()
    if closed and len(points) > 2:
        seg += np.linalg.norm(points[0] - points[-1])
    return float(seg)


def _orient(points, closed):
    """Order a line so its sense is reproducible: an open line's chord, or a
    loop's area vector, has its largest component positive."""
    if closed:
        c = points - points.mean(axis=0)
        v = 0.5 * np.cross(c, np.roll(c, -1, axis=0)).sum(axis=0)
    else:
        v = points[-1] - points[0]
    if np.linalg.norm(v) == 0:
        return points
    if v[np.argmax(np.abs(v))] < 0:
        return points[::-1].copy()
    return points


# --------------------------------------------------------------------------
# rings around a line
# --------------------------------------------------------------------------

def _perp_frame(xi):
    trial = np.array([1.0, 0.0, 0.0]) if abs(xi[0]) < 0.9 else np.array([0.0, 1.0, 0.0])
    e1 = trial - np.dot(trial, xi) * xi
    e1 /= np.linalg.norm(e1)
    e2 = np.cross(xi, e1)  # (e1, e2, ξ) right-handed
    return e1, e2


def _ring_windings(fields, trust, centers_idx, dirs_A, radii_A, vs):
    """Windings of each field around rings centred on the line.

    Parameters
    ----------
    fields : list of (real, imag) float32 arrays, one per reflection
    trust : list of float32 arrays (1 trusted, 0 not), one per reflection
    centers_idx : (M, 3) ring centres in index coordinates
    dirs_A : (M, 3) unit ξ in Å space
    radii_A : radii in Å
    vs : (3,) voxel size, Å

    Returns
    -------
    list per reflection of an int array of ring windings (trusted rings only)
    """
    rings = []
    for c, xi in zip(centers_idx, dirs_A):
        e1, e2 = _perp_frame(xi)
        for r in radii_A:
            n_s = max(24, int(np.ceil(2 * np.pi * r / (0.35 * vs.min()))))
            t = np.linspace(0.0, 2 * np.pi, n_s, endpoint=False)
            offs_A = r * (np.cos(t)[:, None] * e1 + np.sin(t)[:, None] * e2)
            rings.append(c + offs_A / vs)
    if not rings:
        return [np.zeros(0, int) for _ in fields]
    lens = [len(r) for r in rings]
    coords = np.concatenate(rings).T
    bounds = np.cumsum([0] + lens)
    out = []
    for (re, im), tr in zip(fields, trust):
        z = (ndimage.map_coordinates(re, coords, order=1, mode="nearest")
             + 1j * ndimage.map_coordinates(im, coords, order=1, mode="nearest"))
        ok = ndimage.map_coordinates(tr, coords, order=1, mode="constant", cval=0.0) > 0.999
        vals = []
        for k in range(len(rings)):
            s = slice(bounds[k], bounds[k + 1])
            if not ok[s].all():
                continue
            zz = z[s]
            # wrapped steps round a closed ring sum to 2π × an integer exactly
            steps = np.angle(np.roll(zz, -1) * np.conj(zz))
            if np.abs(steps).max() > 0.75 * np.pi:
                continue  # ring too coarse for the local phase gradient: a step may have wrapped
            vals.append(int(np.rint(steps.sum() / (2 * np.pi))))
        out.append(np.asarray(vals, int))
    return out


def _vote(values):
    if len(values) == 0:
        return None, 0.0
    u, c = np.unique(values, return_counts=True)
    k = int(np.argmax(c))
    return int(u[k]), float(c[k] / c.sum())


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
        vs = np.broadcast_to(np.asarray(voxel_size, float), (3,)).copy()
        if not np.all(np.isfinite(vs)) or np.any(vs <= 0):
            raise InputError(f"voxel_size: expected three positive lengths in Å, got {voxel_size!r}")
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
    crystal : braggstrain.crystal.Crystal
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
        raise InputError("crystal: expected a braggstrain.crystal.Crystal (lattice and its translations)")
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
        cells |= _pierced_cells(w, cell_shape)
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
        for path, closed in _Tracer(pts).trace():
            if len(path) < 2:
                continue
            path = _smooth(path, closed, smoothing)
            pts_A = grid.position(path)
            if closed and len(path) < 8:
                continue
            pts_A = _orient(pts_A, closed)
            path = grid.index(pts_A)
            length = _path_length(pts_A, closed)
            if length < min_length * vmean:
                continue
            dirs = _directions(pts_A, closed)
            d = _describe(path, pts_A, dirs, closed, length, fields, trust, hk, U, crystal, vs, vmean,
                          ring_radii, depth, solvable)
            if d is not None:
                lines.append(d)
    return _drop_duplicates(lines, 2.5 * vmean)


def _drop_duplicates(lines, distance):
    """Keep the longer of two traces that follow the same line (more than half
    of the shorter one's points within ``distance`` Å of the longer one)."""
    lines = sorted(lines, key=lambda d: -d.length)
    kept = []
    for d in lines:
        dup = False
        for k in kept:
            dist, _ = cKDTree(k.points).query(d.points)
            if np.mean(dist <= distance) > 0.5:
                dup = True
                break
        if not dup:
            kept.append(d)
    return kept


def _describe(path, pts_A, dirs, closed, length, fields, trust, hk, U, crystal, vs, vmean, ring_radii,
              depth, solvable):
    """Windings, Burgers vector, character and slip plane of one traced line."""
    radii_A = [r * vmean for r in ring_radii]
    per = _ring_windings(fields, trust, path, dirs, radii_A, vs)
    if all(len(v) == 0 for v in per):
        per = _ring_windings(fields, trust, path, dirs, [1.5 * vmean, 1.0 * vmean], vs)
    windings, agreement = {}, {}
    for h, vals in zip(hk, per):
        n, a = _vote(vals)
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
    d.slip_planes = _slip_planes(b, pts_A, dirs, length, U, crystal, vmean)
    return d


def _slip_planes(b, pts_A, dirs, length, U, crystal, vmean, angle_tol_deg=10.0):
    """Slip planes p of the crystal with p·b = 0 in which the line lies.

    A line lies in a plane when at least 80% of its local directions are
    within ``angle_tol_deg`` of it and the RMS distance of its points from
    the best plane of that normal is at most max(1.5 voxel, L·sin(tol)/√12)
    (common practice, no source).
    """
    out = []
    c = pts_A - pts_A.mean(axis=0)
    s_tol = np.sin(np.radians(angle_tol_deg))
    spread_tol = max(1.5 * vmean, length * s_tol / np.sqrt(12.0))
    for p in crystal.slip_planes():
        if abs(np.dot(p, b)) > 1e-6:
            continue
        nrm = U @ crystal.B @ np.asarray(p, float)
        nrm /= np.linalg.norm(nrm)
        frac = np.mean(np.abs(dirs @ nrm) <= s_tol)
        spread = np.sqrt(np.mean((c @ nrm) ** 2))
        if frac >= 0.8 and spread <= spread_tol:
            out.append(tuple(int(v) for v in p))
    return out


# --------------------------------------------------------------------------
# outputs
# --------------------------------------------------------------------------

def _atomic_write_bytes(path, data):
    from braggstrain.io.scans import atomic_path

    path = Path(path)
    if not path.parent.exists():
        raise InputError(f"{path}: the folder {path.parent} does not exist")
    with atomic_path(path) as tmp:
        Path(tmp).write_bytes(data)


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


_CSV_COLUMNS = [
    "id", "closed", "length_A", "n_points", "burgers_label", "b_lattice_1", "b_lattice_2", "b_lattice_3",
    "b_x_A", "b_y_A", "b_z_A", "burgers_length_A", "character_deg", "character", "slip_planes",
    "confidence", "residual", "windings", "visible_in", "invisible_in", "ends_at_surface", "notes",
    "points_A",
]


def write_dislocation_table(lines, path, format=None):
    """Write the lines as a table, atomically (temporary file, then rename).

    Parameters
    ----------
    lines : list of Dislocation
    path : str or Path
        ``.csv`` (one row per line; the points in one column as
        ``x y z; x y z; ...`` in Å) or ``.json`` (every field, points and
        directions as lists).
    format : {'csv', 'json'}, optional
        Overrides the suffix.

    Columns
    -------
    id; closed; length_A; n_points; burgers_label (lattice coordinates as a
    fraction, e.g. 1/2[1 -1 0]); b_lattice_1..3; b_x_A, b_y_A, b_z_A (sample
    frame, Å); burgers_length_A; character_deg (0 screw, 90 edge);
    character; slip_planes; confidence; residual; windings (n_j per
    reflection); visible_in / invisible_in; ends_at_surface; notes; points_A.
    """
    path = Path(path)
    fmt = (format or path.suffix.lstrip(".")).lower()
    if fmt not in ("csv", "json"):
        raise InputError(f"{path}: expected a .csv or .json file name (or format='csv'/'json'), got '{fmt}'")
    recs = dislocations_to_records(lines)
    if fmt == "json":
        doc = {
            "content": "braggstrain dislocation lines",
            "units": {"points_A": POINTS_FRAME,
                      "burgers_lattice": "lattice coordinates of the conventional cell",
                      "burgers_sample_A": "Å, sample frame", "length_A": "Å", "character_deg": "degrees"},
            "convention": "phase of reflection j gains 2π n_j = −G_j·b right-handed about ξ; h_j·b = −n_j",
            "lines": recs,
        }
        data = json.dumps(doc, indent=1, ensure_ascii=False).encode("utf-8")
        _atomic_write_bytes(path, data)
        return path
    buf = io.StringIO()
    wr = csv.writer(buf)
    wr.writerow(_CSV_COLUMNS)

    def num(x, fmt_="{:.4g}"):
        return "" if x is None else fmt_.format(x)

    for r in recs:
        bl = r["burgers_lattice"] or [None] * 3
        bs = r["burgers_sample_A"] or [None] * 3
        wr.writerow([
            r["id"], r["closed"], f"{r['length_A']:.1f}", r["n_points"], r["burgers_label"],
            *[num(v) for v in bl], *[num(v, "{:.4f}") for v in bs], num(r["burgers_length_A"], "{:.4f}"),
            num(r["character_deg"], "{:.1f}"), r["character"],
            " or ".join(format_hkl(p) for p in r["slip_planes"]),
            f"{r['confidence']:.3f}", num(r["residual"], "{:.3f}"),
            "; ".join(f"({k}): {'?' if v is None else v}" for k, v in r["windings"].items()),
            " ".join(format_hkl(h) for h in r["visible_in"]),
            " ".join(format_hkl(h) for h in r["invisible_in"]),
            "" if r["ends_at_surface"] is None else " ".join(str(e) for e in r["ends_at_surface"]),
            " | ".join(r["notes"]),
            "; ".join(" ".join(f"{v:.1f}" for v in p) for p in r["points_A"]),
        ])
    _atomic_write_bytes(path, buf.getvalue().encode("utf-8"))
    return path


def write_dislocations_h5(group, lines):
    """Store the lines in an open h5py group (one subgroup ``line_001``, ...).

    Each subgroup holds datasets ``points`` (M×3, Å), ``directions`` (M×3),
    ``local_character_deg`` (M), ``hkl`` (J×3) and ``windings`` (J; −128 where
    unknown), ``agreement`` (J), and attributes ``burgers`` (lattice
    coordinates; NaN when unknown), ``burgers_sample`` (Å), ``burgers_fit``,
    ``length``, ``closed``, ``character_deg``, ``confidence``, ``residual``,
    ``slip_planes`` (K×3, may be empty), ``ends_at_surface`` and ``notes``.
    The group's attribute ``count`` is the number of lines. Existing
    ``line_*`` subgroups are replaced.
    """
    import h5py

    if not isinstance(group, h5py.Group):
        raise InputError(f"group: expected an open h5py Group, got {type(group).__name__}")
    recs = dislocations_to_records(lines)  # checks the types
    for name in [k for k in group.keys() if k.startswith("line_")]:
        del group[name]
    group.attrs["count"] = len(lines)
    group.attrs["units"] = "points: Å; burgers: lattice coordinates"
    group.attrs["points_frame"] = POINTS_FRAME
    group.attrs["convention"] = "h_j·b = −n_j, n_j the phase winding right-handed about ξ"
    for k, (d, r) in enumerate(zip(lines, recs)):
        g = group.create_group(f"line_{k + 1:03d}")
        g.create_dataset("points", data=np.asarray(d.points, float))
        g["points"].attrs["units"] = "Å"
        g.create_dataset("directions", data=np.asarray(d.directions, float))
        g.create_dataset("local_character_deg", data=np.asarray(d.local_character_deg, float))
        hk = list(d.windings.keys())
        g.create_dataset("hkl", data=np.asarray(hk, dtype=np.int32).reshape(-1, 3))
        g.create_dataset("windings", data=np.asarray([-128 if d.windings[h] is None else d.windings[h]
                                                      for h in hk], dtype=np.int32))
        g.create_dataset("agreement", data=np.asarray([d.agreement.get(h, 0.0) for h in hk], float))
        nan3 = np.full(3, np.nan)
        g.attrs["burgers"] = nan3 if d.burgers is None else np.asarray(d.burgers, float)
        g.attrs["burgers_sample"] = nan3 if d.burgers_sample is None else np.asarray(d.burgers_sample, float)
        g.attrs["burgers_fit"] = nan3 if d.burgers_fit is None else np.asarray(d.burgers_fit, float)
        g.attrs["length"] = float(d.length)
        g.attrs["closed"] = bool(d.closed)
        g.attrs["character_deg"] = float(d.character_deg)
        g.attrs["confidence"] = float(d.confidence)
        g.attrs["residual"] = float(d.residual)
        g.attrs["slip_planes"] = np.asarray(d.slip_planes, dtype=np.int32).reshape(-1, 3)
        g.attrs["ends_at_surface"] = (np.zeros(0, bool) if d.ends_at_surface is None
                                      else np.asarray(d.ends_at_surface, bool))
        g.attrs["notes"] = " | ".join(d.notes)


def read_dislocations_h5(group):
    """Lines stored by :func:`write_dislocations_h5`, as Dislocation records."""
    import h5py

    if not isinstance(group, h5py.Group):
        raise InputError(f"group: expected an open h5py Group, got {type(group).__name__}")
    out = []
    for name in sorted(k for k in group.keys() if k.startswith("line_")):
        g = group[name]
        for key in ("points", "directions", "hkl", "windings"):
            if key not in g:
                raise InputError(f"{g.name}: missing dataset '{key}'")
        hk = [tuple(int(v) for v in h) for h in g["hkl"][()]]
        wn = g["windings"][()]
        ag = g["agreement"][()] if "agreement" in g else np.zeros(len(hk))
        windings = {h: (None if int(n) == -128 else int(n)) for h, n in zip(hk, wn)}
        b = np.asarray(g.attrs["burgers"], float)
        bs = np.asarray(g.attrs["burgers_sample"], float)
        bf = np.asarray(g.attrs["burgers_fit"], float)
        ends = np.asarray(g.attrs["ends_at_surface"], bool)
        notes = str(g.attrs.get("notes", ""))
        out.append(Dislocation(
            points=g["points"][()], directions=g["directions"][()], length=float(g.attrs["length"]),
            closed=bool(g.attrs["closed"]), windings=windings,
            agreement={h: float(a) for h, a in zip(hk, ag)},
            visible_in=[h for h in hk if windings[h]], invisible_in=[h for h in hk if windings[h] == 0],
            burgers=None if np.isnan(b).any() else b,
            burgers_sample=None if np.isnan(bs).any() else bs,
            burgers_fit=None if np.isnan(bf).any() else bf,
            residual=float(g.attrs["residual"]), confidence=float(g.attrs["confidence"]),
            character_deg=float(g.attrs["character_deg"]),
            local_character_deg=g["local_character_deg"][()],
            slip_planes=[tuple(int(v) for v in p) for p in np.asarray(g.attrs["slip_planes"]).reshape(-1, 3)],
            ends_at_surface=None if ends.size == 0 else tuple(bool(e) for e in ends),
            notes=[s for s in notes.split(" | ") if s]))
    return out
