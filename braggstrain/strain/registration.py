"""Registration: every reflection's SampleObject onto one common sample-frame grid.

Twin: intensity cannot tell ρ(r) from ρ*(−r). For reflection G the twin
conj ρ(−r) = s(−r)·exp(−i G·u′(r)) with u′(r) = −u(−r), whose displacement
gradient is D′(r) = D(−r): the point-inverted crystal with the same strain.
:func:`register` keeps every G as given and replaces an object by its twin
when that matches the reference better, so all reflections describe one
crystal; whether that crystal is the true one or its point image cannot be
decided from intensities (the reference object fixes the choice).
"""

from __future__ import annotations

import itertools
import warnings
from dataclasses import dataclass

import numpy as np
from scipy import ndimage as ndi

from braggstrain import _validate as _v
from braggstrain.errors import TensorError
from braggstrain.geometry.crystal import format_hkl
from braggstrain.strain.fields import phase_gradient, phase_ramp, trusted_for_gradients
from braggstrain.strain.grid import Grid
from braggstrain.strain.objects import SampleObject
from braggstrain.strain.tensor import ReflectionConsistencyWarning, _solve

__all__ = ["RegistrationReport", "register", "apply_registration"]


@dataclass
class RegistrationReport:
    """What :func:`register` did to each object (lists in input order).

    Attributes
    ----------
    reference : int
        Index of the object the others were aligned to.
    voxel_size : (3,) float, Å
    shape : tuple of 3 int
    origin : (3,) float, Å
        Sample-frame position of index n//2 of the common grid.
    shifts_voxels, shifts_angstrom : list of (3,) float
        Translation applied to each object after resampling (and after the
        twin operation, if chosen), in common-grid voxels and in Å.
    twins : list of bool
        True where the object was replaced by its twin conj ρ(−r).
    twin_scores : list of (float, float)
        Amplitude correlation with the reference of the object and of its
        twin, after alignment.
    twin_decided_by : list of str
        "reference", "amplitude", "residual" (phase consistency of all
        reflections, used when amplitudes cannot tell), "symmetric" (object
        and twin equal: choice irrelevant) or "ambiguous".
    overlap : list of float
        Dice coefficient 2|A∩B|/(|A|+|B|) of each registered support with the
        reference support.
    """

    reference: int
    voxel_size: np.ndarray
    shape: tuple
    origin: np.ndarray
    shifts_voxels: list
    shifts_angstrom: list
    twins: list
    twin_scores: list
    twin_decided_by: list
    overlap: list
    overlap_measure: str = "Dice"


def _dice(a, b):
    s = a.sum() + b.sum()
    return float(2 * np.logical_and(a, b).sum() / s) if s else 0.0


def _ncc(a, b):
    den = np.sqrt(np.sum(a * a) * np.sum(b * b))
    return float(np.sum(a * b) / den) if den > 0 else 0.0


class _Resampler:
    """Samples one object on the common grid at arbitrary (common-index) points.

    The object's mean phase ramp is removed before interpolation and put
    back after, so that linear interpolation of the complex values meets a
    slowly varying phase only.
    """

    def __init__(self, so, common):
        self.so = so
        g = so.grid
        sup = so.support
        grad = phase_gradient(so.obj, g.voxel_size, sup)
        tr = trusted_for_gradients(so.obj, sup)
        self.ramp = phase_ramp(grad, tr if tr.any() else sup, np.abs(so.obj))
        pos = np.ix_(*g.axes)
        demod = so.obj * np.exp(-1j * sum(self.ramp[k] * pos[k] for k in range(3)))
        self.re = demod.real.astype(np.float64)
        self.im = demod.imag.astype(np.float64)
        self.sup = sup.astype(np.float64)
        # common index m -> position common.position(m) -> object index g.index(...):
        # an affine map, m·scale + offset
        self.scale = common.voxel_size / g.voxel_size
        self.offset = g.index(common.corner)
        self.grid = g

    def sample(self, coords_common):
        """coords_common: (3, *grid) common-grid indices. Returns (obj, support)."""
        c = coords_common * self.scale.reshape(3, 1, 1, 1) + self.offset.reshape(3, 1, 1, 1)
        re = ndi.map_coordinates(self.re, c, order=1, mode="constant", cval=0.0)
        im = ndi.map_coordinates(self.im, c, order=1, mode="constant", cval=0.0)
        sp = ndi.map_coordinates(self.sup, c, order=1, mode="constant", cval=0.0)
        ramp = np.tensordot(self.ramp, self.grid.position(c, axis=0), axes=1)
        obj = (re + 1j * im) * np.exp(1j * ramp)
        return obj.astype(np.complex64), sp >= 0.5


