"""The pipeline file: TOML, read with the standard library, validated up front.

Every problem is reported as :class:`~braggstrain.errors.ConfigError` with
the file, the key (dotted, e.g. ``reflection[2].hkl``), the value found and
what was expected; unknown keys are errors with a did-you-mean. Paths in the
file resolve relative to the file. Nothing read here is ever evaluated.

This module also builds the physical objects the file describes
(:func:`build_crystal`, :func:`build_instrument`, :func:`build_specimen`),
so every command reads a pipeline file the same way.
"""

from __future__ import annotations

import copy
from pathlib import Path

import numpy as np

from braggstrain.errors import BraggStrainError, ConfigError, did_you_mean

try:  # Python ≥ 3.11
    import tomllib
except ModuleNotFoundError:  # pragma: no cover
    import tomli as tomllib  # type: ignore

__all__ = ["load_config", "validate_config", "SCHEMA", "build_crystal", "build_instrument",
           "build_specimen", "resolve_path", "default_reflection_name"]


class _Spec:
    """One key of the schema: allowed types, default, a check, a doc line."""

    def __init__(self, types, default=None, required=False, check=None, doc=""):
        self.types = types if isinstance(types, tuple) else (types,)
        self.default = default
        self.required = required
        self.check = check
        self.doc = doc


class _Table(dict):
    """A TOML table in the schema (key → _Spec / _Table / _Array)."""


class _Array:
    """An array of tables, e.g. [[reflection]]."""

    def __init__(self, table, min_items=0):
        self.table = table
        self.min_items = min_items


def _vec(n, kind=float, positive=False):
    def check(v):
        if not isinstance(v, list) or len(v) != n:
            return f"a list of {n} {'integers' if kind is int else 'numbers'}"
        for x in v:
            if isinstance(x, bool) or not isinstance(x, (int, float)) or (kind is int and not isinstance(x, int)):
                return f"a list of {n} {'integers' if kind is int else 'numbers'}"
            if positive and not x > 0:
                return f"a list of {n} positive numbers"
        return None
    return check


def _positive(v):
    return None if v > 0 else "a positive number"


def _nonneg(v):
    return None if v >= 0 else "a non-negative number"


def _choice(*opts):
    def check(v):
        return None if v in opts else "one of " + ", ".join(repr(o) for o in opts)
    return check


def _matrix3(v):
    if not (isinstance(v, list) and len(v) == 3 and all(isinstance(r, list) and len(r) == 3 for r in v)):
        return "a 3×3 matrix (list of three lists of three numbers)"
    return None


_NAME_CHARS = set("abcdefghijklmnopqrstuvwxyzABCDEFGHIJKLMNOPQRSTUVWXYZ0123456789_-")


def _reflection_name(v):
    if not v:
        return "a non-empty name (leave the key out for the default refl_<hkl>)"
    if not set(v) <= _NAME_CHARS or len(v) > 64:
        return ("a name of at most 64 letters, digits, '_' and '-' (it names files inside the output "
                "folder)")
    return None


def default_reflection_name(hkl):
    """The name of a reflection whose ``[[reflection]]`` table gives none:
    ``refl_`` and the Miller indices, a minus sign written ``m`` (so (1 −1 0)
    is ``refl_1m10``)."""
    return "refl_" + "".join(str(int(v)).replace("-", "m") for v in hkl)


def _axis(v):
    return None if isinstance(v, str) and len(v) == 2 and v[0] in "xyz" and v[1] in "+-" else \
        "an axis with sense: x+, x-, y+, y-, z+ or z-"


NUM = (int, float)

_CIRCLE = _Table(
    name=_Spec(str, required=True, doc="circle name, used in angles"),
    axis=_Spec(str, required=True, check=_axis, doc="rotation axis and sense in the lab frame"),
    limits=_Spec(list, [-180.0, 180.0], check=_vec(2), doc="allowed range, degrees"),
)

