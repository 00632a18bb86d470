"""Scoring a set of reflections and choosing the best one.

A set's score is trace((Gᵀ W G)⁻¹): the summed variance of the normal
strains per unit phase-gradient variance (docs/methods.md, planner), with W
from the count model; sets are scored exhaustively below a limit, else by an
exchange search.
"""

from __future__ import annotations

import itertools
import math

import numpy as np

from braggstrain.geometry.rotation import axis_vector
from braggstrain.planner.options import SetScore
from braggstrain.strain.components import STRAIN_PAIRS
from braggstrain.strain.tensor import condition_number

__all__ = ["set_travel", "score_set", "choose_set"]


def _travel_matrix(settings):
    a = np.array(settings, float)  # (J, n_circles) degrees
    return np.abs(a[:, None, :] - a[None, :, :]).sum(-1)


def _perms(n):
    perms = np.array(list(itertools.permutations(range(n))))
    return perms[perms[:, 0] < perms[:, -1]]  # a path and its reverse travel the same


def _min_paths(D, combs):
    """Shortest visiting-order travel of each set (rows of ``combs``) for the
    pairwise travel matrix D."""
    p = _perms(combs.shape[1])
    return D[combs[:, p[:, :-1]], combs[:, p[:, 1:]]].sum(-1).min(-1)


def set_travel(settings_deg):
    """Total circle travel (degrees) of the shortest sequence through settings.

    The travel between two settings is Σ_c |θ_c − θ′_c| over all circles; the
    set's travel is the smallest sum over the orders in which the settings
    can be visited (start and end free). Returns (travel, order).
    """
    settings = [list(s) for s in settings_deg]
    n = len(settings)
    if n < 2:
        return 0.0, list(range(n))
    D = _travel_matrix(settings)
    perms = _perms(n)
    lengths = D[perms[:, :-1], perms[:, 1:]].sum(1)
    b = int(np.argmin(lengths))
    return float(lengths[b]), perms[b].tolist()


def _inverse_parts(S):
    """For symmetric 3×3 matrices S (..., 3, 3): det, trace of the inverse,
    diagonal of the inverse; singular ones give inf."""
    a, b, c = S[..., 0, 0], S[..., 1, 1], S[..., 2, 2]
    d, e, f = S[..., 0, 1], S[..., 0, 2], S[..., 1, 2]
    c00 = b * c - f * f
    c11 = a * c - e * e
    c22 = a * b - d * d
    det = a * c00 - d * (d * c - e * f) + e * (d * f - b * e)
    scale = ((a + b + c) / 3) ** 3
    sing = ~(det > 1e-10 * scale)
    with np.errstate(divide="ignore", invalid="ignore"):
        diag = np.stack([c00, c11, c22], -1) / det[..., None]
    diag[sing] = np.inf
    return det, diag.sum(-1), diag


def _component_var(diag):
    """Variances of the six strain components from diag(C) (..., 3)."""
    out = []
    for i, k in STRAIN_PAIRS:
        out.append(diag[..., i] if i == k else (diag[..., i] + diag[..., k]) / 4)
    return np.stack(out, -1)


def score_set(g_vectors, weights):
    """Score of a set of reflections.

    The phase gradients of reflection j give ∇φ_j = −(∇u)ᵀ G_j, so per
    voxel and per gradient direction the displacement gradient is a weighted
    least-squares fit with covariance σ²·C, C = (Gᵀ W G)⁻¹ (docs/methods.md,
    Fields). The score is trace(C), Å²; ε_ii has variance C_ii and ε_ik
    (i ≠ k) (C_ii + C_kk)/4, taking the three gradient directions as
    independent.

    Parameters
    ----------
    g_vectors : (J, 3) G of each reflection, Å⁻¹
    weights : (J,) w_j

    Returns
    -------
    score (Å², inf if singular), C (3, 3) or None, strain σ (6,), Å
    """
    G = np.asarray(g_vectors, float)
    w = np.asarray(weights, float)
    S = (G * w[:, None]).T @ G
    _, tr, diag = _inverse_parts(S)
    if not np.isfinite(tr):
        return float("inf"), None, np.full(6, np.inf)
    C = np.linalg.inv(S)
    return float(np.trace(C)), C, np.sqrt(_component_var(np.diag(C)))


