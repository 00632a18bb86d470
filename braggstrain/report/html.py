"""The self-contained HTML report of a results bundle.

One page, no external resources: the figures are embedded as base64 PNG
``data:`` URIs and the style sheet is inline, so the file can be mailed or
archived on its own. Tables: per reflection (hkl, counts, oversampling,
random starts, final metrics, PRTF resolution, registration), the tensor
solve (condition number of the G set, residual), strain statistics inside
the crystal, the mean lattice, the dislocation lines, and the provenance of
the run (command, versions, seeds, stage timings, pipeline file).
"""

from __future__ import annotations

import base64
import html
from pathlib import Path

import numpy as np

from braggstrain.geometry.crystal import format_hkl
from braggstrain.errors import InputError
from braggstrain.io.files import write_atomic
from braggstrain.phasing.ensemble import METRIC_LABELS, metric_label

__all__ = ["strain_statistics", "write_report", "CAUTIONS"]

#: The cautions paragraph of every report.
CAUTIONS = (
    "These maps are only as good as the reconstructions and the geometry behind them. Strain and rotation "
    "come from phase gradients, so errors in the diffractometer calibration (detector distance, pixel size, "
    "circle offsets, energy) or in the orientation of the crystal show up as spurious uniform strain or "
    "rotation, and a poor reconstruction of one reflection spoils the tensor where it disagrees with the "
    "others (see the residual map). Before drawing conclusions, check that several random starts agree "
    "(the runs figure and the PRTF), that the result holds with a reflection left out, and that features "
    "are larger than the resolution. Values at the crystal's surface and at dislocation cores are the "
    "least reliable. Radiation dose can itself strain or damage the sample during the measurement; beam "
    "time, radiation and sample safety follow the facility's rules."
)

_PERCENTILES = (1, 5, 50, 95, 99)

_CSS = """
body { font-family: "DejaVu Sans", Arial, sans-serif; margin: 2em auto; max-width: 1200px; color: #222;
       line-height: 1.4; padding: 0 1em; }
h1 { font-size: 1.6em; margin-bottom: 0.2em; }
h2 { font-size: 1.25em; border-bottom: 1px solid #bbb; margin-top: 1.8em; }
table { border-collapse: collapse; margin: 0.6em 0 1em 0; font-size: 0.88em; }
th, td { border: 1px solid #ccc; padding: 0.25em 0.55em; text-align: right; vertical-align: top; }
td { white-space: nowrap; }
td.wrap { white-space: normal; min-width: 12em; }
th { background: #eef1f5; white-space: normal; }
table.compact { font-size: 0.8em; }
table.compact th { min-width: 3.5em; }
td.text, th.text { text-align: left; }
caption { caption-side: top; text-align: left; font-weight: bold; padding-bottom: 0.3em; }
div.scroll { overflow-x: auto; }
figure { margin: 1.2em 0; }
figure img { max-width: 100%; border: 1px solid #ddd; }
figcaption { font-size: 0.9em; color: #444; }
.meta { color: #555; font-size: 0.9em; }
.caution { background: #fff7e6; border-left: 4px solid #f0a500; padding: 0.6em 1em; }
pre { background: #f6f6f6; padding: 0.8em; overflow-x: auto; font-size: 0.85em; }
"""


# --------------------------------------------------------------------------
# formatting helpers
# --------------------------------------------------------------------------

def _e(text):
    return html.escape(str(text), quote=True)


def _num(v, fmt="{:.4g}"):
    if v is None:
        return "—"
    if isinstance(v, (bool, np.bool_)):
        return "yes" if v else "no"
    try:
        x = float(v)
    except (TypeError, ValueError):
        return _e(v)
    if not np.isfinite(x):
        return "—"
    return _e(fmt.format(x))


