"""Reachability: the angles that put each reflection in the Bragg condition, or the reason none does.

The Bragg condition R_s(θ)·G = k(p(θ) − b̂) is solved by the project's one
Bragg-angle solver (:class:`braggstrain.geometry.bragg.BraggSolver`, which
:meth:`braggstrain.geometry.instrument.Diffractometer.solve_bragg` uses too);
this module adds the planner's rules: circle limits with room for the
rocking range, the substrate, and the reason a reflection cannot be reached.
"""

from __future__ import annotations

import math

import numpy as np

from braggstrain.errors import InputError
from braggstrain.geometry.crystal import HC_KEV_ANGSTROM
from braggstrain.geometry.bragg import CONVERGED as _CONVERGED, BraggSolver
from braggstrain.planner.options import PlanOptions, ReflectionPlan

__all__ = ["reach"]



def _free_names(instrument, options):
    names = [c.name for c in instrument.circles]
    return list(options.free) if options.free is not None else [n for n in names if n not in options.fixed_deg]


def _validate_options(instrument, options):
    names = [c.name for c in instrument.circles]

    def check_names(mapping, key):
        for n in mapping:
            if n not in names:
                raise InputError(f"{key}: unknown circle '{n}'; the instrument's circles are {names}")

    check_names(options.fixed_deg, "plan.fixed")
    check_names(options.home_deg, "plan.home")
    for n, v in options.fixed_deg.items():
        lo, hi = instrument.circle(n).limits
        if not lo <= float(v) <= hi:
            raise InputError(f"plan.fixed.{n} = {v}°: outside the circle's limits [{lo}, {hi}]°")
    free = _free_names(instrument, options)
    check_names(free, "plan.free")
    if len(set(free)) != len(free):
        raise InputError(f"plan.free = {list(free)}: a circle is listed twice")
    both = sorted(set(free) & set(options.fixed_deg))
    if both:
        raise InputError(f"plan.free and plan.fixed both name {both}; expected each circle in one of them")
    for c in instrument.circles:
        if c.name not in free and c.name not in options.fixed_deg and not c.limits[0] <= 0.0 <= c.limits[1]:
            raise InputError(f"plan.fixed: circle '{c.name}' is neither free nor fixed, so it stays at 0°, outside "
                             f"its limits [{c.limits[0]}, {c.limits[1]}]°; give it in plan.free or plan.fixed")
    if len(free) < 3:
        raise InputError(f"plan.free = {list(free)}: expected at least three free circles (the Bragg condition "
                         f"is three equations)")
    if not any(instrument.circle(n) in instrument.sample_circles for n in free):
        raise InputError("plan.free: expected at least one free sample circle")
    if not (isinstance(options.n_reflections, (int, np.integer)) and 3 <= options.n_reflections <= 6):
        raise InputError(f"plan.n_reflections = {options.n_reflections!r}: expected an integer from 3 to 6")
    if options.rocking_circle is not None:
        if options.rocking_circle not in names or instrument.circle(options.rocking_circle) not in instrument.sample_circles:
            raise InputError(f"plan.rocking_circle = {options.rocking_circle!r}: expected a sample circle, one of "
                             f"{[c.name for c in instrument.sample_circles]}")
    if not np.isfinite(options.rocking_range_deg) or options.rocking_range_deg < 0:
        raise InputError(f"plan.rocking_range_deg = {options.rocking_range_deg}: expected a number ≥ 0 (degrees)")
    if options.g_max is not None and (not np.isfinite(options.g_max) or options.g_max <= 0):
        raise InputError(f"plan.g_max = {options.g_max}: expected a positive |G| limit in Å⁻¹")
    if options.max_travel_deg is not None and (not np.isfinite(options.max_travel_deg) or options.max_travel_deg <= 0):
        raise InputError(f"plan.max_travel_deg = {options.max_travel_deg}: expected a positive number of degrees")
    if options.surface_normal is not None:
        n = np.asarray(options.surface_normal, float)
        if n.shape != (3,) or not np.all(np.isfinite(n)) or np.linalg.norm(n) == 0:
            raise InputError(f"plan.surface_normal = {options.surface_normal!r}: expected a non-zero 3-vector "
                             f"(sample frame) or false")
    for key in ("min_incidence_deg", "min_exit_deg"):
        v = getattr(options, key)
        if not np.isfinite(v) or not -90 < v < 90:
            raise InputError(f"plan.{key} = {v}: expected degrees between −90 and 90")
    if options.pixel is not None:
        r, c = options.pixel
        R, C = instrument.detector.shape
        if not (0 <= r <= R - 1 and 0 <= c <= C - 1):
            raise InputError(f"plan.pixel = {list(options.pixel)}: outside the detector's {R}×{C} pixels")
    if int(options.starts) < 1:
        raise InputError(f"plan.starts = {options.starts}: expected a positive integer")


