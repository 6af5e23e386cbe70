"""The stack solve's joint Newton iteration keeps the samples it converged and hands only
the rest to the nested bracketed iteration (fitter.stage.solver._stack_solve).

The reference is the bracketed iteration alone (solver._JOINT off), our own solver whose
answers tests/test_stage.py checks against ngspice; this file checks only that mixing the
two methods sample by sample gives the same answer, to the solver's tolerance.  The tubes
are invented 12AU7-like units (Koren's 12AU7 set from memory of Koren's table, Glass Audio
8(5), 1996, rev. 2003, with an invented spread); the drives include absurd ones (hundreds
of volts on a small-signal grid) on which the joint iteration gives up.
"""

from __future__ import annotations

import numpy as np
import pytest

import fitter.stage.solver as SV
from fitter import stage as S
from fitter.stage.solver import operating_point, quasi_static
from fitter.triode import FittedTriode

MU = dict(mu=21.5, ex=1.3, kg1=1180.0, kp=84.0, kvb=300.0)
BOTTOM = FittedTriode("koren", MU, tube="B")
TOP = FittedTriode("koren", dict(MU, kg1=1300.0, mu=20.5), tube="T")
STAGE = S.Stack.srpp(b_plus=300, rk=820.0, rl=100e3, c_load=1e-9)
VIN = np.array([-3.0, -0.5, 0.0, 0.3, 1.0, 2.0, 50.0, 120.0, 300.0, -300.0, 600.0])


def test_only_the_unconverged_samples_take_the_bracketed_iteration(monkeypatch):
    op = operating_point(STAGE, BOTTOM, TOP)
    sizes = []
    outer = SV._solve_outer

    def counting(fun, x0, *a, **k):
        sizes.append(np.size(x0))
        return outer(fun, x0, *a, **k)

    monkeypatch.setattr(SV, "_solve_outer", counting)
    mixed = quasi_static(STAGE, BOTTOM, TOP, vin=VIN, op=op)
    # the joint iteration gave up on some samples, and only those went on
    assert sizes and all(0 < s < VIN.size for s in sizes)
    sizes.clear()
    monkeypatch.setattr(SV, "_JOINT", False)
    alone = quasi_static(STAGE, BOTTOM, TOP, vin=VIN, op=op)
    assert sizes == [VIN.size]
    for key in ("plate_bottom", "cathode_top", "bottom.ia", "top.ia"):
        assert mixed[key] == pytest.approx(alone[key], rel=1e-9, abs=1e-12 * 300), key
