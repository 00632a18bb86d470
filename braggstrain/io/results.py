"""The results file: one HDF5 file (``results.h5``) with everything a run found.

:class:`Results` is the one object the pipeline builds (checked once, in its
constructor) and every output reads: the sample-frame grid, the crystal's
amplitude and support, every reflection's reconstruction and phasing record
(:class:`ReflectionResult`), the strain tensor
(:class:`braggstrain.strain.tensor.TensorField`), the dislocation lines
(:class:`braggstrain.defects.lines.Dislocation`) and the provenance of the
run. It answers questions: a reflection by name, a strain component by name,
the best run of a reflection (the ensemble's own ranking), the trusted mask.

* :func:`write_results` stores it in one HDF5 file, written atomically;
  every dataset carries ``units``, ``axes`` and ``description`` attributes.
  The layout is documented in ``docs/results.md``.
* :func:`read_results` reads such a file back into :class:`Results` (plain
  h5py reads only: nothing is evaluated or unpickled), files of layout 1
  (written before the version marker of :mod:`braggstrain.io.files`) too.

VTK files for ParaView are written by :mod:`braggstrain.io.vtk`, figures by
:mod:`braggstrain.report.figures`, the HTML page by :mod:`braggstrain.report.html`.

Conventions (docs/design.md): grid arrays have axes 0, 1, 2 along
sample-frame x, y, z; the grid's ``origin`` is the sample-frame position (Å)
of the voxel at index n//2 on each axis, and every position written
(``/grid/x, y, z``, the dislocation lines, the tables, the VTK files) comes
from that one grid (:class:`braggstrain.strain.grid.Grid`); lengths in Å, angles in radians
inside the file unless an attribute says otherwise; strain is
dimensionless, tensile positive.

Why one module of about 720 lines: the object, its writer and its reader
(of both layouts, damaged files named by the field being read) are one
file format; the plain-value conventions are in :mod:`braggstrain.io.hdf5`
and the checks in :mod:`braggstrain.io._results_check`.
"""

from __future__ import annotations

import shutil
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from braggstrain.errors import FileFormatError, InputError, did_you_mean
from braggstrain.io.files import atomic_path, file_version, mark_version, nbytes_of, open_versioned
from braggstrain.io._results_check import _check
from braggstrain.io.hdf5 import (GRID_AXES as _GRID_AXES, HISTORY_UNITS as _HISTORY_UNITS,
                                 dataset as _dataset, get_plain as _get, mask as _mask, plain as _plain,
                                 put_plain as _put, raw_node, read_run_table as _read_run_table,
                                 run_table as _run_table, Trail)
from braggstrain.phasing.ensemble import DEFAULT_METRIC, RANKING_METRICS
from braggstrain.strain.grid import Grid
from braggstrain.strain.components import (STRAIN_COMPONENTS, STRAIN_PAIRS, gradient_from, strain_components,
                                           strain_from_components)

__all__ = [
    "Results",
    "ReflectionResult",
    "RESULTS_FORMAT",
    "RESULTS_VERSION",
    "write_results",
    "read_results",
]

#: Version marker of the results file (:mod:`braggstrain.io.files`). Version
#: 2 adds the runs table's ``rank`` column and each reflection's
#: ``ranking_metric``; version 1 files (root attributes ``content`` =
#: "braggstrain results", ``layout_version`` = 1) are still read.
RESULTS_FORMAT = "braggstrain-results"
RESULTS_VERSION = 2
_LEGACY = ("content", "braggstrain results", "layout_version")


