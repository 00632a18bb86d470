"""Simulating the experiment a pipeline file describes (wiring only).

:func:`simulate_experiment` reads the ``[simulate]`` table through
:mod:`braggstrain.config`, calls :func:`braggstrain.simulate.forward.simulate_scan`
once per reflection, writes the scan files where the pipeline file expects
them, a copy of the pipeline file, and ``truth.h5``: the ground truth on a
sample-frame grid.

Layout of ``truth.h5`` (all in the sample frame; axes 0, 1, 2 along x, y, z;
origin at index n//2)::

    /                      attrs: format = "braggstrain-truth", format_version = 1
    /density               (nx, ny, nz) float32, filled fraction of each voxel
    /displacement          (3, nx, ny, nz) float32, Å
    /displacement_gradient (3, 3, nx, ny, nz) float32, D_ik = ∂u_i/∂x_k
    /strain                (3, 3, nx, ny, nz) float32
    /rotation              (3, nx, ny, nz) float32, rotation vector, rad
    /grid                  attrs voxel_size (Å, 3), origin (Å, 3)
    /reflections/NAME      attrs hkl, g_sample (Å⁻¹), angles (JSON), linear_map, peak_pixel
    /lines/K               attrs kind, point (Å), line (unit), burgers (lattice), burgers_sample (Å)
    /crystal               attrs material, U, lattice_parameters (Å)
"""

from __future__ import annotations

import json
import time
from pathlib import Path

import numpy as np

from braggstrain.simulate import forward as fw
from braggstrain.config import build_crystal, build_instrument, build_specimen
from braggstrain.errors import ConfigError, did_you_mean
from braggstrain.io.files import atomic_path, mark_version, open_versioned, write_atomic
from braggstrain.io.scans import write_scan
from braggstrain.strain.grid import Grid
from braggstrain.strain.components import STRAIN_COMPONENTS, STRAIN_PAIRS, split_gradient

__all__ = ["simulate_experiment", "truth_fields", "read_truth", "compare_to_truth", "compare_routes"]

TRUTH_FORMAT = "braggstrain-truth"
TRUTH_VERSION = 1


def truth_fields(shape, field_, grid_shape, voxel_size, origin=(0.0, 0.0, 0.0)):
    """Ground truth on a sample-frame grid (centred on ``origin``, Å): density, u, D, strain, rotation."""
    coords = Grid(grid_shape, voxel_size, origin).coordinates()
    dens = np.zeros(grid_shape, np.float64)
    s = 2
    offs = (np.arange(s) + 0.5) / s - 0.5
    vs = np.broadcast_to(np.asarray(voxel_size, float), (3,))
    for ox in offs:
        for oy in offs:
            for oz in offs:
                dens += shape.density(coords + (np.array([ox, oy, oz]) * vs)[:, None, None, None])
    dens /= s**3
    if field_ is None:
        u = np.zeros((3,) + tuple(grid_shape))
        D = np.zeros((3, 3) + tuple(grid_shape))
    else:
        u = field_.displacement(coords)
        D = field_.gradient(coords)
    eps, rot = split_gradient(D)
    return dens.astype(np.float32), u.astype(np.float32), D.astype(np.float32), eps.astype(np.float32), rot.astype(np.float32)


