"""Frequency response of the output stages (fitter.stage.frequency with
fitter.stage.output): ngspice .ac on the same circuits, and textbook corners.

The tubes are the 300B-like pair of tests/test_output_stage.py (Koren's published set from
memory, and an invented partner); the circuits are invented examples with ordinary values.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

import ngspice_util as ng
from fitter.export import spice_subcircuit
from fitter.stage import StageInputError
from fitter.stage.frequency import response
from fitter.stage.output import PushPullOutput, SingleEndedOutput, solve_output
from test_output_stage import TA, TB

# interelectrode capacitances of a directly heated power triode, datasheet-like magnitudes
# (invented, the order of a 300B's from memory)
CAPS = dict(cgk=9e-12, cga=15e-12, cak=4e-12)

STAGES = {
    "se-fixed": (SingleEndedOutput(b_plus=300.0, load=3000.0, r_primary=150.0, grid_bias=-61.0, rs=20e3,
                                   c_in=0.22e-6, rg=100e3, l_primary=12.0, **CAPS), (TA,)),
    "se-direct": (SingleEndedOutput(b_plus=300.0, load=3000.0, r_primary=150.0, grid_bias=-61.0, rs=50e3,
                                    **CAPS), (TA,)),
    "se-cathode-ck": (SingleEndedOutput(b_plus=360.0, load=3500.0, r_primary=120.0, rk=1000.0, ck=100e-6,
                                        rs=10e3, c_in=0.1e-6, rg=220e3, l_primary=20.0, **CAPS), (TA,)),
    "se-cathode-unbypassed": (SingleEndedOutput(b_plus=360.0, load=3000.0, r_primary=120.0, rk=1000.0,
                                                bypassed=False, rs=10e3, c_in=0.1e-6, rg=220e3, **CAPS), (TA,)),
    "pp-fixed": (PushPullOutput(b_plus=400.0, load=5000.0, r_primary=200.0, grid_bias=-84.0, rs=20e3,
                                c_in=0.22e-6, rg=100e3, l_primary=40.0, **CAPS), (TA, TB)),
    "pp-cathode-unbypassed": (PushPullOutput(b_plus=450.0, load=5000.0, r_primary=150.0, rk=650.0, bypassed=False,
                                             rs=10e3, c_in=0.1e-6, rg=220e3, l_primary=30.0, **CAPS), (TA, TB)),
    "se-leakage-winding": (SingleEndedOutput(b_plus=300.0, load=3000.0, r_primary=150.0, grid_bias=-61.0, rs=2e3,
                                             c_in=0.22e-6, rg=100e3, l_primary=12.0, l_leak=8e-3, c_winding=1e-9,
                                             **CAPS), (TA,)),
    "pp-leakage-winding": (PushPullOutput(b_plus=400.0, load=5000.0, r_primary=200.0, grid_bias=-84.0, rs=2e3,
                                          c_in=0.22e-6, rg=100e3, l_primary=40.0, l_leak=15e-3, c_winding=0.5e-9,
                                          **CAPS), (TA, TB)),
    "pp-cathode-ck": (PushPullOutput(b_plus=450.0, load=5000.0, r_primary=150.0, rk=650.0, ck=47e-6, rs=10e3,
                                     c_in=0.1e-6, rg=220e3, l_primary=30.0, **CAPS), (TA, TB)),
}


def _ac_netlist(st, tubes):
    # The stage around the exported subcircuits with an ideal transformer from controlled
    # sources, as tests/test_output_stage.py builds it (ES/FS: exact ratios, no leakage); here
    # the magnetising inductance is the stage's own (whole primary l_primary; push-pull it
    # sits on half A, a quarter of it: inductance goes with turns squared) or 1e6 H (ideal).
    n = st.ratio
    se = st.kind == "single-ended"
    L = [spice_subcircuit(TA, name="PTA")] + ([] if se else [spice_subcircuit(TB, name="PTB")])
    # the source in series ngspice elements named for their side
    sides = [("", "PTA", "1", 0.0)] if se else [("a", "PTA", "1", 0.0), ("b", "PTB", "1", 180.0)]
    for tag, sub, amp, phase in sides:
        bias = st._vg
        if st.c_in is None:
            L.append(f"Vin{tag} src{tag} 0 DC {bias!r} AC 1 {phase!r}")
            L.append(f"Rs{tag} src{tag} g{tag} {st.rs!r}")
        else:
            L.append(f"Vin{tag} src{tag} 0 DC 0 AC 1 {phase!r}")
            L.append(f"Rs{tag} src{tag} in{tag} {st.rs!r}")
            L.append(f"Cin{tag} in{tag} g{tag} {st.c_in!r}")
            L.append(f"Rg{tag} g{tag} nb{tag} {st.rg!r}")
            L.append(f"Vgb{tag} nb{tag} 0 DC {bias!r}")
    if st.rk is None:
        L.append("Vk k 0 DC 0")
    else:
        L.append(f"Rk k 0 {st.rk!r}")
        if st.bypassed:
            L.append(f"Ck k 0 {(ng.BIG_C if st.ck is None else st.ck)!r}")
    lm = 1e6 if st.l_primary is None else st.l_primary
    if se:
        # the winding resistance and the leakage inductance in series on the supply side of
        # the transformer (the same series loop as ours), the winding capacitance at the plate
        if st.l_leak > 0:
            L += [f"Rdc bp ct1 {st.r_primary!r}", f"Lleak ct1 ct {st.l_leak!r}"]
        else:
            L.append(f"Rdc bp ct {st.r_primary!r}")
        if st.c_winding > 0:
            L.append(f"Cw plate 0 {st.c_winding!r}")
        L += [f"VB bp 0 DC {st.b_plus!r}",
              f"LM ct plate {lm!r}", f"ES s2 0 ct plate {1 / n!r}", "VsS s2 sec DC 0",
              f"FS ct plate VsS {1 / n!r}", f"Rspk sec 0 {st.speaker!r}", "X1 plate g k PTA"]
        plates = [("1", "plate", "g")]
    else:
        r = st.r_primary / 2
        # leakage: half in each side's series branch; winding capacitance plate to plate
        if st.l_leak > 0:
            L += [f"RA xa ya {r!r}", f"LA ya pa {st.l_leak / 2!r}", f"RB xb yb {r!r}", f"LB yb pb {st.l_leak / 2!r}"]
        else:
            L += [f"RA xa pa {r!r}", f"RB xb pb {r!r}"]
        if st.c_winding > 0:
            L.append(f"Cw pa pb {st.c_winding!r}")
        L += [f"VB ct 0 DC {st.b_plus!r}",
              f"LM ct xa {lm / 4!r}", "FA ct xa VsB 1", f"FS ct xa VsS {2 / n!r}",
              "EB xb2 ct ct xa 1", "VsB xb2 xb DC 0",
              f"ES s2 0 ct xa {2 / n!r}", "VsS s2 sec DC 0", f"Rspk sec 0 {st.speaker!r}",
              "XA pa ga k PTA", "XB pb gb k PTB"]
        plates = [("a", "pa", "ga"), ("b", "pb", "gb")]
    for tag, p, g in plates:
        L += [f"Cgk{tag} {g} k {st.cgk!r}", f"Cga{tag} {g} {p} {st.cga!r}", f"Cak{tag} {p} k {st.cak!r}"]
    return "\n".join(L) + "\n"


@pytest.mark.ngspice
@pytest.mark.skipif(not ng.available(), reason=ng.SKIP_REASON)
@pytest.mark.parametrize("key", sorted(STAGES))
def test_output_stage_response_matches_ngspice_ac(key):
    # ngspice .ac (10 points per decade, 1 Hz .. 1 MHz) on the same circuit with the exported
    # subcircuits and an ideal transformer: gain within 0.1 dB (issue 11 tolerance), phase
    # within 0.5 degree.
    st, tubes = STAGES[key]
    (r,) = ng.run(_ac_netlist(st, tubes), ["ac dec 10 1 1e6"], ["v(sec)"])
    f, g_ng = r["scale"], r["v(sec)"]
    fr = response(st, *tubes, freq=f)
    db = 20 * np.log10(np.abs(fr.gain) / np.abs(g_ng))
    assert np.max(np.abs(db)) < 0.1
    ph = np.degrees(np.angle(fr.gain / g_ng))
    assert np.max(np.abs(ph)) < 0.5


def test_midband_gain_is_mu_times_the_load_divider_over_n():
    # Textbook (RDH, from memory): the plate signal of a grounded-cathode triode is
    # mu vg RL / (rp + Rdc + RL); the secondary is that over n; the grid sees rg / (rs + rg).
    st, tubes = STAGES["se-fixed"]
    fr = response(st, *tubes)
    ss = fr.small_signal["tube"]
    mu = ss["gm"] * ss["rp"]
    RL = st.reflected_load
    expect = mu * RL / (ss["rp"] + st.r_primary + RL) / st.ratio * st.rg / (st.rs + st.rg)
    assert fr.midband == pytest.approx(expect, rel=1e-9)


def test_primary_inductance_sets_the_low_corner():
    # Textbook first-order corner: with every other capacitor ideal, the magnetising
    # inductance sees the reflected load in parallel with the source resistance rp + Rdc,
    # f = R / (2 pi L).
    st = SingleEndedOutput(b_plus=300.0, load=3000.0, r_primary=150.0, grid_bias=-61.0, l_primary=10.0)
    fr = response(st, TA)
    rp = fr.small_signal["tube"]["rp"]
    R = 1.0 / (1.0 / (rp + st.r_primary) + 1.0 / st.reflected_load)
    assert fr.f_low == pytest.approx(R / (2 * math.pi * st.l_primary), rel=1e-6)
    assert fr.f_high is None


def test_class_a_push_pull_is_a_generator_of_twice_mu_behind_twice_rp():
    # RDH (from memory), the class-A push-pull equivalent circuit: a generator 2 mu vg behind
    # 2 rp into the plate-to-plate load Raa (each grid at vg, in antiphase; no primary
    # resistance); the secondary is the primary's voltage over n.
    st = PushPullOutput(b_plus=400.0, load=5000.0, grid_bias=-84.0)
    fr = response(st, TA, TA)
    ss = fr.small_signal["A"]
    mu, rp = ss["gm"] * ss["rp"], ss["rp"]
    raa = st.reflected_load
    assert fr.midband == pytest.approx(2 * mu * raa / (2 * rp + raa) / st.ratio, rel=1e-9)


def test_response_fields_leave_the_quasi_static_figures_unchanged():
    # Regression against the same stage without the response fields (the code's own figures):
    # the capacitances, source and inductance only shape the frequency response.
    from dataclasses import replace

    st, tubes = STAGES["pp-cathode-ck"]
    st = replace(st, l_leak=10e-3, c_winding=1e-9)
    plain = replace(st, cgk=0.0, cga=0.0, cak=0.0, rs=0.0, c_in=None, rg=None, ck=None, l_primary=None,
                    l_leak=0.0, c_winding=0.0)
    a, b = solve_output(st, *tubes), solve_output(plain, *tubes)
    assert a.figures["p_max"] == b.figures["p_max"] and a.figures["thd_max"] == b.figures["thd_max"]


@pytest.mark.parametrize("fields, field", [
    (dict(ck=1e-6, bypassed=False, rk=1000.0), "ck"),
    (dict(ck=1e-6, grid_bias=-60.0), "ck"),
    (dict(c_in=1e-7, grid_bias=-60.0), "rg"),
    (dict(l_primary=-1.0, grid_bias=-60.0), "l_primary"),
    (dict(cga=2.0, grid_bias=-60.0), "cga"),
])
def test_impossible_response_fields_name_the_field(fields, field):
    with pytest.raises(StageInputError) as e:
        SingleEndedOutput(b_plus=300.0, load=3000.0, **fields)
    assert e.value.field == field


def test_cli_response_option_reports_and_plots_the_secondary_response(tmp_path):
    # The CLI carries the same numbers as the engine (checked against ngspice above), plus a
    # response plot; a coupling capacitor without a grid resistor is refused by option.
    import json

    from click.testing import CliRunner

    from fitter import CAUTION
    from fitter.card import save_card
    from fitter.cli import main

    card = save_card(tmp_path / "PA.koren.json", TA)
    png = tmp_path / "resp.png"
    args = ["output", "single-ended", "--tube", str(card), "--bplus", "300", "--load", "3k", "--rdc", "150",
            "--bias", "-61", "--rs", "20k", "--cin", "220n", "--rg", "100k", "--l-primary", "12",
            "--cgk", "9p", "--cga", "15p", "--cak", "4p"]
    res = CliRunner().invoke(main, args + ["--response", "--json"], catch_exceptions=False)
    assert res.exit_code == 0, res.output
    d = json.loads(res.output)["frequency_response"]
    st, tubes = STAGES["se-fixed"]
    fr = response(st, *tubes)
    assert d["midband_gain"] == pytest.approx(fr.midband, rel=1e-12)
    assert d["f_low_hz"] == pytest.approx(fr.f_low, rel=1e-12)
    assert d["f_high_hz"] == pytest.approx(fr.f_high, rel=1e-12)
    res = CliRunner().invoke(main, args + ["--response-plot", str(png)], catch_exceptions=False)
    assert res.exit_code == 0, res.output
    assert "-3 dB high" in res.output and res.output.count(CAUTION) == 1
    assert png.read_bytes()[:4] == b"\x89PNG"
    res = CliRunner().invoke(main, args[:-12] + ["--cin", "1u"])
    assert res.exit_code == 1 and res.output.strip().endswith(
        "--rg: a coupling capacitor needs a grid resistor to hold the grid's DC voltage")


def test_leakage_inductance_sets_the_high_corner():
    # Textbook first-order corner: the leakage inductance in series with the source
    # resistance rp + Rdc and the reflected load, f = (rp + Rdc + RL) / (2 pi L); no other
    # capacitance or inductance given.
    st = SingleEndedOutput(b_plus=300.0, load=3000.0, r_primary=150.0, grid_bias=-61.0, l_leak=20e-3)
    fr = response(st, TA)
    rp = fr.small_signal["tube"]["rp"]
    assert fr.f_high == pytest.approx((rp + st.r_primary + st.reflected_load) / (2 * math.pi * st.l_leak), rel=1e-6)
    assert fr.f_low is None


def test_phase_reads_within_a_half_turn_at_mid_band_with_several_low_corners():
    # a coupling capacitor, a bypass capacitor and the primary inductance: three high-pass
    # corners below the band, whose phase (unwrapped from 1 Hz) used to carry a whole turn
    # into it (-360 deg); at mid-band the phase of the gain itself (np.angle) is what it reads
    st = SingleEndedOutput(b_plus=360.0, load=3000.0, rk=900.0, ck=100e-6, c_in=220e-9, rg=100e3,
                           l_primary=15.0)
    fr = response(st, TA)
    k = int(np.argmax(np.abs(fr.gain)))
    assert -180.0 < fr.phase_deg[k] <= 180.0
    assert fr.phase_deg[k] == pytest.approx(np.degrees(np.angle(fr.gain[k])), abs=1e-9)
    # and it is still continuous along the band (no jump of a turn)
    assert np.max(np.abs(np.diff(fr.phase_deg))) < 90.0
