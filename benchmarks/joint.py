"""Benchmark: the cost of one joint iteration against its non-uniform FFTs.

One evaluation of the joint likelihood and its gradient costs one forward
(type 2) and one adjoint (type 1) non-uniform FFT per reflection, plus
element-wise work. This script builds an invented crystal of four
reflections on a grid and point sets of the sizes given, times

* 2·J NUFFTs alone (J forward + J adjoint transforms of the same sizes),
* one evaluation of the objective (value and gradient),
* a short L-BFGS-B fit, per iteration (line searches included),

and prints as its last line

    iteration_over_2J_nufft=<r> evaluation_over_2J_nufft=<e>

With ``--demo`` it also runs the demo (``pipelines/demo.toml``) with
``[joint] enabled = true`` and appends ``joint_share=<s> phasing_share=<p>``:
the joint stage's and the independent phase retrieval's shares of the
pipeline's wall time (simulation excluded).

    python benchmarks/joint.py [--grid 48] [--points 350000] [--iterations 20] [--threads 1] [--demo]
"""

from __future__ import annotations

import argparse
import tempfile
import time
from pathlib import Path

import numpy as np


def _problem(n, points, seed=0):
    from braggstrain.joint.model import MeasuredVoxels
    from braggstrain.strain.grid import Grid

    rng = np.random.default_rng(seed)
    grid = Grid((n,) * 3, 10.0)
    X = grid.coordinates()
    r2 = sum((X[k] / (0.3 * n * 10.0)) ** 2 for k in range(3))
    support = r2 <= 1
    s = support.astype(float)
    u = np.stack([0.2 * np.sin(X[1] / 80.0), 0.2 * np.cos(X[2] / 90.0), 0.1 * np.sin(X[0] / 70.0)])
    G = 2 * np.pi / 3.92 * np.array([[1.0, 1.0, 1.0], [2.0, 0, 0], [0, 2.0, 0], [0, 0, 2.0]])
    data = []
    for g in G:
        q = rng.uniform(-np.pi, np.pi, (3, points)) / 10.0
        counts = rng.poisson(1.0, points).astype(float)
        data.append(MeasuredVoxels(counts=counts, q_sample=q + g[:, None], g_vector=g))
    return grid, support, s, u, G, data


def _best(fn, repeat):
    t = []
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn()
        t.append(time.perf_counter() - t0)
    return min(t)


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--grid", type=int, default=48, help="grid edge, voxels")
    ap.add_argument("--points", type=int, default=350_000, help="measured voxels per reflection")
    ap.add_argument("--iterations", type=int, default=20)
    ap.add_argument("--threads", type=int, default=1)
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--demo", action="store_true", help="also run the demo with [joint] enabled")
    args = ap.parse_args()
    from braggstrain.joint.fit import MODEL_FLOOR, _Objective, joint_refine
    from braggstrain.joint.model import FarField

    grid, support, s, u, G, data = _problem(args.grid, args.points)
    F = [FarField(grid, d.q, threads=args.threads) for d in data]
    rho = (s * np.exp(-1j * np.tensordot(G[0], u, axes=1))).astype(np.complex128)
    c = np.ones(args.points, np.complex128)

    def nuffts():
        for f in F:
            f.forward(rho)
            f.adjoint(c)

    t_nufft = _best(nuffts, args.repeat)
    work = [np.ones(d.size, bool) for d in data]
    obj = _Objective(data, F, support, G, work, MODEL_FLOOR, u[:, support])
    x = np.concatenate([s[support], np.zeros(3 * obj.n), np.full(len(G), -5.0)])
    t_eval = _best(lambda: obj(x), args.repeat)
    t0 = time.perf_counter()
    res = joint_refine(data, grid, support, s, u, max_iterations=args.iterations, held_out=0.0,
                       support_dilation=0, subdivide=False, threads=args.threads)
    t_fit = time.perf_counter() - t0
    per_it = t_fit / max(res.iterations, 1)
    print(f"grid {grid.shape}, {int(support.sum())} crystal voxels, {len(data)} reflections × {args.points} points, "
          f"{args.threads} thread(s)")
    print(f"2·J NUFFTs: {t_nufft * 1e3:.1f} ms; one evaluation: {t_eval * 1e3:.1f} ms; "
          f"one L-BFGS-B iteration: {per_it * 1e3:.1f} ms ({res.iterations} iterations, set-up included)")
    line = f"iteration_over_2J_nufft={per_it / t_nufft:.2f} evaluation_over_2J_nufft={t_eval / t_nufft:.2f}"
    if args.demo:
        from braggstrain.config import load_config
        from braggstrain.pipeline import run_pipeline
        from braggstrain.simulate.demo import compare_routes, simulate_experiment

        out = Path(tempfile.mkdtemp(prefix="braggstrain-joint-"))
        demo = Path(__file__).resolve().parents[1] / "pipelines" / "demo.toml"
        sim = simulate_experiment(load_config(demo), out, log=None)
        text = Path(sim["pipeline"]).read_text() + "\n[joint]\nenabled = true\n"
        Path(sim["pipeline"]).write_text(text)
        r = run_pipeline(load_config(sim["pipeline"]), out, progress=False, log=print)
        print(compare_routes(r["results"], out / "truth.h5"))
        line += (f" joint_share={r['timings'].get('joint', 0.0) / r['wall_s']:.3f} "
                 f"phasing_share={r['phasing_share']:.3f}")
    print(line)


if __name__ == "__main__":
    main()
