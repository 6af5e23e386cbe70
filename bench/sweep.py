"""Benchmark of the design sweeps: prints figures, asserts nothing.

Goal (issue 11, section 6): a 20-point component sweep over a 200-tube stock <= 2 s, with
every figure (current, voltages, gain, headroom at 1 % THD, THD at a level, dissipation,
heater-cathode margin, slew limit); for output stages 20 reflected loads over 200 units
(single-ended) or 200 pairs (push-pull) with every output figure.  Also one frequency response (1 Hz .. 1 MHz, 40 points
per decade, -3 dB points) per stage.

The tubes are invented units from Koren's 12AX7 / 12AU7 sets (from memory of Koren's table,
Glass Audio 8(5), 1996, rev. 2003) with an invented 10 % perveance and 2 % mu spread, as
bench/stage.py draws them.

Run:  python bench/sweep.py
"""

from __future__ import annotations

import hashlib
import os
import statistics
import time
from pathlib import Path

import numpy as np

from fitter import stage as S
from fitter.stage.frequency import response
from fitter.stage.sweeps import component_sweep, sweep_values
from fitter.triode import FittedTriode


def timed(fn, repeat):
    ts = []
    for _ in range(repeat):
        t = time.perf_counter()
        fn()
        ts.append(time.perf_counter() - t)
    return statistics.median(ts), min(ts)


