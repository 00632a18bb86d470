"""Reconstructions onto an orthonormal sample-frame grid.

Two routes, both returning a :class:`~braggstrain.strain.objects.SampleObject`
(axes 0, 1, 2 along sample x, y, z; voxel size in Å; origin = sample-frame
position of index n//2; G in the sample frame; support):

``"detector"`` — :func:`detector_to_sample`
    For a reconstruction phased in the detector frame (the prepared array).
    Its voxels sit on the real-space grid conjugate to the detector's linear
    q map M: the voxel at index offset m from n//2 lies at r = T·m with
    T = 2π M⁻ᵀ diag(1/N₀, 1/N₁, 1/N₂) (docs/methods.md), in the lab frame at the
    peak; Rᵀ (R = R_s of the sample circles at the centre frame, lab ←
    sample) takes it to the sample frame. The object is resampled onto an
    orthonormal grid with ``scipy.ndimage.affine_transform`` (one affine map
    covers the whole transform), real and imaginary parts separately.

``"orthogonal"`` — :func:`orthogonal_to_sample`
    For a reconstruction phased on the orthogonal q grid of
    :func:`braggstrain.prepare.regrid.regrid`: voxel 2π/(N Δq) per axis along the
    grid's axes (discrete Fourier transform sampling), then the rotation
    into the sample frame when the grid is in the lab frame (none when it is
    already in the sample frame).

Phase reference: with the far field the forward FFT (docs/design.md), a
reconstruction of data whose array centre sits at Q_c is
ρ_rec(r) = ρ(r)·exp(−i (Q_c − G)·r), ρ = s·exp(−i G·u). Both routes multiply
the resampled object by exp(+i (Q_ref − G)·r) evaluated analytically on the
output grid (never interpolating a phase ramp), where Q_ref = Q_c + (grid
step)·ramp accounts for a ramp the phasing removed (its ``ramp``, in voxels of
the reciprocal grid) and G is the reference reflection (the crystal's, when
given; else Q_ref itself, i.e. the measured peak is the reference).

The default route is ``"detector"`` (:data:`DEFAULT_ROUTE`): on the
simulator's data it is the more accurate of the two (docs/frames.md gives
the measured numbers).
"""

from __future__ import annotations

import numpy as np

from braggstrain.errors import InputError
from braggstrain.strain.grid import Grid
from braggstrain.strain.objects import SampleObject
from braggstrain.prepare.scan import PreparedScan, fast_size

__all__ = ["DEFAULT_ROUTE", "ROUTES", "detector_to_sample", "orthogonal_to_sample", "to_sample_frame",
           "detector_sample_basis", "orthogonal_sample_basis", "reciprocal_sample_basis"]

ROUTES = ("detector", "orthogonal")
DEFAULT_ROUTE = "detector"


def detector_sample_basis(prepared):
    """Sample-frame position (Å) per index step of a detector-frame
    reconstruction: Rᵀ·T with T = 2π M⁻ᵀ diag(1/N); columns along the array
    axes (frame, row, column)."""
    return prepared.rotation.T @ prepared.real_space_basis()


def orthogonal_sample_basis(gridded):
    """Sample-frame position (Å) per index step of a reconstruction on an
    orthogonal q grid: diag(2π/(N Δq)), rotated by Rᵀ for a lab-frame grid."""
    T = np.diag(gridded.voxel_size)
    return T if gridded.frame == "sample" else gridded.rotation.T @ T


def reciprocal_sample_basis(data):
    """Q change per index step (Å⁻¹, 2π included; columns along the array
    axes) in the sample frame, of the array phase retrieval ran on (a
    :class:`PreparedScan` or a :class:`GriddedIntensity`).

    The inverse relation of the real-space basis: T = 2π B⁻ᵀ diag(1/N)
    (docs/methods.md) gives B = 2π T⁻ᵀ diag(1/N).
    """
    from braggstrain.prepare.regrid import GriddedIntensity

    if isinstance(data, PreparedScan):
        T = detector_sample_basis(data)
    elif isinstance(data, GriddedIntensity):
        T = orthogonal_sample_basis(data)
    else:
        raise InputError(f"data: expected a PreparedScan or a GriddedIntensity, got {type(data).__name__}")
    n = np.asarray(data.intensity.shape, float)
    return 2 * np.pi * np.linalg.inv(T).T / n[None, :]


def _check_recon(recon, shape, what):
    recon = np.asarray(recon)
    if recon.ndim != 3 or recon.shape != tuple(shape):
        raise InputError(f"recon: expected a 3-D complex array of the {what}'s shape {tuple(shape)}, "
                         f"got {recon.shape}")
    if not np.all(np.isfinite(recon)):
        raise InputError("recon: expected finite values, found NaN or infinity")
    return recon


