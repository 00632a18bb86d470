"""Values a beamline stored in its own files: motor positions, monitors, energy.

A value that a pipeline file would otherwise hold as a number may name where
it is stored:

* ``"file.h5#/path/to/dataset"``: an HDF5 dataset, a scalar or one value
  per frame (:func:`read_value`; the path relative to the pipeline file);
* a SPEC scan file, read with xrayutilities' SPEC reader
  (:func:`read_spec_scan`): the scanned motor's position at every point
  from the data columns, every other motor's from the scan header (``#P``
  lines, named by the file's ``#O`` lines), and counters (the monitor) from
  the data columns.

:func:`reflection_scan` assembles one reflection's :class:`Scan` from such
sources (frames through :mod:`braggstrain.io.frames`). Every failure is a
:class:`~braggstrain.errors.ScanFileError` (a file's field) or
:class:`~braggstrain.errors.ConfigError` (a pipeline key) that names the
file, the key and what was expected.
"""

from __future__ import annotations

import contextlib
import io
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from braggstrain.errors import ConfigError, ScanFileError

__all__ = ["read_value", "read_spec_scan", "SpecScan", "reflection_scan", "is_file_value"]


def is_file_value(value):
    """True for a string naming a stored value (``"file.h5#/path"``)."""
    return isinstance(value, str) and "#" in value


def _resolve(base_dir, name):
    p = Path(name)
    if not p.is_absolute() and base_dir is not None:
        p = Path(base_dir) / p
    return p


def read_value(spec, base_dir=None, *, key="value", n_frames=None):
    """A number or one number per frame stored in an HDF5 dataset.

    Parameters
    ----------
    spec : ``"file.h5#/path/to/dataset"`` (or a number / list, returned as
        an array)
    base_dir : folder that relative file names start from (the pipeline
        file's)
    key : the pipeline key, for messages
    n_frames : when given, the value must be a scalar or hold this many
        values

    Returns
    -------
    float ndarray, 0-D or (n_frames,)

    Raises
    ------
    ScanFileError
        naming the file and the dataset: file or dataset missing, not
        numeric, not finite, or of the wrong length.
    """
    if not is_file_value(spec):
        a = np.asarray(spec, float)
    else:
        from braggstrain.io.frames import _open_h5

        fname, ds = str(spec).split("#", 1)
        path = _resolve(base_dir, fname)
        with _open_h5(path) as f:
            obj = f.get(ds)
            if obj is None or not hasattr(obj, "dtype"):
                raise ScanFileError(path, ds, f"dataset not found (pipeline key '{key}'); expected a number or "
                                              f"one value per frame")
            try:
                a = np.asarray(obj[()], float)
            except (TypeError, ValueError, OSError) as e:
                raise ScanFileError(path, ds, f"expected numbers for '{key}' ({e})") from None
        spec = f"{path}#{ds}"
        if a.ndim > 1:
            a = np.squeeze(a)  # e.g. (F, 1) as some writers store a column
        if a.ndim > 1:
            raise ScanFileError(path, ds, f"expected a scalar or a 1-D array for '{key}', got shape {a.shape}")
    if not np.all(np.isfinite(a)):
        raise ScanFileError(str(spec), key, "expected finite numbers")
    if n_frames is not None and a.ndim == 1 and a.size != n_frames:
        if a.size == 1:
            return a.reshape(())
        fname, _, ds = str(spec).partition("#")
        raise ScanFileError(fname, ds or key, f"expected a scalar or {n_frames} values (one per frame) for "
                                              f"'{key}', got {a.size}")
    return a