def reach(crystal, instrument, hkls, options=PlanOptions()):
    """Settings that put each reflection in the Bragg condition, or the reason none does.

    For every reflection the Bragg condition R_s(θ)·G = k(p(θ) − b̂) (three
    equations; p the scattered direction of the chosen pixel) is solved for
    the free circles by damped Newton steps from random starts, all
    reflections and starts at once: half the starts ignore the limits (so the
    planner can say which limit is in the way; with more than three free
    circles these also step along the solution family toward home), half stay
    inside them. With more than three free circles the solutions form a
    family, also sampled by slices that hold all but three free circles at
    random angles within their limits or at home. A setting is valid
    when every circle is inside its limits (with half the rocking range to
    spare on the rocking circle) and, with a substrate, the incident and exit
    beams make at least the minimum angles with its surface. Among the valid
    settings the one with the least travel from home is chosen.

    Parameters
    ----------
    crystal : :class:`braggstrain.geometry.crystal.Crystal`
    instrument : :class:`braggstrain.geometry.instrument.Diffractometer`
    hkls : Miller indices of the reflections
    options : :class:`PlanOptions`

    Returns
    -------
    list of :class:`ReflectionPlan` (weights not yet set)
    """
    _validate_options(instrument, options)
    geo = BraggSolver(instrument, free=options.free, fixed_deg=options.fixed_deg, home_deg=options.home_deg,
                      pixel=options.pixel, surface_normal=options.surface_normal,
                      rocking_circle=options.rocking_circle, rocking_range_deg=options.rocking_range_deg)
    k = geo.k
    out = []
    todo = []
    for hkl in hkls:
        hkl = tuple(int(v) for v in hkl)
        g = crystal.g_sample(hkl)
        gn = float(np.linalg.norm(g))
        s = gn / (2 * k)
        tt = 2 * math.degrees(math.asin(s)) if s <= 1 else float("nan")
        rp = ReflectionPlan(hkl, g, gn, 2 * np.pi / gn, tt, crystal.structure_factor(hkl, instrument.energy_kev))
        out.append(rp)
        if s > 1:
            e_min = HC_KEV_ANGSTROM * gn / (4 * np.pi)
            rp.reason = (f"energy too low: |G| = {gn:.3f} Å⁻¹ > 2k = {2 * k:.3f} Å⁻¹ at "
                         f"{instrument.energy_kev:g} keV (needs ≥ {e_min:.2f} keV)")
        else:
            todo.append(rp)
    if not todo:
        return out
    G = np.array([r.g_sample for r in todo])
    X, res, P, R, idx = geo.solve_batch(G, options.starts, options.seed)
    nc = len(geo.names)
    fr = geo.free
    conv = res <= _CONVERGED
    Xc, ok, viol = geo.in_limits(X)
    ai, af = geo.surface_angles(R, P)
    min_i, min_f = math.radians(options.min_incidence_deg), math.radians(options.min_exit_deg)
    if geo.normal is not None:
        clear = (ai >= min_i - 1e-12) & (af >= min_f - 1e-12)
        margin = np.minimum(ai - min_i, af - min_f)
    else:
        clear = np.ones(X.shape[0], bool)
        margin = np.zeros(X.shape[0])
    travel = np.abs(Xc - geo.home).sum(1)
    viol_sum = viol.sum(1)
    free_names = [geo.names[i] for i in fr]
    fixed_txt = ", ".join(f"{geo.names[i]} = {math.degrees(geo.x_fixed[i]):g}°" for i in range(nc) if i not in fr)
    # Q·n = k (sin α_in + sin α_out) for every setting (from Q = k_f − k_i),
    # so G·n below k (sin min_in + sin min_out) cannot clear the substrate.
    g_floor = k * (math.sin(min_i) + math.sin(min_f))
    for j, rp in enumerate(todo):
        rows = idx[j][conv[idx[j]]]
        gn_ = rp.g_sample @ geo.normal if geo.normal is not None else np.inf
        if gn_ <= g_floor + 1e-9 * rp.g_norm:
            # G·n = 0 leaves only the knife edge α_in = α_out = 0: blocked too.
            where = "into" if gn_ < -1e-9 * rp.g_norm else ("along" if gn_ <= 1e-9 * rp.g_norm else "too close to")
            rp.reason = (f"beam blocked by the substrate: G points {where} the surface (G·n = {gn_:.3f} Å⁻¹; the "
                         f"incident and exit angles cannot both exceed {options.min_incidence_deg:g}° and "
                         f"{options.min_exit_deg:g}°)")
            continue
        good = rows[ok[rows] & clear[rows]]
        if good.size:
            _, first = np.unique(np.round(np.degrees(Xc[good]), 6), axis=0, return_index=True)
            good = good[first]
            good = good[np.argsort(travel[good], kind="stable")]
            rp.reachable = True
            rp.solutions = [dict(zip(geo.names, np.degrees(Xc[g]).tolist())) for g in good[:8]]
            rp.angles_deg = rp.solutions[0]
            rp.incidence_deg, rp.exit_deg = math.degrees(ai[good[0]]), math.degrees(af[good[0]])
            rp.travel_home_deg = math.degrees(travel[good[0]])
            continue
        blocked = rows[ok[rows]]
        if blocked.size:
            b = blocked[np.argmax(margin[blocked])]
            rp.reason = (f"beam blocked by the substrate: at best incidence {math.degrees(ai[b]):.1f}°, "
                         f"exit {math.degrees(af[b]):.1f}° (need ≥ {options.min_incidence_deg:g}° and "
                         f"≥ {options.min_exit_deg:g}°)")
        elif rows.size:
            b = rows[np.argmin(viol_sum[rows])]
            parts = []
            for i in np.nonzero(viol[b] > 1e-12)[0]:
                lo_d, hi_d = np.degrees(geo.limits[i])
                x = Xc[b, i]
                if i == geo.rock and geo.limits[i, 0] <= x <= geo.limits[i, 1]:
                    parts.append(f"rocking circle {geo.names[i]} at {math.degrees(x):.1f}° leaves less than "
                                 f"±{options.rocking_range_deg / 2:g}° to its limits [{lo_d:g}, {hi_d:g}]°")
                else:
                    parts.append(f"{geo.names[i]} = {math.degrees(x):.1f}° outside [{lo_d:g}, {hi_d:g}]°")
            rp.reason = "circle limit: the nearest setting found needs " + "; ".join(parts)
        else:
            rp.reason = (f"no setting of the free circles {free_names}"
                         f"{' with ' + fixed_txt if fixed_txt else ''} puts it in the Bragg condition")
    return out
