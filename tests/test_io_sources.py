"""Round trips of a simulated scan written the way beamlines write it, read
back through a pipeline file, against the plain-array route.

Each case writes the same simulated counts (the project's simulator) with a
general-purpose writer: h5py + hdf5plugin (bitshuffle-LZ4, external link,
motors and monitor in a second file), fabio (EDF frames) with a SPEC file
in the SPEC layout (#S scan line, #O motor names and #P header positions,
#N/#L column header, one data row per point; certified.com SPEC manual,
"Standard Data File Format", from memory) parsed by xrayutilities' SPEC
reader, and fabio (TIFF frames of a detector region of interest). The
prepared data must equal the plain route's: bit for bit where the counts are
the same, to float precision after monitor scaling.
"""

import re
import warnings
from dataclasses import replace

import fabio.edfimage
import fabio.tifimage
import h5py
import hdf5plugin
import numpy as np
import pytest

from braggstrain.cli import main
from braggstrain.config import load_config
from braggstrain.pipeline import _scan_for
from braggstrain.prepare import scan as pr

from conftest import simulated_cube

HEAD = """
[crystal]
material = "Pt"
orient_by = {{ hkl1 = [1, 1, 1], direction1 = [0, 0, 1], hkl2 = [1, -1, 0], direction2 = [1, 0, 0] }}

[instrument]
energy_kev = 9.0
sample_circles = [{{ name = "mu", axis = "z+" }}, {{ name = "eta", axis = "x+" }}, {{ name = "phi", axis = "z+" }}]
detector_circles = [{{ name = "nu", axis = "z+" }}, {{ name = "delta", axis = "x+" }}]

[instrument.detector]
shape = [150, 170]
pixel_size_um = [55.0, 55.0]
distance_m = 0.5
direct_beam = [75.0, 85.0]
gaps = [[1, 100, 103]]

[[reflection]]
name = "r"
hkl = [1, 1, 1]
rocking_circle = "eta"
{reflection}

[prepare]
crop = [48, 64, 64]
"""
CIRCLES = ("mu", "eta", "phi", "nu", "delta")
OPTS = dict(crop=(48, 64, 64))


@pytest.fixture(scope="module")
def cube():
    scan, sim = simulated_cube(1e5, hot_pixels=2, gaps=((1, 100, 103),))
    F = scan.frames.shape[0]
    monitor = 2.0e5 * (1 + 0.05 * np.sin(np.arange(F)))  # a beam that drifts by ±5 %
    return dict(scan=scan, sim=sim, monitor=monitor)


def _prepare(scan, **kw):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return pr.prepare_scan(scan, **{**OPTS, **kw})


def _via_pipeline(tmp_path, reflection):
    p = tmp_path / "pipeline.toml"
    p.write_text(HEAD.format(reflection=reflection))
    cfg = load_config(p)
    scan, _ = _scan_for(cfg, 0, cfg["reflection"][0], {})
    return scan, _prepare(scan), p


def _plain(cube, monitor=None):
    """The plain-array route: the counts, divided by monitor/mean(monitor) in float32."""
    scan = cube["scan"]
    if monitor is None:
        return _prepare(scan)
    scale = (monitor / monitor.mean()).astype(np.float32)
    return _prepare(replace(scan, frames=scan.frames.astype(np.float32) / scale[:, None, None]))


def _same(a, b, exact, offset=(0, 0), geometry_rtol=1e-9):
    if exact:
        assert np.array_equal(a.intensity, b.intensity)
    else:
        np.testing.assert_allclose(a.intensity, b.intensity, rtol=2e-6, atol=1e-3)
    assert np.array_equal(a.mask, b.mask)
    crop_b = b.crop - np.array([[0, 0], [offset[0]] * 2, [offset[1]] * 2])
    assert np.array_equal(a.crop, crop_b)
    np.testing.assert_allclose(a.linear_map, b.linear_map, rtol=geometry_rtol, atol=1e-12)
    np.testing.assert_allclose(a.q_center, b.q_center, rtol=geometry_rtol)
    assert np.array_equal(a.hot_pixels, b.hot_pixels - np.array(offset)) or len(a.hot_pixels) == len(b.hot_pixels)


def _write_hdf5_beamline(cube, raw, monitor_name="monitor", monitor=None):
    """Compressed data file + master with an external link; motors and monitor in a second file."""
    raw.mkdir(exist_ok=True)
    s = cube["scan"]
    with h5py.File(raw / "data_000000.h5", "w") as f:
        f.create_dataset("data", data=s.frames, chunks=(1,) + s.frames.shape[1:],
                         **hdf5plugin.Bitshuffle(cname="lz4"))
    with h5py.File(raw / "master.h5", "w") as f:
        f["entry/data/data"] = h5py.ExternalLink("data_000000.h5", "/data")
    with h5py.File(raw / "positions.h5", "w") as f:
        for c in CIRCLES:
            f[f"positions/{c}"] = np.asarray(s.angles[c], float)
        f[monitor_name] = cube["monitor"] if monitor is None else monitor
        f["monitor_short"] = cube["monitor"][:-1]
        f["energy"] = 9.0
        f["distance"] = 0.5