@dataclass
class ReflectionResult:
    """One reflection of :class:`Results`.

    Attributes
    ----------
    name : str
    hkl : tuple of 3 int
    g_vector : (3,) float, Å⁻¹, sample frame
    amplitude, phase : float32 grids (phase in rad, wrapped)
    support : bool grid
    displacement : float32 grid or None
        u along G, Å; NaN outside and where unwrapping failed.
    scan : str
    max_counts : float
    oversampling : (3,) float
    runs, kept : int
        Random starts made and averaged.
    run_metrics : list of dict
        One row per random start (the runs table: metrics, ``run``, ``seed``,
        ``status``, ``kept``, ``rank``…).
    ranking_metric : str
        The metric the ensemble ranked its runs by (``[phasing] metric``).
    prtf : dict or None
        ``q`` (Å⁻¹), ``values``, ``resolution`` (Å).
    history : dict name → 1-D array
        Per-iteration metrics of the best run.
    shift_vox : (3,) float
        Registration shift, voxels of the common grid.
    twin : bool
        Replaced by its twin at registration.
    coherence : dict
        The coherence function estimated from this reflection's data
        (docs/phasing.md, "Partial coherence"): ``model`` ("coherent",
        "partial", or "off" when the model was switched off); with a kernel,
        ``kernel`` (voxels of the phasing grid, unit sum), ``widths`` (Å⁻¹,
        principal axes, largest first), ``spread`` (Å⁻¹, over the kept runs),
        ``axes`` (3×3, unit columns, sample frame), ``lengths`` (coherence
        lengths 1/width, Å, inf where no blur is resolved),
        ``widths_voxels``, ``floor`` (Å⁻¹) and ``disagreement`` (a message
        when the widths disagree with the other reflections' beyond the
        spread, else empty); with the model chosen per reflection,
        ``choice`` (``metric``, ``coherent``, ``partial``: the best run's
        free negative log-likelihood of each model; ``partial_widths_voxels``).
        Empty for files written before it was recorded.
    """

    name: str
    hkl: tuple
    g_vector: np.ndarray
    amplitude: np.ndarray
    phase: np.ndarray
    support: np.ndarray
    displacement: np.ndarray | None = None
    scan: str = ""
    max_counts: float = float("nan")
    oversampling: np.ndarray = field(default_factory=lambda: np.full(3, np.nan))
    runs: int = 0
    kept: int = 0
    run_metrics: list = field(default_factory=list)
    ranking_metric: str = DEFAULT_METRIC
    prtf: dict | None = None
    history: dict = field(default_factory=dict)
    shift_vox: np.ndarray = field(default_factory=lambda: np.zeros(3))
    twin: bool = False
    coherence: dict = field(default_factory=dict)

    def best_run(self):
        """The run the ensemble ranked first, as a row of :attr:`run_metrics` (None without runs).

        From the recorded ``rank`` column (0 = best); a file written before
        that column existed is ranked again by :attr:`ranking_metric` among
        the successful runs, exactly as the ensemble ranks.
        """
        rows = self.run_metrics
        if not rows:
            return None
        if all("rank" in m for m in rows):
            best = [m for m in rows if int(m["rank"]) == 0]
            return best[0] if best else None
        metric = self.ranking_metric
        if metric not in RANKING_METRICS:
            raise InputError(f"reflection '{self.name}': ranking metric {metric!r} is not one of "
                             f"{sorted(RANKING_METRICS)}")
        ok = [m for m in rows if str(m.get("status", "ok")) == "ok" and metric in m]
        if not ok:
            return None
        sign = -1.0 if RANKING_METRICS[metric] else 1.0
        return min(ok, key=lambda m: (np.isnan(float(m[metric])), sign * float(m[metric])))


