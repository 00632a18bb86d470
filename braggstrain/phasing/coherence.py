"""Partial coherence: the measured intensity as |Psi|^2 convolved with a kernel.

Following Clark et al., Nat. Commun. 3, 993 (2012), the measured intensity is
modelled as I_p = |Psi|^2 (*) gamma, gamma a small non-negative kernel of unit
sum (the Fourier transform of the beam's complex coherence function), and
gamma is estimated during the run by Richardson-Lucy deconvolution with the
current coherent intensity |Psi|^2 as the "image":

    gamma <- gamma * [ |Psi|^2(-q) (*) (I / (|Psi|^2 (*) gamma)) ] / sum |Psi|^2

(Richardson, J. Opt. Soc. Am. 62, 55 (1972); Lucy, Astron. J. 79, 745
(1974)).  Arrays are in FFT order (q = 0 at index 0), so the kernel lives at
indices -w..w modulo N on each axis.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.fft

from braggstrain.errors import InputError

#: The value of ``coherence`` that chooses the model per reflection.
AUTO = "auto"

__all__ = ["AUTO", "CoherenceSettings", "choose_model", "kernel_covariance", "kernel_in_q",
           "coherence_disagreements", "CoherenceModel", "kernel_sigma", "kernel_principal_widths",
           "gaussian_kernel"]


@dataclass(frozen=True)
class CoherenceSettings:
    """Settings of the partial-coherence model.

    Parameters
    ----------
    half_width : int
        The kernel spans (2 w + 1)^3 voxels of reciprocal space.
    initial_sigma : float
        Width (voxels) of the Gaussian the kernel starts from at its first
        update (the kernel is a delta before); Richardson-Lucy is
        multiplicative, so voxels where the kernel starts at zero stay zero.
    start : int
        First iteration of the run at which the kernel is updated (a coherent
        estimate forms first).
    rl_iterations : int
        Richardson-Lucy iterations per kernel update.
    symmetric : bool
        Impose gamma(q) = gamma(-q) after each update (the coherence function
        of a beam with a real, even mutual coherence; common practice, no
        source).
    choose : bool
        (:func:`~braggstrain.phasing.ensemble` only) Run the random starts
        without the model and half as many more with it, and keep the model
        whose best run explains the held-out voxels clearly better (see
        :func:`choose_model`); ``coherence = "auto"`` sets it.
    """

    half_width: int = 4
    initial_sigma: float = 1.0
    start: int = 100
    rl_iterations: int = 10
    symmetric: bool = True

    choose: bool = False

    @classmethod
    def from_value(cls, value):
        """None/False -> None; True -> defaults; ``"auto"`` -> defaults chosen per
        ensemble; dict or CoherenceSettings -> settings."""
        if value is None or value is False:
            return None
        if value is True:
            return cls()
        if isinstance(value, str) and value.lower() == AUTO:
            return cls(choose=True)
        if isinstance(value, cls):
            return value
        if isinstance(value, dict):
            allowed = {"half_width", "initial_sigma", "start", "rl_iterations", "symmetric", "choose"}
            bad = set(value) - allowed
            if bad:
                raise InputError(f"coherence: unknown key(s) {sorted(bad)}; known: {sorted(allowed)}")
            s = cls(**value)
            if not isinstance(s.choose, bool):
                raise InputError(f"coherence.choose: expected true or false, got {s.choose!r}")
            if not (isinstance(s.half_width, int) and 1 <= s.half_width <= 16):
                raise InputError(f"coherence.half_width: expected an integer in 1..16, got {s.half_width!r}")
            if not (isinstance(s.rl_iterations, int) and s.rl_iterations >= 1):
                raise InputError(f"coherence.rl_iterations: expected a positive integer, "
                                 f"got {s.rl_iterations!r}")
            if not (isinstance(s.start, int) and s.start >= 0):
                raise InputError(f"coherence.start: expected an integer >= 0, got {s.start!r}")
            if not (isinstance(s.initial_sigma, (int, float)) and 0 < s.initial_sigma <= s.half_width):
                raise InputError(f"coherence.initial_sigma: expected a width in (0, half_width] "
                                 f"voxels, got {s.initial_sigma!r}")
            return s
        raise InputError(f"coherence: expected true, false, \"{AUTO}\" or a table of settings, "
                         f"got {value!r}")


def gaussian_kernel(sigma, half_width):
    """Normalised 3-D Gaussian of widths ``sigma`` (voxels) on a (2w+1)^3 grid."""
    sig = np.broadcast_to(np.asarray(sigma, dtype=float), (3,))
    d = np.arange(-half_width, half_width + 1, dtype=float)
    g = [np.exp(-0.5 * (d / s) ** 2) if s > 0 else (d == 0).astype(float) for s in sig]
    k = g[0][:, None, None] * g[1][None, :, None] * g[2][None, None, :]
    return k / k.sum()


def kernel_sigma(kernel):
    """Standard deviation (voxels) of a kernel along each axis, from its second moments."""
    k = np.asarray(kernel, dtype=float)
    k = k / k.sum()
    out = []
    for axis, n in enumerate(k.shape):
        d = np.arange(n) - n // 2
        marg = k.sum(axis=tuple(a for a in range(3) if a != axis))
        mean = (marg * d).sum()
        out.append(float(np.sqrt(max((marg * (d - mean) ** 2).sum(), 0.0))))
    return np.asarray(out)


def kernel_principal_widths(kernel):
    """Widths of a kernel along its principal axes, from its covariance matrix.

    The covariance C = sum k(q) (q - m)(q - m)^T of the normalised kernel
    (m its mean) is diagonalised, C = V diag(w^2) V^T; for a Gaussian
    exp(-q^T C^-1 q / 2) the covariance is C itself (the definition of the
    multivariate normal, e.g. Bishop, Pattern Recognition and Machine
    Learning, 2006, section 2.3), so w are its standard deviations along
    the axes V whatever their orientation in the array.

    Parameters
    ----------
    kernel : ndarray (k0, k1, k2)
        Non-negative kernel, centred at index k//2 on each axis.

    Returns
    -------
    widths : ndarray (3,)
        Standard deviations along the principal axes, largest first, in
        voxels of the grid the kernel lives on.
    axes : ndarray (3, 3)
        Unit vectors of the principal axes as columns (``axes[:, i]`` goes
        with ``widths[i]``), components along array axes 0, 1, 2; the sign
        of each is chosen so that its largest component is positive.
    """
    return _principal(kernel_covariance(kernel))


def kernel_covariance(kernel):
    """Covariance matrix (voxels², array axes) of a non-negative kernel centred
    at index k//2: C = sum k(q) (q - m)(q - m)^T over the normalised kernel."""
    k = np.asarray(kernel, dtype=float)
    if k.ndim != 3 or not np.all(np.isfinite(k)) or k.sum() <= 0 or np.any(k < 0):
        raise InputError(f"kernel: expected a non-negative 3-D array with a positive sum, "
                         f"got shape {k.shape}")
    k = k / k.sum()
    grids = np.meshgrid(*[np.arange(n) - n // 2 for n in k.shape], indexing="ij")
    d = np.stack([g.ravel() for g in grids]).astype(float)  # (3, N)
    w = k.ravel()
    mean = d @ w
    d = d - mean[:, None]
    return (d * w) @ d.T


def _principal(cov):
    """Standard deviations (largest first) and unit axes (columns, largest
    component positive) of a covariance matrix."""
    vals, vecs = np.linalg.eigh(cov)
    order = np.argsort(vals)[::-1]
    vals = np.clip(vals[order], 0.0, None)
    vecs = vecs[:, order]
    for i in range(3):
        if vecs[np.argmax(np.abs(vecs[:, i])), i] < 0:
            vecs[:, i] = -vecs[:, i]
    return np.sqrt(vals), vecs


class CoherenceModel:
    """The coherence kernel of one run and the convolutions it needs.

    Parameters
    ----------
    shape : tuple of 3 int
        Shape of the data (FFT order).
    settings : CoherenceSettings
    threads : int
        Workers for ``scipy.fft``.
    """

    def __init__(self, shape, settings, threads=1):
        self.shape = tuple(shape)
        self.settings = settings
        self.threads = threads
        w = settings.half_width
        if any(2 * w + 1 > n for n in self.shape):
            raise InputError(f"coherence.half_width: {w} needs arrays of at least {2 * w + 1} "
                             f"voxels per axis, got {self.shape}")
        self.kernel = np.zeros((2 * w + 1,) * 3)
        self.kernel[w, w, w] = 1.0
        self.is_delta = True
        self._idx = np.ix_(*[np.arange(-w, w + 1) % n for n in self.shape])
        self._khat = None

    def _embed(self):
        full = np.zeros(self.shape, dtype=np.float32)
        full[self._idx] = self.kernel
        return scipy.fft.rfftn(full, workers=self.threads)

    def blur(self, model):
        """Convolve ``model`` (float32, FFT order, flat or 3-D) with the kernel, in place.

        Every term of the convolution of a non-negative ``model`` with the
        non-negative kernel is >= 0, so the result is at least the kernel's
        centre k(0) times ``model``; the result is held to that bound.  The
        FFT's rounding (about 1e-7 of the largest value in float32) would
        otherwise leave zeros or negative values where the model is weak, and
        a modulus step dividing by the blurred model there sends the iterate
        to infinity; with the bound, |psi| / sqrt(blurred) <= 1 / sqrt(k(0)).
        """
        if self.is_delta:
            return model
        if self._khat is None:
            self._khat = self._embed()
        w = self.settings.half_width
        m3 = model.reshape(self.shape)
        floor = m3 * np.float32(self.kernel[w, w, w])
        m3[...] = scipy.fft.irfftn(scipy.fft.rfftn(m3, workers=self.threads) * self._khat,
                                   s=self.shape, workers=self.threads)
        np.maximum(m3, floor, out=m3)
        return model

    def update(self, coherent, intensity, measured, background=0.0):
        """Richardson-Lucy refinement of the kernel.

        Parameters
        ----------
        coherent : float32 array
            |Psi|^2 of the current iterate (FFT order), not modified.
        intensity : float32 array
            Measured intensity (FFT order).
        measured : bool array
            True where the voxel is constrained; elsewhere the ratio is 1 and
            does not move the kernel.
        background : float
            Flat background per voxel added to the model.
        """
        c3 = np.asarray(coherent, dtype=np.float32).reshape(self.shape)
        i3 = np.asarray(intensity, dtype=np.float32).reshape(self.shape)
        m3 = np.asarray(measured, dtype=bool).reshape(self.shape)
        chat = scipy.fft.rfftn(c3, workers=self.threads)
        total = float(c3.sum(dtype=np.float64))
        if total <= 0:
            return
        k = self.kernel
        if self.is_delta:
            k = gaussian_kernel(self.settings.initial_sigma, self.settings.half_width)
        for _ in range(self.settings.rl_iterations):
            full = np.zeros(self.shape, dtype=np.float32)
            full[self._idx] = k
            pred = scipy.fft.irfftn(chat * scipy.fft.rfftn(full, workers=self.threads),
                                    s=self.shape, workers=self.threads) + background
            ratio = np.ones(self.shape, dtype=np.float32)
            good = m3 & (pred > 1e-12 * pred.max())
            ratio[good] = i3[good] / pred[good]
            corr = scipy.fft.irfftn(np.conj(chat) * scipy.fft.rfftn(ratio, workers=self.threads),
                                    s=self.shape, workers=self.threads)
            k = k * np.maximum(corr[self._idx], 0) / total
            if self.settings.symmetric:
                k = 0.5 * (k + k[::-1, ::-1, ::-1])
            s = k.sum()
            if not np.isfinite(s) or s <= 0:
                return  # keep the previous kernel rather than a broken one
            k = k / s
        self.kernel = k
        self.is_delta = False
        self._khat = None

    @property
    def sigma(self):
        """Kernel width (standard deviation, voxels) along each axis."""
        return kernel_sigma(self.kernel)


#: The partial-coherence model is chosen only when its best run's free negative
#: log-likelihood per held-out voxel is below the coherent model's best by more
#: than this fraction of the coherent one (common practice, no source; measured
#: in docs/phasing.md, "Choosing the model").
CHOICE_MARGIN = 0.3


def choose_model(coherent_best, partial_best, margin=CHOICE_MARGIN):
    """``"partial"`` or ``"coherent"``: the model that explains held-out voxels better.

    Parameters
    ----------
    coherent_best, partial_best : float
        The lowest free negative log-likelihood per held-out voxel (or, with no
        held-out voxels, per measured voxel) among the successful runs of each
        model; NaN when the model has no successful run.
    margin : float
        The partial model must be lower by more than ``margin`` times the
        coherent one: the extra freedom of a kernel must buy a clear gain.

    The held-out voxels never enter the modulus constraint, so their
    likelihood compares models of different freedom fairly (Thibault &
    Guizar-Sicairos, New J. Phys. 14, 063004 (2012), who use it to detect
    overfitting).
    """
    c, p = float(coherent_best), float(partial_best)
    if not np.isfinite(p):
        return "coherent"
    if not np.isfinite(c):
        return "partial"
    return "partial" if p < c - margin * abs(c) else "coherent"


def kernel_in_q(kernel, q_basis, spread=None):
    """A kernel estimated on a reciprocal grid, in Å⁻¹ and as coherence lengths.

    The kernel's covariance in array axes, C (voxels²), becomes
    C_q = B C B^T in the frame of ``q_basis`` (the covariance of a linear map
    of a random vector), whose eigen-decomposition gives the widths σ_q
    (standard deviations, Å⁻¹) along its principal axes.  A Gaussian kernel
    exp(-q^T C_q^-1 q / 2) is the Fourier transform of the Gaussian degree
    of coherence exp(-r^T C_q r / 2) across the sample (the Fourier pair of
    Gaussians, e.g. Bracewell, The Fourier Transform and Its Applications,
    3rd ed., and Clark et al., Nat. Commun. 3, 993 (2012), for the
    measured intensity as the coherent one convolved with that transform),
    so along the same axes the coherence length, the standard deviation of
    the degree of coherence, is ξ = 1/σ_q.  For a kernel that is not a
    Gaussian these are the widths of the Gaussian of the same covariance.

    Parameters
    ----------
    kernel : ndarray (k0, k1, k2)
        Non-negative kernel, centred at index k//2, axes those of the array
        it was estimated on.
    q_basis : (3, 3) float
        Q change per index step along each array axis (columns), Å⁻¹ (2π
        included), in the frame the widths are wanted in (the sample frame).
    spread : (3,) float, optional
        Spread (standard deviation over runs) of the principal widths in
        voxels, converted with the same scale as each width.

    Returns
    -------
    dict
        ``widths`` (3,) Å⁻¹ largest first, ``axes`` (3, 3) unit vectors as
        columns in the frame of ``q_basis``, ``lengths`` (3,) Å (1/widths,
        inf for a zero width: no blur resolved), ``spread`` (3,) Å⁻¹ or None,
        ``widths_voxels`` (3,) (principal widths in voxels of the grid).
    """
    B = np.asarray(q_basis, dtype=float)
    if B.shape != (3, 3) or not np.all(np.isfinite(B)) or abs(np.linalg.det(B)) <= 0:
        raise InputError(f"q_basis: expected an invertible 3x3 matrix of Å⁻¹ per index step, got {B!r}")
    cov = kernel_covariance(kernel)
    widths, axes = _principal(B @ cov @ B.T)
    w_vox = _principal(cov)[0]
    with np.errstate(divide="ignore"):
        lengths = np.where(widths > 0, 1.0 / np.where(widths > 0, widths, 1.0), np.inf)
    out = {"widths": widths, "axes": axes, "lengths": lengths, "widths_voxels": w_vox, "spread": None}
    if spread is not None:
        step = float(np.prod(np.linalg.norm(B, axis=0)) ** (1 / 3))  # Å⁻¹ per voxel, geometric mean
        sv = np.asarray(spread, float).reshape(3)
        scale = np.where(w_vox > 0, widths / np.where(w_vox > 0, w_vox, 1.0), step)
        out["spread"] = sv * scale
    return out


#: Two reflections' coherence widths agree when they differ by at most this many
#: times their combined spread (common practice, no source) ...
DISAGREEMENT_SIGMAS = 3.0
#: ... with a spread never taken below this fraction of a voxel of the
#: reciprocal grid (what one Richardson-Lucy estimate resolves; common
#: practice, no source).
WIDTH_FLOOR_VOXELS = 0.1


def coherence_disagreements(widths, spreads, floors):
    """Reflections whose coherence widths disagree with the others' beyond the spread.

    Parameters
    ----------
    widths : (R, 3) float
        Principal widths of each reflection's kernel, Å⁻¹, largest first.
    spreads : (R, 3) float
        Their spreads (standard deviation over the kept runs), Å⁻¹.
    floors : (R,) float
        The smallest spread to assume per reflection, Å⁻¹
        (``WIDTH_FLOOR_VOXELS`` of its q step).

    Returns
    -------
    list of str
        One message per reflection, empty when it agrees: a width differs from
        the median of the reflections by more than ``DISAGREEMENT_SIGMAS``
        times the root sum of squares of its spread and the spread of the
        median (the median absolute deviation scaled to a standard deviation,
        1.4826 MAD, for Gaussian data: Rousseeuw & Croux, JASA 88, 1273
        (1993)).  With fewer than three reflections no median is robust and
        every message is empty.
    """
    w = np.asarray(widths, float).reshape(-1, 3)
    s = np.maximum(np.asarray(spreads, float).reshape(-1, 3), np.asarray(floors, float).reshape(-1, 1))
    out = [""] * len(w)
    if len(w) < 3:
        return out
    med = np.median(w, axis=0)
    mad = 1.4826 * np.median(np.abs(w - med), axis=0)
    for j in range(len(w)):
        tol = DISAGREEMENT_SIGMAS * np.sqrt(s[j] ** 2 + np.maximum(mad, np.median(s, axis=0)) ** 2)
        bad = np.abs(w[j] - med) > tol
        if bad.any():
            i = int(np.argmax(np.abs(w[j] - med) / tol))
            out[j] = (f"principal width {i + 1} is {w[j, i]:.3g} Å⁻¹ against a median of {med[i]:.3g} "
                      f"over the reflections (tolerance {tol[i]:.2g} Å⁻¹, {DISAGREEMENT_SIGMAS:g}× the "
                      f"combined spread)")
    return out
