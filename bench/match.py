"""Benchmark of matching: pairs and quads at 100, 1,000 and 10,000 units (prints, asserts nothing).

Stock (invented): 12AX7-like Koren units (Koren's published set, from memory: mu 100,
ex 1.4, kg1 1060, kp 600, kvb 300) with lognormal spread mu 4 %, ex 2 %, kg1 15 %,
kp 5 %, matched at va = 250 V, vg = -2 V with the default criterion (Ia and gm within
P % of the pair's mean).

Usage: python bench/match.py [--sizes 100,1000,10000] [--seeds 1] [--tolerance 5] [--time-limit 120]
(``--seeds 1,2,3`` repeats every size on several invented stocks.)
"""

from __future__ import annotations

import argparse
import math
import time

import numpy as np

from fitter.match import Criterion, FixedBias, match_pairs, match_quads, unit_figures
from fitter.triode import FittedTriode

BASE = dict(mu=100.0, ex=1.4, kg1=1060.0, kp=600.0, kvb=300.0)
RANGE = {"va": (0.0, 400.0), "vg": (-4.0, 0.0), "ia": (0.0, 5e-3)}


def stock(n, seed=1):
    r = np.random.default_rng(seed)
    sd = dict(mu=0.04, ex=0.02, kg1=0.15, kp=0.05)
    out = []
    for k in range(n):
        p = dict(BASE)
        for name, s in sd.items():
            p[name] = BASE[name] * math.exp(r.normal(0, s))
        out.append(FittedTriode("koren", p, tube=f"U{k:05d}", valid_range=RANGE))
    return out


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--sizes", default="100,1000,10000")
    ap.add_argument("--tolerance", type=float, default=5.0)
    ap.add_argument("--time-limit", type=float, default=120.0)
    ap.add_argument("--seeds", default="1")
    a = ap.parse_args()
    pos = FixedBias(250.0, -2.0)
    crit = Criterion(tolerance_pct=a.tolerance)
    print(f"matching benchmark: tolerance {a.tolerance:g} %, position {pos.describe()}")
    print(f"{'seed':>4} {'units':>7} {'what':<6} {'figures s':>10} {'total s':>8} {'groups':>7} {'bound':>6} "
          f"{'mismatch %':>11} {'gap %':>8} {'exact':>6}  solver")
    for seed, n in [(int(sd), int(s)) for s in a.sizes.split(",") for sd in a.seeds.split(",")]:
        units = stock(n, seed)
        t = time.perf_counter()
        unit_figures(units, pos)
        t_fig = time.perf_counter() - t
        for what in ("pairs", "quads"):
            t = time.perf_counter()
            if what == "pairs":
                res = match_pairs(units, pos, crit, time_limit=a.time_limit)
            else:
                res = match_quads(units, pos, crit, time_limit=a.time_limit)
            dt = time.perf_counter() - t
            o = res.optimality
            st = o.stats
            info = (f"edges {st.get('candidate_edges')} stand-ins {st.get('stand_ins')} "
                    f"pricing rounds {st.get('priced_rounds')} ({st.get('priced_edges')} edges) "
                    f"stop {st.get('stop')}" if what == "pairs" else
                    f"feasible quads {st.get('feasible_quads')}" if "feasible_quads" in st else
                    f"pair step {st['pair_step'].get('seconds')} s ({st['pair_step'].get('stop')}), "
                    f"quad step {st['quad_step'].get('seconds')} s ({st['quad_step'].get('stop')})")
            print(f"{seed:>4} {n:>7} {what:<6} {t_fig:>10.3f} {dt:>8.2f} {len(res.groups):>7} {o.groups_bound:>6} "
                  f"{100 * res.total_mismatch:>11.3f} {100 * o.gap:>8.3f} {str(o.exact):>6}  {info}",
                  flush=True)


if __name__ == "__main__":
    main()
