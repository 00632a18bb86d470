"""The measurement planner: which reflections to measure, at which angles.

Before and during beam time the user needs three or more reflections of one
crystal that the diffractometer can reach, and the choice decides how well the
strain tensor is determined. The planner

1. orients the crystal (:mod:`braggstrain.geometry.orientation`: a U matrix; two or more reflections found on the
   diffractometer; or Bunge Euler angles from electron backscatter
   diffraction with the specimen's mounting on the sample stage);
2. (:mod:`braggstrain.planner.reach`) lists every allowed reflection up to a |G| limit with the circle angles
   that put it in the Bragg condition on a chosen detector pixel, within the
   circles' limits and above the substrate, or the reason it cannot be
   reached;
3. (:mod:`braggstrain.planner.choice`) chooses the set of J reflections (3-6) that minimises the expected strain
   uncertainty, trace((Gᵀ W G)⁻¹), with W the per-reflection weights of a
   count-rate model built on xrayutilities' structure factors, optionally
   under a cap on the total circle travel; and scores a set the user gives;
4. (:mod:`braggstrain.planner.output`) writes a stereographic projection of the G directions and a pipeline-file
   fragment with the chosen reflections.

This module holds :func:`plan`, which runs these steps, and
:func:`plan_from_config`, which reads ``[plan]`` of a pipeline file; the
options and results are in :mod:`braggstrain.planner.options`.

Conventions are those of docs/design.md: lab frame y along the beam, z up;
Q_lab = R_s(angles)·G_sample at the Bragg condition; Å, Å⁻¹ with 2π; degrees
at the interface (every field that holds degrees ends in ``_deg``), radians
inside. The user documentation is docs/planner.md.

Safety: the planner knows circle limits and the substrate only, not the
shape of the sample environment or the detector arm. Check every planned move
for collisions, and follow the facility's rules for limits, dose and beam
time.
"""

from __future__ import annotations

import math
import os
from typing import Mapping

import numpy as np

from braggstrain.errors import ConfigError, InputError, ReflectionError
from braggstrain.geometry.crystal import HC_KEV_ANGSTROM, format_hkl
from braggstrain.geometry.orientation import (MeasuredReflection, mounting_matrix, orientation_from_euler,
                                              orientation_from_measured)
from braggstrain.io.files import write_atomic
from braggstrain.planner.choice import _assign_weights, _set_score, choose_set, score_set, set_travel
from braggstrain.planner.options import CountModel, PlanOptions, PlanResult, ReflectionPlan, SetScore
from braggstrain.planner.output import fragment_text, format_plan_table, plot_plan, stereographic
from braggstrain.planner.reach import _free_names, _validate_options, reach

__all__ = [
    "CountModel", "PlanOptions", "ReflectionPlan", "SetScore",
    "PlanResult", "reach", "set_travel", "score_set", "choose_set", "plan",
    "stereographic", "plot_plan", "fragment_text", "format_plan_table", "plan_from_config",
]


