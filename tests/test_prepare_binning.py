"""Binning, background and padding, alone (hand computations, no outside source)."""

import numpy as np
import pytest

from braggstrain.errors import InputError
from braggstrain.prepare.binning import bin_frames, pad_to, subtract_background


def test_bin_frames_rescales_partly_masked_bins():
    block = np.ones((4, 4, 4))
    mask = np.zeros(block.shape, bool)
    mask[0, 0, 0] = True  # one of 8 voxels of the first bin: rescaled by 8/7
    mask[2:4, 2:4, 2:4] = True  # the whole last bin: masked
    mask[2, 0, 0] = mask[3, 0, 0] = mask[2, 1, 0] = mask[3, 1, 0] = mask[2, 0, 1] = True  # 5 of 8: masked
    binned, bmask = bin_frames(block, mask, (2, 2, 2))
    assert binned.shape == (2, 2, 2)
    assert binned[0, 0, 0] == pytest.approx(8.0) and binned[0, 1, 1] == 8.0
    assert bmask[1, 1, 1] and bmask[1, 0, 0] and not bmask[0, 0, 0]
    same, m = bin_frames(block, mask, (1, 1, 1))
    assert same is block and np.array_equal(m, mask) and m is not mask


def test_background_from_the_corners_and_given():
    binned = np.full((16, 16, 16), 3.0)
    binned[6:10, 6:10, 6:10] = 100.0
    mask = np.zeros(binned.shape, bool)
    inten, bg = subtract_background(binned, mask, "corners", per_bin=1)
    assert bg == pytest.approx(3.0) and inten[0, 0, 0] == 0 and inten[8, 8, 8] == pytest.approx(97.0)
    inten, bg = subtract_background(binned, mask, 1.0, per_bin=2)  # 1 count per raw voxel, 2 per bin
    assert bg == 1.0 and inten[0, 0, 0] == pytest.approx(1.0)
    with pytest.raises(InputError, match="background"):
        subtract_background(binned, mask, "median")


def test_pad_to_centres_and_masks_the_added_voxels():
    inten = np.ones((4, 5, 6))
    mask = np.zeros(inten.shape, bool)
    out, m, padding = pad_to(inten, mask, (8, 8, 8))
    assert out.shape == (8, 8, 8) and padding.tolist() == [[2, 2], [2, 1], [1, 1]]
    assert m.sum() == 8 ** 3 - inten.size and out.sum() == inten.size
    assert pad_to(inten, mask, None)[2].tolist() == [[0, 0]] * 3
    with pytest.raises(InputError, match="pad"):
        pad_to(inten, mask, (2, 8, 8))
