"""Fields of one reflection: phase gradient, displacement along G, strain along G.

Conventions (docs/design.md): the complex object of a crystal near reflection G is
ρ(r) = s(r)·exp(−i G·u(r)), so the phase φ = arg ρ gives the displacement
along G as u_G = ĝ·u = −φ/|G| (Å), and ∇φ = −Dᵀ G with D_ik = ∂u_i/∂x_k.
Arrays have axes 0, 1, 2 along sample-frame x, y, z, the origin at index
n//2 on each axis and ``voxel_size`` in Å per axis.

Phase gradients are wrap-free: along axis k with voxel edge h,
∂_k φ(r) ≈ arg[ρ(r + h e_k)·ρ*(r − h e_k)] / (2h), which needs no
unwrapping as long as the phase changes by less than π over two voxels.
Optionally a fourth-order correction is applied (the five-point central
difference, Abramowitz & Stegun, Handbook of Mathematical Functions, 1964,
eq. 25.3.6), written as g₄ = g₂ − (g₂(r+e) − 2 g₂(r) + g₂(r−e))/6 so that it
too is built from wrap-free two-voxel differences only. Unwrapping is used
only for displacement maps (scikit-image ``unwrap_phase``, restricted to the
support).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import ndimage as ndi

from braggstrain import _validate as _v
from braggstrain.errors import InputError
from braggstrain.strain.objects import SampleObject

__all__ = [
    "GRADIENT_AMPLITUDE_THRESHOLD",
    "default_support",
    "trusted_for_gradients",
    "trusted_for_windings",
    "phase_gradient",
    "phase_gradient_covariance",
    "phase_ramp",
    "reference_voxel",
    "unwrapped_phase",
    "displacement_along_g",
    "strain_along_g",
    "across_directions",
    "ReflectionField",
    "reflection_field",
]


#: Default of every ``amplitude_threshold`` of phase gradients (trusted
#: voxels, ramps, the tensor): a fraction of the median amplitude inside the
#: support (common practice, no source). The defects' windings use
#: :func:`trusted_for_windings` with its own, lower default.
GRADIENT_AMPLITUDE_THRESHOLD = 0.3


# --------------------------------------------------------------------------
# checks and small helpers
# --------------------------------------------------------------------------

def default_support(obj, threshold=0.2):
    """Voxels whose amplitude is at least ``threshold`` times the maximum.

    Parameters
    ----------
    obj : complex ndarray, shape (nx, ny, nz)
    threshold : float in (0, 1)
        Fraction of max |ρ| (common practice, no source).

    Returns
    -------
    bool ndarray
    """
    amp = np.abs(_v.complex3d(obj))
    if not 0 < threshold < 1:
        raise InputError(f"threshold: expected a fraction in (0, 1), got {threshold!r}")
    top = float(amp.max())
    if top == 0:
        raise InputError("obj: the object is zero everywhere; expected a reconstructed crystal")
    return amp >= threshold * top


def _shift(a, axis, step, fill):
    """a(r + step·e_axis), with ``fill`` where r + step·e_axis leaves the array."""
    out = np.full_like(a, fill)
    n = a.shape[axis]
    if abs(step) >= n:
        return out
    dst = [slice(None)] * a.ndim
    src = [slice(None)] * a.ndim
    if step > 0:
        dst[axis] = slice(0, n - step)
        src[axis] = slice(step, n)
    elif step < 0:
        dst[axis] = slice(-step, n)
        src[axis] = slice(0, n + step)
    else:
        return a.copy()
    out[tuple(dst)] = a[tuple(src)]
    return out


def _amplitude(obj, name="obj"):
    """|ρ| of a complex object, or a real amplitude array as given."""
    a = np.asarray(obj.obj if isinstance(obj, SampleObject) else obj)
    if np.iscomplexobj(a):
        return np.abs(_v.complex3d(a, name))
    if a.ndim != 3 or not np.issubdtype(a.dtype, np.number) or not np.all(np.isfinite(a)):
        raise InputError(f"{name}: expected a 3-D complex object or its finite amplitude, got shape {a.shape} "
                         f"and dtype {a.dtype}")
    return np.abs(a)


def _bright(amp, support, fraction, name="amplitude_threshold"):
    """Voxels whose amplitude is at least ``fraction`` times the median inside the support."""
    if not 0 <= fraction < 1:
        raise InputError(f"{name}: expected a fraction in [0, 1), got {fraction!r}")
    med = float(np.median(amp[support]))
    return amp >= fraction * med, med


def trusted_for_gradients(obj, support=None, amplitude_threshold=GRADIENT_AMPLITUDE_THRESHOLD, erosion=1):
    """Voxels whose phase gradient can be trusted: the support, eroded.

    The support eroded by ``erosion`` voxels (face-connected structuring
    element, so every remaining voxel has both neighbours along every axis
    inside the support), where the voxel and the six face neighbours that
    its central differences read all have an amplitude of at least
    ``amplitude_threshold`` times the median amplitude inside the support.
    A difference that reads a dim voxel takes that voxel's phase, which at
    the crystal's edge is pulled towards its neighbours' by the finite
    resolution; measured on the demo crystal, such voxels carried the
    largest strain errors (docs/strain.md, "Measured error-bar coverage").
    This is the region of strain statistics and of the tensor's ``trusted``
    mask; :func:`trusted_for_windings` is the wider region of the phase
    windings around dislocation cores.

    Parameters
    ----------
    obj : complex ndarray (or SampleObject, or a real amplitude array)
    support : bool ndarray, optional
        Default: :func:`default_support` of ``obj``.
    amplitude_threshold : float in [0, 1)
        0 keeps every voxel of the eroded support.
    erosion : int
        Voxels eroded from the support.

    Returns
    -------
    bool ndarray
    """
    amp = _amplitude(obj)
    support = default_support(amp.astype(np.complex64)) if support is None else _v.mask_of_shape(support, amp.shape)
    if not 0 <= amplitude_threshold < 1:
        raise InputError(f"amplitude_threshold: expected a fraction in [0, 1), got {amplitude_threshold!r}")
    if not support.any():
        return np.zeros(amp.shape, bool)
    mask = support
    if erosion > 0:
        mask = ndi.binary_erosion(support, iterations=int(erosion))
    bright, _ = _bright(amp, support, amplitude_threshold)
    return mask & ndi.binary_erosion(bright)


def trusted_for_windings(obj, support, amplitude_threshold=0.1, dilation=2):
    """Voxels whose phase can be trusted for windings: the support, dilated.

    Around a dislocation core the amplitude dips and the core may sit at the
    surface, so the region of phase windings (defects) is the support
    *dilated* by ``dilation`` voxels with an amplitude of at least
    ``amplitude_threshold`` times the median inside the support (a low
    threshold: a plaquette lost at a core leaves a gap in the line). Compare
    :func:`trusted_for_gradients`, the eroded region of phase gradients.

    Parameters
    ----------
    obj : complex ndarray (3-D) or SampleObject
    support : bool ndarray, same shape
        Voxels inside the crystal (not empty).
    amplitude_threshold : float in [0, 1)
    dilation : int
        Voxels added around the support.

    Returns
    -------
    bool ndarray
    """
    obj = _v.complex3d(obj, "obj", min_size=4)
    support = _v.mask_of_shape(support, obj.shape, "support", nonempty=True)
    amp = np.abs(obj)
    bright, med = _bright(amp, support, amplitude_threshold)
    if not med > 0:
        raise InputError("obj: the amplitude inside the support is zero; expected a reconstructed crystal")
    region = ndi.binary_dilation(support, iterations=int(dilation)) if int(dilation) > 0 else support.copy()
    return region & bright


# --------------------------------------------------------------------------
# phase gradient
# --------------------------------------------------------------------------

def phase_gradient(obj, voxel_size, support=None, *, order=2, smooth=0.0):
    """Wrap-free phase gradient ∇φ of a complex object, rad/Å.

    Along axis k: central difference arg[ρ(r+e_k)ρ*(r−e_k)]/(2h_k) where
    both neighbours are in the support; one-sided arg[ρ(r+e)ρ*(r)]/h (or the
    backward one) where only one is; NaN where neither is and outside the
    support.

    Parameters
    ----------
    obj : complex ndarray, shape (nx, ny, nz)
        ρ = s·exp(−i G·u), axes along sample-frame x, y, z.
    voxel_size : float or 3 floats
        Voxel edges, Å.
    support : bool ndarray, optional
        Crystal voxels (default: :func:`default_support`).
    order : {2, 4}
        2: central difference (error ∝ h²φ'''); 4: fourth-order correction
        where the two-voxel neighbours are in the support too (falls back to
        order 2 elsewhere).
    smooth : float
        Gaussian σ in voxels. When > 0 the complex products
        ρ(r+e)ρ*(r−e) are averaged before taking their argument, i.e. an
        amplitude-weighted local mean of the gradient (order 2 only).

    Returns
    -------
    float32 ndarray, shape (3, nx, ny, nz)
        ∂φ/∂x, ∂φ/∂y, ∂φ/∂z in rad/Å.
    """
    obj = _v.complex3d(obj)
    vs = _v.voxel_size(voxel_size)
    support = default_support(obj) if support is None else _v.mask_of_shape(support, obj.shape)
    if order not in (2, 4):
        raise InputError(f"order: expected 2 or 4, got {order!r}")
    if smooth < 0 or (smooth > 0 and order != 2):
        raise InputError(f"smooth: expected σ ≥ 0 voxels, and only with order=2 (got smooth={smooth!r}, order={order!r})")
    rho = np.where(support, obj, 0).astype(np.complex64)
    out = np.full((3,) + obj.shape, np.nan, dtype=np.float32)
    for k in range(3):
        h = vs[k]
        sp = _shift(support, k, 1, False)
        sm = _shift(support, k, -1, False)
        rp = _shift(rho, k, 1, 0)
        rm = _shift(rho, k, -1, 0)
        central = support & sp & sm
        prod = rp * np.conj(rm)
        if smooth > 0:
            w = np.where(central, prod, 0)
            prod = (ndi.gaussian_filter(w.real, smooth, mode="constant")
                    + 1j * ndi.gaussian_filter(w.imag, smooth, mode="constant"))
        g2 = np.where(central, np.angle(prod) / (2 * h), np.nan)
        fwd = support & sp & ~sm
        bwd = support & sm & ~sp
        g = g2.copy()
        g[fwd] = np.angle(rp[fwd] * np.conj(rho[fwd])) / h
        g[bwd] = np.angle(rho[bwd] * np.conj(rm[bwd])) / h
        if order == 4:
            gp = _shift(g2, k, 1, np.nan)
            gm = _shift(g2, k, -1, np.nan)
            ok = central & np.isfinite(gp) & np.isfinite(gm)
            g[ok] = g2[ok] - (gp[ok] - 2 * g2[ok] + gm[ok]) / 6.0
        out[k] = g
    return out


def phase_gradient_covariance(samples, voxel_size, support, *, center=None, order=2):
    """Per-voxel covariance of the phase gradients of several reconstructions.

    The samples are reconstructions of one reflection on one grid (e.g. the
    kept random starts, or Poisson replicas). With the gradients g_s of each
    (:func:`phase_gradient`, same ``support`` and ``order`` as the tensor
    uses), the covariance is the sample covariance

        C = Σ_s (g_s − ḡ)(g_s − ḡ)ᵀ / (S − 1)

    about their mean ḡ, or, when ``center`` (the reconstruction they deviate
    from) is given, C = Σ_s (g_s − g_c)(g_s − g_c)ᵀ / S (GUM, JCGM 100:2008,
    §4.2, Type A evaluation). Gradient differences are taken wrap-free as
    arg(e^{i(∂φ_s − ∂φ_c)}) per voxel, so a 2π jump of one sample's central
    difference does not count as spread.

    Parameters
    ----------
    samples : sequence of complex 3-D arrays (or SampleObject), S ≥ 2 (S ≥ 1 with ``center``)
    voxel_size : float or 3 floats, Å
    support : bool array
        Voxels where gradients are taken (the tensor's common support).
    center : complex 3-D array, optional
    order : {2, 4}

    Returns
    -------
    float32 ndarray, shape (3, 3, nx, ny, nz)
        (rad/Å)²; NaN where a gradient is undefined.
    """
    samples = [_v.complex3d(s_, f"samples[{k}]") for k, s_ in enumerate(samples)]
    need = 1 if center is not None else 2
    if len(samples) < need:
        raise InputError(f"samples: expected at least {need} reconstructions, got {len(samples)}")
    shape = samples[0].shape
    support = _v.mask_of_shape(support, shape)
    vs = _v.voxel_size(voxel_size)
    for k, a in enumerate(samples):
        if a.shape != shape:
            raise InputError(f"samples[{k}]: grid shape {a.shape} differs from samples[0] {shape}")
    grads = np.stack([phase_gradient(a, vs, support, order=order) for a in samples]).astype(np.float64)
    if center is not None:
        ref = phase_gradient(_v.complex3d(center, "center"), vs, support, order=order).astype(np.float64)
        dev = grads - ref[None]
        ddof = 0
    else:
        dev = grads - np.mean(grads, axis=0, keepdims=True)
        ddof = 1
    # a 2π slip of the two-voxel difference moves ∂φ by π/h: fold differences into ±π/(2h)
    lim = (np.pi / (2 * vs)).reshape(1, 3, 1, 1, 1)
    dev = (dev + lim) % (2 * lim) - lim
    cov = np.einsum("sa...,sb...->ab...", dev, dev) / (len(samples) - ddof)
    return cov.astype(np.float32)


def phase_ramp(gradient, mask, weights=None):
    """Mean phase gradient (rad/Å, 3-vector) over ``mask``, weighted.

    This is the phase ramp of the reconstruction: the uniform part of ∇φ,
    i.e. −Dᵀ_mean·G for the mean displacement gradient relative to the
    lattice whose G was used.
    """
    gradient = np.asarray(gradient)
    mask = np.asarray(mask, bool) & np.all(np.isfinite(gradient), axis=0)
    if not mask.any():
        raise InputError("phase_ramp: no voxel with a finite phase gradient inside the mask")
    w = np.ones(mask.sum()) if weights is None else np.asarray(weights, float)[mask]
    return np.array([np.sum(w * gradient[k][mask]) / np.sum(w) for k in range(3)], dtype=float)


# --------------------------------------------------------------------------
# unwrapped phase and displacement
# --------------------------------------------------------------------------

def reference_voxel(obj, support):
    """Index of the support voxel nearest the amplitude-weighted centre of mass.

    Returns
    -------
    tuple of 3 int
    """
    obj = _v.complex3d(obj)
    support = _v.mask_of_shape(support, obj.shape)
    if not support.any():
        raise InputError("support: empty; expected at least one crystal voxel")
    amp = np.where(support, np.abs(obj), 0).astype(float)
    if amp.sum() == 0:
        amp = support.astype(float)
    com = np.array(ndi.center_of_mass(amp))
    idx = np.argwhere(support)
    best = idx[np.argmin(np.sum((idx - com) ** 2, axis=1))]
    return tuple(int(v) for v in best)


def unwrapped_phase(obj, support=None, reference=None):
    """Unwrapped phase inside the support, zero at the reference voxel.

    3-D unwrapping by scikit-image's ``unwrap_phase`` on a masked array
    (Herráez et al., Appl. Opt. 41, 7437, 2002, and its 3-D extension by
    Abdul-Rahman et al., Appl. Opt. 46, 6623, 2007), offset so that the
    phase is zero at the reference voxel.

    Parameters
    ----------
    obj : complex ndarray
    support : bool ndarray, optional
    reference : tuple of 3 int, optional
        Reference voxel (default: :func:`reference_voxel`, the support voxel
        nearest the centre of mass).

    Returns
    -------
    phase : float64 ndarray
        rad; NaN outside the support and in parts of the support not
        face-connected to the reference voxel (their 2π offset is unknown).
    reference : tuple of 3 int
    """
    from skimage.restoration import unwrap_phase

    obj = _v.complex3d(obj)
    support = default_support(obj) if support is None else _v.mask_of_shape(support, obj.shape)
    if reference is None:
        reference = reference_voxel(obj, support)
    reference = tuple(int(v) for v in reference)
    if len(reference) != 3 or not all(0 <= r < n for r, n in zip(reference, obj.shape)) or not support[reference]:
        raise InputError(f"reference: expected the index of a support voxel, got {reference!r}")
    labels, _ = ndi.label(support)
    connected = labels == labels[reference]
    wrapped = np.angle(obj).astype(float)
    un = unwrap_phase(np.ma.array(wrapped, mask=~connected))
    phase = np.ma.filled(un.astype(float), np.nan)
    phase = phase - phase[reference]
    phase[~connected] = np.nan
    return phase, reference


def displacement_along_g(obj, g_vector, voxel_size, support=None, *, remove_ramp=False,
                         reference=None, amplitude_threshold=GRADIENT_AMPLITUDE_THRESHOLD):
    """Displacement along G, u_G = −φ/|G| (Å), from the unwrapped phase.

    Parameters
    ----------
    obj : complex ndarray, shape (nx, ny, nz)
    g_vector : 3 floats
        G in the sample frame, Å⁻¹ (2π included).
    voxel_size : float or 3 floats, Å
    support : bool ndarray, optional
    remove_ramp : bool
        False (default): keep the phase ramp, i.e. the uniform strain and
        rotation relative to the lattice whose G was used. True: subtract
        the amplitude-weighted mean phase gradient over the trusted voxels,
        so that u_G shows only the non-uniform part.
    reference : tuple of 3 int, optional
        Voxel where u_G = 0 (default: nearest the centre of mass).

    Returns
    -------
    float32 ndarray
        u_G in Å; NaN outside the support and where unwrapping failed.
    """
    obj = _v.complex3d(obj)
    g = _v.g_vector(g_vector)
    vs = _v.voxel_size(voxel_size)
    support = default_support(obj) if support is None else _v.mask_of_shape(support, obj.shape)
    phase, reference = unwrapped_phase(obj, support, reference)
    if remove_ramp:
        grad = phase_gradient(obj, vs, support)
        trusted = trusted_for_gradients(obj, support, amplitude_threshold)
        if not trusted.any():
            trusted = support
        ramp = phase_ramp(grad, trusted, np.abs(obj))
        idx = np.indices(obj.shape, dtype=float)
        pos = [(idx[k] - reference[k]) * vs[k] for k in range(3)]
        phase = phase - sum(ramp[k] * pos[k] for k in range(3))
    return (-phase / np.linalg.norm(g)).astype(np.float32)


# --------------------------------------------------------------------------
# strain along G
# --------------------------------------------------------------------------

def across_directions(g_vector):
    """Two unit vectors t₁, t₂ perpendicular to G, with (ĝ, t₁, t₂) right-handed.

    t₁ = ẑ × ĝ normalised (or x̂ × ĝ when G ∥ z), t₂ = ĝ × t₁.

    Returns
    -------
    (2, 3) float ndarray
    """
    g = _v.g_vector(g_vector)
    gh = g / np.linalg.norm(g)
    ref = np.array([0.0, 0.0, 1.0]) if abs(gh[2]) < 0.9 else np.array([1.0, 0.0, 0.0])
    t1 = np.cross(ref, gh)
    t1 /= np.linalg.norm(t1)
    t2 = np.cross(gh, t1)
    return np.stack([t1, t2])


def strain_along_g(gradient, g_vector):
    """Strain along G and the two gradient components across it.

    With u_G = −φ/|G|: ε_GG = ∂u_G/∂x_G = −ĝ·∇φ/|G| (= ĝᵀ ε ĝ) and
    ∂u_G/∂t = −t·∇φ/|G| for the directions t of :func:`across_directions`
    (= ĝᵀ D t, the tilt of the planes of G towards t, radians).

    Parameters
    ----------
    gradient : (3, ...) array
        ∇φ in rad/Å (from :func:`phase_gradient`).
    g_vector : 3 floats, Å⁻¹

    Returns
    -------
    strain : float32 ndarray, shape grid
    across : float32 ndarray, shape (2, *grid)
    """
    g = _v.g_vector(g_vector)
    grad = np.asarray(gradient, dtype=float)
    if grad.shape[0] != 3:
        raise InputError(f"gradient: expected shape (3, ...), got {grad.shape}")
    gn = np.linalg.norm(g)
    gh = g / gn
    strain = -np.tensordot(gh, grad, axes=1) / gn
    across = -np.tensordot(across_directions(g), grad, axes=1) / gn
    return strain.astype(np.float32), across.astype(np.float32)


@dataclass
class ReflectionField:
    """Fields of one reflection on its sample-frame grid.

    Attributes
    ----------
    phase_gradient : float32 (3, nx, ny, nz)
        ∇φ, rad/Å; NaN outside the support.
    displacement : float32 (nx, ny, nz)
        u_G = −φ/|G|, Å; zero at ``reference``; NaN outside the support and
        where unwrapping failed.
    strain : float32 (nx, ny, nz)
        ε_GG = ∂u_G/∂x_G (dimensionless, tensile positive).
    across : float32 (2, nx, ny, nz)
        ∂u_G/∂t₁ and ∂u_G/∂t₂ for ``across_directions`` (radians).
    across_directions : (2, 3) float
    trusted : bool (nx, ny, nz)
        Support eroded by one voxel with amplitude above the threshold.
    support : bool (nx, ny, nz)
    ramp : (3,) float
        Mean phase gradient over the trusted voxels, rad/Å (removed from
        ``displacement`` when asked, never from the gradients).
    reference : tuple of 3 int
    g_vector : (3,) float, Å⁻¹
    voxel_size : (3,) float, Å
    """

    phase_gradient: np.ndarray
    displacement: np.ndarray
    strain: np.ndarray
    across: np.ndarray
    across_directions: np.ndarray
    trusted: np.ndarray
    support: np.ndarray
    ramp: np.ndarray
    reference: tuple
    g_vector: np.ndarray
    voxel_size: np.ndarray


def reflection_field(obj, g_vector=None, voxel_size=None, support=None, *, remove_ramp=False,
                     amplitude_threshold=GRADIENT_AMPLITUDE_THRESHOLD, order=2, smooth=0.0):
    """All fields of one reflection (see :class:`ReflectionField`).

    ``obj`` may be a :class:`~braggstrain.strain.objects.SampleObject`, whose G,
    voxel size and support are then used unless given here.
    """
    if isinstance(obj, SampleObject):
        g_vector = obj.g_vector if g_vector is None else g_vector
        voxel_size = obj.voxel_size if voxel_size is None else voxel_size
        support = obj.support if support is None else support
        obj = obj.obj
    if g_vector is None or voxel_size is None:
        raise InputError("reflection_field: g_vector and voxel_size are required for a plain array")
    obj = _v.complex3d(obj)
    g = _v.g_vector(g_vector)
    vs = _v.voxel_size(voxel_size)
    support = default_support(obj) if support is None else _v.mask_of_shape(support, obj.shape)
    grad = phase_gradient(obj, vs, support, order=order, smooth=smooth)
    trusted = trusted_for_gradients(obj, support, amplitude_threshold) & np.all(np.isfinite(grad), axis=0)
    ramp = phase_ramp(grad, trusted if trusted.any() else support, np.abs(obj))
    phase, ref = unwrapped_phase(obj, support)
    if remove_ramp:
        idx = np.indices(obj.shape, dtype=float)
        phase = phase - sum(ramp[k] * (idx[k] - ref[k]) * vs[k] for k in range(3))
    disp = (-phase / np.linalg.norm(g)).astype(np.float32)
    strain, across = strain_along_g(grad, g)
    return ReflectionField(grad, disp, strain, across, across_directions(g), trusted, support,
                           ramp, ref, g, vs)
