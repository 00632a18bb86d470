"""The pipeline: the stages of docs/design.md wired into one small graph.

Per reflection: prepare → (grid, for the orthogonal route) → phase → sample
frame; then, over all reflections: register → tensor → defects → outputs.
The stages are the plain functions of their modules; this module only

* reads their options from the validated pipeline dict (every option table is
  checked up front against the function it feeds, with a did-you-mean);
* checkpoints every stage's output to ``OUT/checkpoints`` as HDF5 named by a
  hash of the stage's inputs and options (written atomically), so
  ``resume=True`` reruns only what changed or is missing;
* decides where phase retrieval runs: a local process pool by default, or a
  Dask cluster (``scheduler="local"`` starts a ``LocalCluster``, any other
  value is a scheduler address). Each random start is one task, reproducible
  from (seed, reflection, run), so every executor gives identical results.

Why one module of about 1000 lines: it is the wiring of every stage, in
one place by design, with the checks made before any work (the
instrument against the scan files, the output folder and the space a run
needs) beside the wiring that feeds them; the stages, the file formats and
the checkpoint conversions live in their packages.
"""

from __future__ import annotations

import contextlib
import dataclasses
import inspect
import os
import platform
import shlex
import shutil
import sys
import tempfile
import time
from datetime import datetime, timezone
from pathlib import Path

import numpy as np

from braggstrain.config import build_crystal, build_instrument, resolve_path
from braggstrain.geometry.crystal import DIRECTION_TOLERANCE_DEG, Q_TOLERANCE, check_reflection_identity, format_hkl
from braggstrain.errors import (BraggStrainError, ConfigError, InputError, OutputError, ReflectionError,
                                ScanFileError, TensorError, did_you_mean)
from braggstrain.phasing.coherence import AUTO, CoherenceSettings
from braggstrain.phasing.ensemble import DEFAULT_KEEP, DEFAULT_METRIC, DEFAULT_RUNS, partial_runs
from braggstrain.io.checkpoints import (dislocation_to_tree, file_digest, hash_inputs, load_tree, plain_tree,
                                        sample_to_tree, save_tree, tree_to_dislocation, tree_to_sample,
                                        tree_to_tensor)
from braggstrain.io.arrays import split_dataset
from braggstrain.io.dislocations import write_dislocation_table
from braggstrain.io.prepared import read_prepared, write_prepared

__all__ = ["run_pipeline", "check_options", "prepare_options", "PipelineRun", "STAGES",
           "estimate_output_bytes", "check_output_folder"]

#: The stages in the order they run (the report orders its timing table by it).
STAGES = ("prepare", "grid", "phase", "frame", "spread", "register", "tensor", "joint", "defects", "outputs")

# Keys of the option tables that are the pipeline's own (not a stage function's).
_FRAME_OWN = {"route", "voxel_nm", "origin_nm"}
_TENSOR_OWN = {"min_overlap", "voxel_nm", "upsample", "twin_tolerance", "replicas", "replica_iterations"}
#: Poisson replicas per reflection for the error bars, and iterations per replica (docs/strain.md)
DEFAULT_REPLICAS = 8
DEFAULT_REPLICA_ITERATIONS = 90
#: share of RAAR in a replica's iterations (then ER); see braggstrain.phasing.replicas
REPLICA_RAAR_FRACTION = 1 / 3
#: Gaussian σ (voxels) of the blur whose bias is added to the error bars: the two-voxel central
#: difference (box of 2 voxels, σ² = 1/3) and a point spread of about one voxel FWHM (σ ≈ 0.5), in
#: quadrature (docs/strain.md)
DEFAULT_RESOLUTION_BLUR = 0.75
_DEFECTS_OWN = {"enabled"}
_JOINT_OWN = {"enabled", "q_map"}
# Part of the defects checkpoint's key: lines checkpointed before their points
# were put on the common grid (origin included, issue 17) are not reused.
_DEFECTS_POINTS = "points: positions on the common grid"
_OUTPUT_KEYS = {"vtk": bool, "figures": bool, "report": bool}
# Options of [prepare] that may name a file (an array: dark, flat field, mask).
_PREPARE_FILES = ("dark", "flat", "user_mask")


def _resolve_array_path(cfg, value, key):
    """A file option (``file.npy`` or ``file.h5#/dataset``) resolved against the pipeline file."""
    path, ds = split_dataset(value)
    p = resolve_path(cfg, path, key)
    return str(p) if ds is None else f"{p}#{ds}"


def _file_digests(paths):
    """Digests of the files the prepare options name, for the checkpoint key."""
    out = {}
    for k, v in paths.items():
        if isinstance(v, str):
            f = Path(split_dataset(v)[0])
            out[k] = file_digest(f) if f.is_file() else None
    return out


def _kwargs_of(fn, skip):
    sig = inspect.signature(fn)
    return {n for n, p in sig.parameters.items()
            if p.kind in (p.KEYWORD_ONLY, p.POSITIONAL_OR_KEYWORD) and n not in skip}


def _check_keys(table, allowed, where, src):
    for k in table:
        if k not in allowed:
            raise ConfigError(f"{src}: unknown key '{where}.{k}'{did_you_mean(k, allowed)}; "
                              f"expected one of {sorted(allowed)}")


def prepare_options(cfg):
    """The [prepare] table checked against prepare_scan's options (ConfigError
    naming the key), lists turned into tuples, file options resolved against
    the pipeline file."""
    from braggstrain.prepare import scan as prepare

    p = dict(cfg["prepare"])
    _check_keys(p, _kwargs_of(prepare.prepare_scan, {"scan"}), "prepare", cfg.get("_source", "<pipeline>"))
    for k in ("bin", "crop", "max_crop", "pad"):
        if isinstance(p.get(k), list):
            p[k] = tuple(p[k])
    for k in _PREPARE_FILES:  # every path in a pipeline file is relative to that file
        if isinstance(p.get(k), str):
            p[k] = _resolve_array_path(cfg, p[k], f"prepare.{k}")
    return p


