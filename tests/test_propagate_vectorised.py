"""Error bars of a stage solve: every perturbed parameter set of every tube is solved in
one vectorised pass (fitter.stage.solve), and gives the same error bars as evaluating
the figures once per perturbed set (fitter.triode.propagate over whole solves, one tube
at a time, added in quadrature: the previous path) to 1e-9 relative.

Tubes: Koren's 12AX7 / 12AU7 sets and Dempwolf-Zoelzer's ECC83 set (all from memory of
the published tables), with invented covariances (diagonal plus correlations).
"""

from __future__ import annotations

import numpy as np
import pytest

from fitter import stage as S
from fitter.triode import FittedTriode, error_from_differences, perturbed, propagate

KOREN = ("mu", "ex", "kg1", "kp", "kvb")


def _cov(sigmas, rho=0.3):
    """An invented covariance: the given standard deviations, correlation rho between neighbours."""
    s = np.asarray(sigmas, float)
    c = np.diag(s**2)
    for i in range(len(s) - 1):
        c[i, i + 1] = c[i + 1, i] = rho * s[i] * s[i + 1]
    return c


# Koren 12AX7 and 12AU7 sets (from memory of Koren's table, Glass Audio 8(5), 1996, rev. 2003)
HX = FittedTriode("koren", dict(mu=100, ex=1.4, kg1=1060, kp=600, kvb=300), tube="HX", free=KOREN,
                  covariance=_cov([1.0, 0.01, 10.0, 10.0, 10.0]))
MA = FittedTriode("koren", dict(mu=21.5, ex=1.3, kg1=1180, kp=84, kvb=300), tube="MU", section="A",
                  free=KOREN, covariance=_cov([0.3, 0.01, 10.0, 2.0, 10.0]))
MB = FittedTriode("koren", dict(mu=21.5, ex=1.3, kg1=1300, kp=84, kvb=300), tube="MU", section="B",
                  free=KOREN, covariance=_cov([0.2, 0.02, 12.0, 3.0, 8.0], rho=-0.2))
# Dempwolf & Zoelzer's ECC83 set with grid current (from memory of DAFx-11); grid-current
# parameters free too, so the cases fall into several groups of the vectorised solve
DZ_FREE = ("G", "mu", "gamma", "C", "Gg", "xi")
DZ = FittedTriode("dempwolf", dict(G=2.242e-3, mu=103.2, gamma=1.26, C=3.40, Gg=6.177e-4, xi=1.314,
                                   Cg=9.901, Ig0=8.025e-8), tube="DZ", free=DZ_FREE,
                  covariance=_cov([2e-5, 1.0, 0.01, 0.03, 1e-5, 0.01]))

STAGES = {  # invented circuit values
    "common cathode": (S.CommonCathode(b_plus=300, ra=100e3, rk=1.5e3, ck=22e-6, rl=470e3,
                                       c_load=100e-12, cga=1.7e-12), (HX,)),
    "common cathode, grid current model": (S.CommonCathode(b_plus=300, ra=100e3, rk=1.5e3, rl=470e3), (DZ,)),
    "cathode follower": (S.CathodeFollower(b_plus=250, rk=22e3, vneg=-150, rl=100e3), (MA,)),
    "SRPP": (S.Stack.srpp(b_plus=300, rk=820.0, rl=100e3), (MA, MB)),
    "mu follower": (S.Stack.mu_follower(b_plus=300, rk=1e3, r_top=820.0, r_mid=68e3, ck=1e-4, rl=47e3),
                    (MA, MB)),
    "mu follower, top without covariance": (
        S.Stack.mu_follower(b_plus=300, rk=1e3, r_top=820.0, r_mid=68e3, ck=1e-4, rl=47e3),
        (MA, FittedTriode("koren", dict(MB.params), tube="MU", section="B"))),
}


def _one_set_at_a_time(stage, triodes):
    """The previous path: propagate() over whole solves, one perturbed set per solve."""
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


@pytest.mark.parametrize("name", list(STAGES))
def test_vectorised_error_bars_equal_one_solve_per_parameter_set(name):
    stage, triodes = STAGES[name]
    got = S.solve(stage, *triodes).errors
    want = _one_set_at_a_time(stage, triodes)
    assert list(got) == list(want)
    finite = [k for k in want if np.isfinite(want[k])]
    assert len(finite) > 10  # the check covers the figures, not just a few
    for k in want:
        if np.isfinite(want[k]):
            assert got[k] == pytest.approx(want[k], rel=1e-9, abs=1e-300), k
        else:
            assert np.isnan(got[k]), k


def test_error_bars_are_not_all_zero():
    # the error of the gain of a stage whose tube carries a covariance is positive
    stage, triodes = STAGES["mu follower"]
    r = S.solve(stage, *triodes)
    assert r.errors["gain"] > 0 and r.errors["bottom.ia"] > 0


def test_batched_propagate_equals_one_call_per_set():
    # small-signal figures of a unit: batch=True evaluates the same perturbed sets at once
    va, vg = 250.0, -2.0

    def one(t):
        ia = float(t.current(va, vg))
        dva, dvg = (float(x) for x in t.gradient(va, vg))
        return np.array([ia, dvg, 1.0 / dva])

    def many(ts):
        return np.array([one(t) for t in ts])

    v1, e1 = propagate(one, HX)
    v2, e2 = propagate(many, HX, batch=True)
    np.testing.assert_array_equal(v1, v2)
    np.testing.assert_allclose(e2, e1, rtol=1e-12)
    assert np.all(e1 > 0)


def test_perturbed_sets_are_central_differences_of_each_free_parameter():
    sets, steps = perturbed(HX)
    assert len(sets) == 2 * len(KOREN) and steps.shape == (len(KOREN),)
    for j, name in enumerate(KOREN):
        up, dn = sets[2 * j], sets[2 * j + 1]
        assert up.params[name] - HX.params[name] == pytest.approx(steps[j], rel=1e-9)
        assert HX.params[name] - dn.params[name] == pytest.approx(steps[j], rel=1e-9)
        others = [k for k in HX.params if k != name]
        assert all(up.params[k] == HX.params[k] == dn.params[k] for k in others)
    # a linear figure: the error is sqrt(a^T C a) exactly (first-order propagation, exact
    # for a linear function: common practice)
    a = np.array([1.0, -3.0, 0.01, 0.2, 0.05])
    rows = [[sum(a[i] * t.params[k] for i, k in enumerate(KOREN))] for t in sets]
    err = error_from_differences(rows, steps, HX.covariance)
    assert err[0] == pytest.approx(np.sqrt(a @ HX.covariance @ a), rel=1e-6)


def test_no_covariance_gives_nan_errors():
    plain = FittedTriode("koren", dict(HX.params), tube="P")
    v, e = propagate(lambda ts: np.array([[float(t.current(250.0, -2.0))] for t in ts]), plain, batch=True)
    assert np.isfinite(v).all() and np.isnan(e).all()
    r = S.solve(STAGES["common cathode"][0], plain)
    assert all(np.isnan(x) for x in r.errors.values())