def simulate_experiment(cfg, out_dir, progress=None, log=print):
    """Simulate every reflection of a validated pipeline dict into ``out_dir``.

    Writes ``out_dir/<scan path of each reflection>`` (paths relative to the
    copied pipeline file), ``out_dir/pipeline.toml`` and ``out_dir/truth.h5``.

    Returns
    -------
    dict with the paths written and the seconds taken
    """
    import h5py

    t0 = time.perf_counter()
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    crystal = build_crystal(cfg)
    inst = build_instrument(cfg)
    shape, field_, lines = build_specimen(cfg, crystal)  # the truth
    scan_shape, scan_field = shape, field_
    if cfg["simulate"]["invert"]:
        # the twin conj ρ(−r) has exactly the intensity of ρ (docs/design.md): the scans are simulated
        # from the specimen as described, so they are the same counts bit for bit and a reconstruction's
        # twin relation to the truth is the opposite of the original's; only the truth is inverted
        scan_shape, scan_field, _ = build_specimen({**cfg, "simulate": {**cfg["simulate"], "invert": False}},
                                                   crystal)
    sim = cfg["simulate"]
    src = cfg.get("_source", "<pipeline>")
    rock_default = sim["rocking_circle"] or inst.sample_circles[0].name
    inst.circle(rock_default)
    names = [r["name"] for r in cfg["reflection"]]
    for k, v in sim["reflection_peak_counts"].items():
        if k not in names:
            raise ConfigError(f"{src}: key 'simulate.reflection_peak_counts.{k}': no reflection of that name"
                              f"{did_you_mean(k, names)}; expected one of {names}")
        if isinstance(v, bool) or not isinstance(v, (int, float)) or not v > 0:
            raise ConfigError(f"{src}: key 'simulate.reflection_peak_counts.{k}': expected positive peak counts, "
                              f"got {v!r}")
    free = sim["free_circles"]
    if not free:
        raise ConfigError(f"{src}: key 'simulate.free_circles': expected the circles solved for the Bragg condition")
    written = []
    refl_meta = {}
    for r in cfg["reflection"]:  # SPEC files are appended scan by scan: start them afresh
        for sp in (r["spec"] if isinstance(r["spec"], list) else [r["spec"]]):
            if sp is not None and not Path(sp["file"]).is_absolute() and ".." not in Path(sp["file"]).parts:
                (out / sp["file"]).unlink(missing_ok=True)
    rng = np.random.default_rng(sim["seed"])
    for i, r in enumerate(cfg["reflection"]):
        name = r["name"]  # checked and defaulted by the schema
        rock = r["rocking_circle"] or rock_default  # a reflection may be rocked about its own circle
        try:
            inst.circle(rock)
        except Exception as e:
            raise ConfigError(f"{src}: key 'reflection[{i}].rocking_circle': {e}") from None
        counts = float(sim["reflection_peak_counts"].get(name, sim["peak_counts"]))
        if r["scan"] is None and r["frames"] is None:
            raise ConfigError(f"{src}: key 'reflection[{i}].scan': expected the scan file to write (or 'frames' "
                              "in a beamline form)")
        rel = Path(r["scan"] if r["scan"] is not None else ".")
        if rel.is_absolute() or ".." in rel.parts:
            raise ConfigError(f"{src}: key 'reflection[{i}].scan': a simulated scan must stay inside the output "
                              f"folder; expected a relative path without '..', got {r['scan']!r}")
        try:
            refl = crystal.reflection(r["hkl"], inst.energy_kev)
        except Exception as e:
            raise ConfigError(f"{src}: key 'reflection[{i}].hkl': {e}") from None
        g = refl.g_sample
        # rocking step giving the requested q step per frame
        ang = inst.solve_bragg(g, free=free, fixed=sim["fixed_angles"],
                               pixel=sim["peak_pixel"] or inst.detector.direct_beam)
        M, _, _ = inst.linear_map(ang, rock, 0.01, sim["peak_pixel"] or inst.detector.direct_beam)
        dq_per_deg = np.linalg.norm(M[:, 0]) / 0.01
        step = sim["rocking_q_step"] / dq_per_deg
        seed = int(rng.integers(0, 2**31 - 1))
        n_rep = len(r["frames"]) if isinstance(r["frames"], list) else 1
        sims = []
        for k in range(n_rep):  # repeated scans: independent, peak_counts / n each, drifting k rows
            scan = fw.simulate_scan(inst, crystal, r["hkl"], scan_shape, scan_field, rocking_circle=rock,
                                    n_frames=sim["frames"], step_deg=step, free_circles=free,
                                    fixed_angles=sim["fixed_angles"], peak_pixel=sim["peak_pixel"],
                                    window=tuple(sim["window"]), peak_counts=counts / n_rep,
                                    background=sim["background"], hot_pixels=sim["hot_pixels"],
                                    coherence_sigma=sim["coherence_sigma"],
                                    coherence_rotation=sim["coherence_rotation"],
                                    supersample=sim["supersample"], seed=seed + k, bragg_angles=ang)
            if k:
                scan.frames = np.roll(scan.frames, k, axis=1)
            sims.append(scan)
        scan = sims[0]
        if r["scan"] is not None:
            path = out / rel
            write_scan(path, scan.frames, scan.angles, rock, inst, mask=scan.mask, hkl=r["hkl"],
                       material=crystal.name)
            written.append(path)
        else:
            from braggstrain.simulate.beamline import write_reflection_files

            files = write_reflection_files(out, r, i, sims, rock, np.random.default_rng(seed), src=src)
            path = files[0]
            written.append(path)
        refl_meta[name] = {"hkl": list(r["hkl"]), "g_sample": g.tolist(),
                           "angles": {k: (np.asarray(v).tolist()) for k, v in scan.angles.items()},
                           "bragg_angles": ang, "linear_map": scan.linear_map.tolist(),
                           "peak_pixel": list(scan.peak_pixel), "hot_pixels": scan.hot_pixels.tolist(),
                           "rocking_step_deg": step}
        if log:
            hot = np.asarray(scan.hot_pixels, int).reshape(-1, 2)
            signal = scan.frames.copy()
            signal[:, hot[:, 0], hot[:, 1]] = 0
            hot_txt = (f"{len(hot)} hot pixels (up to {int(scan.frames[:, hot[:, 0], hot[:, 1]].max())} counts)"
                       if len(hot) else "no hot pixels")
            log(f"  {name} {tuple(r['hkl'])}: {scan.frames.shape[0]} frames, "
                f"{rock} step {step:.4f}°, 2θ-circles "
                + ", ".join(f"{c.name}={ang[c.name]:.3f}°" for c in inst.detector_circles)
                + f", peak {int(signal.max())} counts, {hot_txt} → {path}")
        if progress is not None:
            progress.update(1)
    vs = sim["truth_voxel_nm"] * 10.0
    gs = tuple(sim["truth_shape"])
    offset = np.asarray(sim["offset_nm"], float) * 10.0  # the truth grid is centred on the specimen
    dens, u, D, eps, rot = truth_fields(shape, field_, gs, vs, offset)
    truth = out / "truth.h5"
    with atomic_path(truth) as tmp:
        with h5py.File(tmp, "w") as f:
            mark_version(f, TRUTH_FORMAT, TRUTH_VERSION)
            for k, v, unit in (("density", dens, "1"), ("displacement", u, "angstrom"),
                               ("displacement_gradient", D, "1"), ("strain", eps, "1"), ("rotation", rot, "rad")):
                d = f.create_dataset(k, data=v, compression="gzip")
                d.attrs["units"] = unit
            gg = f.create_group("grid")
            tg = Grid(gs, vs, offset)
            gg.attrs["voxel_size"] = tg.voxel_size
            gg.attrs["origin"] = tg.origin
            gg.attrs["axes"] = "x, y, z (sample frame)"
            gr = f.create_group("reflections")
            for name, m in refl_meta.items():
                h = gr.create_group(name)
                h.attrs["hkl"] = np.asarray(m["hkl"], int)
                h.attrs["g_sample"] = np.asarray(m["g_sample"])
                h.attrs["linear_map"] = np.asarray(m["linear_map"])
                h.attrs["peak_pixel"] = np.asarray(m["peak_pixel"])
                h.attrs["hot_pixels"] = np.asarray(m["hot_pixels"], int).reshape(-1, 2)
                h.attrs["bragg_angles"] = json.dumps(m["bragg_angles"])
                h.attrs["rocking_step_deg"] = m["rocking_step_deg"]
            gl = f.create_group("lines")
            for k, ln in enumerate(lines):
                h = gl.create_group(str(k))
                for key, val in ln.items():
                    h.attrs[key] = val if isinstance(val, str) else np.asarray(val, float)
            gc = f.create_group("crystal")
            gc.attrs["material"] = crystal.name
            gc.attrs["U"] = crystal.U
            gc.attrs["lattice_parameters"] = np.asarray(crystal.lattice_parameters)
    text = cfg.get("_text")
    if text:
        write_atomic(out / "pipeline.toml", text)
    return {"scans": written, "truth": truth, "pipeline": out / "pipeline.toml",
            "seconds": time.perf_counter() - t0}


