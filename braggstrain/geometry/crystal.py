"""The crystal: lattice, orientation and reflections.

One object per physical crystal: made once from an xrayutilities material
(``Crystal("Pt")``) or from explicit lattice parameters, then asked about
reflections. Conventions (docs/design.md): crystal Cartesian coordinates are those
of xrayutilities (a along x, b in the xy plane); the orientation U takes
crystal Cartesian coordinates to the sample frame; G_sample = U·B·(h, k, l)
with B including 2π, so |G| = 2π/d.
"""

from __future__ import annotations

import itertools
from dataclasses import dataclass

import numpy as np

from braggstrain.errors import InputError, ReflectionError, did_you_mean

__all__ = ["HC_KEV_ANGSTROM", "wavelength", "format_hkl", "Crystal", "check_reflection_identity", "Q_TOLERANCE",
           "DIRECTION_TOLERANCE_DEG"]

#: Default tolerances of :func:`check_reflection_identity` (common practice,
#: no source): 1 % in |Q| is about ten times a typical nanocrystal's strain
#: and a geometry calibration's error, and far below the smallest gap
#: between two reflections' |G| of a cubic crystal at low indices (√3/2 vs 1,
#: about 13 %); 2° in direction allows a rough orientation matrix.
Q_TOLERANCE = 0.01
DIRECTION_TOLERANCE_DEG = 2.0

#: hc in keV·Å (CODATA 2018: h c = 1.239 841 984 × 10⁻⁶ eV·m).
HC_KEV_ANGSTROM = 12.398419843320026

# Centring translations of the conventional cell, in lattice coordinates.
_CENTRING = {
    "P": [],
    "I": [(0.5, 0.5, 0.5)],
    "F": [(0.5, 0.5, 0.0), (0.5, 0.0, 0.5), (0.0, 0.5, 0.5)],
    "A": [(0.0, 0.5, 0.5)],
    "B": [(0.5, 0.0, 0.5)],
    "C": [(0.5, 0.5, 0.0)],
}

# Slip-plane families (Miller indices of the plane normal) by structure, from
# the standard tables (Hull & Bacon, Introduction to Dislocations, 5th ed.,
# 2011, ch. 3): fcc {111}, bcc {110} (also {112}, {123}, not listed).
_SLIP_PLANES = {"F": [(1, 1, 1)], "I": [(1, 1, 0)]}


# Cubic elements that xrayutilities' database lacks, built from their space
# group and a room-temperature lattice parameter (Å). Values from memory of
# the standard tables (e.g. Kittel, Introduction to Solid State Physics, 8th
# ed., ch. 1, Table 3-4 lists them to three figures).
_EXTRA_ELEMENTS = {
    "Ni": (225, 3.5240, "4a"),
    "Pd": (225, 3.8907, "4a"),
    "Al": (225, 4.0495, "4a"),
    "Fe": (229, 2.8665, "2a"),
    "Mo": (229, 3.1470, "2a"),
    "Cr": (229, 2.8846, "2a"),
    "Ta": (229, 3.3013, "2a"),
    "Nb": (229, 3.3004, "2a"),
}


def _orientation():
    from braggstrain.geometry import orientation

    return orientation


def _extra_material(name):
    import xrayutilities as xu

    sg, a, wyck = _EXTRA_ELEMENTS[name]
    el = getattr(xu.materials.elements, name)
    return xu.materials.Crystal(name, xu.materials.SGLattice(sg, a, atoms=[el], pos=[wyck]))


def wavelength(energy_kev):
    """X-ray wavelength in Å for a photon energy in keV: λ = hc/E (CODATA 2018)."""
    e = np.asarray(energy_kev, dtype=float)
    if np.any(~np.isfinite(e)) or np.any(e <= 0):
        raise InputError(f"energy: expected a positive photon energy in keV, got {energy_kev!r}")
    return HC_KEV_ANGSTROM / e


