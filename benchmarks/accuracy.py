"""Benchmark: the whole chain against the simulator's truth over a matrix of conditions.

Every condition (braggstrain/simulate/conditions.py: what it changes from
the base case, its strain target and why) is simulated, run through the
whole pipeline (``braggstrain run`` semantics: the pipeline file's options,
defaults otherwise) and compared with the truth. One row per condition:
strain RMS error per component over the trusted voxels away from the
dislocation core, the six-component RMS (absolute, and relative: each
component's mean removed), its bias, the fraction of voxels within 1σ and
2σ, the support Dice with the truth, the Burgers vector right or wrong, the
line's median distance from the truth in voxels, the wall time. A condition
passes when its strain RMS is within its target, its line is found with the
right Burgers vector within 0.5 voxel and every component's 1σ coverage is
within 0.60–0.76. The last line is exactly

    conditions=<n> passed=<k> worst_strain_rms=<x> worst_line_voxels=<y> min_coverage_1sigma=<z>

Rows are appended to OUT/rows.jsonl and the table (``--table``, default
benchmarks/accuracy.md for the full matrix, OUT/accuracy.md for the reduced
one) is rewritten after every condition, so an interrupted run loses
nothing; ``--resume`` keeps the rows already in OUT/rows.jsonl (``--retry``
runs the conditions that stopped with an error again).

    python benchmarks/accuracy.py [--only NAME ...] [--size full|reduced] [--workers N]
                                  [--out DIR] [--table FILE] [--resume [--retry]] [--seed N]
                                  [--table-only]

Full size takes one to four minutes per condition on two cores.
"""

from __future__ import annotations

import argparse
import datetime
import json
import math
import os
import platform
import subprocess
import sys
import tempfile
import time
import traceback
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
COMPONENTS = ("xx", "yy", "zz", "yz", "xz", "xy")

#: what fails and why, with the open issue that covers it (written after a
#: full run; the table prints them under the rows). COVERAGE: every row that
#: fails on coverage alone.
def coverage_note(rows):
    """The note of the rows that fail on coverage alone, with the ranges measured in them."""
    parts = []
    for k in COMPONENTS:
        v = [r["coverage_1sigma"][k] for r in rows]
        parts.append(f"{k} {min(v):.2f}–{max(v):.2f} (below 0.60 in {sum(x < 0.60 for x in v)}, above 0.76 in "
                     f"{sum(x > 0.76 for x in v)})")
    mean_err = {k: float(np.mean([r["strain_rms"][k] for r in rows])) for k in COMPONENTS}
    worst = max(mean_err, key=mean_err.get)
    text = ("σ coverage (issue 12 §3, error bars that hold; issue 21 for three reflections): the strain and line "
            f"criteria hold, the 1σ coverage does not. Within 1σ over these {len(rows)} rows: " + ", ".join(parts)
            + f". The largest error is in {worst} (mean RMS {mean_err[worst]:.1e})")
    if worst == "zz":
        text += (": ε_zz holds the interface gradient (2·10⁻³ over 25 nm, two voxels), which the "
                 "reconstruction's resolution smooths alike in every random start and replica, so a σ built from "
                 "their spread cannot hold all of that error")
    return text + "."


#: rows whose coverage fails for a reason of their own (their NOTES say it)
OWN_COVERAGE_REASON = {"distance_1pct"}
_COHERENCE_NAN_FIXED = (
    "runs to the end since commit 765e86f: before it the pipeline stopped in the spread step, a Poisson replica "
    "phased with the partial-coherence kernel holding NaN (the single-precision blurred model rounded to 0 "
    "where the model is weak, and the replica's modulus step divided by it; the blurred model is now held to "
    "its exact lower bound k(0)·|Ψ|², docs/phasing.md).")
