"""Stacked stages and channels: units in the bottom and top slots of N identical stacks.

:func:`assign_stacks` solves every ordered (bottom, top) pair with the stack
(:func:`fitter.stage.spread`) and picks the N disjoint pairs nearest the design target
that also match each other, exactly (a mixed-integer programme, HiGHS branch-and-cut).
"""

from __future__ import annotations

import time
from typing import Sequence

import numpy as np
import scipy.sparse as sp

from ..triode import FittedTriode
from .criterion import MatchError, _positive
from .groups import select_units
from .results import Optimality, StackAssignment


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
    from ..stage import spread

    M = len(units)
    b, t = np.nonzero(~np.eye(M, dtype=bool))
    if same_bottle:
        same = np.array([units[x].tube == units[y].tube and units[x].section != units[y].section
                         for x, y in zip(b, t)], bool)
        b, t = b[same], t[same]
    if b.size == 0:
        raise MatchError("no (bottom, top) pair to try" + (" (no bottle has two sections)" if same_bottle else ""),
                         subject="stacked assignment", field="same_bottle" if same_bottle else None)
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
    from ..stage import Stack

    if not isinstance(stack, Stack):
        raise MatchError(f"'stack' must be a fitter.stage.Stack, got {type(stack).__name__}",
                         subject="stacked assignment", field="stack")
    units = select_units(units)
    M = len(units)
    if isinstance(n_stages, bool) or not isinstance(n_stages, int) or n_stages < 1:
        raise MatchError(f"must be a whole number of stacks (1 or more), got {n_stages!r}", subject="stages",
                         field="stages")
    if 2 * n_stages > M:
        raise MatchError(f"{n_stages} stacks need {2 * n_stages} units, the set has {M}", subject="stages",
                         field="stages")
    if M > max_units:
        raise MatchError(f"{M} units would give {M * (M - 1)} (bottom, top) cases; "
                         f"choose at most {max_units} candidates (e.g. with {{only}})",
                         subject="stacked assignment", field="only", refs=("only",))
    if not (0 < target_split < 1):
        raise MatchError(f"must be between 0 and 1, got {target_split!r}", subject="target split",
                         field="target_split")
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
        _positive("target current", target_ma, field="target_ma")
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