def plan(crystal, instrument, options=PlanOptions(), orientation_residual_deg=None):
    """Plan a multi-reflection measurement.

    Lists every allowed reflection of ``crystal`` (with its orientation) with
    |G| ≤ ``options.g_max``, solves its settings (:func:`reach`), weighs it
    with the count model, chooses the best set (:func:`choose_set`) and scores
    ``options.score_set``.

    Returns
    -------
    :class:`PlanResult`

    Raises
    ------
    InputError
        on bad options, or when no allowed reflection is within the energy's
        reach (|G| ≤ 2k) and ``g_max``.
    """
    _validate_options(instrument, options)
    k = instrument.k
    g_max = 2 * k if options.g_max is None else float(options.g_max)
    hkls = crystal.allowed_reflections(g_max)
    shortest = crystal.allowed_reflections(max(g_max, 1.0) * 10)[:1] if not hkls else hkls[:1]
    if not any(np.linalg.norm(crystal.g_crystal(h)) <= 2 * k for h in hkls):
        if shortest:
            g0 = float(np.linalg.norm(crystal.g_crystal(shortest[0])))
            need = HC_KEV_ANGSTROM * g0 / (4 * np.pi)
            if g0 > 2 * k:
                raise InputError(f"instrument.energy_kev = {instrument.energy_kev:g}: reaches no allowed reflection of "
                                 f"{crystal.name}; the shortest, {format_hkl(shortest[0])} with |G| = {g0:.3f} Å⁻¹, "
                                 f"needs ≥ {need:.2f} keV")
            raise InputError(f"plan.g_max = {g_max:g} Å⁻¹: below the shortest allowed reflection of {crystal.name}, "
                             f"{format_hkl(shortest[0])} with |G| = {g0:.3f} Å⁻¹")
        raise InputError(f"crystal {crystal.name}: no allowed reflection found")
    user_hkls = []
    if options.score_set is not None:
        for i, h in enumerate(options.score_set):
            try:
                refl = crystal.reflection(h)
            except ReflectionError as e:
                raise InputError(f"plan.score_set[{i}]: {e}") from None
            user_hkls.append(refl.hkl)
        if len(user_hkls) < 3:
            raise InputError(f"plan.score_set: expected at least three reflections, got {len(user_hkls)}")
    extra = [h for h in user_hkls if tuple(h) not in set(map(tuple, hkls))]
    refls = reach(crystal, instrument, [*hkls, *extra], options)
    _assign_weights(refls, instrument, options.count_model)
    extra_set = set(map(tuple, extra))
    chosen, best_sigma, msg = choose_set([r for r in refls if r.hkl not in extra_set], options.n_reflections,
                                         options.max_travel_deg, options.exhaustive_limit, options.seed)
    by_hkl = {r.hkl: r for r in refls}
    user = _set_score([by_hkl[tuple(h)] for h in user_hkls], best_sigma) if user_hkls else None
    notes = []
    if len(_free_names(instrument, options)) > 3:
        notes.append("more than three free circles: settings are sampled from each solution family and the "
                     "valid one nearest home is kept")
    if chosen is not None and best_sigma is None:
        notes.append("many candidate sets: the chosen set comes from an exchange search (not proven optimal); "
                     "relative σ is not available")
    res = PlanResult(crystal.name, instrument.energy_kev, crystal.U.copy(), [c.name for c in instrument.circles],
                     refls, chosen, user,
                     options.n_reflections, options, msg, notes, best_sigma, orientation_residual_deg)
    return res


# ---------------------------------------------------------------------------
# Pipeline file
# ---------------------------------------------------------------------------

_PLAN_KEYS = {
    "g_max", "n_reflections", "free", "fixed", "home", "pixel", "surface_normal", "min_incidence_deg",
    "min_exit_deg", "rocking_circle", "rocking_range_deg", "max_travel_deg", "score_set", "count_model",
    "starts", "seed", "figure", "fragment", "orientation",
}
_COUNT_KEYS = {"noise_exponent", "polarization", "lorentz", "b_factor", "g_exponent"}


def _num(v, key, positive=False):
    if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v):
        raise ConfigError(f"{key} = {v!r}: expected a number")
    if positive and v <= 0:
        raise ConfigError(f"{key} = {v!r}: expected a positive number")
    return float(v)


def _table(cfg, key):
    if cfg is None:
        raise ConfigError(f"[{key}]: missing table")
    if not isinstance(cfg, Mapping):
        raise ConfigError(f"{key}: expected a table, got {type(cfg).__name__}")
    return cfg


