"""Benchmark: are the error bars calibrated? The demo crystal at two count levels.

For each peak count (default 1e5 and 1e4) the demo experiment (a Pt crystal
with a substrate interface gradient and one dislocation, four reflections) is
simulated, the whole pipeline is run, and then run again on its first three
reflections (reusing the phasing checkpoints). For every strain component it
prints the fraction of trusted voxels, away from the dislocation core, whose
error against the simulator's truth is within one and two reported σ, and a
verdict against the targets 0.60–0.76 (1σ) and 0.90–0.98 (2σ). Its last line
is

    coverage_ok=<passed>/<checked>

    python benchmarks/error_bars.py [--out DIR] [--counts 1e5 1e4] [--workers N]
"""

from __future__ import annotations

import argparse
import re
import tempfile
from pathlib import Path

ONE = (0.60, 0.76)
TWO = (0.90, 0.98)


def three_reflections(text):
    """The pipeline text without its last [[reflection]] table."""
    parts = text.split("[[reflection]]")
    last = parts[-1]
    rest = last[last.index("\n["):] if "\n[" in last else ""
    return "[[reflection]]".join(parts[:-1]) + rest


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--out", default=None, help="output folder (default: a temporary one)")
    ap.add_argument("--counts", type=float, nargs="+", default=[1e5, 1e4])
    ap.add_argument("--workers", type=int, default=None)
    args = ap.parse_args()
    from braggstrain.config import load_config
    from braggstrain.pipeline import run_pipeline
    from braggstrain.simulate.demo import compare_to_truth, simulate_experiment

    root = Path(args.out or tempfile.mkdtemp(prefix="braggstrain-coverage-"))
    demo = (Path(__file__).resolve().parents[1] / "braggstrain" / "data" / "demo.toml").read_text()
    checked = passed = 0
    for counts in args.counts:
        out = root / f"counts_{counts:.0e}"
        out.mkdir(parents=True, exist_ok=True)
        text = re.sub(r"(?m)^peak_counts\s*=.*$", f"peak_counts = {counts:g}", demo)
        text += "\n[output]\nvtk = false\nfigures = false\nreport = false\n"
        (out / "input.toml").write_text(text)
        sim = simulate_experiment(load_config(out / "input.toml"), out, log=None)
        (out / "three.toml").write_text(three_reflections(Path(sim["pipeline"]).read_text()))
        for label, cfg_path in (("4 reflections", sim["pipeline"]), ("3 reflections", out / "three.toml")):
            res = run_pipeline(load_config(cfg_path), out / "run", resume=True, workers=args.workers,
                               progress=False, log=None)
            cmp = compare_to_truth(res["results"], out / "truth.h5", as_text=False)
            print(f"peak counts {counts:.0e}, {label}: {cmp['coverage']['xx']['voxels']} trusted voxels; "
                  f"{res['results'].tensor.uncertainty_basis}")
            print("  component   RMS error   median σ   within 1σ   within 2σ")
            for k, c in cmp["coverage"].items():
                ok = ONE[0] <= c["within_1sigma"] <= ONE[1] and TWO[0] <= c["within_2sigma"] <= TWO[1]
                checked += 1
                passed += ok
                print(f"  {k:9s}   {cmp['strain_rms'][k]:9.2e}   {c['median_sigma']:8.2e}   "
                      f"{c['within_1sigma']:9.3f}   {c['within_2sigma']:9.3f}   {'ok' if ok else 'OUT'}")
    print(f"targets: within 1σ {ONE[0]:.2f}–{ONE[1]:.2f}, within 2σ {TWO[0]:.2f}–{TWO[1]:.2f}")
    print(f"coverage_ok={passed}/{checked}")


if __name__ == "__main__":
    main()
