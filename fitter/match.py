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
band of ``ln Ia``: units are sorted by it and partners are found by window search,
never by looking at all n^2 pairs.  The pairs are a maximum-weight matching with edge
weights ``B - m_e``, B larger than any total mismatch, so one more pair always beats
any saving in mismatch (the lexicographic objective).  It is found by Edmonds'
primal-dual blossom method (:mod:`fitter._blossom`, our own implementation), which
keeps the duals (y, z) of the matching polytope's LP alongside the matching:

* start from each unit's 24 nearest units (scipy's k-d tree), every compatible edge
  on small sets;
* the components of the full compatibility graph (those of the starting edges, joined
  by the compatible edges found from outside the largest one);
* *stand-in* nodes, one for each unit that every maximum matching must leave single:
  one per odd component, and more where a cardinality pass finds a Tutte barrier
  (the Tutte-Berge formula, counted on the full graph).  A stand-in matched to a unit
  means "this unit stays single" at no mismatch; any matching leaves at least that
  many units single, so the objective is unchanged, and the weighted pass never
  has to prove a unit single by raising its duals all the way;
* the weighted pass, all alternating trees at once, lazily updated duals, events
  from a heap;
* *pricing*: an edge left out can have negative reduced cost only if its mismatch is
  below ``(B/2 - y_u) + (B/2 - y_v)``, which bounds each unit's search window; such
  edges are added and the pass continues from the duals (blossoms flattened).

When no edge of the full graph has negative reduced cost and the primal and dual
values agree, LP duality (weak duality; blossom inequalities hold for every
matching) proves the pairs optimal over every matching of the full graph: the result
is *certified* (``Optimality.exact``).  If the time limit stops the pass, the pairs
found so far are reported with the parity bound and no claim of optimality.

Cost (measured with bench/match.py on invented stocks, 2 cores): about 0.02 s for 100
units, 0.1-0.2 s for 1,000 and 2.6-4.6 s for 10,000, so roughly n^1.5 at the top: the
blossom pass grows with the nesting of blossoms (hundreds deep at 10,000 units), and
pricing with the window pairs inside each unit's dual radius.

