"""Publication figures of a results bundle (matplotlib, Agg backend).

Every slice figure shows three orthogonal central planes through the
crystal — the xy plane (z fixed), the xz plane (y fixed) and the yz plane
(x fixed) of the sample frame — cut through the voxel nearest the support's
centre of mass and cropped to the crystal. Signed fields use a diverging
colour map centred on zero with symmetric limits at the 99th percentile of
|value| inside the crystal (so a few outlier voxels do not wash the map
out); voxels outside the crystal are grey. Each row has one colour bar with
units, each panel a scale bar in nm.

:func:`make_figures` writes all figures of a bundle to a folder; the
individual ``plot_*`` functions return a :class:`matplotlib.figure.Figure`
and take a ``path`` to save to (atomically).

Why one module of about 650 lines: every figure of the results bundle
shares the slice, crop, scale and colour helpers at its top; the
dislocation figure, which needs its own 3-D helpers, is
:mod:`braggstrain.report.dislocations`.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from braggstrain import _validate as _v
from braggstrain.geometry.crystal import format_hkl
from braggstrain.errors import InputError
from braggstrain.io.files import atomic_path
from braggstrain.strain.components import STRAIN_COMPONENTS, strain_components
from braggstrain.strain.grid import Grid
from braggstrain.phasing.ensemble import METRIC_LABELS, RANKING_METRICS, metric_label

__all__ = [
    "FIGURES",
    "central_index",
    "plot_slices",
    "plot_amplitude",
    "plot_strain",
    "plot_rotation",
    "plot_derived",
    "plot_displacements",
    "plot_prtf",
    "plot_coherence",
    "plot_histories",
    "plot_runs",
    "make_figures",
]

#: File names written by :func:`make_figures` and what each shows.
FIGURES = {
    "amplitude.png": "Central slices of the mean normalised amplitude, with the support outlined.",
    "strain.png": "Central slices of the six strain components ε_xx … ε_xy (sample frame).",
    "rotation.png": "Central slices of the three lattice-rotation components ω_x, ω_y, ω_z, degrees.",
    "derived.png": "Central slices of the hydrostatic strain tr(ε)/3, the von Mises equivalent strain and "
                   "the tensor residual.",
    "uncertainty.png": "Central slices of the one-σ uncertainty of the six strain components σ(ε_xx) … "
                       "σ(ε_xy) and of the rotation σ(ω), degrees (what σ includes: the statement under "
                       "“Error bars”).",
    "displacement.png": "Central slices of each reflection's displacement along its G vector, u_G.",
    "dislocations.png": "The crystal's isosurface with the dislocation lines, coloured by character.",
    "prtf.png": "Phase-retrieval transfer function of each reflection against |q|.",
    "coherence.png": "Central slices of each reflection's estimated coherence function (the kernel the "
                     "coherent intensity is convolved with), in voxels of its phasing array's reciprocal "
                     "grid; a single bright voxel is a delta (the coherent model).",
    "history.png": "Per-iteration metrics of the best phasing run of each reflection.",
    "runs.png": "The ranking metric (e.g. free_nll: negative log-likelihood per measured voxel, free: held-out "
                "voxels) of every random start of each reflection; kept runs filled, failed runs crossed.",
}

_OUTSIDE = (0.86, 0.86, 0.86)
_PLANES = (  # (name, fixed axis, horizontal axis, vertical axis)
    ("xy", 2, 0, 1),
    ("xz", 1, 0, 2),
    ("yz", 0, 1, 2),
)
_AXIS = "xyz"
_SUPERSCRIPT = str.maketrans("-0123456789", "⁻⁰¹²³⁴⁵⁶⁷⁸⁹")


# --------------------------------------------------------------------------
# helpers
# --------------------------------------------------------------------------

def _figure(width, height):
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(width, height), layout="constrained")
    FigureCanvasAgg(fig)
    return fig


def _save(fig, path, dpi=150):
    path = Path(path)
    if not path.parent.is_dir():
        raise InputError(f"{path}: the folder {path.parent} does not exist")
    fmt = path.suffix.lstrip(".").lower() or "png"
    with atomic_path(path) as tmp:
        fig.savefig(tmp, format=fmt, dpi=dpi)
    return path


def central_index(support):
    """Voxel nearest the support's centre of mass, (i, j, k)."""
    s = np.asarray(support, bool)
    if s.ndim != 3 or not s.any():
        raise InputError(f"support: expected a non-empty 3-D mask, got shape {s.shape}")
    com = np.argwhere(s).mean(axis=0)
    return tuple(int(round(c)) for c in com)


