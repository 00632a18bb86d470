"""The joint forward model: one crystal seen at several reflections, every
measured voxel at its own exact scattering vector.

The crystal lives on one sample-frame :class:`~braggstrain.strain.grid.Grid`
(positions r = origin + (i − n//2)·voxel_size). For reflection j its complex
object is ρ_j = s·exp(−i G_j·u) and its far field at a measured voxel of
scattering vector Q (sample frame) is

    A_j(q) = Σ_r ρ_j(r) exp(−i q·r),      q = Q − G_j

(the sign convention of docs/design.md). With r = origin + d∘k, k the centred
integer index, this is exp(−i q·origin) · Σ_k ρ_j[k] exp(−i (d∘q)·k): a
type-2 non-uniform FFT (uniform grid → arbitrary points) evaluated with
``finufft``; its adjoint, Σ_p c_p exp(+i q_p·r), is the type-1 transform on
the same points and gives the gradients. The discrete sum is 2π/d-periodic
in q, so points are folded into [−π, π) per axis before the transform
without changing the result.

:class:`MeasuredVoxels` is one reflection's data (counts, the exact Q of
each voxel, G); :func:`measured_voxels` takes them from a
:class:`~braggstrain.prepare.scan.PreparedScan` with xrayutilities' per-pixel
Q (:func:`~braggstrain.prepare.scan.exact_q`, no linear map, no gridding of
the intensity). :class:`FarField` holds the two transforms of one set of
points, planned once.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from braggstrain.errors import InputError
from braggstrain.strain.grid import Grid

__all__ = ["Q_MAPS", "MeasuredVoxels", "measured_voxels", "FarField", "direct_far_field", "subdivision", "fine_grid",
           "interpolation_matrix", "DEFAULT_EPS"]

DEFAULT_EPS = 1e-6
"""Requested relative precision of the non-uniform FFTs (finufft's ``eps``)."""


@dataclass
class MeasuredVoxels:
    """The measured voxels of one reflection.

    Attributes
    ----------
    counts : (P,) float64
        Counts per voxel (background removed, as prepared), masked voxels
        left out.
    q_sample : (3, P) float64
        Exact Q (Å⁻¹) of each voxel in the sample frame.
    g_vector : (3,) float64
        The reflection's G in the sample frame (Å⁻¹); the far field is
        evaluated at q = Q − G.
    background : float
        Flat background added to the model, counts per voxel (0 when the
        prepared counts have it removed).
    name : str
    frames : (P,) int, optional
        Each voxel's frame (index along the prepared array's first axis,
        the rocking frames), for leaving out whole frames.
    """

    counts: np.ndarray
    q_sample: np.ndarray
    g_vector: np.ndarray
    background: float = 0.0
    name: str = ""
    frames: np.ndarray = None
    meta: dict = field(default_factory=dict)

    def __post_init__(self):
        self.counts = np.asarray(self.counts, float).reshape(-1)
        self.q_sample = np.asarray(self.q_sample, float)
        self.g_vector = np.asarray(self.g_vector, float).reshape(3)
        who = f"reflection '{self.name}'" if self.name else "measured voxels"
        if self.q_sample.shape != (3, self.counts.size):
            raise InputError(f"{who}: q_sample: expected shape (3, {self.counts.size}), got {self.q_sample.shape}")
        if self.counts.size == 0:
            raise InputError(f"{who}: no measured voxel")
        if not (np.all(np.isfinite(self.counts)) and np.all(np.isfinite(self.q_sample))):
            raise InputError(f"{who}: counts and Q must be finite")
        if self.frames is not None:
            self.frames = np.asarray(self.frames).reshape(-1)
            if self.frames.shape != self.counts.shape or not np.issubdtype(self.frames.dtype, np.integer):
                raise InputError(f"{who}: frames: expected one integer frame index per voxel ({self.counts.size})")
        if np.any(self.counts < 0):
            raise InputError(f"{who}: counts: expected ≥ 0, found {self.counts.min():g}")
        if not (np.isfinite(self.background) and self.background >= 0):
            raise InputError(f"{who}: background: expected a finite count ≥ 0, got {self.background!r}")

    @property
    def q(self):
        """q = Q − G, (3, P), Å⁻¹."""
        return self.q_sample - self.g_vector[:, None]

    @property
    def size(self):
        return self.counts.size


Q_MAPS = ("exact", "linear")


def measured_voxels(prepared, g_vector, *, name="", q_map="exact"):
    """The measured voxels of a prepared scan at their exact Q.

    Parameters
    ----------
    prepared : braggstrain.prepare.scan.PreparedScan
    g_vector : 3 floats, Å⁻¹, sample frame (the crystal's U·B·h)
    name : str
    q_map : "exact" or "linear"
        Q of each voxel from the instrument's per-pixel conversion
        (:func:`~braggstrain.prepare.scan.exact_q`, the default) or from the
        prepared scan's local linear map
        (:func:`~braggstrain.prepare.scan.linear_q`, the approximation
        phase retrieval in the detector frame makes; for comparisons).

    Returns
    -------
    MeasuredVoxels
        Every voxel of the prepared array that is not masked (padding
        included in the mask), with Q from xrayutilities' per-pixel
        conversion averaged over the raw voxels of a bin.
    """
    from braggstrain.prepare.scan import PreparedScan, exact_q, linear_q

    if not isinstance(prepared, PreparedScan):
        raise InputError(f"prepared: expected a PreparedScan, got {type(prepared).__name__}")
    if q_map not in Q_MAPS:
        raise InputError(f"q_map: {q_map!r}; expected one of {list(Q_MAPS)}")
    q = (exact_q if q_map == "exact" else linear_q)(prepared, frame="sample")
    keep = ~np.asarray(prepared.mask, bool) & np.all(np.isfinite(q), axis=0)
    counts = np.maximum(np.asarray(prepared.intensity, float)[keep], 0.0)
    return MeasuredVoxels(counts=counts, q_sample=q[:, keep], g_vector=g_vector, name=name,
                          frames=np.nonzero(keep)[0],
                          meta={"source": prepared.source, "shape": list(prepared.shape)})


def _fold(x):
    return np.mod(x + np.pi, 2 * np.pi) - np.pi


class FarField:
    """The far field of objects on ``grid`` at fixed points q (3, P), Å⁻¹.

    ``forward(obj)`` → A (P,), the type-2 transform; ``adjoint(c)`` →
    Σ_p c_p exp(+i q_p·r) on the grid, the type-1 transform (the exact
    adjoint of ``forward``, to the precision ``eps``). The finufft plans are
    made once (the points do not change during a fit).
    """

    def __init__(self, grid, q, *, eps=DEFAULT_EPS, threads=None):
        import finufft

        self.grid = Grid.of(grid)
        q = np.asarray(q, float)
        if q.ndim != 2 or q.shape[0] != 3:
            raise InputError(f"q: expected shape (3, P), got {q.shape}")
        self.q = q
        d = self.grid.voxel_size
        pts = [np.ascontiguousarray(_fold(q[k] * d[k])) for k in range(3)]
        self._ramp = np.exp(-1j * (self.grid.origin @ q))  # exp(−i q·origin)
        kw = {} if threads is None else {"nthreads": int(threads)}
        shape = self.grid.shape
        self._fwd = finufft.Plan(2, shape, eps=float(eps), isign=-1, dtype="complex128", **kw)
        self._fwd.setpts(*pts)
        self._adj = finufft.Plan(1, shape, eps=float(eps), isign=1, dtype="complex128", **kw)
        self._adj.setpts(*pts)

    @property
    def size(self):
        return self.q.shape[1]

    def forward(self, obj):
        """A(q_p) = Σ_r obj(r) exp(−i q_p·r), complex128 (P,)."""
        obj = np.asarray(obj)
        if obj.shape != self.grid.shape:
            raise InputError(f"obj: expected the grid's shape {self.grid.shape}, got {obj.shape}")
        return self._fwd.execute(np.ascontiguousarray(obj, dtype=np.complex128)) * self._ramp

    def adjoint(self, values):
        """Σ_p values_p exp(+i q_p·r) on the grid, complex128 (the adjoint of
        :meth:`forward`)."""
        c = np.ascontiguousarray(np.asarray(values, np.complex128).reshape(-1) * np.conj(self._ramp))
        return self._adj.execute(c)


def direct_far_field(obj, grid, q):
    """A(q) = Σ_r obj(r) exp(−i q·r) by direct summation over the voxels
    with obj ≠ 0: the reference definition (slow; for checks)."""
    grid = Grid.of(grid)
    obj = np.asarray(obj)
    idx = np.argwhere(obj != 0)
    r = grid.position(idx)  # (V, 3)
    vals = obj[tuple(idx.T)]
    q = np.asarray(q, float)
    out = np.empty(q.shape[1], complex)
    for s in range(0, q.shape[1], 2048):
        out[s:s + 2048] = np.exp(-1j * (q[:, s:s + 2048].T @ r.T)) @ vals
    return out


def subdivision(grid, q_sets):
    """Integer subdivision per axis of ``grid``'s voxel so that every q of
    ``q_sets`` (arrays (3, P), Å⁻¹) lies within the finer grid's Nyquist
    band, |q_k| d_k ≤ π. Beyond it the discrete sum folds the far field back
    (it is 2π/d-periodic); the isotropic voxel of the independent route,
    the cube root of the skewed detector-frame voxel's volume, can leave
    measured q up to about twice that band along some axes."""
    grid = Grid.of(grid)
    qmax = np.max([np.abs(np.asarray(q, float)).max(axis=1) for q in q_sets], axis=0)
    return np.maximum(1, np.ceil(qmax * grid.voxel_size / np.pi - 1e-9)).astype(int)


def fine_grid(grid, factor):
    """``grid`` with each voxel split into ``factor`` (3 ints) voxels, placed
    so that the fine voxels inside a coarse voxel are centred on it."""
    grid = Grid.of(grid)
    m = np.asarray(factor, int).reshape(3)
    n = np.asarray(grid.shape)
    d = grid.voxel_size
    origin = grid.origin + d * (-(n // 2) - (m - 1) / (2 * m) + ((n * m) // 2) / m)
    return Grid(tuple(n * m), d / m, origin)


def interpolation_matrix(grid, fine):
    """Sparse (fine voxels × grid voxels) trilinear interpolation from
    ``grid`` onto the voxels of ``fine`` (both C-order ravelled; zero beyond
    the outermost voxel centres' neighbours). Separable: the Kronecker
    product of one linear-interpolation matrix per axis."""
    from scipy import sparse

    grid, fine = Grid.of(grid), Grid.of(fine)
    P = None
    for k in range(3):
        c = (fine.axis(k) - grid.origin[k]) / grid.voxel_size[k] + grid.shape[k] // 2
        i0 = np.floor(c).astype(int)
        w1 = c - i0
        rows, cols, vals = [], [], []
        for i, w in ((i0, 1.0 - w1), (i0 + 1, w1)):
            ok = (i >= 0) & (i < grid.shape[k]) & (w > 0)
            rows.append(np.flatnonzero(ok))
            cols.append(i[ok])
            vals.append(w[ok])
        Pk = sparse.csr_matrix((np.concatenate(vals), (np.concatenate(rows), np.concatenate(cols))),
                               shape=(fine.shape[k], grid.shape[k]))
        P = Pk if P is None else sparse.kron(P, Pk, format="csr")
    return P
