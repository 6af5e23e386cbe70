"""Small things a new user meets (issue 8, section 7): one number parser for every numeric
option, ``stage --spread`` refusing what it would ignore, ``--skip-bad`` that drops a whole
unit, standard input, files given twice.

Cards are invented units from Koren's published 12AX7 set (from memory of Koren's table,
Glass Audio 8(5), 1996, rev. 2003), written with save_card; curve files are made by
tests/conftest.py.  Expected figures come from the engine itself called directly
(FittedTriode.small_signal), so the checks are that the command line reads the option as the
engine's SI value, not a regression of the numbers.
"""

from __future__ import annotations

import json

import pytest
from click.testing import CliRunner

from fitter.card import save_card
from fitter.cli import main
from fitter.triode import FittedTriode
from fitter.units import parse_value

KOREN_12AX7 = dict(mu=100.0, ex=1.4, kg1=1060.0, kp=600.0, kvb=300.0)  # Koren's table, from memory


def run(*args, stdin=None):
    return CliRunner().invoke(main, [str(a) for a in args], input=stdin, catch_exceptions=False)


@pytest.fixture
def card(tmp_path):
    t = FittedTriode("koren", KOREN_12AX7, tube="HX", section="A",
                     valid_range={"va": (0.0, 400.0), "vg": (-4.0, 0.0), "ia": (0.0, 8e-3)})
    return save_card(tmp_path / "HX_A.koren.json", t)


@pytest.fixture
def lot(tmp_path, synth, tube_types, write_long):
    units = [synth(tube_types["12AX7"], seed=1, tube="V1", section="A"),
             synth(tube_types["12AX7"], seed=2, tube="V1", section="B")]
    return write_long(tmp_path / "lot.csv", units)


def one_line_error(r, *parts):
    """The command failed with status 1 and one line ``error: ...`` holding ``parts``."""
    lines = [s for s in r.stderr.splitlines() if s.strip()]
    assert r.exit_code == 1, (r.exit_code, r.output)
    assert len(lines) == 1 and lines[0].startswith("error: "), r.stderr
    for p in parts:
        assert p in lines[0], (p, lines[0])


# -- one number parser -------------------------------------------------------------


def test_point_accepts_vg_with_unit_suffix(card):
    # '-2V' after --vg is the option's value (not an option) and reads as -2 V, like stage's 300V
    r = run("point", card, "--va", "250V", "--vg", "-2V", "--json")
    assert r.exit_code == 0, r.output
    got = json.loads(r.stdout)
    want = FittedTriode("koren", KOREN_12AX7).small_signal(250.0, -2.0).to_dict()  # the engine, called directly
    assert got["ia_ma"] == pytest.approx(want["ia_ma"], rel=1e-12)


def test_point_accepts_engineering_prefix_and_equals_form(card):
    r1 = run("point", card, "--va=0.25k", "--vg=-1500m", "--json")
    r2 = run("point", card, "--va", "250", "--vg", "-1.5", "--json")
    assert r1.exit_code == r2.exit_code == 0
    assert json.loads(r1.stdout)["gm_ms"] == pytest.approx(json.loads(r2.stdout)["gm_ms"], rel=1e-12)


@pytest.mark.parametrize("text", ["nan", "NaN", "inf", "-inf", "1e400", "9" * 400, "2x"])
def test_point_refuses_nan_va(card, text):
    r = run("point", card, "--va", text, "--vg", "-2")
    one_line_error(r, "--va")
    assert "Usage:" not in r.output


@pytest.mark.parametrize("text", ["nan", "inf", "1e400", "0", "2"])
def test_fit_refuses_floor_that_is_not_finite_or_out_of_range(lot, text):
    # --floor nan used to pass click's FloatRange (nan compares false) and fail every fit
    one_line_error(run("fit", lot, "--floor", text), "--floor")


def test_fit_fix_reads_engineering_notation_and_refuses_inf(lot):
    r = run("fit", lot, "--fix", "kvb=0.3k", "--json", "--jobs", "1")
    assert r.exit_code == 0, r.output
    fits = json.loads(r.stdout)["fits"]
    assert all(f["params"]["kvb"] == 300.0 for f in fits)  # 0.3k = 300, held
    one_line_error(run("fit", lot, "--fix", "kvb=inf"), "--fix", "not a finite number")


@pytest.mark.parametrize("args, option", [
    (["--time-limit", "nan"], "--time-limit"),
    (["--time-limit", "-1"], "--time-limit"),
    (["--tolerance", "inf"], "--tolerance"),
    (["--tolerance", "1e400%"], "--tolerance"),
    (["--bottle-balance", "nan"], "--bottle-balance"),
])
def test_match_refuses_non_finite_numbers_and_percentages(card, tmp_path, args, option):
    folder = tmp_path / "lot"
    folder.mkdir()
    for sec, kg1 in (("A", 1060.0), ("B", 1100.0)):
        save_card(folder / f"HX_{sec}.koren.json",
                  FittedTriode("koren", dict(KOREN_12AX7, kg1=kg1), tube="HX", section=sec))
    one_line_error(run("match", folder, "--va", "250", "--vg", "-2", *args), option)