def test_compressed_hdf5_with_motors_and_monitor_in_a_second_file(tmp_path, cube):
    _write_hdf5_beamline(cube, tmp_path / "raw")
    angles = ", ".join(f'{c} = "raw/positions.h5#/positions/{c}"' for c in CIRCLES)
    scan, prep, _ = _via_pipeline(tmp_path, f'frames = "raw/master.h5#/entry/data/data"\nangles = {{ {angles} }}\n'
                                            f'monitor = "raw/positions.h5#/monitor"\n'
                                            f'energy_kev = "raw/positions.h5#/energy"\n'
                                            f'distance_m = "raw/positions.h5#/distance"')
    assert scan.extra["sources"]["distance_m"].endswith("positions.h5#/distance")
    assert np.array_equal(scan.frames, cube["scan"].frames)
    _same(prep, _plain(cube, cube["monitor"]), exact=False)
    np.testing.assert_allclose(prep.options["monitor_scale"], cube["monitor"] / cube["monitor"].mean(), rtol=1e-12)


def _spec_file(path, cube, number=42, monitor=None, rocked="eta"):
    """A SPEC file in the standard layout; eta scanned, the other motors in the header."""
    s = cube["scan"]
    mon = cube["monitor"] if monitor is None else monitor
    eta = [float(v) for v in s.angles["eta"]]
    mon = [float(v) for v in mon]
    lines = ["#F " + path.name, "#E 1764662400", "#D Wed Dec 02 08:00:00 2026", f"#O0 mu  {rocked}  phi  nu", "#O1 delta",
             "", f"#S {number}  ascan  {rocked} {eta[0]!r} {eta[-1]!r} {len(eta) - 1} 1",
             "#D Wed Dec 02 08:00:00 2026", "#T 1  (Seconds)",
             "#P0 " + " ".join(repr(float(np.mean(s.angles[c]))) for c in ("mu", "eta", "phi", "nu")),
             "#P1 " + repr(float(s.angles["delta"])), "#N 4", f"#L {rocked}  mon  Seconds  det"]
    for k in range(len(eta)):
        lines.append(f"{eta[k]!r} {mon[k]!r} 1 {int(s.frames[k].sum())}")
    path.write_text("\n".join(lines) + "\n\n")


def test_edf_frames_with_a_spec_file(tmp_path, cube):
    s = cube["scan"]
    (tmp_path / "edf").mkdir()
    for k in range(s.frames.shape[0]):  # frame numbers 0 … 47: natural order, not string order
        fabio.edfimage.EdfImage(data=s.frames[k].astype(np.int32)).write(str(tmp_path / "edf" / f"img_{k}.edf"))
    _spec_file(tmp_path / "run.spec", cube, rocked="th")  # the circle eta is the motor th at this beamline
    scan, prep, _ = _via_pipeline(tmp_path, 'frames = "edf/img_*.edf"\n'
                                            'spec = { file = "run.spec", scan = 42, motors = { eta = "th" } }\n'
                                            'monitor = "mon"')
    assert np.array_equal(scan.frames, s.frames)
    # xrayutilities' SPEC reader holds the data columns as float32 (7 significant
    # digits: 10⁻⁶° at 18°); the header positions as float64
    for c in CIRCLES:
        np.testing.assert_allclose(np.asarray(scan.angles[c]), np.asarray(s.angles[c]), rtol=1e-7, err_msg=c)
    _same(prep, _plain(cube, cube["monitor"]), exact=False, geometry_rtol=1e-5)


def test_tiff_frames_of_a_detector_region(tmp_path, cube):
    s = cube["scan"]
    r0, c0 = 30, 40
    (tmp_path / "tif").mkdir()
    for k in range(s.frames.shape[0]):
        fabio.tifimage.TifImage(data=s.frames[k, r0:r0 + 100, c0:c0 + 100]).write(
            str(tmp_path / "tif" / f"f{k:04d}.tif"))
    angles = ", ".join(f"{c} = {np.asarray(s.angles[c]).tolist()!r}" for c in CIRCLES)
    scan, prep, _ = _via_pipeline(tmp_path, f'frames = "tif"\nroi = [{r0}, {c0}]\nangles = {{ {angles} }}')
    assert scan.instrument.detector.shape == (100, 100)
    assert scan.instrument.detector.gaps == ((1, 60, 63),)  # columns 100–103 of the full detector
    full = _plain(cube)
    _same(prep, full, exact=True, offset=(r0, c0))
    # the geometry of every pixel is the full detector's: xrayutilities' per-pixel Q agree
    np.testing.assert_allclose(pr.exact_q(prep), pr.exact_q(full), rtol=1e-9)
    # the same region given once for all reflections, in the detector table
    p = tmp_path / "detector_roi.toml"
    p.write_text(HEAD.format(reflection=f'frames = "tif"\nangles = {{ {angles} }}').replace(
        "gaps = [[1, 100, 103]]", f"gaps = [[1, 100, 103]]\nroi = [{r0}, {c0}]"))
    cfg = load_config(p)
    scan2, _ = _scan_for(cfg, 0, cfg["reflection"][0], {})
    assert scan2.instrument.detector == scan.instrument.detector