def _hkl(hkl):
    h = np.asarray(hkl, dtype=float).reshape(-1)
    if h.shape != (3,) or not np.all(np.isfinite(h)):
        raise ReflectionError(f"reflection: expected three Miller indices (h, k, l), got {hkl!r}")
    if np.allclose(h, 0):
        raise ReflectionError("reflection (0 0 0) is the direct beam, not a Bragg reflection")
    if not np.allclose(h, np.round(h)):
        raise ReflectionError(f"reflection {tuple(hkl)}: Miller indices must be integers")
    return h


def format_hkl(hkl):
    """Miller indices as text, e.g. "(1 -1 0)": the one way reflections are
    named in messages, tables, figures and the report."""
    return "(" + " ".join(str(int(round(v))) for v in np.asarray(hkl).reshape(-1)) + ")"


@dataclass(frozen=True)
class Reflection:
    """A checked reflection of a crystal (answers of :meth:`Crystal.reflection`)."""

    hkl: tuple
    g_crystal: np.ndarray  # Å⁻¹
    g_sample: np.ndarray  # Å⁻¹
    d_spacing: float  # Å


class Crystal:
    """A crystal: lattice, atoms (through xrayutilities), orientation.

    Parameters
    ----------
    material : str or xrayutilities.materials.Crystal
        A material known to xrayutilities by name ("Pt", "Au", "Si", ...), or
        such a material object.
    orientation : (3, 3) array, optional
        U, crystal Cartesian → sample frame. Identity by default.

    Use :meth:`from_lattice` for a crystal given by lattice parameters and a
    centring only.
    """

    def __init__(self, material="Pt", orientation=None):
        import xrayutilities as xu

        if isinstance(material, str):
            mat = getattr(xu.materials, material, None)
            if not isinstance(mat, xu.materials.Crystal) and material in _EXTRA_ELEMENTS:
                mat = _extra_material(material)
            if not isinstance(mat, xu.materials.Crystal):
                known = sorted([n for n in dir(xu.materials)
                                if isinstance(getattr(xu.materials, n, None), xu.materials.Crystal)]
                               + list(_EXTRA_ELEMENTS))
                raise InputError(f"material '{material}': not a crystal known to xrayutilities"
                                 f"{did_you_mean(material, known, n=3)}")
        elif isinstance(material, xu.materials.Crystal):
            mat = material
        else:
            raise InputError(f"material: expected a name or an xrayutilities Crystal, got {type(material).__name__}")
        self.material = mat
        self.name = mat.name
        self.A = np.column_stack([mat.a1, mat.a2, mat.a3]).astype(float)
        sg = str(mat.lattice.space_group)
        self.space_group = sg
        self.centring = self._centring_from_symbol(mat)
        self._explicit = False
        self.U = np.eye(3) if orientation is None else _orientation().check_rotation(orientation)
        self._finish()

    @classmethod
    def from_lattice(cls, a, b=None, c=None, alpha=90.0, beta=90.0, gamma=90.0,
                     centring="P", name="crystal", orientation=None, poisson=0.33):
        """A crystal from lattice parameters (Å, degrees) and a centring letter.

        Reflections are then allowed or forbidden by the centring's rules
        only (International Tables for Crystallography, Vol. A, Table 2.2.13.1),
        and structure factors are those of one unit scatterer per lattice point.
        """
        import xrayutilities as xu

        b = a if b is None else b
        c = a if c is None else c
        vals = [a, b, c, alpha, beta, gamma]
        if any((not np.isfinite(v)) or v <= 0 for v in vals):
            raise InputError(f"lattice: expected positive lengths (Å) and angles (°), got {vals}")
        if centring not in _CENTRING:
            raise InputError(f"centring '{centring}': expected one of {sorted(_CENTRING)}")
        self = cls.__new__(cls)
        lat = xu.materials.SGLattice(1, a, b, c, alpha, beta, gamma)
        self.material = xu.materials.Crystal(name, lat)
        self.name = name
        self.A = np.column_stack([self.material.a1, self.material.a2, self.material.a3]).astype(float)
        self.space_group = "1"
        self.centring = centring
        self._explicit = True
        self._poisson = poisson
        self.U = np.eye(3) if orientation is None else _orientation().check_rotation(orientation)
        self._finish()
        return self

    @staticmethod
    def _centring_from_symbol(mat):
        # The Hermann-Mauguin symbol starts with the centring letter.
        name = getattr(mat.lattice, "name", "") or ""
        letter = name.split()[-1][0] if name else "P"
        if letter not in _CENTRING:
            letter = "P"
        if letter == "R":
            letter = "P"
        return letter

    def _finish(self):
        self.B = 2 * np.pi * np.linalg.inv(self.A).T
        a = np.linalg.norm(self.A, axis=0)
        self.lattice_parameters = tuple(float(v) for v in a)

    # -- orientation ----------------------------------------------------
    def with_orientation(self, U):
        """A copy of this crystal with orientation U (crystal → sample)."""
        new = object.__new__(type(self))
        new.__dict__.update(self.__dict__)
        new.U = _orientation().check_rotation(U)
        return new

    def oriented_by(self, hkl1, direction1, hkl2, direction2):
        """A copy oriented so reflection hkl1 points along sample-frame
        ``direction1`` and hkl2 lies in the plane of (direction1, direction2)."""
        U = _orientation().orientation_from_two_reflections(self.g_crystal(hkl1), self.g_crystal(hkl2),
                                             direction1, direction2)
        return self.with_orientation(U)

    # -- reflections ----------------------------------------------------
    def g_crystal(self, hkl):
        """G of reflection hkl in crystal Cartesian coordinates, Å⁻¹ (2π included)."""
        return self.B @ _hkl(hkl)

    def g_sample(self, hkl):
        """G of reflection hkl in the sample frame, Å⁻¹: U·B·h."""
        return self.U @ self.g_crystal(hkl)

    def d_spacing(self, hkl):
        """Interplanar spacing d = 2π/|G|, Å."""
        return float(2 * np.pi / np.linalg.norm(self.g_crystal(hkl)))

    def bragg_angle(self, hkl, energy_kev):
        """Bragg angle θ (radians) of hkl at the photon energy (keV):
        λ = 2 d sin θ. Raises ReflectionError if λ > 2d."""
        lam = float(wavelength(energy_kev))
        d = self.d_spacing(hkl)
        s = lam / (2 * d)
        if s > 1:
            raise ReflectionError(
                f"reflection {format_hkl(hkl)} of {self.name}: unreachable at {float(energy_kev):g} keV "
                f"(λ = {lam:.4f} Å > 2d = {2 * d:.4f} Å)")
        return float(np.arcsin(s))

    def structure_factor(self, hkl, energy_kev=8.0):
        """Complex structure factor F(hkl) at the energy (keV), electrons.

        From xrayutilities' atomic form factors for a named material; for a
        crystal made by :meth:`from_lattice`, one unit scatterer per lattice
        point (so |F| is the number of lattice points per cell or zero).
        """
        h = _hkl(hkl)
        if self._explicit:
            pts = [(0.0, 0.0, 0.0), *_CENTRING[self.centring]]
            return complex(sum(np.exp(2j * np.pi * np.dot(h, p)) for p in pts))
        return complex(self.material.StructureFactor(self.material.Q(*h), float(energy_kev) * 1000.0))

    def is_allowed(self, hkl):
        """False for a systematically absent reflection (zero structure factor)."""
        h = _hkl(hkl)
        if self._explicit:
            return abs(self.structure_factor(h)) > 1e-6
        ok = self.material.lattice.hkl_allowed(tuple(int(round(v)) for v in h))
        if not ok:
            return False
        # Special positions can still cancel (e.g. diamond (2 2 2)): check F.
        f = abs(self.structure_factor(h, 10.0))
        f0 = sum(abs(complex(a[0].f(0.0, 10000.0))) for a in self.material.lattice.base())
        return f > 1e-6 * max(f0, 1.0)

    def reflection(self, hkl, energy_kev=None):
        """Check a reflection and return its G and d.

        Raises
        ------
        ReflectionError
            if the structure factor vanishes (forbidden) or, when an energy
            is given, the reflection is unreachable (λ > 2d).
        """
        h = _hkl(hkl)
        if not self.is_allowed(h):
            raise ReflectionError(
                f"reflection {format_hkl(h)} of {self.name}: forbidden (structure factor is zero for the "
                f"{self.centring}-centred lattice{'' if self._explicit else ' and its atoms'}); "
                f"expected an allowed reflection")
        if energy_kev is not None:
            self.bragg_angle(h, energy_kev)
        return Reflection(tuple(int(round(v)) for v in h), self.g_crystal(h), self.g_sample(h), self.d_spacing(h))

    def allowed_reflections(self, g_max, energy_kev=None):
        """Every allowed reflection with |G| ≤ g_max (Å⁻¹), sorted by |G|;
        reachable ones only when an energy is given (|G| ≤ 4π/λ)."""
        if energy_kev is not None:
            g_max = min(g_max, 4 * np.pi / float(wavelength(energy_kev)))
        hmax = [int(np.ceil(g_max * np.linalg.norm(self.A[:, i]) / (2 * np.pi))) for i in range(3)]
        out = []
        for h in itertools.product(*[range(-m, m + 1) for m in hmax]):
            if h == (0, 0, 0):
                continue
            g = np.linalg.norm(self.B @ np.array(h, float))
            if g <= g_max * (1 + 1e-12) and self.is_allowed(h):
                out.append((g, h))
        out.sort()
        return [h for _, h in out]

    # -- lattice translations, for Burgers vectors ------------------------
    def translations(self, max_length=None):
        """Short lattice translations (lattice coordinates, centring included).

        Returns every translation t ≠ 0 of the Bravais lattice with
        |A·t| ≤ ``max_length`` Å (default: the longest conventional cell edge),
        sorted by length. For fcc this holds ½⟨110⟩ and ⟨100⟩; for bcc ½⟨111⟩
        and ⟨100⟩.
        """
        if max_length is None:
            max_length = max(self.lattice_parameters) * (1 + 1e-9)
        cents = [(0.0, 0.0, 0.0), *_CENTRING[self.centring]]
        out = {}
        n = 2
        for ijk in itertools.product(range(-n, n + 1), repeat=3):
            for c in cents:
                t = np.array(ijk, float) + np.array(c)
                length = np.linalg.norm(self.A @ t)
                if 0 < length <= max_length:
                    out[tuple(np.round(t * 2) / 2)] = length
        return [np.array(t) for t, _ in sorted(out.items(), key=lambda kv: (kv[1], kv[0]))]

    def slip_planes(self):
        """Slip-plane normals (Miller indices) of the crystal's structure:
        every member of {111} for an F-centred lattice, {110} for I-centred;
        empty when unknown."""
        fams = _SLIP_PLANES.get(self.centring, [])
        planes = set()
        for f in fams:
            for perm in set(itertools.permutations(f)):
                for signs in itertools.product((1, -1), repeat=3):
                    p = tuple(s * v for s, v in zip(signs, perm))
                    # keep one of ±p
                    q = tuple(-v for v in p)
                    if q not in planes:
                        planes.add(p)
        return sorted(planes)

    def burgers_to_sample(self, burgers):
        """Burgers vector from lattice coordinates to the sample frame, Å."""
        return self.U @ self.A @ np.asarray(burgers, float)

    def burgers_from_sample(self, b_sample):
        """Burgers vector from the sample frame (Å) to lattice coordinates."""
        return np.linalg.solve(self.U @ self.A, np.asarray(b_sample, float))

    @property
    def poisson_ratio(self):
        """Poisson's ratio from xrayutilities' elastic constants (isotropic
        average ν = c12/(c11 + c12) of a cubic crystal), or 0.33 if unknown."""
        if self._explicit:
            return self._poisson
        try:
            cij = np.asarray(self.material.cij)
            c11, c12 = cij[0, 0], cij[0, 1]
            if c11 > 0:
                return float(c12 / (c11 + c12))
        except Exception:  # noqa: BLE001 - material without elastic constants
            pass
        return 0.33

    def __repr__(self):
        a = ", ".join(f"{v:.4f}" for v in self.lattice_parameters)
        return f"Crystal({self.name!r}, a=({a}) Å, {self.centring}-centred)"


