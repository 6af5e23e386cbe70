"""``platebook response`` and ``platebook sweep`` through click's test runner.

Cards are invented units from Koren's 12AX7 / 12AU7 parameter sets (from memory of Koren's
table, Glass Audio 8(5), 1996, rev. 2003), written with save_card.  The printed figures are
checked against the engine's result objects (which tests/test_frequency.py and
tests/test_sweeps.py check against ngspice, textbook corners and direct solves) and against
the textbook coupling corner.
"""

import json
import math

import pytest
from click.testing import CliRunner

from fitter import CAUTION
from fitter import stage as S
from fitter.card import save_card
from fitter.cli import main
from fitter.triode import FittedTriode


@pytest.fixture()
def cards(tmp_path):
    hx = FittedTriode("koren", dict(mu=100, ex=1.4, kg1=1060, kp=600, kvb=300), tube="HX", section="A")
    folder = tmp_path / "lot"
    folder.mkdir()
    out = {"hx": save_card(tmp_path / "HX_A.koren.json", hx)}
    for i, f in enumerate((0.9, 1.0, 1.1, 1.2)):
        for sec in ("A", "B"):
            t = FittedTriode("koren", dict(mu=21.5, ex=1.3, kg1=1180 * f, kp=84, kvb=300), tube=f"MU{i}", section=sec)
            save_card(folder / f"MU{i}_{sec}.koren.json", t)
            out[f"mu{i}{sec}"] = folder / f"MU{i}_{sec}.koren.json"
    out["lot"] = folder
    return out


def run(args):
    return CliRunner().invoke(main, [str(a) for a in args], catch_exceptions=False)


CC = ["--bplus", "300", "--ra", "100k", "--rk", "1.5k", "--ck", "22u", "--rl", "470k"]


def test_response_json_matches_engine_and_coupling_corner(cards):
    res = run(["response", "common-cathode", "--tube", cards["hx"], "--bplus", "300", "--ra", "100k", "--rk", "1.5k",
               "--rl", "470k", "--cin", "47n", "--rs", "10k", "--cgk", "1.6p", "--cga", "1.7p", "--json"])
    assert res.exit_code == 0, res.output
    d = json.loads(res.output)
    assert d["caution"] == CAUTION
    st = S.CommonCathode(b_plus=300, ra=100e3, rk=1.5e3, rl=470e3, c_in=47e-9, rs=10e3,
                         cgk=1.6e-12, cga=1.7e-12)
    from fitter.stage.frequency import response

    fr = response(st, FittedTriode("koren", dict(mu=100, ex=1.4, kg1=1060, kp=600, kvb=300)))
    assert d["f_high_hz"] == pytest.approx(fr.f_high, rel=1e-9)
    assert d["midband_gain"] == pytest.approx(fr.midband, rel=1e-9)
    # only the input coupling capacitor is below the band: the low -3 dB point is the textbook
    # corner 1/(2 pi C (Rs + Rg)) (RC coupling, Radiotron Designer's Handbook ch. 12, from memory),
    # within 1 %: the grid's Miller capacitance (about 55 pF, 1 GOhm at 3 Hz) beside the 1 MOhm
    # grid leak moves it by about 0.1 %
    assert d["f_low_hz"] == pytest.approx(1 / (2 * math.pi * 47e-9 * (10e3 + 1e6)), rel=1e-2)
    assert len(d["points"]) == 241


def test_response_text_and_plot(cards, tmp_path):
    res = run(["response", "common-cathode", "--tube", cards["hx"], *CC, "--cin", "47n", "--cga", "1.7p",
               "--rs", "47k", "--plot", tmp_path / "r"])
    assert res.exit_code == 0, res.output
    assert CAUTION in res.output and "-3 dB high" in res.output
    assert (tmp_path / "r.png").stat().st_size > 10_000


def test_sweep_over_a_stock_prints_median_and_range(cards, tmp_path):
    res = run(["sweep", "common-cathode", "--spread", cards["lot"], "--bplus", "250", "--rk", "1k", "--ck", "100u",
               "--vary", "ra=22k:100k:4:log", "--level", "5", "--json"])
    assert res.exit_code == 0, res.output
    d = json.loads(res.output)
    assert d["field"] == "ra" and d["scale"] == "log" and len(d["units"]) == 8
    assert [p["value"] for p in d["points"]] == pytest.approx([22e3, 22e3 * 4.545454 ** (1 / 3),
                                                                22e3 * 4.545454 ** (2 / 3), 100e3], rel=1e-5)
    for p in d["points"]:
        for key in ("ia_ma", "gain", "headroom_v_peak", "thd_pct", "vhk_margin_v"):
            c = p[key]
            assert c["min"] <= c["median"] <= c["max"], key
    text = run(["sweep", "common-cathode", "--spread", cards["lot"], "--bplus", "250", "--rk", "1k",
                "--vary", "ra=22k:100k:4", "--plot", tmp_path / "s.png"])
    assert text.exit_code == 0, text.output
    assert "median [min..max]" in text.output and CAUTION in text.output
    assert (tmp_path / "s.png").stat().st_size > 10_000


def test_sweep_one_stack_by_option_name(cards):
    res = run(["sweep", "stack", "--bottom", cards["mu0A"], "--top", cards["mu0B"], "--bplus", "300", "--rk", "1k",
               "--vary", "r-top=500:2k:3", "--json"])
    assert res.exit_code == 0, res.output
    d = json.loads(res.output)
    assert d["field"] == "r_top" and len(d["points"]) == 3
    assert "bottom.va_v" in d["points"][0] and "top.pa_w" in d["points"][0]


@pytest.mark.parametrize("vary,needle", [
    ("rx=1:2", "--vary: a common-cathode stage has no component or supply 'rx'"),
    ("ra=1k", "--vary: give START:STOP"),
    ("ra=-1k:10k", "--vary: ra = -1000 in the range: must be positive"),
    ("ra=1k:10k:1", "--vary: ra, points of the range"),
    ("ra=1k:10k:x", "--vary: the number of points must be a whole number"),
    ("top-grid=1:2", "no component or supply 'top-grid'"),
])
def test_bad_vary_is_one_line_naming_the_option(cards, vary, needle):
    res = CliRunner().invoke(main, ["sweep", "common-cathode", "--tube", str(cards["hx"]), "--bplus", "300",
                                    "--vary", vary])
    assert res.exit_code == 1
    assert needle in res.output and "Traceback" not in res.output


def test_sweep_level_must_be_positive(cards):
    res = CliRunner().invoke(main, ["sweep", "common-cathode", "--tube", str(cards["hx"]), "--bplus", "300",
                                    "--vary", "ra=47k:100k:2", "--level", "-3"])
    assert res.exit_code == 1 and "--level: must be a positive amplitude" in res.output
