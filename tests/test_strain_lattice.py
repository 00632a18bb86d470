"""Checks of braggstrain.strain.lattice: the mean lattice from measured G vectors."""

import numpy as np
import pytest

from braggstrain.strain.lattice import mean_lattice_strain

from conftest import gs as _gs


def test_mean_lattice_exact_numbers(pt):
    # Reciprocal lattice b_i·a_j = 2π δ_ij (Ashcroft & Mermin, Solid State
    # Physics, 1976, ch. 5): deforming the lattice by F = I + D₀ maps every G
    # to F⁻ᵀG. Exact synthetic numbers in, D₀ out.
    hkls = [(1, 1, 1), (-1, 1, 1), (2, 0, 0), (0, 2, -2)]
    Gr = _gs(pt, hkls)
    D0 = np.array([[1.2e-3, 3e-4, -2e-4], [-1e-4, -4e-4, 5e-4], [2e-4, 1e-4, 7e-4]])
    Gm = Gr @ np.linalg.inv(np.eye(3) + D0)  # rows: (F⁻ᵀ G)ᵀ = Gᵀ F⁻¹
    ml = mean_lattice_strain(Gm, Gr, lattice_parameter=pt.lattice_parameters[0])
    np.testing.assert_allclose(ml.displacement_gradient, D0, atol=1e-14)
    np.testing.assert_allclose(ml.strain, 0.5 * (D0 + D0.T), atol=1e-14)
    assert ml.residual < 1e-13
    a = pt.lattice_parameters[0]
    assert ml.lattice_parameter == pytest.approx(a * np.linalg.det(np.eye(3) + D0) ** (1 / 3), rel=1e-14)
    # first order: G_meas ≈ (I − D₀ᵀ) G_ref, error O(|D₀|²)
    first = Gr @ (np.eye(3) - D0)
    assert np.abs(first - Gm).max() < 10 * np.abs(D0).max() ** 2 * np.abs(Gr).max()


def test_mean_lattice_isotropic_expansion_sign(pt):
    # Bragg's law: a lattice expanded by ε has d' = d(1 + ε), so |G| falls
    # by 1/(1 + ε); that must come out as tensile strain +ε and a = a₀(1 + ε).
    a0 = pt.lattice_parameters[0]
    Gr = _gs(pt, [(1, 1, 1), (-1, 1, 1), (0, 0, 2)])
    eps = 1e-3
    ml = mean_lattice_strain(Gr / (1 + eps), Gr, lattice_parameter=a0)
    np.testing.assert_allclose(ml.strain, eps * np.eye(3), atol=1e-15)
    assert ml.lattice_parameter == pytest.approx(a0 * (1 + eps), rel=1e-14)
    np.testing.assert_allclose(ml.lattice_parameter_per_reflection, a0 * (1 + eps), rtol=1e-14)
