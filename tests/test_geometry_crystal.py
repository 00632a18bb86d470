"""Crystal: |G|, d, Bragg angles, forbidden and unreachable reflections, orientation."""

import numpy as np
import pytest
import xrayutilities as xu

from braggstrain.geometry.crystal import Crystal, HC_KEV_ANGSTROM, wavelength
from braggstrain.errors import InputError, ReflectionError

# Room-temperature lattice parameters (Å), from memory of the standard tables
# (Wyckoff, Crystal Structures, 2nd ed., vol. 1, 1963; the same values are in
# xrayutilities' database): Pt 3.9242, Au 4.0782, Si 5.431.
HANDBOOK_A = {"Pt": 3.9242, "Au": 4.0782, "Si": 5.431}
CASES = [("Pt", (1, 1, 1)), ("Pt", (2, 0, 0)), ("Pt", (2, 2, 0)), ("Pt", (3, 1, 1)),
         ("Au", (1, 1, 1)), ("Au", (2, 0, 0)), ("Au", (2, 2, 0)),
         ("Si", (1, 1, 1)), ("Si", (2, 2, 0)), ("Si", (4, 0, 0)), ("Si", (3, 1, 1))]


def test_wavelength_codata():
    # CODATA 2018: hc = 12.398 419 843 320 026 keV·Å; 8.048 keV (Cu Kα1) → 1.5406 Å
    # (International Tables for Crystallography Vol. C, Table 4.2.2.1, Cu Kα1 = 1.540 598 Å).
    assert HC_KEV_ANGSTROM == pytest.approx(12.39841984, rel=1e-9)
    assert wavelength(8.04778) == pytest.approx(1.540598, abs=2e-5)
    with pytest.raises(InputError):
        wavelength(-1)


@pytest.mark.parametrize("energy", [8.0, 12.4])
@pytest.mark.parametrize("name,hkl", CASES)
def test_g_and_bragg_angle_against_hand_and_xrayutilities(name, hkl, energy):
    c = Crystal(name)
    h = np.array(hkl, float)
    # hand computation: cubic d = a/√(h²+k²+l²), |G| = 2π/d, λ = 12.39842/E, λ = 2d sinθ
    d_hand = HANDBOOK_A[name] / np.sqrt(h @ h)
    lam = 12.39842 / energy
    theta_hand = np.arcsin(lam / (2 * d_hand))
    assert c.d_spacing(hkl) == pytest.approx(d_hand, rel=2e-4)  # Si: 5.43104 vs 5.431
    assert np.linalg.norm(c.g_crystal(hkl)) == pytest.approx(2 * np.pi / d_hand, rel=2e-4)
    assert c.bragg_angle(hkl, energy) == pytest.approx(theta_hand, rel=3e-4)
    # reference library: xrayutilities' Q vector and its coplanar-geometry angles
    mat = getattr(xu.materials, name)
    np.testing.assert_allclose(c.g_crystal(hkl), mat.Q(*hkl), rtol=1e-12, atol=1e-12)
    hx = xu.HXRD(mat.Q(1, 1, 0), mat.Q(0, 0, 1), en=energy * 1000.0)
    tth = hx.Q2Ang(mat.Q(*hkl))[3]
    assert np.degrees(2 * c.bragg_angle(hkl, energy)) == pytest.approx(tth, abs=1e-6)


@pytest.mark.parametrize("name,hkl", [("Pt", (1, 0, 0)), ("Pt", (1, 1, 0)), ("Au", (2, 1, 0)),
                                      ("Si", (2, 0, 0)), ("Si", (2, 2, 2)), ("Fe", (1, 0, 0)), ("Fe", (1, 1, 1))])
def test_forbidden_reflections_are_refused(name, hkl):
    # fcc: h, k, l unmixed; diamond: also h+k+l ≠ 4n+2 for all-even; bcc: h+k+l even
    # (International Tables for Crystallography Vol. A, reflection conditions of
    # Fm-3m, Fd-3m and Im-3m).
    c = Crystal(name)
    assert not c.is_allowed(hkl)
    with pytest.raises(ReflectionError, match="forbidden"):
        c.reflection(hkl)


def test_unreachable_reflection_is_refused():
    c = Crystal("Pt")
    # (4 4 4): 2d = 2·3.9242/√48 = 1.1328 Å < λ(5 keV) = 2.4797 Å
    with pytest.raises(ReflectionError, match="unreachable"):
        c.reflection((4, 4, 4), energy_kev=5.0)
    assert c.reflection((1, 1, 1), energy_kev=5.0).d_spacing == pytest.approx(3.9242 / np.sqrt(3))


def test_unknown_material_suggests_a_name():
    with pytest.raises(InputError, match="did you mean"):
        Crystal("Ptt")


def test_fcc_translations_and_slip_planes():
    c = Crystal("Pt")
    t = c.translations()
    lengths = np.array([np.linalg.norm(c.A @ v) for v in t])
    # fcc: 12 vectors ½⟨110⟩ of length a/√2, then 6 of ⟨100⟩ of length a (Hull & Bacon,
    # Introduction to Dislocations, 5th ed., 2011, ch. 5)
    assert np.sum(np.isclose(lengths, 3.9242 / np.sqrt(2))) == 12
    assert np.sum(np.isclose(lengths, 3.9242)) == 6
    assert len(c.slip_planes()) == 4


def test_explicit_lattice_centring_rules():
    c = Crystal.from_lattice(3.0, centring="I")
    assert c.is_allowed((1, 1, 0)) and not c.is_allowed((1, 0, 0))
    with pytest.raises(InputError):
        Crystal.from_lattice(-1.0)
