"""Several reflections of one crystal: the full strain tensor per voxel.

Conventions (docs/design.md): ρ_j(r) = s(r)·exp(−i G_j·u(r)) for reflection j,
so ∂_k φ_j = −Σ_i G_ji ∂u_i/∂x_k = −(G D)_jk with the displacement gradient
D_ik = ∂u_i/∂x_k; strain ε = (D + Dᵀ)/2 (tensile positive), rotation
ω = (D − Dᵀ)/2 given as its axial vector (radians). Arrays have axes 0, 1, 2
along sample-frame x, y, z with the origin at index n//2.

Per voxel the weighted least-squares problem Σ_j w_j |∂φ_j + G_j·D|² = min
is solved column by column of D (Newton et al., Nat. Mater. 9, 120, 2010;
Hofmann et al., Sci. Rep. 7, 45993, 2017 for the multi-reflection tensor);
the covariance of each column is σ²(GᵀWG)⁻¹ with σ² from the weighted
residual (the usual least-squares covariance, e.g. Press et al., Numerical
Recipes, 3rd ed., 2007, §15.4).

Registration (:mod:`braggstrain.strain.registration`) brings the reflections
onto one grid first; the mean lattice from the peak positions is in
:mod:`braggstrain.strain.lattice`.

Why one module of about 800 lines: the solve, its uncertainty (the
least-squares covariance, the pooled excess residual and the spread of
kept runs and Poisson replicas, all propagated through the same solve),
the displacement with its branch correction and the outlier check share
one weighted least-squares system per voxel.
"""

from __future__ import annotations

import itertools
import warnings
from dataclasses import dataclass, field

import numpy as np
from scipy import ndimage as ndi

from braggstrain.geometry.crystal import format_hkl
from braggstrain.errors import TensorError
from braggstrain import _validate as _v
from braggstrain.strain.fields import (GRADIENT_AMPLITUDE_THRESHOLD, default_support, phase_gradient,
                     reference_voxel, trusted_for_gradients, unwrapped_phase)
from braggstrain.strain.components import STRAIN_PAIRS, split_gradient
from braggstrain.strain.grid import Grid
from braggstrain.strain.spread import POOL_SIGMA, local_mean
from braggstrain.strain.objects import SampleObject

__all__ = [
    "ReflectionConsistencyWarning",
    "TensorField",
    "strain_tensor",
    "condition_number",
    "MAX_CONDITION",
    "hydrostatic_strain",
    "von_mises_strain",
    "principal_strains",
]


#: Largest condition number of a G set accepted for the tensor and the mean
#: lattice (the pipeline's ``[tensor] max_condition`` defaults to it; common
#: practice, no source: the relative error in D grows up to that factor).
MAX_CONDITION = 30.0


class ReflectionConsistencyWarning(UserWarning):
    """One reflection disagrees with the others, or a twin choice is unsure."""


# --------------------------------------------------------------------------
# derived maps
# --------------------------------------------------------------------------

def hydrostatic_strain(strain):
    """Hydrostatic strain tr(ε)/3 (dimensionless) of a (3, 3, ...) strain field."""
    e = np.asarray(strain)
    return (e[0, 0] + e[1, 1] + e[2, 2]) / 3.0


def von_mises_strain(strain):
    """Von Mises equivalent strain √(2/3 e:e), e = ε − tr(ε)/3·I.

    Equal to (√2/3)·[(ε₁−ε₂)² + (ε₂−ε₃)² + (ε₃−ε₁)²]^½ in principal strains
    (Dieter, Mechanical Metallurgy, 3rd ed., 1986, the effective strain of
    ch. 3; from memory), so a uniaxial isochoric strain (a, −a/2, −a/2)
    gives a.
    """
    e = np.asarray(strain, dtype=float)
    tr = hydrostatic_strain(e)
    dev = e.copy()
    for i in range(3):
        dev[i, i] = dev[i, i] - tr
    return np.sqrt(2.0 / 3.0 * np.sum(dev * dev, axis=(0, 1)))


def principal_strains(strain):
    """Principal strains (descending) and directions of a (3, 3, ...) field.

    Returns
    -------
    values : (3, ...) array
        ε₁ ≥ ε₂ ≥ ε₃; NaN where the strain is NaN.
    directions : (3, 3, ...) array
        directions[:, m] is the unit eigenvector of values[m] (sign arbitrary).
    """
    e = np.asarray(strain, dtype=float)
    grid = e.shape[2:]
    flat = np.moveaxis(e.reshape(3, 3, -1), -1, 0)
    ok = np.all(np.isfinite(flat), axis=(1, 2))
    vals = np.full((flat.shape[0], 3), np.nan)
    vecs = np.full((flat.shape[0], 3, 3), np.nan)
    if ok.any():
        w, v = np.linalg.eigh(flat[ok])
        vals[ok] = w[:, ::-1]
        vecs[ok] = v[:, :, ::-1]
    values = np.moveaxis(vals, 0, -1).reshape((3,) + grid)
    directions = np.moveaxis(vecs, 0, -1).reshape((3, 3) + grid)
    return values, directions


# --------------------------------------------------------------------------
# the tensor field
# --------------------------------------------------------------------------

