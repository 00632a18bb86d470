"""The measurement planner: which reflections to measure, at which angles.

Before and during beam time the user needs three or more reflections of one
crystal that the diffractometer can reach, and the choice decides how well the
strain tensor is determined. This module

1. orients the crystal (a U matrix; two or more reflections found on the
   diffractometer; or Bunge Euler angles from electron backscatter
   diffraction with the specimen's mounting on the sample stage);
2. lists every allowed reflection up to a |G| limit with the circle angles
   that put it in the Bragg condition on a chosen detector pixel, within the
   circles' limits and above the substrate, or the reason it cannot be
   reached;
3. chooses the set of J reflections (3-6) that minimises the expected strain
   uncertainty, trace((Gᵀ W G)⁻¹), with W the per-reflection weights of a
   count-rate model built on xrayutilities' structure factors, optionally
   under a cap on the total circle travel; and scores a set the user gives;
4. writes a stereographic projection of the G directions and a pipeline-file
   fragment with the chosen reflections.

Conventions are those of docs/design.md: lab frame y along the beam, z up;
Q_lab = R_s(angles)·G_sample at the Bragg condition; Å, Å⁻¹ with 2π; degrees
at the interface (every field that holds degrees ends in ``_deg``), radians
inside. The user documentation is docs/planner.md.

Safety: the planner knows circle limits and the substrate only, not the
shape of the sample environment or the detector arm. Check every planned move
for collisions, and follow the facility's rules for limits, dose and beam
time.
"""

from __future__ import annotations

import itertools
import math
import os
from dataclasses import dataclass, field
from typing import Mapping

import numpy as np

from braggstrain.geometry.crystal import HC_KEV_ANGSTROM, format_hkl
from braggstrain.errors import ConfigError, GeometryError, InputError, ReflectionError
from braggstrain.geometry.orientation import (MeasuredReflection, mounting_matrix, orientation_from_euler,
                                              orientation_from_measured)
from braggstrain.geometry.rotation import AXES, axis_rotation, axis_vector
from braggstrain.io.files import write_atomic
from braggstrain.strain.components import STRAIN_COMPONENTS, STRAIN_PAIRS
from braggstrain.strain.tensor import condition_number

__all__ = [
    "CountModel", "PlanOptions", "ReflectionPlan", "SetScore",
    "PlanResult", "reach", "set_travel", "score_set", "choose_set", "plan",
    "stereographic", "plot_plan", "fragment_text", "format_plan_table", "plan_from_config",
]


_CONVERGED = 1e-9  # Å⁻¹, |Q − G| accepted as the Bragg condition (as solve_bragg)


# ---------------------------------------------------------------------------
# Options and results
# ---------------------------------------------------------------------------

@dataclass(frozen=True)
class CountModel:
    """How signal strength enters the weights.

    The expected counts of reflection j are taken proportional to
    I_j = |F_j|² · P_j · L_j · exp(−B |G_j|²/8π²) · |G_j|^(−g_exponent)
    with F_j the structure factor (xrayutilities), P_j the polarisation
    factor of the planned scattering direction, L_j = 1/sin 2θ_j the Lorentz
    factor of a rocking scan if ``lorentz`` is on, and B a Debye-Waller
    factor (Å²). The phase noise of a reconstruction is taken to scale as
    σ_φ² ∝ I^(−noise_exponent) (1 for counting statistics; common practice,
    no source), so the weight is w_j = (I_j / I_max)^noise_exponent with I_max
    the brightest reachable reflection. ``noise_exponent = 0`` scores pure
    geometry.

    Attributes
    ----------
    noise_exponent : float ≥ 0
    polarization : "x", "y", "z" (the lab axis of a linearly polarised beam,
        "x" = horizontal at most synchrotrons) or "none" (unpolarised)
    lorentz : bool
    b_factor : Debye-Waller B, Å² (≥ 0)
    g_exponent : extra empirical fall-off of the signal with |G| (≥ 0)
    """

    noise_exponent: float = 1.0
    polarization: str = "x"
    lorentz: bool = False
    b_factor: float = 0.0
    g_exponent: float = 0.0

    def __post_init__(self):
        for name in ("noise_exponent", "b_factor", "g_exponent"):
            v = getattr(self, name)
            if not isinstance(v, (int, float)) or isinstance(v, bool) or not np.isfinite(v) or v < 0:
                raise InputError(f"count_model.{name} = {v!r}: expected a number ≥ 0")
        if self.polarization not in ("x", "y", "z", "none"):
            raise InputError(f"count_model.polarization = {self.polarization!r}: expected 'x', 'y', 'z' or 'none'")
        if not isinstance(self.lorentz, bool):
            raise InputError(f"count_model.lorentz = {self.lorentz!r}: expected true or false")

    def intensity(self, f_abs, g_norm, two_theta, scattered_lab, beam_lab):
        """Relative expected counts I_j (arbitrary units); arrays broadcast.

        ``scattered_lab`` is the unit scattered direction (..., 3) in the lab
        frame, NaN when unknown (unreachable reflections: P is then that of an
        unpolarised beam)."""
        f_abs = np.asarray(f_abs, float)
        g_norm = np.asarray(g_norm, float)
        tt = np.asarray(two_theta, float)
        p = np.asarray(scattered_lab, float)
        unpol = (1 + np.cos(tt) ** 2) / 2
        if self.polarization == "none":
            P = unpol
        else:
            e = AXES[self.polarization]
            # Thomson scattering of a linearly polarised beam: 1 − (ê·k̂_f)²
            # (Als-Nielsen & McMorrow, Elements of Modern X-ray Physics, 2nd
            # ed., 2011, sec. 1.2; from memory).
            P = 1 - (p @ e) ** 2
            P = np.where(np.isfinite(P), P, unpol)
        L = 1 / np.sin(tt) if self.lorentz else 1.0
        dw = np.exp(-self.b_factor * g_norm ** 2 / (8 * np.pi ** 2))
        return f_abs ** 2 * P * L * dw * g_norm ** (-self.g_exponent)


