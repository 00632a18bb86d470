"""Figures of merit, alignment of reconstructions, PRTF, ramp and centring.

Arrays here are in the user layout (crystal centred, origin at index n//2)
unless a function says otherwise.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.fft
import scipy.ndimage
from scipy.special import gammaln

from braggstrain.errors import InputError
from braggstrain.phasing import kernels as _k

__all__ = [
    "poisson_nll",
    "nll_per_voxel",
    "constrained_sums",
    "sharpness",
    "twin",
    "align",
    "complex_error",
    "far_field",
    "PRTF",
    "prtf",
    "peak_offset",
    "remove_phase_ramp",
    "centre_of_mass_shift",
]


def poisson_nll(intensity, model, mask=None):
    """Poisson negative log-likelihood per measured voxel, as the runs compute it.

    mean over measured voxels of I_c - I ln I_c + ln Gamma(I + 1), I the
    counts and I_c the model (Thibault & Guizar-Sicairos, New J. Phys. 14,
    063004 (2012)); lower is better.  ``mask`` is True where not measured.
    Computed by the same code as the ``nll`` of every run: the kernel
    :func:`braggstrain.phasing.kernels.poisson_sum_model` on float32 model
    and amplitudes, plus :func:`constrained_sums`, combined by
    :func:`nll_per_voxel`.
    """
    i = np.asarray(intensity, dtype=np.float64)
    amp = np.sqrt(np.maximum(i, 0)).astype(np.float32).reshape(-1)
    if mask is not None:
        amp[np.asarray(mask, bool).reshape(-1)] = -1.0
    m = np.ascontiguousarray(model, dtype=np.float32).reshape(-1)
    if m.size != amp.size:
        raise InputError(f"model: expected the shape of intensity {i.shape}, got {np.shape(model)}")
    n, _, lgam = constrained_sums(amp)
    s, _ = _k.poisson_sum_model(m, amp, np.float32(0.0))
    return nll_per_voxel(s, lgam, n)


def nll_per_voxel(model_sum, lgamma_sum, count):
    """(Σ (I_c − I ln I_c) + Σ ln Γ(I + 1)) / count: the Poisson negative
    log-likelihood per voxel from the kernels' model sum and the constant
    ln Γ sum (NaN for no voxel)."""
    return float((model_sum + lgamma_sum) / count) if count else float("nan")


def constrained_sums(amp, chunk=1 << 20):
    """Count, Σ I and Σ ln Γ(I + 1) over the constrained voxels (``amp >= 0``) of
    a folded amplitude (see :mod:`braggstrain.phasing.kernels`), in chunks."""
    n = 0
    total = 0.0
    lg = 0.0
    for start in range(0, amp.size, chunk):
        a = amp[start:start + chunk]
        a = a[a >= 0].astype(np.float64)
        i = a * a
        n += a.size
        total += float(i.sum())
        lg += float(gammaln(i + 1.0).sum())
    return n, total, lg


def sharpness(obj):
    """Sharpness sum |rho|^4 / (sum |rho|^2)^2 times the number of voxels (scale free).

    Higher means a more concentrated modulus; a common ranking metric in
    phase retrieval (common practice, no source).
    """
    a2 = np.abs(np.asarray(obj))
    np.square(a2, out=a2)
    s2 = float(a2.sum(dtype=np.float64))
    if s2 == 0:
        return 0.0
    flat = a2.reshape(-1)
    s4 = 0.0
    for start in range(0, flat.size, 1 << 20):  # float64 sums in chunks: little memory
        c = flat[start:start + (1 << 20)].astype(np.float64)
        s4 += float(np.dot(c, c))
    return s4 / s2 ** 2 * a2.size


def twin(obj, *, periodic=True):
    """The twin conj ρ(−r) of an object whose origin is at index n//2.

    Intensity cannot tell ρ(r) from ρ*(−r) (docs/design.md, sign
    conventions). Index i maps to 2·(n//2) − i on each axis, so the voxel at
    n//2 stays put. On an axis of even length index 0 has no image inside
    the array:

    * ``periodic=True`` (arrays of phase retrieval, periodic through the
      FFT): the image is taken modulo n, so index 0 maps onto itself;
    * ``periodic=False`` (sample-frame grids, which end at their edges):
      index 0 is set to zero.
    """
    a = np.asarray(obj)
    shifts = tuple(1 if n % 2 == 0 else 0 for n in a.shape)
    out = np.roll(np.conj(a)[::-1, ::-1, ::-1], shifts, axis=(0, 1, 2))
    if not periodic:
        for ax, n in enumerate(a.shape):
            if n % 2 == 0:
                sl = [slice(None)] * a.ndim
                sl[ax] = 0
                out[tuple(sl)] = 0
    return out


def _fourier_shift(obj, shift):
    spec = scipy.fft.fftn(obj)
    spec = scipy.ndimage.fourier_shift(spec, shift)
    return scipy.fft.ifftn(spec).astype(np.complex64)


def align(moving, reference, *, subvoxel=True, upsample=50, allow_twin=True):
    """Align ``moving`` to ``reference``: translation, twin and global phase.

    The translation comes from phase correlation, with sub-voxel refinement
    by upsampled cross-correlation (scikit-image ``phase_cross_correlation``,
    Guizar-Sicairos et al., Opt. Lett. 33, 156 (2008)); the twin rho*(-r) is
    tried too when ``allow_twin``; the global phase is the argument of the
    overlap sum(reference * conj(moving)).

    Returns
    -------
    aligned : ndarray complex64
    info : dict with ``shift`` (voxels), ``twin`` (bool), ``phase`` (rad)
        and ``overlap`` (normalised |<reference, aligned>|, 1 = identical).
    """
    from skimage.registration import phase_cross_correlation

    ref = np.asarray(reference, dtype=np.complex64)
    mov = np.asarray(moving, dtype=np.complex64)
    if ref.shape != mov.shape:
        raise InputError(f"align: shapes differ, {mov.shape} vs reference {ref.shape}")
    best = None
    nref = float(np.sqrt((np.abs(ref) ** 2).sum(dtype=np.float64)))
    for is_twin in ((False, True) if allow_twin else (False,)):
        cand = twin(mov) if is_twin else mov
        shift, _, _ = phase_cross_correlation(np.abs(ref), np.abs(cand),
                                              upsample_factor=upsample if subvoxel else 1,
                                              normalization=None)
        shift = np.asarray(shift, dtype=float)
        if subvoxel and np.any(np.abs(shift - np.round(shift)) > 1e-6):
            moved = _fourier_shift(cand, shift)
        else:
            moved = np.roll(cand, tuple(int(round(s)) for s in shift), axis=(0, 1, 2))
        dot = complex(np.vdot(moved, ref))  # sum conj(moved) * ref
        ncand = float(np.sqrt((np.abs(moved) ** 2).sum(dtype=np.float64)))
        overlap = abs(dot) / max(nref * ncand, 1e-300)
        if best is None or overlap > best[1]["overlap"]:
            phase = float(np.angle(dot))
            best = (moved * np.complex64(np.exp(1j * phase)),
                    {"shift": shift, "twin": is_twin, "phase": phase, "overlap": overlap})
    return best


def complex_error(obj, reference, *, aligned=False, allow_twin=True):
    """Amplitude-weighted complex error of ``obj`` against ``reference``.

    E = sqrt( sum |c rho - rho_ref|^2 / sum |rho_ref|^2 ), after aligning
    ``obj`` (shift, twin, global phase) unless ``aligned``, with c the real
    scale that minimises E.  The weighting by amplitude is built in: voxels
    with little density count little.
    """
    ref = np.asarray(reference, dtype=np.complex128)
    cur = np.asarray(obj) if aligned else align(obj, reference, allow_twin=allow_twin)[0]
    cur = np.asarray(cur, dtype=np.complex128)
    num = np.vdot(cur, ref)
    den = np.vdot(cur, cur).real
    c = (num / den) if den > 0 else 0.0
    c = abs(c)  # the phase is already aligned; keep a real scale only
    err = np.sqrt((np.abs(c * cur - ref) ** 2).sum() / (np.abs(ref) ** 2).sum())
    return float(err)


def far_field(obj):
    """Far field of an object centred at index n//2, with q = 0 at index n//2.

    The forward FFT of docs/design.md: fftshift(fftn(ifftshift(obj))), so
    that intensity = |far_field(obj)|² for ρ = s·exp(−i G·u). The dtype
    follows scipy.fft (complex64 in, complex64 out).
    """
    return scipy.fft.fftshift(scipy.fft.fftn(scipy.fft.ifftshift(obj)))


@dataclass
class PRTF:
    """Phase-retrieval transfer function averaged over shells of |q|.

    Attributes
    ----------
    q : ndarray
        Shell centres, in cycles per voxel of the real-space grid (|q| index
        offset from the peak divided by the axis length, combined
        Euclidean), 0 .. ~0.5 along an axis.
    values : ndarray
        Mean PRTF in each shell (NaN where a shell has no measured voxel).
    counts : ndarray of int
        Voxels contributing to each shell.
    resolution : float
        First q where the PRTF falls below 1/e (NaN if it never does).
    """

    q: np.ndarray
    values: np.ndarray
    counts: np.ndarray
    resolution: float


def prtf(objects, intensity=None, mask=None, *, ramp=None, nbins=None):
    """PRTF of a set of aligned reconstructions (Chapman et al., JOSA A 23, 1179 (2006)).

    PRTF(q) = |<Psi_k(q) / |Psi_k(q)|>_k|: the modulus of the mean phasor of
    the runs' far fields, i.e. |<Psi'_k>| / sqrt(I) for the modulus-projected
    fields Psi'_k = sqrt(I) Psi_k/|Psi_k|; 1 where all runs agree on the
    phase.  Averaged over shells of |q|, on measured voxels with I > 0.

    Parameters
    ----------
    objects : sequence of ndarray
        Reconstructions already aligned to each other (user layout).
    intensity : ndarray, optional
        Measured intensity (peak at n//2); voxels with zero counts are left
        out.
    mask : ndarray of bool, optional
        True where not measured (left out).
    ramp : sequence of 3 float, optional
        Phase ramp removed from the objects (voxels of reciprocal grid);
        restored before the transform so the far fields line up with the
        data.
    """
    objs = [np.asarray(o) for o in objects]
    if not objs:
        raise InputError("prtf: expected at least one reconstruction")
    shape = objs[0].shape
    acc = np.zeros(shape, dtype=np.complex128)
    for o in objs:
        if ramp is not None:
            o = remove_phase_ramp(o, -np.asarray(ramp, dtype=float))
        psi = far_field(o)
        mod = np.abs(psi)
        acc += np.where(mod > 0, psi / np.where(mod > 0, mod, 1), 0)
    value = np.abs(acc) / len(objs)
    use = np.ones(shape, bool)
    if intensity is not None:
        use &= np.asarray(intensity) > 0
    if mask is not None:
        use &= ~np.asarray(mask, bool)
    grids = np.meshgrid(*[(np.arange(n) - n // 2) / n for n in shape], indexing="ij")
    qr = np.sqrt(sum(g ** 2 for g in grids))
    nb = nbins or max(shape) // 2
    edges = np.linspace(0, 0.5, nb + 1)
    idx = np.clip(np.digitize(qr[use], edges) - 1, 0, nb)
    sums = np.bincount(idx, weights=value[use], minlength=nb + 1)[:nb]
    counts = np.bincount(idx, minlength=nb + 1)[:nb]
    with np.errstate(invalid="ignore", divide="ignore"):
        vals = np.where(counts > 0, sums / np.maximum(counts, 1), np.nan)
    centres = 0.5 * (edges[1:] + edges[:-1])
    below = np.nonzero(np.nan_to_num(vals, nan=1.0) < np.exp(-1))[0]
    res = float(centres[below[0]]) if below.size else float("nan")
    return PRTF(centres, vals, counts.astype(int), res)


def peak_offset(intensity, mask=None, background=0.0):
    """Centre of mass of the diffracted intensity minus n//2 on each axis (voxels).

    Only measured voxels count, with the flat background removed.
    """
    i = np.asarray(intensity, dtype=np.float64) - float(background)
    i = np.maximum(i, 0)
    if mask is not None:
        i = np.where(mask, 0.0, i)
    total = i.sum()
    if total <= 0:
        return np.zeros(i.ndim)
    out = []
    for axis, n in enumerate(i.shape):
        marg = i.sum(axis=tuple(a for a in range(i.ndim) if a != axis))
        out.append(float((marg * (np.arange(n) - n // 2)).sum() / total))
    return np.asarray(out)


def remove_phase_ramp(obj, offset):
    """Multiply by exp(-2 pi i sum_k offset_k (j_k - n_k//2) / n_k).

    A ramp exp(+2 pi i q0.r / n) in the object moves the Bragg peak of
    fftshift(fftn(ifftshift(obj))) by +q0 voxels (shift theorem); this undoes
    it, with ``offset`` = q0 in voxels of the reciprocal grid.  A negative
    offset adds the ramp back.
    """
    out = np.array(obj, dtype=np.complex64)  # a copy; the ramp is applied in place
    for axis, (n, q0) in enumerate(zip(out.shape, offset)):
        shape = [1] * out.ndim
        shape[axis] = n
        factor = np.exp(-2j * np.pi * float(q0) / n * (np.arange(n) - n // 2))
        out *= factor.astype(np.complex64).reshape(shape)
    return out


def centre_of_mass_shift(weight):
    """Integer roll that brings the circular centre of mass of ``weight`` to n//2.

    The centre of mass is taken on the circle (angle of the mean phasor) so an
    object split across the periodic edges is handled.
    """
    w = np.asarray(weight)
    shifts = []
    for axis, n in enumerate(w.shape):
        marg = w.sum(axis=tuple(a for a in range(w.ndim) if a != axis), dtype=np.float64)
        ang = np.angle((marg * np.exp(2j * np.pi * np.arange(n) / n)).sum())
        com = (ang / (2 * np.pi) * n) % n
        shifts.append(int(round(n // 2 - com)) % n)
    return tuple(shifts)
