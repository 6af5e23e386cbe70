"""Groups: pairs, quads, section balance, and why a unit was left over.

Pairs (:func:`match_pairs`) maximise the number of compatible pairs, then minimise the
sum of the pairs' mismatches, solved to the global optimum (:mod:`fitter.match.graph`).
Quads (:func:`match_quads`) are either four units all within tolerance of each other, or
two matched pairs whose summed figures match each other (the two sides of a parallel
push-pull output); each group says which.  Every decision on whether units agree is the
one rule of :mod:`fitter.match.criterion`.
"""

from __future__ import annotations

import time
from typing import Sequence

import numpy as np
import scipy.sparse as sp

from ..triode import FittedTriode
from . import criterion
from .criterion import DEFAULT_GRADES, FIGURES, Criterion, MatchError, _positive, grade_of
from .graph import _k_nearest, _solve_matching, _Space
from .positions import UnitFigures, unit_figures
from .results import Group, MatchResult, Optimality, _pct


def select_units(units: Sequence[FittedTriode], only=None, exclude=None) -> list[FittedTriode]:
    """The units named in ``only`` (all if None), less those in ``exclude``.

    Raises
    ------
    MatchError
        A label names no unit, labels repeat, or nothing is left.
    """
    units = list(units)
    labels = [u.label for u in units]
    seen = set()
    for lab in labels:
        if lab in seen:
            raise MatchError(f"unit {lab!r} appears twice in the set; every unit needs its own label",
                             field="units")
        seen.add(lab)
    known = set(labels)
    for name, lst in (("only", only), ("exclude", exclude)):
        for lab in lst or ():
            if lab not in known:
                near = sorted(known)[:8]
                raise MatchError(f"unknown unit {lab!r}; known units include {', '.join(near)}", subject=name,
                                 field=name)
    out = [u for u in units if (only is None or u.label in set(only)) and u.label not in set(exclude or ())]
    if not out:
        raise MatchError("no units left to match: the selection is empty", field="only")
    return out


def _log_figures(figs: UnitFigures, crit: Criterion, idx):
    cols = []
    for f in crit.figures:
        if f not in figs.values:
            raise MatchError(f"figure {f!r} is not available at this position ({figs.position.describe()})",
                             subject="criterion", field="figures")
        v = np.abs(np.asarray(figs.values[f], float)[idx])
        cols.append(v)
    V = np.column_stack(cols)
    bad = ~np.all(np.isfinite(V) & (V > 0), axis=1)
    return V, bad


def section_balance(figs: UnitFigures, crit: Criterion) -> list[dict]:
    """For every bottle with two or more sections: how far its sections differ.

    Returns a list of ``{"tube", "sections", "<figure>_pct", "max_pct"}``, where each
    figure's value is the largest relative difference between two sections [%] and
    ``max_pct`` the bottle's figure under the criterion's norm and weights.
    """
    by_tube: dict = {}
    for k, u in enumerate(figs.units):
        if u.section is not None and figs.problem[k] is None:
            by_tube.setdefault(u.tube, []).append(k)
    out = []
    for tube, idx in by_tube.items():
        if len(idx) < 2:
            continue
        V, bad = _log_figures(figs, crit, idx)
        if bad.any():
            continue
        d = criterion.span_difference(np.log(V.max(axis=0)) - np.log(V.min(axis=0)))
        m = float(crit.mismatch(d))
        row = {"tube": tube, "sections": [figs.units[k].section for k in idx]}
        row.update({f"{f}_pct": float(100 * x) for f, x in zip(crit.figures, d)})
        row["max_pct"] = 100 * m
        out.append(row)
    return out