@dataclass
class TensorField:
    """Displacement gradient, strain and rotation of one crystal, per voxel.

    Grid arrays are float32 with NaN outside ``support`` (and where the solve
    was impossible); axes along sample-frame x, y, z.

    Attributes
    ----------
    displacement_gradient : (3, 3, nx, ny, nz)
        D_ik = ∂u_i/∂x_k, dimensionless.
    strain : (3, 3, nx, ny, nz)
        ε = (D + Dᵀ)/2, tensile positive.
    rotation : (3, nx, ny, nz)
        Axial vector of (D − Dᵀ)/2, radians (ω_x = (D_zy − D_yz)/2, ...).
    residual : (nx, ny, nz)
        Weighted RMS misfit of the phase gradients,
        √(Σ_jk w_j r_jk² / (3 Σ_j w_j)) with r = ∂φ + G·D, rad/Å.
    residual_per_reflection : (J, nx, ny, nz)
        √(Σ_k r_jk²/3) for each reflection, rad/Å.
    strain_uncertainty : (3, 3, nx, ny, nz)
        One standard deviation of each strain component: the spread of the
        reconstructions (``gradient_covariance``) propagated through the
        solve, combined with the least-squares covariance σ²(GᵀWG)⁻¹ (see
        :func:`strain_tensor`, Notes); NaN where it cannot be estimated, and
        ``uncertainty_basis`` then says why.
    rotation_uncertainty : (3, nx, ny, nz)
        The same for the rotation vector, radians.
    uncertainty_basis : str
        In words: what the uncertainties include, or why they are missing.
    displacement : (3, nx, ny, nz) or None
        u in Å from the unwrapped phases, zero at ``reference``; NaN outside
        the support and where unwrapping failed: parts of the support not
        connected to the reference, and (with ≥ 4 reflections) voxels where
        the reflections' phases cannot be brought onto one displacement even
        after a 2π branch correction (see ``_branch_correction``). Around
        dislocations u is, like any Volterra field, defined modulo a lattice
        translation across a cut surface.
    support : bool (nx, ny, nz)
    trusted : bool (nx, ny, nz)
        Support eroded by one voxel, every amplitude above the threshold.
    condition_number : float
        2-norm condition number of the J×3 matrix of G vectors.
    g_vectors : (J, 3) float, Å⁻¹
    labels : list of str
    voxel_size : (3,) float, Å
    reference : tuple of 3 int
        Voxel at the centre of mass (u = 0 there).
    outlier : str or None
        Label of the reflection flagged as inconsistent, if any.
    outlier_scores : dict
        Leave-one-out consistency score per label (see :func:`strain_tensor`).
    """

    displacement_gradient: np.ndarray
    strain: np.ndarray
    rotation: np.ndarray
    residual: np.ndarray
    residual_per_reflection: np.ndarray
    strain_uncertainty: np.ndarray
    rotation_uncertainty: np.ndarray
    displacement: np.ndarray | None
    support: np.ndarray
    trusted: np.ndarray
    condition_number: float
    g_vectors: np.ndarray
    labels: list
    voxel_size: np.ndarray
    reference: tuple
    outlier: str | None = None
    outlier_scores: dict = field(default_factory=dict)
    uncertainty_basis: str = ""

    @property
    def hydrostatic(self):
        """tr(ε)/3, float32 grid."""
        return hydrostatic_strain(self.strain).astype(np.float32)

    @property
    def von_mises(self):
        """Von Mises equivalent strain, float32 grid (:func:`von_mises_strain`)."""
        return von_mises_strain(self.strain).astype(np.float32)

    @property
    def principal(self):
        """(values (3, *grid), directions (3, 3, *grid)), float32; see :func:`principal_strains`."""
        v, d = principal_strains(self.strain)
        return v.astype(np.float32), d.astype(np.float32)


def condition_number(g_vectors):
    """2-norm condition number σ_max/σ_min of the J×3 matrix of G vectors.

    It bounds how much relative error in the phase gradients can grow in D;
    infinite for fewer than three vectors and for coplanar sets (σ_min at
    most 10⁻¹² σ_max, i.e. zero up to round-off). The one definition for the
    tensor, the pipeline's up-front check and the measurement planner.
    """
    G = np.asarray(g_vectors, dtype=float)
    s = np.linalg.svd(G, compute_uv=False)
    if s.size < 3 or not s[-1] > 1e-12 * s[0]:
        return float("inf")
    return float(s[0] / s[-1])


