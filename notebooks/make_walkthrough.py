"""Writes walkthrough.ipynb (run once after editing the cells below).

    python notebooks/make_walkthrough.py
"""

from pathlib import Path

import nbformat as nbf

cells = []


def md(text):
    cells.append(nbf.v4.new_markdown_cell(text.strip()))


def code(text):
    cells.append(nbf.v4.new_code_cell(text.strip()))


md("""
# braggstrain walkthrough: from rocking scans to the strain tensor and dislocations

This notebook runs the whole job through the Python API on a small invented
crystal made by the project's simulator: a 150 nm platinum particle with one
60° dislocation, measured at four reflections. Every stage is a plain
function; the command-line pipeline (`braggstrain run`) wires the same
functions and adds checkpoints, figures and the report.

Sizes are small (48³ arrays, a short phasing plan) so the notebook runs in
about a minute on a laptop; real data want the default plan and more random
starts.
""")

code("""
import numpy as np
import matplotlib.pyplot as plt

from braggstrain.geometry.crystal import Crystal
from braggstrain.geometry.instrument import Circle, Detector, Diffractometer
from braggstrain.simulate import forward
from braggstrain.prepare import scan as prepare
from braggstrain.strain import frame
from braggstrain.strain import registration, tensor
from braggstrain.defects import lines as defects
from braggstrain.io.scans import Scan
from braggstrain.phasing import ensemble, PhasingStage
""")

md("""
## 1. The crystal and the diffractometer

Platinum from xrayutilities' database, oriented with [111] along the sample
z axis. A six-circle diffractometer (three sample circles, two detector
circles) and a 75 µm pixel detector at 0.25 m, at 9 keV.
""")

code("""
crystal = Crystal("Pt").oriented_by((1, 1, 1), (0, 0, 1), (1, -1, 0), (1, 0, 0))
det = Detector(shape=(96, 96), pixel_size=(75e-6, 75e-6), distance=0.25, direct_beam=(48.0, 48.0))
inst = Diffractometer([Circle("eta", "x+", (-10, 120)), Circle("chi", "y+", (-95, 95)), Circle("phi", "z-")],
                      [Circle("nu", "z-"), Circle("delta", "x+")], det, energy_kev=9.0)
hkls = [(1, 1, 1), (2, 0, 0), (0, 2, 0), (0, 0, 2)]
for h in hkls:
    print(h, f"d = {crystal.d_spacing(h):.4f} Å, 2θ = {np.degrees(2 * crystal.bragg_angle(h, 9.0)):.2f}°")
""")

md("""
## 2. Simulated measurement

A truncated octahedron flattened at the bottom, with a 60° dislocation
(b = ½[0 1 −1], line along [1 −1 0]); one rocking scan of 56 frames per
reflection, Poisson noise, a flat background and a few hot pixels.
""")

code("""
octa = np.array([[i, j, k] for i in (1, -1) for j in (1, -1) for k in (1, -1)], float)
cubef = np.vstack([np.eye(3), -np.eye(3)])
normals = np.vstack([octa, cubef]) @ crystal.U.T
dists = np.r_[np.full(8, 750 / np.sqrt(3)), np.full(6, 0.75 * 750)]
shape = forward.Polyhedron(np.vstack([normals, [0, 0, -1]]), np.r_[dists, 350.0])
xi = crystal.U @ crystal.A @ np.array([1.0, -1.0, 0.0])
b = crystal.burgers_to_sample([0.0, 0.5, -0.5])
field = forward.StraightDislocation([50.0, -80.0, 30.0], xi, b, poisson=0.39, core=1.0)

scans = []
for j, h in enumerate(hkls):
    g = crystal.g_sample(h)
    ang = inst.solve_bragg(g, free=["eta", "chi", "phi", "delta"], fixed={"nu": 0.0})
    M, _, _ = inst.linear_map(ang, "eta", 0.01, det.direct_beam)
    step = 1.4e-3 / (np.linalg.norm(M[:, 0]) / 0.01)
    sim = forward.simulate_scan(inst, crystal, h, shape, field, rocking_circle="eta", n_frames=56,
                                step_deg=step, free_circles=["eta", "chi", "phi", "delta"],
                                window=(56, 56), peak_counts=1e5, background=0.2, hot_pixels=3,
                                seed=10 + j, bragg_angles=ang)
    scans.append(Scan(frames=sim.frames, angles=sim.angles, rocking_circle="eta", instrument=inst,
                      mask=sim.mask, hkl=h, path=f"simulated {h}"))
fig, ax = plt.subplots(1, 4, figsize=(12, 3))
for a, s in zip(ax, scans):
    a.imshow(np.log10(1 + s.frames[28, 20:76, 20:76]), cmap="magma")
    a.set_title(f"{s.hkl}: central frame (log)")
    a.axis("off")
""")

