"""Preparation: from a raw rocking scan to phasing-ready data in the detector frame.

:func:`prepare_scan` is a short composition of named steps, each a
function of its own with its own test:

1. :func:`~braggstrain.prepare.clean.merge_masks` (gaps, the scan's mask,
   the user's mask), :func:`~braggstrain.prepare.clean.saturated_voxels`,
   :func:`~braggstrain.prepare.clean.correct_dark_flat` (and the monitor),
   :func:`~braggstrain.prepare.clean.find_hot_pixels`,
   :func:`~braggstrain.prepare.clean.mask_empty_frames`;
2. :func:`~braggstrain.prepare.peak.locate_peak` and
   :func:`~braggstrain.prepare.peak.choose_crop` (a block of FFT-friendly
   size centred on the peak);
3. :func:`~braggstrain.prepare.binning.bin_frames`,
   :func:`~braggstrain.prepare.binning.subtract_background`, the
   oversampling estimate, :func:`~braggstrain.prepare.binning.pad_to`;
4. the local linear map from (frame, row, column) index steps to q steps,
   so later stages know where every voxel sits in reciprocal space.

The result is a :class:`PreparedScan`:

* ``intensity`` (float32, frames × rows × columns) with the peak at index
  n//2 on every axis, laid out for the phasing convention
  ``intensity = |fftshift(fftn(ifftshift(obj)))|²``;
* ``mask`` (bool, True = not measured);
* ``linear_map`` M (3×3, Å⁻¹ per index step, columns along frame, row and
  column, lab frame with the sample at the centre frame's angles) and
  ``q_center``, the Q of the array centre in that frame, so that the voxel at
  index offset n from the centre has Q ≈ q_center + M·n.

The "lab frame at the peak" is the lab frame with the sample circles at the
angles of the centre frame; ``rotation`` (R_s, lab ← sample) takes
sample-frame vectors into it, so Q_sample = rotationᵀ · Q.

Oversampling (docs/methods.md, common practice): along array axis k,
σ_k = N_k / L_k with L_k the crystal's extent in voxels; it is estimated here
from the autocorrelation (the inverse FFT of the intensity), whose extent is
twice the crystal's. Note that σ depends on the q step only: cropping fewer
voxels coarsens the real-space voxel by as much as it shrinks N, so only
binning lowers σ (by the binning factor). Phase retrieval needs σ ≥ 2.

Safety: the preparation only reads data already measured. When planning the
scans themselves (exposure, attenuators, dose on the crystal and the
detector's count-rate limits), follow the facility's rules and the beamline
staff's advice; detector saturation is masked here but is better avoided at
the source.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from braggstrain.errors import InputError, ScanFileError
from braggstrain.prepare.binning import bin_frames, pad_to, subtract_background
from braggstrain.prepare.clean import (correct_dark_flat, find_hot_pixels, mask_empty_frames, merge_masks,
                                       saturated_voxels)
from braggstrain.prepare.peak import _com, choose_crop, estimate_background, fast_size, locate_peak
from braggstrain.prepare.oversampling import estimate_oversampling

__all__ = [
    "PreparedScan",
    "prepare_scan",
    "summarize_prepared",
    "exact_q",
    "linear_q",
    "merge_masks",
    "saturated_voxels",
    "correct_dark_flat",
    "find_hot_pixels",
    "mask_empty_frames",
    "locate_peak",
    "estimate_background",
    "choose_crop",
    "fast_size",
    "bin_frames",
    "subtract_background",
    "pad_to",
]

# --------------------------------------------------------------------------
# small helpers
# --------------------------------------------------------------------------


def _src(scan):
    return getattr(scan, "path", "") or "<in-memory scan>"


def _angles_at(angles, nf, frame_index):
    out = {}
    for k, v in angles.items():
        a = np.asarray(v, float)
        out[k] = float(a) if a.ndim == 0 else float(a[frame_index])
    return out


def _validate_scan(scan):
    """Shape and angle checks of an in-memory scan (the file reader makes the
    same checks; a scan built in code gets them here)."""
    src = _src(scan)
    frames = np.asarray(scan.frames)
    if frames.ndim != 3:
        raise ScanFileError(src, "frames", f"expected 3 dimensions (frames, rows, columns), got shape {frames.shape}")
    if not np.issubdtype(frames.dtype, np.number):
        raise ScanFileError(src, "frames", f"expected numeric counts, got dtype {frames.dtype}")
    if np.issubdtype(frames.dtype, np.floating) and not np.all(np.isfinite(frames)):
        raise ScanFileError(src, "frames", "expected finite counts, found NaN or infinity")
    nf = frames.shape[0]
    inst = scan.instrument
    if tuple(inst.detector.shape) != frames.shape[1:]:
        raise ScanFileError(src, "instrument/detector@shape",
                            f"expected the frames' shape {frames.shape[1:]}, got {tuple(inst.detector.shape)}")
    names = [c.name for c in inst.circles]
    for n in names:
        if n not in scan.angles:
            raise ScanFileError(src, f"instrument/circles/{n}", "missing angle(s) of this circle")
    for n, v in scan.angles.items():
        if n not in names:
            raise ScanFileError(src, f"instrument/circles/{n}", f"not a circle of the instrument {names}")
        a = np.asarray(v, float)
        if a.ndim > 1 or (a.ndim == 1 and len(a) != nf):
            raise ScanFileError(src, f"instrument/circles/{n}",
                                f"expected a scalar or {nf} angles (one per frame), got shape {a.shape}")
        if not np.all(np.isfinite(a)):
            raise ScanFileError(src, f"instrument/circles/{n}", "expected finite angles (degrees)")
    rc = scan.rocking_circle
    if rc not in names:
        raise ScanFileError(src, "instrument@rocking_circle", f"'{rc}' is not one of the circles {names}")
    if rc not in [c.name for c in inst.sample_circles]:
        raise ScanFileError(src, "instrument@rocking_circle", f"'{rc}' is a detector circle; expected a sample circle")
    ra = np.asarray(scan.angles[rc], float)
    if ra.ndim == 0 or nf < 2 or np.ptp(ra) == 0:
        raise ScanFileError(src, f"instrument/circles/{rc}",
                            f"the rocked circle must change from frame to frame ({nf} angles expected)")
    from braggstrain.prepare.measured import fit_rocking_step

    step, _ = fit_rocking_step(ra, source=src, field=f"instrument/circles/{rc}")
    return frames, step


# --------------------------------------------------------------------------
# the prepared scan
# --------------------------------------------------------------------------

@dataclass
class PreparedScan:
    """A rocking scan ready for phase retrieval, in the detector frame.

    Attributes
    ----------
    intensity : float32 (N0, N1, N2)
        Cleaned counts per voxel (frames × rows × columns, binned), background
        removed, peak at index n//2 on every axis.
    mask : bool, same shape
        True where a voxel was not measured (gaps, hot/dead pixels, saturated,
        empty frames, user mask, padding).
    linear_map : (3, 3) float64
        M, Å⁻¹ per index step of the prepared array (binning included);
        columns along frame, row, column; lab frame at the centre frame.
    q_center : (3,) float64
        Q (Å⁻¹) of the array centre, same frame: Q(n) ≈ q_center + M·(n − N//2).
    rotation : (3, 3) float64
        R_s at the centre frame (lab ← sample): Q_sample = rotationᵀ·Q.
    center_index : (3,) float64
        Raw (frame, row, column) position of the array centre (fractional
        with an even binning).
    crop : (3, 2) int
        Raw [start, stop) of the crop along frame, row, column (before
        padding).
    binning : (3,) int
    padding : (3, 2) int
        Voxels added before/after along each axis (masked).
    peak_max, peak_com : (3,) float64
        Raw (frame, row, column) of the brightest voxel (saturated voxels
        included, other masked ones not) and of the background-subtracted
        centre of mass of the measured voxels in the crop.
    max_counts : float
        Counts of the brightest measured voxel after cleaning.
    background : float
        Background removed, counts per raw voxel (pixel and frame).
    hot_pixels, dead_pixels : (K, 2) int
        (row, column) found and masked.
    zero_frames : list of int
        Raw frames with no counts at all, masked.
    mask_counts : dict
        Pixels (or voxels, for the 3-D causes) masked per cause.
    oversampling : (3,) float64
        Estimated σ per axis (:func:`braggstrain.prepare.oversampling.estimate_oversampling`).
    angles : dict
        Circle → degrees of the crop's raw frames (rocked circle: array).
    centre_angles : dict
        Circle → degrees of the centre frame.
    rocking_circle : str
    rocking_step : float
        Degrees per raw frame.
    instrument : braggstrain.geometry.instrument.Diffractometer
    hkl : tuple or None
    source : str
        The scan's file.
    options : dict
        The options used (plain values).
    crop_choice : dict
        How the crop was chosen (:func:`choose_crop`'s report: background,
        signal level and extent, sizes wanted and chosen, what limited each
        axis).
    """

    intensity: np.ndarray
    mask: np.ndarray
    linear_map: np.ndarray
    q_center: np.ndarray
    rotation: np.ndarray
    center_index: np.ndarray
    crop: np.ndarray
    binning: np.ndarray
    padding: np.ndarray
    peak_max: np.ndarray
    peak_com: np.ndarray
    max_counts: float
    background: float
    hot_pixels: np.ndarray
    dead_pixels: np.ndarray
    zero_frames: list
    mask_counts: dict
    oversampling: np.ndarray
    angles: dict
    centre_angles: dict
    rocking_circle: str
    rocking_step: float
    instrument: object
    hkl: tuple | None = None
    source: str = ""
    options: dict = field(default_factory=dict)
    crop_choice: dict = field(default_factory=dict)

    @property
    def shape(self):
        return self.intensity.shape

    @property
    def q_center_sample(self):
        """Q of the array centre in the sample frame, Å⁻¹."""
        return self.rotation.T @ self.q_center

    def real_space_basis(self):
        """T = 2π M⁻ᵀ diag(1/N): lab-frame position (Å) per index step of the
        conjugate real-space grid (docs/methods.md), columns along the array axes."""
        N = np.asarray(self.shape, float)
        return 2 * np.pi * np.linalg.inv(self.linear_map).T / N[None, :]


def _check_oversampling(sigma, binning, min_oversampling, src):
    """Binning that leaves σ below ``min_oversampling`` is an error; without binning a warning."""
    axis_names = ("frames", "rows", "columns")
    if np.any(sigma < float(min_oversampling)):
        bad_axes = [axis_names[k] for k in range(3) if sigma[k] < min_oversampling]
        msg = (f"estimated oversampling {np.round(sigma, 2).tolist()} (frame, row, column) is below "
               f"{min_oversampling} along {bad_axes}")
        if np.any(binning[[k for k in range(3) if sigma[k] < min_oversampling]] > 1):
            raise ScanFileError(src, "bin", f"{msg} with binning {binning.tolist()}; expected a binning that keeps "
                                            f"σ ≥ {min_oversampling} (use a smaller bin on those axes)")
        warnings.warn(f"{src}: {msg}: phase retrieval may fail (the data look undersampled)", stacklevel=3)


def prepare_scan(scan, *, dark=None, flat=None, hot_pixel_threshold=10.0, dead_min_counts=20.0,
                 saturation=None, user_mask=None, zero_frames="mask", center="max", crop="auto",
                 crop_threshold=1e-4, crop_sigma=5.0, min_crop=16, max_crop=(128, 256, 256), bin=(1, 1, 1), pad=None,
                 background="corners", min_oversampling=2.0, oversampling_threshold=0.005):
    """Clean a rocking scan and cut the phasing-ready block around its peak.

    Options (keyword only; each maps one to one onto a key of the pipeline
    file's ``[prepare]`` table):

    ======================  =====================  ==========================================
    option                  default                meaning
    ======================  =====================  ==========================================
    dark                    None                   dark counts subtracted first: a number, an
                                                   (R, C) or (F, R, C) array, or a file
                                                   (.npy, .npz, .tif, HDF5 ``file.h5#/path``)
    flat                    None                   flat field (R, C), relative gain; counts
                                                   are divided by it; pixels with flat ≤ 0
                                                   or non-finite are masked
    hot_pixel_threshold     10.0                   hot if the frame-mean exceeds this times
                                                   the 8-neighbour median (≥ 1 count/frame);
                                                   None or 0 switches the test off
    dead_min_counts         20.0                   dead if zero counts in the scan while the
                                                   neighbours' median sums to ≥ this
    saturation              None                   raw counts ≥ this mask the voxel (the
                                                   detector's count-rate or pile-up limit)
    user_mask               None                   (R, C) or (F, R, C), True/nonzero = not
                                                   measured; an array or a file as for dark
    zero_frames             "mask"                 a frame with no counts at all: "mask" it
                                                   (and report it) or raise an "error"
    center                  "max"                  crop centre: "max" (brightest voxel,
                                                   saturated ones included),
                                                   "com" (centre of mass around it) or a
                                                   raw (frame, row, column)
    crop                    "auto"                 raw (frames, rows, columns) to keep, each
                                                   a multiple of ``bin`` whose quotient is a
                                                   product of 2, 3, 5; "auto" (signal
                                                   extent above ``crop_threshold``, capped
                                                   by ``max_crop`` and the data) or "full"
                                                   (largest centred block that fits)
    crop_threshold          1e-4                   "auto": signal is where the 3×3×3 mean
                                                   exceeds the background by this × the
                                                   background-subtracted peak ...
    crop_sigma              5.0                    ... and by this many Poisson standard
                                                   deviations of that mean; only signal
                                                   connected to the peak counts
                                                   (:func:`choose_crop`)
    min_crop                16                     smallest allowed size per axis, raw
    max_crop                (128, 256, 256)        "auto": largest size per axis, raw
    bin                     (1, 1, 1)              voxels summed per axis (frame, row, col)
    pad                     None                   final shape ≥ the binned crop; added
                                                   voxels are zero and masked
    background              "corners"              flat background per raw voxel removed:
                                                   "corners" (mean of the crop's 8 corner
                                                   blocks), a number, or None
    min_oversampling        2.0                    binning that leaves σ below this on an
                                                   axis is an error (without binning, a
                                                   warning)
    oversampling_threshold  0.005                  autocorrelation threshold of the σ
                                                   estimate
    ======================  =====================  ==========================================

    Parameters
    ----------
    scan : braggstrain.io.scans.Scan, or the path of a scan file. With a
        ``monitor`` (one value per frame), the counts are divided by
        monitor / mean(monitor) after the dark is removed (saturation is
        tested on the raw counts) and frames with a zero or negative monitor
        are masked (:func:`braggstrain.prepare.measured.monitor_scale`).
        The rocked circle's read-back angles may jitter by up to 10 % of
        the step (:func:`braggstrain.prepare.measured.fit_rocking_step`).

    Returns
    -------
    PreparedScan

    Raises
    ------
    ScanFileError
        naming the scan file and the field: frames and angle arrays of
        different lengths, a rocked circle that does not change or steps
        unevenly, a mask of the wrong shape, a crop that does not fit around
        the peak (e.g. a peak at the detector's edge), an empty frame with
        ``zero_frames="error"``, binning that breaks the oversampling.
    InputError
        a malformed option (named).
    """
    if isinstance(scan, (str, Path)):
        from braggstrain.io.scans import read_scan

        scan = read_scan(scan)
    src = _src(scan)
    raw, step = _validate_scan(scan)
    F, R, C = raw.shape
    inst = scan.instrument
    binning = np.broadcast_to(np.asarray(bin, dtype=int), (3,)).copy()
    if np.any(binning < 1):
        raise InputError(f"{src}: option 'bin': expected three positive integers, got {bin!r}")
    if zero_frames not in ("mask", "error"):
        raise InputError(f"{src}: option 'zero_frames': expected 'mask' or 'error', got {zero_frames!r}")

    mask, counts = merge_masks(raw.shape, inst.detector, scan.mask, user_mask, src)
    satmask = saturated_voxels(raw, saturation, mask, src)
    if satmask is not None:
        counts["saturated"] = int(satmask.sum())
    monitor = getattr(scan, "monitor", None)
    data, fix = correct_dark_flat(raw, mask, dark, flat, inst.detector.gap_mask(), src, monitor=monitor)
    counts["flat_field"] = fix["flat_field"]
    monitor_bad = fix["monitor_masked"]
    if monitor is not None:
        counts["monitor"] = len(monitor_bad)

    # hot and dead pixels
    hot = dead = np.empty((0, 2), int)
    if hot_pixel_threshold:
        hot, dead = find_hot_pixels(data, mask, float(hot_pixel_threshold), float(dead_min_counts))
        for arr, key in ((hot, "hot"), (dead, "dead")):
            if len(arr):
                mask[:, arr[:, 0], arr[:, 1]] = True
            counts[key] = int(len(arr))

    # the peak is searched among the saturated voxels too (they are the brightest)
    peak_data = np.where(mask, 0, data)
    if satmask is not None:
        mask |= satmask
    empty = mask_empty_frames(data, mask, zero_frames, src, skip=monitor_bad)
    if empty:
        counts["zero_frames"] = len(empty)
        peak_data[empty] = 0
    data[mask] = 0
    if not np.any(data > 0):
        raise ScanFileError(src, "frames", "no counts left after cleaning and masking")

    pk, ctr, bg_raw = locate_peak(peak_data, data, mask, center, src)
    max_counts = float(data.max())
    del peak_data
    start, stop, crop_choice = choose_crop(data, mask, ctr, crop=crop, binning=binning,
                                           threshold=float(crop_threshold), n_sigma=float(crop_sigma),
                                           min_crop=min_crop, max_crop=max_crop, source=src)
    sizes = stop - start
    sl = tuple(slice(int(a), int(b)) for a, b in zip(start, stop))
    block = data[sl].astype(np.float64)
    bmask = mask[sl]
    # centre of mass of the crop (raw coordinates), background removed
    com = _com(np.maximum(block - bg_raw, 0) * ~bmask) + start

    block_b, bmask_b = bin_frames(block, bmask, binning)
    nper = int(np.prod(binning))
    inten, bg = subtract_background(block_b, bmask_b, background, nper, src)

    # oversampling (before padding: padding in q does not change it)
    try:
        sigma = estimate_oversampling(inten, float(oversampling_threshold), bmask_b)
    except InputError:
        sigma = np.full(3, np.nan)
    _check_oversampling(sigma, binning, min_oversampling, src)
    inten, bmask_b, padding = pad_to(inten, bmask_b, pad, src)

    # geometry at the centre frame
    fc = int(ctr[0])
    ang_c = _angles_at(scan.angles, F, fc)
    M_raw, q_pix, R_c = inst.linear_map(ang_c, scan.rocking_circle, step, (int(ctr[1]), int(ctr[2])))
    delta = (binning - 1) / 2.0 - (binning - 1) // 2
    q_center = q_pix + M_raw @ delta
    M = M_raw * binning[None, :]
    crop_angles = {}
    for k, v in scan.angles.items():
        a = np.asarray(v, float)
        crop_angles[k] = float(a) if a.ndim == 0 else a[start[0]:stop[0]].copy()

    opts = dict(hot_pixel_threshold=hot_pixel_threshold, dead_min_counts=dead_min_counts, saturation=saturation,
                zero_frames=zero_frames, center=center if isinstance(center, str) else [int(v) for v in ctr],
                crop=crop if isinstance(crop, str) else [int(v) for v in sizes], crop_threshold=crop_threshold,
                crop_sigma=crop_sigma, min_crop=min_crop, bin=[int(v) for v in binning],
                pad=None if pad is None else [int(v) for v in pad],
                background=background if (background is None or isinstance(background, str)) else float(background),
                min_oversampling=min_oversampling, oversampling_threshold=oversampling_threshold,
                dark=None if dark is None else (str(dark) if isinstance(dark, (str, Path)) else "array"),
                flat=None if flat is None else (str(flat) if isinstance(flat, (str, Path)) else "array"),
                user_mask=None if user_mask is None else (str(user_mask) if isinstance(user_mask, (str, Path))
                                                           else "array"))
    if monitor is not None:
        opts["monitor_scale"] = [float(v) for v in fix["monitor_scale"]]
        opts["monitor_masked_frames"] = list(monitor_bad)
    return PreparedScan(
        intensity=inten.astype(np.float32), mask=bmask_b, linear_map=M, q_center=q_center, rotation=R_c,
        center_index=ctr.astype(float) + delta, crop=np.column_stack([start, stop]), binning=binning,
        padding=padding, peak_max=pk.astype(float), peak_com=com, max_counts=max_counts, background=float(bg),
        hot_pixels=hot, dead_pixels=dead, zero_frames=empty, mask_counts=counts, oversampling=sigma,
        angles=crop_angles, centre_angles=ang_c, rocking_circle=scan.rocking_circle, rocking_step=step,
        instrument=inst, hkl=None if scan.hkl is None else tuple(int(v) for v in scan.hkl), source=src,
        options=opts, crop_choice=crop_choice)


# --------------------------------------------------------------------------
# Q of the prepared voxels
# --------------------------------------------------------------------------

def linear_q(prepared, frame="lab"):
    """Q of every voxel of the prepared array from the linear map, Å⁻¹.

    Parameters
    ----------
    prepared : PreparedScan
    frame : "lab" (lab frame at the centre frame) or "sample"

    Returns
    -------
    (3, N0, N1, N2) float64
    """
    if frame not in ("lab", "sample"):
        raise InputError(f"frame '{frame}': expected 'lab' or 'sample'")
    N = prepared.shape
    idx = np.meshgrid(*[np.arange(n) - n // 2 for n in N], indexing="ij", sparse=True)
    M = prepared.linear_map
    q = np.stack([prepared.q_center[i] + M[i, 0] * idx[0] + M[i, 1] * idx[1] + M[i, 2] * idx[2]
                  for i in range(3)])
    if frame == "sample":
        q = np.einsum("ji,j...->i...", prepared.rotation, q)
    return q


def exact_q(prepared, frame="lab"):
    """Q of every voxel of the prepared array from xrayutilities' per-pixel
    conversion (the mean over the raw voxels of a bin), Å⁻¹.

    Padded voxels get NaN.

    Parameters
    ----------
    prepared : PreparedScan
    frame : "lab" (lab frame at the centre frame) or "sample"

    Returns
    -------
    (3, N0, N1, N2) float64
    """
    if frame not in ("lab", "sample"):
        raise InputError(f"frame '{frame}': expected 'lab' or 'sample'")
    (f0, f1), (r0, r1), (c0, c1) = [tuple(int(v) for v in row) for row in prepared.crop]
    ang = {k: (v if np.ndim(v) == 0 else np.asarray(v, float)) for k, v in prepared.angles.items()}
    nf = f1 - f0
    ang = {k: (np.full(nf, float(v)) if np.ndim(v) == 0 else v) for k, v in ang.items()}
    q = prepared.instrument.pixel_q(ang, frame="sample", roi=(r0, r1, c0, c1))  # (3, F, R, C)
    q = np.asarray(q, float).reshape((3, nf, r1 - r0, c1 - c0))
    b = prepared.binning
    nb = [int(s // k) for s, k in zip(q.shape[1:], b)]
    q = q.reshape(3, nb[0], b[0], nb[1], b[1], nb[2], b[2]).mean(axis=(2, 4, 6))
    if frame == "lab":
        q = np.einsum("ij,j...->i...", prepared.rotation, q)
    if np.any(prepared.padding):
        q = np.pad(q, [(0, 0)] + [tuple(p) for p in prepared.padding], constant_values=np.nan)
    return q


# --------------------------------------------------------------------------
# summary and files
# --------------------------------------------------------------------------

def summarize_prepared(prepared):
    """Text lines describing a prepared scan (for ``braggstrain inspect``).

    Returns
    -------
    str
    """
    p = prepared
    qs = p.q_center_sample
    qn = float(np.linalg.norm(qs))
    lines = [
        f"prepared scan of {p.source}" + (f", reflection {tuple(p.hkl)}" if p.hkl else ""),
        f"  shape (frames, rows, columns): {tuple(p.shape)}; binning {tuple(int(v) for v in p.binning)}; "
        f"padding {[tuple(int(v) for v in r) for r in p.padding]}",
        "  crop (raw, [start, stop)): " + ", ".join(f"{n} [{int(a)}, {int(b)})" for n, (a, b) in
                                                    zip(("frames", "rows", "columns"), p.crop)),
        _crop_line(p.crop_choice),
        f"  cleaned peak, raw (frame, row, column): max at {tuple(int(v) for v in p.peak_max)}, "
        f"centre of mass at ({p.peak_com[0]:.2f}, {p.peak_com[1]:.2f}, {p.peak_com[2]:.2f})",
        f"  max counts: {p.max_counts:.6g}; background removed: {p.background:.4g} counts per raw voxel",
        f"  Q at the array centre (sample frame): ({qs[0]:.5f}, {qs[1]:.5f}, {qs[2]:.5f}) Å⁻¹, "
        f"|Q| = {qn:.5f} Å⁻¹, d = {2 * np.pi / qn:.5f} Å" if qn > 0 else "  Q at the array centre: 0",
        "  masked: " + ", ".join(f"{k.replace('_', ' ')} {v}" for k, v in p.mask_counts.items())
        + f" (pixels; saturated in voxels); {int(p.mask.sum())} of {p.mask.size} prepared voxels masked",
        f"  hot pixels found: {len(p.hot_pixels)}"
        + (f" at (row, column) {[tuple(int(x) for x in r) for r in p.hot_pixels[:10]]}"
           + (" ..." if len(p.hot_pixels) > 10 else "") if len(p.hot_pixels) else "")
        + f"; dead pixels: {len(p.dead_pixels)}",
        f"  zero frames (masked): {list(p.zero_frames) if p.zero_frames else 'none'}",
        f"  estimated oversampling (frame, row, column): "
        f"({p.oversampling[0]:.2f}, {p.oversampling[1]:.2f}, {p.oversampling[2]:.2f})"
        + ("  — below 2 on some axis" if np.any(p.oversampling < 2) else ""),
        f"  q step per index (Å⁻¹): frame {np.linalg.norm(p.linear_map[:, 0]):.3e}, "
        f"row {np.linalg.norm(p.linear_map[:, 1]):.3e}, column {np.linalg.norm(p.linear_map[:, 2]):.3e}",
    ]
    return "\n".join(lines)


def _crop_line(choice):
    if not choice:
        return "  crop choice: not recorded"
    line = f"  crop choice ({choice.get('mode')}): sizes {tuple(choice.get('sizes', ()))} limited by " \
           f"{', '.join(choice.get('limited_by', ()))} (frames, rows, columns)"
    if "background" in choice:
        line += (f"; background {choice['background']:.3g} counts/voxel, signal ≥ "
                 f"{choice['signal_level']:.3g} above it over raw extent {tuple(choice['signal_extent'])}")
    return line