def _check_inputs(objects, g_vectors, voxel_size, support, weights, labels):
    if isinstance(objects, np.ndarray) and objects.ndim == 4:
        objects = list(objects)
    if not isinstance(objects, (list, tuple)):
        raise TensorError(f"objects: expected a list of 3-D complex arrays (one per reflection), got {type(objects).__name__}")
    J = len(objects)
    arrays, sups, hkls = [], [], []
    for j, o in enumerate(objects):
        if isinstance(o, SampleObject):
            sups.append(o.support)
            hkls.append(o.hkl)
            o = o.obj
        else:
            sups.append(None)
            hkls.append(None)
        arrays.append(_v.complex3d(o, f"objects[{j}]"))
    if J:
        shape0 = arrays[0].shape
        for j, a in enumerate(arrays):
            if a.shape != shape0:
                raise TensorError(
                    f"objects[{j}]: grid shape {a.shape} differs from objects[0] {shape0}; expected all "
                    f"reflections on one common grid (use braggstrain.strain.tensor.register first)")
    G = np.asarray(g_vectors, dtype=float) if g_vectors is not None else None
    if G is None or G.ndim != 2 or G.shape[1] != 3 or not np.all(np.isfinite(G)):
        shape = None if G is None else G.shape
        raise TensorError(f"g_vectors: expected a (J, 3) array of finite G vectors in Å⁻¹, got shape {shape}")
    if G.shape[0] != J:
        raise TensorError(f"g_vectors: {G.shape[0]} G vectors for {J} objects; expected one G per object")
    if labels is None:
        labels = [(format_hkl(h) if h is not None else
                   f"reflection {j} (G = [{G[j, 0]:.4f}, {G[j, 1]:.4f}, {G[j, 2]:.4f}] Å⁻¹)")
                  for j, h in enumerate(hkls)]
    else:
        labels = [str(v) if not isinstance(v, (tuple, list)) else format_hkl(v) for v in labels]
        if len(labels) != J:
            raise TensorError(f"labels: {len(labels)} labels for {J} objects; expected one per object")
    if J < 3:
        raise TensorError(
            f"objects: {J} reflection(s) {', '.join(labels)}; the strain tensor needs at least three "
            f"non-coplanar reflections")
    vs = _v.voxel_size(voxel_size)
    for j, o in enumerate(objects):
        if isinstance(o, SampleObject) and not np.allclose(o.voxel_size, vs, rtol=1e-6):
            raise TensorError(
                f"objects[{j}] {labels[j]}: voxel size {tuple(o.voxel_size)} Å differs from voxel_size "
                f"{tuple(vs)} Å; expected one common grid (use register first)")
        if (isinstance(o, SampleObject) and isinstance(objects[0], SampleObject)
                and not np.allclose(o.origin, objects[0].origin, atol=1e-6 * float(vs.min()))):
            raise TensorError(
                f"objects[{j}] {labels[j]}: origin {tuple(o.origin)} Å differs from objects[0] "
                f"{tuple(objects[0].origin)} Å; expected one common grid (use register first)")
    shape = arrays[0].shape
    if support is None:
        if all(s is not None for s in sups):
            support = np.logical_and.reduce(sups)
        else:
            support = np.logical_and.reduce([default_support(a) for a in arrays])
    else:
        support = np.asarray(support)
        if support.shape != shape:
            raise TensorError(f"support: expected a boolean array of the grid shape {shape}, got shape {support.shape}")
        support = support.astype(bool)
    if not support.any():
        raise TensorError("support: no voxel lies inside the crystal in every reflection (empty common support)")
    if weights is not None:
        weights = np.asarray(weights, dtype=float)
        if weights.shape == (J,):
            weights = weights.reshape((J, 1, 1, 1)) * np.ones((1,) + shape)
        elif weights.shape != (J,) + shape:
            raise TensorError(f"weights: expected shape ({J},) or {(J,) + shape}, got {weights.shape}")
        if not np.all(np.isfinite(weights)) or np.any(weights < 0):
            raise TensorError("weights: expected finite non-negative weights")
    return arrays, G, vs, support, weights, labels


def _check_set(G, labels, max_condition):
    Gn = G / np.linalg.norm(G, axis=1, keepdims=True)
    s = np.linalg.svd(Gn, compute_uv=False)
    cond = condition_number(G)
    names = ", ".join(labels)
    if s[-1] < 1e-6 * s[0]:
        raise TensorError(
            f"reflections {names}: their G vectors are coplanar (condition number {cond:.3g}); "
            f"expected at least three non-coplanar reflections")
    if cond > max_condition:
        raise TensorError(
            f"reflections {names}: ill-conditioned set, condition number {cond:.3g} > {max_condition:g}; "
            f"expected reflections whose G vectors span 3-D space more evenly")
    return cond


def _solve(P, w, G):
    """Batched weighted least squares.

    P : (N, J, 3) phase gradients; w : (N, J) weights; G : (J, 3).
    Returns D (N, 3, 3), Minv (N, 3, 3), r (N, J, 3), local condition (N,).
    """
    M = np.einsum("nj,ja,jb->nab", w, G, G)
    R = -np.einsum("nj,ja,njk->nak", w, G, P)
    lam = np.linalg.eigvalsh(M)
    with np.errstate(divide="ignore", invalid="ignore"):
        cond = np.sqrt(lam[:, -1] / lam[:, 0])
    bad = ~(np.isfinite(cond) & (lam[:, 0] > 0))
    M[bad] = np.eye(3)
    Minv = np.linalg.inv(M)
    D = Minv @ R
    r = P + np.einsum("ja,nak->njk", G, D)
    cond[bad] = np.inf
    return D, Minv, r, cond


