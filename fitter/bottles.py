"""Matching whole bottles: pairs of dual-triode bottles whose sections all agree.

A dealer sells bottles, not sections.  Two bottles X and Y (sections X1, X2 and Y1, Y2) are
*compatible* at a position when their sections can be put side by side, X1 with Y1 and X2
with Y2, or X1 with Y2 and X2 with Y1, so that each side-by-side pair is compatible under the
matching criterion (:class:`fitter.match.Criterion`: each compared figure within its
tolerance of the pair's mean).  The bottle pair's *mismatch* is the larger of its two
section pairs' mismatches, under the better of the two arrangements.

The bottle pairs maximise the number of pairs, then minimise the sum of mismatches, as
:func:`fitter.match.match_pairs` does for sections: a maximum-weight matching with weights
``B - m`` (B larger than any total mismatch, so one more pair always wins) on the graph of
compatible bottle pairs, solved exactly by the blossom engine (:mod:`fitter._blossom`).
Every compatible pair is an edge (all pairs are checked, vectorised, in blocks), so the
result is optimal over all matchings of the bottles; ``tests/ledger/test_bottles.py`` checks
it against a brute force over every matching of small stocks.

Figures come from :func:`fitter.match.unit_figures`, so bottles are matched by what their
sections do at the position, with the same units, extrapolation rule and grades as sections.
"""

from __future__ import annotations

import itertools
from dataclasses import dataclass, field

import numpy as np

from . import CAUTION
from .match import DEFAULT_GRADES, FIGURES, Criterion, MatchError, grade_of, unit_figures

__all__ = ["BottlePair", "BottleMatch", "match_bottles", "bottle_mismatch"]

#: bottle pairs evaluated per vectorised block
_BLOCK = 1_000_000


@dataclass(frozen=True)
class BottlePair:
    """Two bottles and how their sections stand side by side.

    Attributes
    ----------
    bottles : tuple of str
    sides : tuple of tuple of str
        The section pairs, ``(("X:A", "Y:B"), ("X:B", "Y:A"))``.
    mismatch : float
        The larger of the section pairs' mismatches [-].
    spread : dict
        Per figure, the larger relative difference of the two section pairs [-].
    grade : str
    """

    bottles: tuple
    sides: tuple
    mismatch: float
    spread: dict
    grade: str

    def to_dict(self) -> dict:
        return {"bottles": list(self.bottles), "sections": [list(s) for s in self.sides],
                "mismatch_pct": 100.0 * self.mismatch,
                "spread_pct": {f: 100.0 * v for f, v in self.spread.items()}, "grade": self.grade}


@dataclass
class BottleMatch:
    """Bottle pairs found at a position, and the bottles left over."""

    position: object
    criterion: Criterion
    pairs: list
    unmatched: list = field(default_factory=list)  # {"bottle", "reason"}
    excluded: list = field(default_factory=list)  # {"bottle", "reason"}
    figures: dict = field(default_factory=dict)  # unit label -> {"ia_ma", "gm_ms", ...}

    @property
    def total_mismatch(self) -> float:
        return float(sum(p.mismatch for p in self.pairs))

    def to_dict(self) -> dict:
        return {"position": self.position.to_dict(), "criterion": self.criterion.to_dict(),
                "pairs": [p.to_dict() for p in self.pairs], "unmatched": list(self.unmatched),
                "excluded": list(self.excluded), "total_mismatch_pct": 100.0 * self.total_mismatch,
                "figures": self.figures, "caution": CAUTION}

    def table(self) -> str:
        lines = [f"Matching bottles into pairs at {self.position.describe()}", CAUTION,
                 f"Criterion (each section pair): {self.criterion.describe()}", ""]
        figs = list(self.criterion.figures)
        head = f"  {'pair':<6}{'grade':<9}{'sections side by side':<30}" + "".join(
            f"{FIGURES[f][0] + (' [' + FIGURES[f][1] + ']' if FIGURES[f][1] else ''):>22}" for f in figs) + \
            f"{'mismatch':>11}"
        lines.append(head)
        for k, p in enumerate(self.pairs, 1):
            for r, (a, b) in enumerate(p.sides):
                cells = "".join(f"{self._fig(a, f):>11}{self._fig(b, f):>11}" for f in figs)
                lines.append(f"  {f'B{k}' if r == 0 else '':<6}{p.grade if r == 0 else '':<9}{a + ' + ' + b:<30}"
                             f"{cells}{f'{100 * p.mismatch:>9.2f} %' if r == 0 else ''}")
        lines.append("")
        lines.append(f"{len(self.pairs)} bottle pair(s), total mismatch {100 * self.total_mismatch:.3f} %; optimal "
                     "(every compatible bottle pair considered)")
        for title, rows in (("Unmatched", self.unmatched), ("Excluded", self.excluded)):
            if rows:
                lines += ["", f"{title}:"] + [f"  {r['bottle']:<16}{r['reason']}" for r in rows]
        return "\n".join(lines)

    def _fig(self, unit, f):
        key = {"ia": "ia_ma", "gm": "gm_ms", "rp": "rp_kohm"}.get(f, f)
        v = self.figures.get(unit, {}).get(key)
        return "-" if v is None else f"{v:.4g}"


def _rel(a, b):
    """Relative difference ``2 |a - b| / (a + b)`` of positive figures, the matching's measure."""
    return 2.0 * np.abs(a - b) / (a + b)


