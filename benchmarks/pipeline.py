"""Benchmark: the demo end to end (simulate, then the whole pipeline).

Prints the stage timings, the accuracy versus the simulator's truth, and as
its last line

    wall_s=<t> phasing_share=<p>

where wall_s is the pipeline's wall time (simulation excluded) and
phasing_share the fraction of it spent inside phase-retrieval ensembles.

    python benchmarks/pipeline.py [--out DIR] [--workers N]
"""

from __future__ import annotations

import argparse
import tempfile
import time
from pathlib import Path


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--out", default=None, help="output folder (default: a temporary one)")
    ap.add_argument("--workers", type=int, default=None)
    args = ap.parse_args()
    from braggstrain.config import load_config
    from braggstrain.simulate.demo import compare_to_truth, simulate_experiment
    from braggstrain.pipeline import run_pipeline

    out = Path(args.out or tempfile.mkdtemp(prefix="braggstrain-bench-"))
    demo = Path(__file__).resolve().parents[1] / "pipelines" / "demo.toml"
    t0 = time.perf_counter()
    sim = simulate_experiment(load_config(demo), out, log=None)
    t_sim = time.perf_counter() - t0
    cfg = load_config(sim["pipeline"])
    res = run_pipeline(cfg, out, workers=args.workers, progress=False, log=print)
    print(f"simulation: {t_sim:.1f} s (not counted)")
    for k, v in res["timings"].items():
        print(f"{k:10s} {v:8.1f} s")
    print(compare_to_truth(res["results"], out / "truth.h5"))
    print(f"wall_s={res['wall_s']:.1f} phasing_share={res['phasing_share']:.3f}")


if __name__ == "__main__":
    main()