def _table(header, rows, caption=None, text_cols=(0,), wrap_cols=(), css=None):
    out = [f'<div class="scroll"><table{f" class={chr(34)}{css}{chr(34)}" if css else ""}>']
    if caption:
        out.append(f"<caption>{_e(caption)}</caption>")
    out.append("<tr>" + "".join(f'<th class="{"text" if i in text_cols else ""}">{_e(h)}</th>'
                                for i, h in enumerate(header)) + "</tr>")
    for r in rows:
        out.append("<tr>" + "".join(
            f'<td class="{" ".join(k for k, on in (("text", i in text_cols), ("wrap", i in wrap_cols)) if on)}">'
            f'{c}</td>' for i, c in enumerate(r)) + "</tr>")
    out.append("</table></div>")
    return "\n".join(out)


# --------------------------------------------------------------------------
# statistics
# --------------------------------------------------------------------------

def strain_statistics(tensor, mask=None):
    """Statistics of every strain and rotation component inside the crystal.

    Parameters
    ----------
    tensor : braggstrain.strain.tensor.TensorField
    mask : bool array, optional
        Voxels to use (default: the tensor's support); NaN voxels are left
        out.

    Returns
    -------
    list of dict
        One row per quantity (ε_xx, ε_yy, ε_zz, ε_yz, ε_xz, ε_xy, tr(ε)/3,
        von Mises, ω_x, ω_y, ω_z) with keys ``name``, ``unit``, ``voxels``,
        ``mean``, ``std``, ``p1``, ``p5``, ``p50``, ``p95``, ``p99`` and
        ``sigma`` (median one-σ uncertainty; NaN where not estimated).
        Strains are dimensionless, rotations in degrees.
    """
    from braggstrain.strain.components import STRAIN_COMPONENTS, strain_components

    m = np.asarray(tensor.support if mask is None else mask, bool)
    comps = strain_components(tensor.strain)
    sig = strain_components(tensor.strain_uncertainty)
    deg = 180.0 / np.pi
    items = [(f"ε_{c}", "1", comps[k], sig[k]) for k, c in enumerate(STRAIN_COMPONENTS)]
    items.append(("tr(ε)/3", "1", tensor.hydrostatic, None))
    items.append(("von Mises", "1", tensor.von_mises, None))
    for k, c in enumerate("xyz"):
        items.append((f"ω_{c}", "°", np.asarray(tensor.rotation[k]) * deg,
                      np.asarray(tensor.rotation_uncertainty[k]) * deg))
    rows = []
    for name, unit, field, s in items:
        v = np.asarray(field, float)[m]
        v = v[np.isfinite(v)]
        row = {"name": name, "unit": unit, "voxels": int(v.size)}
        if v.size:
            row["mean"] = float(v.mean())
            row["std"] = float(v.std())
            for p, val in zip(_PERCENTILES, np.percentile(v, _PERCENTILES)):
                row[f"p{p}"] = float(val)
        else:
            row.update({"mean": np.nan, "std": np.nan, **{f"p{p}": np.nan for p in _PERCENTILES}})
        if s is not None:
            sv = np.asarray(s, float)[m]
            sv = sv[np.isfinite(sv)]
            row["sigma"] = float(np.median(sv)) if sv.size else np.nan
        else:
            row["sigma"] = np.nan
        rows.append(row)
    return rows


#: Columns of the runs table (results.h5, /reflections/<name>/runs) that the
#: reflections table shows for each reflection's best run, besides ``status``
#: (failed runs are counted) and ``rank`` or, in layout-1 files, the ranking
#: metric (:meth:`braggstrain.io.results.ReflectionResult.best_run`).
RUN_COLUMNS = ("nll", "free_nll", "amplitude_error", "free_amplitude_error", "support_size", "sharpness",
               "background")


# --------------------------------------------------------------------------
# sections
# --------------------------------------------------------------------------