def register(objects, *, voxel_size=None, reference=0, min_overlap=0.7, upsample=20,
             twin_tolerance=0.002, return_report=False):
    """Bring every reflection's SampleObject onto one common sample-frame grid.

    Each object is resampled onto the common grid (voxel size: the finest of
    the objects per axis, or ``voxel_size``; centred on the reference's
    origin; large enough to hold every object), then aligned to the
    reference by sub-voxel phase correlation of the amplitudes
    (scikit-image ``phase_cross_correlation``, upsampled by ``upsample``),
    once as it is and once as its twin conj ρ(−r); the better match of the
    two is kept. Where the amplitudes cannot tell (correlations within
    ``twin_tolerance``) and there are at least four reflections, the twin
    choices are made by the consistency of all phase gradients (smallest
    residual of :func:`strain_tensor`). The final object is made by one
    linear interpolation from the input.

    Parameters
    ----------
    objects : list of SampleObject
    voxel_size : float or 3 floats, optional, Å
    reference : int
        Index of the reference object.
    min_overlap : float
        Smallest Dice coefficient of a registered support with the reference
        support that is accepted (the pipeline file sets it).
    upsample : int
        Sub-voxel precision of the correlation, 1/upsample voxel.
    twin_tolerance : float
        Correlation difference below which the amplitudes are taken as unable
        to tell an object from its twin (common practice, no source).
    return_report : bool
        Also return a :class:`RegistrationReport`.

    Returns
    -------
    list of SampleObject (and the report if asked)
        On the common grid, same G and hkl; ``meta["registration"]`` holds
        this object's shift (voxels, Å), twin choice and Dice overlap.

    Raises
    ------
    TensorError
        Objects that are not SampleObjects, or registered supports that
        overlap the reference less than ``min_overlap``.
    """
    from skimage.registration import phase_cross_correlation

    objects = list(objects)
    if len(objects) < 1:
        raise TensorError("objects: expected at least one SampleObject")
    for j, o in enumerate(objects):
        if not isinstance(o, SampleObject):
            raise TensorError(f"objects[{j}]: expected a braggstrain.strain.objects.SampleObject, got {type(o).__name__}")
        if not o.support.any():
            raise TensorError(f"objects[{j}] {_label(o, j)}: empty support")
    J = len(objects)
    if not 0 <= int(reference) < J:
        raise TensorError(f"reference: expected an index in 0..{J - 1}, got {reference!r}")
    reference = int(reference)
    if not 0 < min_overlap <= 1:
        raise TensorError(f"min_overlap: expected a Dice coefficient in (0, 1], got {min_overlap!r}")
    vs = (np.min([o.voxel_size for o in objects], axis=0) if voxel_size is None
          else _v.voxel_size(voxel_size))
    origin = objects[reference].origin.copy()
    # room from the common origin to the first and the last voxel of every object
    lo = np.max([origin - o.grid.corner for o in objects], axis=0)
    hi = np.max([o.grid.position(np.array(o.shape) - 1) - origin for o in objects], axis=0)
    m = np.ceil(np.maximum(lo / vs, hi / vs + 1) - 1e-9).astype(int)
    shape = tuple(int(2 * v) for v in m)
    common = Grid(shape, vs, origin)
    base = np.indices(shape, dtype=float)
    c = common.centre_index.reshape(3, 1, 1, 1).astype(float)  # the twin inverts about the common origin

    samplers = [_Resampler(o, common) for o in objects]
    ref_obj, ref_sup = samplers[reference].sample(base)
    ref_amp = np.abs(ref_obj)

    results = [None] * J
    info = []
    for j in range(J):
        if j == reference:
            results[j] = {False: (ref_obj, ref_sup, np.zeros(3))}
            info.append(dict(twin=False, scores=(1.0, float("nan")), by="reference", shift=np.zeros(3)))
            continue
        cands = {}
        scores = {}
        for tw in (False, True):
            coords = (2 * c - base) if tw else base
            o, s = samplers[j].sample(coords)
            if tw:
                o = np.conj(o)
            amp = np.abs(o)
            shift, _, _ = phase_cross_correlation(ref_amp, amp, upsample_factor=upsample,
                                                  normalization=None)
            shift = np.asarray(shift, float)
            # final object by one interpolation from the input
            mv = base - shift.reshape(3, 1, 1, 1)
            coords = (2 * c - mv) if tw else mv
            o, s = samplers[j].sample(coords)
            if tw:
                o = np.conj(o)
            cands[tw] = (o, s, shift)
            scores[tw] = _ncc(ref_amp, np.abs(o))
        diff = scores[True] - scores[False]
        if abs(diff) >= twin_tolerance:
            choice, by = diff > 0, "amplitude"
        else:
            same = (np.linalg.norm(cands[True][0] - cands[False][0])
                    <= 1e-3 * np.linalg.norm(cands[False][0]))
            choice, by = False, ("symmetric" if same else "ambiguous")
        results[j] = cands
        info.append(dict(twin=choice, scores=(scores[False], scores[True]), by=by, shift=cands[choice][2]))

    amb = [j for j in range(J) if info[j]["by"] == "ambiguous"]
    if amb and J >= 4:
        _twin_by_residual(objects, results, info, amb, vs)
    for j in range(J):
        if info[j]["by"] == "ambiguous":
            why = ("phase consistency needs at least four reflections" if J < 4 else
                   "the residuals of the twin combinations are too close")
            warnings.warn(
                f"objects[{j}] {_label(objects[j], j)}: the amplitudes cannot tell the object from its twin "
                f"and {why}; kept as given",
                ReflectionConsistencyWarning, stacklevel=2)

    out, overlaps = [], []
    for j, o in enumerate(objects):
        ob, sp, shift = results[j][info[j]["twin"]]
        overlaps.append(_dice(ref_sup, sp))
    poor = [j for j in range(J) if overlaps[j] < min_overlap]
    if poor:
        raise TensorError(
            "register: support overlap with the reference "
            f"{_label(objects[reference], reference)} too small for "
            + ", ".join(f"objects[{j}] {_label(objects[j], j)} (Dice {overlaps[j]:.3f})" for j in poor)
            + f"; expected Dice ≥ {min_overlap:g}. Check the reconstructions or lower min_overlap")
    for j, o in enumerate(objects):
        ob, sp, shift = results[j][info[j]["twin"]]
        meta = dict(o.meta)
        meta["registration"] = {
            "reference": reference,
            "shift_voxels": [float(v) for v in shift],
            "shift_angstrom": [float(v) for v in shift * vs],
            "twin": bool(info[j]["twin"]),
            "twin_scores": [float(v) for v in info[j]["scores"]],
            "twin_decided_by": info[j]["by"],
            "overlap_dice": overlaps[j],
        }
        out.append(SampleObject(ob, vs.copy(), o.g_vector.copy(), sp, origin.copy(), o.hkl, meta))
    if not return_report:
        return out
    report = RegistrationReport(
        reference=reference, voxel_size=vs.copy(), shape=shape, origin=origin.copy(),
        shifts_voxels=[results[j][info[j]["twin"]][2].copy() for j in range(J)],
        shifts_angstrom=[results[j][info[j]["twin"]][2] * vs for j in range(J)],
        twins=[bool(i["twin"]) for i in info],
        twin_scores=[tuple(i["scores"]) for i in info],
        twin_decided_by=[i["by"] for i in info],
        overlap=overlaps)
    return out, report


