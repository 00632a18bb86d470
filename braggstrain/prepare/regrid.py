"""Reciprocal-space gridding: the prepared stack on an orthogonal q grid.

:func:`regrid` takes the Q of every prepared voxel from xrayutilities'
per-pixel conversion (or, on request, from the linear map) and bins the
intensities on an orthogonal grid of the lab frame at the peak or of the
sample frame with xrayutilities' gridders: ``Gridder3D`` (each voxel into its
nearest bin) or ``FuzzyGridder3D`` (each voxel a small box shared among the
bins it overlaps), the latter when the pixels are too sparse to fill every
bin inside the measured region. Bins are averages of the voxels that fall in
them; bins no voxel reaches are flagged in the mask (True = not measured).

Grid steps keep the oversampling: along grid axis x the crystal's extent L_x
is estimated from the autocorrelation of the prepared data (twice the
crystal), mapped into the grid's frame, and Δq_x = 2π/(σ·L_x) with σ the
smallest oversampling the detector-frame data have (docs/methods.md:
σ = 2π/(L Δq)). The grid spans the whole measured q range, centred on the Q
of the prepared array's centre (index n//2 of every grid axis).

On the conjugate real-space grid the voxel is 2π/(N Δq) per axis
(discrete Fourier transform sampling; common practice, no source needed).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from braggstrain.errors import InputError
from braggstrain.prepare.scan import PreparedScan, exact_q, fast_size, linear_q

__all__ = ["GriddedIntensity", "regrid", "default_q_step", "peak_center_of_mass"]


@dataclass
class GriddedIntensity:
    """Intensity on an orthogonal q grid.

    Attributes
    ----------
    intensity : float32 (N0, N1, N2)
        Mean counts per bin; axes along the frame's x, y, z; the grid's
        centre (index n//2) at ``q_center``.
    mask : bool, same shape
        True for bins no measured voxel reached (not measured).
    axes : tuple of three float64 arrays
        Q components (Å⁻¹) of the bin centres along x, y, z.
    frame : "lab" or "sample"
        "lab" is the lab frame with the sample at the centre frame's angles
        (that of the prepared scan's linear map).
    q_center : (3,) float64, Å⁻¹
    q_step : (3,) float64, Å⁻¹
    rotation : (3, 3) float64
        R_s at the centre frame (lab ← sample).
    hkl : tuple or None
    source : str
    fuzzy : bool
        Whether the fuzzy gridder was used.
    width : (3,) float64 or None
        Box size of a voxel for the fuzzy gridder, Å⁻¹.
    holes : int
        Empty bins inside the measured region (0 when fuzzy gridding filled
        them).
    footprint : bool array or None
        Bins whose centre lies inside the measured region (the nearest
        prepared voxel is measured); bins outside it were never measured.
    meta : dict
    """

    intensity: np.ndarray
    mask: np.ndarray
    axes: tuple
    frame: str
    q_center: np.ndarray
    q_step: np.ndarray
    rotation: np.ndarray
    hkl: tuple | None = None
    source: str = ""
    fuzzy: bool = False
    width: np.ndarray | None = None
    holes: int = 0
    footprint: np.ndarray | None = None
    meta: dict = field(default_factory=dict)

    @property
    def shape(self):
        return self.intensity.shape

    @property
    def voxel_size(self):
        """Real-space voxel of the conjugate grid, 2π/(N Δq) per axis, Å."""
        return 2 * np.pi / (np.asarray(self.shape, float) * self.q_step)

    def q_grid(self):
        """Q of every bin, (3, N0, N1, N2), Å⁻¹, in ``frame``."""
        return np.stack(np.meshgrid(*self.axes, indexing="ij"))


def _frame_basis(prepared, frame):
    """Real-space basis T' (Å per index step) of the prepared array, in the
    grid's frame."""
    T = prepared.real_space_basis()
    return T if frame == "lab" else prepared.rotation.T @ T


def default_q_step(prepared, frame="sample", oversampling=None, threshold=0.005):
    """Grid steps Δq (Å⁻¹, per axis of ``frame``) that keep the oversampling.

    The autocorrelation of the prepared intensity (twice the crystal) is
    thresholded at ``threshold`` of its maximum; its voxels' positions on the
    conjugate real-space grid (T = 2π M⁻ᵀ diag(1/N), docs/methods.md) give the
    crystal's extent L along each axis of the frame, L = extent/(2(1 −
    threshold)), and Δq = 2π/(σ L) with σ = ``oversampling`` (default: the
    smallest oversampling of the prepared data, so none is lost).
    """
    import scipy.fft

    i = np.where(prepared.mask, 0.0, np.maximum(prepared.intensity.astype(np.float64), 0))
    ac = np.abs(scipy.fft.fftshift(scipy.fft.ifftn(scipy.fft.ifftshift(i))))
    idx = np.argwhere(ac >= threshold * ac.max()) - np.array(ac.shape) // 2
    pos = idx @ _frame_basis(prepared, frame).T  # (K, 3) Å
    ext = pos.max(axis=0) - pos.min(axis=0) + np.abs(_frame_basis(prepared, frame)).sum(axis=1)
    L = ext / (2.0 * (1.0 - threshold))
    sigma = float(np.nanmin(prepared.oversampling)) if oversampling is None else float(oversampling)
    if not np.isfinite(sigma) or sigma <= 0:
        raise InputError(f"oversampling: expected a positive ratio, got {sigma}")
    return 2 * np.pi / (sigma * L)


def regrid(prepared, *, frame="sample", q_step=None, shape=None, fuzzy="auto", width=None, q_source="exact",
           oversampling=None, max_shape=(256, 256, 256)):
    """Grid a prepared scan on an orthogonal q grid with xrayutilities.

    Parameters
    ----------
    prepared : PreparedScan
    frame : "sample" (default) or "lab" (lab frame at the centre frame)
        Frame whose x, y, z the grid axes follow.
    q_step : float or 3 floats, Å⁻¹, optional
        Grid step per axis; default :func:`default_q_step`.
    shape : 3 ints, optional
        Grid shape; default: the smallest sizes (products of 2, 3, 5) that
        hold every measured voxel's Q, centred on the prepared centre.
    fuzzy : "auto", True or False
        Use xrayutilities' FuzzyGridder3D; "auto" grids with Gridder3D first
        and switches to fuzzy gridding when more than 0.5 % of the bins
        inside the measured region stay empty.
    width : float or 3 floats, Å⁻¹, optional
        Box of one voxel for fuzzy gridding; default: the extent of one
        prepared voxel's q parallelepiped along each axis.
    q_source : "exact" (xrayutilities per-pixel Q, default) or "linear"
        (the prepared linear map).
    oversampling : float, optional
        Target σ of the default step (default: the data's smallest).
    max_shape : 3 ints
        Largest grid allowed (memory guard).

    Returns
    -------
    GriddedIntensity
    """
    import xrayutilities as xu

    if not isinstance(prepared, PreparedScan):
        raise InputError(f"prepared: expected a PreparedScan, got {type(prepared).__name__}")
    if frame not in ("lab", "sample"):
        raise InputError(f"frame: expected 'lab' or 'sample', got {frame!r}")
    if fuzzy not in ("auto", True, False):
        raise InputError(f"fuzzy: expected 'auto', true or false, got {fuzzy!r}")
    if q_source not in ("exact", "linear"):
        raise InputError(f"q_source: expected 'exact' or 'linear', got {q_source!r}")
    src = prepared.source or "<prepared scan>"
    q = exact_q(prepared, frame) if q_source == "exact" else linear_q(prepared, frame)
    R = prepared.rotation
    qc = prepared.q_center if frame == "lab" else R.T @ prepared.q_center
    M = prepared.linear_map if frame == "lab" else R.T @ prepared.linear_map
    if q_step is None:
        dq = default_q_step(prepared, frame, oversampling)
    else:
        dq = np.broadcast_to(np.asarray(q_step, float), (3,)).copy()
        if np.any(~np.isfinite(dq)) or np.any(dq <= 0):
            raise InputError(f"{src}: q_step: expected positive steps in Å⁻¹, got {q_step!r}")
    use = ~prepared.mask & np.all(np.isfinite(q), axis=0)
    if not np.any(use):
        raise InputError(f"{src}: no measured voxel to grid")
    qs = q[:, use]
    vals = prepared.intensity[use].astype(np.float64)
    if shape is None:
        half = np.maximum(np.ceil((qs.max(axis=1) - qc) / dq), np.ceil((qc - qs.min(axis=1)) / dq)).astype(int)
        shape = np.array([fast_size(2 * h + 1) for h in half])
    else:
        shape = np.asarray(shape, int).reshape(-1)
        if shape.shape != (3,) or np.any(shape < 2):
            raise InputError(f"{src}: shape: expected three sizes ≥ 2, got {shape!r}")
    if np.any(shape > np.asarray(max_shape)):
        raise InputError(f"{src}: the q grid would be {tuple(int(v) for v in shape)} bins, more than max_shape "
                         f"{tuple(max_shape)}; give a larger q_step or a smaller crop")
    lo = qc - (shape // 2) * dq
    hi = lo + (shape - 1) * dq
    axes = tuple(lo[k] + dq[k] * np.arange(shape[k]) for k in range(3))
    if width is None:
        wdt = np.abs(M).sum(axis=1)
    else:
        wdt = np.broadcast_to(np.asarray(width, float), (3,)).copy()

    def grid(use_fuzzy):
        out = []
        for w_vals in (vals, np.ones_like(vals)):
            g = (xu.FuzzyGridder3D if use_fuzzy else xu.Gridder3D)(*[int(n) for n in shape])
            g.KeepData(False)
            g.Normalize(False)
            g.dataRange(lo[0], hi[0], lo[1], hi[1], lo[2], hi[2], fixed=True)
            if use_fuzzy:
                g(qs[0], qs[1], qs[2], w_vals, width=tuple(float(v) for v in wdt))
            else:
                g(qs[0], qs[1], qs[2], w_vals)
            out.append(np.asarray(g.data, float).copy())
        s, n = out
        empty = n <= 1e-9
        with np.errstate(invalid="ignore", divide="ignore"):
            inten = np.where(empty, 0.0, s / np.where(empty, 1.0, n))
        return inten, empty

    # bins whose centre lies inside the measured region (nearest prepared voxel
    # measured, by the inverse linear map), one plane of the grid at a time
    Minv = np.linalg.inv(M)
    Np = np.asarray(prepared.shape)
    inside = np.zeros(tuple(int(n) for n in shape), bool)
    d1, d2 = np.meshgrid(axes[1] - qc[1], axes[2] - qc[2], indexing="ij")
    for i0, x in enumerate(axes[0] - qc[0]):
        nn = [np.rint(Minv[k, 0] * x + Minv[k, 1] * d1 + Minv[k, 2] * d2).astype(int) + Np[k] // 2
              for k in range(3)]
        ok = np.all([(v >= 0) & (v < n) for v, n in zip(nn, Np)], axis=0)
        idx = tuple(np.clip(v, 0, n - 1) for v, n in zip(nn, Np))
        inside[i0] = ok & ~prepared.mask[idx]

    used_fuzzy = bool(fuzzy) if fuzzy != "auto" else False
    inten, empty = grid(used_fuzzy)
    holes = int(np.count_nonzero(empty & inside))
    if fuzzy == "auto" and holes > 0.005 * max(int(inside.sum()), 1):
        used_fuzzy = True
        inten, empty = grid(True)
        holes = int(np.count_nonzero(empty & inside))
    return GriddedIntensity(
        intensity=inten.astype(np.float32), mask=empty, axes=axes, frame=frame, q_center=np.asarray(qc, float),
        q_step=dq, rotation=np.asarray(R, float), hkl=prepared.hkl, source=prepared.source, fuzzy=used_fuzzy,
        width=wdt if used_fuzzy else None, holes=holes, footprint=inside,
        meta={"q_source": q_source, "bins_inside": int(inside.sum())})


def peak_center_of_mass(gridded, background=0.0, threshold=0.0):
    """Centre of mass of the gridded peak, Å⁻¹, in the grid's frame.

    Parameters
    ----------
    gridded : GriddedIntensity
    background : counts per bin removed first (clipped at 0)
    threshold : fraction of the maximum below which bins are left out

    Returns
    -------
    (3,) float64
    """
    i = np.maximum(np.asarray(gridded.intensity, np.float64) - float(background), 0)
    i[gridded.mask] = 0
    if threshold > 0:
        i[i < threshold * i.max()] = 0
    tot = i.sum()
    if tot <= 0:
        raise InputError("gridded intensity: no counts above the background")
    out = []
    for k in range(3):
        marg = i.sum(axis=tuple(a for a in range(3) if a != k))
        out.append(float((marg * gridded.axes[k]).sum() / tot))
    return np.asarray(out)