def test_match_reads_percent_sign_and_prefixes(tmp_path):
    folder = tmp_path / "lot"
    folder.mkdir()
    for sec, kg1 in (("A", 1060.0), ("B", 1070.0)):
        save_card(folder / f"HX_{sec}.koren.json",
                  FittedTriode("koren", dict(KOREN_12AX7, kg1=kg1), tube="HX", section=sec))
    r = run("match", folder, "--va", "0.25k", "--vg", "-2V", "--tolerance", "5%", "--json")
    assert r.exit_code == 0, r.output
    fig = json.loads(r.stdout)["groups"][0]["figures"][0]
    assert (fig["va_v"], fig["vg_v"]) == (250.0, -2.0)  # 0.25k and -2V read as 250 V and -2 V


@pytest.mark.parametrize("grid", ["0:400:inf", "0:1e400:5", "-4,nan,0"])
def test_export_grid_refuses_non_finite_voltages(card, grid):
    one_line_error(run("export", card, "--format", "csv", "--va", grid, "--vg", "-2,0"), "--va")


def test_export_grid_reads_engineering_notation(card):
    r = run("export", card, "--format", "csv", "--va", "0:0.4k:100", "--vg", "-2V,0V")
    assert r.exit_code == 0, r.output
    rows = [s for s in r.stdout.splitlines() if s and not s.startswith("#")][1:]
    assert len(rows) == 10  # 5 plate voltages (0, 100, ..., 400) x 2 grid voltages


@pytest.mark.parametrize("args, option", [
    (["--bplus", "1e400"], "--bplus"),
    (["--swing", "inf"], "--swing"),
    (["--rk", "nan"], "--rk"),
])
def test_stage_refuses_non_finite_component_values(card, args, option):
    base = {"--bplus": "300V", "--ra": "100k", "--rk": "1K5"}
    base.update(zip(args[::2], args[1::2]))
    r = run("stage", "common-cathode", "--tube", card, *[x for kv in base.items() for x in kv])
    one_line_error(r, option)


def test_distortion_refuses_nan_thd_limit(card):
    r = run("distortion", "common-cathode", "--tube", card, "--bplus", "300", "--ra", "100k", "--rk", "1.5k",
            "--sweep", "--thd-limit", "nan%")
    one_line_error(r, "--thd-limit")


def test_parse_value_refuses_non_finite_and_keeps_notation():
    # engineering notation (common practice on schematics): 1K5 = 1500, 2k2 = 2200, 4R7 = 4.7
    assert parse_value("1K5") == 1500.0 and parse_value("2k2") == 2200.0 and parse_value("4R7") == 4.7
    assert parse_value("-2V") == -2.0 and parse_value("300V") == 300.0
    for bad in ("nan", "inf", "-Infinity", "1e400", "1e308k", float("nan"), float("inf")):
        with pytest.raises(ValueError, match="not a finite number"):
            parse_value(bad, "--x")
    with pytest.raises(ValueError, match=r"cannot read '.{37}\.\.\.'"):  # long text is cut in the message
        parse_value("x" * 5000, "--x")


# -- stage --spread ------------------------------------------------------------------


@pytest.mark.parametrize("extra, named", [
    (["--tube", "{card}"], "--tube"),
    (["--plot", "{plot}"], "--plot"),
    (["--tube", "{card}", "--plot", "{plot}"], "--tube, --plot"),
])
def test_stage_spread_refuses_tube_and_plot(card, tmp_path, extra, named):
    folder = tmp_path / "lot"
    folder.mkdir()
    save_card(folder / "HX_A.koren.json", FittedTriode("koren", KOREN_12AX7, tube="HX", section="A"))
    extra = [a.format(card=card, plot=tmp_path / "p.png") for a in extra]
    r = run("stage", "common-cathode", "--bplus", "300", "--ra", "100k", "--rk", "1.5k", "--spread", folder, *extra)
    one_line_error(r, "--spread", named)
    assert not (tmp_path / "p.png").exists()


def test_stage_spread_refuses_bottom_and_top(card, tmp_path):
    folder = tmp_path / "lot"
    folder.mkdir()
    save_card(folder / "HX_A.koren.json", FittedTriode("koren", KOREN_12AX7, tube="HX", section="A"))
    r = run("stage", "stack", "--bplus", "300", "--rk", "1.5k", "--r-top", "1.5k", "--spread", folder,
            "--bottom", card, "--top", card)
    one_line_error(r, "--spread", "--bottom, --top")


