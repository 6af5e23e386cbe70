"""THD against frequency of the output stages by ngspice transient
(fitter.stage.transient.output_netlist / output_thd_against_frequency), the service and
``platebook output ... --thd-at``.

References, named beside each check: ngspice (its transient and Fourier analysis of the same
stage description, an ideal transformer of controlled sources) against our quasi-static THD
at mid-band, within the issue's 0.5 dB; our own small-signal response (fitter.stage.frequency,
itself checked against ngspice .ac in tests/test_output_response.py) for the fall of the
fundamental at high frequency.  Tubes: Koren's 300B set from memory and an invented partner
(tests/test_output_stage.py); circuits: invented examples.
"""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from click.testing import CliRunner

import ngspice_util as ng
from fitter.card import save_card
from fitter.cli import main
from fitter.service.output import OutputSpec, run_output
from fitter.service.specs import SpecError
from fitter.stage import StageInputError
from fitter.stage import transient as T
from fitter.stage.frequency import response
from fitter.stage.output import PushPullOutput, SingleEndedOutput, solve_output
from test_output_stage import TA, TB

CASES = {
    "se-fixed": (SingleEndedOutput(b_plus=300.0, load=3000.0, r_primary=150.0, grid_bias=-61.0), (TA,)),
    "se-cathode-coupled": (SingleEndedOutput(b_plus=360.0, load=3500.0, r_primary=120.0, rk=1000.0, c_in=1e-6,
                                             rg=100e3, rs=1e3), (TA,)),
    "pp-class-ab": (PushPullOutput(b_plus=400.0, load=4000.0, r_primary=200.0, grid_bias=-100.0), (TA, TB)),
    "pp-shared-cathode": (PushPullOutput(b_plus=450.0, load=5000.0, r_primary=150.0, rk=650.0), (TA, TB)),
}


@pytest.mark.ngspice
@pytest.mark.skipif(not ng.available(), reason=ng.SKIP_REASON)
@pytest.mark.parametrize("key", sorted(CASES))
def test_midband_thd_equals_the_quasi_static_thd(key):
    # ngspice at 1 kHz against our quasi-static THD at half the largest output (a moderate
    # level): issue 11's tolerance 0.5 dB (measured within 0.01 dB); the loudspeaker's
    # voltage is sqrt(2 P R) (Ohm's law) to 0.5 %
    st, tubes = CASES[key]
    p = 0.5 * solve_output(st, *tubes).figures["p_max"]
    r = T.output_thd_against_frequency(st, *tubes, power=p, freq=[1000.0])
    assert 20 * math.log10(r.thd[0] / r.quasi_static_thd) == pytest.approx(0.0, abs=0.5)
    assert r.vout_peak[0] == pytest.approx(math.sqrt(2 * p * st.speaker), rel=5e-3)
    d = r.to_dict()
    assert d["kind"] == st.kind and d["level_w"] == p and "caution" in d


@pytest.mark.ngspice
@pytest.mark.skipif(not ng.available(), reason=ng.SKIP_REASON)
def test_leakage_and_primary_inductance_shape_the_ends_of_the_band():
    # a push-pull with a 20 H primary, 10 mH leakage and 1 nF across the primary (invented
    # transformer): at 20 Hz and 30 kHz the fundamental falls as the small-signal response
    # says (ours, checked against ngspice .ac elsewhere) within 0.3 dB at a quarter of the
    # largest output.  (Mid-band THD is not compared here: the magnetising current starts
    # with an offset that a 20 H primary lets decay over ~8 ms, longer than the 4 ms run.)
    st = PushPullOutput(b_plus=450.0, load=5000.0, r_primary=150.0, rk=650.0, l_primary=20.0, l_leak=0.01,
                        c_winding=1e-9)
    p = 0.25 * solve_output(st, TA, TB).figures["p_max"]
    r = T.output_thd_against_frequency(st, TA, TB, power=p, freq=[20.0, 1000.0, 30e3])
    fr = response(st, TA, TB, freq=[20.0, 1000.0, 30e3])
    for i in (0, 2):
        assert 20 * math.log10(r.vout_peak[i] / r.vout_peak[1]) == pytest.approx(fr.gain_db[i] - fr.gain_db[1], abs=0.3)
    assert r.vout_peak[0] < 0.95 * r.vout_peak[1] and r.vout_peak[2] < 0.95 * r.vout_peak[1]
    assert not any("magnetising" in n for n in r.notes)  # its own primary inductance was used