def _reflection_section(r):
    refl = r.reflections
    bests = [x.best_run() for x in refl]
    # a metric that is zero or absent for every reflection (e.g. no background fitted) says nothing
    metric_cols = [k for k in RUN_COLUMNS
                   if any(b and np.isfinite(float(b.get(k, np.nan))) and float(b.get(k, np.nan)) != 0 for b in bests)]
    header = ["reflection", "hkl", "|G| (Å⁻¹)", "max counts", "oversampling (frame, row, column)", "runs", "kept",
              "PRTF resolution (nm)", "shift (voxels)", "twin"]
    rows = []
    for x in refl:
        res = x.prtf["resolution"] if x.prtf is not None else np.nan
        # a PRTF that never falls below 1/e: the runs agree up to the edge of the q range
        res_text = ("above 1/e to the q edge" if x.prtf is not None and not np.isfinite(res)
                    else _num(res / 10.0, "{:.1f}"))
        rows.append([_e(x.name), _e(format_hkl(x.hkl)), _num(np.linalg.norm(x.g_vector)),
                     _num(x.max_counts, "{:.3g}"),
                     ", ".join(_num(v, "{:.2f}") for v in x.oversampling), str(x.runs), str(x.kept),
                     res_text,
                     ", ".join(_num(v, "{:.2f}") for v in x.shift_vox), "yes" if x.twin else "no"])
    out = ["<h2>Reflections</h2>", _table(header, rows, text_cols=(0, 1), css="compact")]
    if metric_cols:
        mh = ["reflection", "ranked by"] + [METRIC_LABELS.get(k, (k.replace("_", " "),))[0] for k in metric_cols]
        mrows = [[_e(x.name), _e(x.ranking_metric)] + [_num(b.get(k)) if b else "—" for k in metric_cols]
                 for x, b in zip(refl, bests)]
        meaning = "; ".join(metric_label(k, long=True) for k in metric_cols)
        out.append(_table(mh, mrows, caption="Final metrics of the best kept random start (the one the ensemble ranked "
                                             "first by its ranking metric)", text_cols=(0, 1), css="compact"))
        out.append(f'<p class="meta">{_e(meaning)}.</p>')
    failed = sum(1 for x in refl for m in x.run_metrics if str(m["status"]) != "ok")
    if failed:
        out.append(f"<p>{failed} random start(s) failed (support collapsed or exploded, or diverged) and were left "
                   f"out.</p>")
    return "\n".join(out)


def _coherence_section(r):
    refl = [x for x in r.reflections if x.coherence]
    if not refl:
        return ""
    header = ["reflection", "model", "widths along the principal axes (10⁻⁴ Å⁻¹)", "spread (10⁻⁴ Å⁻¹)",
              "coherence lengths (nm)", "free NLL: coherent / partial model", "agreement"]
    rows = []
    for x in refl:
        c = x.coherence
        w, sp, ln = c.get("widths"), c.get("spread"), c.get("lengths")
        ch = c.get("choice") or {}
        rows.append([_e(f"{x.name} {format_hkl(x.hkl)}"), _e(c.get("model", "off")),
                     ", ".join(_num(v * 1e4, "{:.2f}") for v in w) if w is not None else "—",
                     ", ".join(_num(v * 1e4, "{:.2f}") for v in sp) if sp is not None else "—",
                     ", ".join("∞" if not np.isfinite(v) else _num(v / 10.0, "{:.0f}") for v in ln)
                     if ln is not None else "—",
                     f"{_num(ch['coherent'], '{:.4g}')} / {_num(ch['partial'], '{:.4g}')}" if ch else "—",
                     _e(c.get("disagreement") or "agrees")])
    out = ["<h2>Coherence of the beam</h2>",
           "<p>The measured intensity is modelled as the coherent intensity convolved with the coherence "
           "function (a kernel in reciprocal space), estimated once per reflection from its data. Widths are "
           "standard deviations along the kernel's principal axes (sample frame); the coherence length along "
           "each is 1/width (∞: no blur resolved). Where the coherent model fits the held-out voxels about as "
           "well as the partial-coherence model, the coherent one is kept and the kernel is a delta.</p>",
           _table(header, rows, text_cols=(0, 1, 6), wrap_cols=(6,), css="compact")]
    flagged = [x.name for x in refl if x.coherence.get("disagreement")]
    if flagged:
        out.append(f'<div class="caution"><b>Coherence estimates disagree.</b> {_e(", ".join(flagged))}: '
                   f"reflections measured with one beam should show the same coherence function; check these "
                   f"reconstructions (runs, PRTF) and the scans (a changed beam, slits or energy).</div>")
    return "\n".join(out)