def _set_score(refls, best_sigma):
    G = np.array([r.g_sample for r in refls])
    w = np.array([r.weight if np.isfinite(r.weight) else 0.0 for r in refls])
    score, C, sig = score_set(G, w)
    lev = np.full(len(refls), np.nan) if C is None else np.einsum("ji,ik,jk->j", G, C, G) * w
    unreach = [r.hkl for r in refls if not r.reachable]
    if unreach:
        travel, order = float("nan"), list(range(len(refls)))
    else:
        travel, order = set_travel([list(r.angles_deg.values()) for r in refls])
    rel = sig / best_sigma if best_sigma is not None else np.full(6, np.nan)
    return SetScore([refls[i].hkl for i in order], score, condition_number(G), sig, rel, lev[order], travel, unreach)


def _collinear_groups(refls):
    """One representative per line of G directions: the most informative one
    (least travel from home on a tie)."""
    reps = []
    for r in sorted(refls, key=lambda r: (-r.info, r.travel_home_deg)):
        u = r.g_sample / r.g_norm
        if all(abs(u @ (q.g_sample / q.g_norm)) < 1 - 1e-9 for q in reps):
            reps.append(r)
    return reps


def _exhaustive(F, J, chunk=50_000):
    """Score every J-subset of the candidates' information matrices F (n, 3, 3).

    Yields (combinations, traces, component variances) chunk by chunk."""
    n = F.shape[0]
    it = itertools.combinations(range(n), J)
    while True:
        flat = np.fromiter(itertools.chain.from_iterable(itertools.islice(it, chunk)), dtype=np.int64)
        if flat.size == 0:
            return
        comb = flat.reshape(-1, J)
        S = F[comb].sum(1)
        _, tr, diag = _inverse_parts(S)
        yield comb, tr, _component_var(diag)


def _exchange(F, J, ok_travel, rng, restarts=6):
    """Exchange search for the J-subset of least trace((Σ F)⁻¹): start from a
    greedy set (and random ones), swap one member for one non-member while the
    score improves (the exchange algorithms of optimal design: Atkinson,
    Donev & Tobias, Optimum Experimental Designs, with SAS, 2007, ch. 12)."""
    n = F.shape[0]
    ridge = 1e-9 * np.trace(F.sum(0)) / 3 * np.eye(3)

    def tr_of(S):
        return _inverse_parts(S)[1]

    starts = []
    cur = []
    for _ in range(J):
        rest = [c for c in range(n) if c not in cur]
        S = F[cur].sum(0) + ridge if cur else ridge
        cur.append(rest[int(np.argmin(tr_of(S[None] + F[rest])))])
    starts.append(cur)
    for _ in range(restarts):
        starts.append(rng.choice(n, J, replace=False).tolist())
    best = (np.inf, None)
    for s in starts:
        cur = list(s)
        val = tr_of(F[cur].sum(0)[None])[0] if ok_travel(cur) else np.inf
        while True:
            improved = False
            out = [c for c in range(n) if c not in cur]
            for pos in range(J):
                base = F[[c for i, c in enumerate(cur) if i != pos]].sum(0)
                trs = tr_of(base[None] + F[out])
                for o in np.argsort(trs):
                    if not trs[o] < val * (1 - 1e-12):
                        break
                    trial = list(cur)
                    trial[pos] = out[o]
                    if ok_travel(trial):
                        cur, val, improved = trial, float(trs[o]), True
                        break
                if improved:
                    break
            if not improved:
                break
        if val < best[0]:
            best = (val, cur)
    return best