@dataclass(frozen=True)
class PlanOptions:
    """Everything the planner needs besides the crystal and the instrument.

    Attributes
    ----------
    g_max : largest |G| considered, Å⁻¹ (None: 2k, all the energy allows)
    n_reflections : J, the size of the chosen set (3-6)
    free : circles solved for (≥ 3); None: every circle not in ``fixed``
    fixed_deg : circle name → degrees for circles that do not move (e.g. a
        detector arm that stays in a plane); circles neither free nor fixed
        stay at 0°
    home_deg : circle name → degrees of the reference setting; among several
        valid settings the planner picks the one with the least travel
        Σ|θ − home| from it (default 0° clipped into the limits)
    pixel : (row, column) that must see Q = G (default: the direct-beam pixel)
    surface_normal : sample-frame normal of the substrate, or None for no
        substrate (a free-standing crystal)
    min_incidence_deg, min_exit_deg : smallest allowed angles of the incident
        and exit beams to the substrate surface
    rocking_circle, rocking_range_deg : the sample circle stepped through the
        peak and the full range of the scan; the planned angle must leave half
        the range to each limit
    max_travel_deg : cap on the total circle travel of the chosen set (see
        :func:`set_travel`), or None
    score_set : Miller indices of a set the user wants scored, or None
    count_model : :class:`CountModel`
    starts : random starting points per reflection for the angle solver
    seed : random seed (the plan is deterministic for a given seed)
    exhaustive_limit : largest number of J-sets scored exhaustively; above it
        the planner uses an exchange search
    """

    g_max: float | None = None
    n_reflections: int = 3
    free: tuple | None = None
    fixed_deg: Mapping = field(default_factory=dict)
    home_deg: Mapping = field(default_factory=dict)
    pixel: tuple | None = None
    surface_normal: tuple | None = (0.0, 0.0, 1.0)
    min_incidence_deg: float = 0.0
    min_exit_deg: float = 0.0
    rocking_circle: str | None = None
    rocking_range_deg: float = 0.0
    max_travel_deg: float | None = None
    score_set: tuple | None = None
    count_model: CountModel = field(default_factory=CountModel)
    starts: int = 24
    seed: int = 0
    exhaustive_limit: int = 2_000_000


@dataclass
class ReflectionPlan:
    """One reflection of the plan.

    Attributes
    ----------
    hkl : Miller indices
    g_sample : G in the sample frame, Å⁻¹
    g_norm : |G|, Å⁻¹
    d_spacing : Å
    two_theta_deg : scattering angle, degrees (NaN beyond the energy's reach)
    structure_factor : complex F (electrons), xrayutilities
    reachable : bool
    reason : why it cannot be reached ("" if reachable)
    angles_deg : circle name → degrees of the chosen setting (None if unreachable)
    incidence_deg, exit_deg : angles of the incident and exit beams to the
        substrate at the chosen setting (NaN without a substrate)
    solutions : every distinct valid setting found, nearest home first
    intensity : relative expected counts of the count model
    weight : w_j of the score (1 for the brightest reachable reflection)
    info : w_j |G_j|², Å⁻², the trace of the reflection's share of the
        information matrix GᵀWG: its contribution to the score
    travel_home_deg : Σ|θ − home| of the chosen setting, degrees
    """

    hkl: tuple
    g_sample: np.ndarray
    g_norm: float
    d_spacing: float
    two_theta_deg: float
    structure_factor: complex
    reachable: bool = False
    reason: str = ""
    angles_deg: dict | None = None
    incidence_deg: float = float("nan")
    exit_deg: float = float("nan")
    solutions: list = field(default_factory=list)
    intensity: float = float("nan")
    weight: float = float("nan")
    info: float = float("nan")
    travel_home_deg: float = float("nan")


