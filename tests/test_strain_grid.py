"""braggstrain.strain.grid.Grid: the one index ↔ position conversion.

The definition checked (docs/results.md): the voxel at index i lies at
origin + (i − n//2)·voxel_size on each axis; the results file's /grid/x, y, z
are those positions.
"""

import numpy as np
import pytest

from braggstrain.errors import InputError
from braggstrain.strain.grid import Grid
from braggstrain.strain.objects import SampleObject

SHAPE = (6, 7, 4)
VS = (2.0, 3.0, 1.5)
ORIGIN = (10.0, -4.5, 0.25)


def test_position_of_indices_by_the_definition():
    g = Grid(SHAPE, VS, ORIGIN)
    assert g.centre_index.tolist() == [3, 3, 2]
    np.testing.assert_allclose(g.position([3, 3, 2]), ORIGIN)
    np.testing.assert_allclose(g.position([0, 0, 0]), [10 - 6, -4.5 - 9, 0.25 - 3])
    np.testing.assert_allclose(g.corner, g.position([0, 0, 0]))
    np.testing.assert_allclose(g.position([3.5, 4, 2]), [11, -1.5, 0.25])  # fractional indices
    for k in range(3):
        want = ORIGIN[k] + (np.arange(SHAPE[k]) - SHAPE[k] // 2) * VS[k]
        np.testing.assert_allclose(g.axis(k), want)
        np.testing.assert_allclose(g.axes[k], want)
    c = g.coordinates()
    assert c.shape == (3,) + SHAPE
    np.testing.assert_allclose(c[:, 1, 5, 3], [g.axis(0)[1], g.axis(1)[5], g.axis(2)[3]])


def test_index_inverts_position_on_either_axis_layout():
    g = Grid(SHAPE, VS, ORIGIN)
    rng = np.random.default_rng(0)
    idx = rng.uniform(-1, 8, size=(5, 4, 3))
    np.testing.assert_allclose(g.index(g.position(idx)), idx, atol=1e-12)
    first = np.moveaxis(idx, -1, 0)  # (3, ...) as map_coordinates wants
    np.testing.assert_allclose(g.position(first, axis=0), np.moveaxis(g.position(idx), -1, 0))
    np.testing.assert_allclose(g.index(g.position(first, axis=0), axis=0), first, atol=1e-12)
    with pytest.raises(InputError, match="3 components"):
        g.position(np.zeros((4, 2)))


def test_grid_of_its_sources_and_bad_input():
    g = Grid(SHAPE, VS, ORIGIN)
    so = SampleObject(np.ones(SHAPE, np.complex64), VS, (1.0, 0, 0), np.ones(SHAPE, bool), origin=ORIGIN)
    assert so.grid.same_as(g) and Grid.of(so).same_as(g)
    assert Grid.of(g.to_dict()).same_as(g)
    assert Grid.of({"voxel_size": VS, "shape": SHAPE}).same_as(Grid(SHAPE, VS))  # origin defaults to zero
    assert Grid.of(2.0, shape=SHAPE).same_as(Grid(SHAPE, 2.0, (0, 0, 0)))
    assert not g.same_as(Grid(SHAPE, VS, (10.0, -4.5, 0.3)))
    with pytest.raises(InputError, match="differs"):
        Grid.of(g, shape=(6, 7, 5))
    with pytest.raises(InputError, match="voxel_size"):
        Grid(SHAPE, (1.0, 0.0, 1.0))
    with pytest.raises(InputError, match="origin"):
        Grid(SHAPE, 1.0, (0.0, np.nan, 0.0))
    with pytest.raises(InputError, match="shape"):
        Grid((4, 4), 1.0)
    with pytest.raises(InputError, match="expected a Grid"):
        Grid.of("nonsense")