def check_options(cfg):
    """Validate the stage option tables against the functions they feed.

    Returns a dict stage → keyword arguments. Raises ConfigError naming the
    key for an unknown key or a bad value.
    """
    from braggstrain.defects import lines as defects
    from braggstrain.strain import frame
    from braggstrain.prepare import regrid
    from braggstrain.strain import tensor
    from braggstrain.phasing import options_from_config

    src = cfg.get("_source", "<pipeline>")
    out = {}
    out["prepare"] = prepare_options(cfg)
    ph = dict(cfg["phasing"])
    try:
        out["phasing"] = options_from_config(ph)
    except ConfigError as e:
        raise ConfigError(f"{src}: key 'phasing': {e}") from None
    for k, lo in (("runs", 1), ("keep", 1), ("seed", 0), ("threads", 1)):
        v = ph.get(k)
        if v is not None and (isinstance(v, bool) or not isinstance(v, int) or v < lo):
            raise ConfigError(f"{src}: key 'phasing.{k}': value {v!r}; expected an integer ≥ {lo}")
    runs, keep = ph.get("runs", DEFAULT_RUNS), ph.get("keep", DEFAULT_KEEP)
    if keep > runs:
        raise ConfigError(f"{src}: key 'phasing.keep': value {keep}{'' if 'keep' in ph else ' (the default)'}; "
                          f"expected at most runs = {runs}")
    fr = dict(cfg["frame"])
    route = fr.get("route", frame.DEFAULT_ROUTE)
    if route not in frame.ROUTES:
        raise ConfigError(f"{src}: key 'frame.route': value {route!r}; expected one of {list(frame.ROUTES)}")
    allowed = _FRAME_OWN | _kwargs_of(frame.detector_to_sample, {"recon", "prepared", "g_vector", "ramp",
                                                                  "support", "voxel_size", "shape", "origin"})
    allowed |= {"grid_" + k for k in _kwargs_of(regrid.regrid, {"prepared"})}
    _check_keys(fr, allowed, "frame", src)
    if "origin_nm" in fr:
        v = fr["origin_nm"]
        ok = (isinstance(v, list) and len(v) == 3
              and all(isinstance(x, (int, float)) and not isinstance(x, bool) and np.isfinite(x) for x in v))
        if not ok:
            raise ConfigError(f"{src}: key 'frame.origin_nm': value {v!r}; expected three numbers in nm (the "
                              f"sample-frame position of the grid's centre voxel)")
    out["frame"] = fr
    te = dict(cfg["tensor"])
    allowed = _TENSOR_OWN | _kwargs_of(tensor.strain_tensor, {"objects", "g_vectors", "voxel_size", "support",
                                                              "weights", "labels", "warn"})
    _check_keys(te, allowed, "tensor", src)
    for k, lo in (("replicas", 0), ("replica_iterations", 3)):
        v = te.get(k)
        if v is not None and (isinstance(v, bool) or not isinstance(v, int) or v < lo):
            raise ConfigError(f"{src}: key 'tensor.{k}': value {v!r}; expected an integer ≥ {lo}")
    if te.get("replicas") == 1:
        raise ConfigError(f"{src}: key 'tensor.replicas': value 1; expected 0 (no resampling) or at least 2")
    out["tensor"] = te
    de = dict(cfg["defects"])
    allowed = _DEFECTS_OWN | _kwargs_of(defects.find_dislocations, {"objects", "hkls", "g_vectors", "voxel_size",
                                                                     "support", "crystal"})
    _check_keys(de, allowed, "defects", src)
    out["defects"] = de
    from braggstrain.joint import fit as joint_fit

    jo = dict(cfg.get("joint") or {})
    _check_keys(jo, _JOINT_OWN | _kwargs_of(joint_fit.joint_refine, {"data", "grid", "support", "amplitude",
                                                                     "displacement", "reference_objects",
                                                                     "progress"}), "joint", src)
    if not isinstance(jo.get("enabled", False), bool):
        raise ConfigError(f"{src}: key 'joint.enabled': value {jo['enabled']!r}; expected true or false")
    for k, lo in (("max_iterations", 1), ("support_dilation", 0), ("seed", 0), ("threads", 1)):
        v = jo.get(k)
        if v is not None and (isinstance(v, bool) or not isinstance(v, int) or v < lo):
            raise ConfigError(f"{src}: key 'joint.{k}': value {v!r}; expected an integer ≥ {lo}")
    v = jo.get("held_out")
    if v is not None and (isinstance(v, bool) or not isinstance(v, (int, float)) or not 0 <= v < 0.5):
        raise ConfigError(f"{src}: key 'joint.held_out': value {v!r}; expected a fraction in [0, 0.5)")
    v = jo.get("eps")
    if v is not None and (isinstance(v, bool) or not isinstance(v, (int, float)) or not 1e-15 < v < 1e-2):
        raise ConfigError(f"{src}: key 'joint.eps': value {v!r}; expected a precision between 1e-15 and 1e-2")
    from braggstrain.joint.fit import HELD_OUT_BY
    from braggstrain.joint.model import Q_MAPS

    if jo.get("held_out_by", "voxels") not in HELD_OUT_BY:
        raise ConfigError(f"{src}: key 'joint.held_out_by': value {jo['held_out_by']!r}; expected one of "
                          f"{list(HELD_OUT_BY)}")

    if jo.get("q_map", "exact") not in Q_MAPS:
        raise ConfigError(f"{src}: key 'joint.q_map': value {jo['q_map']!r}; expected one of {list(Q_MAPS)}")
    out["joint"] = jo
    ou = dict(cfg["output"])
    _check_keys(ou, set(_OUTPUT_KEYS), "output", src)
    for k, t in _OUTPUT_KEYS.items():
        if k in ou and not isinstance(ou[k], t):
            raise ConfigError(f"{src}: key 'output.{k}': value {ou[k]!r}; expected true or false")
    out["output"] = ou
    if len(cfg["reflection"]) < 3:
        raise ConfigError(f"{src}: key 'reflection': {len(cfg['reflection'])} reflection(s); the strain tensor "
                          "needs at least three non-coplanar reflections")
    return out


class PipelineRun:
    """Bookkeeping of one run: checkpoints, timings, log."""

    def __init__(self, out_dir, resume, log):
        self.out = Path(out_dir)
        self.ck = self.out / "checkpoints"
        self.resume = resume
        self.log = log
        self.timings = {}
        self.reused = []
        self.phasing_seconds = 0.0

    def path(self, stage, name, key):
        return self.ck / f"{stage}-{name}-{key}.h5"

    def cached(self, stage, name, key):
        p = self.path(stage, name, key)
        if self.resume and p.exists():
            try:
                tree, attrs = load_tree(p)
                if attrs.get("key") == key:
                    self.reused.append(f"{stage}:{name}")
                    return tree
            except (BraggStrainError, OSError):
                pass
        return None

    def save(self, stage, name, key, tree):
        self.ck.mkdir(parents=True, exist_ok=True)
        save_tree(self.path(stage, name, key), tree, attrs={"key": key, "stage": stage, "name": name})

    @contextlib.contextmanager
    def timed(self, stage):
        t0 = time.perf_counter()
        try:
            yield
        finally:
            self.timings[stage] = self.timings.get(stage, 0.0) + time.perf_counter() - t0


# ---------------------------------------------------------------------------
# conversions between stage outputs and checkpoint trees
# ---------------------------------------------------------------------------


def _real_voxel(data):
    """Edge (Å) of the cube with the volume of one real-space voxel of the
    array phase retrieval ran on (detector-frame or orthogonal grid)."""
    if hasattr(data, "real_space_basis"):
        T = data.real_space_basis()
        return float(abs(np.linalg.det(T)) ** (1 / 3))
    n = np.asarray(data.intensity.shape, float)
    return float(np.prod(2 * np.pi / (n * np.asarray(data.q_step, float))) ** (1 / 3))