@dataclass
class SetScore:
    """The score of a set of reflections.

    Attributes
    ----------
    hkls : the reflections, in the measuring order that minimises travel
    score : trace((Gᵀ W G)⁻¹), Å²: the summed variance of the normal strains
        per unit phase-gradient variance (rad²/Å²) of a weight-1 reflection;
        inf for a set that cannot determine the tensor
    condition_number : of the J×3 matrix of the G vectors (unweighted); inf
        when coplanar
    strain_sigma : (6,) σ of ε_xx, ε_yy, ε_zz, ε_yz, ε_xz, ε_xy (sample
        frame), Å, per unit phase-gradient noise (rad/Å) of a weight-1
        reflection
    relative_sigma : (6,) strain_sigma over the smallest σ any candidate set
        of the same size achieves for that component (≥ 1; NaN if unknown)
    leverage : (J,) share of each reflection in the fit, w_j g_jᵀ C g_j
        (sums to 3; a reflection near 1 cannot be spared)
    travel_deg : total circle travel along ``hkls`` (NaN if any is unreachable)
    unreachable : hkls of the set that the diffractometer cannot reach
    """

    hkls: list
    score: float
    condition_number: float
    strain_sigma: np.ndarray
    relative_sigma: np.ndarray
    leverage: np.ndarray
    travel_deg: float
    unreachable: list = field(default_factory=list)


@dataclass
class PlanResult:
    """The planner's answer; see :func:`plan`.

    ``chosen`` is None when no set could be chosen; ``message`` then says why.
    ``figure_path`` and ``fragment_path`` are set by :func:`plan_from_config`.
    """

    crystal_name: str
    energy_kev: float
    U: np.ndarray
    circles: list
    reflections: list
    chosen: SetScore | None
    user: SetScore | None
    n_reflections: int
    options: PlanOptions
    message: str = ""
    notes: list = field(default_factory=list)
    best_sigma: np.ndarray | None = None
    orientation_residual_deg: np.ndarray | None = None
    figure_path: str | None = None
    fragment_path: str | None = None


# ---------------------------------------------------------------------------
# Reachability: the Bragg-condition solver
# ---------------------------------------------------------------------------

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
    crystal : :class:`braggstrain.crystal.Crystal`
    instrument : :class:`braggstrain.instrument.Diffractometer`
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


# ---------------------------------------------------------------------------
# Scoring and choice
# ---------------------------------------------------------------------------

def _travel_matrix(settings):
    a = np.array(settings, float)  # (J, n_circles) degrees
    return np.abs(a[:, None, :] - a[None, :, :]).sum(-1)


def _perms(n):
    perms = np.array(list(itertools.permutations(range(n))))
    return perms[perms[:, 0] < perms[:, -1]]  # a path and its reverse travel the same


def _min_paths(D, combs):
    """Shortest visiting-order travel of each set (rows of ``combs``) for the
    pairwise travel matrix D."""
    p = _perms(combs.shape[1])
    return D[combs[:, p[:, :-1]], combs[:, p[:, 1:]]].sum(-1).min(-1)


def set_travel(settings_deg):
    """Total circle travel (degrees) of the shortest sequence through settings.

    The travel between two settings is Σ_c |θ_c − θ′_c| over all circles; the
    set's travel is the smallest sum over the orders in which the settings
    can be visited (start and end free). Returns (travel, order).
    """
    settings = [list(s) for s in settings_deg]
    n = len(settings)
    if n < 2:
        return 0.0, list(range(n))
    D = _travel_matrix(settings)
    perms = _perms(n)
    lengths = D[perms[:, :-1], perms[:, 1:]].sum(1)
    b = int(np.argmin(lengths))
    return float(lengths[b]), perms[b].tolist()


def _inverse_parts(S):
    """For symmetric 3×3 matrices S (..., 3, 3): det, trace of the inverse,
    diagonal of the inverse; singular ones give inf."""
    a, b, c = S[..., 0, 0], S[..., 1, 1], S[..., 2, 2]
    d, e, f = S[..., 0, 1], S[..., 0, 2], S[..., 1, 2]
    c00 = b * c - f * f
    c11 = a * c - e * e
    c22 = a * b - d * d
    det = a * c00 - d * (d * c - e * f) + e * (d * f - b * e)
    scale = ((a + b + c) / 3) ** 3
    sing = ~(det > 1e-10 * scale)
    with np.errstate(divide="ignore", invalid="ignore"):
        diag = np.stack([c00, c11, c22], -1) / det[..., None]
    diag[sing] = np.inf
    return det, diag.sum(-1), diag


def _component_var(diag):
    """Variances of the six strain components from diag(C) (..., 3)."""
    out = []
    for i, k in STRAIN_PAIRS:
        out.append(diag[..., i] if i == k else (diag[..., i] + diag[..., k]) / 4)
    return np.stack(out, -1)


