"""Writing a simulated scan the way a beamline would (wiring of the writers).

:func:`write_reflection_files` takes the simulated counts of one reflection
and writes the files its ``[[reflection]]`` table points at, so the pipeline
reads them back through :mod:`braggstrain.io.frames` and
:mod:`braggstrain.io.sources`:

* ``frames = "x.h5#/entry/data/data"``: a master file ``x.h5`` whose
  dataset is an external link into ``x_data_000000.h5``, compressed with
  bitshuffle-LZ4 (hdf5plugin), one chunk per frame;
* ``frames = "dir/name_*.edf"`` (``.cbf``, ``.tif``): one image per frame,
  numbered from 0 (fabio);
* ``roi = [first_row, first_column]``: the frames written are the centred
  region from that corner to its mirror (rows first_row … R − first_row);
* ``spec = { file, scan }``: a SPEC scan appended to (or starting) the file,
  with the rocked circle and the monitor as data columns and every motor in
  the ``#O``/``#P`` header lines;
* ``monitor``: a counter name (a SPEC column) or ``"file.h5#/path"``; the
  simulated incident beam decays by 20 % over the scan with 1 % noise, and
  the counts are thinned by the same factor (binomial thinning keeps them
  Poisson);
* angles given as ``"file.h5#/path"``: the positions written there;
* a list of ``frames`` (repeated scans): each repeat is an independent
  simulation with ``peak_counts`` / n counts, the k-th moved by k detector
  rows (a slow drift), so their sum matches one scan of ``peak_counts``.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from braggstrain.errors import ConfigError

__all__ = ["write_reflection_files", "simulated_monitor"]


def simulated_monitor(n_frames, rng, level=1.0e6):
    """An incident-beam monitor that decays by 20 % over the scan, 1 % noise."""
    t = np.arange(n_frames) / max(n_frames - 1, 1)
    return level * (1.0 - 0.2 * t) * (1.0 + 0.01 * rng.standard_normal(n_frames))


def _inside(out, rel, key, src):
    p = Path(rel)
    if p.is_absolute() or ".." in p.parts:
        raise ConfigError(f"{src}: key '{key}': a simulated file must stay inside the output folder; expected a "
                          f"relative path without '..', got {rel!r}")
    return out / p


def _write_h5_frames(path, dataset, frames):
    import h5py
    import hdf5plugin

    from braggstrain.io.files import atomic_path

    path.parent.mkdir(parents=True, exist_ok=True)
    data = path.with_name(path.stem + "_data_000000.h5")
    with atomic_path(data) as tmp:
        with h5py.File(tmp, "w") as f:
            f.create_dataset("data", data=frames, chunks=(1,) + frames.shape[1:],
                             **hdf5plugin.Bitshuffle(cname="lz4"))
    with atomic_path(path) as tmp:
        with h5py.File(tmp, "w") as f:
            f[dataset] = h5py.ExternalLink(data.name, "/data")
    return [path, data]


def _write_images(pattern, frames):
    import fabio.cbfimage
    import fabio.edfimage
    import fabio.tifimage

    pattern.parent.mkdir(parents=True, exist_ok=True)
    suffix = pattern.suffix.lower()
    cls = {".edf": fabio.edfimage.EdfImage, ".cbf": fabio.cbfimage.CbfImage, ".tif": fabio.tifimage.TifImage,
           ".tiff": fabio.tifimage.TifImage}[suffix]
    written = []
    for k, im in enumerate(frames):
        p = pattern.with_name(pattern.name.replace("*", str(k)))
        cls(data=im.astype(np.int32) if suffix == ".cbf" else im).write(str(p))
        written.append(p)
    return written


def _append_spec(path, number, motors, rocked, angles, columns):
    """Append scan ``number`` to a SPEC file (standard layout: #F/#E/#O file
    header; #S, #D, #T, #P, #N, #L scan header; one data row per point)."""
    names = list(motors)
    new = not path.exists()
    lines = []
    if new:
        lines += [f"#F {path.name}", "#E 1764662400", "#D Wed Dec 02 08:00:00 2026"]
        lines += [f"#O{k} " + "  ".join(names[8 * k:8 * k + 8]) for k in range((len(names) + 7) // 8)]
        lines.append("")
    a = np.asarray(angles[rocked], float)
    lines += [f"#S {int(number)}  ascan  {rocked} {a[0]:.8f} {a[-1]:.8f} {len(a) - 1} 1",
              "#D Wed Dec 02 08:00:00 2026", "#T 1  (Seconds)"]
    lines += [f"#P{k} " + " ".join(f"{float(motors[n]):.8f}" for n in names[8 * k:8 * k + 8])
              for k in range((len(names) + 7) // 8)]
    cols = [rocked] + list(columns)
    lines += [f"#N {len(cols)}", "#L " + "  ".join(cols)]
    for i in range(len(a)):
        lines.append(" ".join([f"{a[i]:.8f}"] + [f"{float(columns[c][i]):.8g}" for c in columns]))
    lines.append("")
    path.parent.mkdir(parents=True, exist_ok=True)
    with open(path, "a", encoding="ascii") as fh:
        fh.write("\n".join(lines) + "\n")
    return path


def write_reflection_files(out, r, i, sims, rocking_circle, rng, src="<pipeline>"):
    """Write the simulated scans ``sims`` (one per repeat) of reflection table
    ``r`` in the forms it names. Returns the paths written."""
    import h5py

    from braggstrain.io.sources import is_file_value

    frames_list = r["frames"] if isinstance(r["frames"], list) else [r["frames"]]
    specs = r["spec"] if isinstance(r["spec"], list) else [r["spec"]] * len(frames_list)
    key = f"reflection[{i}]"
    written = []
    h5_values = {}
    for k, (fsrc, sim, spec) in enumerate(zip(frames_list, sims, specs)):
        frames = np.asarray(sim.frames)
        n = frames.shape[0]
        mon = None
        if r["monitor"] is not None:
            mon = simulated_monitor(n, rng)
            keep = np.clip(mon / mon.max(), 0, 1)
            frames = rng.binomial(frames, keep[:, None, None]).astype(frames.dtype)
        if r["roi"] is not None:
            r0, c0 = (int(v) for v in r["roi"])
            R, C = frames.shape[1:]
            if not (0 <= r0 < R // 2 and 0 <= c0 < C // 2):
                raise ConfigError(f"{src}: key '{key}.roi': {r['roi']}; the simulator writes the centred region "
                                  f"from it, so expected a corner in the detector's upper-left quarter")
            frames = frames[:, r0:R - r0, c0:C - c0]
        fname, _, ds = str(fsrc).partition("#")
        path = _inside(out, fname, f"{key}.frames", src)
        if ds:
            written += _write_h5_frames(path, ds, frames)
        elif any(ch in fname for ch in "*"):
            written += _write_images(path, frames)
        else:
            raise ConfigError(f"{src}: key '{key}.frames': the simulator writes \"file.h5#/path\" or an image "
                              f"pattern with '*' (name_*.edf, .cbf, .tif); got {fsrc!r}")
        angles = sim.angles
        if spec is not None:
            columns = {}
            if isinstance(r["monitor"], str) and not is_file_value(r["monitor"]):
                columns[r["monitor"]] = mon
            columns["Seconds"] = np.ones(n)
            columns["det"] = frames.sum(axis=(1, 2))
            motors = {c: float(np.mean(v)) for c, v in angles.items()}
            p = _append_spec(_inside(out, spec["file"], f"{key}.spec.file", src), spec["scan"], motors,
                             rocking_circle, angles, columns)
            if p not in written:
                written.append(p)
        for name, v in list((r["angles"] or {}).items()) + [("monitor", r["monitor"])]:
            vals = v if isinstance(v, list) else [v]
            if len(vals) == len(frames_list) and all(is_file_value(x) for x in vals):
                v = vals[k]
            if is_file_value(v):
                value = mon if name == "monitor" else np.asarray(angles[name], float)
                h5_values.setdefault(v.split("#", 1)[0], {})[v.split("#", 1)[1]] = value
    for fname, items in h5_values.items():
        path = _inside(out, fname, f"{key}.angles", src)
        path.parent.mkdir(parents=True, exist_ok=True)
        with h5py.File(path, "a") as f:
            for ds, value in items.items():
                if ds in f:
                    del f[ds]
                f[ds] = value
        written.append(path)
    return written