def _crop(support, margin=2):
    """Index range [lo, hi) per axis around the crystal (may reach past the array)."""
    idx = np.argwhere(support)
    return idx.min(axis=0) - margin, idx.max(axis=0) + margin + 1


def _plane_crop(plane, lo, hi, room=0.16):
    """The crop of one plane, with ``room`` of its height added below the
    crystal so the scale bar never covers it."""
    _, _, _, v = plane
    lo = np.array(lo)
    lo[v] -= int(np.ceil(room * (hi[v] - lo[v])))
    return lo, np.array(hi)


def _plane(vol, plane, centre, lo, hi, fill=np.nan):
    """2-D cut (rows along the horizontal axis, columns along the vertical
    one) of a 3-D array through ``centre``, over [lo, hi) on the two in-plane
    axes; indices outside the array are filled with ``fill``."""
    _, fixed, h, v = plane
    shape = vol.shape
    sl = [slice(None)] * 3
    sl[fixed] = centre[fixed]
    for ax in (h, v):
        sl[ax] = slice(max(int(lo[ax]), 0), min(int(hi[ax]), shape[ax]))
    cut = np.asarray(vol[tuple(sl)], float)
    if h > v:
        cut = cut.T
    pad = [(max(0, -int(lo[ax])), max(0, int(hi[ax]) - shape[ax])) for ax in (h, v)]
    return np.pad(cut, pad, constant_values=fill) if any(a or b for a, b in pad) else cut


def _extent(plane, lo, hi, grid):
    """Edges (nm, sample-frame positions) of the crop [lo, hi) of one plane."""
    _, _, h, v = plane
    first = grid.position(np.asarray(lo, float) - 0.5) / 10.0
    last = grid.position(np.asarray(hi, float) - 0.5) / 10.0
    return (first[h], last[h], first[v], last[v])


def _nice_length(span_nm):
    """A 1/2/5×10^k length near a quarter of ``span_nm``."""
    target = max(span_nm / 4.0, 1e-6)
    k = np.floor(np.log10(target))
    for m in (5, 2, 1):
        if m * 10 ** k <= target:
            return float(m * 10 ** k)
    return float(10 ** k)


def _scale_bar(ax, extent, color="black"):
    from matplotlib.font_manager import FontProperties
    from mpl_toolkits.axes_grid1.anchored_artists import AnchoredSizeBar

    width = extent[1] - extent[0]
    length = _nice_length(width)
    label = f"{length:g} nm"
    bar = AnchoredSizeBar(ax.transData, length, label, "lower left", pad=0.3, borderpad=0.3, sep=2,
                          color=color, frameon=False, size_vertical=(extent[3] - extent[2]) * 0.012,
                          fontproperties=FontProperties(size=7))
    ax.add_artist(bar)


def _robust_limit(values, q=99.0):
    v = np.abs(values[np.isfinite(values)])
    if v.size == 0:
        return 1.0
    lim = float(np.percentile(v, q))
    if lim <= 0:
        lim = float(v.max()) or 1.0
    return lim


def _scale(limit):
    """Power of ten to divide the values by so colour-bar ticks read well."""
    if not np.isfinite(limit) or limit <= 0:
        return 0
    e = int(np.floor(np.log10(limit)))
    return e if (e < -1 or e > 2) else 0


def _unit_label(name, unit, e):
    if e == 0:
        return f"{name} ({unit})" if unit else name
    p = f"10{str(e).translate(_SUPERSCRIPT)}"
    return f"{name} ({p} {unit})" if unit else f"{name} ({p})"