def read_truth(path):
    """Read a truth file into a dict of arrays and metadata."""
    out = {}
    with open_versioned(path, TRUTH_FORMAT, TRUTH_VERSION) as f:
        for k in ("density", "displacement", "displacement_gradient", "strain", "rotation"):
            out[k] = f[k][()]
        out["voxel_size"] = f["grid"].attrs["voxel_size"]
        out["grid"] = Grid(out["density"].shape, f["grid"].attrs["voxel_size"],
                           f["grid"].attrs.get("origin", np.zeros(3)))
        out["reflections"] = {n: {k: (json.loads(v) if k == "bragg_angles" else v) for k, v in g.attrs.items()}
                              for n, g in f["reflections"].items()}
        out["lines"] = [dict(g.attrs) for _, g in sorted(f["lines"].items(), key=lambda kv: int(kv[0]))]
        out["U"] = f["crystal"].attrs["U"]
    return out


def _truth_on_grid(truth, grid, shift, invert):
    """Sample truth arrays at the result grid's voxels (sample frame, Å).

    A result voxel at r (its sample-frame position on ``grid``) is compared
    with the truth at r + shift, or at −r + shift for the twin
    (point-inverted) solution."""
    from scipy import ndimage

    r = grid.coordinates()
    if invert:
        r = -r
    r = r + np.asarray(shift, float).reshape(3, 1, 1, 1)
    idx = truth["grid"].index(r, axis=0)

    def samp(a):
        return ndimage.map_coordinates(a.astype(np.float64), idx, order=1, mode="constant", cval=0.0)
    return samp, r


