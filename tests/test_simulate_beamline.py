"""`braggstrain simulate` writing a pipeline file's reflections in beamline
forms, and the pipeline reading them back (the small invented scenario of
conftest.py).

Checks against the simulator's own record (truth.h5 holds each reflection's
angles) and against the files' general-purpose readers (h5py, fabio,
xrayutilities' SPEC reader).
"""

import re

import h5py
import numpy as np

from braggstrain.cli import main
from braggstrain.config import load_config
from braggstrain.io.frames import describe_frames
from braggstrain.io.sources import read_spec_scan
from braggstrain.pipeline import _scan_for
from braggstrain.io.prepared import read_prepared

from conftest import small_toml

FORMS = [
    'frames = "raw/r0_master.h5#/entry/data/data"\nroi = [8, 8]\nrocking_circle = "eta"\n'
    'spec = { file = "raw/bt.spec", scan = 1 }\nmonitor = "mon"',
    'frames = "raw/r1/img_*.edf"\nrocking_circle = "eta"\nspec = { file = "raw/bt.spec", scan = 2 }\nmonitor = "mon"',
    'frames = "raw/r2_master.h5#/entry/data/data"\nrocking_circle = "eta"\n'
    'angles = { eta = "raw/pos.h5#/eta", chi = "raw/pos.h5#/chi", phi = "raw/pos.h5#/phi", nu = "raw/pos.h5#/nu", '
    'delta = "raw/pos.h5#/delta" }\nmonitor = "raw/pos.h5#/monitor"',
    'frames = ["raw/r3a_master.h5#/entry/data/data", "raw/r3b_master.h5#/entry/data/data"]\nrocking_circle = "eta"\n'
    'spec = [{ file = "raw/bt.spec", scan = 3 }, { file = "raw/bt.spec", scan = 4 }]\nmonitor = "mon"',
]


def test_simulate_writes_beamline_forms_and_the_pipeline_reads_them(tmp_path, capsys):
    text = small_toml()
    for i, form in enumerate(FORMS):
        text = text.replace(f'scan = "scans/r{i}.h5"', form)
    cfg_path = tmp_path / "beamline.toml"
    cfg_path.write_text(text)
    out = tmp_path / "sim"
    assert main(["-q", "simulate", str(cfg_path), "--out", str(out)]) == 0
    info = describe_frames(out / "raw" / "r0_master.h5", "/entry/data/data")
    assert info["external_link"] and "bitshuffle" in info["compression"] and info["shape"] == (80, 80)
    assert len(list((out / "raw" / "r1").glob("img_*.edf"))) == 56
    assert [read_spec_scan(out / "raw" / "bt.spec", n).n_points for n in (1, 2, 3, 4)] == [56] * 4
    cfg = load_config(out / "pipeline.toml")
    with h5py.File(out / "truth.h5") as f:
        rec = {n: f["reflections"][n].attrs["rocking_step_deg"] for n in f["reflections"]}
    for i in range(4):
        scan, _ = _scan_for(cfg, i, cfg["reflection"][i], {})
        step = float(np.mean(np.diff(scan.rocking_angles)))
        assert abs(step - rec[f"r{i}"]) < 1e-6 * abs(rec[f"r{i}"]) + 1e-8
        if i == 3:  # the second repeat drifted one detector row
            np.testing.assert_allclose(scan.extra["repeats"]["shifts"][1], [0, -1, 0], atol=0.1)
    assert main(["-q", "prepare", str(out / "pipeline.toml"), "--out", str(tmp_path / "prep")]) == 0
    files = sorted((tmp_path / "prep").glob("*_prepared.h5"))
    assert len(files) == 4
    assert all(read_prepared(f).intensity.ndim == 3 for f in files)
    capsys.readouterr()
    assert main(["inspect", str(out / "pipeline.toml"), "--reflection", "r3"]) == 0
    assert re.search(r"shifts \(frames, rows, columns\): \(\+0\.00, \+0\.00, \+0\.00\); \([+-]0\.0\d, -1\.0",
                     capsys.readouterr().out)
