"""Fused element-wise passes of the phasing loop (numba kernels).

Every kernel works in place on flat (1-D) views of C-contiguous arrays, so
each compiles once per dtype set; all are cached on disk (``cache=True``).
One iteration of ER, HIO or RAAR costs two passes over the data besides the
two FFTs:

1. :func:`modulus_step` (or :func:`modulus_step_model` under partial
   coherence or a background): the modulus projection in reciprocal space,
   with the ``1/N`` of the inverse FFT folded in, and the amplitude misfit
   summed on the way;
2. :func:`support_step`: the real-space update of ER, HIO or RAAR, which also
   copies the new iterate into the FFT buffer for the next forward transform.

The measured amplitude ``amp`` has the mask and the free set folded in:

- ``amp >= 0``: a constrained voxel of measured amplitude ``amp = sqrt(I)``;
- ``amp == -1`` (any value in [-1.5, 0)): not measured (detector gap, hot
  pixel, beam stop);
- ``amp <= -2``: held out for the free log-likelihood, with measured
  amplitude ``-2 - amp`` (see :func:`encode_free`).

The modulus projection leaves the last two kinds free (only the ``1/N``
scale is applied), and the free misfit is summed in the same pass.

Formulas (docs/methods.md; Fienup, Appl. Opt. 21, 2758 (1982); Luke, Inverse
Problems 21, 37 (2005)), with ``p = P_M x`` the modulus-projected iterate and
``S`` the support:

- ER:   x <- p on S, 0 off S;
- HIO:  x <- p on S, x - beta p off S;
- RAAR: x <- p on S, beta x + (1 - 2 beta) p off S, which is
  [beta/2 (R_S R_M + I) + (1 - beta) P_M] x written out per voxel.
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit, prange

__all__ = [
    "ALGORITHM_CODES",
    "modulus_step",
    "modulus_step_model",
    "support_step",
    "intensity_of",
    "poisson_sum_field",
    "poisson_sum_model",
    "masked_magnitude",
    "gaussian_multiply",
    "threshold_real",
    "warm_up",
    "encode_free",
    "decode_amplitude",
]

ALGORITHM_CODES = {"ER": 0, "HIO": 1, "RAAR": 2}

# 'reassoc' lets the reductions vectorise; no 'nnan'/'ninf', so a diverging
# run still shows up as a NaN or inf misfit.  Not 'contract', 'arcp' or 'nsz'
# together with it: with all four, the code compiled in one process and the
# code loaded from numba's disk cache in the next rounded differently (the
# same reconstruction, seed and FFTs gave different objects, measured with a
# fresh and a warm NUMBA_CACHE_DIR), and phasing amplifies the last bit.
_FAST = {"reassoc"}
_JIT = dict(parallel=True, cache=True, nogil=True, fastmath=_FAST)
FREE_OFFSET = np.float32(2.0)


def encode_free(amplitude):
    """Folded value of a held-out voxel of measured amplitude ``amplitude``."""
    return -FREE_OFFSET - np.asarray(amplitude, dtype=np.float32)


def decode_amplitude(amp):
    """Measured amplitude of every voxel (constrained or held out); 0 where unmeasured."""
    return np.where(amp >= 0, amp, np.where(amp <= -FREE_OFFSET, -FREE_OFFSET - amp, 0)).astype(
        np.float32)
_TINY = 1e-30


@njit(**_JIT)
def modulus_step(psi, amp, scale):
    """Modulus projection in place: psi <- scale * amp * psi/|psi| where amp >= 0.

    Parameters
    ----------
    psi : complex64 (n,)
        Far field of the iterate (unnormalised forward FFT); overwritten.
    amp : float32 (n,)
        Measured amplitude sqrt(I); negative where the voxel is left free.
    scale : float32
        Factor applied to every voxel (``1/N`` of the following inverse FFT).

    Returns
    -------
    err, free_err : float
        Sums of (|psi| - amp)^2 over the constrained and over the held-out
        voxels.
    """
    err = 0.0
    ferr = 0.0
    for i in prange(psi.size):
        a = amp[i]
        z = psi[i]
        if a < 0:
            if a <= -2.0:
                d = math.sqrt(z.real * z.real + z.imag * z.imag) - (-2.0 - a)
                ferr += d * d
            psi[i] = z * scale
        else:
            m = math.sqrt(z.real * z.real + z.imag * z.imag)
            if m >= 1e-18:
                d = m - a
                err += d * d
                psi[i] = z * np.float32(a * scale / m)
            else:
                # |psi|^2 is subnormal or zero in float32: the modulus in
                # float64 (a rare branch, so every other voxel rounds as before)
                zr = np.float64(z.real)
                zi = np.float64(z.imag)
                m64 = math.sqrt(zr * zr + zi * zi)
                d64 = m64 - a
                err += d64 * d64
                if m64 > 0:
                    psi[i] = np.complex64(complex(zr * (a * scale / m64), zi * (a * scale / m64)))
                else:
                    psi[i] = np.complex64(a * scale)
    return err, ferr


@njit(**_JIT)
def modulus_step_model(psi, amp, model, background, scale):
    """Modulus step against a model intensity: psi <- scale * psi * sqrt(I / (model + b)).

    With ``model = |psi|^2`` and ``b = 0`` this is :func:`modulus_step`; under
    partial coherence ``model`` is ``|psi|^2`` convolved with the coherence
    function (Clark et al., Nat. Commun. 3, 993 (2012)), and ``b`` is the flat
    background per voxel.

    Returns
    -------
    err, free_err : float
        Sums of (sqrt(model + b) - amp)^2 over constrained and held-out voxels.
    """
    err = 0.0
    ferr = 0.0
    for i in prange(psi.size):
        a = amp[i]
        z = psi[i]
        if a < 0:
            if a <= -2.0:
                d = math.sqrt(max(model[i] + background, 0.0)) - (-2.0 - a)
                ferr += d * d
            psi[i] = z * scale
        else:
            m = model[i] + background
            if m > _TINY:
                r = math.sqrt(m)
                d = r - a
                err += d * d
                psi[i] = z * np.float32(a * scale / r)
            else:
                err += a * a
                psi[i] = np.complex64(a * scale)
    return err, ferr


@njit(**_JIT)
def support_step(x, buf, support, code, beta):
    """Real-space update of ER (code 0), HIO (1) or RAAR (2), in place.

    ``buf`` holds ``p = P_M x`` on entry; on exit ``x`` and ``buf`` both hold
    the new iterate (``buf`` is then ready for the next in-place forward FFT).
    """
    c1 = np.float32(beta)
    c2 = np.float32(1.0 - 2.0 * beta)
    for i in prange(x.size):
        p = buf[i]
        if support[i]:
            v = p
        elif code == 0:
            v = np.complex64(0)
        elif code == 1:
            v = x[i] - c1 * p
        else:
            v = c1 * x[i] + c2 * p
        x[i] = v
        buf[i] = v


@njit(**_JIT)
def intensity_of(psi, out):
    """out <- |psi|^2 (float32)."""
    for i in prange(psi.size):
        z = psi[i]
        out[i] = z.real * z.real + z.imag * z.imag


@njit(**_JIT)
def poisson_sum_field(psi, amp, background):
    """Sums of I_c - I ln I_c, I_c = |psi|^2 + b, over constrained and held-out voxels.

    The ln Gamma(I + 1) term of the Poisson negative log-likelihood does not
    depend on the model and is added by the caller.
    """
    s = 0.0
    sf = 0.0
    for i in prange(psi.size):
        a = amp[i]
        if a >= 0:
            z = psi[i]
            ic = max(z.real * z.real + z.imag * z.imag + background, _TINY)
            s += ic - a * a * math.log(ic)
        elif a <= -2.0:
            z = psi[i]
            f = -2.0 - a
            ic = max(z.real * z.real + z.imag * z.imag + background, _TINY)
            sf += ic - f * f * math.log(ic)
    return s, sf


@njit(**_JIT)
def poisson_sum_model(model, amp, background):
    """As :func:`poisson_sum_field` with I_c = model + b."""
    s = 0.0
    sf = 0.0
    for i in prange(model.size):
        a = amp[i]
        if a >= 0:
            ic = max(model[i] + background, _TINY)
            s += ic - a * a * math.log(ic)
        elif a <= -2.0:
            f = -2.0 - a
            ic = max(model[i] + background, _TINY)
            sf += ic - f * f * math.log(ic)
    return s, sf


@njit(**_JIT)
def masked_magnitude(x, support, out):
    """out <- |x| on the support, 0 elsewhere (input of the shrink-wrap blur; float32 out)."""
    for i in prange(x.size):
        if support[i]:
            z = x[i]
            out[i] = math.sqrt(z.real * z.real + z.imag * z.imag)
        else:
            out[i] = 0.0


@njit(**_JIT)
def gaussian_multiply(buf, g0, g1, g2):
    """buf[i, j, k] *= g0[i] g1[j] g2[k] (separable transfer function, 3-D)."""
    n0, n1, n2 = buf.shape
    for i in prange(n0):
        a = g0[i]
        for j in range(n1):
            b = a * g1[j]
            for k in range(n2):
                buf[i, j, k] = buf[i, j, k] * np.float32(b * g2[k])


@njit(**_JIT)
def threshold_real(values, fraction, support):
    """support <- values >= fraction * max(values) (float32 values); returns the support size."""
    top = -np.inf
    for i in prange(values.size):
        top = max(top, values[i])
    level = fraction * top
    count = 0
    for i in prange(values.size):
        inside = values[i] >= level and top > 0
        support[i] = inside
        count += 1 if inside else 0
    return count


def warm_up():
    """Compile (or load from numba's cache) every kernel on tiny arrays."""
    n = 8
    psi = np.ones(n, np.complex64)
    amp = np.ones(n, np.float32)
    model = np.ones(n, np.float32)
    sup = np.ones(n, np.bool_)
    modulus_step(psi, amp, np.float32(1.0))
    modulus_step_model(psi, amp, model, np.float32(0.0), np.float32(1.0))
    support_step(psi, psi.copy(), sup, 1, 0.9)
    intensity_of(psi, model)
    poisson_sum_field(psi, amp, np.float32(0.0))
    poisson_sum_model(model, amp, np.float32(0.0))
    masked_magnitude(psi, sup, model)
    g = np.ones(2, np.float32)
    gaussian_multiply(np.ones((2, 2, 2), np.complex64), g, g, g)
    threshold_real(model, 0.5, sup)