class Results:
    """Everything a run found, built once and asked questions by every output.

    The pipeline builds it (:meth:`from_dict` of its bundle) and
    :func:`read_results` returns it; the constructor checks every part
    (shapes on the common grid, types, units' conventions), so writers,
    figures, the report and the VTK export never check or guess again.

    Attributes
    ----------
    grid : :class:`braggstrain.strain.grid.Grid`
    support : bool grid
        The crystal (common support).
    amplitude : float32 grid
        Mean normalised amplitude over the reflections.
    reflections : list of :class:`ReflectionResult`
    tensor : :class:`braggstrain.strain.tensor.TensorField`
        From the joint objects when the joint stage ran, else from the
        independent reconstructions.
    tensor_independent : TensorField or None
        The independent route's tensor, kept beside the joint one.
    joint : dict or None
        The joint stage's summary (per-reflection NLL before and after, its
        history, scales, iterations), or ``{"error": message}`` when it was
        refused; None when it was not asked for.
    dislocations : list of :class:`braggstrain.defects.lines.Dislocation`
    registration, mean_lattice, provenance : dict of plain values
        ``provenance`` holds ``pipeline_text``, ``command``, ``created``,
        ``versions``, ``seeds``, ``timings``.
    """

    def __init__(self, grid, support, amplitude, reflections, tensor, dislocations=(), registration=None,
                 mean_lattice=None, provenance=None, tensor_independent=None, joint=None):
        out = _check(dict(grid=grid, support=support, amplitude=amplitude, reflections=reflections,
                          tensor=tensor, dislocations=dislocations, registration=registration,
                          mean_lattice=mean_lattice, provenance=provenance,
                          tensor_independent=tensor_independent, joint=joint))
        g = out["grid"]
        self.grid = Grid(g["shape"], g["voxel_size"], g["origin"])
        self.support = out["support"]
        self.amplitude = out["amplitude"]
        self.reflections = [ReflectionResult(**x) for x in out["reflections"]]
        self.tensor = out["tensor"]
        self.dislocations = out["dislocations"]
        self.registration = out["registration"]
        self.mean_lattice = out["mean_lattice"]
        self.provenance = out["provenance"]
        self.tensor_independent = out["tensor_independent"]
        self.joint = out["joint"]

    @classmethod
    def from_dict(cls, bundle):
        """Results from a bundle dict with the keys of the constructor's arguments."""
        if isinstance(bundle, Results):
            return bundle
        if not isinstance(bundle, dict):
            raise InputError(f"results: expected a dict (the results bundle), got {type(bundle).__name__}")
        for key in ("grid", "support", "amplitude", "reflections", "tensor"):
            if key not in bundle:
                raise InputError(f"results: missing key '{key}'")
        unknown = set(bundle) - set(_BUNDLE_KEYS)
        if unknown:
            raise InputError(f"results: unknown key(s) {sorted(unknown)}; expected some of {list(_BUNDLE_KEYS)}")
        return cls(**bundle)

    # -- questions ---------------------------------------------------------
    @property
    def names(self):
        """Reflection names, in order."""
        return [x.name for x in self.reflections]

    def reflection(self, name):
        """The :class:`ReflectionResult` of reflection ``name``."""
        for x in self.reflections:
            if x.name == name:
                return x
        raise InputError(f"reflection '{name}': not in the results{did_you_mean(name, self.names)}; "
                         f"expected one of {self.names}")

    def strain(self, component):
        """One strain component on the grid, e.g. ``"xz"`` (``"zx"`` is the same), dimensionless."""
        return self.tensor.strain[_component_index(component)]

    def strain_uncertainty(self, component):
        """One standard deviation of a strain component on the grid."""
        return self.tensor.strain_uncertainty[_component_index(component)]

    @property
    def trusted(self):
        """Voxels where the strain is trusted: the tensor's trusted mask inside the crystal."""
        return np.asarray(self.tensor.trusted, bool) & self.support

    def best_run(self, name):
        """The run the ensemble ranked first for reflection ``name`` (see :meth:`ReflectionResult.best_run`)."""
        return self.reflection(name).best_run()


_BUNDLE_KEYS = ("grid", "support", "amplitude", "reflections", "tensor", "dislocations", "registration",
                "mean_lattice", "provenance", "tensor_independent", "joint")


def _component_index(component):
    c = str(component).lower()
    for name, (i, k) in zip(STRAIN_COMPONENTS, STRAIN_PAIRS):
        if c in (name, name[::-1]):
            return i, k
    raise InputError(f"strain component {component!r}: expected one of {list(STRAIN_COMPONENTS)}")


# --------------------------------------------------------------------------
# writing
# --------------------------------------------------------------------------

