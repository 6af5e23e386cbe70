"""Benchmark of the stage and distortion engine: prints figures, asserts nothing.

Goals (issue 3, section 6): one stage solve <= 1 ms, a 30-level THD sweep <= 0.5 s,
a spread over 1,000 units <= 2 s.  Issue 8, section 8: a solve with error bars <= 3 ms
for a mu follower (every perturbed parameter set solved together); the previous path,
one whole solve per perturbed set, is timed beside it in the same run.

The tubes are invented units from Koren's 12AX7 / 12AU7 sets (from memory of Koren's
table, Glass Audio 8(5), 1996, rev. 2003) with an invented 10 % perveance spread.

Run:  python bench/stage.py
"""

from __future__ import annotations

import os
import statistics
import time

import numpy as np

from fitter import distortion as D
from fitter import stage as S
from fitter.triode import FittedTriode, propagate

KOREN = ("mu", "ex", "kg1", "kp", "kvb")


def timed(fn, repeat):
    times = []
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
    return statistics.median(times), min(times)


def one_set_at_a_time(stage, triodes):
    """Error bars the previous way: propagate() over whole solves, one perturbed set each."""
    keys = list(S.solve(stage, *triodes, errors=False).figures)
    var = np.zeros(len(keys))
    for i, t in enumerate(triodes):
        if t.covariance is None or not t.free:
            continue

        def fn(tt, i=i):
            ts = list(triodes)
            ts[i] = tt
            f = S.solve(stage, *ts, errors=False).figures
            a = np.array([f[k] for k in keys])
            return np.where(np.isfinite(a), a, np.nan)

        var += propagate(fn, t)[1] ** 2
    return dict(zip(keys, np.sqrt(var)))


def main():
    hx = FittedTriode("koren", dict(mu=100, ex=1.4, kg1=1060, kp=600, kvb=300), tube="HX",
                      free=KOREN, covariance=np.diag([1.0, 1e-4, 100.0, 100.0, 100.0]))
    mA = FittedTriode("koren", dict(mu=21.5, ex=1.3, kg1=1180, kp=84, kvb=300), tube="MU", section="A",
                      free=KOREN, covariance=np.diag([0.1, 1e-4, 100.0, 4.0, 100.0]))
    mB = FittedTriode("koren", dict(mu=21.5, ex=1.3, kg1=1300, kp=84, kvb=300), tube="MU", section="B")
    stages = {
        "common cathode (bypassed, loaded)": (S.CommonCathode(b_plus=300, ra=100e3, rk=1.5e3, ck=22e-6,
                                                              rl=470e3, c_load=100e-12, cga=1.7e-12), (hx,)),
        "cathode follower (to -150 V)": (S.CathodeFollower(b_plus=250, rk=22e3, vneg=-150, rl=100e3), (mA,)),
        "SRPP": (S.Stack.srpp(b_plus=300, rk=820.0, rl=100e3), (mA, mB)),
        "mu follower": (S.Stack.mu_follower(b_plus=300, rk=1e3, r_top=820.0, r_mid=68e3, ck=1e-4, rl=47e3),
                        (mA, mB)),
    }
    print("Platebook stage benchmark (median of repeats; min in brackets)")
    print("load average at start: " + " ".join(f"{x:.2f}" for x in os.getloadavg()))
    print()
    print("one stage solve (operating point + all small-signal figures); with error bars: all "
          "perturbed sets in one vectorised solve, and (before) one solve per set")
    for name, (st, tubes) in stages.items():
        S.solve(st, *tubes, errors=False)
        med, lo = timed(lambda: S.solve(st, *tubes, errors=False), 200)
        med_e, lo_e = timed(lambda: S.solve(st, *tubes, errors=True), 50)
        med_o, lo_o = timed(lambda: one_set_at_a_time(st, tubes), 10)
        print(f"  {name:<36} {1e3 * med:7.3f} ms [{1e3 * lo:.3f}]   with error bars "
              f"{1e3 * med_e:7.2f} ms [{1e3 * lo_e:.2f}]   one set at a time {1e3 * med_o:7.2f} ms "
              f"[{1e3 * lo_o:.2f}]")
    mB_cov = FittedTriode("koren", dict(mB.params), tube="MU", section="B", free=KOREN,
                          covariance=np.diag([0.1, 1e-4, 100.0, 4.0, 100.0]))
    st = stages["mu follower"][0]
    med_e, lo_e = timed(lambda: S.solve(st, mA, mB_cov, errors=True), 50)
    med_o, lo_o = timed(lambda: one_set_at_a_time(st, (mA, mB_cov)), 10)
    print(f"  {'mu follower, both with covariance':<36} {'':>18}   with error bars {1e3 * med_e:7.2f} ms "
          f"[{1e3 * lo_e:.2f}]   one set at a time {1e3 * med_o:7.2f} ms [{1e3 * lo_o:.2f}]")
    print()
    print("30-level THD sweep (256 samples per period; includes the drive-limit search and headroom)")
    for name, (st, tubes) in stages.items():
        med, lo = timed(lambda: D.sweep(st, *tubes, levels=30), 5)
        print(f"  {name:<36} {med:7.3f} s [{lo:.3f}]")
    print()
    rng = np.random.default_rng(1)
    n = 1000
    hxs = [hx.with_params({"kg1": 1060 * f, "mu": 100 * m}) for f, m in
           zip(rng.lognormal(0, 0.1, n), rng.normal(1, 0.02, n))]
    mas = [mA.with_params({"kg1": 1180 * f, "mu": 21.5 * m}) for f, m in
           zip(rng.lognormal(0, 0.1, n), rng.normal(1, 0.02, n))]
    mbs = [mB.with_params({"kg1": 1300 * f}) for f in rng.lognormal(0, 0.1, n)]
    print(f"spread over {n} units (min / median / max of every figure)")
    cc = stages["common cathode (bypassed, loaded)"][0]
    med, lo = timed(lambda: S.spread(cc, hxs), 3)
    print(f"  {'common cathode':<36} {med:7.3f} s [{lo:.3f}]")
    cf = stages["cathode follower (to -150 V)"][0]
    med, lo = timed(lambda: S.spread(cf, mas), 3)
    print(f"  {'cathode follower':<36} {med:7.3f} s [{lo:.3f}]")
    for name in ("SRPP", "mu follower"):
        st = stages[name][0]
        med, lo = timed(lambda: S.spread(st, mas, mbs), 3)
        print(f"  {name + ' (paired bottom/top)':<36} {med:7.3f} s [{lo:.3f}]")
    print("load average at end: " + " ".join(f"{x:.2f}" for x in os.getloadavg()))


if __name__ == "__main__":
    main()