References (cited from memory)
------------------------------
J. Edmonds, "Maximum matching and a polyhedron with 0,1-vertices", J. Res. Nat. Bur.
Standards 69B (1965) 125-130 (the matching polytope, its duals and the weighted method).
J. Edmonds, "Paths, trees, and flowers", Canad. J. Math. 17 (1965) 449-467 (blossoms).
Z. Galil, "Efficient algorithms for finding maximum matching in graphs", ACM Comput.
Surv. 18 (1986) 23-38 (the primal-dual method's four kinds of dual step).
V. Kolmogorov, "Blossom V: a new implementation of a minimum cost perfect matching
algorithm", Math. Prog. Comp. 1 (2009) 43-67 (several trees under one dual change).
W. T. Tutte, "The factorization of linear graphs", J. London Math. Soc. 22 (1947)
107-111, and C. Berge, "Sur le couplage maximum d'un graphe", C. R. Acad. Sci. Paris
247 (1958) 258-259 (the Tutte-Berge formula behind the stand-in count).
M. Grötschel and O. Holland, "Solving matching problems with linear programming",
Math. Programming 33 (1985) 243-259 (pricing the edges left out).
Q. Huangfu and J. A. J. Hall, "Parallelizing the dual revised simplex method",
Math. Prog. Comp. 10 (2018) 119-142 (HiGHS, scipy's MIP solver, used for quads and stacks).
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass, field
from typing import Mapping, Sequence

import numpy as np
import scipy.sparse as sp
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
# Windows reach a little further than measure() accepts (its 1e-12 relative slack on a
# tolerance t becomes up to 1 / (1 - t^2/4) times that on the ln-span), so that every pair
# measure() calls compatible is in some window; measure() then decides.
_WIDER = 1.0 + 1e-9


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

    def windows(self, rows, spans, backward=False):
        """Yield (i, j) batches: for each row i, the nodes j within ``spans`` of it."""
        rows = np.asarray(rows, dtype=np.int64)
        spans = np.broadcast_to(np.asarray(spans, float), rows.shape)
        if rows.size == 0:
            return
        if backward:
            start = np.searchsorted(self.key, self.key[rows] - spans * _WIDER - 1e-12, "left")
            first, count = start, rows - start
        else:
            end = np.searchsorted(self.key, self.key[rows] + spans * _WIDER + 1e-12, "right")
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
        end = np.searchsorted(self.key, self.key + self.span[0] * _WIDER + 1e-12, "right")
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
        """Add the edges not yet present; returns them as (i, j, m)."""
        a = np.minimum(i, j)
        b = np.maximum(i, j)
        key = a * self.n + b
        key, first = np.unique(key, return_index=True)
        a, b, m = a[first], b[first], np.asarray(m, float)[first]
        if self._keys.size:
            pos = np.minimum(np.searchsorted(self._keys, key), self._keys.size - 1)
            new = self._keys[pos] != key
            a, b, m, key = a[new], b[new], m[new], key[new]
        if key.size:
            self.I = np.concatenate([self.I, a])
            self.J = np.concatenate([self.J, b])
            self.M = np.concatenate([self.M, m])
            self._keys = np.sort(np.concatenate([self._keys, key]))
        return a, b, m

    def __len__(self):
        return self.I.size


#: Up to this many window pairs the matcher starts from every compatible edge.
ALL_EDGES_UP_TO = 30_000
#: Otherwise from each node's this many nearest nodes (and prices in the rest).
NEAREST = 24
#: The cardinality pass (stand-in count) starts from this many nearest nodes.
UNIT_PASS_NEAREST = 12


def _candidates(space: _Space, k: int | None = None):
    """Compatible edges to each node's k nearest nodes (Chebyshev or city-block distance
    of the weighted ln-figures, by scipy's k-d tree), or every compatible edge when the
    windows hold few pairs.  Edges left out are found later by pricing if they matter;
    with k = 24 that happened in none of six 10,000-unit benchmark stocks."""
    if k is None:
        if space.candidate_count() <= ALL_EDGES_UP_TO:
            return space.all_edges()
        k = NEAREST
    from scipy.spatial import cKDTree

    pts = (space.lo + space.hi) / 2.0 * space.w
    k = min(k, space.n - 1)
    _, nb = cKDTree(pts).query(pts, k=k + 1, p=np.inf if space.norm == "max" else 1)
    i = np.repeat(np.arange(space.n), k)
    j = nb[:, 1:].ravel()
    keep = (j < space.n) & (j != i)
    i, j = i[keep], j[keep]
    ok, m, _ = space.measure(i, j)
    return i[ok], j[ok], m[ok]


def _cross_edges(space: _Space, lab, rows):
    """Compatible edges from ``rows`` to nodes of other components (label ``lab``)."""
    I, J, M = [], [], []
    for back in (False, True):
        for i, j in space.windows(rows, space.span[0], backward=back):
            ok = lab[i] != lab[j]
            i, j = i[ok], j[ok]
            ok, m, _ = space.measure(i, j)
            I.append(i[ok]), J.append(j[ok]), M.append(m[ok])
    return _cat(I), _cat(J), _catf(M)


def _components(space: _Space, edges: _EdgeSet):
    """Connected components of the *full* compatibility graph.

    Starts from the components of the candidate edges; any compatible edge joining two of
    them has an end outside the largest, so only those nodes' windows are searched (and
    the edges found join the candidate set)."""
    n = space.n
    while True:
        g = sp.coo_matrix((np.ones(len(edges)), (edges.I, edges.J)), shape=(n, n))
        nc, lab = connected_components(g, directed=False)
        if nc == 1:
            return lab
        big = np.argmax(np.bincount(lab))
        rows = np.nonzero(lab != big)[0]
        a, _, _ = edges.add(*_cross_edges(space, lab, rows))
        if a.size == 0:
            return lab


class _Blossoms:
    """The laminar blossom family of a solved matching, for reduced costs of any edge.

    The z of the blossoms holding both ends of an edge add up to ``zcum`` (z summed from a
    blossom up to its top-level blossom) at their lowest common blossom, found for many
    edges at once by a range-minimum query over an Euler tour of the blossom forest.
    """

    def __init__(self, bm, n):
        parent, childs, z = bm.parent, bm.childs, bm.z
        self.nv = bm.n
        self.inb = np.array(bm.inb[:n], np.int64)
        total = len(parent)
        alive = [b < bm.n or childs[b] is not None for b in range(total)]
        # the blossoms' part of the dual objective: sum of z (|B| - 1) / 2
        self.dual_z = float(sum(z[b] * (bm.size[b] - 1) / 2.0 for b in range(bm.n, total) if alive[b]))
        zcum = [0.0] * total
        first = [-1] * total
        tour, depth = [], []
        for r in range(total):
            if not alive[r] or parent[r] != -1 or r < bm.n:
                continue
            stack = [(r, 0)]
            zcum[r] = z[r]
            while stack:
                b, k = stack.pop()
                if k == 0:
                    first[b] = len(tour)
                tour.append(b)
                depth.append(len(stack))
                ch = childs[b] if b >= bm.n else None
                if ch is not None and k < len(ch):
                    c = ch[k]
                    stack.append((b, k + 1))
                    zcum[c] = zcum[b] + (z[c] if c >= bm.n else 0.0)
                    stack.append((c, 0))
        self.first = np.array(first, np.int64)
        self.tour = np.array(tour, np.int64)
        self.zcum = np.array(zcum, float)
        d = np.array(depth, np.int64)
        # sparse table of the index of the least depth over [i, i + 2^k)
        self.table = [np.arange(d.size)]
        step = 1
        while 2 * step <= d.size:
            a = self.table[-1]
            left, right = a[:-step], a[step:]
            self.table.append(np.where(d[left] <= d[right], left, right))
            step *= 2
        self.depth = d

    def half_z_above(self):
        """Half the z of every blossom around each vertex (vertices of the matcher, dummies too)."""
        out = np.zeros(self.nv)
        inside = self.first[:self.nv] >= 0
        # a vertex's own zcum holds its blossoms' z (its own entry adds nothing)
        out[inside] = self.zcum[:self.nv][inside] / 2.0
        return out

    def zsum(self, i, j):
        """Sum of z over the blossoms holding both i and j."""
        out = np.zeros(len(i))
        same = np.nonzero(self.inb[i] == self.inb[j])[0]
        if same.size == 0 or self.tour.size == 0:
            return out
        a = self.first[i[same]]
        b = self.first[j[same]]
        lo, hi = np.minimum(a, b), np.maximum(a, b)
        k = np.floor(np.log2(hi - lo + 1)).astype(np.int64)
        best = np.empty(same.size, np.int64)
        d = self.depth
        for level in np.unique(k):
            sel = k == level
            t = self.table[level]
            x, y = t[lo[sel]], t[hi[sel] - (1 << level) + 1]
            best[sel] = np.where(d[x] <= d[y], x, y)
        out[same] = self.zcum[self.tour[best]]
        return out


def _violations(space: _Space, y, bl: _Blossoms, B, tol):
    """Every compatible edge of the full graph whose reduced cost is below ``-tol``.

    An edge can be violated only if its mismatch is below ``pi_i + pi_j`` with
    ``pi = B/2 - y`` (blossom duals only add to its reduced cost), so below twice the
    larger of the two.  A mismatch below r bounds every figure's weighted ln-difference
    (``w_f 2 tanh(|d_f| / 2) <= m``), so each node's partners lie in a box around it,
    found by scipy's k-d tree (node centres; a pair-node's span is at least the
    distance of the centres)."""
    from scipy.spatial import cKDTree

    pi = B / 2.0 - y[:space.n]
    rows = np.nonzero(pi > 0)[0]
    if rows.size == 0:
        z = np.zeros(0, np.int64)
        return z, z, np.zeros(0)
    r = 2.0 * pi[rows] + tol
    w = space.w
    with np.errstate(invalid="ignore", divide="ignore"):
        half = np.clip(r[:, None] / (2.0 * w[None, :]), 0.0, 1.0 - 1e-15)
        d = np.minimum(2.0 * np.arctanh(half), space.span[None, :])  # ln-difference bound per figure
    R = np.max(d * w[None, :], axis=1) * (1 + 1e-9) + 1e-12
    pts = (space.lo + space.hi) / 2.0 * w
    near = cKDTree(pts).query_ball_point(pts[rows], R, p=np.inf, return_sorted=False)
    counts = np.fromiter((len(x) for x in near), np.int64, count=len(near))
    I = np.repeat(rows, counts)
    J = np.fromiter((j for x in near for j in x), np.int64, count=int(counts.sum()))
    # a pair found from both ends is kept once (and a node's own entry dropped)
    I, J = np.minimum(I, J), np.maximum(I, J)
    key = np.unique(I[I != J] * space.n + J[I != J])
    I, J = key // space.n, key % space.n
    ok, m, _ = space.measure(I, J)
    I, J, m = I[ok], J[ok], m[ok]
    rc = y[I] + y[J] - (B - m)
    s = rc < -tol
    I, J, m, rc = I[s], J[s], m[s], rc[s]
    if I.size:
        rc = rc + bl.zsum(I, J)
        s = rc < -tol
        I, J, m = I[s], J[s], m[s]
    return I, J, m


def _singles_lower_bound(space: _Space, edges: _EdgeSet, lab, size):
    """Per component of the full compatibility graph, how many units every maximum
    matching must leave single: a proven lower bound.

    Parity gives one for an odd component.  A cardinality pass (the blossom method with
    unit weights on the candidate edges, a stand-in per odd component) shows where more
    are single; the inner vertices of its trees that ended without augmenting form a
    Tutte barrier A, and ``odd(G - A) - |A|``, counted on the *full* graph (components
    of the candidate graph without A, joined by every compatible edge found from outside
    the largest of them), bounds the singles from below (Tutte-Berge formula)."""
    from ._blossom import BlossomMatching

    n = space.n
    count = ((size % 2 == 1) & (size >= 3)).astype(np.int64)
    owner = np.repeat(np.arange(size.size), count)
    di = [np.nonzero(lab == c)[0] for c in owner]
    N = n + owner.size
    # a sparser graph is enough here: the bound is checked on the full graph below
    # (units with few near neighbours keep all their candidate edges)
    sparse = _EdgeSet(n)
    sparse.add(*_candidates(space, UNIT_PASS_NEAREST))
    few = np.bincount(np.concatenate([sparse.I, sparse.J]), minlength=n) < 4
    sel = few[edges.I] | few[edges.J]
    sparse.add(edges.I[sel], edges.J[sel], edges.M[sel])
    I = np.concatenate([sparse.I] + di)
    J = np.concatenate([sparse.J] + [np.full(d.size, n + k) for k, d in enumerate(di)])
    bu = BlossomMatching(N, I, J, np.ones(I.size), tol=1e-9)
    bu.greedy_start(late=range(n, N))
    bu.solve()
    mate = bu.mates()
    comp = np.concatenate([lab, owner])
    single = (mate < 0) & (size[comp] >= 2)
    if not single.any():
        return count
    A = np.zeros(N, bool)
    A[list(bu.barrier)] = True
    if not A.any():
        return count
    # components of G' - A, with the full graph's edges between them
    keep = ~A[I] & ~A[J]
    I2, J2 = I[keep], J[keep]
    while True:
        g = sp.coo_matrix((np.ones(I2.size), (I2, J2)), shape=(N, N))
        _, h = connected_components(g, directed=False)
        h = np.where(A, -1, h)
        hs = np.bincount(h[h >= 0], minlength=h.max() + 1)
        big = int(np.argmax(hs))
        rows = np.nonzero((h[:n] != big) & (h[:n] >= 0))[0]
        ci, cj, cm = _cross_edges(space, h[:n], rows)
        ok = ~A[ci] & ~A[cj]
        ci, cj, cm = ci[ok], cj[ok], cm[ok]
        if ci.size == 0:
            break
        edges.add(ci, cj, cm)
        I2, J2 = np.concatenate([I2, ci]), np.concatenate([J2, cj])
    # per original component: odd parts of G' - A, less the barrier vertices in it
    hc = np.full(hs.size, -1)
    hc[h[h >= 0]] = comp[h >= 0]
    odd_parts = np.bincount(hc[(hs % 2 == 1) & (hc >= 0)], minlength=size.size)
    in_a = np.bincount(comp[A], minlength=size.size)
    extra = np.where(size >= 2, np.maximum(0, odd_parts - in_a), 0)
    # Tutte-Berge on G' (stand-ins included); each of G's own stand-ins counts one more
    return count + extra


def _solve_matching(space: _Space, time_limit: float = 60.0):
    """Maximum-cardinality, minimum-mismatch matching on ``space``.

    Returns (i, j, m, Optimality) with i, j indices into the caller's node order.
    """
    from ._blossom import BlossomMatching

    t_start = time.perf_counter()
    n = space.n
    if n < 2:
        z = np.zeros(0, np.int64)
        return z, z, np.zeros(0), Optimality("trivial", True, 0, 0.0, 0.0, "fewer than two units")
    B = 1.0 + (n / 2.0 + 1.0) * max(space.mmax, 1e-12)
    tol = 1e-11 * B * max(1.0, n / 1000.0)
    edges = _EdgeSet(n)
    edges.add(*_candidates(space))
    lab = _components(space, edges)
    size = np.bincount(lab, minlength=lab.max() + 1)
    # stand-in nodes: matching one to a unit means "this unit stays single", at no
    # mismatch.  Each component gets as many as it must leave single, by a proven lower
    # bound (parity, and a Tutte barrier from a cardinality pass), so that the weighted
    # pass never has to prove a unit single the slow way
    count = _singles_lower_bound(space, edges, lab, size)
    owner = np.repeat(np.arange(size.size), count)  # component of each stand-in
    di = [np.nonzero(lab == c)[0] for c in owner]
    dj = [np.full(d.size, n + k) for k, d in enumerate(di)]
    N = n + owner.size
    bm = BlossomMatching(N, np.concatenate([edges.I] + di), np.concatenate([edges.J] + dj),
                         B - np.concatenate([edges.M] + [np.zeros(d.size) for d in di]), tol=tol)
    bm.greedy_start(late=range(n, N))
    stats = {"units": n, "window_pairs": space.candidate_count(), "candidate_edges": len(edges),
             "components": int(size.size), "stand_ins": int(owner.size), "priced_rounds": 0,
             "priced_edges": 0}
    deadline = t_start + time_limit
    status = "optimal"
    while True:
        try:
            bm.solve(deadline=deadline)
        except TimeoutError:
            status = "time"
            break
        y = bm.duals()
        bl = _Blossoms(bm, N)
        vi, vj, vm = _violations(space, y, bl, B, tol)
        if vi.size == 0:
            break
        # edges the candidates missed: add them, flatten the blossoms into y (which keeps
        # every edge feasible), lift y where a new edge is still short, drop the matched
        # edges that are no longer tight, and grow again from there
        stats["priced_rounds"] += 1
        a, b, m = edges.add(vi, vj, vm)
        stats["priced_edges"] += int(a.size)
        bm.restart_with(a, b, B - m, lift=bl.half_z_above())
        if time.perf_counter() > deadline:
            status = "time"
            break
    mate = bm.mates()
    u = np.nonzero((mate[:n] > np.arange(n)) & (mate[:n] < n))[0]
    v = mate[u]
    _, m, _ = space.measure(u, v)
    k = int(u.size)
    stats["seconds"] = round(time.perf_counter() - t_start, 3)
    stats["stop"] = status
    stats.update({key: bm.stats[key] for key in ("searches", "augment", "shrink", "expand")})
    parity_bound = int(np.sum((size - count) // 2))  # the stand-in counts are proven
    if status == "optimal":
        # weak duality over the full graph plus stand-ins: any matching of K pairs leaves at
        # least as many units single as there are stand-ins (a proven lower bound), so
        # K B - mismatch + d B <= dual
        d = int(owner.size)
        dual = float(np.sum(y) + bl.dual_z)
        primal = float(k * B - m.sum() + int(np.sum(mate[n:] >= 0)) * B)
        gap = max(0.0, dual - primal)
        k_bound = min(parity_bound, int(math.floor((dual - d * B) / (B - space.mmax) + 1e-9)))
        lb = max(0.0, (k + d) * B - dual) if k_bound <= k else 0.0
        # the proof's other conditions, checked here rather than trusted to the engine:
        # y and z non-negative, every stand-in edge feasible, primal not above the dual
        zs = [bm.z[b] for b in range(N, len(bm.parent)) if bm.childs[b] is not None]
        sound = bool(y.min(initial=0.0) >= -tol and min(zs, default=0.0) >= -tol and primal <= dual + N * tol)
        for c, members in zip(range(n, N), di):
            rc = y[c] + y[members] + bl.zsum(np.full(members.size, c), members) - B
            sound = sound and bool(rc.min(initial=0.0) >= -tol)
        # optimal to 1e-8 (fraction) of mismatch per pair: far below any meaningful figure,
        # far above the rounding of the duals (measured gaps: 0 to 3e-9 in total at 10,000 units)
        exact = sound and k_bound <= k and gap <= 1e-8 * max(1, k)
        stats["duality_gap"] = gap
        opt = Optimality(
            "Edmonds' weighted blossom method, checked over the full compatibility graph",
            bool(exact), max(k, k_bound), lb, max(0.0, float(m.sum()) - lb),
            ("no edge of the full compatibility graph has negative reduced cost and the primal "
             f"and dual values agree to {100 * gap:.0e} percentage points: optimal by LP duality "
             "(Edmonds' matching polytope)" if exact else
             "the duality certificate does not hold (" + ("a dual condition fails" if not sound else
                                                          "the primal-dual gap is above the tolerance")
             + "): not proven optimal"), stats)
    else:
        opt = Optimality("Edmonds' weighted blossom method, stopped at the time limit", False,
                         parity_bound, 0.0, float(m.sum()),
                         f"stopped after {time_limit:g} s; at most {parity_bound} pairs (every "
                         "component of the compatibility graph leaves its proven number of units "
                         "single)", stats)
    o = space.order
    return o[u], o[v], m, opt


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
    outside = np.array([u.outside_range(values["va"][k], values["vg"][k], ia=values["ia"][k])
                        for k, u in enumerate(units)], bool)
    if outside.all() and not extrapolate:
        why = units[0].outside_reason(values["va"][0], values["vg"][0], ia=values["ia"][0])
        rng = f" (e.g. {why})" if why else ""
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
                     bool(solved), n_stages, total, 0.0,
                     (f"HiGHS branch-and-cut over all {int(pairs.shape[0])} (bottom, top) cases" if solved
                      else "stopped at the time limit"),
                     {"units": M, "cases": int(pairs.shape[0]), "seconds": round(time.perf_counter() - t0, 3)})
    unused = [u.label for k, u in enumerate(units) if k not in used and u.label not in {e["unit"] for e in excluded}]
    return StackAssignment(stack, stages, {"ia": it, "split": float(target_split)}, dmax, spr, opt, unused,
                           excluded, same_bottle)


def _stack_milp(pairs, M, N, dev, ia, gain, time_limit):
    """min D + S + eps * sum(dev) over N disjoint (bottom, top) pairs (exact)."""
    from scipy.optimize import Bounds, LinearConstraint, milp  # HiGHS, imported when used (0.15 s)

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