def bottle_mismatch(X, Y, crit: Criterion):
    """Mismatch of bottles with section figures ``X`` and ``Y`` (arrays ``(k, n_figures)``):
    (mismatch, arrangement, spread per figure) over the arrangements of Y's sections that
    keep every section pair compatible; (inf, None, None) when none does.  The reference
    form of what :func:`match_bottles` computes vectorised."""
    tol, w = crit.tol(), crit.w()
    best = (np.inf, None, None)
    for perm in itertools.permutations(range(len(Y))):
        d = _rel(X, Y[list(perm)])
        if np.any(d > tol * (1 + 1e-9)):
            continue
        per = np.max(w * d, axis=1) if crit.norm == "max" else np.sum(w * d, axis=1)
        m = float(per.max())
        if m < best[0]:
            best = (m, perm, d.max(axis=0))
    return best


def match_bottles(units, position, criterion: Criterion | None = None, extrapolate: bool = False,
                  grades=DEFAULT_GRADES, sections: int = 2) -> BottleMatch:
    """Pairs of bottles whose sections all agree at ``position``.

    Parameters
    ----------
    units : sequence of FittedTriode
        Sections; a bottle is the units sharing a ``tube`` name.
    position : FixedBias, CathodeBias or StackedSlot
    criterion : Criterion
        Compatibility and mismatch of each section pair (default: Ia and gm within 5 %).
    sections : int
        Sections per bottle (2 for dual triodes); other bottles are excluded.

    Returns
    -------
    BottleMatch
    """
    from ._blossom import BlossomMatching

    crit = criterion or Criterion()
    figs = unit_figures(units, position, extrapolate=extrapolate)
    by_tube: dict = {}
    for k, u in enumerate(figs.units):
        by_tube.setdefault(u.tube, []).append(k)
    excluded, bottles, rows = [], [], []
    for tube, idx in by_tube.items():
        idx = sorted(idx, key=lambda k: (figs.units[k].section or ""))
        name = figs.units[idx[0]].label.split(":")[0]
        if len(idx) != sections:
            excluded.append({"bottle": name, "reason": f"has {len(idx)} fitted section(s), not {sections}"})
            continue
        bad = [figs.units[k].label + ": " + figs.problem[k] for k in idx if figs.problem[k] is not None]
        V = np.column_stack([np.abs(np.asarray(figs.values[f], float)[idx]) for f in crit.figures]) \
            if all(f in figs.values for f in crit.figures) else None
        if V is None:
            raise MatchError(f"criterion: a compared figure is not available at {position.describe()}")
        if bad or not np.all(np.isfinite(V) & (V > 0)):
            excluded.append({"bottle": name, "reason": "; ".join(bad) or "a compared figure is zero or undefined"})
            continue
        bottles.append((name, idx))
        rows.append(V)
    figures = {figs.units[k].label: figs.unit_dict(k) for _, idx in bottles for k in idx}
    n = len(bottles)
    if n < 2:
        return BottleMatch(position, crit, [], [{"bottle": b, "reason": "no other usable bottle"} for b, _ in bottles],
                           excluded, figures)
    F = np.stack(rows)  # (n bottles, sections, figures)
    tol, w = crit.tol(), crit.w()
    perms = list(itertools.permutations(range(sections)))
    I, J, M, P = [], [], [], []
    iu, ju = np.triu_indices(n, 1)
    for s0 in range(0, iu.size, _BLOCK):
        a, b = iu[s0:s0 + _BLOCK], ju[s0:s0 + _BLOCK]
        best = np.full(a.size, np.inf)
        arg = np.full(a.size, -1)
        for pi, perm in enumerate(perms):
            d = _rel(F[a], F[b][:, list(perm)])  # (pairs, sections, figures)
            ok = np.all(d <= tol * (1 + 1e-9), axis=(1, 2))
            per = np.max(w * d, axis=2) if crit.norm == "max" else np.sum(w * d, axis=2)
            m = np.where(ok, per.max(axis=1), np.inf)
            better = m < best
            best[better], arg[better] = m[better], pi
        keep = np.isfinite(best)
        I.append(a[keep]), J.append(b[keep]), M.append(best[keep]), P.append(arg[keep])
    I, J, M, P = (np.concatenate(x) for x in (I, J, M, P))
    pairs, matched = [], set()
    if I.size:
        B = 1.0 + (n / 2.0 + 1.0) * max(float(M.max()), 1e-12)
        bm = BlossomMatching(n, I, J, B - M, tol=1e-11 * B * max(1.0, n / 1000.0))
        bm.greedy_start()
        bm.solve()
        mate = bm.mates()
        edge = {(int(i), int(j)): k for k, (i, j) in enumerate(zip(I, J))}
        for i in range(n):
            j = int(mate[i])
            if j > i:
                k = edge[(i, j)]
                perm = perms[int(P[k])]
                d = _rel(F[i], F[j][list(perm)])
                xi, xj = bottles[i][1], bottles[j][1]
                sides = tuple((figs.units[xi[s]].label, figs.units[xj[perm[s]]].label) for s in range(sections))
                pairs.append(BottlePair((bottles[i][0], bottles[j][0]), sides, float(M[k]),
                                        {f: float(v) for f, v in zip(crit.figures, d.max(axis=0))},
                                        grade_of(100.0 * float(M[k]), grades)))
                matched.update((i, j))
    pairs.sort(key=lambda p: (p.mismatch, p.bottles))
    linked = set(I.tolist()) | set(J.tolist())
    unmatched = [{"bottle": bottles[i][0],
                  "reason": "its compatible bottles are all in other pairs" if i in linked
                  else "no other bottle has all its sections within tolerance"}
                 for i in range(n) if i not in matched]
    return BottleMatch(position, crit, pairs, unmatched, excluded, figures)
