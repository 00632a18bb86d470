"""Support of the object: initial estimate, shrink-wrap, health checks.

All arrays here are in FFT order (origin at index 0) unless a function says
otherwise; the engine converts at its edges.
"""

from __future__ import annotations

import numpy as np
import scipy.fft
import scipy.ndimage

from braggstrain.phasing import kernels as _k

__all__ = [
    "autocorrelation",
    "autocorrelation_support",
    "shrinkwrap",
    "gaussian_transfer",
    "support_health",
    "dilate_periodic",
]


def fill_unmeasured(intensity_fft, measured, sigma=1.5):
    """Intensity with unmeasured voxels filled by normalised convolution.

    Each unmeasured voxel takes the Gaussian-weighted mean (width ``sigma``
    voxels, periodic) of the measured voxels around it: a smooth guess that
    keeps a detector gap from printing its own pattern on the
    autocorrelation (Knutsson & Westin, CVPR 1993, normalised convolution).
    """
    data = np.asarray(intensity_fft, dtype=np.float32)
    if measured is None or measured.all():
        return data
    w = measured.astype(np.float32)
    num = scipy.ndimage.gaussian_filter(np.where(measured, data, 0), sigma, mode="wrap")
    den = scipy.ndimage.gaussian_filter(w, sigma, mode="wrap")
    guess = np.where(den > 1e-3, num / np.maximum(den, 1e-3), 0).astype(np.float32)
    return np.where(measured, data, guess)


def autocorrelation(intensity_fft, measured=None, threads=1):
    """|F^-1 I|, the modulus of the object's autocorrelation (origin at index 0).

    Unmeasured voxels are filled in with :func:`fill_unmeasured` first.  A
    flat background and the Poisson noise of the counts add a spike at the
    origin only (the transform of a constant, and of white noise on
    average), so the origin takes the largest value of its six neighbours:
    thresholds relative to the maximum then refer to the crystal.
    """
    data = fill_unmeasured(intensity_fft, measured)
    ac = scipy.fft.ifftn(data, workers=threads, overwrite_x=True)  # complex64 for float32 input
    ac = np.abs(ac).astype(np.float32, copy=False)
    if ac.ndim == 3 and min(ac.shape) > 2:
        ac[0, 0, 0] = max(ac[1, 0, 0], ac[-1, 0, 0], ac[0, 1, 0], ac[0, -1, 0],
                          ac[0, 0, 1], ac[0, 0, -1])
    return ac


def autocorrelation_support(intensity_fft, measured=None, threshold=0.04, threads=1, ac=None):
    """Initial support: the autocorrelation thresholded at a fraction of its maximum.

    The autocorrelation of a compact object is supported on the object's
    difference set (twice its size), so it is a loose support containing a
    translate of the object; shrink-wrap then tightens it (common practice;
    Marchesini et al., Phys. Rev. B 68, 140101 (2003) start the same way).

    Parameters
    ----------
    intensity_fft : ndarray
        Intensity in FFT order (peak at index 0).
    measured : ndarray of bool, optional
        False where a voxel is not measured.
    threshold : float
        Fraction of the maximum (at the origin) of the autocorrelation.

    ac : ndarray, optional
        The autocorrelation if already computed (:func:`autocorrelation`).

    Returns
    -------
    ndarray of bool
        Support in FFT order.
    """
    if ac is None:
        ac = autocorrelation(intensity_fft, measured, threads)
    return ac >= np.float32(threshold) * ac.max()


def gaussian_transfer(n, sigma):
    """Transfer function of a periodic Gaussian blur of width ``sigma`` voxels along n.

    The Fourier transform of exp(-x^2 / (2 sigma^2)) is proportional to
    exp(-2 pi^2 sigma^2 f^2), f in cycles per voxel (any table of Fourier
    pairs, e.g. Bracewell, The Fourier Transform and Its Applications, 3rd ed.).
    """
    f = np.fft.fftfreq(n)
    return np.exp(-2.0 * np.pi ** 2 * sigma ** 2 * f ** 2).astype(np.float32)


def shrinkwrap(x, support, fft, sigma, threshold):
    """Shrink-wrap update of ``support`` in place (Marchesini et al. 2003).

    S <- {r : (g_sigma * |x S|)(r) >= threshold * max}.  The blur is done by
    real-to-complex FFT in the backend's real work arrays, so the complex
    work buffer is left as it is.

    Parameters
    ----------
    x : complex64 (N,) flat iterate, FFT order.
    support : bool (N,) flat support, updated in place.
    fft : FFTBackend
    sigma : float or sequence of 3 floats, blur width in voxels.
    threshold : float, fraction of the maximum.

    Returns
    -------
    int
        New support size in voxels.
    """
    real = fft.real_buffer
    flat = real.reshape(-1)
    _k.masked_magnitude(x, support, flat)
    fft.real_forward()
    sig = np.broadcast_to(np.asarray(sigma, dtype=float), (3,))
    shape = real.shape
    g = [gaussian_transfer(shape[0], sig[0]), gaussian_transfer(shape[1], sig[1]),
         half_gaussian_transfer(shape[2], sig[2])]
    g[0] = g[0] / np.float32(fft.size)
    _k.gaussian_multiply(fft.half_buffer, g[0], g[1], g[2])
    fft.real_backward()
    return int(_k.threshold_real(flat, float(threshold), support))


def half_gaussian_transfer(n, sigma):
    """:func:`gaussian_transfer` on the n//2 + 1 frequencies of a real FFT."""
    f = np.fft.rfftfreq(n)
    return np.exp(-2.0 * np.pi ** 2 * sigma ** 2 * f ** 2).astype(np.float32)


def support_health(size, initial_size, total, min_voxels=27, collapse_ratio=1 / 64,
                   max_fraction=0.5):
    """Classify a support size: ``"ok"``, ``"support collapsed"`` or ``"support exploded"``.

    Collapsed: fewer than ``min_voxels`` voxels or less than ``collapse_ratio``
    of the initial support.  Exploded: more than ``max_fraction`` of the
    array, which no longer leaves the oversampling phase retrieval needs
    (sigma >= 2 per axis means at most 1/8 of the volume; half the array is
    far beyond that).  Thresholds are common practice, no source.
    """
    if size < max(min_voxels, collapse_ratio * initial_size):
        return "support collapsed"
    if size > max_fraction * total:
        return "support exploded"
    return "ok"


def dilate_periodic(support, shape, voxels):
    """Grow a flat support (FFT order) by ``voxels`` 6-connected steps, in place.

    The array is periodic (a crystal at the origin of FFT order spans the
    corners), so the dilation wraps around like ``scipy.ndimage`` with
    ``mode="wrap"``.  Returns the new size in voxels.
    """
    s3 = support.reshape(shape)
    for _ in range(int(voxels)):
        grown = s3.copy()
        for axis in range(3):
            grown |= np.roll(s3, 1, axis=axis)
            grown |= np.roll(s3, -1, axis=axis)
        s3[...] = grown
    return int(support.sum())