def write_results(path, results):
    """Write the results bundle to one HDF5 file, atomically.

    The file is first written under a temporary name beside ``path`` and
    renamed onto it only when complete, so a failure leaves any earlier
    file untouched and no partial file behind. Layout: ``docs/results.md``.

    Parameters
    ----------
    path : str or Path
        Target file, conventionally ``results.h5``.
    results : Results
        (or a bundle dict, which :meth:`Results.from_dict` builds first).

    Returns
    -------
    Path
    """
    import h5py

    from braggstrain.io.dislocations import write_dislocations_h5

    r = Results.from_dict(results)
    path = Path(path)
    grid = r.grid
    shape = grid.shape
    vs = grid.voxel_size
    tf = r.tensor
    with atomic_path(path, size_hint=nbytes_of(vars(r))) as tmp:
        with h5py.File(tmp, "w") as f:
            mark_version(f, RESULTS_FORMAT, RESULTS_VERSION)
            f.attrs["frame"] = "sample frame: the lab frame with every sample circle at zero (y along the beam, z up)"
            f.attrs["axes"] = _GRID_AXES
            f.attrs["length_units"] = "Å"
            f.attrs["created"] = r.provenance.get("created", "")

            g = f.create_group("grid")
            g.attrs["voxel_size"] = vs
            g.attrs["origin"] = grid.origin
            g.attrs["shape"] = np.asarray(shape, np.int64)
            g.attrs["units"] = "Å"
            g.attrs["description"] = ("voxel_size: voxel edge along x, y, z; origin: sample-frame position of "
                                      "the voxel at index n//2 on each axis; the voxel at index i lies at "
                                      "origin + (i − n//2)·voxel_size (x, y, z below), and every position in "
                                      "this file (dislocation points, reference_position) is on this grid")
            for i, (ax, coord) in enumerate(zip("xyz", grid.axes)):
                _dataset(g, ax, coord, "Å", ax, f"sample-frame {ax} of the voxel centres along axis {i}",
                         dtype=np.float64, compress=False)

            c = f.create_group("crystal")
            _dataset(c, "amplitude", r.amplitude, "1 (normalised)", _GRID_AXES,
                     "mean over reflections of the normalised reconstructed amplitude")
            _mask(c, "support", r.support, "voxels inside the crystal (common support)")

            _write_tensor(f.create_group("tensor"), tf, grid)
            if r.tensor_independent is not None:
                ti = f.create_group("tensor_independent")
                ti.attrs["description"] = ("the tensor of the independent route (each reflection phased alone), "
                                           "kept beside /tensor, which comes from the joint refinement")
                _write_tensor(ti, r.tensor_independent, grid)
            if r.joint is not None:
                _put(f, "joint", r.joint, "results['joint']")
                f["joint"].attrs["description"] = (
                    "joint refinement of all reflections (docs/joint.md): Poisson NLL per measured voxel of "
                    "each reflection before and after (nll_before, nll_after, order of labels), the NLL of the "
                    "fitted and of the held-out voxels per iteration, or 'error' when the stage was refused")

            rg = f.create_group("reflections")
            rg.attrs["order"] = r.names
            for x in r.reflections:
                _write_reflection(rg.create_group(x.name), x)

            dg = f.create_group("dislocations")
            write_dislocations_h5(dg, r.dislocations)
            _label_dislocations(dg)

            for key in ("registration", "mean_lattice"):
                _put(f, key, getattr(r, key), f"results['{key}']")

            p = f.create_group("provenance")
            prov = r.provenance
            ds = p.create_dataset("pipeline_text", data=prov.get("pipeline_text", ""), dtype=h5py.string_dtype())
            ds.attrs["units"] = "text"
            ds.attrs["description"] = "the pipeline file (TOML) of the run, verbatim"
            p.attrs["command"] = prov.get("command", "")
            p.attrs["created"] = prov.get("created", "")
            for key in ("versions", "seeds", "timings"):
                _put(p, key, prov.get(key, {}), f"results['provenance']['{key}']")
            p["timings"].attrs["units"] = "s"
            p["timings"].attrs["units_summary"] = True
            extra = {k: v for k, v in prov.items()
                     if k not in ("pipeline_text", "command", "created", "versions", "seeds", "timings")}
            if extra:
                _put(p, "other", extra, "results['provenance']")
    return path