def _tensor_section(r):
    tf = r.tensor
    trusted = np.asarray(tf.trusted, bool)
    res = np.asarray(tf.residual, float)
    rt = res[trusted & np.isfinite(res)]
    rs = res[np.asarray(tf.support, bool) & np.isfinite(res)]
    mean_g = float(np.mean(np.linalg.norm(np.asarray(tf.g_vectors, float), axis=1)))
    vs = r.grid.voxel_size
    vol_nm3 = float(np.count_nonzero(r.support) * np.prod(vs) / 1000.0)
    rms_t = float(np.sqrt(np.mean(rt ** 2))) if rt.size else np.nan
    rms_s = float(np.sqrt(np.mean(rs ** 2))) if rs.size else np.nan
    items = [
        ("reflections in the tensor", _e(", ".join(str(s) for s in tf.labels))),
        ("condition number of the G set", _num(tf.condition_number, "{:.3f}")),
        ("residual RMS, trusted voxels (rad/Å)", _num(rms_t)),
        ("residual RMS, trusted voxels ÷ mean |G| (strain-equivalent)", _num(rms_t / mean_g)),
        ("residual RMS, whole support (rad/Å)", _num(rms_s)),
        ("inconsistent reflection", _e(tf.outlier) if tf.outlier else "none flagged"),
        ("crystal voxels (support) / trusted", f"{int(np.count_nonzero(tf.support))} / {int(trusted.sum())}"),
        ("crystal volume (nm³)", _num(vol_nm3, "{:.4g}")),
        ("voxel size x, y, z (nm)", ", ".join(_num(v / 10.0, "{:.3g}") for v in vs)),
        ("grid shape", _e(" × ".join(str(n) for n in r.grid.shape))),
        ("grid origin x, y, z (nm): position of the voxel at index n//2",
         ", ".join(_num(v / 10.0, "{:.4g}") for v in r.grid.origin)),
    ]
    out = ["<h2>Strain tensor</h2>", _table(["quantity", "value"], [[_e(a), b] for a, b in items],
                                              text_cols=(0, 1))]
    stats = strain_statistics(tf, np.asarray(tf.support, bool) & r.support)
    header = ["quantity", "unit", "voxels", "mean", "std"] + [f"p{p}" for p in _PERCENTILES] + ["median σ"]
    rows = [[_e(s["name"]), _e(s["unit"]), str(s["voxels"]), _num(s["mean"], "{:.3e}"), _num(s["std"], "{:.3e}")]
            + [_num(s[f"p{p}"], "{:.3e}") for p in _PERCENTILES] + [_num(s["sigma"], "{:.2e}")]
            for s in stats]
    out.append(_table(header, rows, caption="Statistics inside the crystal (sample frame; p = percentile; "
                                            "σ = one-standard-deviation uncertainty, see Error bars)",
                      text_cols=(0, 1)))
    out.append(_error_bars(tf))
    return "\n".join(out)


def _error_bars(tf):
    """The statement of what σ includes (or why there is none)."""
    basis = tf.uncertainty_basis or "not recorded in this results file"
    sig = np.asarray(tf.strain_uncertainty, float)[:, :, np.asarray(tf.support, bool)]
    text = [f"<p>{_e(basis)}.</p>"]
    if not np.isfinite(sig).any():
        text.append("<p><b>No error bars:</b> every σ is undefined (NaN) for this run. Ask for Poisson "
                    "replicas (<code>[tensor] replicas</code>, at least 2) or keep at least two random "
                    "starts (<code>[phasing] keep</code>).</p>")
    else:
        text.append("<p>σ is one standard deviation per voxel and component. It does not include errors "
                    "common to all reconstructions and replicas, such as a wrong instrument geometry, or strain "
                    "that changes faster than the blur-bias term covers (docs/strain.md).</p>")
    return "<h3>Error bars</h3>\n" + "\n".join(text)