def main():
    root = Path(__file__).resolve().parent.parent
    h = hashlib.sha1()
    for f in ("fitter/stage/sweeps.py", "fitter/stage/frequency.py", "fitter/stage/solver.py",
              "fitter/stage/output.py"):
        h.update((root / f).read_bytes())
    print("Platebook design-sweep benchmark (median of repeats; min in brackets)")
    print(f"load average at start: {' '.join(f'{x:.2f}' for x in os.getloadavg())}   engine sha1 {h.hexdigest()[:12]}")
    rng = np.random.default_rng(11)
    n = 200
    hx = FittedTriode("koren", dict(mu=100, ex=1.4, kg1=1060, kp=600, kvb=300), tube="HX")
    mu = FittedTriode("koren", dict(mu=21.5, ex=1.3, kg1=1180, kp=84, kvb=300), tube="MU")
    hxs = [hx.with_params({"kg1": 1060 * f, "mu": 100 * m}) for f, m in
           zip(rng.lognormal(0, 0.1, n), rng.normal(1, 0.02, n))]
    mus = [mu.with_params({"kg1": 1180 * f, "mu": 21.5 * m}) for f, m in
           zip(rng.lognormal(0, 0.1, n), rng.normal(1, 0.02, n))]
    caps = dict(cgk=1.6e-12, cga=1.7e-12, cak=0.5e-12)
    runs = [
        ("common cathode, Ra 47k..220k (log)",
         S.CommonCathode(b_plus=300, ra=100e3, rk=1.5e3, ck=22e-6, rl=470e3, c_load=100e-12, **caps),
         "ra", sweep_values(47e3, 220e3, 20, log=True), [(u,) for u in hxs], 10.0),
        ("common cathode, B+ 150..400 V",
         S.CommonCathode(b_plus=300, ra=100e3, rk=1.5e3, ck=22e-6, rl=470e3, c_load=100e-12, **caps),
         "b_plus", sweep_values(150, 400, 20), [(u,) for u in hxs], 10.0),
        ("cathode follower, Rk 10k..47k",
         S.CathodeFollower(b_plus=250, rk=22e3, vneg=-150, rl=100e3, c_load=1e-9, **caps),
         "rk", sweep_values(10e3, 47e3, 20), [(u,) for u in mus], 10.0),
        ("SRPP, Rk 330..2.2k (log)",
         S.Stack.srpp(b_plus=300, rk=820.0, rl=100e3, c_load=1e-9, **caps),
         "rk", sweep_values(330, 2.2e3, 20, log=True), [(a, b) for a, b in zip(mus, mus[::-1])], 10.0),
        ("mu follower, R-mid 22k..150k",
         S.Stack.mu_follower(b_plus=300, rk=1e3, r_top=820.0, r_mid=68e3, ck=1e-4, rl=47e3, c_load=300e-12, **caps),
         "r_mid", sweep_values(22e3, 150e3, 20), [(a, b) for a, b in zip(hxs, mus)], 10.0),
    ]
    print()
    print(f"20-point component sweep over {n} units (every figure, headroom at 1 % THD, THD at 10 V peak); goal <= 2 s")
    for name, st, fieldname, vals, cases, level in runs:
        component_sweep(st, fieldname, vals[:2], cases[:2], level=level)
        med, lo = timed(lambda: component_sweep(st, fieldname, vals, cases, level=level), 3)
        print(f"  {name:<40} {med:7.3f} s [{lo:.3f}]")
    # output stages (fitter.stage.output): 20 reflected loads over 200 invented 300B-like units
    # (Koren's 300B set from memory of Koren's table, an invented 5 % kg1 and 20 % kp spread);
    # push-pull over 200 invented pairs of them
    from fitter.stage.output import PushPullOutput, SingleEndedOutput

    p300b = FittedTriode("koren", dict(mu=3.95, ex=1.4, kg1=1550.0, kp=65.0, kvb=300.0), tube="PW")
    pws = [p300b.with_params({"kg1": 1550 * f, "kp": 65 * k}) for f, k in
           zip(rng.lognormal(0, 0.05, 2 * n), rng.lognormal(0, 0.2, 2 * n))]
    outs = [
        ("single-ended, fixed bias, load 2k..6k",
         SingleEndedOutput(b_plus=330.0, load=3000.0, r_primary=150.0, grid_bias=-61.0, pa_max=40.0),
         [(u,) for u in pws[:n]]),
        ("single-ended, cathode bias, load 2k..6k",
         SingleEndedOutput(b_plus=360.0, load=3000.0, r_primary=150.0, rk=1000.0, pa_max=40.0),
         [(u,) for u in pws[:n]]),
        ("push-pull class A, fixed bias, load 3k..8k",
         PushPullOutput(b_plus=400.0, load=5000.0, r_primary=200.0, grid_bias=-84.0, pa_max=40.0),
         list(zip(pws[:n], pws[n:]))),
        ("push-pull class AB, fixed bias, load 3k..8k",
         PushPullOutput(b_plus=400.0, load=4000.0, r_primary=200.0, grid_bias=-100.0, pa_max=40.0),
         list(zip(pws[:n], pws[n:]))),
        ("push-pull, shared Rk unbypassed, 3k..8k",
         PushPullOutput(b_plus=450.0, load=5000.0, r_primary=200.0, rk=650.0, bypassed=False),
         list(zip(pws[:n], pws[n:]))),
        # the bias shifts with the drive: every level's cathode is a solve (timed once: slow)
        ("push-pull, shared Rk bypassed, 3k..8k",
         PushPullOutput(b_plus=450.0, load=5000.0, r_primary=200.0, rk=650.0),
         list(zip(pws[:n], pws[n:]))),
    ]
    print()
    print(f"20-point sweep of the reflected load over {n} output-stage cases (THD limit 5 %, THD at 1 W); goal <= 2 s")
    for name, st, cases in outs:
        loads = sweep_values(2e3, 6e3, 20) if st.kind == "single-ended" else sweep_values(3e3, 8e3, 20)
        component_sweep(st, "load", loads[:2], cases[:2], thd_limit=0.05, level=1.0)
        med, lo = timed(lambda: component_sweep(st, "load", loads, cases, thd_limit=0.05, level=1.0),
                        1 if st.kind == "push-pull" and st.rk is not None and st.bypassed else 3)
        print(f"  {name:<44} {med:7.3f} s [{lo:.3f}]")
    print()
    print("one tube, 20-point sweep")
    for name, st, fieldname, vals, cases, level in runs:
        med, lo = timed(lambda: component_sweep(st, fieldname, vals, cases[:1], level=level), 5)
        print(f"  {name:<40} {1e3 * med:7.1f} ms [{1e3 * lo:.1f}]")
    print()
    print("frequency response, 241 points (1 Hz .. 1 MHz) with both -3 dB points")
    for name, st, fieldname, vals, cases, level in runs:
        med, lo = timed(lambda: response(st, *cases[0]), 10)
        print(f"  {name.split(',')[0]:<40} {1e3 * med:7.1f} ms [{1e3 * lo:.1f}]")
    print("load average at end: " + " ".join(f"{x:.2f}" for x in os.getloadavg()))


if __name__ == "__main__":
    main()
