"""Design sweeps (fitter.stage.sweeps): each point against a direct solve, spread order,
field validation, and the direction physics gives.

Tubes: the invented test units of tests/test_ngspice.py (parameter sets made up by
perturbing published centre values, named there), and a small invented stock drawn from
them with a 10 % perveance spread.  Circuits are invented examples with ordinary values.
"""

from __future__ import annotations

from dataclasses import replace

import numpy as np
import pytest

from fitter import CAUTION
from fitter.stage import CathodeFollower, CommonCathode, Stack, StageInputError, solve, spread
from fitter.stage import distortion as D
from fitter.stage.sweeps import component_sweep, sweep_values, sweepable_fields
from fitter.triode import FittedTriode

KO = FittedTriode("koren", dict(mu=22.37, ex=1.317, kg1=1143.2, kp=91.6, kvb=271.0), tube="XU7", section="B")
PW = FittedTriode("power", dict(K=3.47e-4, mu=21.9, n=1.42, vc=0.31), tube="XU7", section="A")
DW = FittedTriode("dempwolf", dict(G=2.31e-3, mu=98.7, gamma=1.284, C=3.17), tube="XA7")
CC = CommonCathode(b_plus=250.0, ra=47e3, rk=1e3, ck=100e-6, rl=220e3, c_load=100e-12, heater=0.0)


def _stock(n=12, seed=3):
    rng = np.random.default_rng(seed)
    return [KO.with_params({"kg1": 1143.2 * f}) for f in rng.lognormal(0, 0.1, n)]


def _relabel(units):
    return [FittedTriode(u.model, u.params, tube=f"S{i:02d}", section="A") for i, u in enumerate(units)]


@pytest.mark.parametrize("fieldname,lo,hi", [("ra", 22e3, 150e3), ("b_plus", 180.0, 350.0), ("rk", 470.0, 3.3e3)])
def test_sweep_point_equals_solving_that_stage_directly(fieldname, lo, hi):
    # Reference: fitter.stage.solve on the stage built with the value directly (small-signal
    # and DC figures: same equations, so to rounding) and fitter.stage.distortion (its
    # 30-level sweep's headroom and analyse() at the level, 256 samples, refined searches;
    # the sweep interpolates log-log between levels 9 % apart: 1 % agreement).
    vals = sweep_values(lo, hi, 4)
    sw = component_sweep(CC, fieldname, vals, [(KO,)], level=8.0)
    for i, v in enumerate(vals):
        st = replace(CC, **{fieldname: v})
        f = solve(st, KO, errors=False).figures
        assert sw.figures["ia"][i, 0] == pytest.approx(f["ia"], rel=1e-9)
        assert sw.figures["gain"][i, 0] == pytest.approx(f["gain"], rel=1e-9)
        assert sw.figures["tube.va"][i, 0] == pytest.approx(f["tube.va"], rel=1e-9)
        assert sw.figures["tube.pa"][i, 0] == pytest.approx(f["tube.pa"], rel=1e-9)
        assert sw.figures["vhk_margin"][i, 0] == pytest.approx(CC.vhk_max - abs(f["tube.vhk"]), rel=1e-9)
        assert sw.figures["slew_fmax"][i, 0] == pytest.approx(f["slew_fmax"], rel=1e-9)
        ref = D.sweep(st, KO)
        assert sw.figures["headroom"][i, 0] == pytest.approx(ref.headroom_vout_peak, rel=1e-2)
        assert sw.figures["thd"][i, 0] == pytest.approx(D.analyse(st, KO, vout_peak=8.0).thd, rel=1e-2)


def test_stack_sweep_thd_matches_distortion_at_the_level():
    # Reference: fitter.stage.distortion.analyse at the same output level (quasi-static,
    # 256 samples), itself checked against ngspice transient + Fourier in tests/test_ngspice.py.
    st = Stack.mu_follower(b_plus=300.0, rk=1.5e3, r_top=1.5e3, r_mid=68e3, c_top=1e-6, ck=100e-6, rl=100e3)
    vals = [33e3, 100e3]
    sw = component_sweep(st, "r_mid", vals, [(DW, KO)], level=10.0)
    for i, v in enumerate(vals):
        ref = D.analyse(replace(st, r_mid=v), DW, KO, vout_peak=10.0)
        assert sw.figures["thd"][i, 0] == pytest.approx(ref.thd, rel=1e-2)
        assert sw.figures["headroom"][i, 0] > 10.0  # the level was reached without passing 1 % THD
    srpp = Stack.srpp(b_plus=300.0, rk=820.0, rl=47e3)
    sw = component_sweep(srpp, "rk", [600.0, 1200.0], [(KO, PW)])
    for i, v in enumerate([600.0, 1200.0]):
        assert sw.figures["headroom"][i, 0] == pytest.approx(D.sweep(replace(srpp, rk=v), KO, PW).headroom_vout_peak,
                                                             rel=1e-2)


