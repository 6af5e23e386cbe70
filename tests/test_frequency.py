"""Frequency response (fitter.stage.frequency): ngspice .ac agreement and textbook corners.

The tubes are the invented test units of tests/test_ngspice.py (made-up parameter sets
perturbed from published centre values, named there); the circuits are invented examples
with ordinary component values.
"""

from __future__ import annotations

import numpy as np
import pytest

import ngspice_util as ng
from fitter.export import spice_subcircuit
from fitter.stage import CathodeFollower, CommonCathode, Stack, StageInputError, solve
from fitter.stage.frequency import response
from fitter.triode import FittedTriode

KO = FittedTriode("koren", dict(mu=22.37, ex=1.317, kg1=1143.2, kp=91.6, kvb=271.0), tube="XU7", section="B")
PW = FittedTriode("power", dict(K=3.47e-4, mu=21.9, n=1.42, vc=0.31), tube="XU7", section="A")
DW = FittedTriode("dempwolf", dict(G=2.31e-3, mu=98.7, gamma=1.284, C=3.17), tube="XA7")
# interelectrode capacitances of a small-signal double triode, datasheet-like magnitudes (invented)
CAPS = dict(cgk=1.6e-12, cga=1.5e-12, cak=0.5e-12)

STAGES = {
    "cc-bypassed": (CommonCathode(b_plus=250.0, ra=22e3, rk=1e3, ck=100e-6, rl=220e3, c_in=100e-9, c_out=220e-9,
                                  rs=47e3, c_load=100e-12, **CAPS), (KO,)),
    "cc-unbypassed-fixed": (CommonCathode(b_plus=300.0, ra=100e3, vbias=-1.2, rl=470e3, c_in=22e-9, c_out=47e-9,
                                          rs=100e3, c_load=200e-12, **CAPS), (DW,)),
    "cathode-follower": (CathodeFollower(b_plus=300.0, rk=22e3, vneg=-50.0, r_upper=1e6, r_lower=680e3, rl=10e3,
                                         c_in=100e-9, c_out=1e-6, rs=10e3, c_load=2e-9, **CAPS), (KO,)),
    "srpp": (Stack.srpp(b_plus=300.0, rk=820.0, rl=47e3, c_in=100e-9, c_out=1e-6, rs=10e3, c_load=1e-9,
                        ck=47e-6, **CAPS), (KO, PW)),
    "mu-follower": (Stack.mu_follower(b_plus=300.0, rk=1.5e3, r_top=1.5e3, r_mid=68e3, c_top=100e-9, ck=100e-6,
                                      rl=100e3, c_in=47e-9, c_out=470e-9, rs=50e3, c_load=300e-12, **CAPS), (DW, KO)),
    "mu-follower-plate-out": (Stack.mu_follower(b_plus=300.0, rk=1.5e3, r_top=1.5e3, r_mid=68e3, c_top=100e-9,
                                                rl=100e3, c_out=470e-9, rs=20e3, output="bottom-plate", **CAPS),
                              (DW, KO)),
}


@pytest.mark.ngspice
@pytest.mark.skipif(not ng.available(), reason=ng.SKIP_REASON)
@pytest.mark.parametrize("key", list(STAGES))
def test_response_matches_ngspice_ac(key):
    # Reference: ngspice .ac (10 points per decade, 1 Hz .. 1 MHz) of the same circuit
    # built around the exported (nonlinear) subcircuits, linearised by ngspice at its own
    # operating point, with the real coupling/bypass capacitors and the tube capacitances
    # outside the subcircuits.  Issue tolerance: 0.1 dB; phase within 2 degrees.
    # Measured: under 1e-9 dB and 1e-8 degrees on every stage here.
    stage, tubes = STAGES[key]
    f_ng, g_ng = ng.ac_response(stage, *[spice_subcircuit(t) for t in tubes])
    fr = response(stage, *tubes, freq=f_ng)
    db_ng = 20 * np.log10(np.abs(g_ng))
    assert np.max(np.abs(fr.gain_db - db_ng)) < 0.1
    ph_ng = np.degrees(np.unwrap(np.angle(g_ng)))
    assert np.max(np.abs(fr.phase_deg - ph_ng)) < 2.0
    # the comparison spans the band and both roll-offs
    assert np.ptp(db_ng) > 6.0


def test_midband_gain_equals_stage_solver():
    # Reference: the existing stage solver's gain (central differences of its
    # quasi-static mid-band solution, tests/test_ngspice.py checks it against ngspice).
    for key, (stage, tubes) in STAGES.items():
        fr = response(stage, *tubes)
        g = solve(stage, *tubes, errors=False).figures["gain"]
        # the response runs from the source, which sees rg (and a divider) through rs
        zin = solve(stage, *tubes, errors=False).figures["zin"]
        assert fr.midband == pytest.approx(g * zin / (zin + stage.rs), rel=1e-5), key