def _coherence_to_tree(ens, q_basis):
    """The coherence function of one reflection as a checkpoint tree: the
    ensemble's kernel (voxels of the phasing grid) and, through ``q_basis``
    (Å⁻¹ per index step, sample frame), its widths in Å⁻¹ and coherence
    lengths in Å (:func:`braggstrain.phasing.coherence.kernel_in_q`)."""
    from braggstrain.phasing.coherence import WIDTH_FLOOR_VOXELS, kernel_in_q

    step = float(np.prod(np.linalg.norm(q_basis, axis=0)) ** (1 / 3))
    out = {"model": ens.coherence_model if ens.coherence_kernel is not None else "off",
           "floor": WIDTH_FLOOR_VOXELS * step}
    if ens.coherence_kernel is not None:
        q = kernel_in_q(ens.coherence_kernel, q_basis, ens.coherence_widths_spread)
        out.update(kernel=np.asarray(ens.coherence_kernel, float), widths=q["widths"], axes=q["axes"],
                   lengths=q["lengths"], spread=q["spread"], widths_voxels=q["widths_voxels"])
    ch = ens.coherence_choice
    if ch:
        pw = np.asarray(ch["partial_widths"], float)
        out["choice"] = {"metric": ch["metric"], "coherent": float(ch["coherent"]),
                         "partial": float(ch["partial"]), "partial_widths_voxels": pw}
    return out


def _phase_to_tree(ens, voxel, q_basis):
    best = ens.best
    hist = {}
    h = best.history
    for k in (f.name for f in dataclasses.fields(h)):
        val = getattr(h, k)
        if isinstance(val, (list, np.ndarray)) and len(val) and not isinstance(val[0], str):
            try:
                hist[k] = np.asarray(val, dtype=float)
            except (TypeError, ValueError):
                pass
    runs = []
    kept = {int(v) for v in ens.kept}
    rank = {int(run): k for k, run in enumerate(ens.ranking)}
    for r in ens.runs:
        m = plain_tree(r.metrics)
        m.update({"run": r.run, "seed": r.seed, "status": r.status, "iterations": r.iterations,
                  "elapsed": r.elapsed, "message": r.message, "kept": int(r.run) in kept,
                  "rank": rank.get(int(r.run), -1)})
        runs.append(m)
    pr = ens.prtf
    # PRTF shells come in cycles per voxel f; as |q| in Å⁻¹: 2π f / voxel, and
    # the resolution as the half period voxel / (2 f) in Å (common practice, no source)
    f = np.asarray(pr.q, float)
    res_f = float(pr.resolution) if pr.resolution is not None else np.nan
    return {"obj": ens.obj, "support": ens.support, "ramp": np.asarray(ens.ramp, float),
            "coherence": _coherence_to_tree(ens, q_basis),
            "kept_objects": ens.kept_objects,
            "runs": runs, "ranking": [int(v) for v in ens.ranking], "kept": [int(v) for v in ens.kept],
            "alignment": plain_tree(ens.alignment), "history": hist, "seed": int(ens.seed), "metric": ens.metric,
            "prtf": {"q": 2 * np.pi * f / voxel, "values": np.asarray(pr.values, float),
                     "resolution": voxel / (2 * res_f) if np.isfinite(res_f) and res_f > 0 else float("nan"),
                     "voxel_A": voxel}}


# ---------------------------------------------------------------------------
# executors
# ---------------------------------------------------------------------------

@contextlib.contextmanager
def _executor(scheduler, workers):
    """Yield (executor, description) for the random starts."""
    n = int(workers) if workers else (os.cpu_count() or 1)
    if scheduler is None:
        from braggstrain.phasing.ensemble import InProcess, worker_pool

        if n <= 1:  # no pool at all, not the ensemble's own default pool
            yield InProcess(), "in-process (1 worker)"
            return
        ex = worker_pool(n)
        try:
            yield ex, f"local process pool ({n} workers)"
        finally:
            ex.shutdown(wait=True, cancel_futures=True)
        return
    try:
        from dask.distributed import Client, LocalCluster
    except ImportError:
        raise InputError("--scheduler: dask.distributed is not installed; install the 'cluster' extra "
                         "(pip install 'braggstrain[cluster]')") from None
    if scheduler == "local":
        cluster = LocalCluster(n_workers=n, threads_per_worker=1, processes=True, dashboard_address=None)
        client = Client(cluster)
        try:
            yield client, f"Dask LocalCluster ({n} workers)"
        finally:
            client.close()
            cluster.close()
    else:
        try:
            client = Client(scheduler, timeout="20s")
        except (OSError, TimeoutError) as e:
            raise InputError(f"--scheduler: cannot reach the Dask scheduler at {scheduler!r} ({e})") from None
        try:
            yield client, f"Dask cluster at {scheduler}"
        finally:
            client.close()


# ---------------------------------------------------------------------------
# the run
# ---------------------------------------------------------------------------

def _prepare_options(scan, options):
    """The [prepare] options for one scan: summed repeats had their saturation
    tested on each raw scan already."""
    if "repeats" in scan.extra and "saturation" in options:
        options = {k: v for k, v in options.items() if k != "saturation"}
    return options


def _scan_for(cfg, i, r, prepare_opts=None):
    """Read reflection i's scan: a braggstrain scan file, or frames with their
    angles, monitor and energy from the pipeline file or the beamline's files
    (braggstrain.io.sources); repeated scans are aligned and summed."""
    from braggstrain.io.scans import read_scan
    from braggstrain.io.sources import reflection_scan
    from braggstrain.prepare.measured import sum_repeats

    src = cfg.get("_source", "<pipeline>")
    if r["scan"] is not None:
        p = resolve_path(cfg, r["scan"], f"reflection[{i}].scan")
        if not p.exists():
            raise ConfigError(f"{src}: key 'reflection[{i}].scan': file {p} not found")
        scan = read_scan(p)
        scan.instrument, scan.extra["instrument_from"] = _agree_instrument(cfg, i, scan)
        return _with_reflection_mask(cfg, i, r, scan, file_digest(p))
    if r["frames"] is None:
        raise ConfigError(f"{src}: key 'reflection[{i}]': expected 'scan' (a scan file) or 'frames' (a frame stack)")
    scans = reflection_scan(r, build_instrument(cfg), base_dir=cfg.get("_dir", "."), key=f"reflection[{i}]",
                            source=src, detector_roi=cfg["instrument"]["detector"].get("roi"))
    if len(scans) > 1:
        sat = (prepare_opts or {}).get("saturation")
        scan, _ = sum_repeats(scans, max_shift=float(r.get("repeat_max_shift", 5.0)), saturation=sat)
    else:
        scan = scans[0]
    from braggstrain.prepare.measured import fit_rocking_step

    rc = scan.rocking_circle
    fit_rocking_step(scan.rocking_angles, source=scan.extra.get("sources", {}).get(rc, scan.path),
                     field=f"reflection[{i}].angles.{rc}")  # refused here, before any work
    digest = hash_inputs(scan.frames, scan.mask, scan.monitor, scan.angles, scan.instrument, scan.extra.get("roi"))
    scan.extra.setdefault("instrument_from", "the pipeline file (and the files it names)")
    return _with_reflection_mask(cfg, i, r, scan, digest)