SCHEMA = _Table(
    crystal=_Table(
        material=_Spec(str, None, doc="xrayutilities material name (Pt, Au, Si, ...)"),
        lattice=_Table(
            a=_Spec(NUM, None, check=_positive, doc="Å"), b=_Spec(NUM, None, check=_positive, doc="Å"),
            c=_Spec(NUM, None, check=_positive, doc="Å"), alpha=_Spec(NUM, 90.0), beta=_Spec(NUM, 90.0),
            gamma=_Spec(NUM, 90.0), centring=_Spec(str, "P", check=_choice("P", "I", "F", "A", "B", "C")),
            poisson=_Spec(NUM, 0.33),
        ),
        orientation=_Spec(list, None, check=_matrix3, doc="U: crystal Cartesian → sample frame"),
        orient_by=_Table(
            hkl1=_Spec(list, None, check=_vec(3, int)), direction1=_Spec(list, None, check=_vec(3)),
            hkl2=_Spec(list, None, check=_vec(3, int)), direction2=_Spec(list, None, check=_vec(3)),
        ),
    ),
    instrument=_Table(
        energy_kev=_Spec(NUM, required=True, check=_positive, doc="photon energy, keV"),
        override=_Spec(str, None, check=_choice("pipeline", "scans"),
                       doc="which values win when this file and a scan file disagree (energy, detector "
                           "distance, pixel size, circles); unset: a disagreement is refused"),
        beam=_Spec(str, "y+", check=_axis),
        sample_circles=_Array(_CIRCLE, min_items=1),
        detector_circles=_Array(_CIRCLE, min_items=0),
        detector=_Table(
            shape=_Spec(list, required=True, check=_vec(2, int, positive=True), doc="rows, columns"),
            pixel_size_um=_Spec(list, [75.0, 75.0], check=_vec(2, positive=True), doc="µm"),
            distance_m=_Spec(NUM, 1.0, check=_positive, doc="m"),
            direct_beam=_Spec(list, None, check=_vec(2), doc="pixel (row, column) at zero detector angles"),
            row_direction=_Spec(str, "z-", check=_axis), column_direction=_Spec(str, "x+", check=_axis),
            rotation_deg=_Spec(NUM, 0.0), gaps=_Spec(list, []),
            roi=_Spec(list, None, check=_vec(2, int), doc="[first_row, first_column] of stored frames"),
        ),
    ),
    reflection=_Array(_Table(
        hkl=_Spec(list, required=True, check=_vec(3, int)),
        scan=_Spec(str, None, doc="braggstrain scan file, relative to the pipeline file"),
        frames=_Spec((str, list), None, doc="frames: HDF5 file (\"file.h5#/path\"), EDF/CBF/TIFF file, folder or "
                                                  "glob pattern; a list for repeated scans (io/frames.py)"),
        dataset=_Spec(str, None, doc="dataset path inside an HDF5 frame stack"),
        rocking_circle=_Spec(str, None),
        angles=_Spec(dict, None, doc="circle → degrees, a list, {start, step}, or \"file.h5#/path\""),
        spec=_Spec((dict, list), None, doc="SPEC scan {file, scan, motors}: motor positions and counters"),
        monitor=_Spec((str, list), None, doc="SPEC counter name, \"file.h5#/path\" or one value per frame"),
        energy_kev=_Spec((int, float, str), None, doc="keV, or \"file.h5#/path\"; overrides the instrument's"),
        distance_m=_Spec((int, float, str), None, doc="m, or \"file.h5#/path\"; overrides the detector's"),
        roi=_Spec(list, None, check=_vec(2, int), doc="[first_row, first_column] of the stored frames"),
        repeat_max_shift=_Spec(NUM, 5.0, check=_positive, doc="voxels a repeated scan's peak may move"),
        mask=_Spec(str, None, doc="mask file (.npy, .npz, .tif, HDF5 file.h5#/dataset) relative to this file; "
                                  "True/nonzero = not measured; added to the scan's own mask"),
        name=_Spec(str, None, check=_reflection_name,
                   doc="letters, digits, _ and -; names the reflection's files (default refl_<hkl>)"),
    ), min_items=1),
    simulate=_Table(
        seed=_Spec(int, 0),
        peak_counts=_Spec(NUM, 1e5, check=_positive),
        background=_Spec(NUM, 0.5, check=_nonneg),
        hot_pixels=_Spec(int, 4, check=_nonneg),
        frames=_Spec(int, 64, check=_positive),
        window=_Spec(list, [128, 128], check=_vec(2, int, positive=True)),
        rocking_circle=_Spec(str, None),
        rocking_q_step=_Spec(NUM, 6e-4, check=_positive, doc="q step per frame, Å⁻¹ (sets each reflection's step)"),
        free_circles=_Spec(list, None),
        fixed_angles=_Spec(dict, {}),
        peak_pixel=_Spec(list, None, check=_vec(2)),
        supersample=_Spec(int, 2, check=_positive),
        coherence_sigma=_Spec(list, None, check=_vec(3, positive=True),
                              doc="Gaussian partial-coherence blur of the intensity before counting, voxels "
                                  "along frame, row, column"),
        coherence_rotation=_Spec(list, None, check=_vec(3),
                                 doc="rotation vector (rad) of that blur's axes from the array axes"),
        reflection_peak_counts=_Spec(dict, {}, doc="reflection name → its own peak counts (e.g. one weak "
                                                   "reflection); the others get peak_counts"),
        offset_nm=_Spec(list, [0.0, 0.0, 0.0], check=_vec(3),
                        doc="the specimen's centre in the sample frame, nm (off-centre in the beam)"),
        invert=_Spec(bool, False, doc="the truth is the point-inverted specimen (the twin of the one described); "
                                      "the scans, whose intensity the twin shares exactly, are the same counts"),
        truth_voxel_nm=_Spec(NUM, 10.0, check=_positive),
        truth_shape=_Spec(list, [48, 48, 48], check=_vec(3, int, positive=True)),
        shape=_Table(
            kind=_Spec(str, "truncated_octahedron", check=_choice("truncated_octahedron", "octahedron", "cube", "ellipsoid", "polyhedron")),
            size_nm=_Spec(NUM, 200.0, check=_positive, doc="vertex-to-vertex (octahedra) or edge (cube)"),
            truncation=_Spec(NUM, 0.7, check=_positive),
            semi_axes_nm=_Spec(list, None, check=_vec(3, positive=True)),
            normals=_Spec(list, None), distances_nm=_Spec(list, None),
            flat_normal=_Spec(list, None, check=_vec(3), doc="sample frame; a flat face, e.g. on a substrate"),
            flat_nm=_Spec(NUM, None, check=_positive),
            frame=_Spec(str, "crystal", check=_choice("crystal", "sample"), doc="frame of the face normals"),
        ),
        field=_Array(_Table(
            kind=_Spec(str, required=True, check=_choice("dislocation", "loop", "interface", "uniform", "rotation")),
            point_nm=_Spec(list, [0.0, 0.0, 0.0], check=_vec(3)),
            line=_Spec(list, None, check=_vec(3), doc="line direction, crystal indices [uvw]"),
            burgers=_Spec(list, None, check=_vec(3), doc="lattice coordinates"),
            normal=_Spec(list, None, check=_vec(3)),
            radius_nm=_Spec(NUM, None, check=_positive),
            position_nm=_Spec(NUM, None),
            strain=_Spec(NUM, None),
            decay_nm=_Spec(NUM, None, check=_positive),
            tensor=_Spec(list, None, check=_matrix3),
            rotvec_deg=_Spec(list, None, check=_vec(3)),
        )),
    ),
    checks=_Table(
        q_tolerance=_Spec(NUM, 0.01, check=_positive,
                          doc="largest relative difference between |Q| at the measured peak and |G(hkl)|"),
        direction_tolerance_deg=_Spec(NUM, 2.0, check=_positive,
                                      doc="largest angle between Q at the peak and the declared G, degrees"),
    ),
    prepare=_Spec(dict, {}, doc="options of braggstrain.prepare.scan.prepare_scan"),
    phasing=_Spec(dict, {}, doc="ensemble size, seed and plan of phase retrieval"),
    frame=_Spec(dict, {}, doc="route to the sample frame"),
    tensor=_Spec(dict, {}, doc="registration and tensor options"),
    defects=_Spec(dict, {}, doc="dislocation options"),
    joint=_Spec(dict, {}, doc="joint refinement of all reflections (braggstrain.joint)"),
    output=_Spec(dict, {}, doc="outputs"),
    plan=_Spec(dict, {}, doc="measurement planner options"),
)


