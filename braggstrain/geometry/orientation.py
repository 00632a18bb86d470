"""Orientation of the crystal: every way of getting U.

U takes crystal Cartesian coordinates (xrayutilities' frame: a along x, b in
the xy plane) to the sample frame, so G_sample = U·B·h (docs/design.md).
The ways to get it:

* a matrix given as it is (:func:`check_rotation`);
* two reflections and the sample-frame directions they point along
  (:func:`orientation_from_two_reflections`, Busing & Levy);
* two or more G directions, fitted (:func:`orientation_from_directions`,
  scipy's ``Rotation.align_vectors``), from reconstructions
  (:func:`orientation_from_reflections`) or from reflections found on the
  diffractometer (:func:`orientation_from_measured`);
* Bunge Euler angles from electron backscatter diffraction and the
  specimen's mounting (:func:`orientation_from_euler`,
  :func:`mounting_matrix`).
"""

from __future__ import annotations

import itertools
import math
from dataclasses import dataclass
from typing import Mapping

import numpy as np

from braggstrain.errors import ConfigError, InputError, ReflectionError
from braggstrain.geometry.crystal import format_hkl
from braggstrain.geometry.rotation import axis_vector, bunge_matrix

__all__ = [
    "check_rotation",
    "orientation_from_two_reflections",
    "orientation_from_directions",
    "orientation_from_reflections",
    "MeasuredReflection",
    "orientation_from_measured",
    "mounting_matrix",
    "orientation_from_euler",
]


def check_rotation(U, name="orientation"):
    """U as a float (3, 3) array after checking it is a proper rotation."""
    U = np.asarray(U, dtype=float)
    if U.shape != (3, 3) or not np.all(np.isfinite(U)):
        raise InputError(f"{name}: expected a 3×3 rotation matrix, got shape {U.shape}")
    if not np.allclose(U @ U.T, np.eye(3), atol=1e-6) or np.linalg.det(U) < 0:
        raise InputError(f"{name}: the matrix is not a proper rotation (UUᵀ ≠ I or det < 0)")
    return U


def orientation_from_two_reflections(g1_crystal, g2_crystal, d1_sample, d2_sample):
    """Rotation U with U·g1 ∥ d1 and U·g2 in the plane of (d1, d2).

    The usual two-reflection orientation (Busing & Levy, Acta Cryst. 22, 457,
    1967, eqs. 23-27): an orthonormal triad is built from each pair and U maps
    one onto the other; the first reflection is matched exactly.

    Parameters
    ----------
    g1_crystal, g2_crystal : 3 floats
        The two reflections' G in crystal Cartesian coordinates (any length).
    d1_sample, d2_sample : 3 floats
        Their measured directions in the sample frame (any length).
    """
    def triad(a, b):
        a = np.asarray(a, float)
        b = np.asarray(b, float)
        t1 = a / np.linalg.norm(a)
        t3 = np.cross(a, b)
        n3 = np.linalg.norm(t3)
        if n3 < 1e-9 * np.linalg.norm(a) * np.linalg.norm(b):
            raise InputError("orientation: the two reflections are parallel; pick two non-collinear ones")
        t3 = t3 / n3
        return np.column_stack([t1, np.cross(t3, t1), t3])

    Tc = triad(g1_crystal, g2_crystal)
    Ts = triad(d1_sample, d2_sample)
    return Ts @ Tc.T


def _angles_deg(a, b):
    """Angle (degrees) between matching rows of a and b."""
    return np.degrees(np.arctan2(np.linalg.norm(np.cross(a, b), axis=1), np.einsum("ij,ij->i", a, b)))


def orientation_from_directions(g_crystal, d_sample, weights=None):
    """Rotation U that best turns crystal-frame G vectors onto sample-frame directions.

    The weighted least-squares rotation (Wahba's problem, SIAM Review 7,
    409, 1965; the Kabsch solution, Acta Cryst. A32, 922, 1976) as scipy's
    ``Rotation.align_vectors`` solves it: U minimises
    Σ_j w_j |d_j − U·g_j|². The vectors enter with their lengths (normalise
    them first for a fit of directions only).

    Parameters
    ----------
    g_crystal : (J, 3) floats
        G of each reflection in crystal Cartesian coordinates.
    d_sample : (J, 3) floats
        The matching vectors in the sample frame.
    weights : (J,) floats, optional

    Returns
    -------
    U : (3, 3) ndarray
    residual_deg : (J,) ndarray
        Angle between U·g_j and d_j, degrees.

    Raises
    ------
    InputError
        When the vectors do not fix a rotation (fewer than two non-parallel).
    """
    from scipy.spatial.transform import Rotation

    P = np.asarray(g_crystal, float).reshape(-1, 3)
    D = np.asarray(d_sample, float).reshape(-1, 3)
    if P.shape != D.shape:
        raise InputError(f"d_sample: {len(D)} vectors for {len(P)} G vectors; expected one per reflection")
    if len(P) < 2 or np.linalg.matrix_rank(P, tol=1e-6 * np.abs(P).max()) < 2:
        raise InputError("orientation: expected at least two non-parallel reflections")
    rot, _ = Rotation.align_vectors(D, P, weights=weights)
    U = rot.as_matrix()
    return U, _angles_deg(P @ U.T, D)