def _plane_title(plane, centre, grid):
    name, fixed, _, _ = plane
    pos = grid.position(np.asarray(centre, float))[fixed] / 10.0
    return f"{name} plane, {_AXIS[fixed]} = {pos:.0f} nm"


# --------------------------------------------------------------------------
# slice figures
# --------------------------------------------------------------------------

def plot_slices(fields, support, grid, path=None, *, names, units, signed=True, scale_to=None,
                outline=False, title=None, cmap=None, limits=None):
    """Rows of central slices (xy, xz, yz planes) of several 3-D fields.

    Parameters
    ----------
    fields : sequence of 3-D arrays
        Axes 0, 1, 2 along sample-frame x, y, z.
    support : bool 3-D array
        The crystal; values outside are shown grey unless ``outline``.
    grid : Grid, or the results' grid dict, or a voxel size (float or 3 floats, Å)
        Where the voxels are (:class:`~braggstrain.strain.grid.Grid`); the
        plane titles give the cut's sample-frame position. A bare voxel size
        means positions relative to the voxel at index n//2.
    path : str or Path, optional
        Save the figure there (atomically).
    names, units : sequence of str
        Row labels and their units (for the colour bars).
    signed : bool or sequence of bool
        Diverging map centred on zero with symmetric limits (True) or a
        sequential map from the 1st to the 99th percentile (False), per row.
    scale_to : float, optional
        Multiply the values by this for display (e.g. 180/π for degrees).
    outline : bool
        Show the full field (not masked) with the support's outline.
    title : str, optional
    cmap : str, optional
        Override the colour map.
    limits : sequence of (lo, hi), optional
        Colour limits per row (display units); default robust limits.

    Returns
    -------
    matplotlib.figure.Figure
    """
    import matplotlib

    support = np.asarray(support, bool)
    if support.ndim != 3 or not support.any():
        raise InputError(f"support: expected a non-empty 3-D mask, got shape {support.shape}")
    grid = grid if isinstance(grid, (Grid, dict)) else _v.voxel_size(grid)
    grid = Grid.of(grid, support.shape)
    vs = grid.voxel_size
    fields = [np.asarray(f, float) for f in fields]
    for k, f in enumerate(fields):
        if f.shape != support.shape:
            raise InputError(f"fields[{k}] ('{names[k]}'): expected the support's shape {support.shape}, got {f.shape}")
    if len(names) != len(fields) or len(units) != len(fields):
        raise InputError("names, units: expected one name and one unit per field")
    signed = [signed] * len(fields) if isinstance(signed, bool) else list(signed)
    factor = scale_to if scale_to is not None else 1.0
    # Rows of one unit share a floor of 1 % of their largest robust limit, so a
    # component that is zero up to round-off shows as zero, not as amplified noise.
    floors = {}
    for f, unit, sg in zip(fields, units, signed):
        if sg:
            floors[unit] = max(floors.get(unit, 0.0), 0.01 * _robust_limit(f[support] * factor))
    centre = central_index(support)
    lo, hi = _crop(support)
    nrow = len(fields)
    # panel sizes follow the crop so the planes keep their true aspect
    span = (hi - lo) * vs
    widths = [span[p[2]] for p in _PLANES]
    fig = _figure(1.0 + 2.3 * sum(widths) / max(widths), 0.5 + 2.25 * nrow + (0.3 if title else 0))
    gs = fig.add_gridspec(nrow, 3, width_ratios=widths)
    for row, (f, name, unit, sg) in enumerate(zip(fields, names, units, signed)):
        shown = f * factor
        inside = shown[support]
        if limits is not None:
            vmin, vmax = limits[row]
        elif sg:
            lim = max(_robust_limit(inside), floors[unit])
            vmin, vmax = -lim, lim
        else:
            fin = inside[np.isfinite(inside)]
            vmin, vmax = ((float(np.percentile(fin, 1)), float(np.percentile(fin, 99))) if fin.size
                          else (0.0, 1.0))
            if vmax <= vmin:
                vmax = vmin + (abs(vmin) or 1.0)
        e = _scale(max(abs(vmin), abs(vmax)))
        fac = 10.0 ** (-e)
        cm = matplotlib.colormaps[cmap or ("RdBu_r" if sg else ("gray" if outline else "viridis"))]
        cm = cm.with_extremes(bad=_OUTSIDE)
        disp = shown if outline else np.where(support, shown, np.nan)
        axes = []
        im = None
        for col, plane in enumerate(_PLANES):
            ax = fig.add_subplot(gs[row, col])
            axes.append(ax)
            plo, phi = _plane_crop(plane, lo, hi)
            img = _plane(disp, plane, centre, plo, phi) * fac
            ext = _extent(plane, plo, phi, grid)
            im = ax.imshow(img.T, origin="lower", extent=ext, cmap=cm, vmin=vmin * fac, vmax=vmax * fac,
                           interpolation="nearest", aspect="equal")
            if outline:
                sup2 = _plane(support, plane, centre, plo, phi, fill=0.0)
                h_c = np.linspace(ext[0], ext[1], sup2.shape[0] + 1)
                v_c = np.linspace(ext[2], ext[3], sup2.shape[1] + 1)
                ax.contour(0.5 * (h_c[1:] + h_c[:-1]), 0.5 * (v_c[1:] + v_c[:-1]), sup2.T, levels=[0.5],
                           colors=["#ff9f1c"], linewidths=1.0)
            ax.set_xticks([])
            ax.set_yticks([])
            ax.set_xlabel(f"{_AXIS[plane[2]]} →", fontsize=8, labelpad=2)
            ax.set_ylabel(f"{_AXIS[plane[3]]} →", fontsize=8, labelpad=2)
            _scale_bar(ax, ext, "white" if outline else "black")
            if row == 0:
                ax.set_title(_plane_title(plane, centre, grid), fontsize=9)
        cb = fig.colorbar(im, ax=axes, shrink=0.9, aspect=12, pad=0.02)
        cb.set_label(_unit_label(name, unit, e), fontsize=9)
        cb.ax.tick_params(labelsize=8)
    if title:
        fig.suptitle(title, fontsize=11)
    if path is not None:
        _save(fig, path)
    return fig