NOTES = {
    "coherence_0.5": _COHERENCE_NAN_FIXED,
    "coherence_aniso": _COHERENCE_NAN_FIXED + " The kernel's axes are turned 0.5 rad from the array's.",
    "coherence_1.0": (
        "runs to the end since the partial-coherence merge (issue 18, `[phasing] coherence = \"auto\"`): before "
        "it the pipeline stopped at registration, the (0 0 2) support overlapping the reference's with Dice "
        "0.62 (the table at commit 8d1153e)."),
    "gap_near_peak": (
        "runs to the end since commit cfb98e6: before it prepare refused the data, the module gap 8 columns "
        "beside the (1 1 1) peak dragging the oversampling estimate along columns to its cap 1.95 and the check "
        "of `[prepare] bin = [1, 2, 2]` failing. The masked voxels are now extrapolated so that the "
        "autocorrelation stays compact (docs/methods.md); the estimate reads 3.40 there (4.94 with the gap 22 "
        "columns away), still low but above 2."),
    "distance_1pct": (
        "the 1 % distance error shows as a uniform bias (the bias columns: a few 10⁻⁵ on the diagonal), which σ "
        "does not include: it is a calibration error, not noise, hence the low coverage. Not a fault of the "
        "chain: absolute strain needs a calibrated geometry (README, Cautions); the relative column is the "
        "error with each component's mean removed."),
    "twin": (
        "the base case's counts bit for bit with the truth point-inverted: the same reconstruction as the base "
        "case, compared with the truth under the opposite twin relation (the Dice column says which), and the "
        "same numbers: the twin bookkeeping of the comparison, the lines and the Burgers vector holds."),
}


def machine():
    cpu = platform.processor() or platform.machine()
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                cpu = line.split(":", 1)[1].strip()
                break
    except OSError:
        pass
    load = os.getloadavg() if hasattr(os, "getloadavg") else (float("nan"),) * 3
    import numpy

    return (f"{platform.node()}: {cpu}, {os.cpu_count()} cores, {platform.system()} {platform.release()}, "
            f"Python {platform.python_version()}, numpy {numpy.__version__}; load average at start "
            f"{load[0]:.1f}")


def commit(own=()):
    """The short commit hash, with "+changes" when the work tree differs from
    it in files other than ``own`` (the table this run writes)."""
    try:
        head = subprocess.run(["git", "-C", str(ROOT), "rev-parse", "--short", "HEAD"], capture_output=True,
                              text=True, check=True).stdout.strip()
        dirty = subprocess.run(["git", "-C", str(ROOT), "status", "--porcelain", "--untracked-files=no"],
                               capture_output=True, text=True, check=True).stdout.splitlines()
        own = {Path(p).resolve() for p in own}
        dirty = [line for line in dirty if (ROOT / line[3:].strip()).resolve() not in own]
        return head + ("+changes" if dirty else "")
    except (OSError, subprocess.CalledProcessError):
        return "unknown"


def fmt(x, spec=".1e"):
    if x is None or (isinstance(x, float) and math.isnan(x)):
        return "–"
    if isinstance(x, float) and math.isinf(x):
        return "∞"
    return format(x, spec)


def line_text(row):
    ln = row["line"]
    if not ln["found"]:
        return "not found", "–"
    return ("right" if ln["burgers_right"] else "WRONG"), fmt(ln["median_voxels"], ".2f")


def summary(rows, verdict):
    done = [r for r in rows if "error" not in r]
    passed = sum(verdict(r)[0] for r in done)
    worst_strain = max((r["strain_rms_all"] for r in done), default=float("nan"))
    worst_line = max((r["line"]["median_voxels"] for r in done), default=float("nan"))
    cov = [v for r in done for v in r["coverage_1sigma"].values() if v == v]
    min_cov = min(cov, default=float("nan"))
    wl = "inf" if math.isinf(worst_line) else f"{worst_line:.2f}"
    return (f"conditions={len(rows)} passed={passed} worst_strain_rms={worst_strain:.2e} "
            f"worst_line_voxels={wl} min_coverage_1sigma={min_cov:.2f}")


def row_line(r, verdict):
    if "error" in r:
        return f"{r['name']:18s} ERROR {r['error']}"
    ok, crit = verdict(r)
    b, d = line_text(r)
    return (f"{r['name']:18s} rms " + " ".join(f"{fmt(r['strain_rms'][k])}" for k in COMPONENTS)
            + f" | all {fmt(r['strain_rms_all'])} (target {fmt(r['target'])}, relative {fmt(r['relative_rms_all'])})"
            + f" | bias " + " ".join(fmt(r['bias'][k], "+.0e") for k in COMPONENTS)
            + f" | 1σ " + " ".join(fmt(r['coverage_1sigma'][k], ".2f") for k in COMPONENTS)
            + f" | 2σ " + " ".join(fmt(r['coverage_2sigma'][k], ".2f") for k in COMPONENTS)
            + f" | Dice {r['dice']:.2f} | b {b} | line {d} vox | {r['seconds']:.0f} s | "
            + ("PASS" if ok else "fail: " + ", ".join(k for k, v in crit.items() if not v)))