def score_set(g_vectors, weights):
    """Score of a set of reflections.

    The phase gradients of reflection j give ∇φ_j = −(∇u)ᵀ G_j, so per
    voxel and per gradient direction the displacement gradient is a weighted
    least-squares fit with covariance σ²·C, C = (Gᵀ W G)⁻¹ (docs/methods.md,
    Fields). The score is trace(C), Å²; ε_ii has variance C_ii and ε_ik
    (i ≠ k) (C_ii + C_kk)/4, taking the three gradient directions as
    independent.

    Parameters
    ----------
    g_vectors : (J, 3) G of each reflection, Å⁻¹
    weights : (J,) w_j

    Returns
    -------
    score (Å², inf if singular), C (3, 3) or None, strain σ (6,), Å
    """
    G = np.asarray(g_vectors, float)
    w = np.asarray(weights, float)
    S = (G * w[:, None]).T @ G
    _, tr, diag = _inverse_parts(S)
    if not np.isfinite(tr):
        return float("inf"), None, np.full(6, np.inf)
    C = np.linalg.inv(S)
    return float(np.trace(C)), C, np.sqrt(_component_var(np.diag(C)))


def _set_score(refls, best_sigma):
    G = np.array([r.g_sample for r in refls])
    w = np.array([r.weight if np.isfinite(r.weight) else 0.0 for r in refls])
    score, C, sig = score_set(G, w)
    lev = np.full(len(refls), np.nan) if C is None else np.einsum("ji,ik,jk->j", G, C, G) * w
    unreach = [r.hkl for r in refls if not r.reachable]
    if unreach:
        travel, order = float("nan"), list(range(len(refls)))
    else:
        travel, order = set_travel([list(r.angles_deg.values()) for r in refls])
    rel = sig / best_sigma if best_sigma is not None else np.full(6, np.nan)
    return SetScore([refls[i].hkl for i in order], score, condition_number(G), sig, rel, lev[order], travel, unreach)


def _collinear_groups(refls):
    """One representative per line of G directions: the most informative one
    (least travel from home on a tie)."""
    reps = []
    for r in sorted(refls, key=lambda r: (-r.info, r.travel_home_deg)):
        u = r.g_sample / r.g_norm
        if all(abs(u @ (q.g_sample / q.g_norm)) < 1 - 1e-9 for q in reps):
            reps.append(r)
    return reps


def _exhaustive(F, J, chunk=50_000):
    """Score every J-subset of the candidates' information matrices F (n, 3, 3).

    Yields (combinations, traces, component variances) chunk by chunk."""
    n = F.shape[0]
    it = itertools.combinations(range(n), J)
    while True:
        flat = np.fromiter(itertools.chain.from_iterable(itertools.islice(it, chunk)), dtype=np.int64)
        if flat.size == 0:
            return
        comb = flat.reshape(-1, J)
        S = F[comb].sum(1)
        _, tr, diag = _inverse_parts(S)
        yield comb, tr, _component_var(diag)


def _exchange(F, J, ok_travel, rng, restarts=6):
    """Exchange search for the J-subset of least trace((Σ F)⁻¹): start from a
    greedy set (and random ones), swap one member for one non-member while the
    score improves (the exchange algorithms of optimal design: Atkinson,
    Donev & Tobias, Optimum Experimental Designs, with SAS, 2007, ch. 12)."""
    n = F.shape[0]
    ridge = 1e-9 * np.trace(F.sum(0)) / 3 * np.eye(3)

    def tr_of(S):
        return _inverse_parts(S)[1]

    starts = []
    cur = []
    for _ in range(J):
        rest = [c for c in range(n) if c not in cur]
        S = F[cur].sum(0) + ridge if cur else ridge
        cur.append(rest[int(np.argmin(tr_of(S[None] + F[rest])))])
    starts.append(cur)
    for _ in range(restarts):
        starts.append(rng.choice(n, J, replace=False).tolist())
    best = (np.inf, None)
    for s in starts:
        cur = list(s)
        val = tr_of(F[cur].sum(0)[None])[0] if ok_travel(cur) else np.inf
        while True:
            improved = False
            out = [c for c in range(n) if c not in cur]
            for pos in range(J):
                base = F[[c for i, c in enumerate(cur) if i != pos]].sum(0)
                trs = tr_of(base[None] + F[out])
                for o in np.argsort(trs):
                    if not trs[o] < val * (1 - 1e-12):
                        break
                    trial = list(cur)
                    trial[pos] = out[o]
                    if ok_travel(trial):
                        cur, val, improved = trial, float(trs[o]), True
                        break
                if improved:
                    break
            if not improved:
                break
        if val < best[0]:
            best = (val, cur)
    return best


