"""Benchmark of the output-stage engine (fitter.stage.output): prints figures, asserts nothing.

Goals (issue 11, section 6): a single-ended or push-pull solve with all figures <= 5 ms; a
30-level power sweep <= 0.2 s.  Also timed: the reflected-load sweep (20 loads) and the
push-pull matching figures (PushPullSlot) of a 200-unit stock, and a 20-point component
sweep of the reflected load over 20 units (fitter.stage.sweeps with an output stage).

The tubes are invented units from Koren's 300B set (from memory of Koren's table, Glass
Audio 8(5), 1996, rev. 2003) with an invented spread.

Run:  python bench/output.py
"""

from __future__ import annotations

import hashlib
import os
import statistics
import time
from pathlib import Path

import numpy as np

from fitter.match import PushPullSlot, unit_figures
from fitter.stage.output import (PushPullOutput, SingleEndedOutput, _banks, _idle, _spectra, _sweep_from,
                                 load_sweep, solve_output)
from fitter.triode import FittedTriode

P300B = dict(mu=3.95, ex=1.4, kg1=1550.0, kp=65.0, kvb=300.0)


def timed(fn, repeat):
    times = []
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
    return statistics.median(times), min(times)


def engine_sha1() -> str:
    root = Path(__file__).resolve().parent.parent / "fitter" / "stage"
    h = hashlib.sha1()
    for name in ("output.py", "solver.py", "distortion.py"):
        h.update((root / name).read_bytes())
    return h.hexdigest()[:12]


def main():
    print(f"load average {os.getloadavg()[0]:.2f}, engine sha1 {engine_sha1()}")
    a = FittedTriode("koren", P300B, tube="PA")
    b = FittedTriode("koren", dict(P300B, mu=3.85, kg1=1600.0), tube="PB")
    cases = [
        ("single-ended, fixed bias", SingleEndedOutput(b_plus=330.0, load=3000.0, r_primary=150.0, grid_bias=-61.0), (a,)),
        ("single-ended, cathode bias bypassed", SingleEndedOutput(b_plus=360.0, load=3000.0, rk=1000.0), (a,)),
        ("single-ended, cathode bias unbypassed", SingleEndedOutput(b_plus=360.0, load=3000.0, rk=1000.0, bypassed=False), (a,)),
        ("push-pull, fixed bias, class A", PushPullOutput(b_plus=400.0, load=5000.0, r_primary=200.0, grid_bias=-84.0), (a, b)),
        ("push-pull, fixed bias, class AB", PushPullOutput(b_plus=400.0, load=4000.0, r_primary=200.0, grid_bias=-100.0), (a, b)),
        ("push-pull, shared Rk bypassed", PushPullOutput(b_plus=450.0, load=5000.0, rk=650.0), (a, b)),
        ("push-pull, shared Rk unbypassed", PushPullOutput(b_plus=450.0, load=5000.0, rk=650.0, bypassed=False), (a, b)),
    ]
    print("\nsolve with all figures (goal <= 5 ms)            median     min")
    for name, st, tubes in cases:
        solve_output(st, *tubes)
        med, best = timed(lambda: solve_output(st, *tubes), 30)
        print(f"  {name:44s} {1e3 * med:7.2f} ms {1e3 * best:6.2f} ms")
    print("\n30-level power sweep, 128 samples a period (goal <= 0.2 s)")
    for name, st, tubes in cases:
        banks = _banks(st, tubes)
        op = _idle(st, banks)
        vmax = solve_output(st, *tubes).figures["vin_max"]
        amps = vmax * np.linspace(1 / 30, 1, 30)
        med, best = timed(lambda: _sweep_from(st, amps, _spectra(st, banks, op, amps)[1]), 30)
        print(f"  {name:44s} {1e3 * med:7.2f} ms {1e3 * best:6.2f} ms")
    st, tubes = cases[0][1], cases[0][2]
    med, _ = timed(lambda: load_sweep(st, *tubes, loads=np.linspace(1500, 8000, 20)), 5)
    print(f"\nreflected-load sweep, 20 loads (single-ended):   {1e3 * med:7.1f} ms")
    rng = np.random.default_rng(11)
    stock = [FittedTriode("koren", dict(P300B, kg1=float(1550 * np.exp(rng.normal(0, 0.05))),
                                        kp=float(65 * np.exp(rng.normal(0, 0.2)))), tube=f"S{i:03d}")
             for i in range(200)]
    from fitter.stage.sweeps import component_sweep

    st = cases[0][1]
    med, _ = timed(lambda: component_sweep(st, "load", np.linspace(2000, 6000, 20), [(u,) for u in stock[:20]],
                                           thd_limit=0.05, level=1.0), 1)
    print(f"component sweep, 20 loads x 20 units (single-ended): {1e3 * med:7.1f} ms")
    pos = PushPullSlot(cases[3][1], a, 0.8)
    med, _ = timed(lambda: unit_figures(stock, pos), 3)
    print(f"push-pull matching figures, 200 units:            {1e3 * med:7.1f} ms")


if __name__ == "__main__":
    main()