def _by_commit(rows, meta):
    out = {}
    for r in rows:
        out.setdefault(r.get("commit", meta["commit"]), []).append(r["name"])
    return out


def write_table(path, rows, meta, conditions, verdict, final):
    from braggstrain.simulate.conditions import COVERAGE_1SIGMA, LINE_VOXELS

    L = [f"# Accuracy matrix ({meta['size']}" + (f", seeds +{meta['seed']}" if meta.get("seed") else "") + ")", "",
         f"Written by `benchmarks/accuracy.py` ({meta['command']}), started at commit {meta['commit']}; "
         "rows by commit: " + "; ".join(f"{c}: {', '.join(n)}" for c, n in _by_commit(rows, meta).items()) + ".", "",
         f"- started {meta['started']}, " + (f"finished {meta['finished']}" if final else
                                             f"**not finished**: {len(rows)} of {len(conditions)} conditions done"),
         f"- machine: {meta['machine']}",
         f"- workers: {meta['workers']}", "",
         "Strain errors are RMS over the trusted voxels (support eroded by one voxel, three voxels around "
         "the dislocation core left out) against the simulator's truth; *all* is the RMS over the six "
         "components, *relative* the same with each component's mean removed (the error of relative "
         "strain), *bias* the mean error. Coverage: the fraction of those voxels within 1σ and 2σ of the "
         "truth (calibrated 0.68 / 0.95). Dice: the support's overlap with the truth, *(twin)* where the "
         "result is the point-inverted crystal. The line: the nearest found line's median distance from the true "
         "line, voxels. A condition passes when *all* ≤ its target, the line is found with the right Burgers "
         f"vector within {LINE_VOXELS} voxel, and every component's 1σ coverage is within "
         f"{COVERAGE_1SIGMA[0]:.2f}–{COVERAGE_1SIGMA[1]:.2f}.", "",
         "| condition | RMS xx yy zz yz xz xy (10⁻⁴) | all | target | relative | bias xx yy zz yz xz xy (10⁻⁴) "
         "| within 1σ | within 2σ | Dice | b | line (vox) | time (s) | verdict |",
         "| --- | --- | --- | --- | --- | --- | --- | --- | --- | --- | --- | --- | --- |"]
    for r in rows:
        if "error" in r:
            L.append(f"| {r['name']} | ERROR: {r['error']} | | | | | | | | | | | fail |")
            continue
        ok, crit = verdict(r)
        b, d = line_text(r)
        L.append("| " + " | ".join([
            r["name"],
            " ".join(f"{r['strain_rms'][k] * 1e4:.1f}" for k in COMPONENTS),
            fmt(r["strain_rms_all"]), fmt(r["target"]), fmt(r["relative_rms_all"]),
            " ".join(f"{r['bias'][k] * 1e4:+.1f}" for k in COMPONENTS),
            " ".join(fmt(r["coverage_1sigma"][k], ".2f") for k in COMPONENTS),
            " ".join(fmt(r["coverage_2sigma"][k], ".2f") for k in COMPONENTS),
            f"{r['dice']:.2f}" + (" (twin)" if r.get("twin") else ""), b, d, f"{r['seconds']:.0f}",
            "pass" if ok else "fail: " + ", ".join(k for k, v in crit.items() if not v)]) + " |")
    L += ["", "```", summary(rows, verdict), "```", "", "## The conditions, their targets and why", "",
          "| condition | what differs from the base case | strain target | why |", "| --- | --- | --- | --- |"]
    for c in conditions:
        L.append(f"| {c.name} | {c.what} | {c.target:.1e} | {c.why} |")
    notes = [(r["name"], NOTES[r["name"]]) for r in rows if r["name"] in NOTES]
    coverage_only = [r for r in rows if "error" not in r and r["name"] not in OWN_COVERAGE_REASON
                     and verdict(r)[1] == {"strain": True, "line": True, "coverage": False}]
    if notes or coverage_only:
        L += ["", "## What fails and why", ""]
        if coverage_only:
            L.append(f"- **{', '.join(r['name'] for r in coverage_only)}**: {coverage_note(coverage_only)}")
        L += [f"- **{n}**: {t}" for n, t in notes]
    L.append("")
    tmp = Path(str(path) + ".tmp")
    tmp.write_text("\n".join(L))
    tmp.replace(path)


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--only", nargs="+", metavar="NAME", help="run only these conditions")
    ap.add_argument("--size", choices=("full", "reduced"), default="full",
                    help="full: demo-sized crystals; reduced: the test suite's small crystal, 48³ crops")
    ap.add_argument("--workers", type=int, default=None, help="phasing worker processes (default: all cores)")
    ap.add_argument("--out", default=None, help="work folder (default: a temporary one)")
    ap.add_argument("--table", default=None, help="markdown table to write")
    ap.add_argument("--resume", action="store_true", help="keep the rows already in OUT/rows.jsonl")
    ap.add_argument("--retry", action="store_true", help="with --resume: run again the conditions that stopped "
                                                         "with an error")
    ap.add_argument("--table-only", action="store_true",
                    help="rewrite the table from OUT/rows.jsonl and run nothing (a run still going or cut short)")
    ap.add_argument("--seed", type=int, default=0, help="added to the simulation's and phasing's seeds "
                                                          "(another draw of the noise and random starts)")
    args = ap.parse_args(argv)
    from braggstrain.simulate.conditions import by_name, run_condition, verdict

    conds = by_name(args.only)
    out = Path(args.out or tempfile.mkdtemp(prefix="braggstrain-accuracy-"))
    out.mkdir(parents=True, exist_ok=True)
    table = Path(args.table) if args.table else (ROOT / "benchmarks" / "accuracy.md" if args.size == "full"
                                                 else out / "accuracy.md")
    rows_path = out / "rows.jsonl"
    previous = {}
    if (args.resume or args.table_only) and rows_path.exists():
        for line in rows_path.read_text().splitlines():
            r = json.loads(line)
            if r.get("size") == args.size and r.get("seed", 0) == args.seed and not (args.retry and "error" in r):
                previous[r["name"]] = r  # the last row of a condition counts
    elif rows_path.exists():
        rows_path.unlink()
    meta = {"size": args.size, "seed": args.seed, "commit": commit(own=[table]), "machine": machine(), "workers": args.workers or os.cpu_count(),
            "started": datetime.datetime.now(datetime.timezone.utc).strftime("%Y-%m-%d %H:%M UTC"),
            "command": "python benchmarks/accuracy.py " + " ".join(argv if argv is not None else sys.argv[1:])}
    meta_path = out / "meta.json"
    if (args.resume or args.table_only) and meta_path.exists():  # the run goes on: when, where and at which commit it started
        old = json.loads(meta_path.read_text())
        if old.get("size") == args.size and old.get("seed", 0) == args.seed:
            meta.update({k: old[k] for k in ("commit", "machine", "workers", "started", "command", "finished")
                         if k in old})
            if args.resume and not meta["command"].endswith("(then --resume)"):
                meta["command"] += " (then --resume)"
    if not args.table_only:
        meta_path.write_text(json.dumps(meta))
    else:
        done = [previous[c.name] for c in conds if c.name in previous]
        if "finished" not in meta and rows_path.exists():  # a run before the time was recorded: its last row
            meta["finished"] = datetime.datetime.fromtimestamp(rows_path.stat().st_mtime, datetime.timezone.utc
                                                               ).strftime("%Y-%m-%d %H:%M UTC")
        write_table(table, done, meta, conds, verdict, final=len(done) == len(conds))
        print(summary(done, verdict), flush=True)
        return
    print(f"accuracy matrix, {args.size}: {len(conds)} conditions in {out}; table {table}", flush=True)
    rows = []
    for c in conds:
        if c.name in previous:
            r = previous[c.name]
        else:
            t0 = time.perf_counter()
            try:
                r = run_condition(c, out / c.name, size=args.size, workers=args.workers, seed=args.seed)
            except Exception as e:  # a condition that breaks the chain is a row too
                r = {"name": c.name, "size": args.size, "error": f"{type(e).__name__}: {e}".replace("\n", " ")[:400],
                     "seconds": time.perf_counter() - t0}
                traceback.print_exc()
            r["commit"] = commit(own=[table])
            with open(rows_path, "a", encoding="utf-8") as fh:
                fh.write(json.dumps(r) + "\n")
        rows.append(r)
        print(row_line(r, verdict), flush=True)
        write_table(table, rows, meta, conds, verdict, final=False)
    meta["finished"] = datetime.datetime.now(datetime.timezone.utc).strftime("%Y-%m-%d %H:%M UTC")
    meta_path.write_text(json.dumps(meta))
    write_table(table, rows, meta, conds, verdict, final=True)
    print(summary(rows, verdict), flush=True)


if __name__ == "__main__":
    main()
