"""The design sweep's batched output-stage solve (fitter.stage.output._solve_many) against
one solve_output per case, which defines every figure.

The reference here is our own per-case solver (its figures are checked against ngspice, the
2A3 manual and the handbook in tests/test_output_stage.py); this file checks only that the
batched path gives the same answer, to 1e-6 relative (the brief's tolerance: the batched
path samples each unit's transfer at Chebyshev nodes instead of solving every sample).
The stock is invented: Koren's 300B set (from memory of Koren's table) with an invented
5 % kg1 and 20 % kp spread, plus a unit of another model (its own group) and a unit that is
cut off at idle in one stage.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

import fitter.stage.output as O
from fitter.stage.output import PushPullOutput, SingleEndedOutput, _from_result, _solve_many, solve_output
from fitter.stage.solver import StageSolveError
from fitter.triode import FittedTriode
from test_output_stage import P300B

RNG = np.random.default_rng(5)
STOCK = [FittedTriode("koren", dict(P300B, kg1=float(1550 * f), kp=float(65 * k)), tube=f"S{i}")
         for i, (f, k) in enumerate(zip(RNG.lognormal(0, 0.05, 12), RNG.lognormal(0, 0.2, 12)))]
# an invented odd unit of much higher mu: cut off at idle under the -75 V bias below
WORN = FittedTriode("koren", dict(P300B, mu=12.0), tube="WORN")

STAGES = [
    SingleEndedOutput(b_plus=330.0, load=3000.0, r_primary=150.0, grid_bias=-61.0, pa_max=40.0),
    SingleEndedOutput(b_plus=360.0, load=2500.0, r_primary=100.0, rk=1000.0, pa_max=40.0),
    SingleEndedOutput(b_plus=360.0, load=3000.0, rk=1000.0, bypassed=False),
    SingleEndedOutput(b_plus=300.0, load=1200.0, r_primary=150.0, grid_bias=-75.0, pa_max=40.0),
    PushPullOutput(b_plus=400.0, load=5000.0, r_primary=200.0, grid_bias=-84.0, pa_max=40.0),
    PushPullOutput(b_plus=400.0, load=4000.0, r_primary=200.0, grid_bias=-100.0),
    PushPullOutput(b_plus=450.0, load=5000.0, rk=650.0, pa_max=40.0),
    PushPullOutput(b_plus=450.0, load=5000.0, rk=650.0, bypassed=False),
    # a shared bypassed cathode in class AB with a bias shift of tens of volts: the units'
    # series need different node counts (retried unit by unit, padded to the largest)
    PushPullOutput(b_plus=450.0, load=3000.0, r_primary=150.0, rk=1000.0),
]


def _cases(st):
    units = STOCK + [WORN]
    if st.kind == "single-ended":
        return [(u,) for u in units]
    return list(zip(units[0::2], units[1::2])) + [(STOCK[0], WORN)]


def _reference(st, cases, level):
    rows = []
    for c in cases:
        try:
            rows.append(_from_result(st, solve_output(st, *c, thd=0.05), level))
        except StageSolveError:
            rows.append(None)
    return rows


@pytest.mark.parametrize("st", STAGES, ids=lambda s: f"{s.kind}-{s.grid_bias}-{s.rk}-{s.bypassed}")
def test_batched_figures_equal_one_solve_per_case(st):
    cases = _cases(st)
    got, failed = _solve_many(st, cases, thd=0.05, level=1.0)
    ref = _reference(st, cases, 1.0)
    assert failed == sum(r is None for r in ref)
    for u, r in enumerate(ref):
        for k, v in got.items():
            want = math.nan if r is None else r[k]
            if math.isnan(want):
                assert math.isnan(v[u]), (k, u)
            else:
                assert v[u] == pytest.approx(want, rel=1e-6, abs=1e-12), (k, u)


def test_worn_unit_fails_alone_and_the_rest_are_solved():
    st = STAGES[3]
    with pytest.raises(StageSolveError):
        solve_output(st, WORN)  # cut off at idle under -75 V
    got, failed = _solve_many(st, [(WORN,), (STOCK[0],)], thd=0.05, level=1.0)
    assert failed == 1 and math.isnan(got["p_max"][0]) and got["p_max"][1] > 0


def test_a_transfer_the_series_cannot_follow_is_solved_one_by_one(monkeypatch):
    # with a tail tolerance nothing can meet, every unit goes through solve_output: the
    # figures are then those of solve_output exactly
    monkeypatch.setattr(O, "_CHEB_TAIL", 0.0)
    st = STAGES[0]
    cases = [(u,) for u in STOCK[:3]]
    got, failed = _solve_many(st, cases, thd=0.05, level=1.0)
    for u, r in enumerate(_reference(st, cases, 1.0)):
        assert got["p_max"][u] == r["p_max"] and got["thd"][u] == r["thd"]


def test_mixed_models_are_solved_in_their_own_groups():
    # a Child-Langmuir power-law unit (invented 300B-like perveance, mu 3.9, exponent 3/2: the
    # ideal law) in the same stock is a group of its own; both groups match solve_output
    cl = FittedTriode("power", dict(K=1.2e-4, mu=3.9, n=1.5, vc=0.0), tube="CL")
    st = STAGES[0]
    cases = [(STOCK[0],), (cl,), (STOCK[1],)]
    got, failed = _solve_many(st, cases, thd=0.05, level=1.0)
    assert failed == 0
    for u, r in enumerate(_reference(st, cases, 1.0)):
        for k in ("p_max", "p_thd", "thd", "tube.ia", "zout", "pa_ratio"):
            assert got[k][u] == pytest.approx(r[k], rel=1e-6, nan_ok=True), (k, u)
    assert got["tube.ia"][1] != got["tube.ia"][0]


@pytest.mark.parametrize("thd", [0.004, 0.05])
def test_shared_bypassed_cathode_is_batched_and_equals_one_solve_per_case(thd, monkeypatch):
    # the bias shift makes each level's cathode its own solve: the batched path runs
    # solve_output's steps for many units at once (in blocks; 4 here, so a block boundary
    # falls inside the stock), and never falls back to solve_output
    st = PushPullOutput(b_plus=450.0, load=5000.0, rk=650.0, pa_max=40.0)
    cases = _cases(st)
    ref = []
    for c in cases:
        try:
            ref.append(_from_result(st, solve_output(st, *c, thd=thd), 1.0))
        except StageSolveError:
            ref.append(None)

    def no_single_solve(*a, **k):
        raise AssertionError("the batched path fell back to solve_output")

    monkeypatch.setattr(O, "solve_output", no_single_solve)
    monkeypatch.setattr(O, "_SHIFT_BLOCK", 4)
    got, failed = _solve_many(st, cases, thd=thd, level=1.0)
    assert failed == sum(r is None for r in ref)
    reached = sum(r is not None and not math.isnan(r["p_thd"]) for r in ref)
    # both branches of the THD search: the target reached (most units at 0.4 %) and not
    assert reached >= (len(cases) - 1 if thd < 0.01 else 0) and len(cases) - reached >= (0 if thd < 0.01 else 4)
    for u, r in enumerate(ref):
        for k, v in got.items():
            want = math.nan if r is None else r[k]
            if math.isnan(want):
                assert math.isnan(v[u]), (k, u)
            else:
                assert v[u] == pytest.approx(want, rel=1e-6, abs=1e-12), (k, u)
