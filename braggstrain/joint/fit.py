"""The joint fit: one amplitude s ≥ 0 and one displacement u for all
reflections, by the Poisson likelihood of every measured count.

Model (docs/joint.md). On one sample-frame grid, inside a fixed support,

    ρ_j(r) = s(r) · exp(−i G_j·u(r)),      I_j(p) = k_j |A_j(q_p)|² + b_j,

A_j the far field of ρ_j at the exact q of each measured voxel
(:class:`~braggstrain.joint.model.FarField`), k_j a scale per reflection
(exposure, structure factor; fitted as log k_j), b_j the flat background
(0 for prepared counts, whose background is removed). The fit minimises

    L = Σ_j Σ_p [ I_j(p) − n_jp ln I_j(p) ]

(the Poisson negative log-likelihood without its constant Σ ln n!,
Thibault & Guizar-Sicairos, New J. Phys. 14, 063004 (2012), recalled from
memory) over s (bounded below by 0), u (three components per voxel) and
the k_j, with scipy's L-BFGS-B and analytic gradients: with
g_p = 2 k_j (1 − n_p / I_j(p)) A_j(q_p) and Γ_j = F_jᴴ g (the adjoint
transform),

    ∂L/∂s = Re(Γ_j* e^{−iφ_j}),   ∂L/∂φ_j = Im(ρ_j Γ_j*),   ∂L/∂u = Σ_j G_j ∂L/∂φ_j,

φ_j = G_j·u. One evaluation costs one forward and one adjoint non-uniform
FFT per reflection.

Parameterisation and the branch cut. u is one single-valued field per
voxel, started from the tensor stage's displacement (unwrapped phases, its
cut surfaces where that stage put them). Across a cut u jumps by a lattice
vector b, and exp(−i G_j·u) does not see the jump because G_j·b is a
multiple of 2π; the fit moves u voxel by voxel and never unwraps again, so
the cut stays where it started. Strain is taken from the fitted objects ρ_j
by the tensor stage's wrap-free phase gradients, so the cut never enters
it. A per-reflection phase offset c_j (ρ_j · e^{i c_j}) does not change any
intensity (nor does a uniform translation of u): it is not fitted but set so
that each ρ_j matches the independent reconstruction's phase on average,
which keeps the two routes' maps comparable.

Held-out voxels. A fraction of each reflection's voxels (``held_out``,
chosen at random with ``seed``) is left out of L; their likelihood, the
free log-likelihood, is followed at every iteration and the iterate where
it is lowest is returned (early stopping chosen by held-out data, not by
hand).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from braggstrain.errors import InputError
from braggstrain.joint.model import (DEFAULT_EPS, FarField, MeasuredVoxels, fine_grid, interpolation_matrix,
                                     subdivision)
from braggstrain.strain.grid import Grid

__all__ = ["JointError", "JointResult", "joint_refine", "upsample_displacement", "MODEL_FLOOR",
           "DEFAULT_ITERATIONS", "DEFAULT_HELD_OUT", "HELD_OUT_BY", "FIT_VERSION"]

#: Version of the fit (its start, parameters and objective) in the joint stage's checkpoint key, so that a
#: resumed run does not reuse a joint result of an older fit (2: the wrap-safe fine-grid start and u as a
#: correction in radians; docs/joint.md)
FIT_VERSION = 2

MODEL_FLOOR = 1e-3
"""Counts added to every model intensity so that ln I stays finite where the
model vanishes (common practice, no source)."""

DEFAULT_ITERATIONS = 150
DEFAULT_HELD_OUT = 0.05
HELD_OUT_BY = ("voxels", "frames")


class JointError(InputError):
    """The joint stage cannot run on these reflections (too few, or failed)."""


@dataclass
class JointResult:
    """The joint fit of all reflections.

    Attributes
    ----------
    amplitude : float32 (nx, ny, nz)
        s, 0 outside ``support``.
    displacement : float32 (3, nx, ny, nz)
        u, Å, NaN outside ``support`` (defined modulo a lattice vector across
        the starting field's cut surfaces).
    support : bool (nx, ny, nz)
    objects : complex64 (J, nx, ny, nz)
        ρ_j = s·exp(−i (G_j·u − c_j)) on the grid.
    phase_offsets : (J,) float, rad
        c_j (not fitted; see the module's notes).
    scales : (J,) float
        k_j, counts per |A|².
    nll_before, nll_after : (J,) float
        Poisson NLL per measured voxel of each reflection (all its voxels,
        held-out ones included) at the start and at the returned iterate
        (:func:`braggstrain.phasing.metrics.poisson_nll`).
    history : dict of lists
        Per iteration: ``nll`` (fitted voxels) and ``free_nll`` (held-out
        voxels), the Poisson NLL per voxel (its constant ln n! included, as
        in ``nll_before``) over all reflections together.
    iterations : int
        Iterations run; ``best_iteration`` the one returned.
    message : str
        The optimiser's stopping message.
    """

    amplitude: np.ndarray
    displacement: np.ndarray
    support: np.ndarray
    objects: np.ndarray
    phase_offsets: np.ndarray
    scales: np.ndarray
    nll_before: np.ndarray
    nll_after: np.ndarray
    history: dict
    iterations: int
    best_iteration: int
    message: str
    labels: list
    g_vectors: np.ndarray
    grid: Grid
    options: dict = field(default_factory=dict)


def fill_nearest(u):
    """u (3, grid) with NaN (or outside the known voxels) filled by the
    nearest finite voxel."""
    from scipy import ndimage

    known = np.all(np.isfinite(u), axis=0)
    if not known.any():
        raise JointError("displacement: no finite voxel to start the joint fit from")
    if known.all():
        return u
    _, idx = ndimage.distance_transform_edt(~known, return_indices=True)
    return u[(slice(None),) + tuple(idx)]


class _Objective:
    """L and its gradient over x = [s (n), v (3n), ln k (J)] on the
    support's n voxels of the evaluation grid: u = u_base + v/ḡ, the
    correction v to the starting displacement in radians of the mean |G|
    (variables of one scale for L-BFGS-B, and u_base keeps the start's cut
    surfaces exactly)."""

    def __init__(self, data, transforms, support, g_vectors, work, floor, u_base):
        self.data, self.F, self.support = data, transforms, support
        self.G = g_vectors
        self.n = int(support.sum())
        self.gbar = float(np.mean(np.linalg.norm(g_vectors, axis=1)))
        self.work = work
        self.floor = float(floor)
        self.u_base = u_base
        self.last = None

    def split(self, x):
        n = self.n
        return x[:n], self.u_base + x[n:4 * n].reshape(3, n) / self.gbar, x[4 * n:]

    def field(self, s, u, j):
        """ρ_j on the support (n,) and e^{−iφ_j}."""
        e = np.exp(-1j * (self.G[j] @ u))
        return s * e, e

    def full(self, rho):
        out = np.zeros(self.support.shape, np.complex128)
        out[self.support] = rho
        return out

    def model(self, x, j):
        s, u, kap = self.split(x)
        rho, _ = self.field(s, u, j)
        A = self.F[j].forward(self.full(rho))
        return np.exp(kap[j]) * np.abs(A) ** 2 + self.data[j].background + self.floor

    def __call__(self, x):
        s, u, kap = self.split(x)
        gs = np.zeros(self.n)
        gu = np.zeros((3, self.n))
        gk = np.zeros(len(self.data))
        total = 0.0
        free = 0.0
        for j, d in enumerate(self.data):
            rho, e = self.field(s, u, j)
            A = self.F[j].forward(self.full(rho))
            k = np.exp(kap[j])
            a2 = np.abs(A) ** 2
            model = k * a2 + d.background + self.floor
            terms = model - d.counts * np.log(model)
            w = self.work[j]
            total += float(terms[w].sum())
            free += float(terms[~w].sum())
            ratio = np.where(w, 1.0 - d.counts / model, 0.0)
            gk[j] = float(np.sum(ratio * k * a2))
            gam = self.F[j].adjoint(2.0 * k * ratio * A)[self.support]
            gs += np.real(np.conj(gam) * e)
            gu += self.G[j][:, None] * np.imag(rho * np.conj(gam))[None, :]
        self.last = (x.copy(), total, free)
        return total, np.concatenate([gs, (gu / self.gbar).ravel(), gk])


def upsample_displacement(u, g_vectors, factor, interpolate):
    """u (3, grid) on the finer grid of ``factor``, wrap-safe across the cut
    surfaces of u.

    Interpolating u itself mixes the values on the two sides of a cut, where
    u jumps by a lattice vector b that no exp(−i G_j·u) sees, and fills a
    sheet of fine voxels with phases that belong to neither side. Instead
    each fine voxel starts from its own coarse voxel's u (the fine voxels of
    a coarse voxel are its block, :func:`~braggstrain.joint.model.fine_grid`)
    and is corrected by the least-squares δu of the wrapped phase residuals
    r_j = arg(P[e^{−i G_j·u}] · e^{+i G_j·u_block}) = −G_j·δu, P the
    ``interpolate`` function (e.g. trilinear) applied to each reflection's
    complex phase factor, which is continuous across a cut."""
    m = tuple(int(v) for v in factor)
    block = u
    for ax, k in enumerate(m):
        block = np.repeat(block, k, axis=ax + 1)
    G = np.asarray(g_vectors, float)
    res = np.stack([np.angle(interpolate(np.exp(-1j * np.tensordot(g, u, axes=1)))
                             * np.exp(1j * np.tensordot(g, block, axes=1))) for g in G])
    return block - np.tensordot(np.linalg.pinv(G), res, axes=1)


def _held_out(data, fraction, by, rng):
    """Per reflection, True where a voxel is fitted: ``fraction`` of the
    voxels left out at random ("voxels"), or of the frames ("frames": every
    voxel of a left-out frame; needs ``MeasuredVoxels.frames``)."""
    out = []
    for d in data:
        if by == "voxels" or float(fraction) == 0:
            out.append(rng.random(d.size) >= float(fraction))
            continue
        if d.frames is None:
            raise InputError(f"held_out_by = 'frames': reflection '{d.name}' has no frame index per voxel")
        f = np.unique(d.frames)
        n_out = max(1, int(round(float(fraction) * f.size)))
        out.append(~np.isin(d.frames, rng.choice(f, n_out, replace=False)))
    return out


def _block_mean(a, factor):
    """Means over blocks of ``factor`` voxels on the last three axes."""
    m = tuple(int(v) for v in factor)
    n = tuple(k // f for k, f in zip(a.shape[-3:], m))
    lead = a.shape[:-3]
    return a.reshape(lead + (n[0], m[0], n[1], m[1], n[2], m[2])).mean(axis=(-5, -3, -1))


def _check(data, grid, support, amplitude, displacement, g_labels):
    if len(data) < 3:
        raise JointError(f"joint: {len(data)} reflection(s) given; expected at least three non-coplanar "
                         f"reflections (one displacement vector per voxel needs three G)")
    for d in data:
        if not isinstance(d, MeasuredVoxels):
            raise InputError(f"data: expected MeasuredVoxels, got {type(d).__name__}")
    G = np.array([d.g_vector for d in data])
    sv = np.linalg.svd(G, compute_uv=False)
    if not sv[-1] > 1e-6 * sv[0]:
        raise JointError(f"joint: the reflections {g_labels} are coplanar; expected three non-coplanar G")
    sup = np.asarray(support, bool)
    if sup.shape != grid.shape or not sup.any():
        raise InputError(f"support: expected a non-empty bool array of the grid's shape {grid.shape}")
    amp = np.asarray(amplitude, float)
    if amp.shape != grid.shape:
        raise InputError(f"amplitude: expected the grid's shape {grid.shape}, got {amp.shape}")
    u = np.asarray(displacement, float)
    if u.shape != (3,) + grid.shape:
        raise InputError(f"displacement: expected shape {(3,) + grid.shape}, got {u.shape}")
    return G, sup, amp, u


def joint_refine(data, grid, support, amplitude, displacement, *, reference_objects=None,
                 max_iterations=DEFAULT_ITERATIONS, held_out=DEFAULT_HELD_OUT, support_dilation=1, seed=0,
                 subdivide=True, held_out_by="voxels", eps=DEFAULT_EPS, threads=1, progress=None):
    """Fit one amplitude and one displacement field to all reflections' counts.

    Parameters
    ----------
    data : list of :class:`~braggstrain.joint.model.MeasuredVoxels`
        One per reflection (≥ 3, non-coplanar G).
    grid : Grid (or anything :meth:`Grid.of` accepts)
        The common sample-frame grid.
    support : bool (nx, ny, nz)
        The crystal's voxels from the independent route.
    amplitude : (nx, ny, nz)
        Starting s (e.g. the mean normalised amplitude); scaled so its
        maximum inside the support is 1 (the scales k_j carry the counts).
    displacement : (3, nx, ny, nz), Å
        Starting u (the tensor stage's); NaN voxels take their nearest
        finite neighbour's value.
    reference_objects : list of complex arrays on the grid, optional
        The independent reconstructions; they set the phase offsets c_j.
    max_iterations : int
        L-BFGS-B iterations at most.
    held_out : float in [0, 0.5)
        Fraction of each reflection's voxels left out for the free
        log-likelihood (0: none; the last iterate is returned).
    support_dilation : int
        Voxels by which the support is dilated before the fit (lets the
        edges move; s ≥ 0 may shrink them back).
    held_out_by : "voxels" or "frames"
        Leave out ``held_out`` of each reflection's voxels at random, or of
        its frames (every voxel of a left-out frame; a stricter test, as a
        frame is not interpolated by measured voxels of the same frame).
    seed : int
        Seed of the held-out choice.
    subdivide : bool
        Fit on a grid whose voxels split the common grid's
        (:func:`~braggstrain.joint.model.subdivision`) so that no measured q
        folds back: the starting s is interpolated onto it (trilinear), the
        starting u by :func:`upsample_displacement` (wrap-safe across its
        cut surfaces), and the fitted objects, amplitude and displacement
        come back onto the common grid as block means. False: the common grid
        itself (data beyond its Nyquist band are then modelled folded).
    eps : float
        Precision of the non-uniform FFTs.
    threads : int
        finufft threads (default 1; measured on the shared 2-core test
        machine, one thread ran a 16³-grid transform of 3·10⁴ points 3 to 6
        times faster than finufft's default of all cores).
    progress : callable(iteration, nll, free_nll), optional

    Returns
    -------
    JointResult

    Raises
    ------
    JointError
        Fewer than three reflections, or coplanar ones.
    """
    from scipy import ndimage
    from scipy.optimize import minimize
    from scipy.special import gammaln

    from braggstrain.phasing.metrics import poisson_nll

    grid = Grid.of(grid)
    labels = [d.name or f"reflection {j}" for j, d in enumerate(data)]
    G, sup, amp, u0 = _check(data, grid, support, amplitude, displacement, labels)
    if not (0 <= float(held_out) < 0.5):
        raise InputError(f"held_out: expected a fraction in [0, 0.5), got {held_out!r}")
    if held_out_by not in HELD_OUT_BY:
        raise InputError(f"held_out_by: {held_out_by!r}; expected one of {list(HELD_OUT_BY)}")
    if int(max_iterations) < 1:
        raise InputError(f"max_iterations: expected a positive integer, got {max_iterations!r}")
    coarse_sup = np.asarray(support, bool)
    if int(support_dilation) > 0:
        sup = ndimage.binary_dilation(sup, iterations=int(support_dilation))
    u0 = fill_nearest(np.where(coarse_sup[None], u0, np.nan))
    s0 = np.where(sup, np.maximum(np.nan_to_num(amp), 0.0), 0.0)
    if not s0[coarse_sup].max() > 0:
        raise JointError("amplitude: zero everywhere inside the support; expected the crystal's amplitude")
    s0 = s0 / s0[coarse_sup].max()
    refs = None
    if reference_objects is not None:
        refs = [np.nan_to_num(np.asarray(r)) for r in reference_objects]
        for j, r in enumerate(refs):
            if r.shape != grid.shape:
                raise InputError(f"reference_objects[{j}]: expected the grid's shape {grid.shape}, got {r.shape}")

    # the evaluation grid: the common grid's voxels split so that no measured q folds back;
    # the starting fields interpolated onto it (trilinear), the result block-averaged back
    factor = subdivision(grid, [d.q for d in data]) if subdivide else np.ones(3, int)
    fine = fine_grid(grid, factor)
    P = interpolation_matrix(grid, fine)

    def up(a):
        return (P @ np.asarray(a).ravel()).reshape(fine.shape)

    sup_f = up(sup.astype(float)) >= 0.5
    s0 = up(s0)
    u0 = upsample_displacement(u0, G, factor, up)
    rng = np.random.default_rng(seed)
    work = _held_out(data, held_out, held_out_by, rng)
    transforms = [FarField(fine, d.q, eps=eps, threads=threads) for d in data]
    obj = _Objective(data, transforms, sup_f, G, work, MODEL_FLOOR, u0[:, sup_f])
    n = obj.n
    x0 = np.concatenate([s0[sup_f], np.zeros(3 * n), np.zeros(len(data))])
    # closed-form starting scales: k_j = Σ (n − b) / Σ |A|² (Poisson ML for one scale)
    for j, d in enumerate(data):
        a2 = obj.model(x0, j) - d.background - MODEL_FLOOR
        x0[4 * n + j] = np.log(max(float(np.sum(np.maximum(d.counts - d.background, 0))), 1e-12)
                               / max(float(a2.sum()), 1e-300))

    def per_voxel_nll(x):
        return np.array([poisson_nll(d.counts, obj.model(x, j)) for j, d in enumerate(data)])

    before = per_voxel_nll(x0)
    n_work = sum(int(w.sum()) for w in work)
    n_free = sum(int((~w).sum()) for w in work)
    # Σ ln Γ(n + 1) of the fitted and the held-out counts: the history then
    # reads as the NLL per voxel of nll_before / nll_after
    lg_work = sum(float(gammaln(d.counts[w] + 1).sum()) for d, w in zip(data, work))
    lg_free = sum(float(gammaln(d.counts[~w] + 1).sum()) for d, w in zip(data, work))
    history = {"nll": [], "free_nll": []}
    best = {"x": x0.copy(), "free": np.inf, "it": 0}

    def record(xk):
        if obj.last is None or not np.array_equal(obj.last[0], xk):
            obj(xk)
        _, tot, free = obj.last
        history["nll"].append((tot + lg_work) / max(n_work, 1))
        history["free_nll"].append((free + lg_free) / n_free if n_free else float("nan"))
        it = len(history["nll"]) - 1
        if n_free == 0 or free < best["free"]:
            best.update(x=xk.copy(), free=free, it=it)
        if progress is not None:
            progress(it, history["nll"][-1], history["free_nll"][-1])

    record(x0)
    bounds = [(0.0, None)] * n + [(None, None)] * (3 * n + len(data))
    res = minimize(obj, x0, jac=True, method="L-BFGS-B", bounds=bounds, callback=record,
                   options={"maxiter": int(max_iterations), "maxcor": 20, "ftol": 1e-13, "gtol": 1e-10})
    if n_free == 0:
        best.update(x=res.x.copy(), it=len(history["nll"]) - 1)
    x = best["x"]
    after = per_voxel_nll(x)
    s, u, kap = obj.split(x)

    def down(a):
        return _block_mean(a, factor)

    amp_f = np.zeros(fine.shape)
    amp_f[sup_f] = s
    u_f = np.zeros((3,) + fine.shape)
    u_f[:, sup_f] = u
    frac = down(sup_f.astype(float))
    sup_out = frac >= 0.5
    with np.errstate(invalid="ignore", divide="ignore"):
        u_out = np.where(sup_out[None], down(u_f) / frac, np.nan).astype(np.float32)
    offsets = np.zeros(len(data))
    objects = np.zeros((len(data),) + grid.shape, np.complex64)
    for j in range(len(data)):
        rho = down(obj.full(obj.field(s, u, j)[0]))
        if refs is not None:
            z = np.sum(refs[j][sup_out] * np.conj(rho[sup_out]))
            offsets[j] = float(np.angle(z)) if abs(z) > 0 else 0.0
        objects[j] = (rho * np.exp(1j * offsets[j])).astype(np.complex64)
    return JointResult(amplitude=down(amp_f).astype(np.float32), displacement=u_out, support=sup_out,
                       objects=objects, phase_offsets=offsets,
                       scales=np.exp(kap), nll_before=before, nll_after=after, history=history,
                       iterations=int(res.nit), best_iteration=int(best["it"]), message=str(res.message),
                       labels=labels, g_vectors=G, grid=grid,
                       options={"max_iterations": int(max_iterations), "held_out": float(held_out),
                                "held_out_by": str(held_out_by), "support_dilation": int(support_dilation),
                                "seed": int(seed), "eps": float(eps),
                                "subdivision": [int(v) for v in factor],
                                "fitted_voxels": n_work, "held_out_voxels": n_free})
