"""Each cleaning step of prepare_scan alone, on small hand-made arrays (hand computations, no outside source)."""

import warnings

import numpy as np
import pytest

from braggstrain.errors import ScanFileError
from braggstrain.geometry.instrument import Detector
from braggstrain.prepare.clean import (MASK_CAUSES, correct_dark_flat, find_hot_pixels, mask_empty_frames,
                                       merge_masks, saturated_voxels)


def test_merge_masks_counts_each_cause():
    det = Detector(shape=(6, 8), gaps=((1, 2, 3),))  # column 2 has no sensor
    scan_mask = np.zeros((6, 8), bool)
    scan_mask[0, :] = True
    user = np.zeros((4, 6, 8), np.uint8)
    user[1, 5, 5] = 1
    mask, counts = merge_masks((4, 6, 8), det, scan_mask, user)
    assert list(counts) == list(MASK_CAUSES)
    assert counts["gaps"] == 6 and counts["scan_mask"] == 8 and counts["user_mask"] == 1
    assert mask[:, :, 2].all() and mask[:, 0].all() and mask[1, 5, 5] and not mask[0, 5, 5]
    with pytest.raises(ScanFileError, match="user_mask"):
        merge_masks((4, 6, 8), det, None, np.zeros((5, 5)))


def test_saturation_dark_and_flat():
    raw = np.full((2, 3, 3), 10, np.uint32)
    raw[0, 1, 1] = 100
    mask = np.zeros(raw.shape, bool)
    mask[1, 1, 1] = True
    sat = saturated_voxels(raw, 50, mask)
    assert sat.sum() == 1 and sat[0, 1, 1]
    assert saturated_voxels(raw, None, mask) is None
    flat = np.full((3, 3), 2.0)
    flat[0, 0] = 0.0  # a dead flat-field pixel
    gaps = np.zeros((3, 3), bool)
    data, info = correct_dark_flat(raw, mask, dark=4.0, flat=flat, gaps=gaps)
    assert data.dtype == np.float32 and info["flat_field"] == 1 and mask[:, 0, 0].all()
    assert data[1, 2, 2] == pytest.approx((10 - 4) / 2.0)
    data, _ = correct_dark_flat(raw, np.zeros(raw.shape, bool), dark=20.0)
    assert data.min() == 0.0  # floored at zero
    # a monitor halved in frame 1 and zero in no frame: counts per mean monitor
    data, info = correct_dark_flat(raw, np.zeros(raw.shape, bool), monitor=[2.0, 1.0])
    assert data[1, 2, 2] == pytest.approx(10 / (1.0 / 1.5)) and info["monitor_masked"] == []


def test_hot_dead_pixels_and_empty_frames():
    rng = np.random.default_rng(0)
    frames = rng.poisson(50.0, size=(5, 12, 12)).astype(float)
    frames[:, 3, 4] = 5000.0  # hot: 100× its neighbours
    frames[:, 8, 8] = 0.0  # dead: nothing while the neighbours count ~250 over the scan
    hot, dead = find_hot_pixels(frames)
    assert hot.tolist() == [[3, 4]] and dead.tolist() == [[8, 8]]
    mask = np.zeros(frames.shape, bool)
    frames[2] = 0.0
    with warnings.catch_warnings(record=True) as w:
        warnings.simplefilter("always")
        assert mask_empty_frames(frames, mask) == [2]
    assert mask[2].all() and "no counts" in str(w[0].message)
    with pytest.raises(ScanFileError, match=r"frame\(s\) \[2\]"):
        mask_empty_frames(frames, np.zeros(frames.shape, bool), "error")
