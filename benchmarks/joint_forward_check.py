"""The simulator's noise-free intensity of one reflection against the joint
model's intensity of the exact truth (the specimen's analytic shape, edge
width EDGE Å, and displacement, on an isotropic VOXEL Å sample-frame grid) at
the same detector voxels, at the exact per-pixel Q and at the linear map's q.
Prints the misfit (relative L2, correlation, the Poisson deviance per voxel
scaled to 10⁴ peak counts, centre of mass, profile ratios along each axis).
Test suite's small scenario (tests/conftest.py; invented numbers).

    python benchmarks/joint_forward_check.py [REFLECTION_INDEX] [VOXEL] [EDGE]
"""
import sys, numpy as np, time
ROOT = __import__("pathlib").Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT / "tests"))
from pathlib import Path
from conftest import small_toml
from braggstrain.config import load_config, build_crystal, build_instrument, build_specimen
from braggstrain.simulate import forward as fw
from braggstrain.joint.model import FarField, direct_far_field
from braggstrain.strain.grid import Grid

REFL = int(sys.argv[1]) if len(sys.argv) > 1 else 0
VOX = float(sys.argv[2]) if len(sys.argv) > 2 else 24.0
d = Path("/tmp/joint_forward_check"); d.mkdir(exist_ok=True, parents=True)
(d / "small.toml").write_text(small_toml())
cfg = load_config(d / "small.toml")
cr = build_crystal(cfg); ins = build_instrument(cfg); shape, field_, lines = build_specimen(cfg, cr)
sim = cfg["simulate"]; r = cfg["reflection"][REFL]
g = cr.reflection(r["hkl"], ins.energy_kev).g_sample
pk = sim["peak_pixel"] or ins.detector.direct_beam
ang = ins.solve_bragg(g, free=sim["free_circles"], fixed=sim["fixed_angles"], pixel=pk)
M, _, _ = ins.linear_map(ang, sim["rocking_circle"], 0.01, pk)
step = sim["rocking_q_step"] / (np.linalg.norm(M[:, 0]) / 0.01)

class NoNoise:
    def __init__(self, rng): self.rng = rng
    def poisson(self, lam): return lam
    def __getattr__(self, k): return getattr(self.rng, k)
orig = np.random.default_rng
fw.np.random.default_rng = lambda *a, **k: NoNoise(orig(*a, **k))
# uint32 cast would truncate: use large peak counts
sc = fw.simulate_scan(ins, cr, r["hkl"], shape, field_, rocking_circle=sim["rocking_circle"], n_frames=sim["frames"],
                      step_deg=step, free_circles=sim["free_circles"], fixed_angles=sim["fixed_angles"],
                      peak_pixel=sim["peak_pixel"], window=tuple(sim["window"]), peak_counts=1e9, background=0.0,
                      hot_pixels=0, coherence_sigma=sim["coherence_sigma"], coherence_rotation=sim["coherence_rotation"],
                      supersample=sim["supersample"], seed=0, bragg_angles=ang)