md("""
## 3. Preparation, phase retrieval and the sample frame

`prepare_scan` masks hot pixels and gaps, removes the background and cuts a
48³ block around the peak; `ensemble` runs two random starts of a short
HIO → RAAR → ER plan and averages them; `frame.to_sample_frame` puts the
result on an orthonormal grid of the sample frame (the exact transform of
the detector-frame grid).
""")

code("""
plan = [PhasingStage("HIO", 160, 0.9, "shrinkwrap", 20, (3.0, 1.5), 0.15),
        PhasingStage("RAAR", 100, 0.8, "shrinkwrap", 20, (1.5, 1.0), 0.2),
        PhasingStage("ER", 40, None, "shrinkwrap", 20, (1.0, 1.0), 0.2)]
objects = []
for j, s in enumerate(scans):
    p = prepare.prepare_scan(s, crop=(48, 48, 48))
    ens = ensemble(p.intensity, p.mask, runs=2, keep=2, plan=plan, seed=100 + j, executor=None)
    so = frame.to_sample_frame(ens.obj, p, support=ens.support, g_vector=crystal.g_sample(s.hkl), ramp=ens.ramp)
    so.hkl = s.hkl
    objects.append(so)
    print(s.hkl, "oversampling", np.round(p.oversampling, 2), "voxel", np.round(so.voxel_size / 10, 1), "nm")
""")

md("""
## 4. Strain tensor and dislocations

`registration.register` brings the four reflections onto one grid (testing each
against its twin); `tensor.strain_tensor` solves the displacement gradient
per voxel by least squares; `defects.find_dislocations` follows the phase
vortices and solves the Burgers vector.
""")

code("""
reg = registration.register(objects)
G = np.array([o.g_vector for o in reg])
tf = tensor.strain_tensor([o.obj for o in reg], G, reg[0].voxel_size,
                          support=np.logical_and.reduce([o.support for o in reg]), labels=[str(h) for h in hkls])
print("condition number of the G set:", round(tf.condition_number, 2))
lines = defects.find_dislocations(reg, support=tf.support, crystal=crystal)  # the points on reg[0].grid
for d in lines:
    print("line: b =", d.burgers, f"character {d.character_deg:.0f}°, length {d.length / 10:.0f} nm, seen in", d.visible_in)
""")

code("""
k = tf.support.shape[2] // 2
fig, ax = plt.subplots(1, 3, figsize=(12, 3.5))
for a, (i, lab) in zip(ax, [(0, "xx"), (1, "yy"), (2, "zz")]):
    m = np.where(tf.support[:, :, k], tf.strain[i, i, :, :, k], np.nan)
    im = a.imshow(m.T, origin="lower", cmap="RdBu_r", vmin=-2e-3, vmax=2e-3)
    a.set_title(f"ε_{lab}, central xy slice")
    a.set_xlabel("x (voxels)"); a.set_ylabel("y (voxels)")
fig.colorbar(im, ax=ax, shrink=0.8, label="strain")
""")

md("""
The dislocation shows as the line of large strain across the slice. Run
`braggstrain demo out/` for the full-size demo with every figure, the
results file, ParaView files and the HTML report.
""")

nb = nbf.v4.new_notebook()
nb["cells"] = cells
nb["metadata"]["kernelspec"] = {"name": "python3", "display_name": "Python 3", "language": "python"}
nbf.write(nb, Path(__file__).with_name("walkthrough.ipynb"))