# -- --skip-bad ----------------------------------------------------------------------


@pytest.mark.parametrize("grid, va_max", [
    ([-1.0], 400.0),  # one grid curve: the reader drops the unit (mu cannot be identified)
    ([-1.0, -2.0], 30.0),  # 6 points: fewer than the Koren model's 5 parameters need (check_for_model)
])
def test_skip_bad_dropping_a_unit_exits_2(tmp_path, synth, tube_types, write_long, grid, va_max):
    good = synth(tube_types["12AX7"], seed=1, tube="V1", section="A")
    lone = synth("koren", KOREN_12AX7, grid_voltages=grid, va_max=va_max, seed=2, tube="V9", section="A")
    path = write_long(tmp_path / "lot.csv", [good, lone])
    r = run("fit", path, "--skip-bad", "--jobs", "1")
    assert r.exit_code == 2, r.output
    assert "V9:A" in r.stderr and "skipped" in r.stderr
    assert "--skip-bad left out 1 whole unit" in r.stderr
    assert "V1:A" in r.stdout  # the rest is still fitted and shown


def test_skip_bad_dropping_only_rows_exits_0(tmp_path, synth, tube_types, write_long):
    path = write_long(tmp_path / "lot.csv", [synth(tube_types["12AX7"], seed=1, tube="V1", section="A")])
    lines = path.read_text().splitlines()
    lines[5] = lines[5].rsplit(",", 1)[0] + ",oops"  # one unreadable current
    path.write_text("\n".join(lines) + "\n")
    r = run("fit", path, "--skip-bad", "--jobs", "1")
    assert r.exit_code == 0, r.output
    assert "skipped" in r.stderr and "left out" not in r.stderr


def test_skip_bad_with_no_unit_left_exits_1(tmp_path, synth, tube_types, write_long):
    lone = synth(tube_types["12AX7"], seed=2, tube="V9", section="A", grid_voltages=[-1.0])
    path = write_long(tmp_path / "lot.csv", [lone])
    r = run("fit", path, "--skip-bad", "--jobs", "1")
    assert r.exit_code == 1 and "no units left" in r.stderr


# -- files: standard input, given twice ----------------------------------------------


def test_fit_reads_standard_input(lot):
    r_file = run("fit", lot, "--json", "--jobs", "1")
    r_in = run("fit", "-", "--json", "--jobs", "1", stdin=lot.read_bytes())
    assert r_in.exit_code == 0, r_in.output
    a, b = json.loads(r_file.stdout)["fits"], json.loads(r_in.stdout)["fits"]
    assert [f["params"] for f in a] == [f["params"] for f in b]  # the same data, the same fit


def test_fit_refuses_non_utf8_standard_input():
    r = run("fit", "-", stdin=b"va,vg\n\xff\xfe\n")
    assert r.exit_code == 1 and "<stdin>, line 2" in r.stderr and "not UTF-8" in r.stderr


def test_fit_refuses_a_file_given_twice(lot):
    one_line_error(run("fit", lot, lot), "given twice")


def test_fit_refuses_one_unit_in_two_files(lot, tmp_path):
    copy = tmp_path / "copy.csv"
    copy.write_bytes(lot.read_bytes())
    one_line_error(run("fit", lot, copy, "--jobs", "1"), "V1:A", "lot.csv", "copy.csv")


def test_fit_refuses_a_folder(tmp_path):
    r = run("fit", tmp_path)
    assert r.exit_code == 1 and "is a directory" in r.output


def test_numbers_next_to_options_are_not_taken_for_options(card):
    # click hands the next token to an option that needs a value, even '-2V' (checked here,
    # since a future click could change it)
    r = run("point", card, "--vg", "-2V", "--va", "200")
    assert r.exit_code == 0 and "vg -2 V" in r.stdout


# -- whole numbers, options that do not apply, engine names ----------------------------


@pytest.mark.parametrize("args, option", [
    (["fit", "{lot}", "--jobs", "0"], "--jobs"),
    (["fit", "{lot}", "--jobs", "1.5"], "--jobs"),
    (["fit", "{lot}", "--jobs", "nan"], "--jobs"),
])
def test_whole_number_options_give_one_line_errors(lot, args, option):
    one_line_error(run(*[a.format(lot=lot) for a in args]), option)


def test_distortion_levels_out_of_range_is_one_line(card):
    r = run("distortion", "common-cathode", "--tube", card, "--bplus", "300", "--ra", "100k", "--rk", "1.5k",
            "--sweep", "--levels", "1")
    one_line_error(r, "--levels", "from 2 to 400")