def same_dislocation(b_found, xi_found, b_true, xi_true, twin=False):
    """True when a found (b, ξ) is the true dislocation.

    A Burgers vector is defined for a line direction (the circuit runs
    right-handed about ξ), so (b, ξ) and (−b, −ξ) are the same dislocation:
    b is compared after turning ξ_found to point along ξ_true. For the twin
    reconstruction (the point-inverted crystal, ρ'(r) = conj ρ(−r), so
    u'(r) = −u(−r)), a circuit right-handed about ξ gives −b: the found ξ
    is mapped to −ξ before the comparison.

    Parameters
    ----------
    b_found, b_true : 3 floats, lattice coordinates
    xi_found : (3,) or (M, 3) line direction(s) of the found line, result frame
    xi_true : 3 floats, the true line direction
    twin : bool, the result is the twin of the truth
    """
    xi = np.atleast_2d(np.asarray(xi_found, float))
    along = float(np.sum(xi @ np.asarray(xi_true, float)))
    if twin:
        along = -along
    if along == 0 or b_found is None:
        return False
    return bool(np.allclose(np.sign(along) * np.asarray(b_found, float), np.asarray(b_true, float), atol=1e-6))


def _coverage(estimate, truth, sigma, mask):
    """Fraction of ``mask`` voxels with |estimate − truth| ≤ σ and ≤ 2σ.

    A calibrated Gaussian one-σ holds 68.3 % and two-σ 95.4 % (any
    statistics text, e.g. Bevington & Robinson, Data Reduction and Error
    Analysis, 3rd ed., 2003, §2.3). Voxels without a finite σ are left out
    and counted in ``voxels`` only when they have one.
    """
    ok = mask & np.isfinite(sigma) & np.isfinite(estimate)
    n = int(ok.sum())
    if n == 0:
        return {"within_1sigma": float("nan"), "within_2sigma": float("nan"), "median_sigma": float("nan"),
                "voxels": 0}
    d = np.abs(estimate[ok] - truth[ok])
    s = sigma[ok]
    return {"within_1sigma": float(np.mean(d <= s)), "within_2sigma": float(np.mean(d <= 2 * s)),
            "median_sigma": float(np.median(s)), "voxels": n}