def _with_reflection_mask(cfg, i, r, scan, digest):
    """Add the ``[[reflection]] mask`` file (True/nonzero = not measured) to the scan's own mask."""
    if r["mask"] is None:
        return scan, digest
    from braggstrain.io.arrays import read_array

    src = cfg.get("_source", "<pipeline>")
    key = f"reflection[{i}].mask"
    spec = _resolve_array_path(cfg, r["mask"], key)
    try:
        m = np.asarray(read_array(spec, "mask", src)) != 0
    except InputError as e:
        raise ConfigError(f"{src}: key '{key}': {e}") from None
    shape = scan.frames.shape
    if m.shape not in (shape[1:], shape):
        raise ConfigError(f"{src}: key '{key}': a mask of shape {m.shape}; expected {shape[1:]} (rows, columns) "
                          f"or {shape} (frames, rows, columns)")
    own = None if scan.mask is None else np.asarray(scan.mask, bool)
    if own is not None and own.shape != m.shape:
        own = np.broadcast_to(own, shape) if own.ndim == 2 else own
        m = np.broadcast_to(m, shape)
    scan.mask = m if own is None else (own | m)
    return scan, hash_inputs(digest, file_digest(Path(split_dataset(spec)[0])))


# Relative tolerance for "the same value" of a pipeline file and a scan file:
# both hold the number written by a person or a control system, so any real
# difference is far larger (common practice, no source).
_SAME = 1e-6


def _instrument_differences(cfg, inst):
    """(what, pipeline value, scan value) for every instrument value the
    pipeline file states explicitly and the scan file records differently."""
    given = set(cfg.get("_given", ()))
    ins = cfg["instrument"]
    det = ins["detector"]
    out = []

    def differ(a, b):
        a, b = np.atleast_1d(np.asarray(a, float)), np.atleast_1d(np.asarray(b, float))
        return a.shape != b.shape or not np.allclose(a, b, rtol=_SAME, atol=0)
    if "instrument.energy_kev" in given and differ(ins["energy_kev"], inst.energy_kev):
        out.append(("energy", f"{ins['energy_kev']:g} keV", f"{inst.energy_kev:g} keV"))
    if "instrument.detector.distance_m" in given and differ(det["distance_m"], inst.detector.distance):
        out.append(("detector distance", f"{det['distance_m']:g} m", f"{inst.detector.distance:g} m"))
    if "instrument.detector.pixel_size_um" in given and differ(np.asarray(det["pixel_size_um"]) * 1e-6,
                                                                inst.detector.pixel_size):
        out.append(("pixel size", "×".join(f"{v:g}" for v in det["pixel_size_um"]) + " µm",
                    "×".join(f"{v * 1e6:g}" for v in inst.detector.pixel_size) + " µm"))
    for role, circles in (("sample_circles", inst.sample_circles), ("detector_circles", inst.detector_circles)):
        if f"instrument.{role}" in given:
            mine = [f"{c['name']} {c['axis']}" for c in ins[role]]
            theirs = [f"{c.name} {c.axis}" for c in circles]
            if mine != theirs:
                out.append((f"{role.replace('_', ' ')} (name axis, outermost first)",
                            ", ".join(mine), ", ".join(theirs)))
    return out


def _agree_instrument(cfg, i, scan):
    """The instrument a scan file is processed with, and where its values come from.

    A value the pipeline file states and the scan file records differently
    (energy, detector distance, pixel size, circles) is refused unless
    ``instrument.override`` says which wins."""
    src = cfg.get("_source", "<pipeline>")
    diffs = _instrument_differences(cfg, scan.instrument)
    if not diffs:
        return scan.instrument, "the scan files, in agreement with the pipeline file"
    what = "; ".join(f"{w}: pipeline file says {a}, scan file {b}" for w, a, b in diffs)
    override = cfg["instrument"].get("override")
    if override is None:
        raise ConfigError(f"{src}: key 'reflection[{i}].scan': the scan file {scan.path} disagrees with the "
                          f"pipeline file ({what}); expected the same values, or instrument.override = "
                          f"\"pipeline\" or \"scans\" to say which wins")
    if override == "scans":
        return scan.instrument, f"the scan files (instrument.override = \"scans\"; {what})"
    inst = build_instrument(cfg)
    missing = [c.name for c in inst.circles if c.name not in scan.angles]
    if missing:
        raise ConfigError(f"{src}: key 'instrument.override': the pipeline file's circles {missing} have no "
                          f"angles in the scan file {scan.path}; expected the scan file's circle names")
    return inst, f"the pipeline file (instrument.override = \"pipeline\"; {what})"


def _describe_instrument(inst):
    d = inst.detector
    return (f"energy {inst.energy_kev:g} keV, detector distance {d.distance:g} m, pixel size "
            + "×".join(f"{v * 1e6:g}" for v in d.pixel_size) + " µm, circles "
            + ", ".join(f"{c.name} {c.axis}" for c in inst.circles))


def check_output_folder(out):
    """Create the output folder and check that it (and its subfolders of
    this project) can be written, before any work. Raises InputError naming
    the folder."""
    out = Path(out)
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as e:
        raise InputError(f"{out}: output folder not writable ({e.strerror or e}); expected a folder you can "
                         "write to (--out)") from None
    for d in (out, out / "checkpoints", out / "figures", out / "vtk"):
        if not d.is_dir():
            continue
        try:
            fd, probe = tempfile.mkstemp(prefix=".braggstrain-probe.", dir=d)
            os.close(fd)
            os.unlink(probe)
        except OSError as e:
            raise InputError(f"{d}: output folder not writable ({e.strerror or e}); expected a folder you can "
                             "write to (--out)") from None


def _frames_shape(cfg, i, r):
    """(frames, rows, columns) of reflection i's data, read from the file's header."""
    import h5py

    if r.get("scan") is not None:
        with h5py.File(resolve_path(cfg, r["scan"], f"reflection[{i}].scan"), "r") as f:
            return tuple(f["frames"].shape)
    p = resolve_path(cfg, r["frames"], f"reflection[{i}].frames")
    if p.is_dir():
        from skimage import io

        files = sorted(q for q in p.iterdir() if q.suffix.lower() in (".tif", ".tiff"))
        return (len(files),) + tuple(io.imread(str(files[0])).shape)
    with h5py.File(p, "r") as f:
        return tuple(f[r["dataset"]].shape)


