"""``platebook output single-ended`` / ``push-pull`` through click's test runner, and the
output service (fitter.service.output).

Cards are invented units from Koren's 300B set (from memory of Koren's table, Glass Audio
8(5), 1996, rev. 2003), written with save_card.
"""

import json

import pytest
from click.testing import CliRunner

from fitter import CAUTION
from fitter.card import save_card
from fitter.cli import main
from fitter.service.output import OutputSpec, build_output, run_output
from fitter.service.specs import SpecError
from fitter.triode import FittedTriode

P300B = dict(mu=3.95, ex=1.4, kg1=1550.0, kp=65.0, kvb=300.0)


@pytest.fixture()
def cards(tmp_path):
    a = FittedTriode("koren", P300B, tube="PA")
    b = FittedTriode("koren", dict(P300B, kg1=1600.0), tube="PB")
    return {"a": save_card(tmp_path / "PA.koren.json", a), "b": save_card(tmp_path / "PB.koren.json", b),
            "tmp": tmp_path}


def run(args):
    return CliRunner().invoke(main, [str(a) for a in args], catch_exceptions=False)


SE = ["--bplus", "330", "--rdc", "150", "--turns", "20", "--speaker", "8", "--bias", "-61"]


def test_single_ended_json_has_the_textbook_output_impedance(cards):
    res = run(["output", "single-ended", "--tube", cards["a"], *SE, "--json"])
    assert res.exit_code == 0, res.output
    d = json.loads(res.output)
    t = FittedTriode("koren", P300B)
    tube = d["tubes"]["tube"]
    ss = t.small_signal(tube["va_v"], tube["vgk_v"], check=False)
    # RDH (from memory): (rp + primary resistance) / n^2 at the secondary
    assert d["output_impedance_ohm"] == pytest.approx((ss.rp + 150.0) / 400.0, rel=1e-6)
    assert d["reflected_load_ohm"] == pytest.approx(3200.0)
    assert d["primary_dc_ma"] == pytest.approx(tube["ia_ma"])
    assert d["max_output"]["limit"] == "grid current"


def test_push_pull_report_and_plot(cards):
    png = cards["tmp"] / "pp.png"
    res = run(["output", "push-pull", "--tube-a", cards["a"], "--tube-b", cards["b"], "--bplus", "400",
               "--load", "5k", "--bias", "-84", "--pa-max", "40", "--plot", png])
    assert res.exit_code == 0, res.output
    assert "DC imbalance in the primary" in res.output and CAUTION in res.output
    assert png.stat().st_size > 10_000 and png.read_bytes()[:4] == b"\x89PNG"


def test_load_sweep_in_json(cards):
    res = run(["output", "single-ended", "--tube", cards["a"], *SE, "--load-sweep", "2k,3k,5k", "--json"])
    assert res.exit_code == 0, res.output
    assert json.loads(res.output)["load_sweep"]["load_ohm"] == [2000.0, 3000.0, 5000.0]


@pytest.mark.parametrize("args,text", [
    (["--bplus", "330", "--load", "3k", "--turns", "20", "--bias", "-61"], "--load: give the reflected load or the turns ratio, not both"),
    (["--bplus", "330", "--load", "3k"], "--bias: give a fixed grid bias or a cathode resistor (neither was given)"),
    (["--bplus", "330", "--load", "3k", "--bias", "-61", "--rk", "900"],
     "--bias: give a fixed grid bias or a cathode resistor, not both"),
    (["--bplus", "abc", "--load", "3k", "--bias", "-61"], "--bplus"),
    (["--bplus", "330", "--load", "3k", "--bias", "-61", "--thd", "200%"], "--thd"),
    (["--bplus", "330", "--load", "3k", "--bias", "-61", "--load-sweep", "2k,,3k"], "--load-sweep"),
    (["--bplus", "330", "--load", "3k", "--bias", "-61", "--load-sweep", "2k,-3k"], "--load-sweep"),
])
def test_bad_input_is_one_line_naming_the_option(cards, args, text):
    res = CliRunner().invoke(main, ["output", "single-ended", "--tube", str(cards["a"]), *args])
    assert res.exit_code == 1
    assert text in res.output and "Traceback" not in res.output