def _validate(value, schema, where, src):
    if isinstance(schema, _Table):
        if not isinstance(value, dict):
            raise ConfigError(f"{src}: {where or 'file'}: expected a table, got {type(value).__name__}")
        out = {}
        for k in value:
            if k not in schema:
                raise ConfigError(f"{src}: unknown key '{(where + '.') if where else ''}{k}'"
                                  f"{did_you_mean(k, schema)}; expected one of {sorted(schema)}")
        for k, spec in schema.items():
            sub = f"{where}.{k}" if where else k
            if k in value:
                out[k] = _validate(value[k], spec, sub, src)
            elif isinstance(spec, _Table):
                out[k] = _validate({}, spec, sub, src)
            elif isinstance(spec, _Array):
                if spec.min_items and where == "":
                    raise ConfigError(f"{src}: missing key '{sub}': expected at least {spec.min_items} entries")
                out[k] = []
            elif spec.required:
                raise ConfigError(f"{src}: missing key '{sub}': {spec.doc or 'required'}")
            else:
                out[k] = copy.deepcopy(spec.default)
        return out
    if isinstance(schema, _Array):
        if not isinstance(value, list):
            raise ConfigError(f"{src}: {where}: expected an array of tables ([[{where}]]), got {type(value).__name__}")
        if len(value) < schema.min_items:
            raise ConfigError(f"{src}: {where}: expected at least {schema.min_items} entries, got {len(value)}")
        return [_validate(v, schema.table, f"{where}[{i}]", src) for i, v in enumerate(value)]
    spec = schema
    ok = isinstance(value, spec.types) and not (isinstance(value, bool) and bool not in spec.types)
    if not ok:
        names = " or ".join(t.__name__ for t in spec.types)
        raise ConfigError(f"{src}: key '{where}': value {value!r} has type {type(value).__name__}; expected {names}")
    if spec.check is not None:
        msg = spec.check(value)
        if msg:
            raise ConfigError(f"{src}: key '{where}': value {value!r}; expected {msg}")
    return value


