"""What the planner is asked and what it answers: options, the count model, reflections, scores, the result."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Mapping

import numpy as np

from braggstrain.errors import InputError
from braggstrain.geometry.rotation import AXES

__all__ = ["CountModel", "PlanOptions", "ReflectionPlan", "SetScore", "PlanResult"]


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