@pytest.mark.parametrize("option,value_", [
    ("--turns", "1e308"), ("--turns", "1e-320"), ("--speaker", "1e-320"), ("--load", "1e-320"),
    ("--pa-max", "1e-320"), ("--bplus", "1e308"), ("--load-sweep", "1e-320,3k"), ("--rdc", "nan"),
])
def test_implausible_values_are_refused_by_name(cards, option, value_):
    # values that would overflow or divide by zero are input errors naming the option
    base = {"--bplus": "330", "--load": "3k", "--bias": "-61"}
    if option == "--turns":
        base.pop("--load")
    base[option] = value_
    args = [x for kv in base.items() for x in kv]
    res = CliRunner().invoke(main, ["output", "single-ended", "--tube", str(cards["a"]), *args])
    assert res.exit_code == 1, res.output
    assert res.output.startswith(f"error: {option}") and "Traceback" not in res.output


def test_a_grid_at_the_onset_at_idle_is_a_failed_solve_not_nan(cards):
    res = CliRunner().invoke(main, ["output", "single-ended", "--tube", str(cards["a"]), "--bplus", "330",
                                    "--load", "3k", "--bias", "0"])
    assert res.exit_code == 2 and "grid-current onset at idle" in res.output


def test_missing_cards_are_input_errors(cards):
    res = CliRunner().invoke(main, ["output", "push-pull", "--tube-a", str(cards["a"]), "--bplus", "400",
                                    "--load", "5k", "--bias", "-84"])
    assert res.exit_code == 1 and "--tube-a" in res.output
    res = CliRunner().invoke(main, ["output", "single-ended", "--tube", str(cards["tmp"] / "none.json"),
                                    *SE])
    assert res.exit_code == 1 and "none.json" in res.output


def test_a_stage_cut_off_at_idle_is_a_failed_solve(cards):
    res = CliRunner().invoke(main, ["output", "single-ended", "--tube", str(cards["a"]), "--bplus", "150",
                                    "--load", "3k", "--bias", "-200"])
    assert res.exit_code == 2 and "cut off at idle" in res.output


def test_service_names_unknown_fields_and_kinds():
    with pytest.raises(SpecError) as e:
        build_output("single-ended", {"b_plus": 300.0, "ra": 3000.0})
    assert e.value.field == "ra"
    with pytest.raises(SpecError) as e:
        build_output("triple", {})
    assert e.value.field == "kind"
    with pytest.raises(SpecError) as e:
        run_output(OutputSpec("push-pull", {"b_plus": 400.0, "load": 5000.0, "grid_bias": -84.0}, tube_a="x.json"))
    assert e.value.field == "tube_b"


def test_a_push_pull_refuses_the_same_tube_twice_naming_tube_b(cards):
    # common practice: a push-pull pair is two tubes; one card given twice is no pair
    pp = ["--bplus", "400", "--load", "5k", "--bias", "-84"]
    res = CliRunner().invoke(main, ["output", "push-pull", "--tube-a", str(cards["a"]), "--tube-b",
                                    str(cards["a"]), *pp])
    assert res.exit_code == 1 and "Traceback" not in res.output
    assert res.output.strip() == "error: --tube-b: the same tube as tube A (PA); a push-pull pair is two different tubes"
    # a second card of the same tube (another fit of it, another file) is still one tube
    again = save_card(cards["tmp"] / "PA-again.json", FittedTriode("koren", dict(P300B, kg1=1500.0), tube="PA"))
    spec = OutputSpec("push-pull", {"b_plus": 400.0, "load": 5000.0, "grid_bias": -84.0}, tube_a=str(cards["a"]),
                      tube_b=str(again))
    with pytest.raises(SpecError) as e:
        run_output(spec)
    assert e.value.field == "tube_b"
    # ... and so is the design sweep of a push-pull (the same service check)
    from fitter.service.design import SweepSpec, stage_sweep

    with pytest.raises(SpecError) as e:
        stage_sweep(SweepSpec("push-pull", "load", 4000.0, 6000.0, 3, circuit={"b_plus": 400.0, "grid_bias": -84.0},
                              tube_a=str(cards["a"]), tube_b=str(cards["a"])))
    assert e.value.field == "tube_b"
    # two sections of one bottle are two tubes: accepted
    sa = save_card(cards["tmp"] / "D-A.json", FittedTriode("koren", P300B, tube="D", section="A"))
    sb = save_card(cards["tmp"] / "D-B.json", FittedTriode("koren", dict(P300B, kg1=1600.0), tube="D", section="B"))
    res = CliRunner().invoke(main, ["output", "push-pull", "--tube-a", str(sa), "--tube-b", str(sb), *pp])
    assert res.exit_code == 0, res.output