def _write_tensor(t, tf, grid):
    """One TensorField into group ``t`` (``/tensor`` and ``/tensor_independent``)."""
    comp_axes = "component (xx, yy, zz, yz, xz, xy), " + _GRID_AXES
    _dataset(t, "strain", strain_components(tf.strain), "1 (dimensionless, tensile positive)", comp_axes,
             "strain tensor ε = (D + Dᵀ)/2; NaN outside the support and where the solve failed")
    t["strain"].attrs["components"] = list(STRAIN_COMPONENTS)
    _dataset(t, "strain_uncertainty", strain_components(tf.strain_uncertainty), "1 (dimensionless)",
             comp_axes, "one standard deviation of each strain component (what it includes: the "
             "attribute 'includes'); NaN where it cannot be estimated")
    t["strain_uncertainty"].attrs["components"] = list(STRAIN_COMPONENTS)
    basis = tf.uncertainty_basis or "not recorded"
    t["strain_uncertainty"].attrs["includes"] = basis
    vec_axes = "component (x, y, z), " + _GRID_AXES
    _dataset(t, "rotation", tf.rotation, "rad", vec_axes,
             "lattice rotation: axial vector of (D − Dᵀ)/2, ω_x = (D_zy − D_yz)/2, ...")
    _dataset(t, "rotation_uncertainty", tf.rotation_uncertainty, "rad", vec_axes,
             "one standard deviation of each rotation component")
    t["rotation_uncertainty"].attrs["includes"] = basis
    t.attrs["uncertainty_basis"] = basis
    if tf.displacement is not None:
        _dataset(t, "displacement", tf.displacement, "Å", vec_axes,
                 "displacement vector u from the unwrapped phases, zero at the reference voxel; NaN "
                 "outside the support and where unwrapping failed")
    _dataset(t, "residual", tf.residual, "rad/Å", _GRID_AXES,
             "weighted RMS misfit of the phase gradients of all reflections to the fitted tensor")
    _dataset(t, "residual_per_reflection", tf.residual_per_reflection, "rad/Å",
             "reflection (order of g_vectors), " + _GRID_AXES,
             "RMS misfit of each reflection's phase gradient")
    _mask(t, "support", tf.support, "voxels where the tensor was solved")
    _mask(t, "trusted", tf.trusted, "support eroded by one voxel with every amplitude above threshold")
    _dataset(t, "g_vectors", tf.g_vectors, "Å⁻¹ (2π included)", "reflection, component (x, y, z)",
             "G vectors used for the tensor, sample frame", dtype=np.float64, compress=False)
    t.attrs["labels"] = [str(s) for s in tf.labels]
    t.attrs["condition_number"] = float(tf.condition_number)
    t.attrs["reference_voxel"] = np.asarray(tf.reference, np.int64)
    t.attrs["reference_position"] = grid.position(np.asarray(tf.reference, float))
    t.attrs["reference_position_units"] = "Å, sample frame (on /grid): where the displacement is zero"
    t.attrs["outlier"] = "" if tf.outlier is None else str(tf.outlier)
    t.attrs["displacement_gradient"] = ("not stored: D = strain + W(rotation), W the antisymmetric "
                                        "tensor of the rotation vector")
    if tf.outlier_scores:
        s = t.create_group("outlier_scores")
        s.attrs["description"] = "leave-one-out consistency score per reflection label"
        s.attrs["units"] = "1 (dimensionless)"
        for k, v in tf.outlier_scores.items():
            s.attrs[str(k)] = float(v)

    d = t.create_group("derived")
    _dataset(d, "hydrostatic", tf.hydrostatic, "1 (dimensionless)", _GRID_AXES, "hydrostatic strain tr(ε)/3")
    _dataset(d, "von_mises", tf.von_mises, "1 (dimensionless)", _GRID_AXES,
             "von Mises equivalent strain √(2/3 e:e), e the deviatoric strain")
    pv, pd = tf.principal
    _dataset(d, "principal_strains", pv, "1 (dimensionless)", "principal index (ε₁ ≥ ε₂ ≥ ε₃), " + _GRID_AXES,
             "principal strains, descending")
    _dataset(d, "principal_directions", pd, "1 (unit vectors)",
             "component (x, y, z), principal index, " + _GRID_AXES,
             "principal_directions[:, m] is the direction of principal strain m (sign arbitrary)")


_LINE_UNITS = {
    "points": ("Å", "point, component (x, y, z)",
               "points along the line: sample-frame positions on /grid (the voxel at index i lies at "
               "origin + (i − n//2)·voxel_size)"),
    "directions": ("1 (unit vectors)", "point, component (x, y, z)", "unit line direction ξ at each point"),
    "local_character_deg": ("degrees", "point", "angle between b and ξ at each point: 0 screw, 90 edge"),
    "hkl": ("1 (Miller indices)", "reflection, index", "reflections whose windings were measured"),
    "windings": ("1 (integer phase winding; −128 unknown)", "reflection",
                 "phase winding n_j right-handed about ξ, h_j·b = −n_j"),
    "agreement": ("1 (fraction of rings)", "reflection", "fraction of rings agreeing with the winding"),
}


def _label_dislocations(group):
    """Add units/axes/description to the line datasets that lack them."""
    for name, g in group.items():
        for key, node in g.items():
            if key in _LINE_UNITS:
                units, axes, desc = _LINE_UNITS[key]
                node.attrs.setdefault("units", units)
                node.attrs.setdefault("axes", axes)
                node.attrs.setdefault("description", desc)
            elif "units" not in node.attrs:
                node.attrs["units"] = "as given by braggstrain.defects"


