"""Accuracy of the joint refinement against the independent route.

Simulates the test suite's small scenario (tests/conftest.py: a 150 nm
platinum truncated octahedron with one dislocation, four reflections, a
0.25 m detector; invented numbers) at a chosen peak count, runs the pipeline
with the test suite's short phasing plan and ``[joint] enabled = true``, and
prints the comparison with the simulator's truth for both routes, ending with

    counts=<n> independent_rms=<a> joint_rms=<b> ratio=<b/a>

(RMS strain error over all six components, the same trusted voxels).

    python benchmarks/joint_accuracy.py --counts 1e4 --out DIR [--joint "max_iterations = 300"]

A second call with the same ``--out`` reuses every checkpoint before the
joint stage (``--resume``), so joint options can be compared cheaply.
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--counts", default="1e4", help="peak counts of the simulation")
    ap.add_argument("--out", required=True, help="work folder (kept, reused by later calls)")
    ap.add_argument("--joint", default="", help="extra [joint] lines, separated by ';'")
    args = ap.parse_args()
    sys.path.insert(0, str(ROOT / "tests"))
    from conftest import small_toml
    from test_pipeline import FAST, NO_FILES

    from braggstrain.config import load_config
    from braggstrain.pipeline import run_pipeline
    from braggstrain.simulate.demo import compare_routes, compare_to_truth, simulate_experiment

    d = Path(args.out)
    d.mkdir(parents=True, exist_ok=True)
    if not (d / "sim" / "pipeline.toml").exists():
        text = small_toml().replace("peak_counts = 1e5", f"peak_counts = {float(args.counts):g}")
        (d / "small.toml").write_text(text + FAST + NO_FILES)
        simulate_experiment(load_config(d / "small.toml"), d / "sim", log=None)
    text = (d / "sim" / "pipeline.toml").read_text() + "\n[joint]\nenabled = true\n"
    text += args.joint.replace(";", "\n") + "\n"
    (d / "sim" / "joint.toml").write_text(text)
    t0 = time.perf_counter()
    res = run_pipeline(load_config(d / "sim" / "joint.toml"), d / "out", resume=True, progress=False, log=print)
    print(f"pipeline {time.perf_counter() - t0:.0f} s; stages (s): "
          + ", ".join(f"{k} {v:.1f}" for k, v in res["timings"].items()))
    r = res["results"]
    print(compare_routes(r, d / "sim" / "truth.h5"))
    if r.tensor_independent is None:
        return
    a = compare_to_truth(r, d / "sim" / "truth.h5", as_text=False)
    b = compare_to_truth(r, d / "sim" / "truth.h5", as_text=False, tensor=r.tensor_independent)
    print(f"counts={float(args.counts):g} independent_rms={b['strain_rms_all']:.3e} "
          f"joint_rms={a['strain_rms_all']:.3e} ratio={a['strain_rms_all'] / b['strain_rms_all']:.2f}")


if __name__ == "__main__":
    main()