@dataclass
class SpecScan:
    """One scan of a SPEC file: header motor positions and data columns."""

    path: str
    number: int
    command: str
    motors: dict = field(default_factory=dict)
    columns: dict = field(default_factory=dict)

    @property
    def n_points(self):
        return len(next(iter(self.columns.values()))) if self.columns else 0

    def position(self, name, key="angles"):
        """The motor ``name`` per point (a data column) or fixed (the header)."""
        from xrayutilities.utilities import makeNaturalName

        nat = makeNaturalName(name)
        for n in (name, nat):
            if n in self.columns:
                return np.asarray(self.columns[n], float)
        for n in (name, nat):
            if n in self.motors:
                return np.asarray(self.motors[n], float)
        raise ScanFileError(self.path, f"scan {self.number}: {name}",
                            f"motor not found for '{key}'; expected one of the columns {sorted(self.columns)} "
                            f"or the header motors {sorted(self.motors)}")

    def counter(self, name, key="monitor"):
        """The data column ``name`` (a counter such as the monitor)."""
        from xrayutilities.utilities import makeNaturalName

        for n in (name, makeNaturalName(name)):
            if n in self.columns:
                return np.asarray(self.columns[n], float)
        raise ScanFileError(self.path, f"scan {self.number}: {name}",
                            f"counter not found for '{key}'; expected one of the columns {sorted(self.columns)}")


def read_spec_scan(path, number):
    """Read scan ``number`` of a SPEC file with xrayutilities' reader.

    Raises
    ------
    ScanFileError
        naming the file: missing, unreadable, or without that scan number
        (the numbers found are listed).
    """
    import xrayutilities as xu

    path = Path(path)
    if not path.is_file():
        raise ScanFileError(path, "(file)", "SPEC file not found")
    try:
        with contextlib.redirect_stdout(io.StringIO()):
            sf = xu.io.SPECFile(str(path))
    except Exception as e:  # noqa: BLE001 - any parser failure
        raise ScanFileError(path, "(file)", f"not a readable SPEC file ({e})") from None
    found = [int(s.nr) for s in sf.scan_list]
    matches = [s for s in sf.scan_list if int(s.nr) == int(number)]
    if not matches:
        raise ScanFileError(path, f"scan {number}", f"no such scan; expected one of the scan numbers {found}")
    s = matches[0]
    try:
        with contextlib.redirect_stdout(io.StringIO()):
            s.ReadData()
    except Exception as e:  # noqa: BLE001
        raise ScanFileError(path, f"scan {number}", f"data not readable ({e})") from None
    data = s.data
    if data is None or not getattr(data, "dtype", None) or not data.dtype.names:
        raise ScanFileError(path, f"scan {number}", "expected data columns (#L line and data rows), found none")
    columns = {n: np.asarray(data[n], float).reshape(-1) for n in data.dtype.names}
    motors = {k[len("INIT_MOPO_"):]: float(v) for k, v in s.init_motor_pos.items()}
    return SpecScan(path=str(path), number=int(number), command=str(s.command).strip(), motors=motors,
                    columns=columns)


# --------------------------------------------------------------------------
# one reflection's scan from its sources
# --------------------------------------------------------------------------

def _as_list(v):
    return list(v) if isinstance(v, list) else [v]


def _n_repeats(entry):
    fr = entry.get("frames")
    return len(fr) if isinstance(fr, list) else 1