def _support(recon, support, threshold):
    if support is None:
        a = np.abs(recon)
        if not a.max() > 0:
            raise InputError("recon: all zero, no crystal to place")
        return a >= float(threshold) * a.max()
    s = np.asarray(support, bool)
    if s.shape != recon.shape:
        raise InputError(f"support: expected shape {recon.shape}, got {s.shape}")
    if not s.any():
        raise InputError("support: empty")
    return s


def _voxel(voxel_size, basis):
    if voxel_size is None:
        v = abs(float(np.linalg.det(basis))) ** (1.0 / 3.0)
        return np.full(3, v)
    v = np.broadcast_to(np.asarray(voxel_size, float), (3,)).copy()
    if np.any(~np.isfinite(v)) or np.any(v <= 0):
        raise InputError(f"voxel_size: expected positive lengths in Å, got {voxel_size!r}")
    return v


def _output_grid(support, basis, voxel, shape, origin, margin):
    """The output :class:`Grid`: around the support (its voxels'
    parallelepipeds) with ``margin`` voxels on every side; the origin on a
    multiple of the voxel so grids of one voxel size share one lattice."""
    N = np.asarray(support.shape)
    idx = np.argwhere(support) - N // 2
    pos = idx @ basis.T
    half_cell = 0.5 * np.abs(basis).sum(axis=1)
    lo = pos.min(axis=0) - half_cell
    hi = pos.max(axis=0) + half_cell
    if origin is None:
        origin = np.round(0.5 * (lo + hi) / voxel) * voxel
    else:
        origin = np.asarray(origin, float).reshape(3)
        if not np.all(np.isfinite(origin)):
            raise InputError(f"origin: expected three finite positions in Å, got {origin!r}")
    if shape is None:
        half = np.ceil(np.maximum(hi - origin, origin - lo) / voxel).astype(int) + int(margin)
        shape = np.array([fast_size(2 * h + 1) for h in half])
    else:
        shape = np.asarray(shape, int).reshape(-1)
        if shape.shape != (3,) or np.any(shape < 1):
            raise InputError(f"shape: expected three positive sizes, got {shape!r}")
    return Grid(shape, voxel, origin)


def _resample(recon, support, basis, grid, order):
    """Sample recon (index grid with positions basis·(j − N//2)) on the
    orthonormal ``grid`` (position of index o: grid.position(o))."""
    from scipy import ndimage

    N = np.asarray(recon.shape)
    Binv = np.linalg.inv(basis)
    # o -> grid.position(o) = corner + diag(voxel)·o -> j = Binv·position + N//2
    mat = Binv @ np.diag(grid.voxel_size)
    off = Binv @ grid.corner + N // 2
    kw = dict(matrix=mat, offset=off, output_shape=grid.shape, order=int(order), mode="constant",
              cval=0.0, prefilter=int(order) > 1)
    re = ndimage.affine_transform(np.ascontiguousarray(recon.real, dtype=np.float32), **kw)
    im = ndimage.affine_transform(np.ascontiguousarray(recon.imag, dtype=np.float32), **kw)
    kw.update(order=1, prefilter=False)
    sup = ndimage.affine_transform(support.astype(np.float32), **kw) >= 0.5
    return (re + 1j * im).astype(np.complex64), sup


def _rephase(obj, grid, dq_sample):
    """obj · exp(i dq·p) at the positions p of ``grid``."""
    if not np.any(dq_sample):
        return obj
    ph = np.zeros(obj.shape, np.float64)
    for k, n in enumerate(obj.shape):
        sh = [1, 1, 1]
        sh[k] = n
        ph = ph + (dq_sample[k] * grid.axis(k)).reshape(sh)
    return (obj * np.exp(1j * ph)).astype(np.complex64)


def _finish(recon, support, basis, q_ref_s, g_vector, voxel_size, shape, origin, order, margin, resample,
            hkl, meta):
    if g_vector is None:
        g = np.asarray(q_ref_s, float)
    else:
        g = np.asarray(g_vector, float).reshape(3)
        if not np.all(np.isfinite(g)) or not np.any(g):
            raise InputError(f"g_vector: expected a non-zero G in the sample frame (Å⁻¹), got {g_vector!r}")
    if resample:
        grid = _output_grid(support, basis, _voxel(voxel_size, basis), shape, origin, margin)
        obj, sup = _resample(recon, support, basis, grid, order)
    else:
        grid = Grid(recon.shape, np.diag(basis).copy())
        obj, sup = recon.astype(np.complex64), support.copy()
    obj = _rephase(obj, grid, np.asarray(q_ref_s) - g)
    meta = dict(meta)
    meta.update(q_reference_sample=[float(v) for v in q_ref_s], resampled=bool(resample), order=int(order))
    return SampleObject(obj=obj, voxel_size=grid.voxel_size, g_vector=g, support=sup, origin=grid.origin,
                        hkl=hkl, meta=meta)


