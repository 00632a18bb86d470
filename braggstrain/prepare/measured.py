"""A scan as it was measured: incident-beam monitor, read-back rocking angles,
repeated scans of one reflection.

* :func:`monitor_scale`: the per-frame factor monitor / mean(monitor) that
  the preparation divides the counts by; frames with a zero or negative
  monitor are flagged (and masked, with a warning).
* :func:`fit_rocking_step`: read-back positions of the rocked circle that
  jitter around a uniform step. The nominal step is the slope of a
  least-squares straight line through (frame, angle); each frame's
  deviation from that line is reported; deviations above ``max_jitter``
  times the step are refused with the frame numbers.
* :func:`sum_repeats`: scans of one reflection aligned to the first by the
  peak's centre of mass (sub-pixel, along frames, rows and columns), summed,
  their masks combined; the shifts are reported and a scan whose peak moved
  more than ``max_shift`` is refused.
"""

from __future__ import annotations

import warnings

import numpy as np

from braggstrain.errors import ScanFileError

__all__ = ["monitor_scale", "fit_rocking_step", "peak_center_of_mass", "sum_repeats", "MAX_JITTER"]

MAX_JITTER = 0.10  # of the step; read-back jitter accepted (common practice, no source)


def monitor_scale(monitor, n_frames, *, source="", field="monitor", warn=True):
    """Per-frame scale monitor / mean(monitor) of the frames with a positive monitor.

    Parameters
    ----------
    monitor : (F,) incident-beam monitor counts (any positive unit)
    n_frames : F, the number of frames it must match
    source, field : names for messages

    Returns
    -------
    scale : (F,) float64; 1 where the monitor is not positive
    bad : list of int, frames whose monitor is zero or negative (to mask)

    Raises
    ------
    ScanFileError
        for a monitor of the wrong length, non-finite values, or no positive
        value at all.
    """
    m = np.asarray(monitor, float).reshape(-1)
    if m.size != int(n_frames):
        raise ScanFileError(source, field, f"monitor of {m.size} values; expected {n_frames}, one per frame")
    if not np.all(np.isfinite(m)):
        raise ScanFileError(source, field, "expected finite monitor values, found NaN or infinity")
    good = m > 0
    if not np.any(good):
        raise ScanFileError(source, field, "expected a positive monitor in at least one frame, found none")
    bad = [int(i) for i in np.nonzero(~good)[0]]
    if bad and warn:
        warnings.warn(f"{source}: field '{field}': zero or negative monitor in frame(s) {bad}; those frames "
                      "are masked", stacklevel=2)
    scale = np.where(good, m / m[good].mean(), 1.0)
    return scale, bad


def fit_rocking_step(angles, *, max_jitter=MAX_JITTER, source="", field="rocking angles"):
    """Nominal rocking step from read-back positions, and each frame's deviation.

    The step is the slope of the least-squares straight line through
    (frame index, angle) (numpy.polyfit, degree 1). Read-back positions
    that deviate from the line by at most ``max_jitter`` × |step| are
    accepted as jitter.

    Parameters
    ----------
    angles : (F,) degrees, F ≥ 2
    max_jitter : accepted deviation, fraction of the step

    Returns
    -------
    step : float, degrees per frame
    deviation : (F,) float, degrees (angle − line)

    Raises
    ------
    ScanFileError
        naming the field and the frames whose deviation is larger, or for a
        circle that does not move.
    """
    a = np.asarray(angles, float).reshape(-1)
    n = a.size
    if n < 2 or np.ptp(a) == 0:
        raise ScanFileError(source, field, f"the rocked circle must change from frame to frame ({n} angles)")
    idx = np.arange(n, dtype=float)
    step, intercept = np.polyfit(idx, a, 1)
    dev = a - (intercept + step * idx)
    rel = np.abs(dev) / abs(step)
    bad = np.nonzero(rel > float(max_jitter))[0]
    if bad.size:
        show = ", ".join(f"{int(i)} ({dev[i]:+.4g}°)" for i in bad[:12]) + (" ..." if bad.size > 12 else "")
        raise ScanFileError(source, field, f"read-back positions deviate from a uniform step of {step:.6g}° by "
                                           f"more than {max_jitter:.0%} of the step at frame(s) {show}; "
                                           f"expected a uniform rocking step (read-back jitter up to "
                                           f"{max_jitter:.0%} of the step)")
    return float(step), dev


def peak_center_of_mass(frames, mask=None, *, half_width=12):
    """Sub-voxel centre of mass (frame, row, column) of the brightest peak.

    The background (sigma-clipped mean, :func:`~braggstrain.prepare.scan.estimate_background`)
    is subtracted, and the centre of mass is taken in a box of ±``half_width``
    voxels around the brightest measured voxel of the 3×3×3-smoothed counts.
    """
    from scipy import ndimage

    from braggstrain.prepare.scan import estimate_background

    d = np.asarray(frames, np.float32)
    m = np.zeros(d.shape, bool) if mask is None else np.broadcast_to(np.asarray(mask, bool), d.shape)
    bg = estimate_background(d, m)
    sm = ndimage.uniform_filter(np.where(m, bg, d), size=3, mode="nearest")
    pk = np.unravel_index(int(np.argmax(sm)), d.shape)
    box = tuple(slice(max(0, p - half_width), min(n, p + half_width + 1)) for p, n in zip(pk, d.shape))
    w = np.where(m[box], 0.0, np.maximum(d[box].astype(np.float64) - bg, 0.0))
    tot = w.sum()
    if tot <= 0:
        return np.asarray(pk, float)
    return np.array([(w.sum(axis=tuple(a for a in range(3) if a != k)) * np.arange(w.shape[k])).sum() / tot
                     + box[k].start for k in range(3)])


