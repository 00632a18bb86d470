"""Figure of dislocation lines inside the crystal.

The crystal is drawn as a semi-transparent isosurface of its support
(:func:`skimage.measure.marching_cubes`); each line is drawn through its
points and coloured, point by point, by its character (the angle between b
and ξ: 0° screw, 90° edge). Axes are sample-frame positions in nm, those of
the results' grid (:class:`braggstrain.strain.grid.Grid`), so the surface and
the lines share one frame whatever the grid's origin. Uses matplotlib's Agg
backend, so it runs without a display.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from braggstrain.defects.burgers import format_lattice_vector
from braggstrain.defects.lines import Dislocation
from braggstrain.errors import InputError
from braggstrain.strain.grid import Grid

__all__ = ["plot_dislocations"]


def _isosurface(support, grid, step):
    from scipy import ndimage
    from skimage.measure import marching_cubes

    vol = ndimage.gaussian_filter(np.asarray(support, np.float32), 0.7)
    vol = np.pad(vol, 1)  # close the surface where the crystal touches the array's edge
    verts, faces, _, _ = marching_cubes(vol, level=0.5, step_size=step)
    verts_nm = grid.position(verts - 1.0) / 10.0  # index in the unpadded array -> position
    return verts_nm, faces


def plot_dislocations(lines, support, grid, path=None, *, title=None, elev=None, azim=None,
                      surface_step=2, dpi=150, cmap="viridis"):
    """Draw the lines inside a semi-transparent isosurface of the crystal.

    Parameters
    ----------
    lines : list of Dislocation
    support : bool ndarray (3-D)
        The crystal on the sample-frame grid (axes x, y, z).
    grid : Grid, or the results' grid dict, or a voxel size (float or 3 floats, Å)
        The grid of ``support`` and of the lines' points
        (:class:`~braggstrain.strain.grid.Grid`). A bare voxel size means
        positions relative to the voxel at index n//2 (origin zero).
    path : str or Path, optional
        Where to save the figure (format from the suffix, e.g. .png, .pdf,
        .svg); written atomically (temporary file, then rename).
    title : str, optional
    elev, azim : float, optional
        Viewing angles, degrees. By default the elevation is 25° and the
        azimuth faces the longest loop (so it is not seen edge-on), or −58°
        when there is no loop.
    surface_step : int
        Marching-cubes step (voxels): 1 is finest, 2 is faster.
    dpi : int
    cmap : str
        Colour map of the character, 0°–90°.

    Returns
    -------
    matplotlib.figure.Figure
    """
    import matplotlib
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.cm import ScalarMappable
    from matplotlib.colors import Normalize
    from matplotlib.figure import Figure
    from matplotlib.lines import Line2D
    from matplotlib.patches import Patch
    from mpl_toolkits.mplot3d.art3d import Line3DCollection, Poly3DCollection

    support = np.asarray(support)
    if support.ndim != 3 or not support.any():
        raise InputError(f"support: expected a non-empty 3-D mask of the crystal, got shape {support.shape}")
    if not isinstance(grid, (Grid, dict)):
        vs = np.broadcast_to(np.asarray(grid, float), (3,)).copy()
        if np.any(~np.isfinite(vs)) or np.any(vs <= 0):
            raise InputError(f"grid: expected a Grid or three positive voxel lengths in Å, got {grid!r}")
        grid = vs
    grid = Grid.of(grid, support.shape)
    for k, d in enumerate(lines):
        if not isinstance(d, Dislocation):
            raise InputError(f"lines[{k}]: expected a Dislocation, got {type(d).__name__}")

    fig = Figure(figsize=(7.6, 6.4))
    FigureCanvasAgg(fig)  # Agg: no display needed, no global pyplot state
    ax = fig.add_subplot(111, projection="3d")
    verts, faces = _isosurface(support.astype(bool), grid, int(surface_step))
    mesh = Poly3DCollection(verts[faces], alpha=0.12, facecolor=(0.55, 0.6, 0.7), edgecolor="none")
    ax.add_collection3d(mesh)

    norm = Normalize(0.0, 90.0)
    cm = matplotlib.colormaps[cmap]
    handles = []
    handles.append(Patch(facecolor=(0.55, 0.6, 0.7), alpha=0.4, label="crystal surface"))
    for k, d in enumerate(lines):
        p = np.asarray(d.points, float) / 10.0
        if d.closed and len(p) > 2:
            p = np.vstack([p, p[:1]])
            ch = np.append(d.local_character_deg, d.local_character_deg[:1])
        else:
            ch = np.asarray(d.local_character_deg, float)
        segs = np.stack([p[:-1], p[1:]], axis=1)
        if len(segs) == 0:
            continue
        known = ch.size == len(p) and np.all(np.isfinite(ch))
        if known:
            c = 0.5 * (ch[:-1] + ch[1:])
            ax.add_collection3d(Line3DCollection(segs, colors=cm(norm(c)), linewidths=3.0))
        else:  # one polyline, so that the dashes show
            ax.plot(p[:, 0], p[:, 1], p[:, 2], color="k", lw=2.0, ls="--")
        mid = p[len(p) // 2]
        label = f"{k + 1}"
        ax.text(mid[0], mid[1], mid[2], f"  {label}", fontsize=10, weight="bold")
        if d.burgers is not None:
            desc = f"{label}: b = {format_lattice_vector(d.burgers)}, {d.character} ({d.character_deg:.0f}°)"
        else:
            desc = f"{label}: b unknown (windings only)"
        desc += ", loop" if d.closed else ""
        handles.append(Line2D([0], [0], color=cm(norm(d.character_deg)) if known else "k",
                              lw=3 if known else 2, ls="-" if known else "--", label=desc))

    idx = np.argwhere(support)
    lo = grid.position(np.maximum(idx.min(axis=0) - 2.0, -0.5)) / 10.0  # the crystal and 2 voxels, inside the array
    hi = grid.position(np.minimum(idx.max(axis=0) + 2.0, np.array(support.shape) - 0.5)) / 10.0
    ax.set_xlim(lo[0], hi[0])
    ax.set_ylim(lo[1], hi[1])
    ax.set_zlim(lo[2], hi[2])
    ax.set_box_aspect(tuple(hi - lo))
    ax.set_xlabel("x (nm)")
    ax.set_ylabel("y (nm)")
    ax.zaxis.set_rotate_label(False)
    ax.set_zlabel("z (nm)", rotation=90)
    e0, a0 = _default_view(lines)
    ax.view_init(elev=e0 if elev is None else elev, azim=a0 if azim is None else azim)
    sm = ScalarMappable(norm=norm, cmap=cm)
    sm.set_array([])
    cb = fig.colorbar(sm, ax=ax, shrink=0.6, pad=0.12)
    cb.set_label("angle between b and line (°)\n0 = screw, 90 = edge")
    cb.set_ticks([0, 30, 60, 90])
    ax.legend(handles=handles, loc="upper left", fontsize=8, frameon=True, bbox_to_anchor=(-0.05, 1.02))
    n = len(lines)
    default = (f"{n} dislocation line{'s' if n != 1 else ''} (sample frame)" if n
               else "no dislocation line found (sample frame)")
    ax.set_title(title or default, pad=18)
    if path is not None:
        _save_atomic(fig, path, dpi)
    return fig


def _default_view(lines):
    """Elevation 25°; azimuth facing the longest loop (largest projected
    area at that elevation), or −58° when there is no loop."""
    loops = [d for d in lines if d.closed and len(d.points) > 3]
    if not loops:
        return 25.0, -58.0
    d = max(loops, key=lambda d: d.length)
    c = d.points - d.points.mean(axis=0)
    n = np.cross(c, np.roll(c, -1, axis=0)).sum(axis=0)
    if n[2] < 0:
        n = -n
    if np.hypot(n[0], n[1]) < 1e-6 * (np.linalg.norm(n) or 1.0):
        return 25.0, -58.0
    return 25.0, float(np.degrees(np.arctan2(n[1], n[0])))


def _save_atomic(fig, path, dpi):
    from braggstrain.io.files import atomic_path

    path = Path(path)
    if not path.parent.exists():
        raise InputError(f"{path}: the folder {path.parent} does not exist")
    fmt = path.suffix.lstrip(".").lower() or "png"
    with atomic_path(path) as tmp:
        fig.savefig(tmp, format=fmt, dpi=dpi, bbox_inches="tight")