def detector_to_sample(recon, prepared, *, support=None, support_threshold=0.25, g_vector=None, ramp=None,
                       voxel_size=None, shape=None, origin=None, order=1, margin=4):
    """A detector-frame reconstruction on an orthonormal sample-frame grid.

    Parameters
    ----------
    recon : complex (N0, N1, N2)
        Reconstruction of ``prepared`` (same shape), crystal centred at n//2,
        phasing convention intensity = |fftshift(fftn(ifftshift(recon)))|².
    prepared : PreparedScan
        The data it was phased from (linear map, Q of the centre, rotation).
    support : bool array, optional
        Its support; default |recon| ≥ ``support_threshold``·max.
    g_vector : 3 floats, Å⁻¹, optional
        Reference G in the sample frame (e.g. the crystal's U·B·h); default:
        the measured Q of the reconstruction's centre.
    ramp : 3 floats, optional
        Peak offset (voxels of the prepared array) whose phase ramp the
        phasing removed (its ``Reconstruction.ramp``); default none.
    voxel_size : float or 3 floats, Å, optional
        Output voxel; default isotropic, the cube root of the detector-frame
        voxel's volume |det T|.
    shape : 3 ints, optional
        Output shape; default: the support's box plus ``margin`` voxels.
    origin : 3 floats, Å, optional
        Sample-frame position of the output's index n//2; default the
        support's box centre, rounded to a multiple of the voxel.
    order : int
        Spline order of the resampling (1 linear, default; 3 cubic).

    Returns
    -------
    SampleObject
    """
    if not isinstance(prepared, PreparedScan):
        raise InputError(f"prepared: expected a PreparedScan, got {type(prepared).__name__}")
    recon = _check_recon(recon, prepared.shape, "prepared scan")
    sup = _support(recon, support, support_threshold)
    basis = detector_sample_basis(prepared)
    ramp = np.zeros(3) if ramp is None else np.asarray(ramp, float).reshape(3)
    q_ref_s = prepared.rotation.T @ (prepared.q_center + prepared.linear_map @ ramp)
    return _finish(recon, sup, basis, q_ref_s, g_vector, voxel_size, shape, origin, order, margin, True,
                   prepared.hkl, {"route": "detector", "source": prepared.source})


def orthogonal_to_sample(recon, gridded, *, support=None, support_threshold=0.25, g_vector=None, ramp=None,
                         voxel_size=None, shape=None, origin=None, order=1, margin=4):
    """A reconstruction on an orthogonal q grid onto the sample frame.

    Parameters
    ----------
    recon : complex (N0, N1, N2)
        Reconstruction of ``gridded.intensity`` (same shape, crystal centred,
        same phasing convention as :func:`detector_to_sample`).
    gridded : braggstrain.prepare.regrid.GriddedIntensity
    support, support_threshold, g_vector, order, margin
        As in :func:`detector_to_sample`.
    ramp : 3 floats, optional
        Peak offset in bins of the grid removed by the phasing.
    voxel_size, shape, origin : optional
        Output grid. For a sample-frame grid with none of them given the
        array is kept as it is (voxel 2π/(N Δq) per axis, origin 0 at n//2,
        no interpolation at all); otherwise it is resampled (default voxel
        isotropic, the cube root of the native voxel's volume).

    Returns
    -------
    SampleObject
    """
    from braggstrain.prepare.regrid import GriddedIntensity

    if not isinstance(gridded, GriddedIntensity):
        raise InputError(f"gridded: expected a GriddedIntensity, got {type(gridded).__name__}")
    recon = _check_recon(recon, gridded.shape, "q grid")
    sup = _support(recon, support, support_threshold)
    basis = orthogonal_sample_basis(gridded)
    ramp = np.zeros(3) if ramp is None else np.asarray(ramp, float).reshape(3)
    q_ref = gridded.q_center + gridded.q_step * ramp
    q_ref_s = q_ref if gridded.frame == "sample" else gridded.rotation.T @ q_ref
    resample = not (gridded.frame == "sample" and voxel_size is None and shape is None and origin is None)
    return _finish(recon, sup, basis, q_ref_s, g_vector, voxel_size, shape, origin, order, margin, resample,
                   gridded.hkl, {"route": "orthogonal", "grid_frame": gridded.frame, "source": gridded.source})


def to_sample_frame(recon, data, **options):
    """Dispatch on the data's kind: a :class:`~braggstrain.prepare.PreparedScan`
    takes the ``"detector"`` route, a
    :class:`~braggstrain.prepare.regrid.GriddedIntensity` the ``"orthogonal"`` one;
    ``options`` are those of :func:`detector_to_sample` /
    :func:`orthogonal_to_sample`."""
    from braggstrain.prepare.regrid import GriddedIntensity

    if isinstance(data, PreparedScan):
        return detector_to_sample(recon, data, **options)
    if isinstance(data, GriddedIntensity):
        return orthogonal_to_sample(recon, data, **options)
    raise InputError(f"data: expected a PreparedScan or a GriddedIntensity, got {type(data).__name__}")
