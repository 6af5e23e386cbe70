"""Matching: group tubes by what they do in the position they will work in.

A *position* is where a tube will work: a fixed-bias point (:class:`FixedBias`), a
cathode-biased common-cathode stage (:class:`CathodeBias`), or a slot of a stacked
stage (:class:`StackedSlot`, solved with :mod:`fitter.stage`).  Every unit's
figures in the position (Ia, gm, rp, mu, and for stages the gain) come from its
fitted model (:func:`unit_figures`); units whose fitted data do not cover the
position are flagged (``FittedTriode.outside_range``) and, unless asked otherwise,
kept out of the groups.

Criterion (the default, so that results can be checked by hand): with a tolerance
of P %, two units are *compatible* when their Ia and their gm at the position each
differ by at most P % of the pair's mean, ``|a - b| <= P/100 (a + b)/2``.  The
*mismatch* of a pair is its larger relative difference ``2 |a - b| / (a + b)``.
Other figures, per-figure tolerances and weights are options
(:class:`Criterion`): the mismatch is then the largest (or the sum) of the weighted
relative differences.

Pairs (:func:`match_pairs`) maximise the number of compatible pairs, then minimise
the sum of the pairs' mismatches: a maximum-cardinality, minimum-weight matching on
the compatibility graph, solved to the global optimum (see *Method* below).  Quads
(:func:`match_quads`) are either four units all within tolerance of each other, or
two matched pairs whose summed figures match each other (the two sides of a
parallel push-pull output); each group says which.  Stacked stages and channels
(:func:`assign_stacks`) put units in the bottom and top slots of N identical stacks
so that every stack is near the design target and the stacks match each other.

Method (pairs)
--------------
Relative differences are functions of log-figure differences,
``2 |a - b| / (a + b) = 2 tanh(|ln a - ln b| / 2)``, so compatible units lie within a
band of ``ln Ia``: units are sorted by it and candidate partners are found by window
search, never by looking at all n^2 pairs.  The matching is the linear programme

    maximise  sum_e (B - m_e) x_e
    subject to  x(delta(v)) <= 1            for every unit v,
                x(E(S)) <= (|S| - 1) / 2     for odd unit sets S (blossom cuts),
                x >= 0,

with B larger than any total mismatch, so one more pair always beats any saving in
mismatch (lexicographic objective).  It is solved by HiGHS on a growing edge set, one HiGHS instance kept between
rounds so that each re-solve starts from the last basis:

* start from near neighbours in ln Ia, plus one cut for every odd component of
  the Gallai-Edmonds set D (found by Edmonds' unweighted blossom search), which
  settles the number of pairs;
* *price* the edges left out: with dual values y_v, z_S an edge can only improve
  the LP if its mismatch is below ``(B/2 - y_u) + (B/2 - y_v) - sum z_S``, which
  bounds every unit's search radius to a small neighbourhood;
* separate blossom cuts: odd components of the fractional support, then the exact
  Padberg-Rao minimum odd cut (Gomory-Hu tree by Gusfield's method) on each
  support component carrying fractional edges.

When the LP solution is integral and no edge of the full compatibility graph
prices in, LP duality proves it optimal over every matching of the full graph
(weak duality with the dual (y, z); blossom inequalities hold for every matching):
the result is *certified* (``Optimality.exact``).  If the loop stops first (time
limit, or no violated cut found), the incumbent is the LP's integral part
completed to maximum cardinality; on up to 400 units, HiGHS branch-and-cut then
solves the edges left after reduced-cost fixing to optimality; otherwise the result
carries the LP bound and the gap.

Cost: candidate generation is O(n log n + w) for w window pairs; each LP round is
one warm-started simplex re-solve; the number of rounds grows with the number of
odd structures, roughly in proportion to n (see bench/match.py for measured figures).

References
----------
J. Edmonds, "Maximum matching and a polyhedron with 0,1-vertices", J. Res. Nat. Bur.
Standards 69B (1965) 125-130 (the matching polytope and blossom inequalities).
J. Edmonds, "Paths, trees, and flowers", Canad. J. Math. 17 (1965) 449-467 (the
blossom search used for maximum cardinality and the Gallai-Edmonds set).
M. W. Padberg and M. R. Rao, "Odd minimum cut-sets and b-matchings", Math. Oper.
Res. 7 (1982) 67-80 (exact separation of blossom inequalities).
D. Gusfield, "Very simple methods for all pairs network flow analysis", SIAM J.
Comput. 19 (1990) 143-155 (the Gomory-Hu tree built here).
M. Grötschel and O. Holland, "Solving matching problems with linear programming",
Math. Programming 33 (1985) 243-259 (cutting planes and pricing for matching).
Q. Huangfu and J. A. J. Hall, "Parallelizing the dual revised simplex method",
Math. Prog. Comp. 10 (2018) 119-142 (HiGHS, the LP/MIP solver behind scipy).
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass, field
from typing import Mapping, Sequence

import numpy as np
import scipy.sparse as sp
from scipy.optimize import Bounds, LinearConstraint, linprog, milp
from scipy.sparse.csgraph import connected_components

from .triode import FittedTriode, propagate

__all__ = [
    "CAUTION",
    "MatchError",
    "FixedBias",
    "CathodeBias",
    "StackedSlot",
    "Criterion",
    "UnitFigures",
    "Optimality",
    "Group",
    "MatchResult",
    "StackAssignment",
    "DEFAULT_GRADES",
    "unit_figures",
    "section_balance",
    "match_pairs",
    "match_quads",
    "match_units",
    "assign_stacks",
    "select_units",
    "grade_of",
    "relative_difference",
]

#: The one-line caution every report describing a circuit carries.
from . import CAUTION  # noqa: E402  (re-exported: one wording, in fitter/__init__.py)


class MatchError(ValueError):
    """Matching could not be done as asked; the message names what was wrong."""


def relative_difference(a, b):
    """``2 |a - b| / (a + b)``: the difference as a fraction of the pair's mean [-]."""
    a = np.asarray(a, float)
    b = np.asarray(b, float)
    return 2.0 * np.abs(a - b) / (a + b)


# ---------------------------------------------------------------------------
# The matching engine: nodes as boxes in log-figure space
# ---------------------------------------------------------------------------

_CHUNK = 2_000_000  # candidate pairs evaluated per vectorised batch


class _Space:
    """Nodes (units, or pairs of units) as boxes ``[lo, hi]`` in ln-figure space.

    The relative difference of figure f between two nodes is that of the extremes of
    their union, ``2 tanh(span_f / 2)`` with ``span_f = max(hi) - min(lo)``; two nodes
    are compatible when it is within ``tol_f`` for every figure.  Their mismatch is
    ``max_f w_f d_f`` (or the sum), and never below either node's own ``base``.
    Indices used inside are positions in the order of ``lo[:, 0]``.
    """

    def __init__(self, lo, hi, base, tol, weights, norm="max"):
        lo = np.asarray(lo, float)
        hi = np.asarray(hi, float)
        self.order = np.argsort(lo[:, 0], kind="stable")
        self.lo = lo[self.order]
        self.hi = hi[self.order]
        self.base = np.asarray(base, float)[self.order]
        self.tol = np.asarray(tol, float)
        self.w = np.asarray(weights, float)
        self.norm = norm
        self.n, self.nf = self.lo.shape
        with np.errstate(divide="ignore"):
            half = np.minimum(self.tol / 2.0, 1.0)
            self.span = np.where(half < 1.0, 2.0 * np.arctanh(np.minimum(half, 1 - 1e-16)), np.inf)
        self.key = self.lo[:, 0]
        # an upper bound of any compatible edge's mismatch
        wd = self.w * np.minimum(self.tol, 2.0)
        self.mmax = float(max(np.max(wd) if norm == "max" else np.sum(wd),
                              np.max(self.base, initial=0.0)))

    def measure(self, i, j):
        """(compatible, mismatch, per-figure relative differences) of node pairs."""
        span = np.maximum(self.hi[i], self.hi[j]) - np.minimum(self.lo[i], self.lo[j])
        d = 2.0 * np.tanh(span / 2.0)
        ok = np.all(d <= self.tol * (1 + 1e-12) + 1e-15, axis=1)
        wd = d * self.w
        m = wd.max(axis=1) if self.norm == "max" else wd.sum(axis=1)
        m = np.maximum(m, np.maximum(self.base[i], self.base[j]))
        return ok, m, d

    def span_for(self, radius):
        """Largest ln-span of the first figure an edge of mismatch < radius can have."""
        r = np.asarray(radius, float) / self.w[0]
        with np.errstate(invalid="ignore"):
            s = np.where(r >= 2.0, np.inf, 2.0 * np.arctanh(np.clip(r, 0, 2 - 1e-15) / 2.0))
        return np.minimum(s, self.span[0])

    def windows(self, rows, spans, backward=False):
        """Yield (i, j) batches: for each row i, the nodes j within ``spans`` of it."""
        rows = np.asarray(rows, dtype=np.int64)
        spans = np.broadcast_to(np.asarray(spans, float), rows.shape)
        if rows.size == 0:
            return
        if backward:
            start = np.searchsorted(self.key, self.key[rows] - spans * (1 + 1e-12) - 1e-15, "left")
            first, count = start, rows - start
        else:
            end = np.searchsorted(self.key, self.key[rows] + spans * (1 + 1e-12) + 1e-15, "right")
            first, count = rows + 1, end - rows - 1
        count = np.maximum(count, 0)
        csum = np.cumsum(count)
        lo_row = 0
        while lo_row < rows.size:
            base = csum[lo_row - 1] if lo_row else 0
            hi_row = int(np.searchsorted(csum, base + _CHUNK, "right"))
            hi_row = max(hi_row, lo_row + 1)
            c = count[lo_row:hi_row]
            tot = int(c.sum())
            if tot:
                i = np.repeat(rows[lo_row:hi_row], c)
                offs = np.arange(tot) - np.repeat(np.cumsum(c) - c, c)
                j = np.repeat(first[lo_row:hi_row], c) + offs
                yield (j, i) if backward else (i, j)
            lo_row = hi_row

    def candidate_count(self):
        end = np.searchsorted(self.key, self.key + self.span[0] * (1 + 1e-12) + 1e-15, "right")
        return int(np.sum(end - np.arange(self.n) - 1))

    def all_edges(self):
        I, J, M = [], [], []
        for i, j in self.windows(np.arange(self.n), self.span[0]):
            ok, m, _ = self.measure(i, j)
            I.append(i[ok]), J.append(j[ok]), M.append(m[ok])
        return _cat(I), _cat(J), _catf(M)

    def near_edges(self, k):
        """Compatible edges among the ``k`` next nodes in ln(first figure) order."""
        n = self.n
        i = np.repeat(np.arange(n), k)
        j = i + np.tile(np.arange(1, k + 1), n)
        keep = j < n
        i, j = i[keep], j[keep]
        ok, m, _ = self.measure(i, j)
        return i[ok], j[ok], m[ok]


