"""Phase vortices: the winding of each reflection's phase around every plaquette of the grid.

With ρ_j = s·exp(−i G_j·u) (docs/design.md), the phase of reflection j
gains −G_j·b = 2π n_j on a loop right-handed about a dislocation line, so a
line shows up as plaquettes of non-zero winding. The windings are computed
wrap-free from the complex values (sums of the angles of products of
neighbours); pierced plaquettes mark the grid cells a line crosses.
"""

from __future__ import annotations

import numpy as np

from braggstrain import _validate as _v
from braggstrain.strain.fields import trusted_for_windings

__all__ = ["vortex_map", "pierced_cells"]


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


def pierced_cells(windings, cell_shape):
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
