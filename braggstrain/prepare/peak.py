"""The Bragg peak and the crop around it.

:func:`locate_peak` finds the brightest voxel and the crop centre;
:func:`choose_crop` the block of FFT-friendly size around it (each size
bin × a product of 2, 3 and 5), from the background-subtracted signal
connected to the peak (:func:`estimate_background`).
"""

from __future__ import annotations

import numpy as np

from braggstrain.errors import InputError, ScanFileError

__all__ = ["locate_peak", "estimate_background", "choose_crop", "fast_size"]

_AXIS_NAMES = ("frames", "rows", "columns")


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


def _com(w):
    w = np.asarray(w, np.float64)
    tot = w.sum()
    if tot <= 0:
        return (np.array(w.shape) - 1) / 2.0
    return np.array([(w.sum(axis=tuple(a for a in range(w.ndim) if a != k)) * np.arange(n)).sum() / tot
                     for k, n in enumerate(w.shape)])


def locate_peak(peak_data, data, mask, center="max", src="<scan>"):
    """The brightest voxel and the crop centre.

    Parameters
    ----------
    peak_data : (F, R, C) counts searched for the maximum (saturated voxels
        included, other masked ones zero)
    data : (F, R, C) cleaned counts, zero where masked
    mask : (F, R, C) bool
    center : "max" (the brightest voxel), "com" (centre of mass around it)
        or a raw (frame, row, column)

    Returns
    -------
    peak : (3,) int, the brightest voxel
    centre : (3,) int
    background : float, the median of the measured counts (raw voxel)
    """
    pk = np.array(np.unravel_index(int(np.argmax(peak_data)), data.shape))
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

    return pk, ctr, bg_raw


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
