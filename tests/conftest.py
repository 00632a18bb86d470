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


def simulated_cube(peak_counts=1e5, background=0.5, seed=4, hot_pixels=0, gaps=()):
    """A 250 nm Pt cube at (1 1 1) made by the project's simulator: 48 frames, a
    64 × 64 signal window on a 150 × 170 detector (55 µm pixels at 0.5 m, 9 keV).
    Invented numbers, for tests only. Returns (Scan, SimulatedScan)."""
    import numpy as np

    from braggstrain.geometry.crystal import Crystal
    from braggstrain.geometry.instrument import Circle, Detector, Diffractometer
    from braggstrain.io.scans import Scan
    from braggstrain.simulate import forward as fw

    det = Detector(shape=(150, 170), pixel_size=(55e-6, 55e-6), distance=0.5, direct_beam=(75, 85), gaps=gaps)
    ins = Diffractometer([Circle("mu", "z+"), Circle("eta", "x+"), Circle("phi", "z+")],
                         [Circle("nu", "z+"), Circle("delta", "x+")], det, 9.0)
    cr = Crystal("Pt").oriented_by((1, 1, 1), (0, 0, 1), (1, -1, 0), (1, 0, 0))
    g = cr.g_sample((1, 1, 1))
    ang = ins.solve_bragg(g, free=["mu", "eta", "delta"], fixed={"phi": 0.0, "nu": 3.0}, starts=2)
    step = np.degrees(6e-4 / np.linalg.norm(g))
    shape = fw.Polyhedron(fw._CUBE_FACES @ cr.U.T, np.full(6, 1250.0))
    sim = fw.simulate_scan(ins, cr, (1, 1, 1), shape, None, rocking_circle="eta", n_frames=48, step_deg=step,
                           free_circles=None, bragg_angles=ang, window=(64, 64), peak_counts=peak_counts,
                           background=background, hot_pixels=hot_pixels, seed=seed)
    return Scan(frames=sim.frames, angles=sim.angles, rocking_circle="eta", instrument=ins, mask=None,
                hkl=(1, 1, 1), path=f"cube_{peak_counts:g}.h5"), sim
def assert_runs_columns_recorded(path, new=False):
    """Every runs-table column the figures and the report read exists in the
    results file at ``path`` (issue 16), and no leftover llk/free_llk."""
    import h5py

    from braggstrain.io.results import read_results
    from braggstrain.report import figures, html

    results = read_results(path)
    with h5py.File(path, "r") as f:
        for name in results.names:
            cols = {c.decode() if isinstance(c, bytes) else str(c)
                    for c in f[f"reflections/{name}/runs"].attrs["columns"]}
            used = set(figures.RUN_COLUMNS) | set(html.RUN_COLUMNS) | {results.reflection(name).ranking_metric}
            if new:
                used.add("rank")
            assert used <= cols, (name, used - cols)
            assert not {"llk", "free_llk"} & cols


# ---------------------------------------------------------------------------
# Several reflections of one crystal, written directly as ρ_j = s·exp(−i G_j·u)
# (tests of strain.tensor, strain.registration, strain.lattice)
# ---------------------------------------------------------------------------

N = 48
H = 40.0  # Å
# RMS strain / rotation error allowed. Measured on these checks: 1e-10 to
# 7e-7 for analytic fields on one grid, 1.2e-6 after registration (one
# linear interpolation of each object); 2e-5 leaves a margin of about 15.
TOL = 2e-5


@pytest.fixture(scope="module")
def pt():
    from braggstrain.geometry.crystal import Crystal

    return Crystal("Pt").oriented_by((1, 1, 1), (0.2, 0.1, 1.0), (1, -1, 0), (1, 0, 0))


@pytest.fixture(scope="module")
def grid():
    from braggstrain.simulate import forward as fw

    coords = fw.grid_coordinates((N,) * 3, H)
    R = (N // 2 - 4) * H
    support = fw.ellipsoid((N,) * 3, H, (R, 0.93 * R, 0.87 * R))
    return coords, support


def gs(pt, hkls):
    import numpy as np

    return np.array([pt.g_sample(h) for h in hkls])


def objects(support, u, G, offsets=None):
    import numpy as np

    from braggstrain.simulate import forward as fw

    objs = [fw.complex_object(support, u, g) for g in G]
    if offsets is not None:
        objs = [(o * np.exp(1j * c)).astype(np.complex64) for o, c in zip(objs, offsets)]
    return objs


def rms(a, mask):
    import numpy as np

    return float(np.sqrt(np.mean(a[..., mask] ** 2)))


# The invented results bundle of tests/results_bundle.py, built once per
# session for the tests of io/results, io/vtk and report/.
@pytest.fixture(scope="session")
def bundle():
    from results_bundle import _bundle

    return _bundle()


@pytest.fixture(scope="session")
def results_file(bundle, tmp_path_factory):
    from braggstrain.io.results import write_results

    return write_results(tmp_path_factory.mktemp("res") / "results.h5", bundle)


@pytest.fixture(scope="session")
def figures(results_file, tmp_path_factory):
    # made from the file read back, as `braggstrain report RESULTS` does
    from braggstrain.io.results import read_results
    from braggstrain.report.figures import make_figures

    return make_figures(read_results(results_file), tmp_path_factory.mktemp("fig"))


@pytest.fixture(scope="session")
def loop_and_lines():
    """A loop and two straight lines in one crystal (tests/defect_cases.py),
    traced once per session."""
    from defect_cases import loop_and_lines_case

    return loop_and_lines_case()