def apply_registration(obj, report, index):
    """Put another reconstruction of reflection ``index`` onto the common grid
    exactly as :func:`register` put that reflection's object there.

    For the companions of a registered object (its kept random starts, its
    Poisson replicas), which must move with it and not be aligned anew.

    Parameters
    ----------
    obj : SampleObject
        On any sample-frame grid (usually the grid of the object registered).
    report : RegistrationReport
        From ``register(..., return_report=True)``.
    index : int
        Which reflection of the report (its shift and twin choice are used).

    Returns
    -------
    SampleObject on the report's common grid.
    """
    if not isinstance(obj, SampleObject):
        raise TensorError(f"obj: expected a braggstrain.objects.SampleObject, got {type(obj).__name__}")
    rep = report if isinstance(report, dict) else report.__dict__
    J = len(rep["twins"])
    if not 0 <= int(index) < J:
        raise TensorError(f"index: expected a reflection index in 0..{J - 1}, got {index!r}")
    index = int(index)
    vs = np.asarray(rep["voxel_size"], float)
    origin = np.asarray(rep["origin"], float)
    shape = tuple(int(v) for v in rep["shape"])
    shift = np.asarray(rep["shifts_voxels"][index], float)
    tw = bool(rep["twins"][index])
    common = Grid(shape, vs, origin)
    base = np.indices(shape, dtype=float)
    c = common.centre_index.reshape(3, 1, 1, 1).astype(float)
    mv = base - shift.reshape(3, 1, 1, 1)
    coords = (2 * c - mv) if tw else mv
    o, sp = _Resampler(obj, common).sample(coords)
    if tw:
        o = np.conj(o)
    return SampleObject(o, vs.copy(), obj.g_vector.copy(), sp, origin.copy(), obj.hkl, dict(obj.meta))