def reflection_scan(entry, instrument, *, base_dir, key, source="<pipeline>", detector_roi=None):
    """Read one reflection's scan (or its repeats) from a pipeline-file table.

    Parameters
    ----------
    entry : dict, the validated ``[[reflection]]`` table: ``frames`` (a
        source of :func:`braggstrain.io.frames.read_frames`, or a list of
        them for repeated scans), ``dataset``, ``rocking_circle``, ``angles``
        (circle → degrees, a list, ``{start, step}``, or ``"file.h5#/path"``),
        ``spec`` (``{file, scan, motors}``, or a list for repeats),
        ``monitor`` (a SPEC column name, ``"file.h5#/path"``, or a list of
        numbers), ``energy_kev`` and ``distance_m`` (numbers or
        ``"file.h5#/path"``), ``roi`` ([first_row, first_column]).
    instrument : Diffractometer of the pipeline file (full detector)
    base_dir : folder of the pipeline file
    key : "reflection[i]", for messages
    source : the pipeline file's name, for messages
    detector_roi : [first_row, first_column] of the detector table, used
        when the entry gives no ``roi``

    Returns
    -------
    list of Scan, one per repeat; their ``extra`` holds ``sources``
    (what came from where) and ``roi``.
    """
    from braggstrain.geometry.instrument import Diffractometer
    from braggstrain.io.frames import read_frames
    from braggstrain.io.scans import Scan

    frames_list = _as_list(entry["frames"])
    n_rep = len(frames_list)
    if n_rep == 0 or not all(isinstance(f, str) for f in frames_list):
        raise ConfigError(f"{source}: key '{key}.frames': value {entry['frames']!r}; expected a frames source "
                          "(\"file.h5#/path\", an image file, folder or pattern) or a list of them")
    specs = entry.get("spec")
    specs = _as_list(specs) if specs is not None else [None] * n_rep
    if len(specs) != n_rep:
        raise ConfigError(f"{source}: key '{key}.spec': {len(specs)} SPEC scans for {n_rep} frame sources; "
                          "expected one per repeated scan")
    rock = entry.get("rocking_circle")
    if rock is None:
        raise ConfigError(f"{source}: key '{key}.rocking_circle': expected the name of the rocked circle")
    out = []
    for rep, (fsrc, spec) in enumerate(zip(frames_list, specs)):
        rkey = key if n_rep == 1 else f"{key} (repeat {rep})"
        fpath = _resolve(base_dir, str(fsrc).split("#", 1)[0])
        fsrc_full = str(fpath) + ("#" + str(fsrc).split("#", 1)[1] if "#" in str(fsrc) else "")
        frames = read_frames(fsrc_full, entry.get("dataset"))
        nf = frames.shape[0]
        sources = {"frames": fsrc_full}
        sp = None
        if spec is not None:
            if not isinstance(spec, dict) or "file" not in spec or "scan" not in spec:
                raise ConfigError(f"{source}: key '{key}.spec': expected {{ file = \"…\", scan = N }}")
            bad = set(spec) - {"file", "scan", "motors"}
            if bad:
                raise ConfigError(f"{source}: key '{key}.spec': unknown key(s) {sorted(bad)}; expected file, scan, "
                                  "motors")
            sp = read_spec_scan(_resolve(base_dir, spec["file"]), spec["scan"])
            if sp.n_points != nf:
                raise ScanFileError(sp.path, f"scan {sp.number}", f"{sp.n_points} points; expected {nf}, one per "
                                                                  f"frame of {fsrc_full}")
            sources["spec"] = f"{sp.path} scan {sp.number}"
        motors = (spec or {}).get("motors") or {}
        given = entry.get("angles") or {}
        angles = {}
        for c in instrument.circles:
            akey = f"{key}.angles.{c.name}"
            v = given.get(c.name)
            if isinstance(v, list) and v and all(isinstance(x, str) for x in v):
                if len(v) != n_rep:
                    raise ConfigError(f"{source}: key '{akey}': {len(v)} sources for {n_rep} repeated scans")
                v = v[rep]
            if v is None:
                if sp is None:
                    raise ConfigError(f"{source}: key '{akey}': missing; expected degrees, {{start, step}}, "
                                      "\"file.h5#/path\", or a [reflection.spec] SPEC scan holding it")
                a = sp.position(motors.get(c.name, c.name), akey)
                sources[c.name] = f"{sp.path} scan {sp.number}"
            elif isinstance(v, dict):
                if set(v) - {"start", "step"} or "start" not in v or "step" not in v:
                    raise ConfigError(f"{source}: key '{akey}': expected {{start, step}} (degrees)")
                a = v["start"] + v["step"] * np.arange(nf)
            elif is_file_value(v):
                a = read_value(v, base_dir, key=akey, n_frames=nf)
                sources[c.name] = v
            else:
                a = np.asarray(v, float)
            if a.ndim == 1 and a.size != nf:
                raise ConfigError(f"{source}: key '{akey}': {a.size} angles; expected a scalar or {nf} (one per "
                                  f"frame of {fsrc_full})")
            angles[c.name] = float(a) if a.ndim == 0 else a
        # monitor
        monitor = None
        mon = entry.get("monitor")
        if isinstance(mon, list) and mon and all(isinstance(x, (str, list)) for x in mon):
            if len(mon) != n_rep:
                raise ConfigError(f"{source}: key '{key}.monitor': {len(mon)} monitors for {n_rep} repeated scans")
            mon = mon[rep]
        if mon is not None:
            mkey = f"{key}.monitor"
            if is_file_value(mon):
                monitor = read_value(mon, base_dir, key=mkey, n_frames=nf)
            elif isinstance(mon, str):
                if sp is None:
                    raise ConfigError(f"{source}: key '{mkey}': a counter name ({mon!r}) needs a SPEC scan "
                                      "([reflection.spec]); or give \"file.h5#/path\" or one number per frame")
                monitor = sp.counter(mon, mkey)
            else:
                monitor = np.asarray(mon, float)
            if monitor.ndim != 1 or monitor.size != nf:
                where = mon if isinstance(mon, str) else mkey
                fname, _, ds = str(where).partition("#")
                raise ScanFileError(fname, ds or mkey, f"monitor of {monitor.size} value(s); expected {nf}, one "
                                                       f"per frame of {fsrc_full}")
            sources["monitor"] = mon if isinstance(mon, str) else "pipeline file"
        # energy, distance, region of interest
        inst = instrument
        det = inst.detector
        energy = inst.energy_kev
        for name in ("energy_kev", "distance_m"):
            v = entry.get(name)
            if v is None:
                continue
            val = read_value(v, base_dir, key=f"{key}.{name}")
            if val.ndim and val.size > 1:
                if np.ptp(val) > 1e-6 * abs(float(np.mean(val))):
                    fname, _, ds = str(v).partition("#")
                    raise ScanFileError(fname, ds or name, f"expected one {name} for the scan, found values "
                                                           f"from {val.min():g} to {val.max():g}")
            val = float(np.mean(val))
            if not val > 0:
                raise ConfigError(f"{source}: key '{key}.{name}': value {val}; expected a positive number")
            if name == "energy_kev":
                energy = val
            else:
                from dataclasses import replace

                det = replace(det, distance=val)
            sources[name] = v if isinstance(v, str) else "pipeline file"
        roi = entry.get("roi")
        if roi is None:
            roi = detector_roi
        if roi is not None:
            try:
                det = det.region(roi[0], roi[1], frames.shape[1:])
            except Exception as e:  # InputError from Detector.region
                raise ConfigError(f"{source}: key '{key}.roi': {list(roi)} with frames of {frames.shape[1]} × "
                                  f"{frames.shape[2]} pixels from {fsrc_full}: {e}") from None
        elif tuple(det.shape) != frames.shape[1:]:
            raise ConfigError(f"{source}: key '{key}.frames': frames of {frames.shape[1]} × {frames.shape[2]} "
                              f"pixels in {fsrc_full}; expected the detector's {det.shape[0]} × {det.shape[1]} "
                              f"(instrument.detector.shape), or a region of interest roi = [first_row, "
                              f"first_column]")
        if det is not inst.detector or energy != inst.energy_kev:
            inst = Diffractometer(inst.sample_circles, inst.detector_circles, det, energy, inst.beam)
        sc = Scan(frames=frames, angles=angles, rocking_circle=rock, instrument=inst, mask=None,
                  hkl=tuple(entry["hkl"]), path=fsrc_full,
                  monitor=monitor,
                  extra={"sources": sources, "roi": None if roi is None else [int(roi[0]), int(roi[1])]})
        out.append(sc)
    return out
