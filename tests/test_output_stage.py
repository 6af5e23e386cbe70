"""Output stages (fitter.stage.output): single-ended and push-pull power triodes.

Outside references, named beside each check:
* ngspice on the same circuits, with the exported subcircuits and an ideal transformer
  (coupled inductors, K = 1, 1000 H per half primary: 6.3 MOhm at 1 kHz against loads of
  kilohms), transient + its Fourier analysis;
* tube-manual typical operation of the 2A3 (RCA data, from memory);
* textbook relations (Radiotron Designer's Handbook, 4th ed., from memory): the output
  impedance rp / n^2, the five-point harmonic schedule, P = (Imax - Imin)(Vmax - Vmin) / 8.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

import ngspice_util as ng
from fitter.export import spice_subcircuit
from fitter.stage import StageInputError
from fitter.stage.output import (PushPullOutput, SingleEndedOutput, idle, load_sweep, solve_output,
                                 waveforms)
from fitter.stage.output import _banks, _idle, _spectra, _sweep_from
from fitter.triode import FittedTriode

# Koren's published 300B set, from memory (the same set as tests/conftest.py TUBE_TYPES), and
# a second unit a little stronger and lower in mu (an invented pair partner: real pairs are
# never identical).
P300B = dict(mu=3.95, ex=1.4, kg1=1550.0, kp=65.0, kvb=300.0)
TA = FittedTriode("koren", P300B, tube="PA")
TB = FittedTriode("koren", dict(P300B, mu=3.85, kg1=1600.0), tube="PB")


# ---------------------------------------------------------------------------
# Behaviour of the engine
# ---------------------------------------------------------------------------


def test_se_dc_point_drops_the_winding_resistance_only():
    # Kirchhoff: the plate sits at B+ - Rdc Ia (fixed bias), the primary carries Ia.
    st = SingleEndedOutput(b_plus=320.0, load=3000.0, r_primary=150.0, grid_bias=-61.0)
    op = idle(st, TA)
    assert op["tube.va"] == pytest.approx(320.0 - 150.0 * op["tube.ia"], rel=1e-12)
    assert op["tube.ia"] == pytest.approx(float(TA.current(op["tube.va"], -61.0)), rel=1e-10)
    res = solve_output(st, TA)
    assert res.to_dict()["primary_dc_ma"] == pytest.approx(1e3 * op["tube.ia"])


def test_se_ac_load_line_has_the_reflected_load_slope():
    # The AC load line passes through the operating point with slope -1/(Rdc + RL)
    # (ideal transformer; Ohm's law on the primary).
    st = SingleEndedOutput(b_plus=300.0, load=2500.0, r_primary=100.0, grid_bias=-55.0)
    op = idle(st, TA)
    w = waveforms(st, TA, vin=np.linspace(-40, 40, 9))
    slope = np.diff(w["tube.va"]) / np.diff(w["tube.ia"])
    assert np.allclose(slope, -(2500.0 + 100.0), rtol=1e-9)
    assert np.interp(0.0, np.linspace(-40, 40, 9), w["tube.va"]) == pytest.approx(op["tube.va"])


def test_cathode_bias_sets_the_grid_from_the_current():
    # Ohm's law: Vgk = -Rk Ia at idle, plate-cathode = B+ - (Rdc + Rk) Ia.
    st = SingleEndedOutput(b_plus=360.0, load=3000.0, r_primary=120.0, rk=1000.0)
    op = idle(st, TA)
    assert op["tube.vgk"] == pytest.approx(-1000.0 * op["tube.ia"], rel=1e-12)
    assert op["tube.va"] == pytest.approx(360.0 - 1120.0 * op["tube.ia"], rel=1e-12)


def test_unbypassed_cathode_resistor_lowers_gain_distortion_and_damping():
    # Local feedback (common practice): less output for the same drive, less THD at the
    # same output, a higher source resistance rp + (mu + 1) Rk (the textbook formula).
    byp = solve_output(SingleEndedOutput(b_plus=360.0, load=3000.0, rk=1000.0, bypassed=True), TA)
    unb = solve_output(SingleEndedOutput(b_plus=360.0, load=3000.0, rk=1000.0, bypassed=False), TA)
    p = 2.0
    thd = [np.interp(p, r.sweep.power, r.sweep.thd) for r in (byp, unb)]
    assert thd[1] < 0.6 * thd[0]
    ss = TA.small_signal(byp.op["tube.va"], byp.op["tube.vgk"], check=False)
    n2 = 3000.0 / 8.0
    assert unb.figures["z_out"] == pytest.approx((ss.rp + (ss.mu + 1) * 1000.0) / n2, rel=1e-6)
    assert byp.figures["damping"] > 3 * unb.figures["damping"]


def test_matched_push_pull_cancels_even_harmonics_and_imbalance_brings_h2():
    # Symmetry (textbook): identical halves cancel the even harmonics (H2 under the
    # numerical floor); a mismatched pair leaves H2 and a DC imbalance in the primary.
    st = PushPullOutput(b_plus=400.0, load=5000.0, grid_bias=-84.0)
    same = solve_output(st, TA, TA)
    pair = solve_output(st, TA, TB)
    assert np.all(same.sweep.h2 < -140.0)
    assert same.figures["imbalance"] == 0.0
    assert np.all(pair.sweep.h2[5:] > -80.0)
    ia_a = float(TA.current(400.0, -84.0))
    ia_b = float(TB.current(400.0, -84.0))
    assert pair.figures["imbalance"] == pytest.approx(ia_a - ia_b, rel=1e-9)  # model currents at fixed bias


def test_cold_bias_gives_class_ab_with_a_crossover_dip():
    # A colder bias makes each tube cut off over part of the cycle (class AB): the class-A
    # limit comes before the grid-current limit and the composite transconductance dips.
    warm = solve_output(PushPullOutput(b_plus=400.0, load=4000.0, grid_bias=-80.0), TA, TB)
    cold = solve_output(PushPullOutput(b_plus=400.0, load=4000.0, grid_bias=-100.0), TA, TB)
    assert warm.figures["class"] == "A"
    assert cold.figures["class"] == "AB"
    assert cold.figures["p_class_a"] < cold.figures["p_max"]
    assert 0.0 < cold.figures["gm_dip"] < warm.figures["gm_dip"] <= 1.0
    d = cold.to_dict()
    assert d["class_a"]["class"] == "AB" and d["class_a"]["power_w"] < d["max_output"]["power_w"]


def test_shared_cathode_resistor_push_pull_solves_both_ways():
    # The shared resistor carries both currents at DC (Ohm's law), whichever bypass.
    for byp in (True, False):
        st = PushPullOutput(b_plus=450.0, load=5000.0, rk=650.0, bypassed=byp)
        r = solve_output(st, TA, TB)
        assert r.op["vk"] == pytest.approx(650.0 * (r.op["A.ia"] + r.op["B.ia"]), rel=1e-9)
        assert r.figures["p_max"] > 5.0


def test_composite_characteristic_meets_the_load_line_at_the_solved_state():
    # Common practice (the composite characteristic of a push-pull pair): the state at a
    # grid drive e is where the curve of e crosses v = (Raa/4)(IA - IB - imbalance).
    from fitter.stage.output import composite_characteristic

    st = PushPullOutput(b_plus=400.0, load=4000.0, r_primary=200.0, grid_bias=-100.0)
    e = np.array([-60.0, 0.0, 35.0, 90.0])
    w = waveforms(st, TA, TB, vin=e)
    v = w["v_load"] / 2.0
    ic = composite_characteristic(st, TA, TB, drives=e, v=v)
    assert np.allclose(np.diag(ic), w["A.ia"] - w["B.ia"], rtol=1e-9, atol=1e-12)
    op = idle(st, TA, TB)
    assert np.allclose(v, 1000.0 * (np.diag(ic) - (op["A.ia"] - op["B.ia"])), rtol=1e-9, atol=1e-9)


def test_joint_and_bracketed_push_pull_solves_agree():
    # Two solution methods of the same equations (the fallback is the bracketed one).
    from fitter.stage.output import _pp_bracketed, _pp_joint

    st = PushPullOutput(b_plus=450.0, load=5000.0, rk=650.0, bypassed=False)
    banks = _banks(st, (TA, TB))
    op = _idle(st, banks)
    vin = np.linspace(-100, 100, 41)
    d0 = op["A.ia"] - op["B.ia"]
    j = _pp_joint(st, banks, -79.0 + vin, -79.0 - vin, None, d0, (op["A.ia"], op["B.ia"], 0.0, op["vk"]))
    b = _pp_bracketed(st, banks, -79.0 + vin, -79.0 - vin, None, d0)
    assert j is not None
    for x, y in zip(j, b):
        assert np.allclose(x, y, rtol=1e-7, atol=1e-9)


def test_128_samples_resolve_the_harmonics():
    # Against 1024 samples per period (the projection's own convergence): same H2, H3.
    st = PushPullOutput(b_plus=400.0, load=4000.0, grid_bias=-100.0)
    banks = _banks(st, (TA, TB))
    op = _idle(st, banks)
    a = [20.0, 60.0, 99.0]
    s1 = _sweep_from(st, a, _spectra(st, banks, op, a, 128)[1])
    s2 = _sweep_from(st, a, _spectra(st, banks, op, a, 1024)[1])
    assert np.allclose(s1.h2, s2.h2, atol=0.01) and np.allclose(s1.h3, s2.h3, atol=0.01)
    assert np.allclose(s1.power, s2.power, rtol=1e-6)


def test_power_at_thd_lies_on_the_sweep():
    # The refined level where THD reaches the target agrees with the sweep's curve.
    st = SingleEndedOutput(b_plus=300.0, load=3000.0, grid_bias=-61.0)
    r = solve_output(st, TA, thd=0.04)
    f = r.figures
    assert f["p_thd"] is not None and f["p_thd"] < f["p_max"]
    banks = _banks(st, (TA,))
    op = _idle(st, banks)
    s = _sweep_from(st, [f["vin_thd"]], _spectra(st, banks, op, [f["vin_thd"]])[1])
    assert s.thd[0] == pytest.approx(0.04, rel=1e-3)


def test_grid_current_limit_is_the_bias_with_fixed_bias():
    # With a fixed bias the grid reaches 0 V when the peak drive equals the bias.
    r = solve_output(SingleEndedOutput(b_plus=300.0, load=3000.0, grid_bias=-61.0), TA)
    assert r.figures["vin_max"] == pytest.approx(61.0, rel=1e-12)
    assert r.figures["limit"] == "grid current"


def test_cut_off_limits_a_high_load_low_current_stage():
    # A cold bias: the current reaches cut-off before the grid reaches 0 V.
    r = solve_output(SingleEndedOutput(b_plus=300.0, load=3000.0, grid_bias=-75.0), TA)
    assert r.figures["limit"] == "cut-off"
    vin = r.figures["vin_max"]
    w = waveforms(SingleEndedOutput(b_plus=300.0, load=3000.0, grid_bias=-75.0), TA, vin=np.array([-vin]))
    assert float(w["tube.ia"][0]) == pytest.approx(0.01 * r.op["tube.ia"], rel=1e-4)


def test_load_sweep_trades_power_for_distortion():
    # Common practice for triodes: a higher load gives less distortion at a given level.
    st = SingleEndedOutput(b_plus=300.0, load=3000.0, grid_bias=-61.0)
    sw = load_sweep(st, TA, loads=[1500.0, 3000.0, 6000.0], level=1.0)
    assert np.all(np.diff(sw.thd_at) < 0)
    assert sw.to_dict()["load_ohm"] == [1500.0, 3000.0, 6000.0]
    assert "reflected load" in sw.report()


def test_dissipation_over_the_limit_is_warned():
    r = solve_output(SingleEndedOutput(b_plus=450.0, load=3000.0, grid_bias=-70.0, pa_max=25.0), TA)
    assert any("above the 25 W limit" in w for w in r.warnings)


def test_error_bars_follow_the_fit_covariance():
    # fitter.triode.propagate (central differences, sqrt(J C J^T)) of the model current at
    # the fixed-bias point (no winding resistance: va = B+) is the idle current's error bar.
    from fitter.triode import propagate

    cov = np.diag([1e-3, 1e-5, 400.0, 4.0, 100.0])
    t = FittedTriode("koren", P300B, tube="PE", free=("mu", "ex", "kg1", "kp", "kvb"), covariance=cov)
    st = SingleEndedOutput(b_plus=300.0, load=3000.0, grid_bias=-61.0)
    r = solve_output(st, t, errors=True)
    _, err = propagate(lambda u: [float(u.current(300.0, -61.0))], t)
    assert r.figures["errors"]["ia_A"] == pytest.approx(err[0], rel=1e-4)
    assert r.figures["errors"]["p_max"] > 0
    d = r.to_dict()["errors"]
    assert d["ia_ma"]["tube"] == pytest.approx(1e3 * err[0], rel=1e-4)
    assert "error bars" in r.report()
    # no covariance on the card: unknown, not zero
    r = solve_output(st, TA, errors=True)
    assert math.isnan(r.figures["errors"]["p_max"]) and r.to_dict()["errors"]["power_max_w"] is None


@pytest.mark.parametrize("fields,field", [
    (dict(b_plus=300.0, grid_bias=-61.0), "load"),
    (dict(b_plus=300.0, load=3000.0, turns_ratio=20.0, grid_bias=-61.0), "load"),
    (dict(b_plus=300.0, load=3000.0), "grid_bias"),
    (dict(b_plus=300.0, load=3000.0, grid_bias=-61.0, rk=800.0), "grid_bias"),
    (dict(b_plus=300.0, load=3000.0, grid_bias=5.0), "grid_bias"),
    (dict(b_plus=-300.0, load=3000.0, grid_bias=-61.0), "b_plus"),
    (dict(b_plus=300.0, load=3000.0, grid_bias=-61.0, bypassed=1), "bypassed"),
    (dict(b_plus=300.0, load=float("nan"), grid_bias=-61.0), "load"),
])
def test_impossible_stage_names_the_field(fields, field):
    with pytest.raises(StageInputError) as e:
        SingleEndedOutput(**fields)
    assert e.value.field == field


def test_turns_ratio_gives_the_reflected_load():
    # Ideal transformer: RL = n^2 Z (textbook).
    st = SingleEndedOutput(b_plus=300.0, turns_ratio=20.0, speaker=8.0, grid_bias=-61.0)
    assert st.reflected_load == pytest.approx(3200.0)


def test_cut_off_at_idle_is_a_solve_error():
    from fitter.stage import StageSolveError

    with pytest.raises(StageSolveError, match="^the tube is cut off at idle .*make the grid bias less negative$"):
        solve_output(SingleEndedOutput(b_plus=150.0, load=3000.0, grid_bias=-200.0), TA)
    with pytest.raises(StageSolveError, match="^tubes A and B are cut off at idle"):
        solve_output(PushPullOutput(b_plus=150.0, load=3000.0, grid_bias=-200.0), TA, TB)


def test_report_and_dict_carry_the_caution_and_the_figures():
    from fitter import CAUTION

    r = solve_output(PushPullOutput(b_plus=400.0, load=5000.0, grid_bias=-84.0, pa_max=40.0), TA, TB)
    assert CAUTION in r.report()
    d = r.to_dict()
    assert d["kind"] == "push-pull" and set(d["tubes"]) == {"A", "B"}
    assert len(d["sweep"]["power_w"]) == 30


# ---------------------------------------------------------------------------
# Textbook relations (Radiotron Designer's Handbook, 4th ed., from memory)
# ---------------------------------------------------------------------------


def test_output_impedance_is_rp_over_n_squared():
    # RDH: a transformer reflects the source resistance by 1/n^2; single-ended rp / n^2,
    # push-pull (class A) 2 rp / n^2 of the whole primary, plus the winding's DC
    # resistance on the primary side.
    st = SingleEndedOutput(b_plus=300.0, turns_ratio=20.0, speaker=8.0, grid_bias=-61.0)
    r = solve_output(st, TA)
    rp = TA.small_signal(300.0, -61.0, check=False).rp
    assert r.figures["z_out"] == pytest.approx(rp / 400.0, rel=1e-9)
    assert r.figures["damping"] == pytest.approx(8.0 / (rp / 400.0), rel=1e-9)
    pp = PushPullOutput(b_plus=400.0, turns_ratio=25.0, speaker=8.0, r_primary=200.0, grid_bias=-84.0)
    r = solve_output(pp, TA, TB)
    rpa = TA.small_signal(r.op["A.va"], -84.0, check=False).rp
    rpb = TB.small_signal(r.op["B.va"], -84.0, check=False).rp
    # halves in parallel on the half winding (ampere-turn balance): 4 RA RB / (RA + RB),
    # R = rp + Rdc/2, which is RDH's (2 rp + Rdc) / n^2 for equal halves; these differ by 2 %
    # in rp, where the two forms agree within 0.01 %
    ra, rb = rpa + 100.0, rpb + 100.0
    assert r.figures["z_out"] == pytest.approx(4 * ra * rb / (ra + rb) / 625.0, rel=1e-9)
    assert r.figures["z_out"] == pytest.approx((rpa + rpb + 200.0) / 625.0, rel=1e-3)
    same = solve_output(pp, TA, TA)
    rp = TA.small_signal(same.op["A.va"], -84.0, check=False).rp
    assert same.figures["z_out"] == pytest.approx((2 * rp + 200.0) / 625.0, rel=1e-12)


def test_small_signal_power_is_the_linear_formula():
    # RDH: P = (mu Eg)^2 RL / (2 (rp + RL)^2) for a peak grid signal Eg in the linear limit.
    st = SingleEndedOutput(b_plus=300.0, load=3000.0, grid_bias=-61.0)
    banks = _banks(st, (TA,))
    op = _idle(st, banks)
    eg = 0.05
    s = _sweep_from(st, [eg], _spectra(st, banks, op, [eg])[1])
    ss = TA.small_signal(300.0, -61.0, check=False)
    assert s.power[0] == pytest.approx((ss.mu * eg) ** 2 * 3000.0 / (2 * (ss.rp + 3000.0) ** 2), rel=1e-4)


def test_five_point_schedule_and_swing_power():
    # RDH's five-point schedule (plate currents at grid signal +E, +E/2, 0, -E/2, -E):
    #   B1 = (Imax - Imin + I.5 - I-.5) / 3,  B2 = (Imax + Imin - 2 I0) / 4,
    #   B3 = (Imax - Imin - 2 (I.5 - I-.5)) / 6 (exact for a transfer of degree <= 4);
    # and the load-line power P = (Imax - Imin)(Vmax - Vmin) / 8 (undistorted sine).
    st = SingleEndedOutput(b_plus=300.0, load=3000.0, grid_bias=-61.0)
    r = solve_output(st, TA)
    E = 0.8 * r.figures["vin_max"]
    w = waveforms(st, TA, vin=np.array([E, E / 2, 0.0, -E / 2, -E]))
    imax, ih, i0, il, imin = w["tube.ia"]
    b1 = (imax - imin + ih - il) / 3
    b2 = (imax + imin - 2 * i0) / 4
    b3 = (imax - imin - 2 * (ih - il)) / 6
    banks = _banks(st, (TA,))
    s = _sweep_from(st, [E], _spectra(st, banks, _idle(st, banks), [E])[1])
    assert 20 * math.log10(abs(b2) / b1) == pytest.approx(s.h2[0], abs=0.1)
    assert 20 * math.log10(abs(b3) / b1) == pytest.approx(s.h3[0], abs=0.5)
    assert b1 ** 2 * 3000.0 / 2 == pytest.approx(s.power[0], rel=0.01)
    vmax, vmin = w["tube.va"][4], w["tube.va"][0]
    # H3 here is about -37 dB (1.4 %): the swing formula is within a few per cent
    assert (imax - imin) * (vmax - vmin) / 8 == pytest.approx(s.power[0], rel=0.05)


# ---------------------------------------------------------------------------
# Tube-manual typical operation: 2A3 (RCA data, from memory)
# ---------------------------------------------------------------------------
#
# From memory of the RCA 2A3 data: class A1 single tube, Ep 250 V, Eg -45 V, Ip 60 mA,
# mu 4.2, rp 800 ohm, gm 5250 umho, load 2500 ohm, 3.5 W at 5 % THD (grid driven to 0 V);
# push-pull class AB1 fixed bias, Ep 300 V, Eg -62 V, zero-signal Ip 80 mA (two tubes),
# max-signal 147 mA, load 3000 ohm plate to plate, 15 W at 2.5 % THD.  The model is a
# Koren law (ex 1.4, kvb 300 as in Koren's power-triode sets) whose mu, kp, kg1 are set so
# that it has the manual's Ip, gm and rp at the single-tube point; everything else (output,
# distortion, push-pull figures at another point) is the stage solver's prediction.
#
# Tolerances: manual figures are design-centre values of a type whose tubes spread by
# 10-20 % in current (common practice), and the one-point model's law is only Koren's;
# so output power within 15 %, currents within 10 %, single-ended THD within 3 dB.  The
# push-pull THD is compared only as an upper bound: the manual measured real (unmatched)
# tubes, whose imbalance brings H2 that an identical pair does not have.


@pytest.fixture(scope="module")
def tube_2a3():
    from scipy.optimize import least_squares

    def make(x):
        return FittedTriode("koren", dict(mu=x[0], ex=1.4, kg1=x[2], kp=x[1], kvb=300.0), tube="2A3-like")

    def res(x):
        ss = make(x).small_signal(250.0, -45.0, check=False)
        return [ss.ia / 0.060 - 1, ss.gm / 5.25e-3 - 1, ss.rp / 800.0 - 1]

    sol = least_squares(res, [4.2, 60.0, 1500.0], x_scale=[1.0, 10.0, 100.0])
    assert np.max(np.abs(res(sol.x))) < 0.02
    return make(sol.x)


def test_2a3_single_ended_typical_operation(tube_2a3):
    st = SingleEndedOutput(b_plus=250.0, load=2500.0, grid_bias=-45.0)
    r = solve_output(st, tube_2a3)
    f = r.figures
    assert f["limit"] == "grid current" and f["vin_max"] == pytest.approx(45.0)
    assert f["p_max"] == pytest.approx(3.5, rel=0.15)  # measured 3.70 W (+5.7 %)
    assert 20 * math.log10(f["thd_max"] / 0.05) == pytest.approx(0.0, abs=3.0)  # measured 3.93 % (-2.1 dB)


def test_2a3_push_pull_typical_operation(tube_2a3):
    st = PushPullOutput(b_plus=300.0, load=3000.0, grid_bias=-62.0)
    r = solve_output(st, tube_2a3, tube_2a3)
    f = r.figures
    assert 2e3 * r.op["A.ia"] == pytest.approx(80.0, rel=0.10)  # measured 74.6 mA
    assert 1e3 * (f["ia_full"]["A"] + f["ia_full"]["B"]) == pytest.approx(147.0, rel=0.10)  # measured 140.4 mA
    assert f["p_max"] == pytest.approx(15.0, rel=0.15)  # measured 14.55 W (-3 %)
    assert f["thd_max"] <= 0.025  # measured 0.56 %


# ---------------------------------------------------------------------------
# ngspice: the same circuits with the exported subcircuits and an ideal transformer
# ---------------------------------------------------------------------------

#: magnetising inductance of the primary (of each half, push-pull) [H]: 63 MOhm at 1 kHz against
#: kilohm loads, and it holds the idle current over the 3 ms transient
LM = 1e4


def _cathode(st):
    if st.rk is None:
        return ["Vk k 0 DC 0"]
    return [f"Rk k 0 {st.rk!r}"] + ([f"Ck k 0 {ng.BIG_C!r}"] if st.bypassed else [])


def _se_netlist(st, tube, amp, freq=1000.0):
    # Ideal transformer from controlled sources (exact ratios, no leakage): the secondary
    # voltage is the primary's over n (ES), the primary carries the secondary current over n
    # (FS), the magnetising inductance LM carries the DC.
    n = st.ratio
    rdc = st.r_primary if st.r_primary > 0 else 1e-3  # (a wire: 1 mOhm)
    return "\n".join([
        spice_subcircuit(tube, name="PTA"),
        f"VB bp 0 DC {st.b_plus!r}", f"Rdc bp ct {rdc!r}",
        f"LM ct plate {LM!r}", f"ES s2 0 ct plate {1 / n!r}", "VsS s2 sec DC 0",
        f"FS ct plate VsS {1 / n!r}", f"Rspk sec 0 {st.speaker!r}",
        f"VG g 0 DC {st._vg!r} SIN({st._vg!r} {amp!r} {freq!r})", "X1 plate g k PTA"] + _cathode(st))


def _pp_netlist(st, ta, tb, amp, freq=1000.0):
    # Centre-tapped ideal transformer from controlled sources: half B's voltage equals half
    # A's (EB), the secondary is the whole primary over n (ES); half A carries half B's
    # current and 2/n of the secondary's (FA, FS), the rest (the DC imbalance) flows in LM.
    n = st.ratio
    r = st.r_primary / 2 if st.r_primary > 0 else 1e-3  # (a wire: 1 mOhm)
    return "\n".join([
        spice_subcircuit(ta, name="PTA"), spice_subcircuit(tb, name="PTB"),
        f"VB ct 0 DC {st.b_plus!r}",
        f"LM ct xa {LM!r}", "FA ct xa VsB 1", f"FS ct xa VsS {2 / n!r}", f"RA xa pa {r!r}",
        "EB xb2 ct ct xa 1", "VsB xb2 xb DC 0", f"RB xb pb {r!r}",
        f"ES s2 0 ct xa {2 / n!r}", "VsS s2 sec DC 0", f"Rspk sec 0 {st.speaker!r}",
        f"VGA ga 0 DC {st._vg!r} SIN({st._vg!r} {amp!r} {freq!r})",
        f"VGB gb 0 DC {st._vg!r} SIN({st._vg!r} {-amp!r} {freq!r})",
        "XA pa ga k PTA", "XB pb gb k PTB"] + _cathode(st))


def _ours(st, tubes, amp):
    banks = _banks(st, tubes)
    op = _idle(st, banks)
    return op, _sweep_from(st, [amp], _spectra(st, banks, op, [amp], 1024)[1])


def _db(x):
    return 20 * math.log10(x)


NG_CASES = {
    # name: (stage, tubes, drive as a fraction of the largest)
    "se-fixed": (SingleEndedOutput(b_plus=300.0, load=3000.0, r_primary=150.0, grid_bias=-61.0), (TA,), 0.8),
    "se-cathode-bypassed": (SingleEndedOutput(b_plus=360.0, load=3500.0, r_primary=120.0, rk=1000.0), (TA,), 0.8),
    "pp-fixed-class-a": (PushPullOutput(b_plus=400.0, load=5000.0, r_primary=200.0, grid_bias=-84.0), (TA, TB), 0.8),
    "pp-fixed-class-ab": (PushPullOutput(b_plus=400.0, load=4000.0, r_primary=200.0, grid_bias=-100.0), (TA, TB), 0.9),
    "pp-shared-cathode": (PushPullOutput(b_plus=450.0, load=5000.0, r_primary=150.0, rk=650.0, bypassed=True), (TA, TB), 0.8),
    "se-cathode-unbypassed": (SingleEndedOutput(b_plus=360.0, load=3000.0, r_primary=120.0, rk=1000.0, bypassed=False), (TA,), 0.8),
    "pp-shared-cathode-unbypassed": (PushPullOutput(b_plus=450.0, load=5000.0, r_primary=150.0, rk=650.0, bypassed=False), (TA, TB), 0.8),
}


@pytest.mark.ngspice
@pytest.mark.skipif(not ng.available(), reason=ng.SKIP_REASON)
@pytest.mark.parametrize("key", sorted(NG_CASES))
def test_output_stage_matches_ngspice(key):
    # ngspice: operating point (plate voltages, supply current) within 0.1 %; output power,
    # H2, H3 and THD within 0.5 dB (issue 11 tolerance) from its transient (3 periods of
    # 1 kHz, 1 us steps) and Fourier analysis of the secondary voltage, bypass capacitor held
    # at ngspice's own .op (quasi-static, as tests/test_ngspice.py does).  Drive below the
    # grid-current onset, where the exported grid path does not conduct.
    st, tubes, frac = NG_CASES[key]
    res = solve_output(st, *tubes)
    amp = frac * res.figures["vin_max"]
    se = isinstance(st, SingleEndedOutput)
    circuit = _se_netlist(st, *tubes, amp) if se else _pp_netlist(st, *tubes, amp)
    plates = ["plate"] if se else ["pa", "pb"]
    (op,) = ng.run(circuit, ["op"], [f"v({p})" for p in plates] + ["v(k)", "i(VB)"])
    ours, s = _ours(st, tubes, amp)
    for p, pos in zip(plates, st.positions):
        assert float(op[f"v({p})"][0]) - float(op["v(k)"][0]) == pytest.approx(ours[f"{pos}.va"], rel=1e-3)
    assert -float(op["i(VB)"][0]) == pytest.approx(sum(ours[f"{p}.ia"] for p in st.positions), rel=1e-3)
    tran = "tran 1u 3m 0 1u"
    if st.rk is not None and st.bypassed and not se:
        # the shared bypass capacitor charges to Rk times the mean current at this level (the
        # bias shift our solve models): a real 47 uF capacitor, 50 ms for it to settle (its
        # time constant is about 5 ms), the last period analysed
        circuit = circuit.replace(f"Ck k 0 {ng.BIG_C!r}", "Ck k 0 47e-6")
        tran = "tran 2.5u 50m 0 2.5u"
    elif st.rk is not None and st.bypassed:
        circuit = ng.hold_capacitors(circuit)
    four = ng.fourier(circuit, tran, 1000.0, "v(sec)", nharm=11, timeout=300.0)
    h = np.array([x[2] for x in four["harmonics"]])
    p_ng = h[1] ** 2 / (2 * st.speaker)
    assert _db(p_ng / s.power[0]) / 2 == pytest.approx(0.0, abs=0.5)
    assert _db(h[2] / h[1]) == pytest.approx(s.h2[0], abs=0.5)
    assert _db(h[3] / h[1]) == pytest.approx(s.h3[0], abs=0.5)
    assert _db(four["thd_pct"] / (100 * s.thd[0])) == pytest.approx(0.0, abs=0.5)


@pytest.mark.ngspice
@pytest.mark.skipif(not ng.available(), reason=ng.SKIP_REASON)
@pytest.mark.parametrize("key", ["se-fixed", "se-cathode-unbypassed", "pp-fixed-class-a"])
def test_output_impedance_matches_ngspice(key):
    # ngspice .ac at 1 kHz: the loudspeaker replaced by a 1 A test current into the
    # secondary, the grids held at their DC bias; |V(sec)| is the output impedance.
    st, tubes, _ = NG_CASES[key]
    res = solve_output(st, *tubes)
    se = isinstance(st, SingleEndedOutput)
    circuit = _se_netlist(st, *tubes, 0.0) if se else _pp_netlist(st, *tubes, 0.0)
    circuit = circuit.replace(f"Rspk sec 0 {st.speaker!r}", "Rbig sec 0 1e12\nItest 0 sec DC 0 AC 1")
    (ac,) = ng.run(circuit, ["ac lin 1 1000 1000"], ["v(sec)"])
    z = abs(complex(ac["v(sec)"][0]))
    assert z == pytest.approx(res.figures["z_out"], rel=1e-6)  # measured within 1e-8


def _numbers(d, path=""):
    if isinstance(d, dict):
        for k, v in d.items():
            yield from _numbers(v, f"{path}.{k}")
    elif isinstance(d, list):
        for i, v in enumerate(d):
            yield from _numbers(v, f"{path}[{i}]")
    elif isinstance(d, float):
        yield path, d


@pytest.mark.parametrize("key", sorted(NG_CASES))
def test_fast_solve_paths_give_the_plain_results(key, monkeypatch):
    # The speed-ups (one model call for both tubes, each sine value solved once, solves
    # started from the transfer already solved, the shared cathode's voltage solved with
    # the samples) change nothing beyond the iteration's tolerance: every number of the
    # result within 1e-9 relative of the plain path's (the same engine, the reference
    # being its straightforward form).  The transfer's series is off here (next test).
    import fitter.stage.output as out

    st, tubes, _ = NG_CASES[key]
    monkeypatch.setattr(out, "_SERIES", False)
    fast = dict(_numbers(solve_output(st, *tubes).to_dict()))
    monkeypatch.setattr(out, "_FAST", False)
    plain = dict(_numbers(solve_output(st, *tubes).to_dict()))
    assert fast.keys() == plain.keys()
    for k, v in plain.items():
        assert fast[k] == pytest.approx(v, rel=1e-9, abs=1e-300), k


#: the series' own cases beside NG_CASES: a shared bypassed cathode driven into class AB (the
#: end of class A searched in the two-dimensional series) with a bias shift of 32 V
SERIES_CASES = dict(NG_CASES, **{
    "pp-shared-cathode-class-ab": (PushPullOutput(b_plus=450.0, load=3000.0, r_primary=150.0, rk=1000.0),
                                   (TA, TB), None),
})


@pytest.mark.parametrize("key", sorted(SERIES_CASES))
def test_series_figures_agree_with_sampling_every_level(key, monkeypatch):
    # The default path takes every level's harmonics (and the drive limits) from the
    # transfer's Chebyshev series (in the drive; for a shared bypassed cathode also in the
    # cathode voltage), truncated where its last coefficients fall below 1e-9 of its
    # largest.  Against solving every sample of every level (the plain path): each figure
    # within 1e-6 relative, each harmonic within 0.001 dB (a harmonic 90 dB down is where
    # the truncation shows most: about 1e-4 dB), THD (their ratio) within the same 1.2e-4.
    import fitter.stage.output as out

    st, tubes, _ = SERIES_CASES[key]
    series = dict(_numbers(solve_output(st, *tubes).to_dict()))
    monkeypatch.setattr(out, "_FAST", False)
    plain = dict(_numbers(solve_output(st, *tubes).to_dict()))
    assert series.keys() == plain.keys()
    for k, v in plain.items():
        if k.endswith("_db") or "_db[" in k:
            assert series[k] == pytest.approx(v, abs=1e-3), k
        elif "thd" in k:
            # a ratio of the harmonics: their tolerance, 0.001 dB = 1.2e-4 relative
            assert series[k] == pytest.approx(v, rel=1.2e-4), k
        elif "least_current" in k:
            # a tube's least current in percent of idle: the series resolves currents to about
            # 1e-9 of the largest, so deep in cut-off (class AB: 4e-7 %) absolutely, 1e-6 %
            assert series[k] == pytest.approx(v, rel=1e-6, abs=1e-6), k
        else:
            assert series[k] == pytest.approx(v, rel=1e-6, abs=1e-12), k


def test_class_a_report_gives_each_tubes_least_current_over_the_swing():
    # the least plate current at full output, a fraction of idle, from the series' full-level
    # period, against the public waveforms at the same drive (every sample solved directly)
    st = PushPullOutput(b_plus=400.0, load=5000.0, r_primary=200.0, grid_bias=-84.0)
    r = solve_output(st, TA, TB)
    f = r.figures
    assert f["class"] == "A"
    theta = 2 * np.pi * np.arange(512) / 512
    w = waveforms(st, TA, TB, vin=f["vin_max"] * np.sin(theta))
    for p in ("A", "B"):
        want = np.min(w[f"{p}.ia"]) / r.op[f"{p}.ia"]
        assert f["ia_least"][p] == pytest.approx(want, rel=1e-6)
        assert f["ia_least"][p] > 0.01
    assert "least plate current is A" in r.report()
    d = r.to_dict()["class_a"]
    assert d["least_current_pct_of_idle"]["A"] == pytest.approx(100 * f["ia_least"]["A"])
    assert d["cutoff_pct_of_idle"] == 1.0


def test_a_very_large_reflected_load_is_solved_not_refused():
    # 50 Mohm: the current hardly moves, the tube equation's residual is the difference of two
    # large terms (its slope 1 + RL/rp is about 6e4), so convergence is judged against that
    # slope.  The output then follows RDH's linear formula (from memory),
    # P = (mu Eg)^2 RL / (2 (rp + RL)^2), within 1 % at the full drive Eg = 61 V.
    st = SingleEndedOutput(b_plus=330.0, load=5e7, grid_bias=-61.0)
    r = solve_output(st, TA)
    ss = TA.small_signal(330.0, -61.0, check=False)
    want = (ss.mu * 61.0) ** 2 * 5e7 / (2 * (ss.rp + 5e7) ** 2)
    assert r.figures["p_max"] == pytest.approx(want, rel=0.01)