def estimate_output_bytes(cfg, shapes=None, prepared=None):
    """An estimate, on the safe side, of the bytes a run writes into its
    output folder (before compression).

    Per reflection, the prepared and phased arrays (14 bytes per voxel of
    the array phase retrieval works on: float32 intensity, mask, complex64
    object, support); on the common sample-frame grid, 32 bytes per voxel
    and reflection (sample-frame, registered and result maps) and 450 bytes
    per voxel for the tensor's checkpoint, results and VTK fields (every
    component, uncertainty and derived map); plus 6 MB for the figures and
    the report. Measured on the demo (``braggstrain demo``): 14.1 and 30
    bytes per voxel, 440 bytes per voxel, 2.2 MB of figures and report.

    Parameters
    ----------
    cfg : validated pipeline dict
    shapes : list of (frames, rows, columns) of each reflection's data
        (read from the files' headers when None)
    prepared : list of PreparedScan, optional; with them the arrays' shapes
        and oversampling are known exactly (the common grid then spans the
        crystal, twice its extent N/σ per axis); without them, the crop (or
        ``max_crop``) bounds the arrays and the common grid.
    """
    if prepared is not None:
        n_prep = [float(np.prod(p.intensity.shape)) for p in prepared]
        common = max(float(np.prod(np.ceil(2 * np.asarray(p.intensity.shape) / np.maximum(p.oversampling, 1))))
                     for p in prepared)
    else:
        opts = check_options(cfg)
        pr = opts["prepare"]
        binning = np.broadcast_to(np.asarray(pr.get("bin", (1, 1, 1)), int), (3,))
        max_crop = np.broadcast_to(np.asarray(pr.get("max_crop", (128, 256, 256)), int), (3,))
        crop = pr.get("crop", "auto")
        pad = pr.get("pad")
        n_prep = []
        for i, r in enumerate(cfg["reflection"]):
            shape = np.asarray(shapes[i] if shapes is not None else _frames_shape(cfg, i, r), int)
            if isinstance(crop, str):
                size = shape if crop == "full" else np.minimum(shape, max_crop)
            else:
                size = np.minimum(shape, np.asarray(crop, int))
            size = np.maximum(size // binning, 1)
            if pad is not None:
                size = np.maximum(size, np.asarray(pad, int))
            n_prep.append(float(np.prod(size)))
        common = max(n_prep)
    n_refl = len(n_prep)
    return int(14 * sum(n_prep) + common * (32 * n_refl + 450) + 6e6)


def _existing_output_bytes(out):
    """Bytes of earlier outputs in ``out`` that a run replaces."""
    out = Path(out)
    files = [out / "results.h5", out / "report.html", out / "dislocations.csv", out / "dislocations.json"]
    for d in ("checkpoints", "figures", "vtk"):
        if (out / d).is_dir():
            files += [p for p in (out / d).iterdir()]
    return sum(p.stat().st_size for p in files if p.is_file())


def _check_space(out, need):
    free = shutil.disk_usage(out).free
    # replaced files free their space; a replacement needs both for a moment
    need = max(need - _existing_output_bytes(out), need // 4)
    if need > free:
        raise OutputError(f"{out}: the run needs about {need / 1e6:.1f} MB (checkpoints, results, figures, VTK; "
                          f"estimated from the scan sizes), only {free / 1e6:.1f} MB free there; free some space "
                          f"or choose another --out")
    return free


def run_pipeline(cfg, out_dir, *, resume=False, scheduler=None, workers=None, progress=True, log=print,
                 command=None):
    """Run the whole pipeline of a validated pipeline dict into ``out_dir``.

    Parameters
    ----------
    cfg : dict from :func:`braggstrain.config.load_config`
    out_dir : output folder (created); every file is written inside it
    resume : reuse checkpoints whose input hash matches
    scheduler : None (local process pool), "local" (a Dask LocalCluster) or a
        Dask scheduler address
    workers : worker processes (default: all cores)
    progress : tqdm bars for phasing
    log : callable for progress lines, or None
    command : the command line recorded in the provenance (default: this
        process's own)

    Returns
    -------
    dict with the results bundle (``results``), the output paths, the
    timings (s per stage), the wall time and the phasing share
    """
    from braggstrain.defects import lines as dfx
    from braggstrain.strain import frame as frm
    from braggstrain.prepare import scan as prp
    from braggstrain.prepare import regrid as rgd
    from braggstrain.strain import tensor as tns
    from braggstrain.strain.lattice import mean_lattice_strain
    from braggstrain.strain.registration import register
    from braggstrain.phasing import ensemble

    say = log or (lambda *a, **k: None)
    t_start = time.perf_counter()
    if workers is not None and (isinstance(workers, bool) or not isinstance(workers, (int, np.integer))
                                or workers < 1):
        raise InputError(f"--workers: expected a positive number of worker processes, got {workers!r}")
    opts = check_options(cfg)
    crystal = build_crystal(cfg)
    src = cfg.get("_source", "<pipeline>")
    out = Path(out_dir)
    hkls = [tuple(r["hkl"]) for r in cfg["reflection"]]
    names = [r["name"] for r in cfg["reflection"]]  # checked and defaulted by the schema
    g_ref = []
    for i, h in enumerate(hkls):
        try:
            g_ref.append(crystal.reflection(h).g_sample)
        except BraggStrainError as e:
            raise ConfigError(f"{src}: key 'reflection[{i}].hkl': {e}") from None
    g_ref = np.array(g_ref)
    cond = tns.condition_number(g_ref)
    max_cond = float(opts["tensor"].get("max_condition", tns.MAX_CONDITION))
    if not np.isfinite(cond) or cond > max_cond:
        raise ConfigError(f"{src}: key 'reflection': the reflections {hkls} are coplanar or ill-conditioned "
                          f"(condition number {cond:.3g} > {max_cond:g}); expected three or more non-coplanar")
    # the output folder: writable, no stale partial files of an earlier killed run
    check_output_folder(out)
    from braggstrain.io.files import remove_partial_files

    stale = remove_partial_files(out)
    if stale:
        say(f"removed {len(stale)} partial file(s) left by an interrupted run in {out}")
    run = PipelineRun(out, resume, say)

    # read every scan and check everything about the data before any work
    scans = []
    for i, r in enumerate(cfg["reflection"]):
        scans.append(_scan_for(cfg, i, r, opts["prepare"]))
    used = {}
    for i, ((scan, _), h) in enumerate(zip(scans, hkls)):
        where = f"{src}: key 'reflection[{i}].hkl'"
        try:
            crystal.reflection(h, energy_kev=scan.instrument.energy_kev)
        except ReflectionError as e:
            raise ConfigError(f"{where}: {e}") from None
        if scan.hkl is not None and tuple(int(v) for v in scan.hkl) != tuple(h):
            raise ConfigError(f"{where}: declared {format_hkl(h)}, but the scan file {scan.path} records "
                              f"/sample@hkl = {format_hkl(scan.hkl)}; expected the same reflection")
        if not np.any(scan.frames):
            raise ScanFileError(scan.path, "frames", "every count is zero (no beam, a closed shutter or the wrong "
                                                     "file?); expected a measured Bragg peak")
        used.setdefault((_describe_instrument(scan.instrument), scan.extra.get("instrument_from", "")),
                        []).append(names[i])
    for (desc, where_from), who in used.items():
        say(f"instrument: {desc} (from {where_from}" + (f"; for {', '.join(who)}" if len(used) > 1 else "") + ")")
    ph_opts = dict(opts["phasing"])
    runs = int(ph_opts.pop("runs", DEFAULT_RUNS))
    keep = int(ph_opts.pop("keep", DEFAULT_KEEP))
    base_seed = int(ph_opts.pop("seed", 0))
    coh_settings = CoherenceSettings.from_value(ph_opts.get("coherence", AUTO))
    n_partial = partial_runs(runs) if coh_settings is not None and coh_settings.choose else 0
    fr_opts = dict(opts["frame"])
    route = fr_opts.pop("route", frm.DEFAULT_ROUTE)
    voxel_nm = fr_opts.pop("voxel_nm", None)
    origin_nm = fr_opts.pop("origin_nm", None)
    grid_opts = {k[5:]: v for k, v in fr_opts.items() if k.startswith("grid_")}
    fr_opts = {k: v for k, v in fr_opts.items() if not k.startswith("grid_")}
    if voxel_nm is not None:
        fr_opts["voxel_size"] = float(voxel_nm) * 10.0
    if origin_nm is not None:
        fr_opts["origin"] = np.asarray(origin_nm, float) * 10.0
    checks = cfg.get("checks") or {}
    q_tol = float(checks.get("q_tolerance", Q_TOLERANCE))
    dir_tol = float(checks.get("direction_tolerance_deg", DIRECTION_TOLERANCE_DEG))

    # -- prepare every scan (all its checks on the data), then check what each peak is
    prepared_all = []
    for j, ((scan, digest), name, h) in enumerate(zip(scans, names, hkls)):
        k_prep = hash_inputs("prepare", digest, opts["prepare"], scan.instrument.to_dict(),
                             _file_digests({k: opts["prepare"].get(k) for k in _PREPARE_FILES}))
        with run.timed("prepare"):
            pp = run.path("prepare", name, k_prep)
            prepared = None
            if resume and pp.exists():
                try:
                    prepared = read_prepared(pp)
                    run.reused.append(f"prepare:{name}")
                except BraggStrainError:
                    prepared = None
            if prepared is None:
                prepared = prp.prepare_scan(scan, **_prepare_options(scan, opts["prepare"]))
        prepared_all.append((prepared, k_prep, pp))
    for j, ((prepared, _, _), h) in enumerate(zip(prepared_all, hkls)):
        try:
            check_reflection_identity(crystal, h, prepared.q_center_sample, where=f"reflection[{j}] '{names[j]}'",
                                      q_tolerance=q_tol, direction_tolerance_deg=dir_tol,
                                      energy_kev=prepared.instrument.energy_kev)
        except ReflectionError as e:
            raise ConfigError(f"{src}: key 'reflection[{j}].hkl': {e} (tolerances: checks.q_tolerance, "
                              f"checks.direction_tolerance_deg)") from None
    # the space the run needs, before anything is written
    _check_space(out, estimate_output_bytes(cfg, prepared=[p for p, _, _ in prepared_all]))
    for (prepared, _, pp), name in zip(prepared_all, names):
        if not pp.exists():
            run.ck.mkdir(parents=True, exist_ok=True)
            write_prepared(prepared, pp)

    te_all = opts["tensor"]
    n_rep = int(te_all.get("replicas", DEFAULT_REPLICAS))
    rep_iter = int(te_all.get("replica_iterations", DEFAULT_REPLICA_ITERATIONS))
    per_refl = []
    with _executor(scheduler, workers) as (executor, where):
        say(f"phase retrieval runs on: {where}")
        for j, ((scan, digest), name, h) in enumerate(zip(scans, names, hkls)):
            prepared, k_prep, _ = prepared_all[j]
            data = prepared
            k_data = k_prep
            # -- grid (orthogonal route only)
            if route == "orthogonal":
                k_grid = hash_inputs("grid", k_prep, grid_opts)
                with run.timed("grid"):
                    data = rgd.regrid(prepared, **grid_opts)
                k_data = k_grid
            intensity = np.asarray(data.intensity, np.float32)
            mask = np.asarray(data.mask, bool)
            # -- phase
            seed_j = base_seed + 7919 * j
            k_phase = hash_inputs("phase", k_data, {k: v for k, v in cfg["phasing"].items()}, runs, keep, seed_j)
            with run.timed("phase"):
                tree = run.cached("phase", name, k_phase)
                if tree is not None and ("kept_objects" not in tree or "coherence" not in tree):
                    tree = None  # a checkpoint from before the kept runs or the coherence were stored
                if tree is None:
                    extra = f" and {n_partial} with the partial-coherence model" if n_partial else ""
                    say(f"  {name} {h}: phasing {intensity.shape} with {runs} random starts{extra} (keep {keep})")
                    t0 = time.perf_counter()
                    ens = ensemble(intensity, mask, runs=runs, keep=keep, seed=seed_j, executor=executor,
                                   progress=progress, **ph_opts)
                    run.phasing_seconds += time.perf_counter() - t0
                    tree = _phase_to_tree(ens, _real_voxel(data), frm.reciprocal_sample_basis(data))
                    run.save("phase", name, k_phase, tree)
            # -- sample frame
            k_frame = hash_inputs("frame", k_phase, route, fr_opts, g_ref[j])
            with run.timed("frame"):
                ft = run.cached("frame", name, k_frame)
                if ft is None:
                    so = frm.to_sample_frame(tree["obj"], data, support=tree["support"], g_vector=g_ref[j],
                                             ramp=tree["ramp"], **fr_opts)
                    so.hkl = h
                    so.meta["name"] = name
                    ft = sample_to_tree(so)
                    run.save("frame", name, k_frame, ft)
            so = tree_to_sample(ft)
            # -- spread: the kept runs and Poisson replicas on the sample-frame grid of `so`
            k_spread = hash_inputs("spread", k_frame, n_rep, rep_iter, REPLICA_RAAR_FRACTION, tns.UNCERTAINTY_MODEL)
            with run.timed("spread"):
                st = run.cached("spread", name, k_spread)
                if st is None:
                    if n_rep:
                        say(f"  {name} {h}: phasing {n_rep} Poisson replicas from the converged object")
                    st = _spread_samples(tree, data, intensity, mask, g_ref[j], so, fr_opts, n_rep, rep_iter,
                                         seed_j, executor, frm)
                    run.save("spread", name, k_spread, st)
            per_refl.append({"name": name, "hkl": h, "prepared": prepared, "phase": tree, "sample": so,
                             "key": k_frame, "scan": str(scan.path), "spread": st, "spread_key": k_spread})
            say(f"  {name} {h}: σ = {np.round(prepared.oversampling, 2).tolist()}, kept {len(tree['kept'])} of "
                f"{runs} runs, sample-frame voxel {np.round(so.voxel_size / 10, 2).tolist()} nm")

    # -- register
    te_opts = dict(opts["tensor"])
    te_opts.setdefault("resolution_blur", DEFAULT_RESOLUTION_BLUR)
    te_opts.pop("replicas", None)
    te_opts.pop("replica_iterations", None)
    reg_kw = {k: te_opts.pop(k) for k in ("min_overlap", "upsample", "twin_tolerance") if k in te_opts}
    vox = te_opts.pop("voxel_nm", None)
    if vox is not None:
        reg_kw["voxel_size"] = float(vox) * 10.0
    k_reg = hash_inputs("register", [p["key"] for p in per_refl], reg_kw)
    with run.timed("register"):
        rt = run.cached("register", "all", k_reg)
        if rt is None:
            reg, report = register([p["sample"] for p in per_refl], return_report=True, **reg_kw)
            rt = {"objects": [sample_to_tree(o) for o in reg], "report": plain_tree(report)}
            run.save("register", "all", k_reg, rt)
    registered = [tree_to_sample(t) for t in rt["objects"]]
    grid = registered[0].grid  # the common grid: every position below is on it
    common_vs = grid.voxel_size
    G = np.array([o.g_vector for o in registered])
    labels = [p["name"] for p in per_refl]

    # -- tensor
    k_ten = hash_inputs("tensor", k_reg, te_opts, [p["spread_key"] for p in per_refl], tns.UNCERTAINTY_MODEL)
    with run.timed("tensor"):
        tt = run.cached("tensor", "all", k_ten)
        if tt is None:
            import warnings

            common_support = np.logical_and.reduce([o.support for o in registered])
            cov, source = _gradient_covariance(per_refl, rt["report"], common_support, common_vs,
                                               int(te_opts.get("order", 2)))
            with warnings.catch_warnings(record=True) as caught:
                warnings.simplefilter("always")
                tf = tns.strain_tensor([o.obj for o in registered], G, common_vs,
                                       support=common_support, labels=labels, gradient_covariance=cov,
                                       covariance_source=source, **te_opts)
            for w in caught:
                say(f"  warning: {w.message}")
            tt = plain_tree(tf)
            tt["warnings"] = [str(w.message) for w in caught]
            run.save("tensor", "all", k_ten, tt)
    tfield = tree_to_tensor(tt)

    # -- mean lattice from the peak positions
    g_meas = []
    for p in per_refl:
        pr = p["prepared"]
        ramp = np.asarray(p["phase"]["ramp"], float)
        g_meas.append(pr.rotation.T @ (pr.q_center + pr.linear_map @ ramp))
    try:
        ml = mean_lattice_strain(np.array(g_meas), g_ref, lattice_parameter=crystal.lattice_parameters[0])
        mean_lattice = plain_tree(ml)
    except TensorError as e:
        mean_lattice = {"error": str(e)}

    # -- joint refinement (optional): the tensor and the dislocations from the joint objects
    tensor_independent, joint_summary, phase_objects, k_phases = None, None, registered, k_reg
    jo_opts = dict(opts["joint"])
    if jo_opts.pop("enabled", False):
        from braggstrain.joint.fit import FIT_VERSION

        k_joint = hash_inputs("joint", k_ten, [p["key"] for p in per_refl], jo_opts, FIT_VERSION)
        with run.timed("joint"):
            jt = run.cached("joint", "all", k_joint)
            if jt is None:
                jt = _joint(per_refl, registered, tfield, labels, G, common_vs, te_opts, jo_opts, say)
                run.save("joint", "all", k_joint, jt)
        joint_summary = {k: v for k, v in jt.items() if k not in ("objects", "tensor")}
        if "error" not in jt:
            tensor_independent, tfield = tfield, tree_to_tensor(jt["tensor"])
            from braggstrain.strain.objects import SampleObject

            phase_objects = [SampleObject(o, common_vs, g, tfield.support, grid.origin, r.hkl)
                             for o, g, r in zip(jt["objects"], G, registered)]
            k_phases = k_joint

    # -- defects
    de_opts = dict(opts["defects"])
    enabled = de_opts.pop("enabled", True)
    k_def = hash_inputs("defects", k_phases, de_opts, enabled, _DEFECTS_POINTS)
    dislocations = []
    with run.timed("defects"):
        if enabled:
            dt = run.cached("defects", "all", k_def)
            if dt is None:
                lines = dfx.find_dislocations([o.obj for o in phase_objects], [o.hkl for o in registered], G,
                                              support=tfield.support, crystal=crystal, grid=grid, **de_opts)
                dt = {"lines": [dislocation_to_tree(d) for d in lines]}
                run.save("defects", "all", k_def, dt)
            dislocations = [tree_to_dislocation(d) for d in dt["lines"]]

    # -- outputs
    results = _bundle(cfg, crystal, per_refl, registered, rt["report"], tfield, dislocations, mean_lattice,
                      run, base_seed, runs, keep, route, ph_opts.get("metric", DEFAULT_METRIC),
                      tensor_independent=tensor_independent, joint=joint_summary)
    results.provenance["command"] = command if command is not None else shlex.join(
        [Path(sys.argv[0]).name or "python", *sys.argv[1:]])
    paths = {}
    with run.timed("outputs"):
        from braggstrain.report import figures as figm
        from braggstrain.io import results as outp
        from braggstrain.report import html as repm

        ou = opts["output"]
        t_out = time.perf_counter()
        results.provenance["timings"] = dict(run.timings)
        results.provenance["wall_s"] = time.perf_counter() - t_start
        paths["results"] = outp.write_results(out / "results.h5", results)
        figs = None
        if ou.get("figures", True) or ou.get("report", True):
            figs = figm.make_figures(results, out / "figures")
            paths["figures"] = figs
        if ou.get("vtk", True):
            from braggstrain.io.vtk import export_vtk

            paths["vtk"] = export_vtk(results, out / "vtk")
        paths["dislocations"] = [write_dislocation_table(dislocations, out / "dislocations.csv"),
                                 write_dislocation_table(dislocations, out / "dislocations.json")]
        # the outputs stage's own time, up to the report (which shows it)
        timings = dict(run.timings)
        timings["outputs"] = timings.get("outputs", 0.0) + time.perf_counter() - t_out
        results.provenance["timings"] = timings
        results.provenance["wall_s"] = time.perf_counter() - t_start
        if ou.get("report", True):
            paths["report"] = repm.write_report(results, out, figures=figs)
        outp.update_provenance(paths["results"], {"timings": timings, "wall_s": results.provenance["wall_s"]})
    wall = time.perf_counter() - t_start
    return {"results": results, "paths": paths, "timings": dict(run.timings), "wall_s": wall,
            "phasing_s": run.phasing_seconds, "phasing_share": run.phasing_seconds / wall if wall else 0.0,
            "reused": run.reused}


def _spread_samples(tree, data, intensity, mask, g_ref, so, fr_opts, n_rep, rep_iter, seed, executor, frm):
    """The kept runs and (``n_rep`` ≥ 2) Poisson replicas of one reflection, each
    taken to the sample frame on the grid of ``so`` (the averaged object's).

    Returns a checkpoint tree: ``runs`` (K, *grid) and, with replicas,
    ``baseline`` (*grid) and ``replicas`` (R, *grid), complex64.
    """
    from braggstrain.phasing.replicas import poisson_replicas

    kw = dict(fr_opts)
    kw.update(voxel_size=so.voxel_size, shape=so.obj.shape, origin=so.origin)

    def to_frame(obj):
        return frm.to_sample_frame(obj, data, support=tree["support"], g_vector=g_ref, ramp=tree["ramp"],
                                   **kw).obj

    out = {"runs": np.stack([to_frame(o) for o in tree["kept_objects"]])}
    if n_rep >= 2:
        rs = poisson_replicas(intensity, mask, tree["obj"], tree["support"], ramp=tree["ramp"], replicas=n_rep,
                              iterations=rep_iter, seed=seed, executor=executor,
                              raar_fraction=REPLICA_RAAR_FRACTION,
                              coherence_kernel=(tree["coherence"].get("kernel")
                                                if tree["coherence"].get("model") == "partial" else None))
        out["baseline"] = to_frame(rs.baseline)
        out["replicas"] = np.stack([to_frame(o) for o in rs.replicas])
    return out


def _gradient_covariance(per_refl, reg_report, support, voxel_size, order):
    """Per-reflection phase-gradient covariance from the kept runs and replicas,
    on the common grid (``strain.spread.reconstruction_covariance``, docs/strain.md).

    Returns (covariance (J, 3, 3, *grid) or None, a sentence saying what it holds).
    """
    from braggstrain.strain.objects import SampleObject
    from braggstrain.strain.registration import apply_registration
    from braggstrain.strain.spread import reconstruction_covariance

    covs, parts = [], set()
    for j, p in enumerate(per_refl):
        so = p["sample"]
        st = p["spread"]

        def common(arr):
            o = SampleObject(arr, so.voxel_size, so.g_vector, so.support, so.origin, so.hkl, {})
            return apply_registration(o, reg_report, j).obj

        C, said = reconstruction_covariance(
            common(so.obj), voxel_size, support, runs=[common(a) for a in st["runs"]],
            replicas=[common(a) for a in st.get("replicas", [])],
            baseline=common(st["baseline"]) if "baseline" in st else None, order=order)
        if C is None:
            return None, ""
        covs.append(C)
        parts.update(said)
    return np.stack(covs).astype(np.float32), " and ".join(sorted(parts)) + " (per reflection)"


def _joint(per_refl, registered, tfield, labels, G, voxel_size, te_opts, jo_opts, say):
    """The joint stage's checkpoint tree: the fit and the tensor of its
    objects, or ``{"error": message}`` when the stage refuses (the rest of the
    run goes on with the independent tensor)."""
    import warnings

    from braggstrain.joint import JointError, joint_stage
    from braggstrain.strain import tensor as tns

    failed = {}
    for p, o in zip(per_refl, registered):
        if not len(p["phase"]["kept"]) or not o.support.any() or not np.all(np.isfinite(o.obj)):
            failed[p["name"]] = "no usable reconstruction on the common grid"
    if tfield.outlier is not None:  # a warning of the tensor stage, not a failure: the fit weighs it by its counts
        say(f"  joint refinement: '{tfield.outlier}' was flagged inconsistent by the tensor stage; it is fitted "
            f"with the others")
    try:
        jr = joint_stage([p["prepared"] for p in per_refl], registered, tfield, labels=labels, failed=failed,
                         **jo_opts)
    except JointError as e:
        say(f"  joint refinement not run: {e}")
        return {"error": str(e)}
    say(f"  joint refinement: {jr.iterations} iterations, kept iteration {jr.best_iteration} (lowest free "
        f"log-likelihood); NLL per voxel " + ", ".join(f"{n} {a:.4g} → {b:.4g}" for n, a, b in
                                                       zip(labels, jr.nll_before, jr.nll_after)))
    support = tfield.support & jr.support
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        tf = tns.strain_tensor(list(jr.objects), G, voxel_size, support=support, labels=labels, **te_opts)
    for w in caught:
        say(f"  warning (joint tensor): {w.message}")
    return {"objects": jr.objects, "tensor": plain_tree(tf), "labels": list(labels),
            "nll_before": jr.nll_before, "nll_after": jr.nll_after, "scales": jr.scales,
            "phase_offsets": jr.phase_offsets, "nll_history": np.asarray(jr.history["nll"], float),
            "free_nll_history": np.asarray(jr.history["free_nll"], float), "iterations": jr.iterations,
            "best_iteration": jr.best_iteration, "message": jr.message, "options": plain_tree(jr.options)}


def _versions():
    import importlib.metadata as md

    out = {"python": platform.python_version()}
    for pkg in ("braggstrain", "numpy", "scipy", "xrayutilities", "scikit-image", "h5py", "matplotlib",
                "pyFFTW", "numba", "dask", "distributed"):
        try:
            out[pkg] = md.version(pkg)
        except md.PackageNotFoundError:
            pass
    return out


def _bundle(cfg, crystal, per_refl, registered, reg_report, tf, dislocations, mean_lattice, run, seed, runs,
            keep, route, metric, tensor_independent=None, joint=None):
    """The :class:`~braggstrain.io.results.Results` of the run, built (and checked) once."""
    from braggstrain.io.results import ReflectionResult, Results
    from braggstrain.strain.fields import displacement_along_g

    from braggstrain.phasing.coherence import coherence_disagreements

    grid = registered[0].grid
    vs = grid.voxel_size
    support = tf.support
    amps = []
    refl = []
    # the coherence functions of the reflections: one beam, so they should agree
    cohs = [dict(p["phase"]["coherence"]) for p in per_refl]
    with_kernel = [c for c in cohs if "widths" in c]
    flags = coherence_disagreements([c["widths"] for c in with_kernel],
                                    [c["spread"] for c in with_kernel], [c["floor"] for c in with_kernel])
    for c, flag in zip(with_kernel, flags):
        c["disagreement"] = flag
    for p, o, coh in zip(per_refl, registered, cohs):
        a = np.abs(o.obj).astype(np.float32)
        med = np.median(a[o.support]) if np.any(o.support) else 1.0
        a = a / (med if med > 0 else 1.0)
        amps.append(a)
        ph = np.angle(o.obj).astype(np.float32)
        try:
            disp = displacement_along_g(o.obj, o.g_vector, vs, o.support)
        except BraggStrainError:
            disp = np.full(o.obj.shape, np.nan, np.float32)
        pr = p["prepared"]
        t = p["phase"]
        meta_reg = o.meta.get("registration", {}) if isinstance(o.meta, dict) else {}
        refl.append(ReflectionResult(
            name=p["name"], hkl=tuple(int(v) for v in p["hkl"]), g_vector=o.g_vector, scan=p["scan"],
            max_counts=float(pr.max_counts), oversampling=np.asarray(pr.oversampling, float), runs=len(t["runs"]),
            kept=len(t["kept"]), run_metrics=t["runs"], ranking_metric=t.get("metric", metric), prtf=t["prtf"],
            history=t["history"], amplitude=a, phase=ph, displacement=disp, support=o.support, coherence=coh,
            shift_vox=np.asarray(meta_reg.get("shift_voxels", np.zeros(3)), float),
            twin=bool(meta_reg.get("twin", False))))
    return Results(
        grid=grid,
        support=support, amplitude=np.mean(amps, axis=0).astype(np.float32),
        reflections=refl, tensor=tf, dislocations=dislocations, tensor_independent=tensor_independent,
        joint=joint,
        registration=reg_report, mean_lattice=mean_lattice,
        provenance={"pipeline_text": cfg.get("_text", ""), "pipeline_file": cfg.get("_source", ""),
                    "route": route, "versions": _versions(),
                    "seeds": {"phasing": seed, **{f"phasing {p['name']}": seed + 7919 * j
                                                  for j, p in enumerate(per_refl)}},
                    "ensemble": {"runs": runs, "keep": keep},
                    "timings": dict(run.timings), "reused": list(run.reused),
                    "created": datetime.now(timezone.utc).isoformat(timespec="seconds")})