def choose_set(reflections, n, max_travel_deg=None, exhaustive_limit=2_000_000, seed=0):
    """The set of n reachable reflections of least score.

    Candidates are the reachable reflections with a finite weight, one per
    line of G directions (G and −G, or (1 1 1) and (2 2 2), measure the same
    component; the most informative is kept). Sets are scored exhaustively
    when there are at most ``exhaustive_limit`` of them, else by an exchange
    search. With ``max_travel_deg``, sets whose travel (:func:`set_travel`)
    exceeds it are skipped.

    Returns
    -------
    (SetScore or None, best component σ (6,) over all candidate sets or None,
    message)
    """
    cands = _collinear_groups([r for r in reflections if r.reachable and np.isfinite(r.weight) and r.weight > 0])
    if len(cands) < n:
        return None, None, (f"only {len(cands)} reachable reflections in distinct directions, fewer than "
                            f"the {n} asked for (plan.n_reflections)")
    G = np.array([r.g_sample for r in cands])
    w = np.array([r.weight for r in cands])
    F = w[:, None, None] * G[:, :, None] * G[:, None, :]
    settings = [list(r.angles_deg.values()) for r in cands]

    def ok_travel(idx):
        return max_travel_deg is None or set_travel([settings[i] for i in idx])[0] <= max_travel_deg

    n_sets = math.comb(len(cands), n)
    best_sigma = None
    if n_sets <= exhaustive_limit:
        D = _travel_matrix(settings)
        iu = np.triu_indices(n, 1)
        var_min = np.full(6, np.inf)
        best_tr, chosen = np.inf, None
        for comb, tr, var in _exhaustive(F, n):
            fin = np.isfinite(tr)
            if not fin.any():
                continue
            var_min = np.minimum(var_min, var[fin].min(0))
            cand = fin & (tr < best_tr)
            if max_travel_deg is not None:
                # any visiting order covers the farthest pair: a lower bound
                cand &= D[comb[:, iu[0]], comb[:, iu[1]]].max(1) <= max_travel_deg
            idx = np.nonzero(cand)[0]
            idx = idx[np.argsort(tr[idx], kind="stable")]
            if max_travel_deg is None:
                if idx.size:
                    best_tr, chosen = float(tr[idx[0]]), comb[idx[0]].tolist()
                continue
            for b0 in range(0, idx.size, 4096):
                part = idx[b0:b0 + 4096]
                ok = np.nonzero(_min_paths(D, comb[part]) <= max_travel_deg)[0]
                if ok.size:
                    best_tr, chosen = float(tr[part[ok[0]]]), comb[part[ok[0]]].tolist()
                    break
        if not np.all(np.isfinite(var_min)):
            return None, None, "every candidate set is coplanar: the strain tensor cannot be determined"
        best_sigma = np.sqrt(var_min)
        if chosen is None:
            return None, best_sigma, (f"no set of {n} reflections keeps the total circle travel within "
                                      f"plan.max_travel_deg = {max_travel_deg:g}°")
    else:
        rng = np.random.default_rng(seed)
        val, chosen = _exchange(F, n, ok_travel, rng)
        if chosen is None or not np.isfinite(val):
            return None, None, (f"the exchange search found no set of {n} reflections with a finite score"
                                + (f" within plan.max_travel_deg = {max_travel_deg:g}°" if max_travel_deg else ""))
        best_sigma = None  # not known without the exhaustive search
    return _set_score([cands[i] for i in chosen], best_sigma), best_sigma, ""


def _assign_weights(refls, instrument, count_model):
    beam = axis_vector(instrument.beam)
    for r in refls:
        if not np.isfinite(r.two_theta_deg):
            continue
        if r.reachable:
            R = instrument.sample_rotation(r.angles_deg)
            q_lab = R @ r.g_sample
            kf = q_lab + instrument.k * beam
            p = kf / np.linalg.norm(kf)
        else:
            p = np.full(3, np.nan)
        r.intensity = float(count_model.intensity(abs(r.structure_factor), r.g_norm,
                                                  math.radians(r.two_theta_deg), p, beam))
    ref = max((r.intensity for r in refls if r.reachable and np.isfinite(r.intensity)), default=np.nan)
    if not np.isfinite(ref) or ref <= 0:
        ref = max((r.intensity for r in refls if np.isfinite(r.intensity)), default=1.0) or 1.0
    for r in refls:
        if np.isfinite(r.intensity):
            r.weight = float((r.intensity / ref) ** count_model.noise_exponent)
            r.info = r.weight * r.g_norm ** 2


