"""The one Bragg-angle solver: circle angles that put a G in the Bragg condition.

The Bragg condition on a chosen detector pixel is three equations,
R_s(θ)·G = k (p(θ) − b̂), with R_s the sample circles' rotation (outermost
first), p the unit scattered direction of the pixel after the detector
circles' rotations and b̂ the beam (docs/design.md; Q = k_f − k_i). They are
solved for the free circles by damped Newton steps (minimum-norm steps of
the Jacobian, whose columns are the circle axes in the lab crossed with the
rotated vectors), batched over every G and every random start, with the
instrument's own rotations (:mod:`braggstrain.geometry.rotation`). With more
than three free circles the solutions form a family; the starts that ignore
the limits are pulled along it toward a home setting, so the solution
nearest home is found whatever the round-off.

:meth:`braggstrain.geometry.instrument.Diffractometer.solve_bragg` returns
the valid setting nearest home; the planner
(:mod:`braggstrain.planner.reach`) adds its limits, substrate and reasons.
"""

from __future__ import annotations

import math

import numpy as np

from braggstrain.geometry.rotation import axis_rotation, axis_vector

__all__ = ["BraggSolver", "CONVERGED"]

#: |Q − G| (Å⁻¹) accepted as the Bragg condition.
CONVERGED = 1e-9