def _nearest_reason(figs, crit, usable, k, group_of, size=2, quad_mode=None):
    """The nearest other unit to unit ``k`` and what kept them apart."""
    others = np.array([j for j in usable if j != k], dtype=np.int64)
    if others.size == 0:
        return {"unit": figs.units[k].label, "nearest": None,
                "reason": "no other usable unit in the set"}
    V, _ = _log_figures(figs, crit, np.r_[k, others])
    d = criterion.relative_difference(V[1:], V[0])
    tol = crit.tol()
    m = crit.mismatch(d)
    ok = crit.within(d)
    # nearest: the compatible unit of least mismatch if there is one, else the unit
    # closest to being compatible (least excess over tolerance)
    if ok.any():
        c = np.nonzero(ok)[0]
        best = c[np.argmin(m[c])]
        j = int(others[best])
        g = group_of.get(j)
        near = f"nearest compatible unit {figs.units[j].label} (mismatch {100 * m[best]:.2f} %)"
        if size == 2:
            reason = f"{near} is in group {g}; the optimum needs it there"
        elif g is not None:
            reason = f"{near} is in group {g}; the best grouping leaves no quad for this unit"
        else:
            reason = (f"{near} is also unmatched, but the units left make no quad within tolerance"
                      + (" (all four compatible)" if quad_mode == "all" else " (two pairs whose sums match)"))
    else:
        excess = np.max(d / tol, axis=1)
        best = int(np.argmin(excess))
        j = int(others[best])
        apart_ok = criterion.within_tolerance(d[best], tol, each=True)
        over = [f"{FIGURES[f][0]} differs by {100 * d[best, q]:.2f} % (tolerance {100 * tol[q]:g} %)"
                for q, f in enumerate(crit.figures) if not apart_ok[q]]
        reason = f"nearest unit {figs.units[j].label}: " + "; ".join(over)
    return {"unit": figs.units[k].label, "nearest": figs.units[j].label,
            "nearest_mismatch_pct": _pct(m[best]),
            "differences_pct": {f: _pct(d[best, q]) for q, f in enumerate(crit.figures)},
            "reason": reason}


def _prepare(units, position, crit, extrapolate, errors, bottle_balance_pct):
    figs = unit_figures(units, position, errors=errors, extrapolate=extrapolate)
    excluded = []
    usable = []
    balance = section_balance(figs, crit)
    unbalanced = {}
    if bottle_balance_pct is not None:
        _positive("bottle balance limit", bottle_balance_pct, field="bottle_balance")
        unbalanced = {b["tube"]: b["max_pct"] for b in balance if b["max_pct"] > bottle_balance_pct + 1e-9}
    for k, u in enumerate(figs.units):
        if figs.problem[k] is not None:
            excluded.append({"unit": u.label, "reason": figs.problem[k]})
        elif u.tube in unbalanced:
            excluded.append({"unit": u.label, "reason": f"its bottle's sections differ by "
                             f"{unbalanced[u.tube]:.2f} % (limit {bottle_balance_pct:g} %)"})
        else:
            usable.append(k)
    if not usable:
        raise MatchError("no unit can be matched at this position: " +
                         "; ".join(f"{e['unit']}: {e['reason']}" for e in excluded[:5]))
    V, bad = _log_figures(figs, crit, usable)
    for q in np.nonzero(bad)[0][::-1]:
        k = usable.pop(int(q))
        excluded.append({"unit": figs.units[k].label, "reason": "a compared figure is zero or undefined here"})
    V = V[~bad]
    return figs, usable, excluded, balance, V


def _spread_of(V, rows):
    sub = V[rows]
    return criterion.span_difference(np.log(sub.max(axis=0)) - np.log(sub.min(axis=0)))