def _plain_rows(d, skip=()):
    rows = []
    for k, v in d.items():
        if k in skip:
            continue
        if isinstance(v, dict):
            for k2, v2 in v.items():
                rows.append([_e(f"{k}.{k2}"), _value(v2)])
        else:
            rows.append([_e(k), _value(v)])
    return rows


def _value(v):
    if v is None:
        return "—"
    if isinstance(v, str):
        return _e(v)
    if isinstance(v, (bool, np.bool_)):
        return "yes" if v else "no"
    arr = np.asarray(v) if not isinstance(v, (list, tuple)) or all(
        not isinstance(x, (str, dict)) for x in v) else None
    if arr is None:
        return _e(", ".join(str(x) for x in v))
    if arr.ndim == 0:
        return _num(arr.item()) if arr.dtype.kind in "fiu" else _e(arr.item())
    if arr.dtype.kind in "fiu" and arr.size <= 36:
        if arr.ndim == 2:
            return "<br>".join("[" + ", ".join(_num(x) for x in rowv) + "]" for rowv in arr)
        return "[" + ", ".join(_num(x) for x in arr.ravel()) + "]"
    if arr.dtype.kind == "b":
        return "[" + ", ".join("yes" if x else "no" for x in arr.ravel()) + "]"
    return _e(f"array of shape {arr.shape}")


def _registration_section(r):
    reg = r.registration
    if not reg:
        return ""
    names = r.names
    J = len(names)
    per, rest = {}, {}
    for k, v in reg.items():
        if isinstance(v, (list, tuple, np.ndarray)) and len(v) == J and not isinstance(v, str):
            per[k] = v
        else:
            rest[k] = v
    out = ["<h2>Registration</h2>"]
    if per:
        header = ["reflection"] + [k.replace("_", " ") for k in per]
        rows = [[_e(n)] + [_value(per[k][j]) for k in per] for j, n in enumerate(names)]
        out.append(_table(header, rows, text_cols=tuple(range(len(header)))))
    if rest:
        out.append(_table(["item", "value"], _plain_rows(rest), text_cols=(0, 1)))
    return "\n".join(out)


def _mean_lattice_section(r):
    ml = r.mean_lattice
    if not ml:
        return ""
    return ("<h2>Mean lattice</h2>\n<p>Homogeneous deformation of the whole crystal from its measured peak "
            "positions, relative to the reference lattice (strain dimensionless, rotation in rad, lengths "
            "in Å).</p>\n" + _table(["quantity", "value"], _plain_rows(ml), text_cols=(0, 1)))


def _joint_section(r):
    """The joint refinement: refused (its message) or each reflection's NLL
    per measured voxel before and after, and how the fit ended."""
    j = r.joint
    if not j:
        return ""
    if "error" in j:
        return f"<h2>Joint refinement</h2>\n<p>Not run: {_e(j['error'])}</p>"
    rows = [[_e(n), _num(a), _num(b)] for n, a, b in zip(j.get("labels", []), j.get("nll_before", []),
                                                         j.get("nll_after", []))]
    free = np.asarray(j.get("free_nll_history", []), float)
    text = (f"<p>All reflections fitted together (docs/joint.md): {_e(j.get('iterations'))} L-BFGS-B iterations, "
            f"the iterate with the lowest free log-likelihood kept ({_e(j.get('best_iteration'))}); "
            f"{_e(j.get('message', ''))}. /tensor comes from the joint objects; the independent route's tensor "
            f"is /tensor_independent in results.h5.")
    if free.size > 1 and np.all(np.isfinite(free[[0, -1]])):
        text += f" Free NLL per held-out voxel {_num(free[0])} → {_num(free[-1])}."
    return ("<h2>Joint refinement</h2>\n" + text + "</p>\n"
            + _table(["reflection", "NLL per voxel, start", "NLL per voxel, end"], rows, css="compact"))