def plot_amplitude(results, path=None):
    """Central slices of the mean normalised amplitude with the support outline."""
    return plot_slices([results.amplitude], results.support, results.grid, path,
                       names=["amplitude"], units=["normalised"], signed=False, outline=True,
                       title="Mean amplitude (support outlined)",
                       limits=[(0.0, float(np.percentile(np.asarray(results.amplitude)[results.support], 99.5))
                                or 1.0)])


def plot_strain(results, path=None):
    """Central slices of the six strain components."""
    from braggstrain.strain.components import STRAIN_COMPONENTS

    comps = [results.strain(c) for c in STRAIN_COMPONENTS]
    return plot_slices(comps, results.tensor.support & results.support, results.grid, path,
                       names=[f"ε_{c}" for c in STRAIN_COMPONENTS], units=[""] * 6, signed=True,
                       title="Strain tensor (sample frame, tensile positive)")


def plot_rotation(results, path=None):
    """Central slices of the three lattice-rotation components, degrees."""
    tf = results.tensor
    return plot_slices(list(tf.rotation), tf.support & results.support, results.grid, path,
                       names=["ω_x", "ω_y", "ω_z"], units=["°"] * 3, signed=True, scale_to=180.0 / np.pi,
                       title="Lattice rotation (axial vector, sample frame)")


def plot_derived(results, path=None):
    """Hydrostatic strain, von Mises equivalent strain and tensor residual."""
    tf = results.tensor
    mean_g = float(np.mean(np.linalg.norm(np.asarray(tf.g_vectors, float), axis=1)))
    return plot_slices([tf.hydrostatic, tf.von_mises, np.asarray(tf.residual) / mean_g],
                       tf.support & results.support, results.grid, path,
                       names=["tr(ε)/3", "von Mises strain", "residual / mean |G|"], units=["", "", ""],
                       signed=[True, False, False],
                       title="Derived maps (residual shown strain-equivalent: rad/Å ÷ Å⁻¹)")