def match_pairs(units: Sequence[FittedTriode], position, criterion: Criterion | None = None,
                extrapolate: bool = False, errors: bool = False, bottle_balance_pct: float | None = None,
                grades=DEFAULT_GRADES, time_limit: float = 60.0) -> MatchResult:
    """Pairs for push-pull: the most compatible pairs, then the least total mismatch.

    Parameters
    ----------
    units : sequence of FittedTriode
    position : FixedBias, CathodeBias or StackedSlot
    criterion : Criterion
        Default: Ia and gm within 5 %, mismatch = the larger relative difference.
    extrapolate : bool
        Let units whose data do not cover the position take part (flagged).
    errors : bool
        Propagate fit covariances to the units' figures.
    bottle_balance_pct : float or None
        Only use bottles whose sections agree within this many percent.
    grades : sequence of (name, max %)

    Returns
    -------
    MatchResult
    """
    crit = criterion or Criterion()
    figs, usable, excluded, balance, V = _prepare(units, position, crit, extrapolate, errors,
                                                  bottle_balance_pct)
    L = np.log(V)
    space = _Space(L, L, np.zeros(len(usable)), crit.tol(), crit.w(), crit.norm)
    i, j, m, opt = _solve_matching(space, time_limit=time_limit)
    return _finish(figs, crit, usable, excluded, balance, V, [(int(a), int(b)) for a, b in zip(i, j)],
                   list(m), opt, 2, None, grades)


def _finish(figs, crit, usable, excluded, balance, V, groups_local, mismatches, opt, size, quad_mode,
            grades, sides_local=None):
    groups = []
    order = np.argsort(mismatches, kind="stable") if len(mismatches) else []
    for gpos in order:
        rows = list(groups_local[gpos])
        if sides_local is not None and sides_local[gpos] is not None:
            a, b = sorted(sorted(x) for x in sides_local[gpos])
            sides_local[gpos] = (a, b)
            rows = list(a) + list(b)
        else:
            rows = sorted(rows)
        idx = [usable[r] for r in rows]
        labels = [figs.units[k].label for k in idx]
        spread = dict(zip(crit.figures, map(float, _spread_of(V, rows))))
        mis = float(mismatches[gpos])
        sides = side_diff = None
        if size == 2:
            kind = "pair"
        elif quad_mode == "all":
            kind = "four within tolerance"
        else:
            a, b = sides_local[gpos]
            sides = [[figs.units[usable[r]].label for r in a], [figs.units[usable[r]].label for r in b]]
            sa, sb = V[list(a)].sum(axis=0), V[list(b)].sum(axis=0)
            side_diff = dict(zip(crit.figures, map(float, 2 * np.abs(sa - sb) / (sa + sb))))
            within = crit.within(_spread_arr(spread, crit))
            kind = "two matched pairs" + (" (all four within tolerance)" if within else "")
        groups.append(Group(labels, idx, kind, mis, spread, grade_of(100 * mis, grades), sides, side_diff,
                            [figs.units[k].label for k in idx if figs.outside[k]]))
    group_of = {k: gi for gi, g in enumerate(groups, 1) for k in g.index}
    matched = set(group_of)
    unmatched = [_nearest_reason(figs, crit, usable, k, group_of, size, quad_mode)
                 for k in usable if k not in matched]
    return MatchResult(figs, crit, size, groups, unmatched, excluded, opt, balance, quad_mode, tuple(grades))


def _spread_arr(spread, crit):
    return np.array([spread[f] for f in crit.figures])


