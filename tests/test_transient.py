"""THD against frequency by ngspice transient (fitter.stage.transient): the low-frequency
limit against the quasi-static analysis, slew limiting into a capacitive load, and the
one-line note when ngspice is absent.

Tubes: the invented test units of tests/test_ngspice.py; circuits: invented examples.
"""

from __future__ import annotations

import json
import math

import pytest
from click.testing import CliRunner

import ngspice_util as ng
from fitter.card import save_card
from fitter.cli import main
from fitter.stage import CathodeFollower, CommonCathode, StageInputError, solve
from fitter.stage import transient as T
from fitter.stage.distortion import analyse
from fitter.triode import FittedTriode

KO = FittedTriode("koren", dict(mu=22.37, ex=1.317, kg1=1143.2, kp=91.6, kvb=271.0), tube="XU7", section="B")
CAPS = dict(cgk=1.6e-12, cga=1.5e-12, cak=0.5e-12)
# a cathode follower driving 10 nF (a long cable, invented): slew-limited near 4 kHz at 20 V peak
CF = CathodeFollower(b_plus=250.0, rk=22e3, vneg=-100.0, rl=100e3, c_in=1e-6, c_out=1e-6, c_load=10e-9, **CAPS)
CC = CommonCathode(b_plus=250.0, ra=22e3, rk=1e3, ck=100e-6, rl=220e3, c_in=100e-9, c_out=1e-6, rs=1e3, **CAPS)

@pytest.mark.ngspice
@pytest.mark.skipif(not ng.available(), reason=ng.SKIP_REASON)
@pytest.mark.parametrize("stage,level", [(CC, 10.0), (CF, 20.0)])
def test_low_frequency_thd_equals_the_quasi_static_analysis(stage, level):
    # Reference: fitter.stage.distortion.analyse at the same output level (quasi-static),
    # itself checked against ngspice in tests/test_ngspice.py.  At 100 Hz no capacitance
    # matters: issue tolerance 0.5 dB on THD; the level is reached to 0.5 %.
    r = T.thd_against_frequency(stage, KO, vout_peak=level, freq=[100.0])
    q = analyse(stage, KO, vout_peak=level)
    assert 20 * math.log10(r.thd[0]) == pytest.approx(20 * math.log10(q.thd), abs=0.5)
    assert r.vout_peak[0] == pytest.approx(level, rel=5e-3)
    assert r.quasi_static_thd == pytest.approx(q.thd, rel=1e-12)


@pytest.mark.ngspice
@pytest.mark.skipif(not ng.available(), reason=ng.SKIP_REASON)
def test_cathode_follower_slew_limits_into_a_capacitive_load():
    # Slew limit (common practice): the falling slope of a cathode follower can pull no more
    # than its standing current out of the load capacitance, so a sine of peak V cannot pass
    # above f = I / (2 pi C V).  Well below it THD is the quasi-static one; above it the
    # output collapses into a distorted triangle.
    fs = solve(CF, KO, errors=False, slew_vpeak=20.0).figures["slew_fmax"]
    assert 2e3 < fs < 8e3
    r = T.thd_against_frequency(CF, KO, vout_peak=20.0, freq=[fs / 20, 3 * fs])
    assert r.thd[0] < 1.5 * r.quasi_static_thd
    assert r.thd[1] > 0.10 and r.vout_peak[1] < 0.8 * 20.0
    # the small-signal response at 3 fs is still within 3 dB: the loss is large-signal
    from fitter.stage.frequency import response

    fr = response(CF, KO, freq=[1e3, 3 * fs])
    assert fr.gain_db[1] - fr.gain_db[0] > -3.0


def test_missing_ngspice_is_one_line(monkeypatch):
    monkeypatch.setattr(T, "_ngspice", lambda: None)
    with pytest.raises(T.SimulatorMissing) as e:
        T.thd_against_frequency(CC, KO, vout_peak=5.0)
    assert "ngspice" in str(e.value) and "\n" not in str(e.value)


def test_cli_notes_missing_ngspice_and_still_prints_the_response(monkeypatch, tmp_path):
    monkeypatch.setattr(T, "_ngspice", lambda: None)
    card = save_card(tmp_path / "XU7_B.koren.json", KO)
    args = ["response", "common-cathode", "--tube", str(card), "--bplus", "250", "--ra", "22k", "--rk", "1k",
            "--cga", "1.5p", "--rs", "10k", "--thd-at", "5"]
    res = CliRunner().invoke(main, args)
    assert res.exit_code == 0, res.output
    assert "note: THD against frequency needs ngspice" in res.output and "-3 dB high" in res.output
    assert "Traceback" not in res.output
    d = json.loads(CliRunner().invoke(main, args + ["--json"]).output)
    assert d["thd_against_frequency"] is None and any("ngspice" in n for n in d["notes"])


def test_bad_level_and_frequencies_name_the_field():
    with pytest.raises(StageInputError) as e:
        T.thd_against_frequency(CC, KO, vout_peak=-1.0)
    assert e.value.field == "vout_peak"
    with pytest.raises(StageInputError) as e:
        T.thd_against_frequency(CC, KO, vout_peak=1.0, freq=[0.0])
    assert e.value.field == "freq"


def test_netlist_holds_coupling_capacitors_and_keeps_the_load_capacitance():
    text = T.stage_netlist(CF, (KO,), source="DC 0", hold={"Cin": 0.0, "Cout": 12.5})
    lines = text.splitlines()
    assert "VCout cathode out DC 12.5" in lines and "VCin in grid DC 0.0" in lines
    assert "Cload out 0 1e-08" in lines
    assert not any(ln.startswith("Cin ") or ln.startswith("Cout ") for ln in lines)