def _write_reflection(g, x):
    g.attrs["name"] = x.name
    g.attrs["hkl"] = np.asarray(x.hkl, np.int64)
    g.attrs["g_vector"] = x.g_vector
    g.attrs["g_vector_units"] = "Å⁻¹ (2π included), sample frame"
    g.attrs["scan"] = x.scan
    g.attrs["max_counts"] = x.max_counts
    g.attrs["oversampling"] = x.oversampling
    g.attrs["runs"] = x.runs
    g.attrs["kept"] = x.kept
    g.attrs["shift_vox"] = x.shift_vox
    g.attrs["shift_units"] = "voxels of the common grid"
    g.attrs["twin"] = x.twin
    g.attrs["ranking_metric"] = x.ranking_metric
    _dataset(g, "amplitude", x.amplitude, "1 (normalised)", _GRID_AXES,
             "reconstructed amplitude on the common sample-frame grid")
    _dataset(g, "phase", x.phase, "rad (wrapped to (−π, π])", _GRID_AXES,
             "reconstructed phase φ = −G·u (wrapped)")
    if x.displacement is not None:
        _dataset(g, "displacement", x.displacement, "Å", _GRID_AXES,
                 "displacement along G, u_G = −φ/|G| (unwrapped); NaN outside and where unwrapping failed")
    _mask(g, "support", x.support, "this reflection's support after registration")
    _run_table(g, x.run_metrics, f"reflection '{x.name}' run_metrics")
    if x.prtf is not None:
        pg = g.create_group("prtf")
        pg.attrs["resolution"] = x.prtf["resolution"]
        pg.attrs["resolution_units"] = "Å"
        _dataset(pg, "q", x.prtf["q"], "Å⁻¹", "shell", "centre of each |q| shell", dtype=np.float64,
                 compress=False)
        _dataset(pg, "values", x.prtf["values"], "1 (dimensionless, 0..1)", "shell",
                 "phase-retrieval transfer function per shell (NaN where a shell is empty)",
                 dtype=np.float64, compress=False)
    if x.coherence:
        _write_coherence(g.create_group("coherence"), x.coherence)
    hg = g.create_group("history")
    hg.attrs["description"] = "per-iteration metrics of the best run"
    hist = x.history
    n_iter = max((len(v) for v in hist.values()), default=0)
    n_check = len(hist["checkpoint"]) if "checkpoint" in hist else -1
    for k, v in hist.items():
        if k == "checkpoint":
            axes = "checkpoint"
        elif len(v) == n_iter:
            axes = "iteration"
        elif len(v) == n_check:
            axes = "checkpoint (iteration numbers in 'checkpoint')"
        else:
            axes = "entry"
        _dataset(hg, k, v, _HISTORY_UNITS.get(k, "as given by the phasing stage"), axes,
                 f"history of '{k}'", dtype=None)


#: Datasets of a reflection's coherence group: units, axes, description.
_COHERENCE_FIELDS = {
    "kernel": ("1 (unit sum)", "reciprocal-grid voxels of the phasing array (frame, row, column), centred",
               "estimated coherence function: the kernel the coherent intensity is convolved with"),
    "widths": ("Å⁻¹", "principal axis", "standard deviations of the kernel along its principal axes, largest first"),
    "spread": ("Å⁻¹", "principal axis", "standard deviation of the widths over the kept runs"),
    "axes": ("1", "sample frame (x, y, z) × principal axis", "principal axes of the kernel, unit columns"),
    "lengths": ("Å", "principal axis", "coherence lengths 1/width along the principal axes (inf: no blur resolved)"),
    "widths_voxels": ("voxels", "principal axis", "the widths in voxels of the phasing array's reciprocal grid"),
}


def _write_coherence(g, c):
    g.attrs["model"] = str(c.get("model", "off"))
    g.attrs["description"] = ("coherence function estimated from this reflection's data "
                              "(docs/phasing.md, Partial coherence)")
    g.attrs["floor"] = float(c.get("floor", np.nan))
    g.attrs["floor_units"] = "Å⁻¹ (smallest spread assumed when comparing reflections)"
    g.attrs["disagreement"] = str(c.get("disagreement", ""))
    for key, (units, axes, desc) in _COHERENCE_FIELDS.items():
        if c.get(key) is not None:
            _dataset(g, key, np.asarray(c[key], float), units, axes, desc, dtype=np.float64, compress=False)
    if c.get("choice"):
        ch = c["choice"]
        cg = g.create_group("choice")
        cg.attrs["description"] = ("the model chosen by the held-out likelihood: the best run of each "
                                   "model, per held-out voxel (nats)")
        cg.attrs["metric"] = str(ch["metric"])
        cg.attrs["coherent"] = float(ch["coherent"])
        cg.attrs["partial"] = float(ch["partial"])
        cg.attrs["partial_widths_voxels"] = np.asarray(ch["partial_widths_voxels"], float)


def _read_coherence(g):
    c = {"model": _text(g.attrs.get("model")) or "off", "floor": float(g.attrs.get("floor", np.nan)),
         "disagreement": _text(g.attrs.get("disagreement"))}
    for key in _COHERENCE_FIELDS:
        if key in g:
            c[key] = g[key][()]
    if "choice" in g:
        a = g["choice"].attrs
        c["choice"] = {"metric": _text(a.get("metric")), "coherent": float(a["coherent"]),
                       "partial": float(a["partial"]),
                       "partial_widths_voxels": np.asarray(a["partial_widths_voxels"], float)}
    return c