def _quad_candidates(V, crit, mode, limit):
    """Every feasible quad of a small set: (members, mismatch, sides) or None if too many."""
    n = V.shape[0]
    L = np.log(V)
    a, b = np.triu_indices(n, 1)
    d = criterion.span_difference(np.abs(L[a] - L[b]))
    ok = crit.within(d)
    A = np.zeros((n, n), bool)
    A[a[ok], b[ok]] = True
    A |= A.T
    pair_m = np.full((n, n), np.inf)
    pair_m[a[ok], b[ok]] = crit.mismatch(d[ok])
    pair_m[b[ok], a[ok]] = pair_m[a[ok], b[ok]]
    quads, mism = [], []
    if mode == "all":
        for p in range(n):
            up = np.nonzero(A[p, p + 1:])[0] + p + 1
            for q in up:
                c2 = up[(up > q) & A[q, up]]
                for r in c2:
                    c3 = c2[(c2 > r) & A[r, c2]]
                    for s in c3:
                        quads.append((p, int(q), int(r), int(s)))
                        if len(quads) > limit:
                            return None
        if not quads:
            return [], np.zeros(0), []
        Q = np.array(quads)
        span = L[Q].max(axis=1) - L[Q].min(axis=1)
        mism = crit.mismatch(criterion.span_difference(span))
        return [tuple(q) for q in Q], mism, [None] * len(Q)
    # two matched pairs: pairs (p, q) and (r, s), disjoint, whose summed figures match
    E = np.column_stack([a[ok], b[ok]])
    if E.shape[0] ** 2 / 2 > 50 * limit:
        return None
    em = pair_m[E[:, 0], E[:, 1]]
    S = V[E[:, 0]] + V[E[:, 1]]
    best: dict = {}
    for e in range(E.shape[0]):
        f = np.arange(e + 1, E.shape[0])
        disj = ~np.isin(E[f], E[e]).any(axis=1)
        f = f[disj]
        ds = criterion.relative_difference(S[f], S[e])
        okf = crit.within(ds)
        f, ds = f[okf], ds[okf]
        m = np.maximum(np.maximum(em[e], em[f]), crit.mismatch(ds))
        for g, mm in zip(f.tolist(), m.tolist()):
            key = tuple(sorted((*E[e], *E[g])))
            if key not in best or mm < best[key][0]:
                best[key] = (mm, (tuple(E[e]), tuple(E[g])))
        if len(best) > limit:
            return None
    keys = list(best)
    return keys, np.array([best[k][0] for k in keys]), [best[k][1] for k in keys]


def _set_packing(n, quads, mism, time_limit):
    """Most quads, then least total mismatch: exact set packing by HiGHS branch-and-cut."""
    from scipy.optimize import Bounds, LinearConstraint, milp  # HiGHS, imported when used (0.15 s)

    if not quads:
        return [], True
    Q = np.array(quads)
    k = Q.shape[0]
    B = 1.0 + (n / 4.0 + 1.0) * float(np.max(mism, initial=0.0) + 1e-12)
    A = sp.csr_matrix((np.ones(4 * k), (Q.ravel(), np.repeat(np.arange(k), 4))), shape=(n, k))
    res = milp(-(B - mism), constraints=[LinearConstraint(A, 0, 1)], integrality=np.ones(k),
               bounds=Bounds(0, 1), options={"time_limit": float(time_limit), "mip_rel_gap": 0.0})
    if res.x is None:
        raise MatchError(f"internal: quad set packing found no solution ({res.message})")
    return list(np.nonzero(res.x > 0.5)[0]), res.status == 0

