"""Reachability: the angles that put each reflection in the Bragg condition, or the reason none does.

The Bragg condition R_s(θ)·G = k(p(θ) − b̂) (three equations, p the scattered
direction of the chosen pixel) is solved for the free circles by damped
Newton steps from random starts, batched over all reflections and starts
(:class:`_Geometry`), with the instrument's own rotations
(:func:`braggstrain.geometry.rotation.axis_rotation`), so a solution here is
a solution of :meth:`braggstrain.geometry.instrument.Diffractometer.solve_bragg`'s
equations.
"""

from __future__ import annotations

import math

import numpy as np

from braggstrain.errors import InputError
from braggstrain.geometry.crystal import HC_KEV_ANGSTROM
from braggstrain.geometry.rotation import axis_rotation, axis_vector
from braggstrain.planner.options import PlanOptions, ReflectionPlan

__all__ = ["reach"]

_CONVERGED = 1e-9  # Å⁻¹, |Q − G| accepted as the Bragg condition (as solve_bragg)


class _Geometry:
    """The diffractometer as vectors and index lists, for the batched solver.

    Uses the instrument's own rotations (:func:`braggstrain.geometry.rotation.axis_rotation`,
    outermost circle first) and pixel direction, so a solution here is a
    solution of :meth:`Diffractometer.solve_bragg`'s equations.
    """

    def __init__(self, instrument, options):
        self.ins = instrument
        self.names = [c.name for c in instrument.circles]
        self.ns = len(instrument.sample_circles)
        self.specs = [c.axis for c in instrument.circles]
        self.axes = np.array([axis_vector(s) for s in self.specs])
        self.limits = np.radians(np.array([c.limits for c in instrument.circles], float))
        self.k = instrument.k
        b = instrument.beam
        self.beam = axis_vector(b)
        pix = instrument.detector.direct_beam if options.pixel is None else options.pixel
        self.pixel = (float(pix[0]), float(pix[1]))
        self.p0 = instrument.pixel_directions(np.array([self.pixel[0]]), np.array([self.pixel[1]]))[:, 0]
        free = list(options.free) if options.free is not None else [n for n in self.names if n not in options.fixed_deg]
        self.free = [self.names.index(n) for n in free]
        self.x_fixed = np.zeros(len(self.names))
        for n, v in options.fixed_deg.items():
            self.x_fixed[self.names.index(n)] = math.radians(float(v))
        home = np.zeros(len(self.names))
        for n, v in options.home_deg.items():
            home[self.names.index(n)] = math.radians(float(v))
        self.home = np.clip(home, self.limits[:, 0], self.limits[:, 1])
        self.home[[i for i in range(len(self.names)) if i not in self.free]] = \
            self.x_fixed[[i for i in range(len(self.names)) if i not in self.free]]
        self.normal = None
        if options.surface_normal is not None:
            n = np.asarray(options.surface_normal, float)
            self.normal = n / np.linalg.norm(n)
        self.rock = None if options.rocking_circle is None else self.names.index(options.rocking_circle)
        self.rock_half = math.radians(options.rocking_range_deg / 2)

    def forward(self, X, G, want_jac=True):
        """Residual f = R_s G − k(p − b̂), scattered direction p, R_s and,
        optionally, ∂f/∂θ for the free circles.

        X : (N, n_circles) radians; G : (N, 3) Å⁻¹."""
        N = X.shape[0]
        cum = np.broadcast_to(np.eye(3), (N, 3, 3))
        cols = {}
        for i in range(self.ns):
            if want_jac and i in self.free:
                cols[i] = cum @ self.axes[i]  # axis in the lab after the outer circles
            cum = cum @ axis_rotation(self.specs[i], X[:, i])
        Rs = cum
        Q = np.einsum("nij,nj->ni", Rs, G)
        cum = np.broadcast_to(np.eye(3), (N, 3, 3))
        for i in range(self.ns, len(self.names)):
            if want_jac and i in self.free:
                cols[i] = cum @ self.axes[i]
            cum = cum @ axis_rotation(self.specs[i], X[:, i])
        p = cum @ self.p0
        f = Q - self.k * (p - self.beam)
        if not want_jac:
            return f, p, Rs
        J = np.empty((N, 3, len(self.free)))
        for c, i in enumerate(self.free):
            # d(R v)/dθ_i = A_i × (R v), A_i the circle's axis in the lab frame.
            J[:, :, c] = np.cross(cols[i], Q) if i < self.ns else -self.k * np.cross(cols[i], p)
        return f, p, Rs, J

    def solve(self, G, X0, bounded, pull=False, frozen=None, iterations=60):
        """Damped Newton (minimum-norm steps) from the starts X0, batched.

        ``bounded``: keep the free circles inside their limits (projected
        steps); else wrap them to (−π, π]. ``pull``: with more than three free
        circles, also step along the solution family toward home (the
        projection of the way home onto the null space of ∂f/∂θ).

        Returns X, |f| (Å⁻¹), p (scattered directions) and R_s of the final
        points. ``frozen`` (N, n_free) bool holds some free circles of each
        point at their starting angle (a slice through a solution family)."""
        X = X0.copy()
        fr = self.free
        lo, hi = self.limits[fr, 0], self.limits[fr, 1]
        pull = pull and len(fr) > 3
        eye = np.eye(3)
        active = np.arange(X.shape[0])
        for it in range(iterations):
            if active.size == 0:
                break
            pulling = pull and it < iterations - 8
            Xa = X[active]
            f, p, Rs, J = self.forward(Xa, G[active])
            if frozen is not None:
                J = np.where(frozen[active][:, None, :], 0.0, J)
            fn = np.linalg.norm(f, axis=1)
            if not pulling:
                keep = fn > 1e-13
                active, Xa, f, J = active[keep], Xa[keep], f[keep], J[keep]
                if active.size == 0:
                    break
            Jt = np.swapaxes(J, 1, 2)
            M = J @ Jt + 1e-12 * eye
            step = -np.einsum("nij,nj->ni", Jt, np.linalg.solve(M, f[..., None])[..., 0])
            norm = np.linalg.norm(step, axis=1, keepdims=True)
            step *= np.minimum(1.0, 0.4 / np.maximum(norm, 1e-300))
            if pulling:
                d = self.home[fr] - Xa[:, fr]
                d = (d + np.pi) % (2 * np.pi) - np.pi
                Jd = np.einsum("nij,nj->ni", J, d)
                proj = d - np.einsum("nij,nj->ni", Jt, np.linalg.solve(M, Jd[..., None])[..., 0])
                step += 0.5 * proj
            Xf = Xa[:, fr] + step
            Xf = np.clip(Xf, lo, hi) if bounded else (Xf + np.pi) % (2 * np.pi) - np.pi
            X[active[:, None], np.array(fr)[None, :]] = Xf
        f, p, Rs = self.forward(X, G, want_jac=False)
        return X, np.linalg.norm(f, axis=1), p, Rs

    def in_limits(self, X):
        """For angles X (P, n_circles), the representation x + 2πn of each
        angle inside its limits nearest home (else the one nearest the
        limits); returns (angles, ok (P,), violation (P, n_circles), radians).
        The rocking circle must leave half the rocking range to each limit."""
        lo, hi = self.limits[:, 0], self.limits[:, 1]
        cands = X[..., None] + 2 * np.pi * np.arange(-2, 3)
        inside = (cands >= lo[:, None] - 1e-12) & (cands <= hi[:, None] + 1e-12)
        dist = np.where(inside, np.abs(cands - self.home[:, None]), np.inf)
        viol_c = np.where(cands < lo[:, None], lo[:, None] - cands, np.maximum(cands - hi[:, None], 0.0))
        pick = np.where(inside.any(-1), np.argmin(dist, -1), np.argmin(viol_c, -1))
        out = np.take_along_axis(cands, pick[..., None], -1)[..., 0]
        viol = np.take_along_axis(viol_c, pick[..., None], -1)[..., 0]
        if self.rock is not None:
            i = self.rock
            v = np.maximum(0.0, np.maximum(lo[i] + self.rock_half - out[:, i], out[:, i] - (hi[i] - self.rock_half)))
            viol[:, i] = np.maximum(viol[:, i], v)
        return out, np.all(viol <= 1e-12, axis=1), viol

    def surface_angles(self, Rs, p):
        """Incidence and exit angles (radians) to the substrate for R_s (P, 3, 3)
        and scattered directions p (P, 3); NaN without a substrate."""
        if self.normal is None:
            nan = np.full(p.shape[0], np.nan)
            return nan, nan.copy()
        n = Rs @ self.normal
        return np.arcsin(np.clip(-n @ self.beam, -1, 1)), np.arcsin(np.clip(np.einsum("ij,ij->i", p, n), -1, 1))


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
    geo = _Geometry(instrument, options)
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
    rng = np.random.default_rng(options.seed)
    nc = len(geo.names)
    fr = geo.free
    # Starts per reflection: n_unb ignoring the limits (pulled toward home),
    # n_bnd inside the limits, and with more than three free circles n_cut
    # that hold all but three free circles at random angles within their
    # limits (or at home) and solve the three (slices through the solution
    # family).
    n_free = len(fr)
    n_unb = max(int(options.starts) // 2, 1)
    n_bnd = max(int(options.starts) - int(options.starts) // 2, 1)
    n_cut = 2 * n_bnd * (n_free - 3)
    n_st = n_unb + n_bnd + n_cut
    lo, hi = geo.limits[fr, 0], geo.limits[fr, 1]
    G = np.repeat(np.array([r.g_sample for r in todo]), n_st, axis=0)
    Xr = np.tile(geo.x_fixed, (len(todo), n_st, 1))
    Xr[:, :n_unb, fr] = rng.uniform(-np.pi, np.pi, size=(len(todo), n_unb, n_free))
    Xr[:, n_unb:, fr] = rng.uniform(lo, hi, size=(len(todo), n_bnd + n_cut, n_free))
    Xr[:, n_unb, fr] = geo.home[fr]
    X0 = Xr.reshape(-1, nc)
    idx = np.arange(G.shape[0]).reshape(len(todo), n_st)
    unb, bnd, cut = (idx[:, :n_unb].ravel(), idx[:, n_unb:n_unb + n_bnd].ravel(),
                     idx[:, n_unb + n_bnd:].ravel())
    X = np.empty_like(X0)
    res = np.empty(G.shape[0])
    P = np.empty((G.shape[0], 3))
    R = np.empty((G.shape[0], 3, 3))
    X[unb], res[unb], P[unb], R[unb] = geo.solve(G[unb], X0[unb], bounded=False, pull=True)
    X[bnd], res[bnd], P[bnd], R[bnd] = geo.solve(G[bnd], X0[bnd], bounded=True)
    if cut.size:
        held = np.argsort(rng.random((cut.size, n_free)), axis=1)[:, : n_free - 3]
        frozen = np.zeros((cut.size, n_free), bool)
        np.put_along_axis(frozen, held, True, axis=1)
        # half the held circles sit at home (e.g. a detector arm kept in its plane)
        at_home = frozen & (rng.random(frozen.shape) < 0.5)
        Xcut = X0[cut]
        Xcut[:, fr] = np.where(at_home, geo.home[fr], Xcut[:, fr])
        X0[cut] = Xcut
        X[cut], res[cut], P[cut], R[cut] = geo.solve(G[cut], X0[cut], bounded=False, frozen=frozen)
    conv = res <= _CONVERGED
    Xc, ok, viol = geo.in_limits(X)
    ai, af = geo.surface_angles(R, P)
    min_i, min_f = math.radians(options.min_incidence_deg), math.radians(options.min_exit_deg)
    if geo.normal is not None:
        clear = (ai >= min_i - 1e-12) & (af >= min_f - 1e-12)
        margin = np.minimum(ai - min_i, af - min_f)
    else:
        clear = np.ones(G.shape[0], bool)
        margin = np.zeros(G.shape[0])
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