def plan(crystal, instrument, options=PlanOptions(), orientation_residual_deg=None):
    """Plan a multi-reflection measurement.

    Lists every allowed reflection of ``crystal`` (with its orientation) with
    |G| ≤ ``options.g_max``, solves its settings (:func:`reach`), weighs it
    with the count model, chooses the best set (:func:`choose_set`) and scores
    ``options.score_set``.

    Returns
    -------
    :class:`PlanResult`

    Raises
    ------
    InputError
        on bad options, or when no allowed reflection is within the energy's
        reach (|G| ≤ 2k) and ``g_max``.
    """
    _validate_options(instrument, options)
    k = instrument.k
    g_max = 2 * k if options.g_max is None else float(options.g_max)
    hkls = crystal.allowed_reflections(g_max)
    shortest = crystal.allowed_reflections(max(g_max, 1.0) * 10)[:1] if not hkls else hkls[:1]
    if not any(np.linalg.norm(crystal.g_crystal(h)) <= 2 * k for h in hkls):
        if shortest:
            g0 = float(np.linalg.norm(crystal.g_crystal(shortest[0])))
            need = HC_KEV_ANGSTROM * g0 / (4 * np.pi)
            if g0 > 2 * k:
                raise InputError(f"instrument.energy_kev = {instrument.energy_kev:g}: reaches no allowed reflection of "
                                 f"{crystal.name}; the shortest, {format_hkl(shortest[0])} with |G| = {g0:.3f} Å⁻¹, "
                                 f"needs ≥ {need:.2f} keV")
            raise InputError(f"plan.g_max = {g_max:g} Å⁻¹: below the shortest allowed reflection of {crystal.name}, "
                             f"{format_hkl(shortest[0])} with |G| = {g0:.3f} Å⁻¹")
        raise InputError(f"crystal {crystal.name}: no allowed reflection found")
    user_hkls = []
    if options.score_set is not None:
        for i, h in enumerate(options.score_set):
            try:
                refl = crystal.reflection(h)
            except ReflectionError as e:
                raise InputError(f"plan.score_set[{i}]: {e}") from None
            user_hkls.append(refl.hkl)
        if len(user_hkls) < 3:
            raise InputError(f"plan.score_set: expected at least three reflections, got {len(user_hkls)}")
    extra = [h for h in user_hkls if tuple(h) not in set(map(tuple, hkls))]
    refls = reach(crystal, instrument, [*hkls, *extra], options)
    _assign_weights(refls, instrument, options.count_model)
    extra_set = set(map(tuple, extra))
    chosen, best_sigma, msg = choose_set([r for r in refls if r.hkl not in extra_set], options.n_reflections,
                                         options.max_travel_deg, options.exhaustive_limit, options.seed)
    by_hkl = {r.hkl: r for r in refls}
    user = _set_score([by_hkl[tuple(h)] for h in user_hkls], best_sigma) if user_hkls else None
    notes = []
    if len(_free_names(instrument, options)) > 3:
        notes.append("more than three free circles: settings are sampled from each solution family and the "
                     "valid one nearest home is kept")
    if chosen is not None and best_sigma is None:
        notes.append("many candidate sets: the chosen set comes from an exchange search (not proven optimal); "
                     "relative σ is not available")
    res = PlanResult(crystal.name, instrument.energy_kev, crystal.U.copy(), [c.name for c in instrument.circles],
                     refls, chosen, user,
                     options.n_reflections, options, msg, notes, best_sigma, orientation_residual_deg)
    return res


# ---------------------------------------------------------------------------
# Outputs
# ---------------------------------------------------------------------------

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


# ---------------------------------------------------------------------------
# Pipeline file
# ---------------------------------------------------------------------------

_PLAN_KEYS = {
    "g_max", "n_reflections", "free", "fixed", "home", "pixel", "surface_normal", "min_incidence_deg",
    "min_exit_deg", "rocking_circle", "rocking_range_deg", "max_travel_deg", "score_set", "count_model",
    "starts", "seed", "figure", "fragment", "orientation",
}
_COUNT_KEYS = {"noise_exponent", "polarization", "lorentz", "b_factor", "g_exponent"}


def _num(v, key, positive=False):
    if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v):
        raise ConfigError(f"{key} = {v!r}: expected a number")
    if positive and v <= 0:
        raise ConfigError(f"{key} = {v!r}: expected a positive number")
    return float(v)


def _table(cfg, key):
    if cfg is None:
        raise ConfigError(f"[{key}]: missing table")
    if not isinstance(cfg, Mapping):
        raise ConfigError(f"{key}: expected a table, got {type(cfg).__name__}")
    return cfg


def _validated(config):
    """The pipeline dict validated by :mod:`braggstrain.config` (as
    ``load_config`` returns it); a raw parsed dict has its ``[crystal]`` and
    ``[instrument]`` tables validated against the same schema (the planner
    needs no ``[[reflection]]``)."""
    from braggstrain import config as cm

    if not isinstance(config, Mapping):
        raise ConfigError(f"pipeline file: expected a table of tables, got {type(config).__name__}")
    if "_source" in config:
        return config
    src = "<pipeline>"
    out = {"_source": src}
    for key in ("crystal", "instrument"):
        if key not in config:
            raise ConfigError(f"{src}: missing table [{key}]")
        out[key] = cm._validate(config[key], cm.SCHEMA[key], key, src)
    if out["crystal"]["material"] is None and out["crystal"]["lattice"]["a"] is None:
        raise ConfigError(f"{src}: key 'crystal': expected 'material' (a name) or 'lattice.a' (Å)")
    out["plan"] = config.get("plan", {})
    return out


def _check_limits(cfg):
    """Name the key of an inverted circle range before the instrument is built."""
    src = cfg.get("_source", "<pipeline>")
    for group in ("sample_circles", "detector_circles"):
        for i, c in enumerate(cfg["instrument"][group]):
            lo, hi = c["limits"]
            if not lo < hi:
                raise ConfigError(f"{src}: key 'instrument.{group}[{i}].limits': value {list(c['limits'])} for "
                                  f"circle '{c['name']}'; expected [lower, upper] with lower < upper (degrees)")


