"""The reduced accuracy matrix: the whole chain against the simulator's truth.

The conditions are those of ``benchmarks/accuracy.py`` (one definition, in
braggstrain/simulate/conditions.py), at the reduced size: the test suite's
150 nm crystal, 48³ crops, two random starts of a 300-iteration plan, four
Poisson replicas. Each condition asserts only what held with margin at this
size for two draws of the noise and random starts (``python
benchmarks/accuracy.py --size reduced --seed 0`` and ``--seed 1``; the
measured numbers are quoted below), so a regression fails here and luck
does not.

Of the three pass criteria, only the Burgers vector holds at this size: the
σ coverage (0.60–0.76 within 1σ) fails at both sizes in every condition
(the error bars are another issue's work), the line's median distance
spreads over 0.12–0.54 voxel with the draw, and the strain RMS over
0.79–1.38 of the full-size targets (the reduced crystal is 11 voxels across,
its interface gradient 1.5 voxels deep). So the pass criterion asserted is
"the line found with the right Burgers vector", and beside it a regression
guard, not a pass criterion: the strain RMS within 1.5× the condition's
target (measured at most 1.26× in the conditions below).
"""

import numpy as np
import pytest

from braggstrain.simulate.conditions import BASE_REDUCED, by_name, run_condition

#: condition → what is asserted: "burgers" (the line found with the right
#: Burgers vector) and "strain_guard" (six-component strain RMS within
#: STRAIN_GUARD × the condition's target).
#:
#: Measured at the reduced size, after the rebase onto the joint-refinement
#: merge (strain RMS / target and line distance in voxels, seed +0; seed +1):
#: roi 1.13, 0.12; 1.03, 0.32 — off_centre 0.86, 0.54; 1.26, 0.39 — rock_inner
#: 1.23, 0.20 (seed +1). Every condition measured (also base, nu_minus,
#: columns_minus_x, distance_1pct) found the line with the right Burgers
#: vector in both draws. "roi" stands for the base case as well: it stores the
#: same counts as a detector region, and its rows equal the base case's to the
#: last digit; "twin" is left to the benchmark, being the same reconstruction
#: as "roi" compared under the opposite twin relation; "rock_inner" (the
#: slowest, 115 s of a loaded suite run) is left to the benchmark too. Two
#: conditions keep this near a minute on two cores (about 35 s each on an idle
#: machine).
STRAIN_GUARD = 1.5
ASSERTED = {
    "roi": ("burgers", "strain_guard"),
    "off_centre": ("burgers", "strain_guard"),
}


@pytest.mark.parametrize("name", list(ASSERTED))
def test_reduced_condition(name, tmp_path):
    cond, = by_name([name])
    row = run_condition(cond, tmp_path / name, size=BASE_REDUCED, workers=2)
    what = ASSERTED[name]
    msg = (f"{name}: strain RMS {row['strain_rms_all']:.2e} (target {cond.target:.1e}), line {row['line']}, "
           f"Dice {row['dice']:.2f}")
    if "burgers" in what:
        assert row["line"]["found"] and row["line"]["burgers_right"], msg
    if "strain_guard" in what:
        assert np.isfinite(row["strain_rms_all"]) and row["strain_rms_all"] <= STRAIN_GUARD * cond.target, msg