def check_reflection_identity(crystal, hkl, q_sample, *, where="reflection", q_tolerance=Q_TOLERANCE,
                              direction_tolerance_deg=DIRECTION_TOLERANCE_DEG, energy_kev=None):
    """Check that a measured peak is the reflection it is declared to be.

    The scattering vector Q at the measured peak (from the geometry and the
    angles, in the sample frame) must match G = U·B·h of the declared
    reflection: |Q| within ``q_tolerance`` (relative) of |G|, and its
    direction within ``direction_tolerance_deg`` of G's.

    Parameters
    ----------
    crystal : Crystal (its orientation U is the declared one)
    hkl : 3 ints, the declared reflection
    q_sample : (3,) float, Q at the peak in the sample frame, Å⁻¹
    where : str, how the message names the reflection (e.g. a pipeline key)
    q_tolerance : float, relative (default 0.01)
    direction_tolerance_deg : float, degrees (default 2)
    energy_kev : float, optional; with it the reflections suggested are the
        reachable ones only

    Returns
    -------
    (relative |Q| difference, angle in degrees)

    Raises
    ------
    ReflectionError
        naming the reflection, the measured |Q| and d, how far off they are
        and the crystal's reflections that would fit the peak.
    """
    q = np.asarray(q_sample, float).reshape(3)
    h = _hkl(hkl)
    g = crystal.g_sample(h)
    qn, gn = float(np.linalg.norm(q)), float(np.linalg.norm(g))
    if not (np.isfinite(qn) and qn > 0):
        raise ReflectionError(f"{where}: the measured peak has no usable Q ({q.tolist()}); expected a Bragg peak")
    dq = abs(qn - gn) / gn
    ang = float(np.degrees(np.arccos(np.clip(q @ g / (qn * gn), -1.0, 1.0))))
    if dq <= q_tolerance and ang <= direction_tolerance_deg:
        return dq, ang
    wrong = []
    if dq > q_tolerance:
        wrong.append(f"{100 * dq:.2f} % from |G{format_hkl(h)}| = {gn:.4f} Å⁻¹ (d = {2 * np.pi / gn:.4f} Å, "
                     f"tolerance {100 * q_tolerance:g} %)")
    if ang > direction_tolerance_deg:
        wrong.append(f"{ang:.1f}° from the declared direction of {format_hkl(h)} in the sample frame "
                     f"(tolerance {direction_tolerance_deg:g}°)")
    fits, same_q = [], []
    for c in crystal.allowed_reflections(qn * (1 + q_tolerance) * (1 + 1e-9), energy_kev=energy_kev):
        gc = crystal.g_sample(c)
        gcn = np.linalg.norm(gc)
        if abs(qn - gcn) / gcn > q_tolerance:
            continue
        a = np.degrees(np.arccos(np.clip(q @ gc / (qn * gcn), -1.0, 1.0)))
        (fits if a <= direction_tolerance_deg else same_q).append(format_hkl(c))
    if fits:
        hint = f"reflections of {crystal.name} that would fit: {', '.join(fits)}"
    elif same_q:
        more = len(same_q) > 6
        hint = (f"no reflection of {crystal.name} fits in the declared orientation; by |Q| alone: "
                f"{', '.join(same_q[:6])}{', …' if more else ''} (check the orientation)")
    else:
        hint = f"no reflection of {crystal.name} has this |Q| (check the energy, distance and pixel size)"
    raise ReflectionError(f"{where} {format_hkl(h)}: the measured peak has |Q| = {qn:.4f} Å⁻¹ (d = {2 * np.pi / qn:.4f} Å), "
                          + " and ".join(wrong) + f"; {hint}")