@pytest.fixture
def pair_folder(tmp_path):
    folder = tmp_path / "pair"
    folder.mkdir()
    for sec, kg1 in (("A", 1060.0), ("B", 1070.0)):
        save_card(folder / f"HX_{sec}.koren.json",
                  FittedTriode("koren", dict(KOREN_12AX7, kg1=kg1), tube="HX", section=sec))
    return folder


@pytest.mark.parametrize("extra, named", [
    (["--target-split", "60"], "--target-split"),
    (["--target-ma", "1"], "--target-ma"),
    (["--same-bottle"], "--same-bottle"),
])
def test_match_refuses_stack_assignment_options_without_stages(pair_folder, extra, named):
    # they used to be ignored silently for a fixed-bias match
    one_line_error(run("match", pair_folder, "--va", "250", "--vg", "-2", *extra), named, "--stages")


@pytest.mark.parametrize("stages, words", [("0", "of at least 1"), ("1.5", "whole number")])
def test_match_stages_must_be_a_whole_number(pair_folder, stages, words):
    r = run("match", pair_folder, "--stack", "srpp", "--bplus", "300", "--rk", "1.5k", "--r-top", "1.5k",
            "--stages", stages)
    one_line_error(r, "--stages", words)


def test_match_target_split_is_a_percentage_below_100(pair_folder):
    r = run("match", pair_folder, "--stack", "srpp", "--bplus", "300", "--rk", "1.5k", "--r-top", "1.5k",
            "--stages", "1", "--target-split", "150")
    one_line_error(r, "--target-split", "between 0 and 100 %")


def test_stage_swing_error_names_the_option(card):
    r = run("stage", "common-cathode", "--tube", card, "--bplus", "300", "--ra", "100k", "--rk", "1.5k",
            "--swing", "-5")
    one_line_error(r, "--swing")
    assert "slew_vpeak" not in r.stderr


def test_stage_spread_refuses_a_unit_counted_twice(tmp_path):
    # the same card under two file names would weigh twice in min/median/max
    folder = tmp_path / "dup"
    folder.mkdir()
    t = FittedTriode("koren", KOREN_12AX7, tube="HX", section="A")
    save_card(folder / "a.json", t)
    save_card(folder / "b.json", t)
    save_card(folder / "c.json", FittedTriode("koren", dict(KOREN_12AX7, kg1=1100.0), tube="HY", section="A"))
    r = run("stage", "common-cathode", "--bplus", "300", "--ra", "100k", "--rk", "1.5k", "--spread", folder)
    one_line_error(r, "--spread", "'HX:A' appears 2 times")


def test_export_output_dash_is_standard_output(card, tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    r = run("export", card, "--format", "spice", "-o", "-")
    assert r.exit_code == 0 and r.stdout.startswith("* Platebook SPICE model")
    assert not (tmp_path / "-").exists()  # no file named '-'


def test_match_refuses_csv_to_standard_output(pair_folder, tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    one_line_error(run("match", pair_folder, "--va", "250", "--vg", "-2", "--csv", "-"), "--csv")
    assert not (tmp_path / "-").exists()


def test_point_prints_no_negative_zero(card):
    # at a negative plate voltage the Koren current is cut off: 0 mA/V, not '-0'
    r = run("point", card, "--va", "-100", "--vg", "0")
    assert r.exit_code == 0
    assert "= -0 " not in r.stdout and "gm = 0" in r.stdout


# -- finite but absurd numbers: no inf figure, no dashes passed off as a result ---------


def test_point_far_outside_any_tube_is_a_failure_not_dashes(card):
    # at 1e308 V the Koren current overflows: no figures, exit 2 (a failed computation)
    r = run("point", card, "--va", "1e308", "--vg", "0")
    assert r.exit_code == 2 and "no finite plate current" in r.stderr
    assert "ia = -" not in r.stdout


def test_export_grid_that_overflows_the_model_prints_no_inf(card):
    r = run("export", card, "--format", "csv", "--va", "0:1e300:1e296", "--vg", "0")
    assert r.exit_code == 2 and "no finite plate current" in r.stderr
    assert "inf" not in r.stdout and "Warning" not in r.stderr
    # a range wider than a float (1e308 - -1e308 overflows): refused, not a traceback
    one_line_error(run("export", card, "--format", "csv", "--va=-1e308:1e308:1e307", "--vg", "0"),
                   "--va", "at most 100000")


def test_skip_bad_dropping_a_whole_file_exits_2(lot, tmp_path):
    junk = tmp_path / "junk.csv"
    junk.write_text("tube,section,va,vg,ia_ma\nV7,A,x,y,z\nV7,A,1,2,oops\n")  # no usable row at all
    r = run("fit", lot, junk, "--skip-bad", "--jobs", "1")
    assert r.exit_code == 2, r.output
    assert "junk.csv" in r.stderr and "no usable data rows" in r.stderr and "left out 1 whole" in r.stderr
