"""Line tracing: clouds of pierced cells followed into smooth polylines.

Connected cells (cubes of 8 voxels) that a line pierces are traced into
polylines, open (ending at the surface) or closed (loops), smoothed along
the line, oriented, and their local directions ξ estimated.
"""

from __future__ import annotations

import numpy as np
from scipy import ndimage
from scipy.spatial import cKDTree

__all__ = ["Tracer", "smooth", "directions", "path_length", "orient", "drop_duplicates"]


def _principal_axis(pts):
    c = pts - pts.mean(axis=0)
    if len(pts) < 2:
        return None
    _, s, vt = np.linalg.svd(c, full_matrices=False)
    if s[0] <= 1e-9:
        return None
    return vt[0]


class Tracer:
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


def smooth(path, closed, sigma):
    if sigma <= 0 or len(path) < 3:
        return path
    mode = "wrap" if closed else "nearest"
    return ndimage.gaussian_filter1d(path, sigma, axis=0, mode=mode)


def directions(points, closed, half_window=4, end_skip=2):
    """Unit tangents from a principal-axis fit over 2·half_window + 1
    consecutive points (a window of the same size, shifted inwards, at the
    ends of an open line), signed along the order of the points.

    The ``end_skip`` outermost points of an open line are left out of the
    fits (their cells are cut by the surface, so they sit up to half a voxel
    off the line); they take the tangent of the nearest fitted point.
    """
    m = len(points)
    if not closed and end_skip > 0 and m >= 2 * end_skip + 2 * half_window + 1:
        inner = directions(points[end_skip:m - end_skip], False, half_window, 0)
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


def path_length(points, closed):
    seg = np.linalg.norm(np.diff(points, axis=0), axis=1).sum()
    if closed and len(points) > 2:
        seg += np.linalg.norm(points[0] - points[-1])
    return float(seg)


def orient(points, closed):
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


def drop_duplicates(lines, distance):
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