def _orientation_from_plan(ori, crystal, instrument):
    """U from ``[plan.orientation]``: ``euler_bunge_deg`` (+ ``mounting``) or
    ``measured`` (a list of {hkl, angles_deg, pixel}). Returns (crystal,
    residuals in degrees or None, a note)."""
    ori = _table(ori, "plan.orientation")
    extra = set(ori) - {"euler_bunge_deg", "mounting", "measured"}
    if extra:
        raise ConfigError(f"plan.orientation: unknown key(s) {sorted(extra)}; expected euler_bunge_deg, mounting "
                          f"or measured")
    given = [k for k in ("euler_bunge_deg", "measured") if k in ori]
    if len(given) != 1:
        raise ConfigError(f"plan.orientation: expected exactly one of euler_bunge_deg, measured; got {given}")
    if "mounting" in ori and given[0] != "euler_bunge_deg":
        raise ConfigError("plan.orientation.mounting: only used with euler_bunge_deg")
    if given[0] == "euler_bunge_deg":
        try:
            U = orientation_from_euler(ori["euler_bunge_deg"], mounting_matrix(ori.get("mounting"),
                                                                             "plan.orientation.mounting"))
        except ConfigError:
            raise
        except InputError as e:
            raise ConfigError(f"plan.orientation.euler_bunge_deg: {e}") from None
        return crystal.with_orientation(U), None, "orientation from Bunge Euler angles ([plan.orientation])"
    meas = ori["measured"]
    key = "plan.orientation.measured"
    if not isinstance(meas, (list, tuple)):
        raise ConfigError(f"{key}: expected a list of {{hkl, angles_deg, pixel}}")
    ms = []
    for i, m in enumerate(meas):
        k = f"{key}[{i}]"
        m = _table(m, k)
        extra = set(m) - {"hkl", "angles_deg", "pixel"}
        if extra:
            raise ConfigError(f"{k}: unknown key(s) {sorted(extra)}; expected hkl, angles_deg, pixel")
        for req in ("hkl", "angles_deg"):
            if req not in m:
                raise ConfigError(f"{k}.{req}: missing")
        if not (isinstance(m["hkl"], (list, tuple)) and len(m["hkl"]) == 3):
            raise ConfigError(f"{k}.hkl = {m['hkl']!r}: expected [h, k, l]")
        if not isinstance(m["angles_deg"], Mapping):
            raise ConfigError(f"{k}.angles_deg: expected a table circle name → degrees")
        pix = m.get("pixel")
        if pix is not None and not (isinstance(pix, (list, tuple)) and len(pix) == 2):
            raise ConfigError(f"{k}.pixel = {pix!r}: expected [row, column]")
        ms.append(MeasuredReflection(tuple(m["hkl"]), dict(m["angles_deg"]), None if pix is None else tuple(pix)))
    U, residual = orientation_from_measured(crystal, instrument, ms, key)
    how = "two-reflection orientation" if len(ms) == 2 else f"least-squares fit to {len(ms)} reflections"
    return crystal.with_orientation(U), residual, f"orientation from found reflections ({how}, [plan.orientation])"


def _plan_options(cfg, instrument):
    cfg = _table(cfg if cfg is not None else {}, "plan")
    extra = set(cfg) - _PLAN_KEYS
    if extra:
        raise ConfigError(f"plan: unknown key(s) {sorted(extra)}; expected some of {sorted(_PLAN_KEYS)}")
    names = [c.name for c in instrument.circles]
    kw = {}
    if "g_max" in cfg:
        kw["g_max"] = _num(cfg["g_max"], "plan.g_max", positive=True)
    if "n_reflections" in cfg:
        n = cfg["n_reflections"]
        if isinstance(n, bool) or not isinstance(n, int) or not 3 <= n <= 6:
            raise ConfigError(f"plan.n_reflections = {n!r}: expected an integer from 3 to 6")
        kw["n_reflections"] = n
    if "free" in cfg:
        f = cfg["free"]
        if not isinstance(f, (list, tuple)) or not all(isinstance(v, str) for v in f):
            raise ConfigError(f"plan.free = {f!r}: expected a list of circle names")
        for v in f:
            if v not in names:
                raise ConfigError(f"plan.free: unknown circle '{v}'; the instrument's circles are {names}")
        kw["free"] = tuple(f)
    for key, dest in (("fixed", "fixed_deg"), ("home", "home_deg")):
        if key in cfg:
            t = _table(cfg[key], f"plan.{key}")
            for n, v in t.items():
                if n not in names:
                    raise ConfigError(f"plan.{key}: unknown circle '{n}'; the instrument's circles are {names}")
                _num(v, f"plan.{key}.{n}")
            kw[dest] = {n: float(v) for n, v in t.items()}
    if "pixel" in cfg:
        p = cfg["pixel"]
        if not (isinstance(p, (list, tuple)) and len(p) == 2):
            raise ConfigError(f"plan.pixel = {p!r}: expected [row, column]")
        kw["pixel"] = tuple(_num(v, "plan.pixel") for v in p)
    if "surface_normal" in cfg:
        s = cfg["surface_normal"]
        if s is False:
            kw["surface_normal"] = None
        elif isinstance(s, (list, tuple)) and len(s) == 3:
            kw["surface_normal"] = tuple(_num(v, "plan.surface_normal") for v in s)
        else:
            raise ConfigError(f"plan.surface_normal = {s!r}: expected [x, y, z] (sample frame) or false (no substrate)")
    for key in ("min_incidence_deg", "min_exit_deg", "rocking_range_deg"):
        if key in cfg:
            kw[key] = _num(cfg[key], f"plan.{key}")
    if "max_travel_deg" in cfg:
        kw["max_travel_deg"] = _num(cfg["max_travel_deg"], "plan.max_travel_deg", positive=True)
    if "rocking_circle" in cfg:
        rc = cfg["rocking_circle"]
        if rc not in [c.name for c in instrument.sample_circles]:
            raise ConfigError(f"plan.rocking_circle = {rc!r}: expected a sample circle, one of "
                              f"{[c.name for c in instrument.sample_circles]}")
        kw["rocking_circle"] = rc
    if "score_set" in cfg:
        s = cfg["score_set"]
        if not isinstance(s, (list, tuple)) or not all(isinstance(h, (list, tuple)) and len(h) == 3 for h in s):
            raise ConfigError(f"plan.score_set = {s!r}: expected a list of [h, k, l]")
        kw["score_set"] = tuple(tuple(h) for h in s)
    if "count_model" in cfg:
        cm = _table(cfg["count_model"], "plan.count_model")
        extra = set(cm) - _COUNT_KEYS
        if extra:
            raise ConfigError(f"plan.count_model: unknown key(s) {sorted(extra)}; expected some of {sorted(_COUNT_KEYS)}")
        try:
            kw["count_model"] = CountModel(**cm)
        except InputError as e:
            raise ConfigError(f"plan.{e}") from None
    for key in ("starts", "seed"):
        if key in cfg:
            v = cfg[key]
            if isinstance(v, bool) or not isinstance(v, int) or v < (1 if key == "starts" else 0):
                raise ConfigError(f"plan.{key} = {v!r}: expected a {'positive' if key == 'starts' else 'non-negative'} "
                                  f"integer")
            kw[key] = v
    opts = PlanOptions(**kw)
    try:
        _validate_options(instrument, opts)
    except ConfigError:
        raise
    except InputError as e:
        raise ConfigError(str(e)) from None
    return opts