class BraggSolver:
    """The diffractometer as vectors and index lists, for the batched Bragg solver.

    Parameters
    ----------
    instrument : braggstrain.geometry.instrument.Diffractometer
    free : circle names solved for (≥ 3); None: every circle not in ``fixed_deg``
    fixed_deg : circle name → degrees of circles that do not move (others not
        free stay at 0°)
    home_deg : circle name → degrees of the reference setting (default 0°,
        clipped into the limits); solutions nearest it are preferred
    pixel : (row, column) that must see Q = G (default: the direct-beam pixel)
    surface_normal : sample-frame normal of a substrate, or None
    rocking_circle, rocking_range_deg : a rocking circle needs half the range
        to each of its limits
    """

    def __init__(self, instrument, free=None, fixed_deg=None, home_deg=None, pixel=None, surface_normal=None,
                 rocking_circle=None, rocking_range_deg=0.0):
        fixed_deg = dict(fixed_deg or {})
        home_deg = dict(home_deg or {})
        self.ins = instrument
        self.names = [c.name for c in instrument.circles]
        self.ns = len(instrument.sample_circles)
        self.specs = [c.axis for c in instrument.circles]
        self.axes = np.array([axis_vector(s) for s in self.specs])
        self.limits = np.radians(np.array([c.limits for c in instrument.circles], float))
        self.k = instrument.k
        b = instrument.beam
        self.beam = axis_vector(b)
        pix = instrument.detector.direct_beam if pixel is None else pixel
        self.pixel = (float(pix[0]), float(pix[1]))
        self.p0 = instrument.pixel_directions(np.array([self.pixel[0]]), np.array([self.pixel[1]]))[:, 0]
        free = list(free) if free is not None else [n for n in self.names if n not in fixed_deg]
        self.free = [self.names.index(n) for n in free]
        self.x_fixed = np.zeros(len(self.names))
        for n, v in fixed_deg.items():
            self.x_fixed[self.names.index(n)] = math.radians(float(v))
        home = np.zeros(len(self.names))
        for n, v in home_deg.items():
            home[self.names.index(n)] = math.radians(float(v))
        self.home = np.clip(home, self.limits[:, 0], self.limits[:, 1])
        self.home[[i for i in range(len(self.names)) if i not in self.free]] = \
            self.x_fixed[[i for i in range(len(self.names)) if i not in self.free]]
        self.normal = None
        if surface_normal is not None:
            n = np.asarray(surface_normal, float)
            self.normal = n / np.linalg.norm(n)
        self.rock = None if rocking_circle is None else self.names.index(rocking_circle)
        self.rock_half = math.radians(rocking_range_deg / 2)

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

    def settle(self, G, X):
        """Move settings along their solution family to the nearest point to
        home within the limits (more than three free circles; otherwise the
        settings are returned as they are).

        From each row of X (radians, inside the limits and in the Bragg
        condition for the G of its row), min Σ(θ − θ_home)² over the free
        circles subject to the three Bragg equations and the limits is solved
        by sequential least squares (``scipy.optimize.minimize``, SLSQP, with
        the analytic Jacobian of :meth:`forward`), then polished by Newton
        steps. Starts on one branch of the family end at one point, so the
        result depends neither on where the random starts fell nor on
        round-off. Where the middle of three sample circles sits at ±90° and
        the outer and inner axes coincide (gimbal lock) the nearest point is
        a segment: the result is then of least distance but not unique.

        Returns X, |f| (Å⁻¹), p and R_s as :meth:`solve`."""
        from scipy.optimize import minimize

        X = np.array(X, float)
        G = np.asarray(G, float).reshape(-1, 3)
        if len(self.free) > 3:
            fr = self.free
            bounds = list(zip(self.limits[fr, 0], self.limits[fr, 1]))
            home = self.home[fr]
            for n in range(X.shape[0]):
                base, g = X[n].copy(), G[n:n + 1]

                def full(y):
                    x = base.copy()
                    x[fr] = y
                    return x[None]

                def cons(y):
                    return self.forward(full(y), g, want_jac=False)[0][0]

                def cons_jac(y):
                    return self.forward(full(y), g)[3][0]

                r = minimize(lambda y: float(np.sum((y - home) ** 2)), X[n, fr], jac=lambda y: 2 * (y - home),
                             method="SLSQP", bounds=bounds, constraints=[{"type": "eq", "fun": cons, "jac": cons_jac}],
                             options={"ftol": 1e-14, "maxiter": 200})
                if np.linalg.norm(cons(r.x)) < 1e-6:
                    X[n, fr] = r.x
        return self.solve(G, X, bounded=True)

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

    def solve_batch(self, G_rows, starts=64, seed=0):
        """Settings for each G of ``G_rows`` (J, 3) from ``starts`` random starts each.

        Half the starts ignore the limits (so the reason a limit is in the
        way can be told; with more than three free circles these also step
        along the solution family toward home), half stay inside them; with
        more than three free circles, slices that hold all but three free
        circles at random angles within their limits (or at home) sample
        the solution family.

        Returns
        -------
        X : (J·S, n_circles) radians; residual |Q − G| (J·S,) Å⁻¹; p (J·S, 3)
        scattered directions; R_s (J·S, 3, 3); index (J, S) of each G's rows
        """
        G_rows = np.asarray(G_rows, float).reshape(-1, 3)
        rng = np.random.default_rng(seed)
        nc = len(self.names)
        fr = self.free
        # Starts per reflection: n_unb ignoring the limits (pulled toward home),
        # n_bnd inside the limits, and with more than three free circles n_cut
        # that hold all but three free circles at random angles within their
        # limits (or at home) and solve the three (slices through the solution
        # family).
        n_free = len(fr)
        n_unb = max(int(starts) // 2, 1)
        n_bnd = max(int(starts) - int(starts) // 2, 1)
        n_cut = 2 * n_bnd * (n_free - 3)
        n_st = n_unb + n_bnd + n_cut
        lo, hi = self.limits[fr, 0], self.limits[fr, 1]
        G = np.repeat(G_rows, n_st, axis=0)
        Xr = np.tile(self.x_fixed, (len(G_rows), n_st, 1))
        Xr[:, :n_unb, fr] = rng.uniform(-np.pi, np.pi, size=(len(G_rows), n_unb, n_free))
        Xr[:, n_unb:, fr] = rng.uniform(lo, hi, size=(len(G_rows), n_bnd + n_cut, n_free))
        Xr[:, n_unb, fr] = self.home[fr]
        X0 = Xr.reshape(-1, nc)
        idx = np.arange(G.shape[0]).reshape(len(G_rows), n_st)
        unb, bnd, cut = (idx[:, :n_unb].ravel(), idx[:, n_unb:n_unb + n_bnd].ravel(),
                         idx[:, n_unb + n_bnd:].ravel())
        X = np.empty_like(X0)
        res = np.empty(G.shape[0])
        P = np.empty((G.shape[0], 3))
        R = np.empty((G.shape[0], 3, 3))
        X[unb], res[unb], P[unb], R[unb] = self.solve(G[unb], X0[unb], bounded=False, pull=True)
        X[bnd], res[bnd], P[bnd], R[bnd] = self.solve(G[bnd], X0[bnd], bounded=True)
        if cut.size:
            held = np.argsort(rng.random((cut.size, n_free)), axis=1)[:, : n_free - 3]
            frozen = np.zeros((cut.size, n_free), bool)
            np.put_along_axis(frozen, held, True, axis=1)
            # half the held circles sit at home (e.g. a detector arm kept in its plane)
            at_home = frozen & (rng.random(frozen.shape) < 0.5)
            Xcut = X0[cut]
            Xcut[:, fr] = np.where(at_home, self.home[fr], Xcut[:, fr])
            X0[cut] = Xcut
            X[cut], res[cut], P[cut], R[cut] = self.solve(G[cut], X0[cut], bounded=False, frozen=frozen)
        return X, res, P, R, idx