def _validated(config):
    """The pipeline dict validated by :mod:`braggstrain.config` (as
    ``load_config`` returns it); a raw parsed dict has its ``[crystal]`` and
    ``[instrument]`` tables validated against the same schema (the planner
    needs no ``[[reflection]]``)."""
    from braggstrain import config as cm

    if not isinstance(config, Mapping):
        raise ConfigError(f"pipeline file: expected a table of tables, got {type(config).__name__}")
    if "_source" in config:
        return config
    src = "<pipeline>"
    out = {"_source": src}
    for key in ("crystal", "instrument"):
        if key not in config:
            raise ConfigError(f"{src}: missing table [{key}]")
        out[key] = cm._validate(config[key], cm.SCHEMA[key], key, src)
    if out["crystal"]["material"] is None and out["crystal"]["lattice"]["a"] is None:
        raise ConfigError(f"{src}: key 'crystal': expected 'material' (a name) or 'lattice.a' (Å)")
    out["plan"] = config.get("plan", {})
    return out


def _check_limits(cfg):
    """Name the key of an inverted circle range before the instrument is built."""
    src = cfg.get("_source", "<pipeline>")
    for group in ("sample_circles", "detector_circles"):
        for i, c in enumerate(cfg["instrument"][group]):
            lo, hi = c["limits"]
            if not lo < hi:
                raise ConfigError(f"{src}: key 'instrument.{group}[{i}].limits': value {list(c['limits'])} for "
                                  f"circle '{c['name']}'; expected [lower, upper] with lower < upper (degrees)")


def _orientation_from_plan(ori, crystal, instrument):
    """U from ``[plan.orientation]``: ``euler_bunge_deg`` (+ ``mounting``) or
    ``measured`` (a list of {hkl, angles_deg, pixel}). Returns (crystal,
    residuals in degrees or None, a note)."""
    ori = _table(ori, "plan.orientation")
    extra = set(ori) - {"euler_bunge_deg", "mounting", "measured"}
    if extra:
        raise ConfigError(f"plan.orientation: unknown key(s) {sorted(extra)}; expected euler_bunge_deg, mounting "
                          f"or measured")
    given = [k for k in ("euler_bunge_deg", "measured") if k in ori]
    if len(given) != 1:
        raise ConfigError(f"plan.orientation: expected exactly one of euler_bunge_deg, measured; got {given}")
    if "mounting" in ori and given[0] != "euler_bunge_deg":
        raise ConfigError("plan.orientation.mounting: only used with euler_bunge_deg")
    if given[0] == "euler_bunge_deg":
        try:
            U = orientation_from_euler(ori["euler_bunge_deg"], mounting_matrix(ori.get("mounting"),
                                                                             "plan.orientation.mounting"))
        except ConfigError:
            raise
        except InputError as e:
            raise ConfigError(f"plan.orientation.euler_bunge_deg: {e}") from None
        return crystal.with_orientation(U), None, "orientation from Bunge Euler angles ([plan.orientation])"
    meas = ori["measured"]
    key = "plan.orientation.measured"
    if not isinstance(meas, (list, tuple)):
        raise ConfigError(f"{key}: expected a list of {{hkl, angles_deg, pixel}}")
    ms = []
    for i, m in enumerate(meas):
        k = f"{key}[{i}]"
        m = _table(m, k)
        extra = set(m) - {"hkl", "angles_deg", "pixel"}
        if extra:
            raise ConfigError(f"{k}: unknown key(s) {sorted(extra)}; expected hkl, angles_deg, pixel")
        for req in ("hkl", "angles_deg"):
            if req not in m:
                raise ConfigError(f"{k}.{req}: missing")
        if not (isinstance(m["hkl"], (list, tuple)) and len(m["hkl"]) == 3):
            raise ConfigError(f"{k}.hkl = {m['hkl']!r}: expected [h, k, l]")
        if not isinstance(m["angles_deg"], Mapping):
            raise ConfigError(f"{k}.angles_deg: expected a table circle name → degrees")
        pix = m.get("pixel")
        if pix is not None and not (isinstance(pix, (list, tuple)) and len(pix) == 2):
            raise ConfigError(f"{k}.pixel = {pix!r}: expected [row, column]")
        ms.append(MeasuredReflection(tuple(m["hkl"]), dict(m["angles_deg"]), None if pix is None else tuple(pix)))
    U, residual = orientation_from_measured(crystal, instrument, ms, key)
    how = "two-reflection orientation" if len(ms) == 2 else f"least-squares fit to {len(ms)} reflections"
    return crystal.with_orientation(U), residual, f"orientation from found reflections ({how}, [plan.orientation])"


