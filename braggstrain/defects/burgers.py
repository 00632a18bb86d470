"""Burgers vectors and character: ring windings around a line, h_j·b = −n_j, slip planes.

Around each traced line, small rings perpendicular to ξ are sampled by
trilinear interpolation of each complex object and their phase windings
voted on, giving n_j per reflection. h_j·b = −n_j is solved by least
squares over the reflections and snapped to the nearest short lattice
translation of the crystal; the character is the angle between b and ξ
(computed in :mod:`braggstrain.defects.lines`), and a slip plane is a plane
of the crystal's slip family that holds both b and the line.
"""

from __future__ import annotations

from fractions import Fraction

import numpy as np
from scipy import ndimage

__all__ = ["solve_burgers", "format_lattice_vector", "ring_windings", "vote", "slip_planes"]


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


def _perp_frame(xi):
    trial = np.array([1.0, 0.0, 0.0]) if abs(xi[0]) < 0.9 else np.array([0.0, 1.0, 0.0])
    e1 = trial - np.dot(trial, xi) * xi
    e1 /= np.linalg.norm(e1)
    e2 = np.cross(xi, e1)  # (e1, e2, ξ) right-handed
    return e1, e2


def ring_windings(fields, trust, centers_idx, dirs_A, radii_A, vs):
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


def vote(values):
    if len(values) == 0:
        return None, 0.0
    u, c = np.unique(values, return_counts=True)
    k = int(np.argmax(c))
    return int(u[k]), float(c[k] / c.sum())


def slip_planes(b, pts_A, dirs, length, U, crystal, vmean, angle_tol_deg=10.0):
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