def _cat(parts):
    return np.concatenate(parts).astype(np.int64) if parts else np.zeros(0, np.int64)


def _catf(parts):
    return np.concatenate(parts).astype(float) if parts else np.zeros(0, float)


@dataclass
class Optimality:
    """What is proven about a grouping.

    Attributes
    ----------
    method : str
        How it was found.
    exact : bool
        True when the grouping is proven optimal for the stated objective.
    groups_bound : int
        Upper bound on the number of groups any grouping could reach.
    mismatch_bound : float
        Lower bound on the total mismatch [-] of any grouping with as many groups.
    gap : float
        ``total - mismatch_bound`` [-] (0 when exact).
    note : str
        The argument, in words.
    stats : dict
        Solver figures (rounds, edges, cuts, seconds).
    """

    method: str
    exact: bool
    groups_bound: int
    mismatch_bound: float
    gap: float
    note: str
    stats: dict = field(default_factory=dict)

    def to_dict(self) -> dict:
        return {
            "method": self.method,
            "exact": bool(self.exact),
            "groups_bound": int(self.groups_bound),
            "mismatch_bound_pct": _pct(self.mismatch_bound),
            "gap_pct": _pct(self.gap),
            "note": self.note,
            "stats": dict(self.stats),
        }


def _pct(x):
    if x is None or not np.isfinite(x):
        return None
    return float(100.0 * x)


class _EdgeSet:
    """A growing, duplicate-free set of edges (i < j, sorted-space indices)."""

    def __init__(self, n):
        self.n = n
        self.I = np.zeros(0, np.int64)
        self.J = np.zeros(0, np.int64)
        self.M = np.zeros(0, float)
        self._keys = np.zeros(0, np.int64)

    def add(self, i, j, m):
        a = np.minimum(i, j)
        b = np.maximum(i, j)
        key = a * self.n + b
        key, first = np.unique(key, return_index=True)
        a, b, m = a[first], b[first], m[first]
        if self._keys.size:
            pos = np.searchsorted(self._keys, key)
            pos = np.minimum(pos, self._keys.size - 1)
            new = self._keys[pos] != key
            a, b, m, key = a[new], b[new], m[new], key[new]
        if key.size == 0:
            return 0
        self.I = np.concatenate([self.I, a])
        self.J = np.concatenate([self.J, b])
        self.M = np.concatenate([self.M, m])
        allk = np.concatenate([self._keys, key])
        self._keys = np.sort(allk)
        return int(key.size)

    def __len__(self):
        return self.I.size


