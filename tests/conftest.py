"""Shared test fixtures: a small invented experiment for fast end-to-end checks."""

from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "pipelines" / "demo.toml"

# A reduced version of the demo scenario: smaller crystal, detector window and
# scan, so a full simulation takes seconds. Invented numbers, for tests only.
SMALL_TOML = """
[crystal]
material = "Pt"
orient_by = {{ hkl1 = [1, 1, 1], direction1 = [0, 0, 1], hkl2 = [1, -1, 0], direction2 = [1, 0, 0] }}

[instrument]
energy_kev = 9.0
sample_circles = [
    {{ name = "eta", axis = "x+", limits = [-10.0, 120.0] }},
    {{ name = "chi", axis = "y+", limits = [-95.0, 95.0] }},
    {{ name = "phi", axis = "z-" }},
]
detector_circles = [{{ name = "nu", axis = "z-" }}, {{ name = "delta", axis = "x+" }}]

[instrument.detector]
shape = [96, 96]
pixel_size_um = [75.0, 75.0]
distance_m = 0.25
direct_beam = [48.0, 48.0]
gaps = [[1, 70, 72]]

{reflections}

[simulate]
seed = 5
peak_counts = 1e5
background = 0.2
hot_pixels = 3
frames = {frames}
window = [{window}, {window}]
rocking_circle = "eta"
rocking_q_step = 1.4e-3
free_circles = ["eta", "chi", "phi", "delta"]
fixed_angles = {{ nu = 0.0 }}
truth_voxel_nm = 10.0
truth_shape = [32, 32, 32]

[simulate.shape]
kind = "truncated_octahedron"
size_nm = 150.0
truncation = 0.75
flat_normal = [0.0, 0.0, -1.0]
flat_nm = 35.0

[[simulate.field]]
kind = "dislocation"
point_nm = [5.0, -8.0, 3.0]
line = [1, -1, 0]
burgers = [0.0, 0.5, -0.5]
{extra}
"""


def small_toml(hkls=((1, 1, 1), (2, 0, 0), (0, 2, 0), (0, 0, 2)), frames=56, window=56, extra=""):
    refl = "\n".join(f'[[reflection]]\nname = "r{i}"\nhkl = [{h[0]}, {h[1]}, {h[2]}]\nscan = "scans/r{i}.h5"\n'
                     for i, h in enumerate(hkls))
    return SMALL_TOML.format(reflections=refl, frames=frames, window=window, extra=extra)


@pytest.fixture
def small_config(tmp_path):
    p = tmp_path / "small.toml"
    p.write_text(small_toml())
    return p