fw.np.random.default_rng = orig
print("refl", r["name"], r["hkl"], "coherence", sim["coherence_sigma"], "supersample", sim["supersample"])
F, W = sim["frames"], sim["window"]
_, pr, pc = sc.peak_pixel
r0, c0 = pr - W[1] // 2, pc - W[1] // 2
I_sim = sc.frames[:, r0:r0 + W[1], c0:c0 + W[1]].astype(float)
Mst, _, Rp = ins.linear_map(ang, sim["rocking_circle"], step, pk)
q_ex = np.asarray(ins.pixel_q(sc.angles, frame="sample", roi=(r0, r0 + W[1], c0, c0 + W[1])), float).reshape(3, F, W[1], W[1]) - g[:, None, None, None]
n = np.stack(np.meshgrid(np.arange(F) - F // 2, np.arange(W[1]) - (pr - r0), np.arange(W[1]) - (pc - c0), indexing="ij"))
q_lin = np.einsum("ij,j...->i...", Rp.T @ Mst, n)
dq = q_ex - q_lin
print("|q_exact - q_linear| max %.3g mean %.3g Å^-1; |q_lin| max %.3g" % (np.linalg.norm(dq, axis=0).max(), np.linalg.norm(dq, axis=0).mean(), np.linalg.norm(q_lin, axis=0).max()))
print("q at centre voxel exact", q_ex[:, F // 2, pr - r0, pc - c0], "linear", q_lin[:, F // 2, pr - r0, pc - c0])
# truth object on an isotropic sample-frame grid
N = int(np.ceil(2400 / VOX)) // 2 * 2
grid = Grid((N, N, N), VOX, (0.0, 0.0, 0.0))
X = grid.coordinates()
dens = shape.density(X, edge_width=float(sys.argv[3]) if len(sys.argv) > 3 else VOX)
u = np.zeros_like(X)
ins_ = dens > 0
u[:, ins_] = field_.displacement(X[:, ins_])
rho = dens * np.exp(-1j * np.einsum("i,i...->...", g, u))
M2, _, _ = ins.linear_map(ang, sim["rocking_circle"], step, pk); T = fw.detector_frame_grid(M2, tuple(v * sim["supersample"] for v in (F, W[0], W[1])))
print("sim voxel columns (Å)", np.round(np.linalg.norm(T, axis=0), 2), "edge", np.linalg.norm(T, axis=0).mean())
print("grid", N, VOX, "crystal voxels", int(ins_.sum()))
def model(q):
    ff = FarField(grid, q.reshape(3, -1))
    return np.abs(ff.forward(rho)) ** 2
def compare(tag, Im):
    Im = Im.reshape(I_sim.shape)
    m = I_sim > 1e-4 * I_sim.max()
    k = (I_sim[m] * Im[m]).sum() / (Im[m] ** 2).sum()
    Im = k * Im
    res = I_sim - Im
    rel = np.linalg.norm(res[m]) / np.linalg.norm(I_sim[m])
    c = np.corrcoef(I_sim[m], Im[m])[0, 1]
    def com(I):
        w = I / I.sum(); return np.array([(w * n[i]).sum() for i in range(3)])
    sc_ = 1e4 / I_sim.max(); nn = I_sim * sc_; mm = np.maximum(Im * sc_, 1e-12)
    dev = 2 * (mm - nn + np.where(nn > 0, nn * np.log(np.maximum(nn, 1e-300) / mm), 0))
    devf = dev.sum(axis=(1, 2)) / dev[0].size
    print(f"{tag}: Poisson deviance per voxel at 1e4 peak counts {dev.mean():.4f} (k={k:.4g}); per frame offset -20,-10,0,10,20: " + " ".join(f"{devf[F//2+o]:.3f}" for o in (-20,-10,0,10,20)))
    print(f"{tag}: rel L2 misfit {rel:.4f}, corr {c:.6f}; COM sim {np.round(com(I_sim),4)} model {np.round(com(Im),4)}")
    # misfit along each axis (fraction of |res|^2 by distance from centre along axis)
    for ax, name in enumerate(("frame", "row", "col")):
        other = tuple(a for a in range(3) if a != ax)
        num = (res ** 2).sum(axis=other); den = (I_sim ** 2).sum(axis=other)
        prof_s = I_sim.sum(axis=other); prof_m = Im.sum(axis=other)
        print(f"   {name}: ratio sum-model/sum-sim at offsets -20,-10,-5,0,5,10,20:",
              " ".join(f"{prof_m[F//2+o if ax==0 else (pr-r0 if ax==1 else pc-c0)+o]/prof_s[F//2+o if ax==0 else (pr-r0 if ax==1 else pc-c0)+o]:.3f}" for o in (-20,-10,-5,0,5,10,20)))
    return res
t = time.time()
I_lin = model(q_lin); compare("model at linear q", I_lin)
I_ex = model(q_ex); compare("model at exact q ", I_ex)
print("time", time.time() - t)
