"""Bottle matching (fitter/bottles.py) against a brute force over every matching of small stocks.

The units are INVENTED Koren models (Koren's published 12AU7 set, from memory, as in
tests/conftest.py) with a random spread of kg1 and mu per section.  The reference is
independent of the engine: it enumerates every set of disjoint bottle pairs, checks each pair's
compatibility by trying both ways of putting the sections side by side (figures from the
model function directly, not from fitter.match), and keeps the most pairs, then the least
total mismatch.
"""

from __future__ import annotations

import itertools

import numpy as np
import pytest

from fitter.bottles import match_bottles
from fitter.match import Criterion, FixedBias
from fitter.models import get_model
from fitter.triode import FittedTriode

BASE = dict(mu=21.5, ex=1.3, kg1=1180.0, kp=84.0, kvb=300.0)  # Koren's 12AU7 set, from memory
VA, VG = 250.0, -8.5


def _stock(seed, n_bottles, spread=0.05):
    rng = np.random.default_rng(seed)
    units = []
    for b in range(n_bottles):
        for s in "AB":
            p = dict(BASE)
            p["kg1"] *= float(np.exp(spread * rng.standard_normal()))
            p["mu"] *= float(np.exp(0.3 * spread * rng.standard_normal()))
            units.append(FittedTriode("koren", p, tube=f"X{b}", section=s))
    return units


def _figures(u):
    m = get_model("koren")
    h = 1e-3  # central difference of the model current for gm [S] (common practice)
    ia = float(m.current(VA, VG, **u.params))
    gm = float((m.current(VA, VG + h, **u.params) - m.current(VA, VG - h, **u.params)) / (2 * h))
    return np.array([ia, gm])


def _brute(units, tol):
    bottles = sorted({u.tube for u in units})
    F = {b: [_figures(u) for u in sorted((u for u in units if u.tube == b), key=lambda u: u.section)]
         for b in bottles}

    def pair_cost(x, y):
        best = None
        for perm in ((0, 1), (1, 0)):
            d = [2 * abs(F[x][s] - F[y][perm[s]]) / (F[x][s] + F[y][perm[s]]) for s in range(2)]
            if all((dd <= tol * (1 + 1e-9)).all() for dd in d):
                m = max(float(dd.max()) for dd in d)
                best = m if best is None else min(best, m)
        return best

    cost = {(x, y): pair_cost(x, y) for x, y in itertools.combinations(bottles, 2)}
    best = (0, 0.0)

    def walk(rest, count, total):
        nonlocal best
        if (count, -total) > (best[0], -best[1]):
            best = (count, total)
        if len(rest) < 2:
            return
        first = rest[0]
        walk(rest[1:], count, total)  # first stays single
        for k in range(1, len(rest)):
            c = cost[(first, rest[k])]
            if c is not None:
                walk(rest[1:k] + rest[k + 1:], count + 1, total + c)

    walk(bottles, 0, 0.0)
    return best


@pytest.mark.parametrize("seed", range(6))
def test_bottle_pairs_equal_a_brute_force_over_every_matching(seed):
    units = _stock(seed, 8)
    res = match_bottles(units, FixedBias(VA, VG), Criterion(5.0))
    count, total = _brute(units, 0.05)
    assert len(res.pairs) == count
    assert res.total_mismatch == pytest.approx(total, rel=1e-5, abs=1e-7)
    used = [b for p in res.pairs for b in p.bottles]
    assert len(used) == len(set(used))


def test_a_bottle_pair_puts_crossed_sections_side_by_side():
    # X1's sections are X0's swapped: only the crossed arrangement is compatible
    a = dict(BASE, kg1=1000.0)
    b = dict(BASE, kg1=1400.0)
    units = [FittedTriode("koren", a, tube="X0", section="A"), FittedTriode("koren", b, tube="X0", section="B"),
             FittedTriode("koren", b, tube="X1", section="A"), FittedTriode("koren", a, tube="X1", section="B")]
    res = match_bottles(units, FixedBias(VA, VG), Criterion(1.0))
    assert len(res.pairs) == 1
    assert res.pairs[0].sides == (("X0:A", "X1:B"), ("X0:B", "X1:A"))
    assert res.pairs[0].mismatch == pytest.approx(0.0, abs=1e-12)


def test_a_bottle_missing_a_section_is_excluded_with_the_reason():
    units = _stock(1, 3)[:-1]
    res = match_bottles(units, FixedBias(VA, VG), Criterion(50.0))
    assert res.excluded == [{"bottle": "X2", "reason": "has 1 fitted section(s), not 2"}]
    assert len(res.pairs) == 1