def _dislocation_section(r):
    from braggstrain.defects.lines import dislocations_to_records

    lines = r.dislocations
    out = ["<h2>Dislocations</h2>"]
    if not lines:
        out.append("<p>No dislocation line was found (no phase vortex line in the trusted part of the "
                   "crystal).</p>")
        return "\n".join(out)
    header = ["line", "Burgers vector b", "|b| (Å)", "character", "angle b–line (°)", "length (nm)",
              "centre x, y, z (nm)", "loop", "slip plane(s)", "windings n_j", "visible in",
              "invisible in (g·b = 0)", "confidence", "notes"]
    rows = []
    for d, rec in zip(lines, dislocations_to_records(lines)):
        rows.append([
            str(rec["id"]), _e(rec["burgers_label"]), _num(rec["burgers_length_A"], "{:.3f}"),
            _e(rec["character"]), _num(rec["character_deg"], "{:.0f}"), _num(rec["length_A"] / 10.0, "{:.1f}"),
            ", ".join(_num(v / 10.0, "{:.1f}") for v in d.center),
            "yes" if rec["closed"] else "no",
            _e(", ".join(format_hkl(p) for p in rec["slip_planes"]) or "—"),
            _e("; ".join(f"({k}): {'?' if v is None else v}" for k, v in rec["windings"].items())),
            _e(" ".join(format_hkl(h) for h in rec["visible_in"]) or "—"),
            _e(" ".join(format_hkl(h) for h in rec["invisible_in"]) or "—"),
            _num(rec["confidence"], "{:.2f}"), _e(" | ".join(rec["notes"]) or "—"),
        ])
    out.append(_table(header, rows, text_cols=(1, 3, 8, 9, 10, 11, 13), wrap_cols=(9, 13)))
    out.append("<p>Burgers vectors in lattice coordinates of the conventional cell; windings n_j are the phase "
               "windings of reflection j right-handed about the line direction (h_j·b = −n_j). The centre is "
               "the mean of the line's points, a sample-frame position on the results' grid (the voxel at "
               "index i lies at origin + (i − n//2)·voxel size, <code>/grid/x, y, z</code> of results.h5), the "
               "frame of the dislocation figure, <code>dislocations.csv</code> and the VTK files. Line numbers "
               "match the dislocation figure and the VTK file's <code>line_id</code>.</p>")
    return "\n".join(out)


def _figure_section(paths):
    from braggstrain.report.figures import FIGURES

    if not paths:
        return ""
    out = ["<h2>Figures</h2>"]
    for p in paths:
        p = Path(p)
        data = p.read_bytes()
        if not data.startswith(b"\x89PNG\r\n\x1a\n"):
            raise InputError(f"{p}: expected a PNG figure (made by braggstrain.report.figures.make_figures)")
        cap = FIGURES.get(p.name, p.stem.replace("_", " "))
        b64 = base64.b64encode(data).decode("ascii")
        out.append(f'<figure id="fig-{_e(p.stem)}"><img alt="{_e(cap)}" src="data:image/png;base64,{b64}">'
                   f"<figcaption>{_e(p.name)}: {_e(cap)}</figcaption></figure>")
    return "\n".join(out)


def _provenance_section(r):
    prov = r.provenance
    out = ["<h2>Provenance</h2>"]
    items = [("command", _e(prov.get("command") or "—")), ("created", _e(prov.get("created") or "—"))]
    out.append(_table(["item", "value"], [[_e(a), b] for a, b in items], text_cols=(0, 1)))
    timings = prov.get("timings") or {}
    if timings:
        total = sum(float(v) for v in timings.values() if isinstance(v, (int, float, np.number)))
        from braggstrain.pipeline import STAGES

        order = sorted(timings, key=lambda k: (STAGES.index(k) if k in STAGES else len(STAGES), k))
        rows = [[_e(k), _num(timings[k], "{:.2f}")] for k in order]
        rows.append(["<b>total</b>", f"<b>{_num(total, '{:.2f}')}</b>"])
        out.append(_table(["stage", "wall time (s)"], rows, caption="Stage timings"))
        if "outputs" in timings:
            out.append('<p class="meta">outputs: the results file, figures, VTK files and tables, up to this '
                       'report.</p>')
    seeds = dict(prov.get("seeds") or {})
    ens = dict(prov.get("ensemble") or {})
    for k in ("runs", "keep"):  # files written before runs and keep had a table of their own
        if k in seeds:
            ens.setdefault(k, seeds.pop(k))
    if seeds:
        out.append(_table(["random stream", "seed"],
                          [[_e(k), _e(int(v)) if isinstance(v, (int, np.integer)) else _value(v)]
                           for k, v in seeds.items()], caption="Seeds", text_cols=(0,)))
    if ens:
        words = {"runs": "random starts per reflection", "keep": "best starts kept and averaged"}
        out.append(_table(["ensemble", "value"], [[_e(words.get(k, k)), _e(v)] for k, v in ens.items()],
                          caption="Phasing ensemble", text_cols=(0,)))
    versions = prov.get("versions") or {}
    if versions:
        out.append(_table(["package", "version"], [[_e(k), _e(v)] for k, v in versions.items()],
                          caption="Package versions", text_cols=(0, 1)))
    text = prov.get("pipeline_text") or ""
    if text:
        out.append(f"<details><summary>Pipeline file</summary><pre>{_e(text)}</pre></details>")
    return "\n".join(out)