def sum_repeats(scans, *, max_shift=5.0, saturation=None):
    """Sum repeated scans of one reflection after aligning their peaks.

    Each scan is divided by its monitor scale (relative to the mean monitor
    over all scans), its hot pixels masked (:func:`~braggstrain.prepare.scan.find_hot_pixels`
    with the default threshold), then shifted onto the first by the difference of the
    peaks' centres of mass (:func:`peak_center_of_mass`; linear
    interpolation, scipy.ndimage.shift with order 1, which keeps the total
    counts; a voxel that received measured counts from less than half its
    volume, e.g. shifted in from outside, is masked, otherwise rescaled by
    the measured fraction, as in binning); the shifted scans are summed. A
    voxel is masked in the sum when it is masked (or saturated, or a hot
    pixel) in any scan.

    Parameters
    ----------
    scans : list of Scan, same frame count and shape; the first is the
        reference (its angles and instrument are kept)
    max_shift : largest accepted shift, voxels, on any axis
    saturation : raw counts at or above which a voxel is masked (tested on
        each scan's raw counts, before scaling and summing)

    Returns
    -------
    scan : Scan, the sum (float32 counts, ``mask`` (F, R, C), no monitor)
    report : dict with ``shifts`` ((K, 3) voxels, frame/row/column, the
        first zero), ``monitor_scale`` (per scan, mean), ``sources``

    Raises
    ------
    ScanFileError
        naming the scan whose peak moved more than ``max_shift``, or whose
        shape differs from the first's.
    """
    from dataclasses import replace

    from scipy import ndimage

    from braggstrain.prepare.scan import find_hot_pixels

    ref = scans[0]
    shape = np.asarray(ref.frames).shape
    mons = [s.monitor for s in scans]
    have_mon = [m is not None for m in mons]
    if any(have_mon) and not all(have_mon):
        raise ScanFileError(scans[have_mon.index(False)].path, "monitor",
                            "expected a monitor for every repeated scan (or for none)")
    mean_mon = float(np.mean(np.concatenate([np.asarray(m, float)[np.asarray(m) > 0] for m in mons]))) \
        if all(have_mon) else None
    total = np.zeros(shape, np.float64)
    mask = np.zeros(shape, bool)
    shifts, scales = [], []
    c_ref = None
    for k, s in enumerate(scans):
        fr = np.asarray(s.frames)
        if fr.shape != shape:
            raise ScanFileError(s.path, "frames", f"repeated scan of shape {fr.shape}; expected {shape} like "
                                                  f"{ref.path}")
        m = np.zeros(shape, bool)
        if s.mask is not None:
            m |= np.broadcast_to(np.asarray(s.mask, bool), shape)
        m |= np.broadcast_to(s.instrument.detector.gap_mask()[None], shape)
        if saturation is not None:
            m |= fr >= float(saturation)
        d = fr.astype(np.float64)
        if mean_mon is not None:
            mon = np.asarray(s.monitor, float)
            _, bad = monitor_scale(mon, shape[0], source=s.path)
            scale = np.where(mon > 0, mon / mean_mon, 1.0)
            d /= scale[:, None, None]
            m[bad] = True
            scales.append(float(np.mean(scale[mon > 0])))
        # hot pixels (the local median test of the preparation) would outshine the peak
        hot, _ = find_hot_pixels(d, m)
        if len(hot):
            m[:, hot[:, 0], hot[:, 1]] = True
        c = peak_center_of_mass(d, m)
        if c_ref is None:
            c_ref = c
        sh = c_ref - c
        if np.any(np.abs(sh) > float(max_shift)):
            raise ScanFileError(s.path, "frames", f"repeat {k}: peak moved by (frames, rows, columns) "
                                                  f"{tuple(round(float(v), 2) for v in -sh)} from the first scan's; expected at "
                                                  f"most {max_shift:g} on every axis (repeat_max_shift)")
        shifts.append(sh)
        if np.any(sh != 0):
            # linear interpolation of the measured counts, rescaled by the measured weight that
            # reached each voxel; less than half measured (or shifted in from outside) is masked
            num = ndimage.shift(np.where(m, 0.0, d), sh, order=1, mode="grid-constant", cval=0.0)
            w = ndimage.shift((~m).astype(np.float64), sh, order=1, mode="grid-constant", cval=0.0)
            m = w < 0.5
            d = np.where(m, 0.0, num / np.maximum(w, 0.5))
        total += np.where(m, 0.0, d)
        mask |= m
    total[mask] = 0
    report = {"shifts": np.array(shifts), "monitor_scale": scales, "sources": [s.path for s in scans]}
    out = replace(ref, frames=total.astype(np.float32), mask=mask, monitor=None,
                  extra=dict(ref.extra, repeats=report))
    return out, report
