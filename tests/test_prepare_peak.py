"""Locating the peak and choosing the crop, alone (hand computations, no outside source)."""

import numpy as np
import pytest

from braggstrain.errors import InputError
from braggstrain.prepare.peak import fast_size, locate_peak


def test_fast_size_products_of_2_3_5():
    assert [fast_size(n) for n in (7, 14, 97, 128)] == [8, 15, 100, 128]
    assert fast_size(97, up=False) == 96 and fast_size(13, up=True, multiple=2) == 16


def _peak(shape=(20, 40, 40), at=(10, 18, 23)):
    idx = np.indices(shape)
    data = np.exp(-sum((i - a) ** 2 for i, a in zip(idx, at)) / (2 * 2.0 ** 2)) * 1e4
    return data, np.zeros(shape, bool)


def test_locate_peak_max_com_and_given():
    data, mask = _peak()
    pk, ctr, bg = locate_peak(data, data, mask, "max")
    assert pk.tolist() == [10, 18, 23] and ctr.tolist() == [10, 18, 23] and bg >= 0
    assert locate_peak(data, data, mask, "com")[1].tolist() == [10, 18, 23]
    assert locate_peak(data, data, mask, (5, 6, 7))[1].tolist() == [5, 6, 7]
    with pytest.raises(InputError, match="center"):
        locate_peak(data, data, mask, "middle")

# choose_crop alone: tests/test_prepare_crop.py