def _label(o, j):
    return format_hkl(o.hkl) if o.hkl is not None else f"(reflection {j})"


def _twin_by_residual(objects, results, info, amb, vs):
    """Choose the twins of the ambiguous objects by the smallest tensor residual.

    Phase gradients of both candidates of every object are computed once on
    the voxels common to all candidates; each combination of twin choices is
    then one batched least-squares solve (amplitude weights).
    """
    J = len(objects)
    G = np.array([o.g_vector for o in objects])
    cands = {j: ([info[j]["twin"]] if j not in amb else [False, True]) for j in range(J)}
    sup = np.logical_and.reduce([results[j][t][1] for j in range(J) for t in cands[j]])
    inner = ndi.binary_erosion(sup)
    if inner.sum() < 10:
        return
    idx = np.flatnonzero(inner)
    grads, amps = {}, {}
    for j in range(J):
        for t in cands[j]:
            o = results[j][t][0]
            g = phase_gradient(o, vs, sup).reshape(3, -1)[:, idx].T
            a = np.abs(o).reshape(-1)[idx].astype(float)
            grads[j, t] = np.nan_to_num(g.astype(float))
            amps[j, t] = a / max(float(np.median(a)), 1e-30)
    best, best_val, vals = None, np.inf, []
    for combo in itertools.product((False, True), repeat=len(amb)):
        choice = {j: info[j]["twin"] for j in range(J)}
        choice.update(dict(zip(amb, combo)))
        P = np.stack([grads[j, choice[j]] for j in range(J)], axis=1)  # (N, J, 3)
        w = np.stack([amps[j, choice[j]] for j in range(J)], axis=1)
        _, _, r, _ = _solve(P, w, G)
        v = float(np.sqrt(np.sum(w[:, :, None] * r * r) / (3 * np.sum(w))))
        vals.append(v)
        if v < best_val:
            best, best_val = combo, v
    others = sorted(vals)[1:2]
    # RMS over thousands of voxels: a 10 % drop is far beyond its scatter
    # (common practice, no source)
    if others and best_val < 0.9 * others[0]:
        for j, tw in zip(amb, best):
            info[j]["twin"] = tw
            info[j]["by"] = "residual"
            info[j]["shift"] = results[j][tw][2]