def validate_config(raw, source="<pipeline>", require_reflections=True):
    """Validate a parsed pipeline dict; return it with defaults filled in.

    ``require_reflections=False`` accepts a file without ``[[reflection]]``
    entries (e.g. one written only for the measurement planner)."""
    if not require_reflections and "reflection" not in raw:
        raw = dict(raw)
        raw["reflection"] = []
        schema = _Table(SCHEMA)
        schema["reflection"] = _Array(SCHEMA["reflection"].table, min_items=0)
        cfg = _validate(raw, schema, "", source)
    else:
        cfg = _validate(raw, SCHEMA, "", source)
    c = cfg["crystal"]
    if c["material"] is None and c["lattice"]["a"] is None:
        raise ConfigError(f"{source}: key 'crystal': expected 'material' (a name) or 'lattice.a' (Å)")
    names = [x["name"] for x in cfg["instrument"]["sample_circles"] + cfg["instrument"]["detector_circles"]]
    for i, r in enumerate(cfg["reflection"]):
        if r["name"] is None:
            r["name"] = default_reflection_name(r["hkl"])
        if r["angles"] is not None:
            for k in r["angles"]:
                if k not in names:
                    raise ConfigError(f"{source}: key 'reflection[{i}].angles.{k}': unknown circle"
                                      f"{did_you_mean(k, names)}; expected one of {names}")
    names = [r["name"] for r in cfg["reflection"]]
    for i, n in enumerate(names):
        if names.index(n) != i:
            raise ConfigError(f"{source}: key 'reflection[{i}].name': value {n!r} is also the name of "
                              f"reflection[{names.index(n)}]; expected unique names")
    cfg["_source"] = str(source)
    cfg["_given"] = sorted(_given_keys(raw.get("instrument", {}), "instrument"))
    return cfg


def _given_keys(table, where):
    """Dotted keys written in the file (not filled in from defaults)."""
    out = set()
    if isinstance(table, dict):
        for k, v in table.items():
            out.add(f"{where}.{k}")
            if isinstance(v, dict):
                out |= _given_keys(v, f"{where}.{k}")
    return out


def load_config(path, require_reflections=True):
    """Read and validate a pipeline file (TOML).

    Raises
    ------
    ConfigError naming the file and key for any problem.
    """
    p = Path(path)
    if not p.is_file():
        raise ConfigError(f"{p}: pipeline file not found")
    try:
        text = p.read_text(encoding="utf-8")
        raw = tomllib.loads(text)
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as e:
        raise ConfigError(f"{p}: not valid TOML: {e}") from None
    cfg = validate_config(raw, str(p), require_reflections=require_reflections)
    cfg["_text"] = text
    cfg["_dir"] = str(p.resolve().parent)
    return cfg


