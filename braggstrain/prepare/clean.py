"""Cleaning a rocking scan: masks, dark and flat field, saturation, hot and dead pixels, empty frames.

Each step is a function of its own (arrays in, arrays out), composed by
:func:`braggstrain.prepare.scan.prepare_scan`. Masks are True where a voxel
is not measured.
"""

from __future__ import annotations

import warnings

import numpy as np

from braggstrain.errors import InputError, ScanFileError
from braggstrain.io.arrays import read_array

__all__ = ["MASK_CAUSES", "merge_masks", "saturated_voxels", "correct_dark_flat", "find_hot_pixels",
           "mask_empty_frames"]

#: The causes a voxel can be masked for, in the order of ``PreparedScan.mask_counts``.
MASK_CAUSES = ("gaps", "scan_mask", "user_mask", "flat_field", "hot", "dead", "saturated", "zero_frames",
               "monitor")


def _as_stack_mask(m, shape, field_name, src):
    """(R, C) or (F, R, C) bool mask → (F, R, C)."""
    m = np.asarray(m)
    if m.shape == shape[1:]:
        return np.broadcast_to(m.astype(bool)[None], shape)
    if m.shape == shape:
        return m.astype(bool)
    raise ScanFileError(src, field_name, f"expected a mask of shape {shape[1:]} (rows, columns) or {shape} "
                                         f"(frames, rows, columns), got {m.shape}")


def merge_masks(shape, detector, scan_mask=None, user_mask=None, src="<scan>"):
    """The detector's gaps, the scan file's own mask and the user's mask, as one (F, R, C) mask.

    Parameters
    ----------
    shape : (F, R, C) of the frames
    detector : braggstrain.geometry.instrument.Detector (its ``gap_mask``)
    scan_mask : (R, C) or (F, R, C) bool, optional
    user_mask : array, file (see :func:`braggstrain.io.arrays.read_array`) or None
        Nonzero = not measured.
    src : str, the scan's name for messages

    Returns
    -------
    mask : (F, R, C) bool
    counts : dict, pixels masked per cause (every key of :data:`MASK_CAUSES`, the
        others 0)
    """
    counts = {k: 0 for k in MASK_CAUSES}
    mask = np.zeros(shape, bool)
    gaps = detector.gap_mask()
    counts["gaps"] = int(gaps.sum())
    mask |= gaps[None]
    if scan_mask is not None:
        sm = _as_stack_mask(scan_mask, shape, "mask", src)
        counts["scan_mask"] = int(sm.any(axis=0).sum()) if sm.ndim == 3 else int(sm.sum())
        mask |= sm
    um = read_array(user_mask, "user_mask", src)
    if um is not None:
        um = _as_stack_mask(um != 0, shape, "user_mask", src)
        counts["user_mask"] = int(np.asarray(um).any(axis=0).sum())
        mask |= um
    return mask, counts


def saturated_voxels(raw, saturation, mask, src="<scan>"):
    """Voxels at or above the ``saturation`` count that are not masked yet (None without a limit)."""
    if saturation is None:
        return None
    sat = float(saturation)
    if not sat > 0:
        raise InputError(f"{src}: option 'saturation': expected a positive count, got {saturation!r}")
    return (raw >= sat) & ~mask


def correct_dark_flat(raw, mask, dark=None, flat=None, gaps=None, src="<scan>", monitor=None):
    """Counts as float32: the dark subtracted (floored at 0), divided by the
    monitor's relative value, divided by the flat field.

    Pixels whose flat is ≤ 0 or not finite, and frames whose monitor is zero
    or negative, are added to ``mask`` (in place). With a ``monitor`` (one
    value per frame) the counts are divided by monitor / mean(monitor) after
    the dark (no beam) is removed
    (:func:`braggstrain.prepare.measured.monitor_scale`).

    Returns
    -------
    data : float32 (F, R, C)
    info : dict with ``flat_field`` (pixels masked by the flat field outside
        ``gaps``), ``monitor_scale`` (per frame, or None) and
        ``monitor_masked`` (frames masked for their monitor)
    """
    data = raw.astype(np.float32)
    d = read_array(dark, "dark", src)
    if d is not None:
        d = np.asarray(d, np.float32)
        if d.ndim != 0 and d.shape not in (raw.shape[1:], raw.shape):
            raise ScanFileError(src, "dark", f"expected a number or shape {raw.shape[1:]} or {raw.shape}, "
                                             f"got {d.shape}")
        data -= d
        np.maximum(data, 0, out=data)
    info = {"flat_field": 0, "monitor_scale": None, "monitor_masked": []}
    if monitor is not None:
        from braggstrain.prepare.measured import monitor_scale

        mscale, bad_frames = monitor_scale(monitor, raw.shape[0], source=src)
        data /= mscale.astype(np.float32)[:, None, None]
        mask[bad_frames] = True
        info["monitor_scale"], info["monitor_masked"] = mscale, list(bad_frames)
    fl = read_array(flat, "flat", src)
    if fl is not None:
        fl = np.asarray(fl, np.float64)
        if fl.shape != raw.shape[1:]:
            raise ScanFileError(src, "flat", f"expected a flat field of shape {raw.shape[1:]}, got {fl.shape}")
        bad = ~np.isfinite(fl) | (fl <= 0)
        info["flat_field"] = int((bad & ~(np.zeros(fl.shape, bool) if gaps is None else gaps)).sum())
        mask |= bad[None]
        data /= np.where(bad, 1.0, fl).astype(np.float32)[None]
    return data, info


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


def mask_empty_frames(data, mask, zero_frames="mask", src="<scan>", skip=()):
    """Frames with no counts outside ``mask``: masked (in place, with a warning) or an error.

    Frames in ``skip`` (already masked for another cause, e.g. the monitor)
    are not counted.

    Returns
    -------
    list of int, the empty frames
    """
    if zero_frames not in ("mask", "error"):
        raise InputError(f"{src}: option 'zero_frames': expected 'mask' or 'error', got {zero_frames!r}")
    frame_sums = np.where(mask, 0, data).sum(axis=(1, 2), dtype=np.float64)
    empty = [int(i) for i in np.nonzero(frame_sums == 0)[0] if int(i) not in skip]
    if empty:
        if zero_frames == "error":
            raise ScanFileError(src, "frames", f"frame(s) {empty} have no counts at all (missing or blocked "
                                               f"beam?); expected counts in every frame")
        warnings.warn(f"{src}: frame(s) {empty} have no counts at all; they are masked", stacklevel=3)
        mask[empty] = True
    return empty