# --------------------------------------------------------------------------
# reading
# --------------------------------------------------------------------------

def _need(node, key, path):
    if key not in node:
        raise FileFormatError(path, f"{node.name.rstrip('/')}/{key}", "missing; expected a results file "
                                                                      "written by braggstrain")
    return node[key]


def _text(v):
    v = _plain(v)
    return "" if v is None else str(v)


def read_results(path):
    """Read a results file back into :class:`Results`.

    Only datasets and attributes are read (h5py); nothing is evaluated or
    unpickled. The tensor comes back as a
    :class:`~braggstrain.strain.tensor.TensorField` (its displacement
    gradient rebuilt from strain and rotation), the lines as
    :class:`~braggstrain.defects.lines.Dislocation` records, their points on
    the file's grid (a file written before the points carried the grid's
    origin, recognised by its ``/dislocations`` group lacking
    ``points_frame``, has the origin added on reading). Files of layout 1
    (no ``rank`` column, no ``ranking_metric``) take the metric from the
    ``[phasing]`` table of their pipeline file.

    Raises
    ------
    FileFormatError (an InputError)
        The file is missing, not a braggstrain results file (of layout 1 or
        2), or lacks a field.
    """
    path = Path(path)
    f = open_versioned(path, RESULTS_FORMAT, (1, RESULTS_VERSION), legacy=_LEGACY)
    trail = Trail(f)
    try:
        with f:
            return _read_all(trail, path, file_version(f, _LEGACY[2]))
    except InputError:
        raise
    except (OSError, RuntimeError, KeyError, ValueError, TypeError, IndexError, AttributeError) as exc:
        first = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
        raise InputError(f"{path}: damaged: cannot read '{trail.last}' ({first}); expected a readable "
                         f"results file (rerun the pipeline with --resume to write it again)") from None


def update_provenance(path, values):
    """Replace entries of a results file's ``/provenance`` (e.g. the final
    ``timings``), atomically: a copy is edited and renamed onto ``path``."""
    import h5py

    path = Path(path)
    with atomic_path(path, size_hint=path.stat().st_size) as tmp:
        shutil.copyfile(path, tmp)
        with h5py.File(tmp, "r+") as f:
            p = f["provenance"]
            other = _get(p["other"]) if "other" in p else {}
            for key, value in values.items():
                if key in ("versions", "seeds", "timings"):
                    if key in p:
                        del p[key]
                    _put(p, key, value, f"results['provenance']['{key}']")
                    if key == "timings":
                        p["timings"].attrs["units"] = "s"
                        p["timings"].attrs["units_summary"] = True
                elif key in ("command", "created"):
                    p.attrs[key] = value
                else:
                    other[key] = value
            if other:
                if "other" in p:
                    del p["other"]
                _put(p, "other", other, "results['provenance']")
    return path


def _read_all(f, path, version):
    from braggstrain.io.dislocations import read_dislocations_h5
    from braggstrain.strain.tensor import TensorField

    g = _need(f, "grid", path)
    grid = Grid(tuple(int(n) for n in g.attrs["shape"]), np.asarray(g.attrs["voxel_size"], float),
                np.asarray(g.attrs["origin"], float))
    c = _need(f, "crystal", path)
    out = {"grid": grid,
           "amplitude": _need(c, "amplitude", path)[()],
           "support": _need(c, "support", path)[()].astype(bool)}

    out["tensor"] = _read_tensor(_need(f, "tensor", path), grid, path)
    if "tensor_independent" in f:
        out["tensor_independent"] = _read_tensor(f["tensor_independent"], grid, path)
    if "joint" in f:
        out["joint"] = _get(raw_node(f["joint"]))

    rg = _need(f, "reflections", path)
    order = [str(s) for s in _plain(rg.attrs["order"])]
    out["provenance"] = _read_provenance(_need(f, "provenance", path))
    legacy_metric = _phasing_metric(out["provenance"]["pipeline_text"]) if version == 1 else None
    out["reflections"] = [_read_reflection(_need(rg, name, path), path, legacy_metric) for name in order]
    dg = _need(f, "dislocations", path)
    out["dislocations"] = read_dislocations_h5(raw_node(dg))
    if "points_frame" not in dg.attrs:
        # written before the line points were put on the grid (issue 17): they were
        # computed with the origin taken as zero, i.e. relative to the voxel at n//2
        for d in out["dislocations"]:
            d.points = d.points + grid.origin
    for key in ("registration", "mean_lattice"):
        out[key] = _get(raw_node(f[key])) if key in f else {}
    return Results(**out)