def test_netlist_has_the_ideal_transformer_and_the_held_bypass():
    st = SingleEndedOutput(b_plus=360.0, load=3200.0, r_primary=120.0, rk=1000.0, c_in=1e-6, rg=100e3)
    lines = T.output_netlist(st, (TA,), amplitude=10.0, freq=1e3, hold={"Cin": 0.0, "Ck": 61.5}).splitlines()
    n = st.ratio  # 20 for 3200 ohm into 8 ohm
    assert f"ES s2 0 ct plate {1 / n!r}" in lines and f"FS ct plate VsS {1 / n!r}" in lines
    assert f"LM ct plate {T.L_MAGNETISING!r}" in lines and "VCk k 0 DC 61.5" in lines and "VCin in g DC 0.0" in lines
    assert "Rspk out 0 8.0" in lines and "Rdc bplus ct 120.0" in lines and "X1 plate g k PBTUBE1" in lines
    pp = PushPullOutput(b_plus=400.0, load=5000.0, grid_bias=-84.0, l_primary=40.0)
    lines = T.output_netlist(pp, (TA, TB), amplitude=5.0, freq=1e3).splitlines()
    # the bias rides on each source (no coupling capacitor), grid B in antiphase; a half
    # winding has a quarter of the whole primary's inductance (half the turns)
    assert "VinA srcA 0 DC -84.0 SIN(-84.0 5.0 1000.0)" in lines and "VinB srcB 0 DC -84.0 SIN(-84.0 -5.0 1000.0)" in lines
    assert "LM ct xa 10.0" in lines


def test_missing_ngspice_is_one_line_and_the_cli_still_reports(monkeypatch, tmp_path):
    monkeypatch.setattr(T, "_ngspice", lambda: None)
    st, tubes = CASES["se-fixed"]
    with pytest.raises(T.SimulatorMissing) as e:
        T.output_thd_against_frequency(st, *tubes, power=1.0)
    assert "ngspice" in str(e.value) and "\n" not in str(e.value)
    card = save_card(tmp_path / "PA.koren.json", TA)
    args = ["output", "single-ended", "--tube", str(card), "--bplus", "300", "--load", "3k", "--rdc", "150",
            "--bias", "-61", "--thd-at", "2"]
    res = CliRunner().invoke(main, args)
    assert res.exit_code == 0 and "note: THD against frequency needs ngspice" in res.output
    assert "largest output before" in res.output and "Traceback" not in res.output
    d = json.loads(CliRunner().invoke(main, args + ["--json"]).output)
    assert d["thd_against_frequency"] is None and any("ngspice" in n for n in d["notes"])


def test_a_level_above_the_largest_output_names_the_field(tmp_path):
    st, tubes = CASES["se-fixed"]
    with pytest.raises(StageInputError) as e:
        T.output_thd_against_frequency(st, *tubes, power=1e3)
    assert e.value.field == "power"
    card = save_card(tmp_path / "PA.koren.json", TA)
    circuit = {"b_plus": 300.0, "load": 3000.0, "r_primary": 150.0, "grid_bias": -61.0}
    for bad in (1e3, -1.0):
        with pytest.raises(SpecError) as e:
            run_output(OutputSpec("single-ended", circuit, tube=str(card), thd_level=bad))
        assert e.value.field == "thd_level"
    res = CliRunner().invoke(main, ["output", "single-ended", "--tube", str(card), "--bplus", "300", "--load", "3k",
                                    "--bias", "-61", "--thd-at", "1k"])
    assert res.exit_code == 1 and res.output.startswith("error: --thd-at") and "Traceback" not in res.output