def orientation_from_reflections(crystal, hkls, g_vectors, tolerance=0.03):
    """Rotation U (crystal Cartesian → sample) that best maps U·B·h_j onto G_j.

    The reconstructed G vectors of several reflections fitted by
    :func:`orientation_from_directions` (with their lengths, so longer G
    weigh more).

    Parameters
    ----------
    crystal : braggstrain.geometry.crystal.Crystal
    hkls : (J, 3) ints
    g_vectors : (J, 3) floats, Å⁻¹, sample frame
    tolerance : float
        Largest accepted relative mismatch |U·B·h_j − G_j| / |G_j|.

    Returns
    -------
    (3, 3) ndarray, or None when the reflections do not fix an orientation
    (fewer than two non-parallel ones).
    """
    H = np.asarray(hkls, float).reshape(-1, 3)
    G = np.asarray(g_vectors, float).reshape(-1, 3)
    P = H @ crystal.B.T  # B·h_j as rows, crystal Cartesian
    if np.linalg.matrix_rank(P, tol=1e-6 * np.abs(P).max()) < 2:
        return None
    U, _ = orientation_from_directions(P, G)
    mis = np.linalg.norm(P @ U.T - G, axis=1) / np.linalg.norm(G, axis=1)
    if np.any(mis > tolerance):
        j = int(np.argmax(mis))
        raise InputError(
            f"g_vectors: reflection {tuple(int(v) for v in H[j])} does not match the crystal "
            f"{crystal.name}: |U·B·h − G|/|G| = {mis[j]:.3f} (expected ≤ {tolerance}); check the "
            f"Miller indices, their order, and the lattice parameters")
    return U


@dataclass(frozen=True)
class MeasuredReflection:
    """A reflection found on the diffractometer.

    Attributes
    ----------
    hkl : Miller indices
    angles_deg : mapping circle name → degrees, every circle of the instrument
    pixel : (row, column) where the peak was centred (default: direct-beam pixel)
    """

    hkl: tuple
    angles_deg: Mapping
    pixel: tuple | None = None


def _measured_direction(instrument, m, key):
    """Unit sample-frame direction and |Q| of a measured reflection."""
    try:
        angles = {n: float(v) for n, v in dict(m.angles_deg).items()}
    except (TypeError, ValueError):
        raise ConfigError(f"{key}.angles: expected a table circle name → degrees") from None
    names = [c.name for c in instrument.circles]
    unknown = sorted(set(angles) - set(names))
    if unknown:
        raise ConfigError(f"{key}.angles: unknown circle(s) {unknown}; the instrument's circles are {names}")
    missing = [n for n in names if n not in angles]
    if missing:
        raise ConfigError(f"{key}.angles: missing circle(s) {missing}; expected an angle for every circle {names}")
    pix = instrument.detector.direct_beam if m.pixel is None else m.pixel
    q_lab = instrument.q_lab_of_pixel(float(pix[0]), float(pix[1]), angles)
    q = instrument.sample_rotation(angles).T @ q_lab
    return q / np.linalg.norm(q), float(np.linalg.norm(q))