def _plan_options(cfg, instrument):
    cfg = _table(cfg if cfg is not None else {}, "plan")
    extra = set(cfg) - _PLAN_KEYS
    if extra:
        raise ConfigError(f"plan: unknown key(s) {sorted(extra)}; expected some of {sorted(_PLAN_KEYS)}")
    names = [c.name for c in instrument.circles]
    kw = {}
    if "g_max" in cfg:
        kw["g_max"] = _num(cfg["g_max"], "plan.g_max", positive=True)
    if "n_reflections" in cfg:
        n = cfg["n_reflections"]
        if isinstance(n, bool) or not isinstance(n, int) or not 3 <= n <= 6:
            raise ConfigError(f"plan.n_reflections = {n!r}: expected an integer from 3 to 6")
        kw["n_reflections"] = n
    if "free" in cfg:
        f = cfg["free"]
        if not isinstance(f, (list, tuple)) or not all(isinstance(v, str) for v in f):
            raise ConfigError(f"plan.free = {f!r}: expected a list of circle names")
        for v in f:
            if v not in names:
                raise ConfigError(f"plan.free: unknown circle '{v}'; the instrument's circles are {names}")
        kw["free"] = tuple(f)
    for key, dest in (("fixed", "fixed_deg"), ("home", "home_deg")):
        if key in cfg:
            t = _table(cfg[key], f"plan.{key}")
            for n, v in t.items():
                if n not in names:
                    raise ConfigError(f"plan.{key}: unknown circle '{n}'; the instrument's circles are {names}")
                _num(v, f"plan.{key}.{n}")
            kw[dest] = {n: float(v) for n, v in t.items()}
    if "pixel" in cfg:
        p = cfg["pixel"]
        if not (isinstance(p, (list, tuple)) and len(p) == 2):
            raise ConfigError(f"plan.pixel = {p!r}: expected [row, column]")
        kw["pixel"] = tuple(_num(v, "plan.pixel") for v in p)
    if "surface_normal" in cfg:
        s = cfg["surface_normal"]
        if s is False:
            kw["surface_normal"] = None
        elif isinstance(s, (list, tuple)) and len(s) == 3:
            kw["surface_normal"] = tuple(_num(v, "plan.surface_normal") for v in s)
        else:
            raise ConfigError(f"plan.surface_normal = {s!r}: expected [x, y, z] (sample frame) or false (no substrate)")
    for key in ("min_incidence_deg", "min_exit_deg", "rocking_range_deg"):
        if key in cfg:
            kw[key] = _num(cfg[key], f"plan.{key}")
    if "max_travel_deg" in cfg:
        kw["max_travel_deg"] = _num(cfg["max_travel_deg"], "plan.max_travel_deg", positive=True)
    if "rocking_circle" in cfg:
        rc = cfg["rocking_circle"]
        if rc not in [c.name for c in instrument.sample_circles]:
            raise ConfigError(f"plan.rocking_circle = {rc!r}: expected a sample circle, one of "
                              f"{[c.name for c in instrument.sample_circles]}")
        kw["rocking_circle"] = rc
    if "score_set" in cfg:
        s = cfg["score_set"]
        if not isinstance(s, (list, tuple)) or not all(isinstance(h, (list, tuple)) and len(h) == 3 for h in s):
            raise ConfigError(f"plan.score_set = {s!r}: expected a list of [h, k, l]")
        kw["score_set"] = tuple(tuple(h) for h in s)
    if "count_model" in cfg:
        cm = _table(cfg["count_model"], "plan.count_model")
        extra = set(cm) - _COUNT_KEYS
        if extra:
            raise ConfigError(f"plan.count_model: unknown key(s) {sorted(extra)}; expected some of {sorted(_COUNT_KEYS)}")
        try:
            kw["count_model"] = CountModel(**cm)
        except InputError as e:
            raise ConfigError(f"plan.{e}") from None
    for key in ("starts", "seed"):
        if key in cfg:
            v = cfg[key]
            if isinstance(v, bool) or not isinstance(v, int) or v < (1 if key == "starts" else 0):
                raise ConfigError(f"plan.{key} = {v!r}: expected a {'positive' if key == 'starts' else 'non-negative'} "
                                  f"integer")
            kw[key] = v
    opts = PlanOptions(**kw)
    try:
        _validate_options(instrument, opts)
    except ConfigError:
        raise
    except InputError as e:
        raise ConfigError(str(e)) from None
    return opts


