"""Tests of the weighted blossom engine (fitter._blossom) and of the matcher's use of it.

References: networkx's ``max_weight_matching`` (an independent implementation, of
Galil's O(n^3) form), and the LP duality certificate of Edmonds' matching polytope
(primal value = dual value, every edge feasible, complementary slackness).
"""

from __future__ import annotations

import networkx as nx
import numpy as np
import pytest

import fitter.match as fm
import fitter.match.graph as fg  # the matcher's starting-edge settings live here
from fitter._blossom import BlossomMatching


def certificate(n, I, J, W, bm):
    """Check the duals prove the matching optimal; return the matching's weight."""
    mate = bm.mates()
    y = bm.duals()
    zsum = np.zeros(len(I))
    for leaves, z in bm.blossoms():
        inside = np.zeros(n, bool)
        inside[leaves] = True
        zsum += z * (inside[I] & inside[J])
        assert z > 0
    rc = y[I] + y[J] + zsum - W
    assert rc.min() > -1e-7, "an edge is infeasible"
    assert y.min() > -1e-9
    matched = mate[I] == J
    assert np.all(np.abs(rc[matched]) < 1e-7), "a matched edge is not tight"
    assert np.all((mate >= 0) | (y < 1e-7)), "a single vertex keeps y > 0"
    assert all(mate[mate[v]] == v for v in range(n) if mate[v] >= 0)
    primal = float(W[matched].sum())
    dual = float(y.sum() + sum(z * (len(lv) - 1) / 2 for lv, z in bm.blossoms()))
    assert primal == pytest.approx(dual, abs=1e-6)
    return primal


def networkx_weight(I, J, W):
    G = nx.Graph()
    G.add_weighted_edges_from(zip(I.tolist(), J.tolist(), W.tolist()))
    return sum(G[a][b]["weight"] for a, b in nx.max_weight_matching(G))


def random_graph(rng, n, geometric):
    I, J = np.triu_indices(n, 1)
    if geometric:  # unit-like points: weights B - distance, as the matcher builds them
        pts = rng.random((n, 2))
        d = np.abs(pts[I] - pts[J]).max(axis=1)
        keep = d < rng.uniform(0.15, 0.5)
        return I[keep], J[keep], 1.0 + 0.5 * n - d[keep]
    keep = rng.random(I.size) < rng.uniform(0.2, 0.9)
    return I[keep], J[keep], rng.integers(1, 8, int(keep.sum())).astype(float)  # many ties


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_random_graphs_equal_networkx(seed):
    rng = np.random.default_rng(seed)
    for trial in range(150):
        n = int(rng.integers(2, 40))
        I, J, W = random_graph(rng, n, geometric=trial % 2 == 0)
        if I.size == 0:
            continue
        bm = BlossomMatching(n, I, J, W)
        bm.host_min = int(rng.integers(0, 6))  # both ways of handing blossom ids over
        bm.greedy_start()
        bm.solve()
        assert certificate(n, I, J, W, bm) == pytest.approx(networkx_weight(I, J, W), abs=1e-6)


def test_edges_added_after_a_solve_equal_networkx():
    rng = np.random.default_rng(7)
    for trial in range(150):
        n = int(rng.integers(6, 40))
        I, J, W = random_graph(rng, n, geometric=trial % 2 == 0)
        if I.size == 0:
            continue
        first = rng.random(I.size) < 0.6
        bm = BlossomMatching(n, I[first], J[first], W[first])
        bm.greedy_start()
        bm.solve()
        bm.restart_with(I[~first], J[~first], W[~first])
        bm.solve()
        assert certificate(n, I, J, W, bm) == pytest.approx(networkx_weight(I, J, W), abs=1e-6)


def test_deeply_nested_blossoms_are_handled_iteratively():
    # 2,000 points spread along a line (as Ia and gm of one type are), weights B - distance:
    # blossoms nest about a hundred deep; every step is iterative (no recursion limit)
    # and the result still carries its certificate
    from scipy.spatial import cKDTree

    rng = np.random.default_rng(3)
    n = 2000
    t = rng.normal(0, 0.15, n)
    pts = np.c_[t, 0.6 * t + rng.normal(0, 0.01, n)]
    _, nb = cKDTree(pts).query(pts, k=11, p=np.inf)
    I = np.repeat(np.arange(n), 10)
    J = nb[:, 1:].ravel()
    key = np.unique(np.minimum(I, J) * n + np.maximum(I, J))
    I, J = key // n, key % n
    W = 1001.0 - np.abs(pts[I] - pts[J]).max(axis=1)
    bm = BlossomMatching(n, I, J, W)
    bm.greedy_start()
    bm.solve()
    certificate(n, I, J, W, bm)
    depth = 0
    for v in range(n):
        d, b = 0, bm.parent[v]
        while b != -1:
            d, b = d + 1, bm.parent[b]
        depth = max(depth, d)
    assert depth > 50