def plot_uncertainty(results, path=None):
    """Central slices of σ of the six strain components and of the rotation (degrees).

    Returns None (no figure) when no voxel has a finite σ; the report then
    says why (``TensorField.uncertainty_basis``).
    """
    tf = results.tensor
    sup = tf.support & results.support
    deg = 180.0 / np.pi
    rows = [np.asarray(c, float) for c in strain_components(tf.strain_uncertainty)]
    rows += [np.asarray(v, float) * deg for v in tf.rotation_uncertainty]
    if not any(np.isfinite(v[sup]).any() for v in rows):
        return None
    return plot_slices(rows, sup, results.grid.voxel_size, path,
                       names=[f"σ(ε_{c})" for c in STRAIN_COMPONENTS] + [f"σ(ω_{c})" for c in "xyz"],
                       units=[""] * 6 + ["°"] * 3, signed=False,
                       title="One-σ uncertainty of strain (dimensionless) and rotation (degrees)")


def plot_displacements(results, path=None):
    """Central slices of each reflection's displacement along G, Å."""
    rows, names = [], []
    for x in results.reflections:
        if x.displacement is None:
            continue
        rows.append(x.displacement)
        names.append(f"u_G for {format_hkl(x.hkl)}")
    if not rows:
        return None
    return plot_slices(rows, results.support, results.grid, path, names=names,
                       units=["Å"] * len(rows), signed=True,
                       title="Displacement along each G vector, u_G = −φ/|G|")


# --------------------------------------------------------------------------
# phasing figures
# --------------------------------------------------------------------------

def _colours(n):
    import matplotlib

    cm = matplotlib.colormaps["tab10"]
    return [cm(i % 10) for i in range(n)]


def plot_prtf(results, path=None):
    """PRTF of each reflection against |q| (Å⁻¹), with the 1/e threshold."""
    refl = [x for x in results.reflections if x.prtf is not None]
    if not refl:
        return None
    fig = _figure(6.4, 4.2)
    ax = fig.add_subplot(111)
    for x, c in zip(refl, _colours(len(refl))):
        p = x.prtf
        res = p.get("resolution", np.nan)
        lab = f"{x.name} {format_hkl(x.hkl)}"
        lab += f": resolution {res / 10.0:.1f} nm" if np.isfinite(res) else ": stays above 1/e"
        ax.plot(p["q"], p["values"], "-o", ms=2.5, lw=1.4, color=c, label=lab)
    ax.axhline(np.exp(-1), color="0.3", ls="--", lw=1)
    ax.text(0.99, np.exp(-1) + 0.015, "1/e", transform=ax.get_yaxis_transform(), ha="right", va="bottom",
            fontsize=8, color="0.3")
    ax.set_xlabel("|q| (Å⁻¹)")
    ax.set_ylabel("PRTF")
    ax.set_ylim(0, 1.05)
    ax.set_xlim(left=0)
    ax.grid(alpha=0.3)
    ax.legend(fontsize=8, loc="lower left")
    ax.set_title("Phase-retrieval transfer function")
    if path is not None:
        _save(fig, path)
    return fig


