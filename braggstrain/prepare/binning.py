"""Binning, background and padding of the cropped block.

Each step is a function of its own, composed by
:func:`braggstrain.prepare.scan.prepare_scan`.
"""

from __future__ import annotations

import numpy as np

from braggstrain.errors import InputError

__all__ = ["bin_frames", "subtract_background", "pad_to"]


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


def bin_frames(block, mask, binning):
    """Sum ``binning`` voxels per axis; a partly masked bin is rescaled by its
    measured fraction and masked when less than half of it was measured.

    Returns
    -------
    binned : float64 array, mask : bool array
    """
    binning = np.asarray(binning, int)
    bmask = mask
    sizes = block.shape
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
    return block_b, bmask_b


def subtract_background(binned, mask, background="corners", per_bin=1, src="<scan>"):
    """Remove a flat background and zero the masked voxels.

    ``background`` is "corners" (the mean of the 8 corner blocks, N//8 a
    side), a number (counts per raw voxel) or None; ``per_bin`` is the
    number of raw voxels per bin.

    Returns
    -------
    intensity : float64 array (≥ 0), background : float (counts per raw voxel)
    """
    block_b, bmask_b, nper = binned, mask, int(per_bin)
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

    return inten, bg


def pad_to(intensity, mask, pad=None, src="<scan>"):
    """Pad to the final shape ``pad`` (≥ the array's), added voxels zero and masked.

    Returns
    -------
    intensity, mask, padding : (3, 2) int, voxels added before / after each axis
    """
    inten, bmask_b = intensity, mask
    nb_shape = intensity.shape
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

    return inten, bmask_b, padding