def match_quads(units: Sequence[FittedTriode], position, criterion: Criterion | None = None,
                mode: str = "all", extrapolate: bool = False, errors: bool = False,
                bottle_balance_pct: float | None = None, grades=DEFAULT_GRADES,
                exact_limit: int = 20_000, time_limit: float = 60.0) -> MatchResult:
    """Quads for parallel push-pull.

    Parameters
    ----------
    mode : {"all", "sides"}
        ``"all"``: four units all within tolerance of each other (every pair of the
        four compatible); mismatch = the largest relative difference among the four.
        ``"sides"``: two compatible pairs (sides A and B) whose summed Ia and gm are
        within tolerance of each other; mismatch = the largest of the two pairs'
        mismatches and the sides' difference.
    exact_limit : int
        Up to this many feasible quads the answer is exact (set packing by
        branch-and-cut over every feasible quad).  Beyond, the quads are built as
        pairs of optimal pairs (both steps exact matchings) and reported with an upper
        bound on the number of quads (half the maximum number of pairs) and a lower
        bound on the total mismatch (each unit's mismatch to its 3rd-nearest
        compatible unit, or nearest for ``"sides"``, bounds every quad holding it, so
        q quads cost at least every 4th of the 4q smallest such bounds, largest first).

    Other parameters as :func:`match_pairs`.
    """
    if mode not in ("all", "sides"):
        raise MatchError(f"must be 'all' (four within tolerance) or 'sides' (two matched pairs), "
                         f"got {mode!r}", subject="quad mode", field="quad")
    crit = criterion or Criterion()
    t0 = time.perf_counter()
    figs, usable, excluded, balance, V = _prepare(units, position, crit, extrapolate, errors,
                                                  bottle_balance_pct)
    n = len(usable)
    L = np.log(V)
    cand = _quad_candidates(V, crit, mode, exact_limit) if n <= 400 else None
    if cand is not None:
        quads, mism, sides = cand
        chosen, solved = _set_packing(n, quads, mism, time_limit)
        groups = [quads[c] for c in chosen]
        mis = [float(mism[c]) for c in chosen]
        sds = [sides[c] for c in chosen]
        opt = Optimality("set packing over every feasible quad (HiGHS branch-and-cut)", bool(solved),
                         len(groups), float(sum(mis)), 0.0,
                         f"{len(quads)} feasible quads; " + ("optimal" if solved else "stopped at the time limit"),
                         {"units": n, "feasible_quads": len(quads),
                          "seconds": round(time.perf_counter() - t0, 3)})
        return _finish(figs, crit, usable, excluded, balance, V, groups, mis, opt, 4, mode, grades, sds)
    # large sets: pairs of optimal pairs
    space = _Space(L, L, np.zeros(n), crit.tol(), crit.w(), crit.norm)
    pi, pj, pm, popt = _solve_matching(space, time_limit=time_limit)
    if mode == "all":
        lo = np.minimum(L[pi], L[pj])
        hi = np.maximum(L[pi], L[pj])
        space2 = _Space(lo, hi, np.zeros(pi.size), crit.tol(), crit.w(), crit.norm)
    else:
        Ls = np.log(V[pi] + V[pj])
        space2 = _Space(Ls, Ls, pm, crit.tol(), crit.w(), crit.norm)
    qa, qb, qm, qopt = _solve_matching(space2, time_limit=time_limit)
    groups = [(int(pi[x]), int(pj[x]), int(pi[y]), int(pj[y])) for x, y in zip(qa, qb)]
    sds = [((int(pi[x]), int(pj[x])), (int(pi[y]), int(pj[y]))) for x, y in zip(qa, qb)]
    q = len(groups)
    nu = _k_nearest(space, 3 if mode == "all" else 1)
    # a quad's mismatch is at least the largest bound of its four units; over any q
    # quads that sum is at least every 4th of the 4q smallest bounds, largest first
    lb = float(np.sum(np.sort(nu)[:4 * q][::-1][0::4])) if q else 0.0
    total = float(np.sum(qm))
    qbound = popt.groups_bound // 2
    opt = Optimality(
        "pairs of optimal pairs (two exact matchings)", q >= qbound and total - lb <= 1e-9, qbound, lb,
        max(0.0, total - lb),
        f"more than {exact_limit} feasible quads or {n} > 400 units: at most {qbound} quads "
        f"(half the most pairs); the total mismatch bound: every quad is at least as far apart "
        f"as each member is from its {'3rd-' if mode == 'all' else ''}nearest compatible unit",
        {"units": n, "pairs": int(pi.size), "pair_step": popt.stats, "quad_step": qopt.stats,
         "seconds": round(time.perf_counter() - t0, 3)})
    return _finish(figs, crit, usable, excluded, balance, V, groups, list(qm), opt, 4, mode, grades, sds)


def match_units(units, position, group: int = 2, **kw) -> MatchResult:
    """Pairs (``group=2``) or quads (``group=4``); see :func:`match_pairs`, :func:`match_quads`."""
    if group == 2:
        kw.pop("mode", None)
        return match_pairs(units, position, **kw)
    if group == 4:
        return match_quads(units, position, **kw)
    raise MatchError(f"must be 2 (pairs) or 4 (quads), got {group!r}", subject="group", field="group")