def plot_coherence(results, path=None):
    """Central slices (frame-row, frame-column, row-column) of each reflection's coherence kernel."""
    refl = [x for x in results.reflections if x.coherence.get("kernel") is not None]
    if not refl:
        return None
    fig = _figure(7.2, 0.6 + 2.2 * len(refl))
    planes = (("frame", "row", 2), ("frame", "column", 1), ("row", "column", 0))
    for j, x in enumerate(refl):
        k = np.asarray(x.coherence["kernel"], float)
        c = [n // 2 for n in k.shape]
        w = x.coherence.get("widths")
        if x.coherence.get("model") == "partial" and w is not None:
            txt = "widths " + ", ".join(f"{v * 1e4:.2f}" for v in w) + " ·10⁻⁴ Å⁻¹"
        else:
            txt = "coherent model chosen: a delta"
        for i, (v_ax, h_ax, fixed) in enumerate(planes):
            ax = fig.add_subplot(len(refl), 3, 3 * j + i + 1)
            sl = [slice(None)] * 3
            sl[fixed] = c[fixed]
            img = k[tuple(sl)]
            h = img.shape[1] // 2
            v = img.shape[0] // 2
            ax.imshow(img, origin="lower", cmap="magma", vmin=0, vmax=max(k.max(), 1e-12),
                      extent=(-h - 0.5, h + 0.5, -v - 0.5, v + 0.5))
            ax.set_xlabel(f"{h_ax} (voxels)", fontsize=8)
            ax.set_ylabel(f"{v_ax} (voxels)", fontsize=8)
            ax.tick_params(labelsize=7)
            if i == 0:
                ax.set_title(f"{x.name} {format_hkl(x.hkl)}: {txt}", fontsize=8, loc="left")
    if path is not None:
        _save(fig, path)
    return fig


_SKIP_HISTORY = ("checkpoint", "stage")

def _stage_starts(refl):
    """Iterations where a new stage of the phasing plan starts (every reflection's)."""
    starts = set()
    for x in refl:
        st = x.history.get("stage")
        if st is not None and len(st) > 1:
            starts |= {int(b) + 1 for b in np.nonzero(np.diff(np.asarray(st, float)))[0]}
    return sorted(starts)


def plot_histories(results, path=None):
    """One panel per recorded metric, one curve per reflection (best run).

    A metric that stayed zero everywhere (e.g. the background when none was
    fitted) gets no panel; dashed lines mark where each stage of the
    phasing plan starts, numbered at the top."""
    refl = results.reflections
    keys = []
    for x in refl:
        for k, v in x.history.items():
            if k in keys or k in _SKIP_HISTORY:
                continue
            vals = np.asarray(v, float)
            if np.any(np.isfinite(vals) & (vals != 0)):
                keys.append(k)
    if not keys:
        return None
    starts = _stage_starts(refl)
    n = len(keys)
    ncol = 2 if n > 1 else 1
    nrow = int(np.ceil(n / ncol))
    fig = _figure(4.2 * ncol, 2.9 * nrow + 0.5)
    cols = _colours(len(refl))
    for m, key in enumerate(keys):
        ax = fig.add_subplot(nrow, ncol, m + 1)
        positive = True
        for x, c in zip(refl, cols):
            h = x.history
            if key not in h:
                continue
            y = np.asarray(h[key], float)
            it = np.arange(len(y))
            chk = h.get("checkpoint")
            if chk is not None and len(chk) == len(y) and len(y) != max(len(v) for v in h.values()):
                it = np.asarray(chk, float)
            ax.plot(it, y, lw=1.2, color=c, label=f"{x.name} {format_hkl(x.hkl)}",
                    marker="o" if len(y) < 30 else None, ms=3)
            fin = y[np.isfinite(y)]
            positive &= bool(fin.size) and bool(np.all(fin > 0)) and fin.max() / fin.min() > 20
        for b in starts:
            ax.axvline(b, color="0.35", ls="--", lw=0.8)
        edges = [0, *starts]
        for k, b in enumerate(edges):
            ax.text(b, 1.0, f" {k + 1}", transform=ax.get_xaxis_transform(), fontsize=7, color="0.3",
                    va="bottom", ha="left")
        if positive:
            ax.set_yscale("log")
        ax.set_title(METRIC_LABELS.get(key, (key.replace("_", " "),))[0], fontsize=10, pad=10)
        ax.set_ylabel(metric_label(key), fontsize=7)
        ax.set_xlabel("iteration", fontsize=9)
        ax.tick_params(labelsize=8)
        ax.grid(alpha=0.3)
        if m == 0:
            ax.legend(fontsize=7)
    fig.suptitle("Phasing history of the best run" + (" (dashed: a new stage of the phasing plan starts; "
                                                      "stages numbered at the top)" if starts else ""),
                 fontsize=10)
    if path is not None:
        _save(fig, path)
    return fig


#: Columns of the runs table (results.h5, /reflections/<name>/runs) that
#: :func:`plot_runs` reads, besides each reflection's ranking metric.
RUN_COLUMNS = ("status", "kept")


def plot_runs(results, path=None):
    """Each reflection's ranking metric for every random start (the ensemble's own ranking)."""
    refl = [x for x in results.reflections if any(x.ranking_metric in m for m in x.run_metrics)]
    if not refl:
        return None
    fig = _figure(6.4, 1.0 + 0.55 * max(len(refl), 1) + 1.2)
    ax = fig.add_subplot(111)
    labels = []
    metrics = []
    for j, x in enumerate(refl):
        runs = x.run_metrics
        labels.append(f"{x.name} {format_hkl(x.hkl)}")
        key = x.ranking_metric
        if key not in metrics:
            metrics.append(key)
        vals = np.array([float(m.get(key, np.nan)) for m in runs])
        ok = np.array([str(m["status"]) == "ok" for m in runs])
        kept = np.array([bool(m["kept"]) for m in runs])
        jit = (np.arange(len(runs)) - (len(runs) - 1) / 2) * min(0.08, 0.6 / max(len(runs), 1))
        yy = j + jit
        ax.scatter(vals[ok & kept], yy[ok & kept], s=36, color="C0", zorder=3)
        ax.scatter(vals[ok & ~kept], yy[ok & ~kept], s=36, facecolor="white", edgecolor="C0", zorder=3)
        bad = ~ok & np.isfinite(vals)
        ax.scatter(vals[bad], yy[bad], s=40, marker="x", color="C3", zorder=3)
    from matplotlib.lines import Line2D

    handles = [Line2D([], [], ls="", marker="o", color="C0", label="kept"),
               Line2D([], [], ls="", marker="o", mfc="white", mec="C0", label="not kept"),
               Line2D([], [], ls="", marker="x", color="C3", label="failed run")]
    ax.legend(handles=handles, fontsize=8, loc="upper center", bbox_to_anchor=(0.5, -0.22), ncol=3,
              frameon=False)
    ax.set_yticks(range(len(refl)))
    ax.set_yticklabels(labels, fontsize=8)
    ax.set_ylim(-0.6, len(refl) - 0.4)
    ax.invert_yaxis()
    ax.set_xlabel("\n".join(metric_label(k, long=True) for k in metrics), fontsize=9)
    ax.grid(axis="x", alpha=0.3)
    higher = [k for k in metrics if RANKING_METRICS.get(k)]
    ax.set_title("Final ranking metric of every random start ("
                 + ("higher" if higher and len(higher) == len(metrics) else "lower") + " is better)")
    if path is not None:
        _save(fig, path)
    return fig


# --------------------------------------------------------------------------
# all figures
# --------------------------------------------------------------------------

def make_figures(results, out_dir):
    """Write every figure of a results bundle as PNG into ``out_dir``.

    Parameters
    ----------
    results : braggstrain.io.results.Results
        What the pipeline built or :func:`braggstrain.io.results.read_results` returns.
    out_dir : str or Path
        Folder (created if missing).

    Returns
    -------
    list of Path
        In the order of :data:`FIGURES`; ``displacement.png``, ``prtf.png``,
        ``coherence.png``, ``history.png`` and ``runs.png`` are left out when
        no reflection has a displacement map, a PRTF, a coherence kernel, a
        history or run metrics.
    """
    from braggstrain.io.results import Results
    from braggstrain.report.dislocations import plot_dislocations

    if not isinstance(results, Results):
        raise InputError(f"results: expected braggstrain.io.results.Results, got {type(results).__name__}")
    r = results
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    makers = {
        "amplitude.png": plot_amplitude,
        "strain.png": plot_strain,
        "rotation.png": plot_rotation,
        "derived.png": plot_derived,
        "uncertainty.png": plot_uncertainty,
        "displacement.png": plot_displacements,
        "prtf.png": plot_prtf,
        "coherence.png": plot_coherence,
        "history.png": plot_histories,
        "runs.png": plot_runs,
    }
    written = []
    for name in FIGURES:
        path = out_dir / name
        if name == "dislocations.png":
            plot_dislocations(r.dislocations, r.support, r.grid, path)
            written.append(path)
            continue
        fig = makers[name](r, path)
        if fig is not None:
            written.append(path)
    return written
