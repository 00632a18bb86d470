"""VTK files for ParaView: the grid fields as ImageData, the dislocation lines as polylines.

Written with pyevtk from :class:`braggstrain.io.results.Results` (or a
results file); both files are staged in a temporary folder and renamed into
place, so an interrupted export never leaves a half-written file.
"""

from __future__ import annotations

import os
import shutil
import tempfile
from pathlib import Path

import numpy as np

from braggstrain.errors import BraggStrainError, InputError, OutputError
from braggstrain.io.files import disk_full_message, is_disk_full
from braggstrain.io.results import Results, read_results
from braggstrain.strain.components import STRAIN_COMPONENTS, strain_components

__all__ = ["export_vtk"]


def _vtk_name(text):
    keep = "".join(ch if (ch.isalnum() or ch in "_-") else "_" for ch in str(text))
    return keep or "reflection"


def export_vtk(results_or_path, out_dir, *, stem="crystal"):
    """Write ParaView files: one VTK ImageData file and the dislocation lines.

    ``<stem>.vti`` holds, as point data on the voxel centres (spacing = the
    voxel size in **nm**, origin = the sample-frame position of voxel
    (0, 0, 0) in nm, so its points are ``/grid/x, y, z`` in nm): ``amplitude``, ``support`` (0/1), ``strain_xx`` …
    ``strain_xy``, ``hydrostatic_strain``, ``von_mises_strain``,
    ``rotation_rad`` (vector), ``displacement_nm`` (vector, nm, so that
    ParaView's warp-by-vector uses the grid's unit), ``residual_rad_per_A``,
    and per reflection ``phase_rad_<name>`` and ``u_along_G_nm_<name>``.
    NaN marks voxels outside the crystal. ``<stem>_dislocations.vtu`` holds
    the lines as polylines (sample-frame positions in nm, the same frame as
    the ``.vti``) with point data ``line_id`` (1-based, the
    report's numbering) and ``character_deg``; it is written only when
    there are lines. Written with pyevtk.

    Parameters
    ----------
    results_or_path : Results or str or Path
        Results, or a results file.
    out_dir : str or Path
        Folder for the files (created if missing).
    stem : str
        File-name stem.

    Returns
    -------
    list of Path
    """
    try:
        from pyevtk.hl import imageToVTK, polyLinesToVTK
    except ImportError:  # pragma: no cover - depends on the environment
        raise BraggStrainError("export_vtk: the pyevtk package is needed for VTK export (pip install pyevtk)") from None

    if isinstance(results_or_path, (str, os.PathLike)):
        r = read_results(results_or_path)
    elif isinstance(results_or_path, Results):
        r = results_or_path
    else:
        raise InputError(f"results_or_path: expected Results or a results file, got {type(results_or_path).__name__}")
    if not stem or _vtk_name(stem) != stem:
        raise InputError(f"stem: expected letters, digits, '_' or '-' only, got {stem!r}")
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    grid = r.grid
    vs_nm = grid.voxel_size / 10.0
    origin_nm = grid.corner / 10.0  # VTK's origin: the position of voxel (0, 0, 0)
    tf = r.tensor

    def f32(a):
        return np.ascontiguousarray(a, dtype=np.float32)

    data = {"amplitude": f32(r.amplitude),
            "support": np.ascontiguousarray(r.support, dtype=np.uint8)}
    comps = strain_components(tf.strain)
    for m, name in enumerate(STRAIN_COMPONENTS):
        data[f"strain_{name}"] = f32(comps[m])
    data["hydrostatic_strain"] = f32(tf.hydrostatic)
    data["von_mises_strain"] = f32(tf.von_mises)
    data["rotation_rad"] = tuple(f32(tf.rotation[i]) for i in range(3))
    if tf.displacement is not None:
        data["displacement_nm"] = tuple(f32(tf.displacement[i] / 10.0) for i in range(3))
    data["residual_rad_per_A"] = f32(tf.residual)
    used = set()
    for x in r.reflections:
        nm = _vtk_name(x.name)
        base = nm
        k = 2
        while nm in used:
            nm = f"{base}_{k}"
            k += 1
        used.add(nm)
        data[f"phase_rad_{nm}"] = f32(x.phase)
        if x.displacement is not None:
            data[f"u_along_G_nm_{nm}"] = f32(x.displacement / 10.0)

    written = []
    work = Path(tempfile.mkdtemp(prefix=f".{stem}.vtk.", dir=out_dir))
    try:
        tmp = imageToVTK(str(work / stem), origin=tuple(float(v) for v in origin_nm),
                         spacing=tuple(float(v) for v in vs_nm), pointData=data,
                         fieldData={"voxel_size_nm": np.asarray(vs_nm, np.float64)})
        staged = [(Path(tmp), out_dir / f"{stem}.vti")]
        lines = r.dislocations
        if lines:
            xs, ys, zs, counts, ids, chars = [], [], [], [], [], []
            for k, d in enumerate(lines):
                p = np.asarray(d.points, float) / 10.0
                ch = np.asarray(d.local_character_deg, float)
                if ch.shape != (len(p),):
                    ch = np.full(len(p), float(d.character_deg))
                if d.closed and len(p) > 2:
                    p = np.vstack([p, p[:1]])
                    ch = np.append(ch, ch[:1])
                xs.append(p[:, 0])
                ys.append(p[:, 1])
                zs.append(p[:, 2])
                counts.append(len(p))
                ids.append(np.full(len(p), k + 1, np.int32))
                chars.append(ch)
            tmp = polyLinesToVTK(str(work / f"{stem}_dislocations"),
                                 np.ascontiguousarray(np.concatenate(xs)),
                                 np.ascontiguousarray(np.concatenate(ys)),
                                 np.ascontiguousarray(np.concatenate(zs)),
                                 pointsPerLine=np.asarray(counts, np.int64),
                                 pointData={"line_id": np.concatenate(ids),
                                            "character_deg": np.concatenate(chars).astype(np.float64)})
            staged.append((Path(tmp), out_dir / f"{stem}_dislocations.vtu"))
        for src, dst in staged:
            os.replace(src, dst)
            written.append(dst)
    except (OSError, RuntimeError) as exc:
        if is_disk_full(exc):
            need = sum(int(np.asarray(v).nbytes) for v in data.values()) + sum(
                int(np.asarray(c).nbytes) for v in data.values() if isinstance(v, tuple) for c in v)
            raise OutputError(disk_full_message(out_dir / f"{stem}.vti", need)) from None
        raise
    finally:
        shutil.rmtree(work, ignore_errors=True)
    return written
