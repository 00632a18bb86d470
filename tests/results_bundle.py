"""An invented results bundle for the tests of io/results, io/vtk and report/.

A platinum octahedron with one 60° dislocation and an interface strain
gradient (the project's simulator, invented for the tests), passed through
braggstrain.strain.tensor and braggstrain.defects.lines; the per-reflection
records are made up to fill every dataset of the layout.
"""

from __future__ import annotations


import h5py
import numpy as np

from braggstrain.simulate import forward as fw
from braggstrain.geometry.crystal import Crystal
from braggstrain.defects.lines import find_dislocations
from braggstrain.strain.objects import SampleObject
from braggstrain.strain.lattice import mean_lattice_strain
from braggstrain.strain.tensor import strain_tensor



N = 32



VS = np.array([10.0, 10.0, 10.0])



def _coherence(j):
    """An invented coherence estimate: a Gaussian kernel (the simulator's) on a
    q grid of 6·10⁻⁴ Å⁻¹ steps; the last reflection kept the coherent model."""
    from braggstrain.phasing.coherence import kernel_in_q

    if j == 3:
        k = np.zeros((9, 9, 9))
        k[4, 4, 4] = 1.0
        model = "coherent"
    else:
        k = fw.gaussian_coherence_kernel((1.0, 0.7, 0.5), (0.2, 0.1, 0.3), half_width=4)
        model = "partial"
    q = kernel_in_q(k, np.diag([6e-4, 6e-4, 7e-4]), spread=[0.05, 0.04, 0.03])
    return dict(model=model, kernel=k, widths=q["widths"], spread=q["spread"], axes=q["axes"],
                lengths=q["lengths"], widths_voxels=q["widths_voxels"], floor=6e-5,
                disagreement="principal width 1 is off" if j == 2 else "",
                choice=dict(metric="free_nll", coherent=3.2, partial=2.4 - 0.1 * j,
                            partial_widths_voxels=np.array([0.9, 0.6, 0.5])))


def _bundle():
    """An invented crystal: 28 nm Pt octahedron, [111] up, one ½[0 1 -1]
    dislocation along [1 -1 0], and a strain gradient under the base."""
    cr = Crystal("Pt").oriented_by((1, 1, 1), (0, 0, 1), (1, -1, 0), (1, 0, 0))
    shape = (N, N, N)
    coords = fw.grid_coordinates(shape, VS)
    sup = fw.octahedron(shape, VS, 280.0, rotation=cr.U)
    b = cr.U @ (cr.A @ np.array([0.0, 0.5, -0.5]))
    line = cr.U @ (cr.A @ np.array([1.0, -1.0, 0.0]))
    field = (fw.StraightDislocation(point=(10.0, -15.0, 5.0), line=line, burgers=b)
             + fw.InterfaceGradient(normal=(0, 0, -1), position=80.0, strain=2e-3, decay=40.0))
    u = field.displacement(coords)
    hkls = [(1, 1, 1), (2, 0, 0), (0, 2, 0), (0, 0, 2)]
    G = np.array([cr.g_sample(h) for h in hkls])
    objs = [fw.complex_object(sup, u, g) for g in G]
    tf = strain_tensor(objs, G, VS, support=sup, labels=hkls)
    lines = find_dislocations([SampleObject(o, VS, g, sup, hkl=h) for o, g, h in zip(objs, G, hkls)],
                              crystal=cr)
    c = tuple(n // 2 for n in shape)
    refl = []
    for j, (h, g, o) in enumerate(zip(hkls, G, objs)):
        ug = np.tensordot(g, u, axes=1) / np.linalg.norm(g)
        disp = np.where(sup, ug - ug[c], np.nan).astype(np.float32)
        q = np.linspace(0.002, 0.06, 24)
        it = np.arange(300)
        q_cut = 0.03 + 0.005 * j
        refl.append(dict(
            name=f"pt_{''.join(map(str, h))}", hkl=h, g_vector=g, scan=f"scans/pt_{j}.h5",
            max_counts=2e5 / (j + 1), oversampling=(2.4, 2.6 + 0.1 * j, 3.1), runs=4, kept=2,
            run_metrics=[dict(run=k, nll=1.2 + 0.1 * k + 0.05 * j, free_nll=1.3 + 0.1 * k,
                              support_size=900 + k, sharpness=0.8 - 0.01 * k,
                              status="ok" if k < 3 else "support collapsed", kept=k < 2,
                              rank=k if k < 3 else -1)
                         for k in range(4)],
            prtf=dict(q=q, values=np.exp(-(q / q_cut) ** 2), resolution=2 * np.pi / q_cut),
            history=dict(amplitude_error=((0.5 + 0.1 * j) * np.exp(-it / (40.0 + 10 * j)) + 0.02).astype(np.float32),
                         support_size=(2000 - (2 + j) * np.minimum(it, 200)).astype(np.int64),
                         stage=(it >= 200).astype(np.int16), checkpoint=np.arange(0, 300, 50),
                         nll=np.linspace(3.0, 1.0 + 0.2 * j, 6)),
            amplitude=np.abs(o).astype(np.float32), phase=np.angle(o).astype(np.float32),
            displacement=disp, support=sup, shift_vox=(0.1 * j, -0.2, 0.05), twin=(j == 2),
            coherence=_coherence(j)))
    ml = mean_lattice_strain(G * (1 - 1e-3), G, lattice_parameter=3.9242)
    reg = dict(reference=0, shifts_voxels=[x["shift_vox"] for x in refl], twins=[x["twin"] for x in refl],
               overlap=[1.0, 0.97, 0.96, 0.95], twin_decided_by=["reference", "amplitude", "amplitude", "residual"])
    prov = dict(pipeline_text='[crystal]\nmaterial = "Pt"\n# <b>not html</b> & more\n',
                versions={"numpy": np.__version__, "h5py": h5py.__version__}, seeds={"phasing": 11},
                timings={"phase": 12.5, "tensor": 0.4}, command="braggstrain run demo.toml --out out",
                created="2026-01-01T00:00:00+00:00")
    return dict(grid=dict(voxel_size=VS, origin=(0.0, 0.0, 0.0), shape=shape), support=sup,
                amplitude=np.mean([x["amplitude"] for x in refl], axis=0), reflections=refl, tensor=tf,
                dislocations=lines, registration=reg, mean_lattice=ml, provenance=prov)