def test_stock_sweep_spread_is_ordered_and_equals_spread():
    # Reference: fitter.stage.spread over the same units at each value (min / median / max).
    units = _relabel(_stock())
    vals = sweep_values(33e3, 150e3, 3, log=True)
    sw = component_sweep(CC, "ra", vals, [(u,) for u in units], level=5.0)
    assert sw.n_units == len(units)
    for k in sw.figures:
        lo, med, hi = sw.stats(k)
        ok = np.isfinite(med)
        assert np.all(lo[ok] <= med[ok]) and np.all(med[ok] <= hi[ok]), k
    lo, med, hi = sw.stats("ia")
    for i, v in enumerate(vals):
        ref = spread(replace(CC, ra=v), units).stats("ia")
        assert (lo[i], med[i], hi[i]) == pytest.approx(ref, rel=1e-9)
    # the units differ: the band has a width (10 % perveance spread, invented)
    assert np.all(hi > lo * 1.02)
    d = sw.to_dict()
    assert d["caution"] == CAUTION
    assert set(d["points"][0]["ia_ma"]) == {"min", "median", "max"}
    assert "median [min..max]" in sw.report()


def test_headroom_rises_with_b_plus_in_a_common_cathode():
    # Common practice: a higher supply gives a resistance-loaded triode more room to swing
    # (its load line moves up with the quiescent point).
    sw = component_sweep(CC, "b_plus", sweep_values(150.0, 400.0, 6), [(KO,)])
    assert np.all(np.diff(sw.figures["headroom"][:, 0]) > 0)
    # and more current and dissipation (Ohm's law on the same resistors)
    assert np.all(np.diff(sw.figures["ia"][:, 0]) > 0)


def test_unknown_field_is_named():
    with pytest.raises(StageInputError) as e:
        component_sweep(CC, "rx", [1.0, 2.0], [(KO,)])
    assert e.value.field == "vary" and "'rx'" in str(e.value) and "ra" in str(e.value)


def test_non_numeric_field_is_refused():
    st = Stack.srpp(b_plus=300.0, rk=820.0)
    with pytest.raises(StageInputError) as e:
        component_sweep(st, "top_grid", [1.0, 2.0], [(KO, PW)])
    assert e.value.field == "vary" and "top_grid" in str(e.value)
    assert "top_grid" not in sweepable_fields(st) and "r_top" in sweepable_fields(st)


def test_value_the_stage_refuses_names_field_and_value():
    with pytest.raises(StageInputError) as e:
        component_sweep(CC, "ra", [10e3, -5.0], [(KO,)])
    assert e.value.field == "ra" and "-5" in str(e.value)


def test_optional_capacitor_can_be_swept():
    # ck starts as a value here; c_out None in CC: a field left out can still be swept
    sw = component_sweep(replace(CC, c_out=None), "c_out", [1e-7, 1e-6], [(KO,)])
    assert sw.values.tolist() == [1e-7, 1e-6]


def test_cutoff_units_are_reported_not_hidden():
    # A cathode follower whose grid divider puts the grid above its cathode: at small Rk
    # the grid sits at grid-current onset without signal (no swing, common practice).
    st = CathodeFollower(b_plus=300.0, rk=22e3, vneg=-50.0, r_upper=1e6, r_lower=680e3, rl=10e3)
    sw = component_sweep(st, "rk", [5e3, 22e3], [(KO,)])
    assert np.isnan(sw.figures["headroom"][0, 0]) and np.isfinite(sw.figures["headroom"][1, 0])
    assert any("no signal swing" in n for n in sw.notes)


def test_sweep_values_ranges_and_errors():
    assert sweep_values(10.0, 1000.0, 3, log=True) == pytest.approx([10.0, 100.0, 1000.0])
    assert sweep_values(1.0, 3.0, 3) == pytest.approx([1.0, 2.0, 3.0])
    with pytest.raises(StageInputError) as e:
        sweep_values(0.0, 10.0, 5, log=True)
    assert e.value.field == "start"
    with pytest.raises(StageInputError) as e:
        sweep_values(1.0, 10.0, 1)
    assert e.value.field == "points"