def _solve_matching(space: _Space, exhaustive_limit: int = 30_000, max_rounds: int = 2000,
                    time_limit: float = 60.0, milp_limit: int = 400, large_rounds: int = 2000):
    """Maximum-cardinality, minimum-mismatch matching on ``space``.

    Returns (i, j, m, Optimality) with i, j indices into the caller's node order.
    """
    t_start = time.perf_counter()
    n = space.n
    if n < 2:
        z = np.zeros(0, np.int64)
        return z, z, np.zeros(0), Optimality("trivial", True, 0, 0.0, 0.0, "fewer than two units")
    B = 1.0 + (n / 2.0 + 1.0) * max(space.mmax, 1e-12)
    edges = _EdgeSet(n)
    n_candidates = space.candidate_count()
    complete = n_candidates <= exhaustive_limit
    if complete:
        edges.add(*space.all_edges())
    else:
        edges.add(*space.near_edges(8))
    cuts: list[np.ndarray] = []
    stats = {"units": n, "window_pairs": n_candidates, "lp_solves": 0, "priced_edges": 0,
             "cuts": 0, "complete_graph": bool(complete)}
    dead = np.zeros(n, bool)  # nodes known to have no compatible partner at all
    x = None
    clean = False
    priced_once = False
    status = "stalled"
    cut_keys: set = set()
    ge_dirty = True
    history = []
    lp = _WarmLP(n, B)
    if n > milp_limit:
        max_rounds = min(max_rounds, large_rounds)
    for _ in range(max_rounds):
        if len(history) >= 60 and history[-60] - history[-1] < 1e-6 * max(space.mmax, 1e-9):
            status = "stalled"  # the cut loop is creeping; hand over to branch-and-cut
            break
        if time.perf_counter() - t_start > time_limit:
            status = "time"
            break
        if ge_dirty:
            # the odd components of the Gallai-Edmonds set D settle the number of pairs
            _, outer = _edmonds_cardinality(n, edges.I, edges.J)
            for S in _d_components(edges, outer, n):
                S = np.sort(S)
                key = S.tobytes()
                if key not in cut_keys:
                    cut_keys.add(key)
                    cuts.append(S)
                    stats["cuts"] += 1
            ge_dirty = False
        x, y, zc, val = lp.solve(edges, cuts)
        stats["lp_solves"] += 1
        history.append(val)
        frac = (x > 1e-7) & (x < 1 - 1e-7)
        # pricing every round until the edge set first settles, then only when the cut
        # loop on the current edges is done (integral or out of cuts)
        new_cuts = []
        if frac.any() and (complete or priced_once):
            new_cuts = [S for S in (np.sort(S) for S in _odd_cuts(edges, x, frac, n))
                        if S.tobytes() not in cut_keys]
        if new_cuts:
            clean = complete
            for S in new_cuts:
                cut_keys.add(np.sort(S).tobytes())
            cuts.extend(np.sort(S) for S in new_cuts)
            stats["cuts"] += len(new_cuts)
            continue
        clean = complete
        if not complete:
            added = _price(space, edges, cuts, y, zc, B, dead)
            stats["priced_edges"] += added
            if added:
                ge_dirty = True
                history = []  # the LP changed: measure progress afresh
                continue
            clean = True
            if not priced_once:
                priced_once = True
                if frac.any():
                    continue
        status = "stalled" if frac.any() else "integral"
        break
    if status != "integral" and not complete and x is not None and not clean:
        # the last LP value bounds the full graph only once nothing prices in:
        # price and re-solve (no new cuts) until it does
        for _ in range(20):
            cuts_lp = cuts[:len(zc)]
            if _price(space, edges, cuts_lp, y, zc, B, dead) == 0:
                clean = True
                break
            x, y, zc, val = lp.solve(edges, cuts)
            stats["lp_solves"] += 1
    stats["seconds"] = round(time.perf_counter() - t_start, 3)
    stats["stop"] = status
    if status == "integral":
        sel = x > 0.5
        i, j, m = edges.I[sel], edges.J[sel], edges.M[sel]
        k = int(sel.sum())
        opt = Optimality(
            "LP with blossom cuts and pricing (HiGHS)", True, k, float(m.sum()), 0.0,
            "integral LP optimum with no edge of the full compatibility graph pricing in: "
            "optimal by LP duality", stats)
    else:
        # The cut loop stalled.  Incumbent: the LP's integral part, completed greedily and
        # augmented to maximum cardinality.  Small problems then go to branch-and-cut on
        # the edges that reduced-cost fixing leaves (exact); large ones keep the
        # incumbent with the LP bound and the gap.
        bound_val = val if clean else np.inf  # a valid bound only once nothing prices in
        inc = _incumbent(space, edges, x, n)
        i, j, m = inc
        solved = False
        method = "LP with blossom cuts and pricing (HiGHS); incumbent from its integral part"
        if n <= milp_limit and status == "stalled" and clean:
            fixed, fcuts = _fix_by_reduced_cost(space, edges, cuts, x, y, zc, val, B, n, dead, complete, inc)
            stats["fixed_edges"] = len(fixed)
            i2, j2, m2, solved = _milp(fixed, fcuts, n, B, max(1.0, time_limit - (time.perf_counter() - t_start)))
            method = "LP with blossom cuts, then branch-and-cut (HiGHS) after reduced-cost fixing"
            if (i2.size, -m2.sum()) >= (i.size, -m.sum()):
                i, j, m = i2, j2, m2
        k = i.size
        stats["seconds"] = round(time.perf_counter() - t_start, 3)
        k_bound = int(math.floor(bound_val / (B - space.mmax) + 1e-9)) if np.isfinite(bound_val) else n // 2
        k_bound = min(k_bound, n // 2)
        lb = max(0.0, k * B - bound_val) if k_bound <= k else 0.0
        gap = max(0.0, float(m.sum()) - lb)
        if solved:
            note = "branch-and-cut (HiGHS) to optimality on every edge that can be in an optimal matching"
            lb, gap, k_bound = float(m.sum()), 0.0, k
        elif gap <= 1e-9 and k_bound <= k:
            note = "the incumbent meets the LP bound: optimal"
            solved = True
        else:
            note = ("not proven optimal: the LP bound (with blossom cuts, pricing over the full "
                    "compatibility graph) leaves a gap")
        opt = Optimality(method, bool(solved), max(k, k_bound), lb, gap, note, stats)
    o = space.order
    return o[i], o[j], m, opt


class _WarmLP:
    """The matching LP kept in one HiGHS instance between rounds.

    Priced edges are added as columns and cuts as rows, and each re-solve starts
    from the previous basis (dual simplex), which is what makes many cut rounds
    cheap.  Uses the HiGHS object that scipy ships; when it is not available the
    LP is rebuilt and solved with :func:`scipy.optimize.linprog` every round.
    """

    def __init__(self, n, B):
        self.n = n
        self.B = B
        self.cols = 0
        self.rows_cuts = 0
        # scipy's HiGHS binding is private API: if this scipy lacks it or it changed
        # shape, fall back on the public (slower, cold-started) scipy.optimize.linprog
        try:
            from scipy.optimize._highspy import _core

            h = _core._Highs()
            h.setOptionValue("output_flag", False)
            h.setOptionValue("presolve", "off")
            h.changeObjectiveSense(_core.ObjSense.kMaximize)
            h.addRows(n, np.full(n, -np.inf), np.ones(n), 0, np.zeros(n, np.int32), np.zeros(0, np.int32),
                      np.zeros(0))
        except (ImportError, AttributeError, TypeError):  # pragma: no cover - depends on the scipy build
            self.h = None
            return
        self.core = _core
        self.h = h

    def solve(self, edges: _EdgeSet, cuts):
        if self.h is None:
            return _lp(edges, cuts, self.n, self.B)
        h, n = self.h, self.n
        E = len(edges)
        # new columns keep the basis primal feasible (primal simplex); new cut rows keep
        # it dual feasible (dual simplex)
        h.setOptionValue("simplex_strategy", 4 if self.cols == 0 else 1)
        if E > self.cols:
            I, J = edges.I[self.cols:], edges.J[self.cols:]
            k = I.size
            rows = [I, J]
            colidx = [np.arange(k), np.arange(k)]
            if self.rows_cuts:
                member = _cut_membership(cuts[:self.rows_cuts], n)
                both = member[I].multiply(member[J]).tocoo()
                rows.append(n + both.col)
                colidx.append(both.row)
            r = np.concatenate(rows)
            c = np.concatenate(colidx)
            order = np.lexsort((r, c))
            r, c = r[order], c[order]
            starts = np.searchsorted(c, np.arange(k)).astype(np.int32)
            h.addCols(k, self.B - edges.M[self.cols:], np.zeros(k), np.full(k, np.inf), r.size, starts,
                      r.astype(np.int32), np.ones(r.size))
            self.cols = E
        if len(cuts) > self.rows_cuts:
            new = cuts[self.rows_cuts:]
            member = _cut_membership(new, n)
            both = member[edges.I].multiply(member[edges.J]).T.tocsr()  # cut x edge
            both.sort_indices()
            h.addRows(len(new), np.full(len(new), -np.inf), np.array([(len(S) - 1) / 2.0 for S in new]),
                      both.nnz, both.indptr[:-1].astype(np.int32), both.indices.astype(np.int32),
                      np.ones(both.nnz))
            self.rows_cuts = len(cuts)
        h.run()
        status = h.getModelStatus()
        if status != self.core.HighsModelStatus.kOptimal:
            # numerical trouble with the warm basis: solve from scratch once
            return _lp(edges, cuts, n, self.B)
        sol = h.getSolution()
        x = np.asarray(sol.col_value, float)
        dual = np.abs(np.asarray(sol.row_dual, float))
        val = float(h.getInfo().objective_function_value)
        return x, dual[:n], dual[n:], val


def _lp(edges: _EdgeSet, cuts, n, B):
    E = len(edges)
    cols = np.arange(E)
    rows = [np.concatenate([edges.I, edges.J])]
    cidx = [np.concatenate([cols, cols])]
    rhs = [np.ones(n)]
    if cuts:
        member = _cut_membership(cuts, n)
        both = member[edges.I].multiply(member[edges.J]).tocoo()
        rows.append(n + both.col)
        cidx.append(both.row)
        rhs.append(np.array([(len(S) - 1) / 2.0 for S in cuts]))
    r = np.concatenate(rows)
    c = np.concatenate(cidx)
    A = sp.csr_matrix((np.ones(r.size), (r, c)), shape=(n + len(cuts), E))
    res = linprog(-(B - edges.M), A_ub=A, b_ub=np.concatenate(rhs), bounds=(0, None),
                  method="highs")
    if res.status != 0:
        raise MatchError(f"internal: the matching LP failed ({res.message})")
    dual = -np.asarray(res.ineqlin.marginals)
    return res.x, dual[:n], dual[n:], -res.fun


def _cut_membership(cuts, n):
    r = np.concatenate(cuts)
    c = np.repeat(np.arange(len(cuts)), [len(S) for S in cuts])
    return sp.csr_matrix((np.ones(r.size), (r, c)), shape=(n, len(cuts)))


def _price(space: _Space, edges: _EdgeSet, cuts, y, zc, B, dead, per_node=6, slack=0.0):
    """Add the edges of the full compatibility graph with reduced cost above ``-slack``.

    With ``slack = 0`` these are the edges that could improve the LP; ``per_node``
    keeps only the most violated few per node (None: all of them).
    """
    pi = B / 2.0 - y + slack / 2.0
    big = pi > space.mmax + 1e-9  # wide-radius nodes (uncovered in the LP)
    live = ~dead
    pmax = float(np.max(pi[~big], initial=0.0))
    member = _cut_membership([S for S, z in zip(cuts, zc) if z > 1e-12], space.n) if np.any(zc > 1e-12) else None
    zpos = zc[zc > 1e-12]
    found_i, found_j, found_m, found_v = [], [], [], []

    def scan(rows, spans, backward=False, seen=None):
        for i, j in space.windows(rows, spans, backward):
            ok, m, _ = space.measure(i, j)
            if seen is not None:
                seen[i[ok]] = True
                seen[j[ok]] = True
            i, j, m = i[ok], j[ok], m[ok]
            thr = pi[i] + pi[j]
            if member is not None and i.size:
                thr = thr - member[i].multiply(member[j]) @ zpos
            viol = thr - m
            s = viol > (1e-9 * B if slack == 0 else -1e-9 * B)
            found_i.append(i[s]), found_j.append(j[s]), found_m.append(m[s]), found_v.append(viol[s])

    small = np.nonzero(~big & live)[0]
    rad = pi[small] + pmax
    keep = rad > 0
    scan(small[keep], space.span_for(rad[keep]))
    wide = np.nonzero(big & live)[0]
    if wide.size:
        anyc = np.zeros(space.n, bool)
        for back in (False, True):
            scan(wide, space.span[0], backward=back, seen=anyc)
        # a wide node with no compatible partner at all never needs scanning again
        dead[wide[~anyc[wide]]] = True
    I, J, M, V = _cat(found_i), _cat(found_j), _catf(found_m), _catf(found_v)
    if I.size == 0:
        return 0
    if per_node is None:
        return edges.add(I, J, M)
    # the most violated few per node keep the LP small
    order = np.argsort(-V, kind="stable")
    I, J, M = I[order], J[order], M[order]
    rank_i = _rank_within(I)
    rank_j = _rank_within(J)
    sel = (rank_i < per_node) | (rank_j < per_node)
    return edges.add(I[sel], J[sel], M[sel])


def _rank_within(keys):
    """Rank of each element among equal keys, in the current order."""
    order = np.argsort(keys, kind="stable")
    k = keys[order]
    start = np.r_[0, np.nonzero(np.diff(k))[0] + 1]
    ranks = np.arange(k.size) - np.repeat(start, np.diff(np.r_[start, k.size]))
    out = np.empty_like(ranks)
    out[order] = ranks
    return out


def _odd_cuts(edges: _EdgeSet, x, frac, n):
    """Blossom cuts violated by the LP solution ``x``.

    Two quick separations first (odd components of the fractional support, and of
    the whole support); if they find nothing, the exact Padberg-Rao separation
    (minimum odd cut of a Gomory-Hu tree) on each component of the support that
    carries fractional edges.  A violated odd set always lies within one component:
    ``|S| - 2 x(E(S))`` adds up over the parts and no part is negative.
    """
    out = _component_cuts(edges, x, frac, n)
    if out:
        return out
    supp = x > 1e-7
    out = _component_cuts(edges, x, supp, n)
    if out:
        return out
    return _padberg_rao(edges, x, supp, frac, n)


def _component_cuts(edges, x, sel, n):
    fi, fj = edges.I[sel], edges.J[sel]
    g = sp.coo_matrix((np.ones(fi.size), (fi, fj)), shape=(n, n))
    _, lab = connected_components(g, directed=False)
    nodes = np.unique(np.concatenate([fi, fj]))
    comp = lab[nodes]
    size = np.bincount(comp, minlength=lab.max() + 1)
    inside = np.full(n, -1)
    inside[nodes] = comp
    same = (inside[edges.I] >= 0) & (inside[edges.I] == inside[edges.J])
    load = np.bincount(inside[edges.I][same], weights=x[same], minlength=size.size)
    out = []
    for c in np.unique(comp):
        s = size[c]
        if s % 2 == 1 and load[c] > (s - 1) / 2.0 + 1e-6:
            out.append(nodes[comp == c])
    return out


def _padberg_rao(edges, x, supp, frac, n, scale=1e7, max_nodes=1500):
    from scipy.sparse.csgraph import maximum_flow

    si, sj, sx = edges.I[supp], edges.J[supp], x[supp]
    g = sp.coo_matrix((np.ones(si.size), (si, sj)), shape=(n, n))
    _, lab = connected_components(g, directed=False)
    deg = np.bincount(si, weights=sx, minlength=n) + np.bincount(sj, weights=sx, minlength=n)
    out = []
    seen: set = set()
    for c in np.unique(lab[edges.I[frac]]):
        nodes = np.nonzero(lab == c)[0]
        k = nodes.size
        if k < 3 or k > max_nodes:
            continue
        loc = np.full(n, -1)
        loc[nodes] = np.arange(k)
        m = (loc[si] >= 0)
        a, b, w = loc[si[m]], loc[sj[m]], sx[m]
        slack = np.maximum(0.0, 1.0 - deg[nodes])
        # node k is the slack node; it is a terminal when k is odd (even terminal count)
        ra = np.concatenate([a, b, np.arange(k), np.full(k, k)])
        rb = np.concatenate([b, a, np.full(k, k), np.arange(k)])
        cap = np.concatenate([w, w, slack, slack])
        capi = np.round(cap * scale).astype(np.int64)
        keep = capi > 0
        C = sp.csr_matrix((capi[keep], (ra[keep], rb[keep])), shape=(k + 1, k + 1))
        C.sum_duplicates()
        terminal = np.ones(k + 1, bool)
        terminal[k] = (k % 2 == 1)
        # Gusfield's Gomory-Hu tree: parent[i], cut value and the source side
        parent = np.zeros(k + 1, int)
        for s in range(1, k + 1):
            t = parent[s]
            res = maximum_flow(C, s, t)
            val = res.flow_value / scale
            side = _residual_side(C, res.flow, s)
            for v in range(s + 1, k + 1):
                if side[v] and parent[v] == t:
                    parent[v] = s
            todd = int(np.sum(terminal & side)) % 2 == 1
            if todd and val < 1.0 - 1e-6:
                # every T-odd cut of the tree below 1 is a violated blossom inequality
                S = side[:k] if not side[k] else ~side[:k]
                S = nodes[S]
                if S.size % 2 == 1 and S.size >= 3:
                    key = S.tobytes()
                    if key not in seen:
                        seen.add(key)
                        out.append(S)
    return out


def _residual_side(C, flow, s):
    R = (C - flow).tocsr()
    R.data = (R.data > 0).astype(float)
    R.eliminate_zeros()
    from scipy.sparse.csgraph import breadth_first_order

    reach = breadth_first_order(R, s, directed=True, return_predecessors=False)
    side = np.zeros(C.shape[0], bool)
    side[reach] = True
    return side


def _incumbent(space, edges, x, n):
    """A maximum-cardinality matching near the LP solution: its heavy edges first."""
    x = np.concatenate([x, np.zeros(len(edges) - x.size)])
    order = np.lexsort((edges.M, -x))
    mate0 = -np.ones(n, np.int64)
    for e in order.tolist():
        u, v = int(edges.I[e]), int(edges.J[e])
        if mate0[u] < 0 and mate0[v] < 0:
            mate0[u], mate0[v] = v, u
    I, J = edges.I, edges.J
    if 0 < len(edges) and not _complete_hint(space, edges):
        # augmenting paths may need edges the LP never priced in: give the units the
        # greedy start leaves single, and their partners' partners, all their edges
        free = np.nonzero(mate0 < 0)[0]
        rows = np.unique(np.concatenate([free, mate0[np.unique(_neighbours(edges, free))]]))
        rows = rows[rows >= 0]
        extra_i, extra_j = [I], [J]
        for back in (False, True):
            for a, b in space.windows(rows, space.span[0], backward=back):
                ok, _, _ = space.measure(a, b)
                extra_i.append(a[ok]), extra_j.append(b[ok])
        I, J = np.concatenate(extra_i), np.concatenate(extra_j)
        key = np.unique(np.minimum(I, J) * n + np.maximum(I, J))
        I, J = key // n, key % n
    mate, _ = _edmonds_cardinality(n, I, J, start=mate0)
    u = np.nonzero(mate > np.arange(n))[0]
    _, m, _ = space.measure(u, mate[u])
    return u, mate[u], m


def _complete_hint(space, edges):
    return len(edges) >= space.candidate_count()


def _neighbours(edges, nodes):
    mask = np.zeros(edges.n, bool)
    mask[nodes] = True
    return np.concatenate([edges.J[mask[edges.I]], edges.I[mask[edges.J]]])


def _fix_by_reduced_cost(space, edges, cuts, x, y, zc, val, B, n, dead, complete, inc):
    u, v, m = inc
    inc_val = float(np.sum(B - m))
    delta = max(0.0, val - inc_val) + 1e-9 * B
    zsum = np.zeros(len(edges))
    lp_cuts = cuts[:len(zc)]  # the cuts the last LP was solved with
    if lp_cuts and np.any(zc > 1e-12):
        member = _cut_membership(lp_cuts, n)
        zsum = member[edges.I].multiply(member[edges.J]) @ zc
    rc = (B - edges.M) - y[edges.I] - y[edges.J] - zsum
    keep = rc >= -delta
    kept = _EdgeSet(n)
    kept.add(edges.I[keep], edges.J[keep], edges.M[keep])
    kept.add(u, v, m)
    if not complete:
        _price(space, kept, lp_cuts, y, zc, B, dead, per_node=None, slack=delta)
    return kept, cuts


def _milp(edges: _EdgeSet, cuts, n, B, time_limit):
    E = len(edges)
    if E == 0:
        z = np.zeros(0, np.int64)
        return z, z, np.zeros(0), True
    cols = np.arange(E)
    A = sp.csr_matrix((np.ones(2 * E), (np.concatenate([edges.I, edges.J]), np.concatenate([cols, cols]))),
                      shape=(n, E))
    cons = [LinearConstraint(A, 0, 1)]
    if cuts:
        member = _cut_membership(cuts, n)
        both = member[edges.I].multiply(member[edges.J]).T.tocsr()
        cons.append(LinearConstraint(both, 0, np.array([(len(S) - 1) // 2 for S in cuts], float)))
    res = milp(-(B - edges.M), constraints=cons, integrality=np.ones(E), bounds=Bounds(0, 1),
               options={"time_limit": float(time_limit), "mip_rel_gap": 0.0})
    if res.x is None:
        raise MatchError(f"internal: the matching branch-and-cut found no solution ({res.message})")
    sel = res.x > 0.5
    return edges.I[sel], edges.J[sel], edges.M[sel], res.status == 0


# ---------------------------------------------------------------------------
# Maximum cardinality (unweighted Edmonds) and the Gallai-Edmonds odd sets
# ---------------------------------------------------------------------------


def _adjacency(n, I, J):
    """CSR adjacency (indptr, neighbours) of an undirected edge list."""
    a = np.concatenate([I, J])
    b = np.concatenate([J, I])
    order = np.argsort(a, kind="stable")
    a, b = a[order], b[order]
    indptr = np.searchsorted(a, np.arange(n + 1))
    return indptr, b


def _edmonds_cardinality(n, I, J, start=None):
    """A maximum-cardinality matching and the set D of the Gallai-Edmonds decomposition.

    Edmonds' blossom-shrinking search (J. Edmonds, "Paths, trees, and flowers",
    Canad. J. Math. 17 (1965) 449-467), one alternating tree at a time from each
    uncovered vertex, after a greedy start.  When no augmenting path is left, the
    vertices labelled *outer* by the failed searches are exactly those that some
    maximum matching leaves uncovered (the set D of the Gallai-Edmonds theorem); each
    connected component of the graph induced by D is factor-critical, so odd.

    Returns
    -------
    mate : ndarray of int
        Partner of every vertex, -1 if uncovered.
    outer : ndarray of bool
        Membership of D.
    """
    indptr, nbr = _adjacency(n, I, J)
    indptr = indptr.tolist()
    nbr = nbr.tolist()
    mate = [-1] * n if start is None else [int(v) for v in start]
    for u, v in zip(I.tolist(), J.tolist()):
        if mate[u] < 0 and mate[v] < 0:
            mate[u] = v
            mate[v] = u
    parent = [-1] * n
    base = list(range(n))
    used = [False] * n

    def search(root):
        touched = [root]
        used[root] = True
        queue = [root]
        qi = 0
        found = False

        def lca(a, b):
            seen = set()
            while True:
                a = base[a]
                seen.add(a)
                if a == root:
                    break
                a = parent[mate[a]]
            while True:
                b = base[b]
                if b in seen:
                    return b
                b = parent[mate[b]]

        def mark(v, b, child, inb):
            while base[v] != b:
                inb.add(base[v])
                inb.add(base[mate[v]])
                parent[v] = child
                child = mate[v]
                v = parent[mate[v]]

        while qi < len(queue) and not found:
            v = queue[qi]
            qi += 1
            for k in range(indptr[v], indptr[v + 1]):
                u = nbr[k]
                if base[v] == base[u] or mate[v] == u:
                    continue
                if u == root or (mate[u] >= 0 and parent[mate[u]] >= 0):
                    b = lca(v, u)
                    inb = set()
                    mark(v, b, u, inb)
                    mark(u, b, v, inb)
                    for w in touched:
                        if base[w] in inb:
                            base[w] = b
                            if not used[w]:
                                used[w] = True
                                queue.append(w)
                elif parent[u] < 0:
                    parent[u] = v
                    touched.append(u)
                    if mate[u] < 0:
                        while u >= 0:
                            pv = parent[u]
                            ppv = mate[pv]
                            mate[u] = pv
                            mate[pv] = u
                            u = ppv
                        found = True
                        break
                    w = mate[u]
                    used[w] = True
                    touched.append(w)
                    queue.append(w)
        outer_set = [w for w in touched if used[w]]
        for w in touched:
            parent[w] = -1
            base[w] = w
            used[w] = False
        return found, outer_set

    outer = np.zeros(n, bool)
    degree = np.diff(np.asarray(indptr))
    changed = True
    while changed:
        changed = False
        outer[:] = False
        for r in range(n):
            if mate[r] < 0 and degree[r] > 0 and not outer[r]:
                found, out = search(r)
                if found:
                    changed = True
                else:
                    outer[out] = True
    outer |= degree == 0
    return np.array(mate, dtype=np.int64), outer


def _d_components(edges: _EdgeSet, outer, n):
    """Node sets of the components (of three or more) of the graph induced by D."""
    sel = outer[edges.I] & outer[edges.J]
    g = sp.coo_matrix((np.ones(int(sel.sum())), (edges.I[sel], edges.J[sel])), shape=(n, n))
    _, lab = connected_components(g, directed=False)
    lab = np.where(outer, lab, -1)
    sizes = np.bincount(lab[lab >= 0], minlength=lab.max() + 1 if lab.max() >= 0 else 0)
    return [np.nonzero(lab == c)[0] for c in np.nonzero(sizes >= 3)[0]]


# ---------------------------------------------------------------------------
# Positions
# ---------------------------------------------------------------------------


def _positive(name, v, allow_zero=False):
    if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v):
        raise MatchError(f"{name}: must be a finite number, got {v!r}")
    if v < 0 or (v == 0 and not allow_zero):
        raise MatchError(f"{name}: must be {'non-negative' if allow_zero else 'positive'}, got {v!r}")


@dataclass(frozen=True)
class FixedBias:
    """A fixed-bias working point.

    Parameters
    ----------
    va : float
        Plate-to-cathode voltage [V].
    vg : float
        Grid-to-cathode voltage [V].
    """

    va: float
    vg: float

    def __post_init__(self):
        _positive("position va", self.va)
        if isinstance(self.vg, bool) or not isinstance(self.vg, (int, float)) or not math.isfinite(self.vg):
            raise MatchError(f"position vg: must be a finite number, got {self.vg!r}")

    def describe(self) -> str:
        return f"fixed bias: va = {self.va:g} V, vg = {self.vg:g} V"

    def to_dict(self) -> dict:
        return {"kind": "fixed-bias", "va_v": float(self.va), "vg_v": float(self.vg)}


@dataclass(frozen=True)
class CathodeBias:
    """A cathode-biased common-cathode stage: each unit finds its own working point.

    Parameters
    ----------
    b_plus : float
        Supply voltage [V].
    ra : float
        Plate resistor (or the DC resistance of the load) [ohm].
    rk : float
        Cathode resistor [ohm].
    bypassed : bool
        Whether Rk is bypassed (sets the gain figure).
    """

    b_plus: float
    ra: float
    rk: float
    bypassed: bool = True

    def __post_init__(self):
        _positive("position B+", self.b_plus)
        _positive("position Ra", self.ra, allow_zero=True)
        _positive("position Rk", self.rk)

    def stage(self):
        from .stage import CommonCathode

        return CommonCathode(b_plus=float(self.b_plus), ra=float(self.ra), rk=float(self.rk),
                             ck=1.0 if self.bypassed else None) if self.ra > 0 else None

    def describe(self) -> str:
        return (f"cathode bias: B+ = {self.b_plus:g} V, Ra = {self.ra:g} ohm, Rk = {self.rk:g} ohm"
                f" ({'bypassed' if self.bypassed else 'unbypassed'})")

    def to_dict(self) -> dict:
        return {"kind": "cathode-bias", "b_plus_v": float(self.b_plus), "ra_ohm": float(self.ra),
                "rk_ohm": float(self.rk), "bypassed": bool(self.bypassed)}


@dataclass(frozen=True)
class StackedSlot:
    """One slot of a stacked stage (:class:`fitter.stage.Stack`) with a given partner.

    Parameters
    ----------
    stack : fitter.stage.Stack
    slot : {"bottom", "top"}
        The slot the units being matched go in.
    partner : FittedTriode
        The unit in the other slot (for example a reference unit of the type).
    """

    stack: object
    slot: str
    partner: FittedTriode

    def __post_init__(self):
        from .stage import Stack

        if not isinstance(self.stack, Stack):
            raise MatchError(f"stacked slot: 'stack' must be a fitter.stage.Stack, got {type(self.stack).__name__}")
        if self.slot not in ("bottom", "top"):
            raise MatchError(f"stacked slot: 'slot' must be 'bottom' or 'top', got {self.slot!r}")
        if not isinstance(self.partner, FittedTriode):
            raise MatchError("stacked slot: 'partner' must be a FittedTriode")

    def describe(self) -> str:
        other = "top" if self.slot == "bottom" else "bottom"
        return (f"{self.slot} slot of a stack (B+ = {self.stack.b_plus:g} V, Rk = {self.stack.rk:g} ohm, "
                f"R top = {self.stack.r_top:g} ohm), {other} = {self.partner.label}")

    def to_dict(self) -> dict:
        return {"kind": "stacked-slot", "slot": self.slot, "partner": self.partner.label,
                "circuit": self.stack.to_dict()}


#: figures every position gives; stages also give "gain"
FIGURES = {
    "ia": ("Ia", "mA", 1e3),
    "gm": ("gm", "mA/V", 1e3),
    "rp": ("rp", "kohm", 1e-3),
    "mu": ("mu", "", 1.0),
    "gain": ("gain", "", 1.0),
}


@dataclass
class UnitFigures:
    """Each unit's figures in a position (SI units).

    Attributes
    ----------
    units : list of FittedTriode
    values : dict
        ``ia`` [A], ``gm`` [S], ``rp`` [ohm], ``mu`` [-], ``va`` [V], ``vg`` [V] (the
        unit's own working point), and ``gain`` [-] for stage positions; arrays.
    errors : dict or None
        One-sigma errors of the same figures from the fit covariance (NaN: unknown).
    outside : ndarray of bool
        The position lies outside the unit's fitted data (extrapolated).
    problem : list of str or None
        Why a unit cannot be matched at this position (None: usable).
    """

    position: object
    units: list
    values: dict
    errors: dict | None
    outside: np.ndarray
    problem: list

    @property
    def labels(self):
        return [u.label for u in self.units]

    def unit_dict(self, k: int) -> dict:
        d = {"unit": self.units[k].label, "va_v": _f(self.values["va"][k]), "vg_v": _f(self.values["vg"][k])}
        for name, (_, unit, scale) in FIGURES.items():
            if name in self.values:
                key = f"{name}_{unit.replace('/', '_per_').lower()}" if unit else name
                key = {"ia_ma": "ia_ma", "gm_ma_per_v": "gm_ms", "rp_kohm": "rp_kohm"}.get(key, key)
                d[key] = _f(self.values[name][k] * scale)
                if self.errors is not None:
                    d[key + "_err"] = _f(self.errors[name][k] * scale)
        d["outside_data"] = bool(self.outside[k])
        return d


def _f(x):
    x = float(x)
    return x if math.isfinite(x) else None


def _model_groups(units):
    groups: dict = {}
    for k, u in enumerate(units):
        key = (u.model.name,) + tuple(u.params[p] for p in u.model.grid_param_names)
        groups.setdefault(key, []).append(k)
    return groups


def _fixed_bias_values(units, va, vg):
    n = len(units)
    out = {k: np.full(n, np.nan) for k in ("ia", "gm", "rp", "mu")}
    for idx in _model_groups(units).values():
        model = units[idx[0]].model
        params = {}
        for p in model.param_names:
            vals = np.array([units[k].params[p] for k in idx], float)
            params[p] = float(vals[0]) if p in model.grid_param_names else vals
        ia = np.broadcast_to(model.current(va, vg, **params), (len(idx),))
        dva, dvg = model.voltage_gradient(va, vg, **params)
        dva = np.broadcast_to(dva, (len(idx),))
        dvg = np.broadcast_to(dvg, (len(idx),))
        with np.errstate(divide="ignore"):
            rp = np.where(dva > 0, 1.0 / np.where(dva > 0, dva, 1.0), np.inf)
        out["ia"][idx] = ia
        out["gm"][idx] = dvg
        out["rp"][idx] = rp
        out["mu"][idx] = dvg * rp
    out["va"] = np.full(n, float(va))
    out["vg"] = np.full(n, float(vg))
    return out


def _stage_values(position, units):
    from .stage import spread

    if isinstance(position, CathodeBias):
        st = position.stage()
        if st is None:
            raise MatchError("position Ra: a cathode-biased stage needs a plate resistor above 0")
        r = spread(st, units)
        v = r.values
        pos = "tube"
    else:
        if position.slot == "bottom":
            r = spread(position.stack, units, tops=position.partner)
        else:
            r = spread(position.stack, [position.partner] * len(units), tops=list(units))
        v = r.values
        pos = position.slot
    return {
        "ia": np.asarray(v[f"{pos}.ia"], float), "gm": np.asarray(v[f"{pos}.gm"], float),
        "rp": np.asarray(v[f"{pos}.rp"], float), "mu": np.asarray(v[f"{pos}.mu"], float),
        "va": np.asarray(v[f"{pos}.va"], float), "vg": np.asarray(v[f"{pos}.vgk"], float),
        "gain": np.asarray(v["gain"], float),
    }


def _values(position, units):
    if isinstance(position, FixedBias):
        return _fixed_bias_values(units, position.va, position.vg)
    if isinstance(position, (CathodeBias, StackedSlot)):
        return _stage_values(position, units)
    raise MatchError(
        f"unknown position {type(position).__name__}; use FixedBias, CathodeBias or StackedSlot")


def unit_figures(units: Sequence[FittedTriode], position, errors: bool = False,
                 extrapolate: bool = False) -> UnitFigures:
    """Every unit's figures in ``position``, computed from its fitted model.

    Parameters
    ----------
    units : sequence of FittedTriode
    position : FixedBias, CathodeBias or StackedSlot
    errors : bool
        Also propagate the fit covariance to every figure
        (:func:`fitter.triode.propagate`, one unit at a time).
    extrapolate : bool
        Let units whose fitted data do not cover the position take part (they stay
        flagged ``outside``); by default they are kept out with that reason.

    Raises
    ------
    MatchError
        No units, or the position is outside every unit's data (unless
        ``extrapolate``).
    """
    units = list(units)
    if not units:
        raise MatchError("no units to match: the set is empty")
    for u in units:
        if not isinstance(u, FittedTriode):
            raise MatchError(f"units must be FittedTriode objects, got {type(u).__name__}")
    values = _values(position, units)
    n = len(units)
    outside = np.array([u.outside_range(values["va"][k], values["vg"][k]) for k, u in enumerate(units)], bool)
    if outside.all() and not extrapolate:
        u = units[0]
        rng = ""
        if u.valid_range:
            rng = (f" (e.g. {u.label} was fitted over va {u.valid_range['va'][0]:.4g}..{u.valid_range['va'][1]:.4g} V, "
                   f"vg {u.valid_range['vg'][0]:.4g}..{u.valid_range['vg'][1]:.4g} V)")
        raise MatchError(f"the position ({position.describe()}) is outside every unit's fitted data{rng}; "
                         "choose a point inside the measured curves or allow extrapolation")
    problem: list = [None] * n
    for k in range(n):
        ia, gm = values["ia"][k], values["gm"][k]
        if not (np.isfinite(ia) and np.isfinite(gm)):
            problem[k] = "its model gives no finite figures at this position"
        elif ia <= 0 or gm <= 0:
            problem[k] = "cut off at this position (Ia = 0)"
        elif outside[k] and not extrapolate:
            problem[k] = "the position is outside its fitted data (extrapolation not allowed)"
    errs = None
    if errors:
        names = [k for k in ("ia", "gm", "rp", "mu", "gain") if k in values]
        errs = {k: np.full(n, np.nan) for k in names}
        for k, u in enumerate(units):
            if u.covariance is None or not u.free:
                continue

            def fn(t):
                v = _values(position, [t])
                return np.array([v[name][0] for name in names])

            _, s = propagate(fn, u)
            for name, e in zip(names, s):
                errs[name][k] = e
    return UnitFigures(position, units, values, errs, outside, problem)


# ---------------------------------------------------------------------------
# Criterion, grades
# ---------------------------------------------------------------------------


@dataclass(frozen=True)
class Criterion:
    """When two units are compatible, and how their mismatch is measured.

    Parameters
    ----------
    tolerance_pct : float
        Default tolerance P [%]: figures may differ by at most P % of the pair's mean.
    figures : tuple of str
        Figures compared (of ``ia``, ``gm``, ``rp``, ``mu``, ``gain``).
    tolerances : mapping, optional
        Per-figure tolerance [%] overriding ``tolerance_pct``.
    weights : mapping, optional
        Per-figure weight of the relative difference in the mismatch (default 1).
    norm : {"max", "sum"}
        Mismatch = the largest weighted relative difference, or their sum.
    """

    tolerance_pct: float = 5.0
    figures: tuple = ("ia", "gm")
    tolerances: Mapping[str, float] | None = None
    weights: Mapping[str, float] | None = None
    norm: str = "max"

    def __post_init__(self):
        _positive("tolerance", self.tolerance_pct)
        if not self.figures:
            raise MatchError("criterion: no figures to compare")
        for f in self.figures:
            if f not in FIGURES:
                raise MatchError(f"criterion: unknown figure {f!r}; figures are {', '.join(FIGURES)}")
        for name, d in (("tolerances", self.tolerances), ("weights", self.weights)):
            for f, v in (d or {}).items():
                if f not in self.figures:
                    raise MatchError(f"criterion {name}: figure {f!r} is not among the compared figures "
                                     f"({', '.join(self.figures)})")
                _positive(f"criterion {name}[{f}]", v)
        if self.norm not in ("max", "sum"):
            raise MatchError(f"criterion norm: must be 'max' or 'sum', got {self.norm!r}")

    def tol(self) -> np.ndarray:
        t = dict(self.tolerances or {})
        return np.array([t.get(f, self.tolerance_pct) / 100.0 for f in self.figures])

    def w(self) -> np.ndarray:
        w = dict(self.weights or {})
        return np.array([float(w.get(f, 1.0)) for f in self.figures])

    def describe(self) -> str:
        parts = [f"{FIGURES[f][0]} within {t * 100:g} %" for f, t in zip(self.figures, self.tol())]
        s = " and ".join(parts) + " of the pair's mean"
        if self.weights:
            s += "; weights " + ", ".join(f"{f} {v:g}" for f, v in self.weights.items())
        return s + f"; mismatch = {'largest' if self.norm == 'max' else 'sum of the'} relative difference(s)"

    def to_dict(self) -> dict:
        return {"figures": list(self.figures),
                "tolerance_pct": {f: float(t * 100) for f, t in zip(self.figures, self.tol())},
                "weights": {f: float(w) for f, w in zip(self.figures, self.w())},
                "norm": self.norm}


#: grade bands: (name, largest mismatch [%]); a group gets the first band it fits
DEFAULT_GRADES = (("tight", 1.0), ("close", 2.5), ("matched", 5.0), ("loose", 10.0))


def grade_of(mismatch_pct: float, grades=DEFAULT_GRADES) -> str:
    """The name of the first band whose limit [%] the mismatch does not exceed."""
    for name, limit in grades:
        if mismatch_pct <= limit + 1e-9:
            return name
    return "wide"


# ---------------------------------------------------------------------------
# Groups and results
# ---------------------------------------------------------------------------


@dataclass
class Group:
    """One matched group.

    Attributes
    ----------
    units : list of str
        Unit labels (``FittedTriode.label``).
    index : list of int
        Their positions in the unit list.
    kind : str
        ``"pair"``, ``"four within tolerance"`` or ``"two matched pairs"``.
    mismatch : float
        The group's mismatch as optimised [-].
    spread : dict
        Per figure, the largest relative difference between two units of the group [-].
    sides : list of list of str or None
        For two matched pairs: the two sides.
    side_difference : dict or None
        For two matched pairs: relative difference of the sides' summed figures [-].
    grade : str
    """

    units: list
    index: list
    kind: str
    mismatch: float
    spread: dict
    grade: str
    sides: list | None = None
    side_difference: dict | None = None
    outside_data: list = field(default_factory=list)

    def to_dict(self, figs: UnitFigures | None = None) -> dict:
        mm = {f"{f}_pct": _pct(v) for f, v in self.spread.items()}
        mm["max_pct"] = _pct(self.mismatch)
        if self.side_difference is not None:
            mm["sides"] = {f"{f}_pct": _pct(v) for f, v in self.side_difference.items()}
        d = {"units": list(self.units), "kind": self.kind, "mismatch": mm, "grade": self.grade}
        if self.sides is not None:
            d["sides"] = [list(s) for s in self.sides]
        if self.outside_data:
            d["outside_data"] = list(self.outside_data)
        if figs is not None:
            d["figures"] = [figs.unit_dict(k) for k in self.index]
        return d


@dataclass
class MatchResult:
    """Groups found at a position, with the units left over and what is proven.

    Attributes
    ----------
    figures : UnitFigures
    criterion : Criterion
    group_size : int
    groups : list of Group
    unmatched : list of dict
        ``{"unit", "nearest", "reason", ...}`` for every usable unit not in a group.
    excluded : list of dict
        ``{"unit", "reason"}`` for units that could not take part.
    optimality : Optimality
    balance : list of dict
        Section balance of every dual-section bottle.
    """

    figures: UnitFigures
    criterion: Criterion
    group_size: int
    groups: list
    unmatched: list
    excluded: list
    optimality: Optimality
    balance: list = field(default_factory=list)
    quad_mode: str | None = None
    grades: tuple = DEFAULT_GRADES

    @property
    def total_mismatch(self) -> float:
        return float(sum(g.mismatch for g in self.groups))

    def to_dict(self) -> dict:
        pos = self.figures.position
        d = {
            "position": pos.to_dict(),
            "criterion": self.criterion.to_dict(),
            "group_size": self.group_size,
            "groups": [g.to_dict(self.figures) for g in self.groups],
            "unmatched": list(self.unmatched),
            "excluded": list(self.excluded),
            "total_mismatch_pct": _pct(self.total_mismatch),
            "optimality": self.optimality.to_dict(),
            "grades": [{"name": n, "max_pct": float(v)} for n, v in self.grades],
            "section_balance": list(self.balance),
        }
        if self.quad_mode:
            d["quad_mode"] = self.quad_mode
        d["caution"] = CAUTION
        return d

    def csv_rows(self) -> list[dict]:
        """One row per unit, for printing labels: group, grade and the unit's figures."""
        rows = []
        for gi, g in enumerate(self.groups, 1):
            tag = f"{'P' if self.group_size == 2 else 'Q'}{gi}"
            for k, lab in zip(g.index, g.units):
                u = self.figures.unit_dict(k)
                side = ""
                if g.sides:
                    side = "A" if lab in g.sides[0] else "B"
                rows.append({"group": tag, "grade": g.grade, "side": side, "unit": lab,
                             "tube": self.figures.units[k].tube, "section": self.figures.units[k].section or "",
                             "ia_ma": u.get("ia_ma"), "gm_ms": u.get("gm_ms"), "rp_kohm": u.get("rp_kohm"),
                             "mu": u.get("mu"), "gain": u.get("gain"), "va_v": u["va_v"], "vg_v": u["vg_v"],
                             "group_mismatch_pct": _pct(g.mismatch),
                             "label": f"{tag} {g.grade} Ia {u.get('ia_ma'):.3g} mA gm {u.get('gm_ms'):.3g} mA/V"})
        index = {u.label: k for k, u in enumerate(self.figures.units)}
        for un in self.unmatched:
            k = index[un["unit"]]
            u = self.figures.unit_dict(k)
            rows.append({"group": "unmatched", "grade": "", "side": "", "unit": un["unit"],
                         "tube": self.figures.units[k].tube, "section": self.figures.units[k].section or "",
                         "ia_ma": u.get("ia_ma"), "gm_ms": u.get("gm_ms"), "rp_kohm": u.get("rp_kohm"),
                         "mu": u.get("mu"), "gain": u.get("gain"), "va_v": u["va_v"], "vg_v": u["vg_v"],
                         "group_mismatch_pct": None, "label": f"unmatched: {un['reason']}"})
        return rows

    def table(self) -> str:
        """The readable report (what the CLI prints without --json)."""
        pos = self.figures.position
        name = "pairs" if self.group_size == 2 else "quads"
        lines = [f"Matching {len(self.figures.units)} units into {name} at {pos.describe()}", CAUTION]
        lines.append(f"Criterion: {self.criterion.describe()}")
        if self.quad_mode:
            lines.append("Quads: " + ("four units all within tolerance" if self.quad_mode == "all"
                                      else "two matched pairs whose summed figures match (sides A and B)"))
        lines.append("")
        figs = [f for f in ("ia", "gm", "rp", "mu", "gain") if f in self.figures.values]
        head = f"  {'group':<7}{'grade':<9}{'unit':<16}" + "".join(
            f"{FIGURES[f][0] + (' [' + FIGURES[f][1] + ']' if FIGURES[f][1] else ''):>13}" for f in figs) + \
            f"{'mismatch':>11}"
        lines.append(head)
        for gi, g in enumerate(self.groups, 1):
            tag = f"{'P' if self.group_size == 2 else 'Q'}{gi}"
            for r, (k, lab) in enumerate(zip(g.index, g.units)):
                cells = "".join(f"{self.figures.values[f][k] * FIGURES[f][2]:>13.4g}" for f in figs)
                side = ("A " if lab in g.sides[0] else "B ") if g.sides else ""
                flag = " *" if self.figures.outside[k] else ""
                mis = f"{100 * g.mismatch:>9.2f} %" if r == 0 else ""
                lines.append(f"  {tag if r == 0 else '':<7}{g.grade if r == 0 else '':<9}{side + lab + flag:<16}"
                             f"{cells}{mis}")
            if g.kind != "pair":
                lines.append(f"  {'':<16}({g.kind})")
        lines.append("")
        o = self.optimality
        lines.append(f"{len(self.groups)} {name}, total mismatch {100 * self.total_mismatch:.3f} %; "
                     f"{'optimal' if o.exact else 'not proven optimal'} ({o.note})")
        if not o.exact:
            lines.append(f"  bound: at most {o.groups_bound} {name}; total mismatch at least "
                         f"{100 * o.mismatch_bound:.3f} % (gap {100 * o.gap:.3f} %)")
        if any(self.figures.outside[g.index].any() for g in self.groups):
            lines.append("  * outside the unit's fitted data: extrapolated")
        if self.unmatched:
            lines.append("")
            lines.append("Unmatched:")
            for u in self.unmatched:
                lines.append(f"  {u['unit']:<16}{u['reason']}")
        if self.excluded:
            lines.append("")
            lines.append("Excluded:")
            for u in self.excluded:
                lines.append(f"  {u['unit']:<16}{u['reason']}")
        if self.balance:
            lines.append("")
            lines.append("Section balance (largest relative difference between a bottle's sections):")
            for b in self.balance:
                lines.append(f"  {b['tube']:<16}{b['max_pct']:>7.2f} %   " +
                             ", ".join(f"{k[:-4]} {v:.2f} %" for k, v in b.items() if k.endswith("_pct") and k != "max_pct"))
        return "\n".join(lines)


# ---------------------------------------------------------------------------
# Unit selection, section balance, reasons for the units left over
# ---------------------------------------------------------------------------


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
            raise MatchError(f"unit {lab!r} appears twice in the set; every unit needs its own label")
        seen.add(lab)
    known = set(labels)
    for name, lst in (("only", only), ("exclude", exclude)):
        for lab in lst or ():
            if lab not in known:
                near = sorted(known)[:8]
                raise MatchError(f"{name}: unknown unit {lab!r}; known units include {', '.join(near)}")
    out = [u for u in units if (only is None or u.label in set(only)) and u.label not in set(exclude or ())]
    if not out:
        raise MatchError("no units left to match: the selection is empty")
    return out


def _log_figures(figs: UnitFigures, crit: Criterion, idx):
    cols = []
    for f in crit.figures:
        if f not in figs.values:
            raise MatchError(f"criterion: figure {f!r} is not available at this position "
                             f"({figs.position.describe()})")
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
    w = crit.w()
    for tube, idx in by_tube.items():
        if len(idx) < 2:
            continue
        V, bad = _log_figures(figs, crit, idx)
        if bad.any():
            continue
        d = 2.0 * np.tanh((np.log(V.max(axis=0)) - np.log(V.min(axis=0))) / 2.0)
        m = float(np.max(w * d) if crit.norm == "max" else np.sum(w * d))
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
    d = 2.0 * np.abs(V[1:] - V[0]) / (V[1:] + V[0])
    tol = crit.tol()
    w = crit.w()
    m = (w * d).max(axis=1) if crit.norm == "max" else (w * d).sum(axis=1)
    ok = np.all(d <= tol * (1 + 1e-12) + 1e-15, axis=1)
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
        over = [f"{FIGURES[f][0]} differs by {100 * d[best, q]:.2f} % (tolerance {100 * tol[q]:g} %)"
                for q, f in enumerate(crit.figures) if d[best, q] > tol[q] * (1 + 1e-12)]
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
        _positive("bottle balance limit", bottle_balance_pct)
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
    return 2.0 * np.tanh((np.log(sub.max(axis=0)) - np.log(sub.min(axis=0))) / 2.0)


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
            within = np.all(_spread_arr(spread, crit) <= crit.tol() * (1 + 1e-12) + 1e-15)
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


# ---------------------------------------------------------------------------
# Quads
# ---------------------------------------------------------------------------


def _norm(crit, d):
    wd = d * crit.w()
    return wd.max(axis=-1) if crit.norm == "max" else wd.sum(axis=-1)


def _quad_candidates(V, crit, mode, limit):
    """Every feasible quad of a small set: (members, mismatch, sides) or None if too many."""
    n = V.shape[0]
    L = np.log(V)
    tol = crit.tol()
    a, b = np.triu_indices(n, 1)
    d = 2.0 * np.tanh(np.abs(L[a] - L[b]) / 2.0)
    ok = np.all(d <= tol * (1 + 1e-12) + 1e-15, axis=1)
    A = np.zeros((n, n), bool)
    A[a[ok], b[ok]] = True
    A |= A.T
    pair_m = np.full((n, n), np.inf)
    pair_m[a[ok], b[ok]] = _norm(crit, d[ok])
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
        mism = _norm(crit, 2.0 * np.tanh(span / 2.0))
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
        ds = 2.0 * np.abs(S[f] - S[e]) / (S[f] + S[e])
        okf = np.all(ds <= tol * (1 + 1e-12) + 1e-15, axis=1)
        f, ds = f[okf], ds[okf]
        m = np.maximum(np.maximum(em[e], em[f]), _norm(crit, ds))
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


def _k_nearest(space: _Space, k):
    """Mismatch to each node's k-th nearest compatible node (inf if it has fewer)."""
    n = space.n
    best = np.full((n, k), np.inf)
    for i, j in space.windows(np.arange(n), space.span[0]):
        ok, m, _ = space.measure(i, j)
        i, j, m = i[ok], j[ok], m[ok]
        node = np.concatenate([i, j, np.repeat(np.arange(n), k)])
        val = np.concatenate([m, m, best.ravel()])
        o = np.lexsort((val, node))
        node, val = node[o], val[o]
        start = np.searchsorted(node, np.arange(n))
        for r in range(k):
            best[:, r] = val[start + r]
    out = np.empty(n)
    out[space.order] = best[:, k - 1]
    return out


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
        raise MatchError(f"quad mode: must be 'all' (four within tolerance) or 'sides' (two matched pairs), "
                         f"got {mode!r}")
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
    raise MatchError(f"group: must be 2 (pairs) or 4 (quads), got {group!r}")


# ---------------------------------------------------------------------------
# Stacked stages and channels
# ---------------------------------------------------------------------------


@dataclass
class StackAssignment:
    """Units assigned to the bottom and top slots of N identical stacks.

    Attributes
    ----------
    stack : fitter.stage.Stack
    stages : list of dict
        Per stack: ``bottom``, ``top`` (labels), ``ia`` [A], ``split`` (fraction of
        the two tubes' voltage across the bottom tube), ``gain``, ``va_bottom``,
        ``va_top`` [V], ``deviation`` (from the target) [-].
    target : dict
        ``ia`` [A] and ``split`` [-] aimed at.
    deviation : float
        Largest deviation of a stack from the target [-].
    spread : float
        Largest relative spread of gain or current between the stacks [-].
    optimality : Optimality
    unused : list of str
    excluded : list of dict
    """

    stack: object
    stages: list
    target: dict
    deviation: float
    spread: float
    optimality: Optimality
    unused: list
    excluded: list
    same_bottle: bool = False

    @property
    def objective(self) -> float:
        return self.deviation + self.spread

    def to_dict(self) -> dict:
        return {
            "stack": self.stack.to_dict(),
            "target": {"ia_ma": 1e3 * self.target["ia"], "split": self.target["split"]},
            "stages": [{
                "bottom": s["bottom"], "top": s["top"], "ia_ma": _f(1e3 * s["ia"]),
                "split": _f(s["split"]), "gain": _f(s["gain"]), "va_bottom_v": _f(s["va_bottom"]),
                "va_top_v": _f(s["va_top"]), "deviation_pct": _pct(s["deviation"]),
                "outside_data": s["outside_data"]} for s in self.stages],
            "deviation_pct": _pct(self.deviation),
            "spread_pct": _pct(self.spread),
            "objective_pct": _pct(self.objective),
            "same_bottle": self.same_bottle,
            "unused": list(self.unused),
            "excluded": list(self.excluded),
            "optimality": self.optimality.to_dict(),
            "caution": CAUTION,
        }

    def table(self) -> str:
        from .stage import stage_title

        lines = [f"{len(self.stages)} x {stage_title(self.stack)} (B+ = {self.stack.b_plus:g} V, "
                 f"Rk = {self.stack.rk:g} ohm, R top = {self.stack.r_top:g} ohm, R mid = {self.stack.r_mid:g} ohm)",
                 CAUTION,
                 f"Target: {1e3 * self.target['ia']:.4g} mA, {100 * self.target['split']:.1f} % of the tube "
                 "voltage across the bottom tube" + ("; both sections of one bottle per stack" if self.same_bottle else ""),
                 "",
                 f"  {'stack':<7}{'bottom':<14}{'top':<14}{'Ia [mA]':>9}{'split':>8}{'gain':>9}"
                 f"{'Va bot':>9}{'Va top':>9}{'dev':>8}"]
        for k, s in enumerate(self.stages, 1):
            lines.append(f"  {'S' + str(k):<7}{s['bottom']:<14}{s['top']:<14}{1e3 * s['ia']:>9.4g}"
                         f"{100 * s['split']:>7.1f}%{s['gain']:>9.4g}{s['va_bottom']:>9.1f}{s['va_top']:>9.1f}"
                         f"{100 * s['deviation']:>7.2f}%")
        lines.append("")
        lines.append(f"largest deviation from target {100 * self.deviation:.2f} %, spread between stacks "
                     f"{100 * self.spread:.2f} % (gain and current); "
                     f"{'optimal' if self.optimality.exact else 'not proven optimal'} ({self.optimality.note})")
        if self.unused:
            lines.append("unused: " + ", ".join(self.unused))
        for e in self.excluded:
            lines.append(f"excluded {e['unit']}: {e['reason']}")
        return "\n".join(lines)


def _stack_objective(dev, ia, gain, chosen):
    """max deviation + max(relative range of gain, of current) over the chosen stacks."""
    c = np.asarray(chosen)
    g = gain[c]
    i = ia[c]
    sg = (g.max() - g.min()) / abs(np.mean(g)) if c.size > 1 else 0.0
    si = (i.max() - i.min()) / np.mean(i) if c.size > 1 else 0.0
    return float(dev[c].max() + max(sg, si)), float(dev[c].max()), float(max(sg, si))


def stack_cases(units, stack, same_bottle=False):
    """Every ordered (bottom, top) pair of distinct units, solved with the stack.

    Returns (pairs array (k, 2), figures dict of arrays).
    """
    from .stage import spread

    M = len(units)
    b, t = np.nonzero(~np.eye(M, dtype=bool))
    if same_bottle:
        same = np.array([units[x].tube == units[y].tube and units[x].section != units[y].section
                         for x, y in zip(b, t)], bool)
        b, t = b[same], t[same]
    if b.size == 0:
        raise MatchError("stacked assignment: no (bottom, top) pair to try" +
                         (" (no bottle has two sections)" if same_bottle else ""))
    r = spread(stack, [units[x] for x in b], tops=[units[y] for y in t])
    v = r.values
    fig = {"ia": np.asarray(v["ia"], float), "gain": np.asarray(v["gain"], float),
           "va_bottom": np.asarray(v["bottom.va"], float), "va_top": np.asarray(v["top.va"], float),
           "vg_bottom": np.asarray(v["bottom.vgk"], float), "vg_top": np.asarray(v["top.vgk"], float)}
    fig["split"] = fig["va_bottom"] / (fig["va_bottom"] + fig["va_top"])
    return np.column_stack([b, t]), fig


def assign_stacks(units: Sequence[FittedTriode], stack, n_stages: int, target_ma: float | None = None,
                  target_split: float = 0.5, same_bottle: bool = False, extrapolate: bool = False,
                  time_limit: float = 60.0, max_units: int = 120) -> StackAssignment:
    """Put units in the bottom and top slots of ``n_stages`` identical stacks.

    Each stack's *deviation* from the design target is the larger of
    ``|Ia / Ia_target - 1|`` and ``|split / split_target - 1|`` (split: the bottom
    tube's share of the voltage across both tubes).  The stacks' *spread* is the
    larger relative range (max - min over the mean) of their gain and of their
    current.  The assignment minimises the largest deviation plus the spread (ties
    broken by the sum of deviations), exactly: a mixed-integer programme over every
    ordered (bottom, top) pair, each solved with :func:`fitter.stage.spread`, by
    HiGHS branch-and-cut.

    Parameters
    ----------
    units : sequence of FittedTriode
    stack : fitter.stage.Stack
    n_stages : int
        Number of stacks to fill (2 for left and right channels).
    target_ma : float or None
        Target current [mA]; None: the median over every possible (bottom, top) pair.
    target_split : float
        Target share of the tube voltage across the bottom tube (0.5: equal).
    same_bottle : bool
        Keep both sections of one bottle in one stack.
    """
    from .stage import Stack

    if not isinstance(stack, Stack):
        raise MatchError(f"stacked assignment: 'stack' must be a fitter.stage.Stack, got {type(stack).__name__}")
    units = select_units(units)
    M = len(units)
    if isinstance(n_stages, bool) or not isinstance(n_stages, int) or n_stages < 1:
        raise MatchError(f"stages: must be a whole number of stacks (1 or more), got {n_stages!r}")
    if 2 * n_stages > M:
        raise MatchError(f"stages: {n_stages} stacks need {2 * n_stages} units, the set has {M}")
    if M > max_units:
        raise MatchError(f"stacked assignment: {M} units would give {M * (M - 1)} (bottom, top) cases; "
                         f"choose at most {max_units} candidates (e.g. with --only)")
    if not (0 < target_split < 1):
        raise MatchError(f"target split: must be between 0 and 1, got {target_split!r}")
    t0 = time.perf_counter()
    pairs, fig = stack_cases(units, stack, same_bottle)
    out_b = np.array([units[b].outside_range(va, vg) for b, va, vg in
                      zip(pairs[:, 0], fig["va_bottom"], fig["vg_bottom"])], bool)
    out_t = np.array([units[t].outside_range(va, vg) for t, va, vg in
                      zip(pairs[:, 1], fig["va_top"], fig["vg_top"])], bool)
    valid = np.isfinite(fig["ia"]) & (fig["ia"] > 0) & np.isfinite(fig["gain"]) & np.isfinite(fig["split"])
    if not extrapolate:
        valid &= ~(out_b | out_t)
    if not valid.any():
        raise MatchError("stacked assignment: no (bottom, top) pair works inside the units' fitted data"
                         + ("" if extrapolate else "; allow extrapolation to try anyway"))
    excluded = []
    for k, u in enumerate(units):
        if not (valid & ((pairs[:, 0] == k) | (pairs[:, 1] == k))).any():
            excluded.append({"unit": u.label, "reason": "no stack with it solves inside the fitted data"})
    pairs = pairs[valid]
    fig = {k: v[valid] for k, v in fig.items()}
    out_b, out_t = out_b[valid], out_t[valid]
    if target_ma is None:
        it = float(np.median(fig["ia"]))
    else:
        _positive("target current", target_ma)
        it = target_ma / 1e3
    dev = np.maximum(np.abs(fig["ia"] / it - 1.0), np.abs(fig["split"] / target_split - 1.0))
    chosen, solved = _stack_milp(pairs, M, n_stages, dev, fig["ia"], fig["gain"], time_limit)
    if chosen is None:
        raise MatchError(f"stacked assignment: cannot fill {n_stages} stacks with distinct units"
                         + (" from whole bottles" if same_bottle else ""))
    total, dmax, spr = _stack_objective(dev, fig["ia"], fig["gain"], chosen)
    stages = []
    used = set()
    for c in chosen:
        b, t = pairs[c]
        used |= {b, t}
        stages.append({"bottom": units[b].label, "top": units[t].label, "ia": float(fig["ia"][c]),
                       "split": float(fig["split"][c]), "gain": float(fig["gain"][c]),
                       "va_bottom": float(fig["va_bottom"][c]), "va_top": float(fig["va_top"][c]),
                       "deviation": float(dev[c]),
                       "outside_data": [lab for lab, o in ((units[b].label, out_b[c]), (units[t].label, out_t[c])) if o]})
    stages.sort(key=lambda s: s["deviation"])
    opt = Optimality("mixed-integer programme over every (bottom, top) pair (HiGHS branch-and-cut)",
                     bool(solved), n_stages, total, 0.0, "optimal" if solved else "stopped at the time limit",
                     {"units": M, "cases": int(pairs.shape[0]), "seconds": round(time.perf_counter() - t0, 3)})
    unused = [u.label for k, u in enumerate(units) if k not in used and u.label not in {e["unit"] for e in excluded}]
    return StackAssignment(stack, stages, {"ia": it, "split": float(target_split)}, dmax, spr, opt, unused,
                           excluded, same_bottle)


def _stack_milp(pairs, M, N, dev, ia, gain, time_limit):
    """min D + S + eps * sum(dev) over N disjoint (bottom, top) pairs (exact)."""
    k = pairs.shape[0]
    gref = float(np.median(np.abs(gain)))
    iref = float(np.median(ia))
    g = gain / gref
    i = ia / iref
    Mg = float(g.max() - g.min()) + 1.0
    Mi = float(i.max() - i.min()) + 1.0
    # variables: x_0..x_{k-1}, D, S, Gmin, Gmax, Imin, Imax
    nv = k + 6
    D, S, GN, GX, IN, IX = range(k, k + 6)
    rows, cols, vals, lo, hi = [], [], [], [], []
    r = 0

    def add(entries, l, h):
        nonlocal r
        for c, v in entries:
            rows.append(r), cols.append(c), vals.append(v)
        lo.append(l), hi.append(h)
        r += 1

    # each unit in at most one stack
    for u in range(M):
        idx = np.nonzero((pairs[:, 0] == u) | (pairs[:, 1] == u))[0]
        if idx.size:
            add([(c, 1.0) for c in idx], -np.inf, 1.0)
    add([(c, 1.0) for c in range(k)], N, N)
    for c in range(k):
        add([(c, dev[c]), (D, -1.0)], -np.inf, 0.0)                 # dev_c x_c <= D
        add([(GX, 1.0), (c, -Mg)], g[c] - Mg, np.inf)               # Gmax >= g_c if chosen
        add([(GN, 1.0), (c, Mg)], -np.inf, g[c] + Mg)               # Gmin <= g_c if chosen
        add([(IX, 1.0), (c, -Mi)], i[c] - Mi, np.inf)
        add([(IN, 1.0), (c, Mi)], -np.inf, i[c] + Mi)
    add([(S, 1.0), (GX, -1.0), (GN, 1.0)], 0.0, np.inf)                # S >= gain range / median
    add([(S, 1.0), (IX, -1.0), (IN, 1.0)], 0.0, np.inf)
    A = sp.csr_matrix((vals, (rows, cols)), shape=(r, nv))
    cost = np.zeros(nv)
    cost[D] = 1.0
    cost[S] = 1.0
    cost[:k] = 1e-4 * dev / N
    integ = np.zeros(nv)
    integ[:k] = 1
    lb = np.zeros(nv)
    ub = np.ones(nv)
    lb[k:] = -np.inf
    ub[k:] = np.inf
    lb[D] = lb[S] = 0.0
    res = milp(cost, constraints=[LinearConstraint(A, lo, hi)], integrality=integ, bounds=Bounds(lb, ub),
               options={"time_limit": float(time_limit), "mip_rel_gap": 0.0})
    if res.x is None:
        return None, False
    return list(np.nonzero(res.x[:k] > 0.5)[0]), res.status == 0