# --------------------------------------------------------------------------
# the page
# --------------------------------------------------------------------------

def write_report(results, out_dir, figures=None, *, name="report.html", title=None):
    """Write the self-contained HTML report of a results bundle, atomically.

    Parameters
    ----------
    results : braggstrain.io.results.Results
        What the pipeline built or :func:`braggstrain.io.results.read_results` returns.
    out_dir : str or Path
        Folder for the page (created if missing).
    figures : list of paths, optional
        PNG figures to embed; made with
        :func:`braggstrain.report.figures.make_figures` into ``out_dir`` when None.
    name : str
        File name of the page.
    title : str, optional
        Page heading.

    Returns
    -------
    Path
    """
    from braggstrain.io.results import Results
    from braggstrain.report.figures import make_figures

    if not isinstance(results, Results):
        raise InputError(f"results: expected braggstrain.io.results.Results, got {type(results).__name__}")
    r = results
    out_dir = Path(out_dir)
    if "/" in name or not name.endswith(".html"):
        raise InputError(f"name: expected a plain file name ending in .html, got {name!r}")
    out_dir.mkdir(parents=True, exist_ok=True)
    if figures is None:
        figures = make_figures(r, out_dir)
    figures = [Path(p) for p in figures]
    for p in figures:
        if not p.is_file():
            raise InputError(f"figures: {p} does not exist; expected PNG files to embed")
    heading = title or "Strain, rotation and dislocations of one crystal"
    n_lines = len(r.dislocations)
    refl_text = ", ".join(f"{x.name} {format_hkl(x.hkl)}" for x in r.reflections)
    summary = (f"<p>{len(r.reflections)} reflections ({_e(refl_text)}); condition number of the G set "
               f"{_num(r.tensor.condition_number, '{:.3f}')}; {n_lines} dislocation line"
               f"{'s' if n_lines != 1 else ''}. Arrays are in the sample frame (x, y, z), lengths in nm in "
               f"the figures and Å in the results file; strain is dimensionless and tensile positive.</p>")
    meta = _e(" · ".join(v for v in (r.provenance.get("created"), r.provenance.get("command")) if v))
    body = [
        f"<h1>{_e(heading)}</h1>",
        f'<p class="meta">{meta}</p>' if meta else "",
        summary,
        f'<div class="caution"><b>Cautions.</b> {_e(CAUTIONS)}</div>',
        _reflection_section(r),
        _coherence_section(r),
        _tensor_section(r),
        _mean_lattice_section(r),
        _registration_section(r),
        _joint_section(r),
        _dislocation_section(r),
        _figure_section(figures),
        _provenance_section(r),
    ]
    page = ("<!DOCTYPE html>\n<html lang=\"en\">\n<head>\n<meta charset=\"utf-8\">\n"
            f"<title>{_e(heading)}</title>\n<style>{_CSS}</style>\n</head>\n<body>\n"
            + "\n".join(b for b in body if b) + "\n</body>\n</html>\n")
    path = out_dir / name
    return write_atomic(path, page)