def choose_set(reflections, n, max_travel_deg=None, exhaustive_limit=2_000_000, seed=0):
    """The set of n reachable reflections of least score.

    Candidates are the reachable reflections with a finite weight, one per
    line of G directions (G and −G, or (1 1 1) and (2 2 2), measure the same
    component; the most informative is kept). Sets are scored exhaustively
    when there are at most ``exhaustive_limit`` of them, else by an exchange
    search. With ``max_travel_deg``, sets whose travel (:func:`set_travel`)
    exceeds it are skipped.

    Returns
    -------
    (SetScore or None, best component σ (6,) over all candidate sets or None,
    message)
    """
    cands = _collinear_groups([r for r in reflections if r.reachable and np.isfinite(r.weight) and r.weight > 0])
    if len(cands) < n:
        return None, None, (f"only {len(cands)} reachable reflections in distinct directions, fewer than "
                            f"the {n} asked for (plan.n_reflections)")
    G = np.array([r.g_sample for r in cands])
    w = np.array([r.weight for r in cands])
    F = w[:, None, None] * G[:, :, None] * G[:, None, :]
    settings = [list(r.angles_deg.values()) for r in cands]

    def ok_travel(idx):
        return max_travel_deg is None or set_travel([settings[i] for i in idx])[0] <= max_travel_deg

    n_sets = math.comb(len(cands), n)
    best_sigma = None
    if n_sets <= exhaustive_limit:
        D = _travel_matrix(settings)
        iu = np.triu_indices(n, 1)
        var_min = np.full(6, np.inf)
        best_tr, chosen = np.inf, None
        for comb, tr, var in _exhaustive(F, n):
            fin = np.isfinite(tr)
            if not fin.any():
                continue
            var_min = np.minimum(var_min, var[fin].min(0))
            cand = fin & (tr < best_tr)
            if max_travel_deg is not None:
                # any visiting order covers the farthest pair: a lower bound
                cand &= D[comb[:, iu[0]], comb[:, iu[1]]].max(1) <= max_travel_deg
            idx = np.nonzero(cand)[0]
            idx = idx[np.argsort(tr[idx], kind="stable")]
            if max_travel_deg is None:
                if idx.size:
                    best_tr, chosen = float(tr[idx[0]]), comb[idx[0]].tolist()
                continue
            for b0 in range(0, idx.size, 4096):
                part = idx[b0:b0 + 4096]
                ok = np.nonzero(_min_paths(D, comb[part]) <= max_travel_deg)[0]
                if ok.size:
                    best_tr, chosen = float(tr[part[ok[0]]]), comb[part[ok[0]]].tolist()
                    break
        if not np.all(np.isfinite(var_min)):
            return None, None, "every candidate set is coplanar: the strain tensor cannot be determined"
        best_sigma = np.sqrt(var_min)
        if chosen is None:
            return None, best_sigma, (f"no set of {n} reflections keeps the total circle travel within "
                                      f"plan.max_travel_deg = {max_travel_deg:g}°")
    else:
        rng = np.random.default_rng(seed)
        val, chosen = _exchange(F, n, ok_travel, rng)
        if chosen is None or not np.isfinite(val):
            return None, None, (f"the exchange search found no set of {n} reflections with a finite score"
                                + (f" within plan.max_travel_deg = {max_travel_deg:g}°" if max_travel_deg else ""))
        best_sigma = None  # not known without the exhaustive search
    return _set_score([cands[i] for i in chosen], best_sigma), best_sigma, ""


def _assign_weights(refls, instrument, count_model):
    beam = axis_vector(instrument.beam)
    for r in refls:
        if not np.isfinite(r.two_theta_deg):
            continue
        if r.reachable:
            R = instrument.sample_rotation(r.angles_deg)
            q_lab = R @ r.g_sample
            kf = q_lab + instrument.k * beam
            p = kf / np.linalg.norm(kf)
        else:
            p = np.full(3, np.nan)
        r.intensity = float(count_model.intensity(abs(r.structure_factor), r.g_norm,
                                                  math.radians(r.two_theta_deg), p, beam))
    ref = max((r.intensity for r in refls if r.reachable and np.isfinite(r.intensity)), default=np.nan)
    if not np.isfinite(ref) or ref <= 0:
        ref = max((r.intensity for r in refls if np.isfinite(r.intensity)), default=1.0) or 1.0
    for r in refls:
        if np.isfinite(r.intensity):
            r.weight = float((r.intensity / ref) ** count_model.noise_exponent)
            r.info = r.weight * r.g_norm ** 2
