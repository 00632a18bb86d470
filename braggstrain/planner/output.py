"""The planner's outputs: a stereographic figure, a pipeline-file fragment and a table.

Files are written atomically (:func:`braggstrain.io.files.write_atomic`).
"""

from __future__ import annotations

import numpy as np

from braggstrain.errors import GeometryError
from braggstrain.geometry.crystal import format_hkl
from braggstrain.io.files import write_atomic
from braggstrain.strain.components import STRAIN_COMPONENTS

__all__ = ["stereographic", "plot_plan", "fragment_text", "format_plan_table"]


def stereographic(vectors):
    """Stereographic projection along the sample z axis.

    Upper-hemisphere directions (z ≥ 0) project from the south pole,
    (x, y)/(1 + z); lower ones from the north pole, (x, y)/(1 − z), so every
    point falls in the unit circle.

    Returns
    -------
    xy : (n, 2); upper : (n,) bool
    """
    v = np.atleast_2d(np.asarray(vectors, float))
    u = v / np.linalg.norm(v, axis=1, keepdims=True)
    upper = u[:, 2] >= 0
    den = 1 + np.abs(u[:, 2])
    return u[:, :2] / den[:, None], upper


def plot_plan(result, path):
    """Write the stereographic projection (PNG) of the G directions: reachable,
    unreachable, chosen and (if any) the user's set; filled markers upper
    hemisphere, open markers lower. Written atomically."""
    import io

    import matplotlib

    matplotlib.use("Agg", force=False)
    from matplotlib.figure import Figure

    fig = Figure(figsize=(6.4, 6.4))
    ax = fig.add_subplot(1, 1, 1)
    t = np.linspace(0, 2 * np.pi, 361)
    ax.plot(np.cos(t), np.sin(t), color="0.3", lw=1)
    ax.plot([-1, 1], [0, 0], color="0.85", lw=0.6)
    ax.plot([0, 0], [-1, 1], color="0.85", lw=0.6)
    chosen = set(map(tuple, result.chosen.hkls)) if result.chosen else set()
    user = set(map(tuple, result.user.hkls)) if result.user else set()

    def category(r):
        if r.hkl in chosen:
            return "chosen"
        if r.hkl in user:
            return "your set"
        return "reachable" if r.reachable else "unreachable"

    styles = {
        "unreachable": (dict(marker="x", color="0.6", s=18), dict(marker="+", color="0.6", s=26)),
        "reachable": (dict(marker="o", color="tab:blue", s=22),
                      dict(marker="o", facecolors="none", edgecolors="tab:blue", s=22)),
        "your set": (dict(marker="s", color="tab:green", s=70),
                     dict(marker="s", facecolors="none", edgecolors="tab:green", s=70)),
        "chosen": (dict(marker="*", color="tab:red", s=160),
                   dict(marker="*", facecolors="none", edgecolors="tab:red", s=160)),
    }
    labels = {}
    for cat, (st_up, st_low) in styles.items():
        rs = [r for r in result.reflections if category(r) == cat]
        if not rs:
            continue
        xy, up = stereographic([r.g_sample for r in rs])
        if np.any(up):
            ax.scatter(xy[up, 0], xy[up, 1], label=f"{cat}, upper hemisphere", zorder=3, **st_up)
        if np.any(~up):
            ax.scatter(xy[~up, 0], xy[~up, 1], label=f"{cat}, lower hemisphere", zorder=3, **st_low)
        if cat == "unreachable":
            continue
        for r, (x, y), u in zip(rs, xy, up):
            # one label per projected point: collinear G (111, 222) share it
            key = (round(float(x), 4), round(float(y), 4), bool(u))
            text = "".join(str(v) if v >= 0 else f"{-v}\u0305" for v in r.hkl)
            big = cat != "reachable"
            old = labels.get(key)
            labels[key] = (old[0] + "/" + text if old else text, big or (old[1] if old else False))
    for (x, y, _), (text, big) in labels.items():
        ax.annotate(text, (x, y), textcoords="offset points", xytext=(4, 4), fontsize=9 if big else 7)
    ax.set_aspect("equal")
    ax.set_xlim(-1.12, 1.12)
    ax.set_ylim(-1.12, 1.12)
    ax.set_xlabel("sample x")
    ax.set_ylabel("sample y")
    title = f"{result.crystal_name} at {result.energy_kev:g} keV: G directions (stereographic, along sample z)"
    if result.chosen:
        title += f"\nchosen set: condition number {result.chosen.condition_number:.2f}"
    ax.set_title(title, fontsize=9)
    ax.legend(loc="upper center", fontsize=7, bbox_to_anchor=(0.5, -0.08), ncol=2, frameon=False)
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=120, bbox_inches="tight")
    write_atomic(path, buf.getvalue())


def _toml_key(name):
    import re

    return name if re.fullmatch(r"[A-Za-z0-9_-]+", name) else '"' + name.replace('"', '\\"') + '"'


