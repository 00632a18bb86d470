"""The joint fit started at the simulator's exact truth: does it stay there?

The truth (the specimen's analytic shape and displacement field, sampled on
an isotropic sample-frame grid, no subdivision) is the start; the data are
the pipeline's prepared counts of the test suite's small scenario
(tests/conftest.py, invented numbers; simulated first with
``benchmarks/joint_accuracy.py``'s recipe into /tmp/joint_truth_start/s<counts>), or
Poisson counts of the joint model of the same truth (MODEL_DATA=1), or those
with a flat background of 0.2 counts added and the prepared estimate
subtracted and clipped at 0 as preparation does (MODEL_DATA=2). RESTORE=1
fits max(n, 0) + B where n > 0 (the raw counts when B < 1) with the
background B in the model (BG_MODEL=b: b in the model instead). Prints each reflection's NLL of the truth, the
fit's history every 5 iterations and the RMS strain error of the fit
against the truth (six components, crystal eroded by two voxels).

    [MODEL_DATA=1|2] [RESTORE=1] python benchmarks/joint_truth_start.py COUNTS ITERATIONS [VOXEL_A]
"""
import sys, time, numpy as np
ROOT = __import__("pathlib").Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT / "tests"))
from pathlib import Path
from braggstrain.config import load_config, build_crystal, build_specimen
from braggstrain.pipeline import prepare_options, _scan_for, _prepare_options
from braggstrain.prepare import scan as prp
from braggstrain.phasing.metrics import poisson_nll
from braggstrain.joint.model import FarField, measured_voxels
from braggstrain.joint.fit import joint_refine
from braggstrain.strain.grid import Grid
from scipy import ndimage

import os; MODEL_DATA = os.environ.get("MODEL_DATA") in ("1", "2"); BGMODE = os.environ.get("MODEL_DATA") == "2"; BG = 0.2; RESTORE = os.environ.get("RESTORE") == "1"; print("restore", RESTORE); print("bg mode", BGMODE); print("model-made data" if MODEL_DATA else "simulator data")
counts = float(sys.argv[1]); iters = int(sys.argv[2]); VOX = float(sys.argv[3]) if len(sys.argv) > 3 else 24.0
d = Path(f"/tmp/joint_truth_start/s{counts:g}")
if not (d / "sim" / "pipeline.toml").exists():
    from conftest import small_toml
    from test_pipeline import FAST, NO_FILES
    from braggstrain.simulate.demo import simulate_experiment
    d.mkdir(parents=True, exist_ok=True)
    (d / "small.toml").write_text(small_toml().replace("peak_counts = 1e5", f"peak_counts = {counts:g}") + FAST + NO_FILES)
    simulate_experiment(load_config(d / "small.toml"), d / "sim", log=None)
cfg = load_config(d / "sim" / "pipeline.toml")
cr = build_crystal(cfg); shape, field_, _ = build_specimen(cfg, cr)
popts = prepare_options(cfg)
N = int(2400 / VOX) // 2 * 2
grid = Grid((N, N, N), VOX, (0.0, 0.0, 0.0))
X = grid.coordinates()
dens = shape.density(X, edge_width=42.0)
sup = dens > 0
u = np.zeros_like(X); u[:, sup] = field_.displacement(X[:, sup])
data, G = [], []
for i, r in enumerate(cfg["reflection"]):
    scan = _scan_for(cfg, i, r, popts)[0]
    prep = prp.prepare_scan(scan, **_prepare_options(scan, popts))
    g = cr.reflection(r["hkl"], prep.instrument.energy_kev).g_sample
    mv = measured_voxels(prep, g, name=r["name"]); G.append(g)
    ff = FarField(grid, mv.q)
    I = np.abs(ff.forward(dens * np.exp(-1j * np.einsum("i,i...->...", g, u)))) ** 2
    I *= mv.counts.sum() / I.sum()
    if MODEL_DATA:
        nn = np.random.default_rng(10 + i).poisson(I + (BG if BGMODE else 0)).astype(float)
        if BGMODE:
            nn = np.maximum(nn - prep.background, 0.0)
        mv = type(mv)(counts=nn, q_sample=mv.q_sample, g_vector=g, name=mv.name, frames=mv.frames)
    if RESTORE:
        B = prep.background
        mv = type(mv)(counts=np.where(mv.counts > 0, mv.counts + B, 0.0), q_sample=mv.q_sample, g_vector=g, name=mv.name, frames=mv.frames,
                      background=float(os.environ.get("BG_MODEL", B)))
    data.append(mv)
    print(f"{r['name']}: NLL per voxel of the analytic truth (poisson_nll, best scale) {poisson_nll(mv.counts, np.maximum(I, 1e-3)):.3f}", flush=True)
G = np.array(G)
t0 = time.time()
res = joint_refine(data, grid, sup, dens, u, max_iterations=iters, subdivide=False, support_dilation=1,
                   progress=lambda it, a, b: print(f"  it {it} nll {a:.4f} free {b:.4f}", flush=True) if it % 5 == 0 else None)
print("fit", time.time() - t0, "s; best iteration", res.best_iteration, "nll before", np.round(res.nll_before, 3), "after", np.round(res.nll_after, 3))
core = ndimage.binary_erosion(dens > 0.5, iterations=2)
def strain(uu):
    D = np.stack([np.stack(np.gradient(uu[k], VOX)) for k in range(3)])  # D[i,j] = du_i/dx_j
    return 0.5 * (D + D.transpose(1, 0, 2, 3, 4))
e_t = strain(u)
du = res.displacement - u
du = np.nan_to_num(du)
# wrap-free: each reflection's phase difference, least squares for δu
ph = np.stack([np.angle(np.exp(-1j * np.einsum("i,i...->...", g, res.displacement - u))) for g in G])  # = -G·δu wrapped
du = -np.einsum("ij,j...->i...", np.linalg.pinv(G), np.nan_to_num(ph))
e_d = strain(du)
iu = np.triu_indices(3)
err = np.sqrt(np.mean([e_d[a, b][core] ** 2 for a, b in zip(*iu)]))
mag = np.sqrt(np.mean([e_t[a, b][core] ** 2 for a, b in zip(*iu)]))
print(f"core voxels {core.sum()}; RMS strain error of the fit (6 components) {err:.3e}; RMS true strain {mag:.3e}; "
      f"RMS phase error per reflection {np.round(np.sqrt(np.mean(ph[:, core] ** 2, axis=1)), 3)} rad")