@pytest.mark.ngspice
@pytest.mark.skipif(not ng.available(), reason=ng.SKIP_REASON)
def test_cli_prints_thd_against_frequency(tmp_path):
    a, b = save_card(tmp_path / "PA.koren.json", TA), save_card(tmp_path / "PB.koren.json", TB)
    res = CliRunner().invoke(main, ["output", "push-pull", "--tube-a", str(a), "--tube-b", str(b), "--bplus", "400",
                                    "--load", "5k", "--rdc", "200", "--bias", "-84", "--thd-at", "5", "--json"])
    assert res.exit_code == 0, res.output
    d = json.loads(res.output)["thd_against_frequency"]
    assert d["level_w"] == 5.0 and len(d["points"]) == 7 and d["simulator"].startswith("ngspice")


@pytest.mark.ngspice
@pytest.mark.skipif(not ng.available(), reason=ng.SKIP_REASON)
def test_class_ab_bias_shift_matches_ngspice_with_a_real_bypass_capacitor():
    # A push-pull on a shared, bypassed 400 ohm cathode resistor driven to 95 % of its largest
    # output: the capacitor charges to Rk times the mean of both currents, which rises with
    # drive.  ngspice: the same stage with a real 47 uF capacitor, started at its own
    # operating point (idle) and run 50 ms at 1 kHz (the capacitor's time constant is about
    # 5 ms: ten of them), the mean cathode voltage over the last period against ours; the
    # shift agrees within 1 % (measured 0.01 %), and the last two periods differ by less than
    # 0.1 % of it (settled).
    from fitter.stage.output import _banks, _cathode_at, _idle

    st = PushPullOutput(b_plus=450.0, load=3000.0, r_primary=150.0, rk=400.0)
    res = solve_output(st, TA, TB)
    amp = 0.95 * res.figures["vin_max"]
    banks = _banks(st, (TA, TB))
    op = _idle(st, banks)
    ours = float(_cathode_at(st, banks, op, [amp])[0][0])
    circuit = T.output_netlist(st, (TA, TB), amplitude=amp, freq=1000.0).replace("Ck k 0 1.0", "Ck k 0 47e-6")
    (run,) = ng.run(circuit, ["tran 2.5u 50m 0 2.5u"], ["v(k)"], timeout=300.0)
    t, v = run["scale"], run["v(k)"]

    def mean(t0, t1):
        m = (t >= t0) & (t <= t1)
        return float(np.trapezoid(v[m], t[m]) / (t[m][-1] - t[m][0]))

    last, before = mean(49e-3, 50e-3), mean(48e-3, 49e-3)
    shift_ng = last - op["vk"]
    assert shift_ng > 1.0  # a real shift of volts (ngspice)
    assert ours - op["vk"] == pytest.approx(shift_ng, rel=0.01)
    assert abs(last - before) < 1e-3 * shift_ng
    # the report's figure is the one at the largest level
    assert res.figures["bias_shift"] == pytest.approx(res.figures["vk_full"] - op["vk"], rel=1e-12)
    assert res.figures["bias_shift"] > ours - op["vk"]


def test_bias_shift_is_rk_times_the_mean_current_at_full_output():
    # Kirchhoff and the capacitor's charge balance (common practice): at every level the
    # cathode voltage equals Rk times the period's mean of both plate currents; the grid limit
    # is where the crest of grid A reaches the onset with the cathode there (bias + a - vk = 0).
    from fitter.stage.output import _banks, _idle, _spectra

    st = PushPullOutput(b_plus=450.0, load=3000.0, r_primary=150.0, rk=400.0)
    res = solve_output(st, TA, TB)
    f = res.figures
    banks = _banks(st, (TA, TB))
    w, _ = _spectra(st, banks, _idle(st, banks), [f["vin_max"]], n_samples=1024)
    assert f["vk_full"] == pytest.approx(400.0 * float(np.mean(w["A.ia"][0] + w["B.ia"][0])), rel=1e-8)
    assert 0.0 + f["vin_max"] - f["vk_full"] == pytest.approx(0.0, abs=1e-6)
    d = res.to_dict()
    assert d["bias_shift_v"] == pytest.approx(f["bias_shift"]) and "bias shifts by" in res.report()