def resolve_path(cfg, value, key):
    """A path from the pipeline file, relative to the file's folder."""
    if value is None:
        raise ConfigError(f"{cfg.get('_source')}: key '{key}': expected a path")
    p = Path(value)
    if not p.is_absolute():
        p = Path(cfg.get("_dir", ".")) / p
    return p


# --------------------------------------------------------------------------
# building the physical objects
# --------------------------------------------------------------------------

def build_crystal(cfg):
    """Crystal of a validated pipeline dict (material or lattice, orientation)."""
    from braggstrain.geometry.crystal import Crystal

    c = cfg["crystal"]
    src = cfg.get("_source", "<pipeline>")
    try:
        if c["material"] is not None:
            cr = Crystal(c["material"])
        else:
            lat = c["lattice"]
            cr = Crystal.from_lattice(lat["a"], lat["b"], lat["c"], lat["alpha"], lat["beta"], lat["gamma"],
                                      centring=lat["centring"], poisson=lat["poisson"])
        if c["orientation"] is not None:
            cr = cr.with_orientation(np.asarray(c["orientation"], float))
        elif c["orient_by"]["hkl1"] is not None:
            ob = c["orient_by"]
            if None in (ob["direction1"], ob["hkl2"], ob["direction2"]):
                raise ConfigError(f"{src}: key 'crystal.orient_by': expected hkl1, direction1, hkl2, direction2")
            cr = cr.oriented_by(ob["hkl1"], ob["direction1"], ob["hkl2"], ob["direction2"])
    except ConfigError:
        raise
    except BraggStrainError as e:
        raise ConfigError(f"{src}: key 'crystal': {e}") from None
    return cr


def build_instrument(cfg):
    """Diffractometer of a validated pipeline dict."""
    from braggstrain.geometry.instrument import Circle, Detector, Diffractometer

    ins = cfg["instrument"]
    d = ins["detector"]
    src = cfg.get("_source", "<pipeline>")
    try:
        db = d["direct_beam"] if d["direct_beam"] is not None else [d["shape"][0] / 2, d["shape"][1] / 2]
        det = Detector(shape=tuple(d["shape"]), pixel_size=tuple(v * 1e-6 for v in d["pixel_size_um"]),
                       distance=float(d["distance_m"]), direct_beam=tuple(float(v) for v in db),
                       row_direction=d["row_direction"], column_direction=d["column_direction"],
                       rotation_deg=float(d["rotation_deg"]), gaps=tuple(tuple(int(x) for x in g) for g in d["gaps"]))
        return Diffractometer([Circle(c["name"], c["axis"], tuple(c["limits"])) for c in ins["sample_circles"]],
                              [Circle(c["name"], c["axis"], tuple(c["limits"])) for c in ins["detector_circles"]],
                              det, float(ins["energy_kev"]), ins["beam"])
    except BraggStrainError as e:
        raise ConfigError(f"{src}: key 'instrument': {e}") from None