def fragment_text(result):
    """The pipeline-file fragment (TOML) of the chosen reflections, in the
    measuring order, with the planned angles (degrees)."""
    if result.chosen is None:
        raise GeometryError(f"no chosen set to write: {result.message}")
    by_hkl = {r.hkl: r for r in result.reflections}
    c = result.chosen
    lines = [
        f"# Reflections planned by braggstrain for {result.crystal_name} at {result.energy_kev:g} keV,",
        f"# in measuring order (total circle travel {c.travel_deg:.1f} deg).",
        f"# Score trace((G^T W G)^-1) = {c.score:.5g} A^2, condition number {c.condition_number:.3f}.",
        "# Check every move for collisions and follow the facility's rules before driving the diffractometer.",
    ]
    for h in c.hkls:
        r = by_hkl[h]
        ang = ", ".join(f"{_toml_key(n)} = {v:.6f}" for n, v in r.angles_deg.items())
        lines += ["", "[[reflections]]", f"hkl = [{', '.join(str(v) for v in h)}]", f"angles_deg = {{ {ang} }}"]
    return "\n".join(lines) + "\n"


def _fmt_num(v, spec):
    return "—" if v is None or not np.isfinite(v) else format(v, spec)


def _set_block(title, s):
    lines = [f"{title}: " + "  ".join(format_hkl(h) for h in s.hkls)]
    lines.append(f"  score trace((GᵀWG)⁻¹) = {_fmt_num(s.score, '.5g')} Å²   condition number = "
                 f"{_fmt_num(s.condition_number, '.3f')}   total travel = {_fmt_num(s.travel_deg, '.1f')}°")
    if np.isfinite(s.score):
        lines.append("  leverage: " + "  ".join(f"{format_hkl(h)} {v:.2f}" for h, v in zip(s.hkls, s.leverage)))
        lines.append("  strain σ (Å per rad/Å of phase-gradient noise): " +
                     "  ".join(f"ε{c} {v:.3g}" for c, v in zip(STRAIN_COMPONENTS, s.strain_sigma)))
        if np.all(np.isfinite(s.relative_sigma)):
            lines.append("  σ relative to the best any set achieves per component: " +
                         "  ".join(f"ε{c} {v:.2f}" for c, v in zip(STRAIN_COMPONENTS, s.relative_sigma)))
    else:
        lines.append("  the G vectors are coplanar: this set cannot determine the strain tensor")
    if s.unreachable:
        lines.append("  not reachable: " + "  ".join(format_hkl(h) for h in s.unreachable))
    return lines


def format_plan_table(result):
    """The plan as text: one row per reflection, then the chosen set (and the
    user's), then the unreachable reflections with their reasons."""
    names = result.circles
    head = ["hkl", "|G| Å⁻¹", "d Å", "2θ°", *[f"{n}°" for n in names], "in°", "out°", "|F| e", "weight", "info Å⁻²"]
    chosen = set(map(tuple, result.chosen.hkls)) if result.chosen else set()
    rows = []
    for r in result.reflections:
        if not r.reachable:
            continue
        ang = [_fmt_num(r.angles_deg[n], ".3f") for n in names]
        mark = "*" if r.hkl in chosen else ""
        rows.append([format_hkl(r.hkl) + mark, f"{r.g_norm:.4f}", f"{r.d_spacing:.4f}", _fmt_num(r.two_theta_deg, ".3f"),
                     *ang, _fmt_num(r.incidence_deg, ".1f"), _fmt_num(r.exit_deg, ".1f"),
                     f"{abs(r.structure_factor):.1f}", _fmt_num(r.weight, ".3f"), _fmt_num(r.info, ".3f")])
    widths = [max(len(h), *(len(row[i]) for row in rows)) if rows else len(h) for i, h in enumerate(head)]
    lines = [f"Plan for {result.crystal_name} at {result.energy_kev:g} keV: "
             f"{sum(r.reachable for r in result.reflections)} of {len(result.reflections)} allowed reflections "
             f"reachable (* chosen)"]
    lines.append("  ".join(h.rjust(w) for h, w in zip(head, widths)))
    lines += ["  ".join(c.rjust(w) for c, w in zip(row, widths)) for row in rows]
    lines.append("")
    if result.orientation_residual_deg is not None:
        lines.append("orientation fit residuals (deg): " +
                     " ".join(f"{v:.4f}" for v in np.atleast_1d(result.orientation_residual_deg)))
    if result.chosen is not None:
        lines += _set_block(f"chosen set of {result.n_reflections}", result.chosen)
    else:
        lines.append(f"no set chosen: {result.message}")
    if result.user is not None:
        lines += _set_block("your set", result.user)
        if result.chosen is not None and np.isfinite(result.user.score):
            lines.append(f"  your set's score is {result.user.score / result.chosen.score:.2f} × the chosen set's")
    lines += [f"note: {n}" for n in result.notes]
    un = [r for r in result.reflections if not r.reachable]
    if un:
        lines.append("")
        lines.append("unreachable:")
        lines += [f"  {format_hkl(r.hkl):>12}  {r.reason}" for r in un]
    lines.append("")
    lines.append("Caution: the planner knows circle limits and the substrate only; check every move for "
                 "collisions and follow the facility's rules.")
    return "\n".join(lines)
