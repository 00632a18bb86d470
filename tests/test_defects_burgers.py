"""defects/burgers: the Burgers vector from the windings h_j·b = −n_j, and its notation."""

from __future__ import annotations


import numpy as np

from braggstrain.geometry.crystal import Crystal
from braggstrain.defects.burgers import format_lattice_vector, solve_burgers

from defect_cases import B_TRUE, HKLS


def test_solve_burgers_recovers_every_short_fcc_translation():
    # h·b = −n with integer n for every fcc translation (½⟨110⟩, ⟨100⟩) and
    # allowed reflections; the solve must return exactly that translation.
    cr = Crystal("Pt")
    for t in cr.translations():
        n = [-int(round(np.dot(h, t))) for h in HKLS]
        b, b_fit, res = solve_burgers(HKLS, n, cr)
        assert np.array_equal(b, t) and res == 0.0 and np.allclose(b_fit, t)
    # one reflection off by one: still the nearest translation, with a residual
    n = [-int(round(np.dot(h, B_TRUE))) for h in HKLS]
    n[2] += 1
    b, _, res = solve_burgers(HKLS, n, cr)
    assert res > 0.4
    assert solve_burgers([(1, 1, 1), (-1, 1, 1), (2, 0, 0)], [0, 1, -1], cr)[0] is None



def test_format_lattice_vector():
    # Crystallographic notation of directions, e.g. ½[1 -1 0] written 1/2[1 -1 0]
    # (common practice, no source).
    assert format_lattice_vector([0.5, -0.5, 0.0]) == "1/2[1 -1 0]"
    assert format_lattice_vector([1.0, 0.0, 0.0]) == "[1 0 0]"
    assert format_lattice_vector([0.5, 0.5, 0.5]) == "1/2[1 1 1]"