def plan_from_config(config, out_dir):
    """Plan from a pipeline dict and write the figure and the fragment.

    Parameters
    ----------
    config : dict
        The pipeline file as :func:`braggstrain.config.load_config` returns
        it, or as parsed TOML (its ``[crystal]`` and ``[instrument]`` tables
        are then validated here). Read: ``[crystal]`` and ``[instrument]``
        (through :func:`braggstrain.config.build_crystal` and
        :func:`~braggstrain.config.build_instrument`) and ``[plan]``
        (keys in docs/planner.md), whose ``[plan.orientation]``, if given,
        replaces the orientation of ``[crystal]``.
    out_dir : path
        Folder (created if missing) that receives the stereographic figure
        (``plan.figure``, default "plan.png") and, when a set was chosen, the
        pipeline fragment (``plan.fragment``, default
        "plan_reflections.toml"); both written atomically.

    Returns
    -------
    :class:`PlanResult` with ``figure_path`` and ``fragment_path`` set
    (``fragment_path`` None when no set could be chosen; ``message`` says why).

    Raises
    ------
    ConfigError naming the file and key for every problem with the pipeline file.
    """
    from braggstrain import config as cm

    cfg = _validated(config)
    src = cfg.get("_source", "<pipeline>")
    _check_limits(cfg)
    instrument = cm.build_instrument(cfg)
    crystal = cm.build_crystal(cfg)
    pcfg = cfg.get("plan") or {}
    try:
        pcfg = _table(pcfg, "plan")
        notes = []
        residual = None
        if "orientation" in pcfg:
            crystal, residual, note = _orientation_from_plan(pcfg["orientation"], crystal, instrument)
            notes.append(note)
        elif cfg["crystal"].get("orientation") is None and (cfg["crystal"].get("orient_by") or {}).get("hkl1") is None:
            notes.append("no orientation given ([crystal] orientation / orient_by or [plan.orientation]): "
                         "the crystal axes are taken along the sample axes")
        options = _plan_options(pcfg, instrument)
        names = {}
        for key, default in (("figure", "plan.png"), ("fragment", "plan_reflections.toml")):
            v = pcfg.get(key, default)
            if not isinstance(v, str) or not v or os.path.basename(v) != v:
                raise ConfigError(f"plan.{key} = {v!r}: expected a plain file name (written into the output folder)")
            names[key] = v
        result = plan(crystal, instrument, options, residual)
    except InputError as e:  # ConfigError included: add the file
        raise ConfigError(f"{src}: {e}") from None
    result.notes[:0] = notes
    out_dir = os.fspath(out_dir)
    os.makedirs(out_dir, exist_ok=True)
    fig = os.path.join(out_dir, names["figure"])
    plot_plan(result, fig)
    result.figure_path = fig
    if result.chosen is not None:
        frag = os.path.join(out_dir, names["fragment"])
        write_atomic(frag, fragment_text(result))
        result.fragment_path = frag
    return result