def build_specimen(cfg, crystal):
    """Shape and displacement field of the [simulate] table (sample frame, Å).

    Returns (shape, field, truth_lines) where truth_lines lists the
    dislocations as dicts (point Å, line unit vector, burgers lattice and Å).
    ``offset_nm`` moves the whole specimen and ``invert`` point-inverts it
    first (the twin: same ξ, −b, point −p; :class:`~braggstrain.simulate.forward.PlacedField`).
    """
    from braggstrain.simulate import forward as fw

    sim = cfg["simulate"]
    src = cfg.get("_source", "<pipeline>")
    sh = sim["shape"]
    U = crystal.U
    R = U if sh["frame"] == "crystal" else np.eye(3)
    size = sh["size_nm"] * 10.0
    octa = np.array([[i, j, k] for i in (1, -1) for j in (1, -1) for k in (1, -1)], float)
    cubef = np.array([[1, 0, 0], [-1, 0, 0], [0, 1, 0], [0, -1, 0], [0, 0, 1], [0, 0, -1]], float)
    kind = sh["kind"]
    if kind == "ellipsoid":
        if sh["semi_axes_nm"] is None:
            raise ConfigError(f"{src}: key 'simulate.shape.semi_axes_nm': expected three semi-axes for an ellipsoid")
        shape = fw.Ellipsoid(np.asarray(sh["semi_axes_nm"]) * 10.0, rotation=R)
    else:
        if kind == "octahedron":
            normals, dists = octa, np.full(8, size / (2 * np.sqrt(3)))
        elif kind == "truncated_octahedron":
            normals = np.vstack([octa, cubef])
            dists = np.r_[np.full(8, size / (2 * np.sqrt(3))), np.full(6, sh["truncation"] * size / 2)]
        elif kind == "cube":
            normals, dists = cubef, np.full(6, size / 2)
        else:
            if sh["normals"] is None or sh["distances_nm"] is None:
                raise ConfigError(f"{src}: key 'simulate.shape': a polyhedron needs 'normals' and 'distances_nm'")
            normals, dists = np.asarray(sh["normals"], float), np.asarray(sh["distances_nm"], float) * 10.0
        normals = (R @ (normals / np.linalg.norm(normals, axis=1, keepdims=True)).T).T
        if sh["flat_normal"] is not None:
            if sh["flat_nm"] is None:
                raise ConfigError(f"{src}: key 'simulate.shape.flat_nm': expected the flat face's distance (nm)")
            normals = np.vstack([normals, sh["flat_normal"]])
            dists = np.r_[dists, sh["flat_nm"] * 10.0]
        shape = fw.Polyhedron(normals, dists)
    parts = []
    lines = []
    nu = crystal.poisson_ratio
    for i, f in enumerate(sim["field"]):
        where = f"simulate.field[{i}]"
        k = f["kind"]

        def need(*keys):
            for key in keys:
                if f[key] is None:
                    raise ConfigError(f"{src}: key '{where}.{key}': required for kind '{k}'")
        if k == "dislocation":
            need("line", "burgers")
            xi = U @ (crystal.A @ np.asarray(f["line"], float))
            xi /= np.linalg.norm(xi)
            b = crystal.burgers_to_sample(f["burgers"])
            p = np.asarray(f["point_nm"], float) * 10.0
            parts.append(fw.StraightDislocation(p, xi, b, poisson=nu, core=1.0))
            lines.append({"kind": "straight", "point": p, "line": xi, "burgers": np.asarray(f["burgers"], float),
                          "burgers_sample": b})
        elif k == "loop":
            need("normal", "radius_nm", "burgers")
            n = U @ (crystal.B @ np.asarray(f["normal"], float))
            n /= np.linalg.norm(n)
            b = crystal.burgers_to_sample(f["burgers"])
            c = np.asarray(f["point_nm"], float) * 10.0
            parts.append(fw.DislocationLoop(c, n, f["radius_nm"] * 10.0, b))
            lines.append({"kind": "loop", "point": c, "line": n, "radius": f["radius_nm"] * 10.0,
                          "burgers": np.asarray(f["burgers"], float), "burgers_sample": b})
        elif k == "interface":
            need("normal", "position_nm", "strain", "decay_nm")
            parts.append(fw.InterfaceGradient(f["normal"], f["position_nm"] * 10.0, f["strain"], f["decay_nm"] * 10.0))
        elif k == "uniform":
            need("tensor")
            parts.append(fw.UniformStrain(np.asarray(f["tensor"], float)))
        elif k == "rotation":
            need("rotvec_deg")
            parts.append(fw.RigidRotation(np.radians(f["rotvec_deg"])))
    field_ = fw.FieldSum(parts) if parts else None
    offset = np.asarray(sim["offset_nm"], float) * 10.0
    invert = bool(sim["invert"])
    if invert or np.any(offset):  # the whole specimen moved in the beam and/or point-inverted (its twin)
        shape = fw.PlacedShape(shape, offset, invert)
        field_ = None if field_ is None else fw.PlacedField(field_, offset, invert)
        for ln in lines:
            ln["point"] = fw.place_point(ln["point"], offset, invert)
            if invert:
                ln["burgers"] = -ln["burgers"]
                ln["burgers_sample"] = -np.asarray(ln["burgers_sample"], float)
    return shape, field_, lines