def orientation_from_measured(crystal, instrument, measured, key="plan.orientation.measured"):
    """U from reflections found on the diffractometer.

    Each reflection's G direction in the sample frame is R_sᵀ·Q_lab of its
    peak pixel at its angles. With two reflections U is the usual
    two-reflection orientation (:func:`orientation_from_two_reflections`):
    the first reflection is matched exactly. With three or more, U is the
    rotation that best fits all directions in the least-squares sense
    (:func:`orientation_from_directions`).

    Returns
    -------
    U : (3, 3) ndarray
    residual_deg : (n,) ndarray, angle between U·B·h and each measured direction

    Raises
    ------
    ConfigError
        if fewer than two reflections are given, a reflection is forbidden,
        its measured |Q| differs from |G| by more than 2 % (wrong hkl, energy
        or angles), or two measured directions disagree with the lattice's
        interplanar angle by more than 2°.
    """
    measured = list(measured)
    if len(measured) < 2:
        raise ConfigError(f"{key}: expected at least two measured reflections, got {len(measured)}")
    dirs, gcs = [], []
    for i, m in enumerate(measured):
        k = f"{key}[{i}]"
        try:
            refl = crystal.reflection(m.hkl)
        except ReflectionError as e:
            raise ConfigError(f"{k}.hkl: {e}") from None
        d, qn = _measured_direction(instrument, m, k)
        gn = float(np.linalg.norm(refl.g_crystal))
        # 2 %: far beyond any strain of a crystal, far below the step between
        # neighbouring reflections (common practice, no source).
        if abs(qn / gn - 1) > 0.02:
            raise ConfigError(f"{k}: measured |Q| = {qn:.4f} Å⁻¹ differs from |G{format_hkl(refl.hkl)}| = "
                              f"{gn:.4f} Å⁻¹ by {100 * abs(qn / gn - 1):.1f} %; expected the same within 2 % "
                              f"(check hkl, energy and angles)")
        dirs.append(d)
        gcs.append(refl.g_crystal / gn)
    dirs, gcs = np.array(dirs), np.array(gcs)
    for i, j in itertools.combinations(range(len(dirs)), 2):
        a_meas = math.degrees(math.acos(np.clip(dirs[i] @ dirs[j], -1, 1)))
        a_lat = math.degrees(math.acos(np.clip(gcs[i] @ gcs[j], -1, 1)))
        if abs(a_meas - a_lat) > 2.0:
            raise ConfigError(f"{key}[{i}] and [{j}]: measured angle between the reflections {a_meas:.2f}° differs "
                              f"from the lattice's {a_lat:.2f}°; expected agreement within 2° "
                              f"(check hkl and angles)")
    if len(dirs) == 2:
        try:
            U = orientation_from_two_reflections(gcs[0], gcs[1], dirs[0], dirs[1])
        except InputError as e:
            raise ConfigError(f"{key}: {e}") from None
        return U, _angles_deg(gcs @ U.T, dirs)
    try:
        return orientation_from_directions(gcs, dirs)
    except InputError as e:
        raise ConfigError(f"{key}: {e}") from None


def mounting_matrix(spec, key="plan.orientation.mounting"):
    """Rotation M (specimen → sample frame) from the mounting in the pipeline file.

    Parameters
    ----------
    spec : None, three axis names, or a 3×3 matrix
        Three axis names such as ``["x+", "y+", "z+"]`` say along which
        sample-frame axes the specimen's RD, TD and ND (the axes of the Euler
        angles) point; a matrix gives RD, TD, ND as its columns. None is the
        identity.
    key : where the value came from, for error messages
    """
    if spec is None:
        return np.eye(3)
    if isinstance(spec, (list, tuple)) and len(spec) == 3 and all(isinstance(s, str) for s in spec):
        cols = []
        for i, s in enumerate(spec):
            try:
                cols.append(axis_vector(s))
            except InputError:
                raise ConfigError(f"{key}[{i}] = {s!r}: expected an axis name x+, x-, y+, y-, z+ or z-") from None
        M = np.column_stack(cols)
    else:
        try:
            M = np.asarray(spec, dtype=float)
        except (TypeError, ValueError):
            raise ConfigError(f"{key}: expected three axis names or a 3×3 matrix, got {spec!r}") from None
        if M.shape != (3, 3) or not np.all(np.isfinite(M)):
            raise ConfigError(f"{key}: expected three axis names or a 3×3 matrix, got shape {M.shape}")
    if not np.allclose(M.T @ M, np.eye(3), atol=1e-6) or np.linalg.det(M) < 0:
        raise ConfigError(f"{key}: the specimen axes RD, TD, ND must form a right-handed orthonormal triad "
                          f"(a proper rotation); got {np.round(M, 6).tolist()}")
    return M


def orientation_from_euler(euler_deg, mounting=None):
    """U (crystal Cartesian → sample frame) from Bunge Euler angles (degrees).

    U = M·gᵀ: gᵀ (:func:`braggstrain.geometry.rotation.bunge_matrix`) takes
    crystal coordinates to the specimen frame (RD, TD, ND) and M
    (:func:`mounting_matrix`) places the specimen frame in the sample frame.
    The crystal Cartesian frame is braggstrain's (a along x, b in the xy
    plane), which for cubic crystals is the usual EBSD crystal frame; for
    other lattices check your EBSD software's convention.
    """
    M = mounting if isinstance(mounting, np.ndarray) and mounting.shape == (3, 3) else mounting_matrix(mounting)
    return M @ bunge_matrix(euler_deg).T
