"""Preparation: from a raw rocking scan to phasing-ready data in the detector frame.

:func:`prepare_scan` cleans the frames (dark, flat field, hot and dead
pixels, gaps, saturation, a user mask, empty frames), finds the Bragg peak,
crops a block of FFT-friendly size centred on it, optionally bins and pads
it, removes a flat background, and attaches the local linear map from
(frame, row, column) index steps to q steps, so later stages know where every
voxel sits in reciprocal space. The result is a :class:`PreparedScan`:

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
from braggstrain.io.arrays import read_array
from braggstrain.prepare.oversampling import estimate_oversampling

__all__ = [
    "PreparedScan",
    "prepare_scan",
    "summarize_prepared",
    "exact_q",
    "linear_q",
    "fast_size",
    "find_hot_pixels",
    "choose_crop",
    "estimate_background",
]

# --------------------------------------------------------------------------
# small helpers
# --------------------------------------------------------------------------

def _is_smooth(n):
    for p in (2, 3, 5):
        while n % p == 0 and n > 1:
            n //= p
    return n == 1


def fast_size(n, up=True, multiple=1):
    """Nearest size ≥ n (``up``) or ≤ n whose quotient by ``multiple`` is a
    product of 2, 3 and 5 (sizes the FFT handles fastest; common practice,
    no source).

    Returns the size (a multiple of ``multiple``), or 0 when going down finds
    none ≥ 1.
    """
    n = int(n)
    m = int(multiple)
    if up:
        k = max(1, -(-n // m))
        while not _is_smooth(k):
            k += 1
        return k * m
    k = n // m
    while k >= 1 and not _is_smooth(k):
        k -= 1
    return k * m if k >= 1 else 0


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


def _as_stack_mask(m, shape, field_name, src):
    """(R, C) or (F, R, C) bool mask → (F, R, C)."""
    m = np.asarray(m)
    if m.shape == shape[1:]:
        return np.broadcast_to(m.astype(bool)[None], shape)
    if m.shape == shape:
        return m.astype(bool)
    raise ScanFileError(src, field_name, f"expected a mask of shape {shape[1:]} (rows, columns) or {shape} "
                                         f"(frames, rows, columns), got {m.shape}")


def _neighbour_median(image, valid, size=3):
    """Median of the size×size neighbours of every pixel, the pixel itself and
    invalid pixels left out (NaN where no neighbour is valid)."""
    from numpy.lib.stride_tricks import sliding_window_view

    h = size // 2
    a = np.where(valid, image, np.nan).astype(np.float64)
    p = np.pad(a, h, mode="constant", constant_values=np.nan)
    out = np.empty(image.shape, np.float64)
    step = 256  # rows per block, to bound the memory on large detectors
    for r0 in range(0, image.shape[0], step):
        r1 = min(r0 + step, image.shape[0])
        w = sliding_window_view(p[r0:r1 + 2 * h], (size, size)).reshape((r1 - r0, image.shape[1], size * size))
        w = w.copy()
        w[..., (size * size) // 2] = np.nan
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)
            out[r0:r1] = np.nanmedian(w, axis=-1)
    return out


def find_hot_pixels(frames, mask=None, threshold=10.0, dead_min_counts=20.0):
    """Hot and dead pixels by a local median test on the frame-averaged image.

    A pixel is *hot* when its mean counts per frame exceed ``threshold`` times
    the median of its 8 neighbours (floored at 1 count per frame, so faint
    regions are not flagged for a few counts); *dead* when it counted nothing
    in any measured frame while its neighbours' median adds up to at least
    ``dead_min_counts`` over the scan (a zero there has Poisson probability
    below e⁻²⁰). Common practice, no source. A sharp Bragg peak sampled with
    oversampling ≥ 2 rises at most ~2.5× above its neighbours' median, far
    below the default threshold.

    Parameters
    ----------
    frames : (F, R, C) counts
    mask : (F, R, C) or (R, C) bool, True = not measured (left out)
    threshold : float, ratio to the neighbours' median
    dead_min_counts : float, counts over the scan

    Returns
    -------
    hot : (K, 2) int array of (row, column)
    dead : (L, 2) int array of (row, column)
    """
    frames = np.asarray(frames)
    F = frames.shape[0]
    if mask is None:
        m3 = np.zeros(frames.shape, bool)
    else:
        m3 = np.broadcast_to(np.asarray(mask, bool), frames.shape)
    good = ~m3
    nvalid = good.sum(axis=0)
    total = np.where(good, frames, 0).sum(axis=0, dtype=np.float64)
    valid = nvalid > 0
    mean = np.where(valid, total / np.maximum(nvalid, 1), 0.0)
    med = _neighbour_median(mean, valid)
    medf = np.nan_to_num(med, nan=0.0)
    hot = valid & (mean > float(threshold) * np.maximum(medf, 1.0))
    dead = valid & (total == 0) & (medf * F >= float(dead_min_counts))
    return np.argwhere(hot), np.argwhere(dead)


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
    instrument : braggstrain.instrument.Diffractometer
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


_MASK_CAUSES = ("gaps", "scan_mask", "user_mask", "flat_field", "hot", "dead", "saturated", "zero_frames",
                "monitor")


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

    counts = {k: 0 for k in _MASK_CAUSES}
    mask = np.zeros(raw.shape, bool)
    # detector gaps, the scan's own mask, the user's mask
    gaps = inst.detector.gap_mask()
    counts["gaps"] = int(gaps.sum())
    mask |= gaps[None]
    if scan.mask is not None:
        sm = _as_stack_mask(scan.mask, raw.shape, "mask", src)
        counts["scan_mask"] = int(sm.any(axis=0).sum()) if sm.ndim == 3 else int(sm.sum())
        mask |= sm
    um = read_array(user_mask, "user_mask", src)
    if um is not None:
        um = _as_stack_mask(um != 0, raw.shape, "user_mask", src)
        counts["user_mask"] = int(np.asarray(um).any(axis=0).sum())
        mask |= um

    data = raw.astype(np.float32)
    satmask = None
    if saturation is not None:
        sat = float(saturation)
        if not sat > 0:
            raise InputError(f"{src}: option 'saturation': expected a positive count, got {saturation!r}")
        satmask = (raw >= sat) & ~mask
        counts["saturated"] = int(satmask.sum())
    d = read_array(dark, "dark", src)
    if d is not None:
        d = np.asarray(d, np.float32)
        if d.ndim != 0 and d.shape not in (raw.shape[1:], raw.shape):
            raise ScanFileError(src, "dark", f"expected a number or shape {raw.shape[1:]} or {raw.shape}, "
                                             f"got {d.shape}")
        data -= d
        np.maximum(data, 0, out=data)
    monitor_bad = []
    if getattr(scan, "monitor", None) is not None:
        # counts per mean monitor; the dark (no beam) was removed from the raw counts first
        from braggstrain.prepare.measured import monitor_scale

        mscale, monitor_bad = monitor_scale(scan.monitor, F, source=src)
        data /= mscale.astype(np.float32)[:, None, None]
        mask[monitor_bad] = True
        counts["monitor"] = len(monitor_bad)
    fl = read_array(flat, "flat", src)
    if fl is not None:
        fl = np.asarray(fl, np.float64)
        if fl.shape != raw.shape[1:]:
            raise ScanFileError(src, "flat", f"expected a flat field of shape {raw.shape[1:]}, got {fl.shape}")
        bad = ~np.isfinite(fl) | (fl <= 0)
        counts["flat_field"] = int((bad & ~gaps).sum())
        mask |= bad[None]
        data /= np.where(bad, 1.0, fl).astype(np.float32)[None]

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

    # empty frames
    frame_sums = np.where(mask, 0, data).sum(axis=(1, 2), dtype=np.float64)
    empty = [int(i) for i in np.nonzero(frame_sums == 0)[0] if int(i) not in monitor_bad]
    if empty:
        if zero_frames == "error":
            raise ScanFileError(src, "frames", f"frame(s) {empty} have no counts at all (missing or blocked "
                                               f"beam?); expected counts in every frame")
        warnings.warn(f"{src}: frame(s) {empty} have no counts at all; they are masked", stacklevel=2)
        mask[empty] = True
        counts["zero_frames"] = len(empty)
    data[mask] = 0
    if not np.any(data > 0):
        raise ScanFileError(src, "frames", "no counts left after cleaning and masking")

    # the peak
    if empty:
        peak_data[empty] = 0
    pk = np.array(np.unravel_index(int(np.argmax(peak_data)), data.shape))
    max_counts = float(data.max())
    del peak_data
    bg_raw = float(np.median(data[~mask])) if np.any(~mask) else 0.0
    avail = [(int(p), int(n - 1 - p)) for p, n in zip(pk, data.shape)]

    if isinstance(center, str):
        if center == "max":
            ctr = pk.copy()
        elif center == "com":
            h = [max(1, min(lo, hi, 16)) for lo, hi in avail]
            box = tuple(slice(p - w, p + w + 1) for p, w in zip(pk, h))
            sub = np.maximum(data[box].astype(np.float64) - bg_raw, 0) * ~mask[box]
            ctr = np.array([int(round(v)) for v in _com(sub) + np.array([b.start for b in box])])
        else:
            raise InputError(f"{src}: option 'center': expected 'max', 'com' or (frame, row, column), got {center!r}")
    else:
        ctr = np.asarray(center, dtype=float).reshape(-1)
        if ctr.shape != (3,) or np.any(ctr < 0) or np.any(ctr >= np.array(data.shape)):
            raise InputError(f"{src}: option 'center': expected a raw (frame, row, column) inside {data.shape}, "
                             f"got {center!r}")
        ctr = np.round(ctr).astype(int)

    start, stop, crop_choice = choose_crop(data, mask, ctr, crop=crop, binning=binning,
                                           threshold=float(crop_threshold), n_sigma=float(crop_sigma),
                                           min_crop=min_crop, max_crop=max_crop, source=src)
    sizes = stop - start
    axis_names = ("frames", "rows", "columns")
    sl = tuple(slice(int(a), int(b)) for a, b in zip(start, stop))
    block = data[sl].astype(np.float64)
    bmask = mask[sl]

    # centre of mass of the crop (raw coordinates), background removed
    com = _com(np.maximum(block - bg_raw, 0) * ~bmask) + start

    # binning: sum, rescaled for partly masked bins; masked if < half measured
    nb_shape = tuple(int(s // b) for s, b in zip(sizes, binning))
    if np.any(binning > 1):
        shp = (nb_shape[0], binning[0], nb_shape[1], binning[1], nb_shape[2], binning[2])
        good = (~bmask).reshape(shp).sum(axis=(1, 3, 5))
        tot = np.where(bmask, 0, block).reshape(shp).sum(axis=(1, 3, 5))
        nper = int(np.prod(binning))
        bmask_b = good < 0.5 * nper
        block_b = np.where(bmask_b, 0, tot * nper / np.maximum(good, 1))
    else:
        bmask_b = bmask.copy()
        block_b = block
    nper = int(np.prod(binning))

    # background
    if background is None:
        bg = 0.0
    elif isinstance(background, str):
        if background != "corners":
            raise InputError(f"{src}: option 'background': expected 'corners', a number or None, got {background!r}")
        bg = _corner_background(block_b, bmask_b) / nper
    else:
        try:
            bg = float(background)
        except (TypeError, ValueError):
            raise InputError(f"{src}: option 'background': expected 'corners', a number or None, "
                             f"got {background!r}") from None
        if bg < 0:
            raise InputError(f"{src}: option 'background': expected ≥ 0 counts per voxel, got {bg}")
    inten = np.maximum(block_b - bg * nper, 0)
    inten[bmask_b] = 0

    # oversampling (before padding: padding in q does not change it)
    try:
        sigma = estimate_oversampling(inten, float(oversampling_threshold), bmask_b)
    except InputError:
        sigma = np.full(3, np.nan)
    if np.any(sigma < float(min_oversampling)):
        bad_axes = [axis_names[k] for k in range(3) if sigma[k] < min_oversampling]
        msg = (f"estimated oversampling {np.round(sigma, 2).tolist()} (frame, row, column) is below "
               f"{min_oversampling} along {bad_axes}")
        if np.any(binning[[k for k in range(3) if sigma[k] < min_oversampling]] > 1):
            raise ScanFileError(src, "bin", f"{msg} with binning {binning.tolist()}; expected a binning that keeps "
                                            f"σ ≥ {min_oversampling} (use a smaller bin on those axes)")
        warnings.warn(f"{src}: {msg}: phase retrieval may fail (the data look undersampled)", stacklevel=2)

    # padding
    padding = np.zeros((3, 2), int)
    if pad is not None:
        target = np.asarray(pad, dtype=int).reshape(-1)
        if target.shape != (3,) or np.any(target < np.array(nb_shape)):
            raise InputError(f"{src}: option 'pad': expected a final shape ≥ {nb_shape}, got {pad!r}")
        for k in range(3):
            padding[k, 0] = target[k] // 2 - nb_shape[k] // 2
            padding[k, 1] = target[k] - nb_shape[k] - padding[k, 0]
        inten = np.pad(inten, padding, constant_values=0)
        bmask_b = np.pad(bmask_b, padding, constant_values=True)

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
    if getattr(scan, "monitor", None) is not None:
        opts["monitor_scale"] = [float(v) for v in mscale]
        opts["monitor_masked_frames"] = list(monitor_bad)
    return PreparedScan(
        intensity=inten.astype(np.float32), mask=bmask_b, linear_map=M, q_center=q_center, rotation=R_c,
        center_index=ctr.astype(float) + delta, crop=np.column_stack([start, stop]), binning=binning,
        padding=padding, peak_max=pk.astype(float), peak_com=com, max_counts=max_counts, background=float(bg),
        hot_pixels=hot, dead_pixels=dead, zero_frames=empty, mask_counts=counts, oversampling=sigma,
        angles=crop_angles, centre_angles=ang_c, rocking_circle=scan.rocking_circle, rocking_step=step,
        instrument=inst, hkl=None if scan.hkl is None else tuple(int(v) for v in scan.hkl), source=src,
        options=opts, crop_choice=crop_choice)


def _com(w):
    w = np.asarray(w, np.float64)
    tot = w.sum()
    if tot <= 0:
        return (np.array(w.shape) - 1) / 2.0
    return np.array([(w.sum(axis=tuple(a for a in range(w.ndim) if a != k)) * np.arange(n)).sum() / tot
                     for k, n in enumerate(w.shape)])


def _corner_background(block, mask):
    """Mean of the measured voxels in the 8 corner blocks (N//8 per axis, ≥ 2)."""
    vals = []
    cs = [max(2, n // 8) for n in block.shape]
    for i in (0, 1):
        for j in (0, 1):
            for k in (0, 1):
                s = tuple(slice(0, c) if e == 0 else slice(n - c, n) for e, c, n in zip((i, j, k), cs, block.shape))
                v = block[s][~mask[s]]
                vals.append(v)
    v = np.concatenate(vals)
    return float(v.mean()) if v.size else 0.0


def _before_centre(n, b):
    """Raw voxels before the centre in a crop of n raw voxels binned by b
    (the centre voxel lands at index (n/b)//2 of the binned array)."""
    return b * ((n // b) // 2) + (b - 1) // 2


def estimate_background(data, mask=None, *, n_sigma=5.0, size=3, iterations=10):
    """Flat background per voxel of Poisson counts, the signal clipped away.

    The mean of the measured voxels whose ``size``³ neighbourhood mean stays
    below the current estimate plus ``n_sigma`` Poisson standard deviations
    of that mean (√(b / size³)), iterated to convergence (a sigma-clipped
    mean; common practice, no source). Unlike the median, which is 0 for
    Poisson counts of mean below ln 2 ≈ 0.69 (a weak reflection's flat
    background of 0.5 counts per pixel has a median of 0), it is unbiased
    for sparse counts; the peak, a small part of a detector-wide scan, is
    clipped away.

    Parameters
    ----------
    data : (F, R, C) counts
    mask : optional bool array of the same shape, True = not measured
    n_sigma : clipping level, Poisson standard deviations of the
        neighbourhood mean
    size : neighbourhood edge, voxels
    iterations : at most this many clipping passes

    Returns
    -------
    float, counts per voxel
    """
    from scipy import ndimage

    data = np.asarray(data, np.float32)
    good = np.ones(data.shape, bool) if mask is None else ~np.asarray(mask, bool)
    if not np.any(good):
        return 0.0
    b = float(data[good].mean())
    w = good.astype(np.float32)
    num = ndimage.uniform_filter(np.where(good, data, 0).astype(np.float32), size=size, mode="nearest")
    den = ndimage.uniform_filter(w, size=size, mode="nearest")
    smooth = np.where(den > 0, num / np.maximum(den, 1e-6), np.inf)
    n = float(size) ** 3
    for _ in range(int(iterations)):
        keep = good & (smooth <= b + n_sigma * np.sqrt(max(b, 1.0 / n) / n))
        if not np.any(keep):
            break
        nb = float(data[keep].mean())
        if abs(nb - b) <= 1e-3 * max(b, 1e-3):
            b = nb
            break
        b = nb
    return b


def choose_crop(data, mask, center, *, crop="auto", binning=(1, 1, 1), threshold=1e-4, n_sigma=5.0,
                min_crop=16, max_crop=(128, 256, 256), source=""):
    """Raw block of FFT-friendly size centred on the peak, and why.

    ``crop = "auto"`` keeps the extent of the peak's signal above the
    background, found on the background-subtracted counts:

    1. the flat background b (counts per voxel) is the sigma-clipped mean of
       :func:`estimate_background`;
    2. a voxel carries signal where its 3×3×3-neighbourhood mean exceeds
       b + max(``threshold`` × (peak − b), ``n_sigma``·√(b/27) + 1/27):
       a fraction of the background-subtracted peak, and never less than
       ``n_sigma`` Poisson standard deviations of the neighbourhood mean
       above the background (the 1/27, one count, keeps a zero background
       from letting single counts through);
    3. only the signal connected to the peak counts (26-connected after
       closing gaps of up to two voxels between fringes): isolated noise
       excursions, a missed hot pixel or another crystal's peak elsewhere
       on the detector cannot stretch the crop;
    4. per axis the size is twice the largest distance of that signal from
       the centre, plus one, rounded up to ``binning`` × a product of 2, 3
       and 5, at least ``min_crop``, capped by ``max_crop`` and by the
       largest centred block the data hold.

    ``crop = "full"`` takes the largest centred block; three sizes are
    checked and used as given.

    Parameters
    ----------
    data : (F, R, C) float, cleaned counts (masked voxels may hold anything)
    mask : (F, R, C) bool, True = not measured
    center : (3,) int, raw (frame, row, column) that becomes index n//2
    crop : "auto", "full" or three raw sizes
    binning : (3,) int
    threshold : fraction of the background-subtracted peak that counts as
        signal ("auto")
    n_sigma : Poisson standard deviations of the 3×3×3 mean above the
        background that count as signal ("auto")
    min_crop : smallest size per axis, raw voxels
    max_crop : largest size per axis, raw voxels ("auto")
    source : name of the scan for messages

    Returns
    -------
    start, stop : (3,) int arrays, raw [start, stop) per axis
    report : dict with the mode, the background (counts per voxel), the
        signal threshold (counts per voxel above the background), the
        signal's raw extent per axis, the sizes wanted and chosen, and what
        limited each axis ("signal", "min_crop", "max_crop", "data" or
        "given")

    Raises
    ------
    ScanFileError
        when no centred block of at least ``min_crop`` fits (peak at the
        edge of the scan or the detector), or given sizes do not fit.
    InputError
        a malformed ``crop``.
    """
    from scipy import ndimage

    src = source or "<in-memory scan>"
    data = np.asarray(data)
    mask = np.asarray(mask, bool)
    ctr = np.asarray(center, int)
    binning = np.broadcast_to(np.asarray(binning, int), (3,))
    shape = np.array(data.shape)
    lo_av, hi_av = ctr, shape - 1 - ctr
    axis_names = ("frames", "rows", "columns")
    report = {"mode": crop if isinstance(crop, str) else "given"}

    def fits(n, k):
        b = int(binning[k])
        before = _before_centre(n, b)
        return before <= lo_av[k] and n - 1 - before <= hi_av[k]

    def impossible(k):
        return ScanFileError(src, "frames", f"crop impossible: the peak (centre) at raw {axis_names[k][:-1]} "
                                            f"{int(ctr[k])} of {data.shape[k]} {axis_names[k]} leaves no "
                                            f"centred block of at least min_crop = {int(min_crop)} "
                                            f"{axis_names[k]} (peak too close to the edge of the "
                                            f"{'scan' if k == 0 else 'detector'})")

    if isinstance(crop, str):
        if crop not in ("auto", "full"):
            raise InputError(f"{src}: option 'crop': expected 'auto', 'full' or three sizes, got {crop!r}")
        if crop == "auto":
            bg = estimate_background(data, mask)
            filled = np.where(mask, bg, data).astype(np.float32)
            smooth = ndimage.uniform_filter(filled, size=3, mode="nearest")
            peak = float(np.max(np.where(mask, 0, data)))
            level = max(float(threshold) * (peak - bg), float(n_sigma) * np.sqrt(max(bg, 0.0) / 27.0) + 1.0 / 27.0)
            above = smooth > bg + level
            closed = ndimage.binary_dilation(above, structure=np.ones((3, 3, 3), bool))
            labels, _ = ndimage.label(closed, structure=np.ones((3, 3, 3), bool))
            box = tuple(slice(max(0, c - 1), c + 2) for c in ctr)
            ids = np.unique(labels[box])
            ids = ids[ids > 0]
            signal = np.isin(labels, ids) & above if ids.size else np.zeros(data.shape, bool)
            extent = np.zeros(3, int)
            want = np.ones(3, int)
            for k in range(3):
                other = tuple(a for a in range(3) if a != k)
                idx = np.nonzero(signal.any(axis=other))[0]
                if idx.size:
                    extent[k] = int(idx.max() - idx.min() + 1)
                    want[k] = 2 * int(max(ctr[k] - idx.min(), idx.max() - ctr[k])) + 1
            report.update(background=float(bg), signal_level=float(level), signal_extent=extent.tolist(),
                          wanted=want.tolist())
        mc = np.broadcast_to(np.asarray(max_crop, int), (3,))
        sizes, limited = [], []
        for k in range(3):
            b = int(binning[k])
            # largest size of the form b·N (N a 2·3·5 product) that fits around the centre
            n_fit = 0
            nb = fast_size(int(data.shape[k] // b), up=False)
            while nb >= 1:
                if fits(nb * b, k):
                    n_fit = nb * b
                    break
                nb = fast_size(nb - 1, up=False)
            why = "data"
            n = n_fit
            if crop == "auto":
                n = fast_size(max(int(want[k]), int(min_crop)), up=True, multiple=b)
                why = "signal" if want[k] >= int(min_crop) else "min_crop"
                cap = fast_size(int(mc[k]), up=False, multiple=b)
                if cap and n > cap:
                    n, why = cap, "max_crop"
                if n_fit and n > n_fit:
                    n, why = n_fit, "data"
                if not n_fit:
                    n = 0
            if n < int(min_crop) or n == 0:
                raise impossible(k)
            sizes.append(n)
            limited.append(why)
        sizes = np.array(sizes)
    else:
        sizes = np.asarray(crop, dtype=int).reshape(-1)
        if sizes.shape != (3,) or np.any(sizes < 1):
            raise InputError(f"{src}: option 'crop': expected three positive sizes (frames, rows, columns), "
                             f"got {crop!r}")
        for k in range(3):
            if sizes[k] % binning[k] or not _is_smooth(int(sizes[k] // binning[k])):
                raise InputError(f"{src}: option 'crop': {axis_names[k]} size {sizes[k]} must be bin ({binning[k]}) "
                                 f"× a product of 2, 3 and 5")
            if not fits(sizes[k], k):
                raise ScanFileError(src, "frames", f"crop impossible: {sizes[k]} {axis_names[k]} centred on raw "
                                                   f"{axis_names[k][:-1]} {int(ctr[k])} do not fit in the "
                                                   f"{data.shape[k]} {axis_names[k]} (peak too close to the edge)")
        limited = ["given"] * 3
    report.update(sizes=[int(v) for v in sizes], limited_by=limited)
    start = np.array([ctr[k] - _before_centre(int(sizes[k]), int(binning[k])) for k in range(3)])
    return start, start + sizes, report


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
