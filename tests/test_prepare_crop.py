"""Tests of the automatic crop (braggstrain.prepare.scan.choose_crop) and the
background estimate it rests on.

The scenes are rocking scans made by the project's simulator; the references
are properties of the Poisson distribution (mean λ, variance λ, median 0 for
λ < ln 2; any statistics text, e.g. Johnson, Kemp & Kotz, Univariate
Discrete Distributions, 3rd ed., 2005, ch. 4).
"""

import warnings
from dataclasses import replace

import numpy as np
import pytest

from braggstrain.errors import InputError, ScanFileError
from braggstrain.prepare import scan as pr

from conftest import simulated_cube


def _scene(peak_counts):
    return simulated_cube(peak_counts)


@pytest.fixture(scope="module")
def scenes():
    return {p: _scene(p) for p in (1e4, 1e5)}


def _prepare(scan, **kw):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return pr.prepare_scan(scan, **kw)


def test_background_of_sparse_poisson_counts():
    # Poisson(0.5): mean 0.5, median 0 (λ < ln 2) — the median cannot measure it
    rng = np.random.default_rng(0)
    counts = rng.poisson(0.5, size=(40, 100, 100)).astype(np.float32)
    assert np.median(counts) == 0
    # a bright peak in one corner is clipped away; the mean of 4·10⁵ voxels has
    # a standard deviation √(0.5/4·10⁵) ≈ 1.1·10⁻³
    counts[:8, :8, :8] += 1e3
    b = pr.estimate_background(counts)
    assert abs(b - 0.5) < 0.01
    # masked voxels are left out
    mask = np.zeros(counts.shape, bool)
    mask[:, :, :50] = True
    counts[mask] = 1e6
    assert abs(pr.estimate_background(counts, mask) - 0.5) < 0.01


def test_weak_peak_crop_is_not_stretched_by_the_background(scenes):
    # the same crystal at 10⁴ and 10⁵ peak counts over a flat background of 0.5
    # counts per pixel: the crop follows the signal (inside the 64 × 64 window
    # the simulator fills), not the whole detector (150 × 170 here)
    strong = _prepare(scenes[1e5][0], crop="auto")
    weak = _prepare(scenes[1e4][0], crop="auto")
    rs, rw = (np.diff(p.crop, axis=1).ravel() for p in (strong, weak))
    assert np.all(rw <= rs)
    assert rw[1] <= 72 and rw[2] <= 72
    ch = weak.crop_choice
    assert ch["mode"] == "auto" and ch["limited_by"][1:] == ["signal", "signal"]
    assert abs(ch["background"] - 0.5) < 0.05
    # the peak stays at n//2
    assert np.unravel_index(np.argmax(weak.intensity), weak.shape) == tuple(np.array(weak.shape) // 2)
    # the choice is reported by the summary and kept in the prepared file
    assert "crop choice (auto)" in pr.summarize_prepared(weak)


def test_a_distant_spot_does_not_stretch_the_crop(scenes, tmp_path):
    scan, _ = scenes[1e4]
    ref = _prepare(scan, crop="auto")
    frames = scan.frames.copy()
    # a second, weaker spot (another grain) 60 pixels away from the peak, on 5 frames
    frames[20:25, 10:14, 150:154] += 300
    p = _prepare(replace(scan, frames=frames), crop="auto")
    assert np.array_equal(p.crop, ref.crop)
    from braggstrain.io.prepared import read_prepared, write_prepared

    path = write_prepared(p, tmp_path / "p.h5")
    assert read_prepared(path).crop_choice == p.crop_choice


def test_choose_crop_limits_and_errors():
    data = np.zeros((40, 60, 60), np.float32)
    data[18:23, 28:33, 28:33] = 100.0
    mask = np.zeros(data.shape, bool)
    start, stop, rep = pr.choose_crop(data, mask, (20, 30, 30), min_crop=16)
    # signal 5 voxels wide (+1 on each side from the 3×3×3 mean) → 2·3 + 1 = 7 → min_crop 16
    assert np.all(stop - start == 16) and rep["limited_by"] == ["min_crop"] * 3
    start, stop, rep = pr.choose_crop(data, mask, (20, 30, 30), crop="full")
    assert list(stop - start) == [40, 60, 60] and rep["limited_by"] == ["data"] * 3
    start, stop, rep = pr.choose_crop(data, mask, (20, 30, 30), max_crop=(16, 16, 16), min_crop=8,
                                      threshold=0.0)
    assert rep["mode"] == "auto"
    with pytest.raises(InputError, match="'crop'"):
        pr.choose_crop(data, mask, (20, 30, 30), crop="most")
    with pytest.raises(ScanFileError, match="crop impossible.*row 2"):
        pr.choose_crop(data, mask, (20, 2, 30), source="x.h5")