def _space(points, tol=0.05):
    L = np.asarray(points, float)
    return fm._Space(L, L, np.zeros(len(L)), np.full(L.shape[1], tol), np.ones(L.shape[1]))


def _networkx_pairs(space):
    I, J, M = space.all_edges()
    G = nx.Graph()
    G.add_weighted_edges_from(zip(I.tolist(), J.tolist(), (-M).tolist()))
    mt = nx.max_weight_matching(G, maxcardinality=True)
    return len(mt), -sum(G[a][b]["weight"] for a, b in mt)


def test_nearest_neighbour_start_with_pricing_equals_networkx(monkeypatch):
    # force the large-set path on a small set, with so few starting edges that pricing
    # has to add edges (and restart) several times; networkx is the reference
    monkeypatch.setattr(fg, "ALL_EDGES_UP_TO", 0)
    monkeypatch.setattr(fg, "NEAREST", 2)
    rng = np.random.default_rng(11)
    for trial in range(6):
        space = _space(rng.normal(0, 0.04, (150, 2)))
        i, j, m, opt = fm._solve_matching(space)
        k, ref = _networkx_pairs(space)
        assert opt.exact
        assert opt.stats["priced_rounds"] >= 1
        assert (i.size, float(m.sum())) == (k, pytest.approx(ref, abs=1e-9))


def test_units_that_must_stay_single_get_stand_ins(monkeypatch):
    # a centre unit with three leaves compatible with it alone, and through a fourth unit
    # to a cluster: every maximum matching leaves two units single although the component
    # (100 units) is even.
    # The Tutte barrier {centre} proves it (3 odd parts - 1) and two stand-ins take them.
    monkeypatch.setattr(fg, "ALL_EDGES_UP_TO", 0)
    rng = np.random.default_rng(5)
    r = 0.045  # compatible within 0.05 (Chebyshev, ln-figures): three corners of a square
    centre = [[0.0, 0.0]]
    leaves = [[r, r], [r, -r], [-r, -r]]
    bridge = [[-r, r]]  # the fourth corner leads on to a cluster none of the others reach
    cluster = rng.normal(0, 0.004, (95, 2)) + [-0.08, 0.08]
    pts = np.vstack([centre, leaves, bridge, cluster])
    space = _space(pts)
    i, j, m, opt = fm._solve_matching(space)
    k, ref = _networkx_pairs(space)
    assert opt.exact
    assert opt.stats["stand_ins"] >= 2
    assert (i.size, float(m.sum())) == (k, pytest.approx(ref, abs=1e-9))
    assert space.n - 2 * i.size == 2


def test_time_limit_reports_pairs_found_as_not_proven():
    rng = np.random.default_rng(2)
    space = _space(rng.normal(0, 0.04, (3000, 2)))
    i, j, m, opt = fm._solve_matching(space, time_limit=1e-6)
    assert not opt.exact and opt.stats["stop"] == "time"
    assert "stopped after" in opt.note
    used = np.concatenate([i, j])
    assert np.unique(used).size == used.size  # still a matching
    assert i.size <= opt.groups_bound <= space.n // 2


def test_pairs_at_the_very_edge_of_a_wide_tolerance_are_found():
    # measure() accepts a difference up to the tolerance plus a 1e-12 relative slack;
    # at a 100 % tolerance that slack is wider on the ln-span than 1e-12, and the window
    # search must still reach such a pair (found in review: two components instead of one)
    tol = 1.0
    s = 2 * np.arctanh(tol / 2) + 1.2e-12
    L = np.array([[-0.2], [-0.1], [0.0], [s], [s + 0.1], [s + 0.2]])
    space = fm._Space(L, L, np.zeros(6), [tol], [1.0])
    assert space.measure(np.array([2]), np.array([3]))[0][0]
    i, j, m, opt = fm._solve_matching(space)
    assert i.size == 3 and opt.exact and opt.stats["components"] == 1