def test_input_coupling_corner_is_one_over_two_pi_rc():
    # Textbook single-pole high-pass: f = 1 / (2 pi C (Rs + Rg)) (RC coupling, Radiotron
    # Designer's Handbook ch. 12, from memory).  Only c_in is reactive here.
    st = CommonCathode(b_plus=250.0, ra=22e3, rk=1e3, c_in=47e-9, rs=10e3, rg=470e3)
    fr = response(st, KO)
    assert fr.f_low == pytest.approx(1 / (2 * np.pi * 47e-9 * (10e3 + 470e3)), rel=1e-6)
    assert fr.f_high is None  # no capacitance above the band


def test_output_coupling_corner_uses_output_impedance_plus_load():
    # Textbook: f = 1 / (2 pi Cout (Zout + RL)), Zout the stage's output impedance from
    # the stage solver (checked against ngspice in tests/test_ngspice.py).
    st = CommonCathode(b_plus=250.0, ra=22e3, rk=1e3, ck=None, c_out=100e-9, rl=100e3)
    fr = response(st, KO)
    zout = solve(st, KO, errors=False).figures["zout"]
    assert fr.f_low == pytest.approx(1 / (2 * np.pi * 100e-9 * (zout + 100e3)), rel=1e-6)


def test_cathode_bypass_is_one_pole_one_zero():
    # Textbook (Radiotron Designer's Handbook ch. 12, cathode bypass, from memory):
    # A(f)/A_mid = (fz/fp) (1 + j f/fz) / (1 + j f/fp) with fz = 1/(2 pi Rk Ck) and
    # fp = 1/(2 pi Ck (Rk || (rp + RL)/(mu + 1))), RL = Ra || Rl.
    st = CommonCathode(b_plus=300.0, ra=47e3, rk=3.3e3, ck=10e-6, rl=220e3)
    fr = response(st, KO)
    s = solve(st, KO, errors=False).figures
    mu, rp = s["tube.mu"], s["tube.rp"]
    rload = 1 / (1 / 47e3 + 1 / 220e3)
    rseen = 1 / (1 / 3.3e3 + (mu + 1) / (rp + rload))
    fz, fp = 1 / (2 * np.pi * 3.3e3 * 10e-6), 1 / (2 * np.pi * 10e-6 * rseen)
    f = fr.freq
    h = fr.midband * (fz / fp) * (1 + 1j * f / fz) / (1 + 1j * f / fp)
    assert np.max(np.abs(fr.gain_db - 20 * np.log10(np.abs(h)))) < 1e-6
    assert fp / fz > 2  # the bypass moves the gain by more than 6 dB: a real effect is checked


def test_miller_input_capacitance_sets_the_high_corner():
    # Miller effect (Radiotron Designer's Handbook, from memory): the grid sees
    # Cin = Cgk + Cga (1 + |A|); with the source rs and grid leak rg the input pole is at
    # 1 / (2 pi (rs || rg) Cin).  The plate node's own pole (ra || rp with Cga, ~20 MHz)
    # is far above, so the single-pole estimate holds within 1 %.
    st = CommonCathode(b_plus=250.0, ra=10e3, rk=1e3, ck=100e-6, rs=100e3, rg=1e6, cgk=1.6e-12, cga=1.5e-12)
    fr = response(st, KO)
    a = abs(solve(st, KO, errors=False).figures["gain"])
    cin = 1.6e-12 + 1.5e-12 * (1 + a)
    f_miller = 1 / (2 * np.pi * (1 / (1 / 100e3 + 1 / 1e6)) * cin)
    assert fr.f_high == pytest.approx(f_miller, rel=0.01)
    # and the high corner without cga is far higher: the Miller term dominates
    fr0 = response(CommonCathode(b_plus=250.0, ra=10e3, rk=1e3, ck=100e-6, rs=100e3, rg=1e6, cgk=1.6e-12), KO)
    assert fr0.f_high > 5 * fr.f_high


def test_flat_stage_has_no_corners_and_says_why():
    # Without any capacitance the linear circuit is frequency-independent (common practice).
    fr = response(CommonCathode(b_plus=250.0, ra=22e3, rk=1e3), KO)
    assert fr.f_low is None and fr.f_high is None
    assert np.ptp(fr.gain_db) < 1e-9
    assert any("no capacitance" in n for n in fr.notes)


def test_response_to_dict_carries_caution_and_points():
    from fitter import CAUTION

    stage, tubes = STAGES["srpp"]
    d = response(stage, *tubes, points_per_decade=5).to_dict()
    assert d["caution"] == CAUTION
    assert len(d["points"]) == 31 and d["points"][0]["f_hz"] == pytest.approx(1.0)
    assert d["f_low_hz"] < 1e3 < d["f_high_hz"]
    assert set(d["small_signal"]) == {"bottom", "top"}


def test_bad_frequencies_name_the_field():
    with pytest.raises(StageInputError) as e:
        response(STAGES["srpp"][0], KO, PW, freq=[10.0, -1.0])
    assert e.value.field == "freq"
    with pytest.raises(StageInputError) as e:
        response(STAGES["srpp"][0], KO, PW, points_per_decade=0)
    assert e.value.field == "points_per_decade"