BAD = [
    ("empty repeats", "frames = []", "angles", [r"reflection\[0\]\.frames", "expected a frames source"]),
    ("missing dataset", 'frames = "raw/master.h5#/entry/data/nothing"', None,
     [r"master\.h5", "/entry/data/nothing", "dataset not found"]),
    ("SPEC scan", 'frames = "raw/master.h5#/entry/data/data"\nspec = { file = "run.spec", scan = 43 }', None,
     [r"run\.spec", "scan 43", r"expected one of the scan numbers \[42\]"]),
    ("monitor length", 'frames = "raw/master.h5#/entry/data/data"\nmonitor = "raw/positions.h5#/monitor_short"',
     "angles", [r"positions\.h5", "monitor_short", "expected a scalar or 48 values"]),
    ("filter", 'frames = "raw/odd.h5#/data"', "angles", [r"odd\.h5", "/data", "not available"]),
    ("roi", 'frames = "raw/master.h5#/entry/data/data"\nroi = [120, 150]', "angles",
     [r"pipeline\.toml", r"reflection\[0\]\.roi", "expected inside the 150 × 170 detector"]),
    ("jitter", 'frames = "raw/master.h5#/entry/data/data"', "jitter",
     [r"reflection\[0\]\.angles\.eta", "frame\\(s\\) 7 ", "expected a uniform rocking step"]),
]


@pytest.mark.parametrize("case,reflection,angles,expect", BAD, ids=[b[0] for b in BAD])
def test_bad_input_is_named_with_exit_code_2(tmp_path, cube, capsys, case, reflection, angles, expect):
    _write_hdf5_beamline(cube, tmp_path / "raw")
    _spec_file(tmp_path / "run.spec", cube)
    with h5py.File(tmp_path / "raw" / "odd.h5", "w") as f:  # a filter no library registers (32099, unassigned)
        d = f.create_dataset("data", shape=(48, 150, 170), dtype="u4", chunks=(1, 150, 170), compression=32099,
                             allow_unknown_filter=True)
        d.id.write_direct_chunk((0, 0, 0), b"\x00" * (150 * 170 * 4))
    s = cube["scan"]
    if angles:
        ang = {c: np.asarray(s.angles[c]).tolist() for c in CIRCLES}
        if angles == "jitter":
            step = float(np.mean(np.diff(ang["eta"])))
            ang["eta"][7] += 0.3 * step  # 30 % of the step
        reflection += "\nangles = { " + ", ".join(f"{c} = {v!r}" for c, v in ang.items()) + " }"
    p = tmp_path / "pipeline.toml"
    p.write_text(HEAD.format(reflection=reflection))
    out = tmp_path / "out"
    out.mkdir()
    (out / "earlier.txt").write_text("kept")
    assert main(["inspect", str(p), "--reflection", "r"]) == 2
    err = capsys.readouterr().err
    for pattern in expect:
        assert re.search(pattern, err), (pattern, err)
    assert (out / "earlier.txt").read_text() == "kept"


def test_inspect_a_pipeline_reflection_and_a_frames_file(tmp_path, cube, capsys):
    _write_hdf5_beamline(cube, tmp_path / "raw")
    _spec_file(tmp_path / "run.spec", cube)
    p = tmp_path / "pipeline.toml"
    p.write_text(HEAD.format(reflection='frames = "raw/master.h5#/entry/data/data"\n'
                                        'spec = { file = "run.spec", scan = 42 }\nmonitor = "mon"'))
    assert main(["inspect", str(p), "--reflection", "r"]) == 0
    text = capsys.readouterr().out
    for s in ("48 frames of 150 × 170", "compression bitshuffle", "(external link)", "run.spec scan 42",
              "monitor", "step", "read-back deviation", "crop choice (given)"):
        assert s in text, (s, text)
    # read-back jitter of 6 % of the step at frame 3 (the typed angles override the SPEC file's)
    eta = [float(v) for v in cube["scan"].angles["eta"]]
    eta[3] += 0.06 * float(np.mean(np.diff(eta)))
    p.write_text(HEAD.format(reflection='frames = "raw/master.h5#/entry/data/data"\n'
                                        'spec = { file = "run.spec", scan = 42 }\nmonitor = "mon"\n'
                                        f'angles = {{ eta = {eta!r} }}'))
    assert main(["inspect", str(p), "--reflection", "r"]) == 0
    text = capsys.readouterr().out
    assert re.search(r"largest \+[0-9.e-]+° at frame 3 \(5\.\d% of the step\)", text), text
    assert "deviation per frame, % of the step: " in text
    assert main(["inspect", str(tmp_path / "raw" / "master.h5") + "#/entry/data/data"]) == 0
    text = capsys.readouterr().out
    assert "HDF5" in text and "bitshuffle" in text and "48 frames" in text