def plan_from_config(config, out_dir):
    """Plan from a pipeline dict and write the figure and the fragment.

    Parameters
    ----------
    config : dict
        The pipeline file as :func:`braggstrain.config.load_config` returns
        it, or as parsed TOML (its ``[crystal]`` and ``[instrument]`` tables
        are then validated here). Read: ``[crystal]`` and ``[instrument]``
        (through :func:`braggstrain.config.build_crystal` and
        :func:`~braggstrain.config.build_instrument`) and ``[plan]``
        (keys in docs/planner.md), whose ``[plan.orientation]``, if given,
        replaces the orientation of ``[crystal]``.
    out_dir : path
        Folder (created if missing) that receives the stereographic figure
        (``plan.figure``, default "plan.png") and, when a set was chosen, the
        pipeline fragment (``plan.fragment``, default
        "plan_reflections.toml"); both written atomically.

    Returns
    -------
    :class:`PlanResult` with ``figure_path`` and ``fragment_path`` set
    (``fragment_path`` None when no set could be chosen; ``message`` says why).

    Raises
    ------
    ConfigError naming the file and key for every problem with the pipeline file.
    """
    from braggstrain import config as cm

    cfg = _validated(config)
    src = cfg.get("_source", "<pipeline>")
    _check_limits(cfg)
    instrument = cm.build_instrument(cfg)
    crystal = cm.build_crystal(cfg)
    pcfg = cfg.get("plan") or {}
    try:
        pcfg = _table(pcfg, "plan")
        notes = []
        residual = None
        if "orientation" in pcfg:
            crystal, residual, note = _orientation_from_plan(pcfg["orientation"], crystal, instrument)
            notes.append(note)
        elif cfg["crystal"].get("orientation") is None and (cfg["crystal"].get("orient_by") or {}).get("hkl1") is None:
            notes.append("no orientation given ([crystal] orientation / orient_by or [plan.orientation]): "
                         "the crystal axes are taken along the sample axes")
        options = _plan_options(pcfg, instrument)
        names = {}
        for key, default in (("figure", "plan.png"), ("fragment", "plan_reflections.toml")):
            v = pcfg.get(key, default)
            if not isinstance(v, str) or not v or os.path.basename(v) != v:
                raise ConfigError(f"plan.{key} = {v!r}: expected a plain file name (written into the output folder)")
            names[key] = v
        result = plan(crystal, instrument, options, residual)
    except InputError as e:  # ConfigError included: add the file
        raise ConfigError(f"{src}: {e}") from None
    result.notes[:0] = notes
    out_dir = os.fspath(out_dir)
    os.makedirs(out_dir, exist_ok=True)
    fig = os.path.join(out_dir, names["figure"])
    plot_plan(result, fig)
    result.figure_path = fig
    if result.chosen is not None:
        frag = os.path.join(out_dir, names["fragment"])
        write_atomic(frag, fragment_text(result))
        result.fragment_path = frag
    return result