def strain_tensor(objects, g_vectors, voxel_size, support=None, weights=None, *, labels=None,
                  order=2, amplitude_threshold=GRADIENT_AMPLITUDE_THRESHOLD, max_condition=MAX_CONDITION,
                  gradient_noise=None, gradient_covariance=None,
                  covariance_source="the given phase-gradient covariance", resolution_blur=None,
                  displacement=True, uniform_gradient=None, phase_tolerance=np.pi / 4,
                  outlier_ratio=0.25, warn=True):
    """Strain tensor, rotation and residual per voxel from J ≥ 3 reflections.

    Parameters
    ----------
    objects : list of complex 3-D arrays (or SampleObject), or (J, nx, ny, nz) array
        ρ_j on one common grid, axes 0, 1, 2 along sample-frame x, y, z.
    g_vectors : (J, 3) array
        G_j in the sample frame, Å⁻¹ (2π included).
    voxel_size : float or 3 floats
        Voxel edges, Å.
    support : bool array, optional
        Crystal voxels. Default: the intersection of the objects' supports
        (SampleObject) or of amplitudes ≥ 0.2·max (plain arrays).
    weights : (J,) or (J, nx, ny, nz) array, optional
        Relative weights (inverse variances up to a common factor). Default:
        each reflection's amplitude divided by its median inside the support.
    labels : list, optional
        Names of the reflections for messages (default: their hkl, or G).
    order : {2, 4}
        Finite-difference order of the wrap-free phase gradients.
    amplitude_threshold : float
        Trusted voxels need |ρ_j| ≥ this fraction of the median, for all j.
    max_condition : float
        Refuse sets whose condition number exceeds this (common practice,
        no source: the error in D grows up to that factor).
    gradient_noise : float, optional
        Standard deviation of one phase-gradient component at unit weight,
        rad/Å. Given, it sets σ of the covariance; otherwise σ comes from the
        residual (needs J ≥ 4).
    gradient_covariance : (J, 3, 3, nx, ny, nz) array, optional
        Covariance of each reflection's phase gradient per voxel, (rad/Å)²,
        from the spread of its reconstructions
        (:func:`~braggstrain.strain.fields.phase_gradient_covariance`);
        reflections are taken as independent. Propagated through the solve
        (with three reflections: through G⁻¹) and combined with the
        least-squares covariance, see Notes.
    covariance_source : str
        What ``gradient_covariance`` holds, in words, for
        ``TensorField.uncertainty_basis``.
    resolution_blur : float, optional
        Gaussian σ, in voxels, of the blur through which the maps see the
        true field (the reconstruction's point spread and the two-voxel
        differences). Given (> 0), the first-order bias of that blur,
        |f − S f| with S the Gaussian mean over the support, is added in
        quadrature to every σ (see Notes). None or 0: not added.
    displacement : bool
        Compute the displacement map from unwrapped phases (costs one 3-D
        unwrapping per reflection).
    phase_tolerance : float
        Largest misfit (rad) of an unwrapped phase to the fitted
        displacement that is accepted (J ≥ 4). A 2π slip of one reflection
        leaves a misfit of 2π(1 − h_jj), h_jj its leverage, e.g. π/2 for four
        {111}; π/4 catches slips up to h_jj = 7/8 (common practice, no
        source).
    uniform_gradient : (3, 3) array, optional
        D₀ added to every voxel (and D₀·(r − r_ref) to the displacement),
        e.g. from :func:`mean_lattice_strain` when the reconstructions were
        centred on the measured peaks and strain relative to the reference
        lattice is wanted (first order in D₀).
    outlier_ratio : float
        A reflection is named inconsistent when leaving it out makes the
        leave-one-out score at most this fraction of the next best
        (common practice, no source).
    warn : bool
        Issue :class:`ReflectionConsistencyWarning` for an inconsistent
        reflection.

    Returns
    -------
    TensorField

    Raises
    ------
    TensorError
        Fewer than three reflections, coplanar or ill-conditioned G set,
        objects on different grids, G of the wrong shape.

    Notes
    -----
    Uncertainty. Per voxel D = −A P with A = (GᵀWG)⁻¹GᵀW (A = G⁻¹ for three
    reflections), P the J×3 phase gradients. Two estimates of the variance of
    each strain and rotation component are made:

    * propagated spread: with C_j the 3×3 gradient covariance of reflection j,
      Cov(D_ab, D_cd) = Σ_j A_aj A_cj (C_j)_bd (linear propagation, JCGM
      100:2008, eq. 13), then ε_ik = (D_ik + D_ki)/2, ω = axial((D − Dᵀ)/2);
    * least squares (J ≥ 4, or ``gradient_noise``): Cov(D[:, k]) = σ²M⁻¹,
      M = GᵀWG, σ² from the residual.

    With a spread and J ≥ 4, each column k of D (the gradient along axis k,
    a regression of its own with one variance per response: Johnson &
    Wichern, Applied Multivariate Statistical Analysis, 6th ed., 2007, §7.7,
    from memory) has its residual sum of squares Q_k = Σ_j w_j r_jk²
    compared with what the spread alone predicts,
    E[Q_k] = Σ_j w_j Σ_l (I − H)²_jl (C_l)_kk with H = G A; only the excess
    τ_k² = max(0, ⟨Q_k⟩ − ⟨E[Q_k]⟩) / (J − 3), both pooled over the voxels
    around (Gaussian weights, σ = ``POOL_SIGMA`` voxels), is added as an
    extra variance Var(D_ik) += τ_k² (M⁻¹)_ii of the least-squares kind: the method-of-moments
    estimate of an extra variance component (DerSimonian & Laird, Control.
    Clin. Trials 7, 177, 1986, there between studies, here between
    reflections). So noise seen by both is not counted twice, and a misfit
    between reflections that the spread does not show still counts. A
    given ``gradient_noise`` is added to the spread as independent noise.
    Without a spread the least-squares variance alone is used (J ≥ 4), or
    the uncertainty is NaN (J = 3) and ``uncertainty_basis`` says why.

    Blur (``resolution_blur``): a map seen through a blur S has the bias
    (S − 1)f ≈ −(1 − S)f to first order in the blur's width, estimated from
    the map itself as b = f − S f and added as σ² + max(0, b² − κσ²) (an
    uncorrected systematic effect added in quadrature, JCGM 100:2008,
    F.2.4.5, from memory); κσ² = ‖δ − S‖²σ² is what the noise of the map
    alone puts into b² (κ ≈ 0.76 for 0.75 voxel), removed so that noise is
    not counted twice. It matters where strain varies over a few voxels (a substrate
    interface, near a dislocation core).

    Outlier test (J ≥ 4, common practice, no source): the fit is repeated
    leaving out each reflection in turn, over the trusted voxels, and scored
    by the residual of the remaining reflections (divided by the mean |G|,
    so strain-equivalent) together with the deviation of their strain from
    its median over the crystal, both averaged with weights equal to the
    full residual² (so the inconsistent voxels count). Leaving out the
    corrupted reflection leaves consistent data and no spurious strain.
    Consistency alone cannot say which reflection is wrong when there is
    only one redundant reflection; the strain term assumes the true strain
    varies less than the error does. A reflection that alone lifts the set
    out of a plane (all others coplanar) cannot be checked at all: its
    errors go into D without residual.
    """
    arrays, G, vs, support, weights, labels = _check_inputs(objects, g_vectors, voxel_size, support,
                                                           weights, labels)
    J = len(arrays)
    shape = arrays[0].shape
    cond = _check_set(G, labels, max_condition)

    amps = np.stack([np.abs(a) for a in arrays]).astype(np.float32)
    if weights is None:
        meds = np.array([np.median(amps[j][support]) for j in range(J)])
        if np.any(meds <= 0):
            bad = [labels[j] for j in range(J) if meds[j] <= 0]
            raise TensorError(f"objects: reflection(s) {', '.join(bad)} have zero median amplitude inside the support")
        weights = amps / meds.reshape(J, 1, 1, 1)
    trusted = np.logical_and.reduce([trusted_for_gradients(a, support, amplitude_threshold) for a in arrays])

    grads = np.stack([phase_gradient(a, vs, support, order=order) for a in arrays])  # (J,3,...)
    idx = np.flatnonzero(support)
    P = np.moveaxis(grads.reshape(J, 3, -1)[:, :, idx], 2, 0).astype(float)  # (N,J,3)
    w = weights.reshape(J, -1)[:, idx].T.copy()  # (N,J)
    finite = np.all(np.isfinite(P), axis=2)
    w[~finite] = 0.0
    P[~finite] = 0.0
    D, Minv, r, lcond = _solve(P, w, G)
    nvalid = np.sum(w > 0, axis=1)
    ok = (nvalid >= 3) & (lcond <= max_condition * 10)
    D[~ok] = np.nan
    r[~ok] = np.nan
    if uniform_gradient is not None:
        D0 = np.asarray(uniform_gradient, float)
        if D0.shape != (3, 3) or not np.all(np.isfinite(D0)):
            raise TensorError(f"uniform_gradient: expected a finite 3×3 displacement gradient, got shape {D0.shape}")
        D = D + D0

    wsum = np.sum(w, axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        ss = np.sum(w[:, :, None] * r * r, axis=(1, 2))
        res = np.sqrt(ss / (3 * wsum))
        res_j = np.sqrt(np.sum(r * r, axis=2) / 3)  # (N,J)
        if gradient_noise is not None:
            if not np.isfinite(gradient_noise) or gradient_noise <= 0:
                raise TensorError(f"gradient_noise: expected a positive noise level in rad/Å, got {gradient_noise!r}")
            sigma2 = np.full(len(idx), float(gradient_noise) ** 2)
        else:
            dof = 3 * (nvalid - 3)
            sigma2 = np.where(dof > 0, ss / np.maximum(dof, 1), np.nan)
    var_d = sigma2[:, None] * np.diagonal(Minv, axis1=1, axis2=2)  # Var(D_ik) = σ² Minv_ii for every k
    var_d[~ok] = np.nan
    # least-squares variances of ε (xx yy zz yz xz xy order as STRAIN_PAIRS) and ω
    var_ls_e = {(i, k): (var_d[:, i] if i == k else 0.25 * (var_d[:, i] + var_d[:, k])) for i, k in STRAIN_PAIRS}
    var_ls_w = [0.25 * (var_d[:, q] + var_d[:, p]) for p, q in _ROT]
    have_ls = gradient_noise is not None or J >= 4
    spread = gradient_covariance is not None
    if spread:
        C = np.asarray(gradient_covariance, dtype=float)
        if C.shape != (J, 3, 3) + shape:
            raise TensorError(f"gradient_covariance: expected shape {(J, 3, 3) + shape} (one 3×3 covariance "
                              f"per reflection and voxel), got {C.shape}")
        Cs = C.reshape(J, 3, 3, -1)[..., idx]  # (J,3,3,N)
        A = np.einsum("nab,nj,jb->naj", Minv, w, G)  # D = −A P
        A[~ok] = np.nan

        def cov_d(a, b, c, d):
            return np.einsum("nj,nj,jn->n", A[:, a, :], A[:, c, :], Cs[:, b, d, :])

        var_sp_e = {(i, k): 0.25 * (cov_d(i, k, i, k) + cov_d(k, i, k, i) + 2 * cov_d(i, k, k, i))
                    for i, k in STRAIN_PAIRS}
        var_sp_w = [0.25 * (cov_d(p, q, p, q) + cov_d(q, p, q, p) - 2 * cov_d(p, q, q, p)) for p, q in _ROT]
        if J >= 4 and gradient_noise is None:
            # the residual beyond what the spread explains, as an extra variance τ²/w_j
            # per column k of D (the gradient along axis k), a regression of its own with J − 3
            # degrees of freedom: Q_k = Σ_j w_j r_jk² against E[Q_k] = Σ_j w_j Σ_l (I − H)²_jl (C_l)_kk
            IH = np.eye(J)[None] - np.einsum("ja,nak->njk", G, A)  # r = (I − H) e, column by column
            diag_c = np.stack([Cs[:, k, k, :] for k in range(3)], axis=-1)  # (J, N, 3)
            expected = np.einsum("nj,njl,lnk->nk", w, IH ** 2, diag_c)
            ss_k = np.sum(w[:, :, None] * r * r, axis=1)  # (N, 3)
            tau2 = np.empty((len(idx), 3))
            for k in range(3):
                usable = ok & np.isfinite(ss_k[:, k]) & np.isfinite(expected[:, k])
                tau2[:, k] = np.clip(_pooled(ss_k[:, k], usable, idx, shape)
                                     - _pooled(expected[:, k], usable, idx, shape), 0, None) / (J - 3)
            # Var(D_ik) = τ_k² (M⁻¹)_ii: (N, i, k)
            var_x = np.diagonal(Minv, axis1=1, axis2=2)[:, :, None] * tau2[:, None, :]
            var_x[~ok] = np.nan
        elif gradient_noise is not None:
            var_x = np.repeat(var_d[:, :, None], 3, axis=2)  # a stated noise level, independent of the spread
        else:
            var_x = np.zeros((len(idx), 3, 3))
        var_e = {(i, k): var_sp_e[i, k] + (var_x[:, i, i] if i == k else 0.25 * (var_x[:, i, k] + var_x[:, k, i]))
                 for i, k in STRAIN_PAIRS}
        var_w = [v + 0.25 * (var_x[:, p, q] + var_x[:, q, p]) for v, (p, q) in zip(var_sp_w, _ROT)]
    else:
        var_e, var_w = var_ls_e, var_ls_w
    if resolution_blur is not None:
        if isinstance(resolution_blur, bool) or not np.isfinite(resolution_blur) or resolution_blur < 0:
            raise TensorError(f"resolution_blur: expected a Gaussian σ ≥ 0 in voxels, got {resolution_blur!r}")
        resolution_blur = float(resolution_blur) or None
    if resolution_blur is not None:
        Dfull = np.full((3, 3, int(np.prod(shape))), np.nan)
        Dfull[:, :, idx] = np.moveaxis(D, 0, -1)
        Dfull = Dfull.reshape((3, 3) + shape)
        eps_g = 0.5 * (Dfull + np.swapaxes(Dfull, 0, 1))
        rot_g = split_gradient(Dfull)[1]
        kappa = _noise_through_blur_bias(resolution_blur)

        def with_bias(var, f):
            b2 = _blur_bias(f, support, resolution_blur)[idx] ** 2
            return var + np.clip(b2 - kappa * var, 0, None)

        for i, k in STRAIN_PAIRS:
            var_e[i, k] = with_bias(var_e[i, k], eps_g[i, k])
        var_w = [with_bias(v, rot_g[c]) for c, v in enumerate(var_w)]
    basis = _uncertainty_basis(J, spread, covariance_source, gradient_noise, resolution_blur)

    def to_grid(flat, lead):
        out = np.full(lead + (int(np.prod(shape)),), np.nan, dtype=np.float32)
        out[..., idx] = flat
        return out.reshape(lead + shape)

    Dg = to_grid(np.moveaxis(D, 0, -1), (3, 3))
    strain, rotation = split_gradient(Dg)
    rotation = rotation.astype(np.float32)
    su = np.empty((3, 3, len(idx)))
    with np.errstate(invalid="ignore"):
        for i, k in STRAIN_PAIRS:
            su[i, k] = su[k, i] = np.sqrt(np.clip(var_e[i, k], 0, None))
        ru = np.sqrt(np.clip(np.stack(var_w), 0, None))
    residual = to_grid(res, ())
    residual_j = to_grid(res_j.T, (J,))
    okg = to_grid(ok.astype(np.float32), ()) == 1
    trusted &= okg

    ref = reference_voxel(np.sum(amps, axis=0).astype(np.complex64), support)
    disp = None
    if displacement:
        disp = _displacement(arrays, G, vs, support, weights, ref, D0=uniform_gradient, tol=phase_tolerance)

    tf = TensorField(
        displacement_gradient=Dg.astype(np.float32),
        strain=strain.astype(np.float32),
        rotation=rotation,
        residual=residual,
        residual_per_reflection=residual_j,
        strain_uncertainty=to_grid(su, (3, 3)),
        rotation_uncertainty=to_grid(ru, (3,)),
        displacement=disp,
        support=support,
        trusted=trusted,
        condition_number=cond,
        g_vectors=G.copy(),
        labels=list(labels),
        voxel_size=vs,
        reference=ref,
        uncertainty_basis=basis,
    )
    if J >= 4:
        _outlier_check(tf, P, w, G, idx, trusted, max_condition, outlier_ratio, warn)
    return tf


#: version of the error-bar model; part of the tensor stage's checkpoint key, so that a resumed run
#: recomputes σ when the model changes (4: misfit variance per gradient direction; replicas about their
#: mean; the reconstruction's offset from the replicas' baseline beyond the runs' spread; 5: that offset
#: beyond the runs' and the replicas' spreads; 6: replicas drawn from the object's model intensity, and
#: trusted voxels whose central differences read only bright voxels; docs/strain.md). Also part of the
#: spread stage's key, so that the replicas are drawn again when the model changes.
UNCERTAINTY_MODEL = 6

# the (p, q) of each rotation ω = (D_pq − D_qp)/2 (strain components: STRAIN_PAIRS)
_ROT = ((2, 1), (0, 2), (1, 0))


def _pooled(values, usable, idx, shape, sigma=POOL_SIGMA):
    """:func:`~braggstrain.strain.spread.local_mean` of per-voxel ``values`` (at the flat indices ``idx``)."""
    full = np.full(int(np.prod(shape)), np.nan)
    m = np.zeros(int(np.prod(shape)), bool)
    full[idx] = values
    m[idx] = usable
    return local_mean(full.reshape(shape), m.reshape(shape), sigma).reshape(-1)[idx]


def _blur_bias(field_, support, sigma):
    """f − S_σ f, S_σ the Gaussian mean over the finite support voxels: the
    first-order bias of a map seen through a blur of σ voxels."""
    ok = support & np.isfinite(field_)
    f0 = np.where(ok, field_, 0.0)
    w = ndi.gaussian_filter(ok.astype(float), sigma, mode="constant")
    with np.errstate(invalid="ignore", divide="ignore"):
        b = field_ - ndi.gaussian_filter(f0, sigma, mode="constant") / w
    return np.where(ok, b, np.nan).reshape(-1)


def _noise_through_blur_bias(sigma):
    """κ = ‖δ − s‖²: the share of white noise's variance that f − S_σ f keeps."""
    n = int(2 * np.ceil(4 * sigma) + 9)
    delta = np.zeros((n, n, n))
    delta[n // 2, n // 2, n // 2] = 1.0
    return float(np.sum((delta - ndi.gaussian_filter(delta, sigma, mode="constant")) ** 2))


def _uncertainty_basis(J, spread, source, gradient_noise, resolution_blur=None):
    """What the uncertainties of :func:`strain_tensor` include, in words."""
    text = _basis_core(J, spread, source, gradient_noise)
    if resolution_blur is not None and not text.startswith("σ not"):
        text += (f"; plus the first-order bias of a {resolution_blur:g}-voxel blur (resolution and finite "
                 f"differences), |ε − blurred ε| less its expected noise, added in quadrature")
    return text


def _basis_core(J, spread, source, gradient_noise):
    ls = (f"the least-squares covariance with σ from the residual of {J} reflections ({J - 3} redundant)"
          if gradient_noise is None else
          f"the least-squares covariance with the given gradient noise {gradient_noise:.3g} rad/Å")
    how = "through G⁻¹ (three reflections, exactly determined)" if J == 3 else "through the least-squares solve"
    if spread and gradient_noise is not None:
        return f"σ includes {source}, propagated {how}, and, added to it, {ls}"
    if spread and J >= 4:
        return (f"σ includes {source}, propagated {how}, plus the misfit between the {J} reflections that "
                f"this spread does not explain (residual sum of squares beyond its expectation, pooled over "
                f"{POOL_SIGMA:g} voxels)")
    if spread:
        return f"σ includes {source}, propagated {how}"
    if J >= 4 or gradient_noise is not None:
        return (f"σ includes only {ls}; the spread of the reconstructions is not included, so σ is "
                f"likely too small")
    return ("σ not estimated: three reflections leave no residual, and no spread of reconstructions was "
            "given (it needs at least two kept random starts or Poisson replicas)")


def _displacement(arrays, G, vs, support, weights, ref, D0=None, tol=np.pi / 4):
    """Displacement u (3, *grid) Å by least squares from unwrapped phases."""
    J = len(arrays)
    phases = np.stack([unwrapped_phase(a, support, ref)[0] for a in arrays])  # (J, ...)
    idx = np.flatnonzero(support)
    ph = phases.reshape(J, -1)[:, idx].T  # (N,J)
    w = weights.reshape(J, -1)[:, idx].T.copy()
    good = np.all(np.isfinite(ph), axis=1)
    ph = np.where(np.isfinite(ph), ph, 0.0)
    M = np.einsum("nj,ja,jb->nab", w, G, G)
    rhs = -np.einsum("nj,ja,nj->na", w, G, ph)
    lam = np.linalg.eigvalsh(M)
    sing = ~(lam[:, 0] > 1e-12 * np.maximum(lam[:, -1], 1e-300))
    M[sing] = np.eye(3)
    u = np.linalg.solve(M, rhs[..., None])[..., 0]
    good &= ~sing
    if J >= 4:
        mis = ph + u @ G.T
        bad = good & ~np.all(np.abs(mis) < tol, axis=1)
        if bad.any():
            ub, okb = _branch_correction(ph[bad], w[bad], G, np.linalg.inv(M[bad]), tol)
            u[bad] = ub
            good[bad] = okb
    u[~good] = np.nan
    if D0 is not None:  # D₀·(r − r_ref), positions from the grid
        grid = Grid(support.shape, vs)
        pos = grid.position(np.stack(np.unravel_index(idx, support.shape), axis=1)) - grid.position(np.array(ref))
        u = u + pos @ np.asarray(D0, float).T
    out = np.full((3, support.size), np.nan, dtype=np.float32)
    out[:, idx] = u.T
    return out.reshape((3,) + support.shape)


def _branch_correction(ph, w, G, Minv, tol, max_reflections=8):
    """Re-solve voxels whose unwrapped phases disagree, allowing 2π·k_j.

    Each reflection's unwrapping puts its cuts (around dislocations) in its
    own places, so in between the phases of different reflections can be
    on different branches. For every such voxel the integer vector k with
    k_j ∈ {−1, 0, 1} is sought that makes φ_j + 2π k_j consistent with one
    displacement (every misfit below ``tol``), preferring the smallest Σ|k_j|
    and then the smallest weighted misfit. The displacement is then right
    modulo a lattice translation (G_j reciprocal lattice vectors), like the
    Volterra cut itself.
    """
    J = len(G)
    if J > max_reflections:  # 3^J branch combinations: too many to try
        return np.full((len(ph), 3), np.nan), np.zeros(len(ph), bool)
    K = np.array(list(itertools.product((-1, 0, 1), repeat=J)), float)  # (C, J)
    block = max(16, int(2_000_000 // (len(K) * J)))  # bounds memory to ~100 MB
    nk = np.sum(np.abs(K), axis=1)
    u_out = np.full((len(ph), 3), np.nan)
    ok_out = np.zeros(len(ph), bool)
    for s in range(0, len(ph), block):
        sl = slice(s, s + block)
        p = ph[sl][:, None, :] + 2 * np.pi * K[None]  # (n, C, J)
        wb = w[sl]
        rhs = -np.einsum("nj,ja,ncj->nca", wb, G, p)
        u = np.einsum("nab,ncb->nca", Minv[sl], rhs)
        r = p + u @ G.T
        cost = np.sum(wb[:, None, :] * r * r, axis=2) / np.maximum(np.sum(wb, axis=1), 1e-300)[:, None]
        valid = np.all(np.abs(r) < tol, axis=2)
        key = np.where(valid, nk[None] + 0.5 * np.tanh(cost), np.inf)
        best = np.argmin(key, axis=1)
        rows = np.arange(len(best))
        u_out[sl] = u[rows, best]
        ok_out[sl] = np.isfinite(key[rows, best])
    return u_out, ok_out


def _outlier_check(tf, P, w, G, idx, trusted, max_condition, ratio, warn):
    J = len(G)
    tmask = trusted.reshape(-1)[idx]
    if tmask.sum() < 10:
        return
    Pt, wt = P[tmask], w[tmask]
    full_res = tf.residual.reshape(-1)[idx][tmask].astype(float)
    gscale = float(np.mean(np.linalg.norm(G, axis=1)))
    if not np.all(np.isfinite(full_res)) or np.sqrt(np.mean(full_res**2)) / gscale < 1e-7:
        return  # exact data: nothing to single out
    q = full_res**2
    scores = {}
    for j in range(J):
        keep = [i for i in range(J) if i != j]
        if condition_number(G[keep]) > max_condition:
            scores[tf.labels[j]] = np.inf
            continue
        wj = wt.copy()
        wj[:, j] = 0.0
        D, _, r, _ = _solve(Pt, wj, G)
        with np.errstate(invalid="ignore", divide="ignore"):
            rest = np.sum(wj[:, :, None] * r * r, axis=(1, 2)) / (3 * np.sum(wj, axis=1))
        e = 0.5 * (D + np.swapaxes(D, 1, 2))
        dev = e - np.median(e, axis=0)
        per_voxel = rest / gscale**2 + np.sum(dev * dev, axis=(1, 2))
        scores[tf.labels[j]] = float(np.sqrt(np.sum(q * per_voxel) / np.sum(q)))
    tf.outlier_scores = scores
    order = sorted(scores, key=scores.get)
    best, second = order[0], order[1]
    if np.isfinite(scores[second]) and scores[best] <= ratio * scores[second]:
        tf.outlier = best
        if warn:
            rms = [np.sqrt(np.nanmean(tf.residual_per_reflection[i][trusted] ** 2)) for i in range(J)]
            warnings.warn(
                f"the reflections disagree (residual RMS {np.sqrt(np.mean(q)):.3g} rad/Å over the trusted "
                f"voxels; per reflection " + ", ".join(f"{tf.labels[i]} {rms[i]:.3g}" for i in range(J))
                + f"); reflection {best} is the likely culprit: leaving it out lowers the inconsistency "
                f"score (strain-equivalent) from {scores[second]:.3g} to {scores[best]:.3g}. "
                f"Check its reconstruction and its hkl.",
                ReflectionConsistencyWarning, stacklevel=3)