def compare_to_truth(results, truth_path, as_text=True, tensor=None):
    """Compare :class:`~braggstrain.io.results.Results` with the simulator's ground truth.

    The reconstruction has no absolute position and may be the twin of the
    crystal (its point inversion, with the same strain), so the truth is
    aligned to the result first: both orientations are tried, centres of mass
    matched and refined by phase correlation of the support
    (``skimage.registration.phase_cross_correlation``), and the orientation
    whose strain matches better kept (a nearly centrosymmetric shape cannot
    tell them apart). Reported: RMS error of each strain component over the trusted
    voxels (support eroded by one voxel, outside dislocation cores of three
    voxels), the truth's own RMS for scale, the distance of each found
    dislocation line from the true one (in voxels and nm; the lines' points
    and the crystal are both placed with the results' grid, so a grid whose
    origin is not zero is checked too) and the angle between their
    directions, and whether the Burgers vector is right (up to the joint
    sign of b and ξ), and the coverage of the error bars: per strain
    component, the fraction of trusted voxels (``tensor.trusted``, away
    from the cores) whose error is within one and two reported σ.

    ``tensor`` compares another TensorField on the same grid (e.g. the
    results' ``tensor_independent``) over the same voxels; default the
    results' own tensor.

    Returns text (``as_text``) or a dict of the numbers.
    """
    from skimage.registration import phase_cross_correlation

    from braggstrain.strain.fields import trusted_for_gradients

    truth = read_truth(truth_path)
    sup = np.asarray(results.tensor.support, bool)
    tf = results.tensor if tensor is None else tensor
    shape = sup.shape
    grid = results.grid
    vs = grid.voxel_size
    pos = grid.coordinates()
    com_r = np.array([pos[i][sup].mean() for i in range(3)])
    dens = truth["density"].astype(float)
    ct = truth["grid"].coordinates()
    com_t = np.array([np.sum(ct[i] * dens) / dens.sum() for i in range(3)])
    eps_r = np.asarray(tf.strain, float)
    sig = np.asarray(tf.strain_uncertainty, float)
    tf_trusted = np.asarray(tf.trusted, bool)

    def score(invert, shift, samp):
        """Strain errors of one alignment; the twin is chosen by them, since
        the support of a nearly centrosymmetric crystal cannot tell."""
        core = np.zeros(shape, bool)
        _, r = _truth_on_grid(truth, grid, shift, invert)
        for ln in truth["lines"]:
            if ln.get("kind") == "straight":
                p = np.asarray(ln["point"], float)
                xi = np.asarray(ln["line"], float)
                rel = r - p.reshape(3, 1, 1, 1)
                along = np.tensordot(xi, rel, axes=1)
                core |= np.linalg.norm(rel - xi.reshape(3, 1, 1, 1) * along, axis=0) < 3 * vs.max()
        # the support eroded by one voxel, at any amplitude: the comparison
        # judges the strain wherever the crystal is, cores excepted
        trusted = trusted_for_gradients(np.asarray(results.amplitude, float), sup,
                                        amplitude_threshold=0.0) & ~core
        rms, rms_truth, mean_err, cover = {}, {}, {}, {}
        for (i, k), lab in zip(STRAIN_PAIRS, STRAIN_COMPONENTS):
            t = samp(truth["strain"][i, k])
            e = eps_r[i, k]
            ok = trusted & np.isfinite(e)
            rms[lab] = float(np.sqrt(np.mean((e[ok] - t[ok]) ** 2))) if ok.any() else float("nan")
            rms_truth[lab] = float(np.sqrt(np.mean(t[ok] ** 2))) if ok.any() else float("nan")
            mean_err[lab] = float(np.mean(e[ok] - t[ok])) if ok.any() else float("nan")
            cover[lab] = _coverage(e, t, sig[i, k], ok & tf_trusted)
        total = float(np.sqrt(np.mean([v ** 2 for v in rms.values()])))
        return total, rms, rms_truth, mean_err, trusted, cover

    best = None
    for invert in (False, True):
        shift = com_t + (com_r if invert else -com_r)
        samp, _ = _truth_on_grid(truth, grid, shift, invert)
        d = samp(dens)
        sh, _, _ = phase_cross_correlation(d, sup.astype(float), upsample_factor=10, normalization=None)
        # result voxel at index i + sh matches truth sampled at i: move the truth sample point
        step = sh * vs
        shift2 = shift - (step if not invert else -step)
        samp, _ = _truth_on_grid(truth, grid, shift2, invert)
        d = samp(dens) > 0.5
        dice = 2 * np.sum(d & sup) / max(1, d.sum() + sup.sum())
        total, rms, rms_truth, mean_err, trusted, cover = score(invert, shift2, samp)
        if best is None or total < best[0]:
            best = (total, invert, shift2, samp, dice, rms, rms_truth, mean_err, trusted, cover)
    total, invert, shift, samp, dice, rms, rms_truth, mean_err, trusted, cover = best
    lines_out = []
    for ln in truth["lines"]:
        if ln.get("kind") != "straight":
            continue
        p = np.asarray(ln["point"], float)
        xi = np.asarray(ln["line"], float)
        b_true = np.asarray(ln["burgers"], float)
        found = []
        for d in results.dislocations:
            pts = np.asarray(d.points, float)
            tp = (-pts if invert else pts) + shift  # result points in truth coordinates
            rel = tp - p
            dist = np.linalg.norm(rel - np.outer(rel @ xi, xi), axis=1)
            dirs = np.asarray(d.directions, float)
            ang = np.degrees(np.arccos(np.clip(np.abs(dirs @ xi), 0, 1)))
            b = None if d.burgers is None else np.asarray(d.burgers, float)
            b_ok = b is not None and same_dislocation(b, dirs, b_true, xi, twin=invert)
            flipped = b is not None and b_ok and not np.allclose(b, b_true, atol=1e-6)
            same_sense = float(np.sum(dirs @ xi)) > 0
            found.append({"median_distance_vox": float(np.median(dist) / vs.mean()),
                          "max_distance_vox": float(np.max(dist) / vs.mean()),
                          "median_distance_nm": float(np.median(dist) / 10.0),
                          "max_distance_nm": float(np.max(dist) / 10.0),
                          "median_angle_deg": float(np.median(ang)), "burgers": None if b is None else b.tolist(),
                          "burgers_right": bool(b_ok), "burgers_flipped_with_line": bool(flipped),
                          "line_same_sense": bool(same_sense),
                          "length_A": float(d.length)})
        found.sort(key=lambda f: f["median_distance_vox"])
        lines_out.append({"burgers_true": b_true.tolist(), "found": found})
    out = {"dice": float(dice), "twin": bool(invert), "strain_rms": rms, "strain_rms_truth": rms_truth,
           "strain_mean_error": mean_err, "strain_rms_all": total, "trusted_voxels": int(trusted.sum()),
           "coverage": cover, "uncertainty_basis": tf.uncertainty_basis, "lines": lines_out,
           "truth_strain": np.stack([np.stack([samp(truth["strain"][i, k]) for k in range(3)]) for i in range(3)]),
           "compared": trusted}
    if not as_text:
        return out
    txt = [f"versus the simulator's truth ({int(trusted.sum())} trusted voxels, support overlap "
           f"{dice:.2f}{', twin solution' if invert else ''}):",
           "  strain RMS error  " + "  ".join(f"{k} {v:.1e}" for k, v in rms.items()),
           "  truth strain RMS  " + "  ".join(f"{k} {v:.1e}" for k, v in rms_truth.items())]
    if all(c["voxels"] == 0 for c in cover.values()):
        txt.append("  error bars: none to check; " + (out["uncertainty_basis"] or "σ not estimated"))
    else:
        txt += ["  median σ          " + "  ".join(f"{k} {c['median_sigma']:.1e}" for k, c in cover.items()),
                "  within 1σ         " + "  ".join(f"{k} {c['within_1sigma']:7.2f}" for k, c in cover.items())
                + "   (calibrated: 0.68)",
                "  within 2σ         " + "  ".join(f"{k} {c['within_2sigma']:7.2f}" for k, c in cover.items())
                + "   (calibrated: 0.95)",
                f"  ({cover['xx']['voxels']} trusted voxels with σ, away from dislocation cores)"]
    for ln in lines_out:
        bt = " ".join(f"{v:+.1f}" for v in ln["burgers_true"])
        if ln["found"]:
            f = ln["found"][0]
            bf = "unknown" if f["burgers"] is None else " ".join(f"{v:+.1f}" for v in f["burgers"])
            how = ""
            if f["burgers_right"] and f["burgers_flipped_with_line"]:
                why = ("its ξ runs along the truth's, but the twin's point inversion reverses ξ"
                       if invert and f["line_same_sense"] else "its ξ runs opposite to the truth's")
                how = f" (found b = [{bf}]: {why}, and (−b, −ξ) is the same dislocation)"
            elif f["burgers_right"]:
                how = f" (found b = [{bf}] with the same line direction)"
            txt.append(f"  dislocation b = [{bt}]: nearest found line {f['median_distance_vox']:.2f} voxels = "
                       f"{f['median_distance_nm']:.1f} nm (median; max {f['max_distance_vox']:.2f} voxels = "
                       f"{f['max_distance_nm']:.1f} nm) from the truth, direction within "
                       f"{f['median_angle_deg']:.1f}°, Burgers vector "
                       f"{'right' if f['burgers_right'] else 'WRONG'}{how}"
                       + ("" if f["burgers_right"] else f" (found b = [{bf}])"))
        else:
            txt.append(f"  dislocation b = [{bt}]: NOT found")
    return "\n".join(txt)


def compare_routes(results, truth_path):
    """The comparison with the truth, and, when the joint stage ran, the
    strain RMS error of the independent and the joint route side by side
    (same voxels) with their ratio. Text."""
    txt = compare_to_truth(results, truth_path)
    joint = results.joint or {}
    if results.tensor_independent is None:
        if "error" in joint:
            txt += f"\n  joint refinement: not run ({joint['error']})"
        return txt
    a = compare_to_truth(results, truth_path, as_text=False)
    b = compare_to_truth(results, truth_path, as_text=False, tensor=results.tensor_independent)
    rows = ["  strain RMS error, independent route vs joint refinement (same voxels):",
            "    " + "  ".join(f"{k} {b['strain_rms'][k]:.1e} → {a['strain_rms'][k]:.1e}" for k in a["strain_rms"]),
            f"    all six: {b['strain_rms_all']:.2e} → {a['strain_rms_all']:.2e} "
            f"(ratio joint/independent {a['strain_rms_all'] / b['strain_rms_all']:.2f})"]
    return txt + "\n" + "\n".join(rows)