def _read_tensor(t, grid, path):
    """A TensorField from a group written by :func:`_write_tensor`."""
    from braggstrain.strain.tensor import TensorField

    strain = strain_from_components(_need(t, "strain", path)[()])
    rotation = _need(t, "rotation", path)[()]
    labels = [str(s) for s in _plain(t.attrs["labels"])]
    tf = TensorField(
        displacement_gradient=gradient_from(strain, rotation).astype(np.float32),
        strain=strain,
        rotation=rotation,
        residual=_need(t, "residual", path)[()],
        residual_per_reflection=_need(t, "residual_per_reflection", path)[()],
        strain_uncertainty=strain_from_components(_need(t, "strain_uncertainty", path)[()]),
        rotation_uncertainty=_need(t, "rotation_uncertainty", path)[()],
        displacement=t["displacement"][()] if "displacement" in t else None,
        support=_need(t, "support", path)[()].astype(bool),
        trusted=_need(t, "trusted", path)[()].astype(bool),
        condition_number=float(t.attrs["condition_number"]),
        g_vectors=_need(t, "g_vectors", path)[()],
        labels=labels,
        voxel_size=grid.voxel_size.copy(),
        reference=tuple(int(v) for v in t.attrs["reference_voxel"]),
        outlier=_text(t.attrs.get("outlier")) or None,
        outlier_scores=({k: float(v) for k, v in t["outlier_scores"].attrs.items()
                         if k not in ("description", "units")} if "outlier_scores" in t else {}),
        uncertainty_basis=_text(t.attrs.get("uncertainty_basis")) or "",
    )
    return tf


def _read_provenance(p):
    prov = {"pipeline_text": _text(p["pipeline_text"][()]) if "pipeline_text" in p else "",
            "command": _text(p.attrs.get("command")), "created": _text(p.attrs.get("created"))}
    for key in ("versions", "seeds", "timings"):
        prov[key] = _get(raw_node(p[key])) if key in p else {}
    if "other" in p:
        prov.update(_get(raw_node(p["other"])))
    return prov


def _phasing_metric(pipeline_text):
    """The ranking metric a layout-1 file's run used: ``[phasing] metric`` of its
    pipeline file, else the ensemble's default."""
    try:
        import tomllib
    except ModuleNotFoundError:  # pragma: no cover - Python < 3.11
        import tomli as tomllib  # type: ignore
    try:
        metric = tomllib.loads(pipeline_text or "").get("phasing", {}).get("metric", DEFAULT_METRIC)
    except (tomllib.TOMLDecodeError, AttributeError):
        metric = DEFAULT_METRIC
    return metric if metric in RANKING_METRICS else DEFAULT_METRIC


def _read_reflection(g, path, legacy_metric=None):
    metric = legacy_metric or _text(g.attrs.get("ranking_metric")) or DEFAULT_METRIC
    x = {"name": _text(g.attrs["name"]),
         "ranking_metric": metric,
         "hkl": tuple(int(v) for v in g.attrs["hkl"]),
         "g_vector": np.asarray(g.attrs["g_vector"], float),
         "scan": _text(g.attrs.get("scan")),
         "max_counts": float(g.attrs["max_counts"]),
         "oversampling": np.asarray(g.attrs["oversampling"], float),
         "runs": int(g.attrs["runs"]),
         "kept": int(g.attrs["kept"]),
         "shift_vox": np.asarray(g.attrs["shift_vox"], float),
         "twin": bool(g.attrs["twin"]),
         "amplitude": _need(g, "amplitude", path)[()],
         "phase": _need(g, "phase", path)[()],
         "displacement": g["displacement"][()] if "displacement" in g else None,
         "support": _need(g, "support", path)[()].astype(bool),
         "run_metrics": _read_run_table(raw_node(g["runs"])) if "runs" in g else [],
         "prtf": None,
         "history": {k: v[()] for k, v in g["history"].items()} if "history" in g else {}}
    if "prtf" in g:
        pg = g["prtf"]
        x["prtf"] = {"q": pg["q"][()], "values": pg["values"][()], "resolution": float(pg.attrs["resolution"])}
    if "coherence" in g:
        x["coherence"] = _read_coherence(g["coherence"])
    return x
