"""Export: SPICE text, JSON card and CSV curves (no simulator needed here).

The simulator comparisons are in tests/test_ngspice.py; these tests check the text
itself, round trips through Platebook's own readers, and the CLI.
"""

from __future__ import annotations

import json
import re

import numpy as np
import pytest
from click.testing import CliRunner

import fitter.export as export
from fitter.card import card_to_triode, save_card
from fitter.export import (
    ExportError,
    card_json,
    curve_family,
    curves_csv,
    default_sweep,
    parse_sweep,
    spice_expression,
    spice_subcircuit,
)
from fitter.models import MODELS
from fitter.reader import read_text
from fitter.triode import FittedTriode

# Invented units.  koren: 12AX7-like set (mu 100, ex 1.4, kg1 1060, kp 600, kvb 300),
# from memory of Koren's published table; power and dempwolf: invented values of
# similar size; dempwolf grid set near Dempwolf & Zoelzer's 12AX7 values (from memory).
PARAMS = {
    "koren": dict(mu=100.0, ex=1.4, kg1=1060.0, kp=600.0, kvb=300.0),
    "power": dict(K=1.73e-6, mu=97.0, n=1.46, vc=0.62),
    "dempwolf": dict(G=2.242e-3, mu=103.2, gamma=1.26, C=3.40),
}
DEMPWOLF_GRID = dict(PARAMS["dempwolf"], Gg=6.177e-4, xi=1.314, Cg=9.901, Ig0=8.025e-8)
RANGE = {"va": (0.0, 400.0), "vg": (-4.0, 0.0), "ia": (0.0, 4.2e-3)}


def unit(model="koren", params=None, **kw):
    kw.setdefault("tube", "V7")
    kw.setdefault("section", "A")
    kw.setdefault("valid_range", RANGE)
    return FittedTriode(model, params or PARAMS[model], **kw)


# -- expressions ---------------------------------------------------------------


def test_every_registered_model_has_a_spice_expression():
    # adding a model to the registry without an exporter expression must fail here
    missing = set(MODELS) - set(export.SPICE_EXPRESSIONS)
    assert not missing, f"no SPICE expression for {sorted(missing)}"
    assert set(PARAMS) == set(MODELS)


def test_model_without_expression_is_a_clear_error(monkeypatch):
    monkeypatch.delitem(export.SPICE_EXPRESSIONS, "koren")
    with pytest.raises(ExportError, match="model 'koren' has no SPICE expression"):
        spice_subcircuit(unit())


def _eval_spice(expr, va, vg):
    """Evaluate a SPICE B-source expression with numpy, with ngspice's function meanings."""
    py = expr.replace("V(plate,cathode)", "va").replace("V(grid,cathode)", "vg")
    names = set(re.findall(r"[A-Za-z_][A-Za-z_0-9]*", re.sub(r"\d[\d.]*e[-+]?\d+", "", py)))
    assert names <= {"va", "vg", "max", "abs", "exp", "ln", "sqrt", "pwr"}, names
    env = {
        "va": va, "vg": vg, "max": np.maximum, "abs": np.abs, "exp": np.exp, "ln": np.log,
        "sqrt": np.sqrt, "pwr": lambda x, y: np.sign(x) * np.abs(x) ** y,  # ngspice's pwr
    }
    return eval(py, {"__builtins__": {}}, env)


@pytest.mark.parametrize("model,params", [(m, p) for m, p in PARAMS.items()] + [("dempwolf", DEMPWOLF_GRID)])
def test_expression_text_evaluates_to_the_model_without_overflow(model, params):
    # Round trip: the exported text, evaluated independently of fitter.models, gives
    # the model's current; and no step overflows or takes a negative fractional power
    # even at absurd voltages (numpy is told to raise on any overflow/invalid).
    t = unit(model, params)
    va, vg = np.meshgrid(np.r_[-1e4, -300, -1, 0, 1e-3, 1, 50, 250, 1e4, 1e6],
                         np.r_[-1e4, -100, -4, -0.5, 0, 0.5, 3, 100])
    va, vg = va.ravel(), vg.ravel()
    e = spice_expression(t)
    with np.errstate(over="raise", invalid="raise", divide="raise"):
        got = _eval_spice(e.plate, va, vg)
    # atol 1 fA: without log1p, ln(1 + exp(-|z|)) loses relative precision in deep
    # cutoff (the same text runs in ngspice, which has no log1p either)
    np.testing.assert_allclose(got, t.current(va, vg), rtol=1e-12, atol=1e-15)


def test_guards_are_in_the_text():
    for model in MODELS:
        text = spice_subcircuit(unit(model, DEMPWOLF_GRID if model == "dempwolf" else None))
        body = "\n".join(ln for ln in text.splitlines() if not ln.startswith("*"))
        # exp only of a non-positive argument, powers only of max(...,0)
        assert body.count("exp(") == body.count("exp(-abs(")
        assert "**" not in body and "pow(" not in body
        assert body.count("pwr(") == body.count("pwr(max(") > 0


def test_kvb_zero_gets_the_models_floor_not_a_division_by_zero():
    t = unit("koren", dict(PARAMS["koren"], kvb=0.0))
    e = spice_expression(t)
    assert "sqrt(max(0.0+" in e.plate and ",1e-24))" in e.plate
    va, vg = np.r_[0.0, 0.0, 100.0, 300.0], np.r_[-2.0, 0.0, -2.0, 0.0]
    with np.errstate(over="raise", invalid="raise", divide="raise"):
        got = _eval_spice(e.plate, va, vg)
    assert got[0] == 0.0 and got[1] == 0.0
    np.testing.assert_allclose(got, t.current(va, vg), rtol=1e-12, atol=1e-15)


# -- subcircuit text -----------------------------------------------------------


def test_subcircuit_header_and_pins():
    t = unit()
    text = spice_subcircuit(t, card="cards/V7_A.koren.json")
    lines = text.splitlines()
    assert ".subckt V7_A plate grid cathode" in lines
    assert lines[-1] == ".ends V7_A"
    header = "\n".join(ln for ln in lines if ln.startswith("*"))
    for needle in ("tube: V7", "section: A", "model: koren", "Koren", "Glass Audio",
                   "va 0 .. 400 V", "vg -4 .. 0 V", "ia 0 .. 4.2 mA", "card: cards/V7_A.koren.json",
                   "created by Platebook", "pins: plate grid cathode", "lethal voltages"):
        assert needle in header, needle
    # every parameter in full precision (repr) in the expression
    for v in t.params.values():
        assert repr(float(v)) in text


def test_subcircuit_capacitances_and_grid_path():
    t = unit()
    text = spice_subcircuit(t, cgk=1.6e-12, cga=1.7e-12, cak=0.0)
    assert "Cgk grid cathode 1.6e-12" in text
    assert "Cga grid plate 1.7e-12" in text
    assert "Cak" not in text  # 0 means none
    assert "Bgrid grid cathode I=0.05*" in text and "/1500.0" in text
    own = spice_subcircuit(unit("dempwolf", DEMPWOLF_GRID))
    assert "the model's own fitted grid current" in own and "generic path" not in own
    plain = spice_subcircuit(unit("dempwolf"))
    assert "generic path" in plain


def test_subcircuit_bad_input():
    with pytest.raises(ExportError, match="name: 'two words'"):
        spice_subcircuit(unit(), name="two words")
    with pytest.raises(ExportError, match="cga: capacitance must be a finite value >= 0"):
        spice_subcircuit(unit(), cga=-1e-12)
    with pytest.raises(ExportError, match="grid_resistance: must be a positive"):
        spice_subcircuit(unit(), grid_resistance=0)


def test_default_name_from_label():
    assert export.spice_name(unit(tube="12A-X7 lot 3", section="B")) == "12A_X7_lot_3_B"
    assert export.spice_name(unit(section=None)) == "V7"


# -- JSON ------------------------------------------------------------------------


def test_card_json_round_trip():
    t = unit("dempwolf", DEMPWOLF_GRID)
    d = json.loads(card_json(t, fit={"rms_ma": 0.01}, source=["a.csv"], tube="V7-spare"))
    assert d["tube"] == "V7-spare" and d["fit"] == {"rms_ma": 0.01} and d["source"] == ["a.csv"]
    back = card_to_triode(d)
    assert back.params == t.params and back.model.name == "dempwolf"
    with pytest.raises(ExportError, match="name: the tube name must not be empty"):
        card_json(t, tube=" ")


# -- CSV -------------------------------------------------------------------------


def test_parse_sweep():
    np.testing.assert_allclose(parse_sweep("0:400:5", "--va"), np.arange(0, 401, 5.0))
    np.testing.assert_allclose(parse_sweep("-4:0:0.5", "--vg"), np.arange(-4, 0.01, 0.5))
    np.testing.assert_allclose(parse_sweep("-4, -2,0", "--vg"), [-4, -2, 0])
    for bad, msg in (("0:400", "should be start:stop:step"), ("0:400:0", "step must be positive"),
                     ("400:0:5", "stop is below start"), ("a:b:c", "cannot read 'a:b:c'"),
                     ("", "gives no finite voltages"), ("0:1e9:1", "at most 100000"),
                     ("0:400:1000", "step 1000 is larger than the range 0..400")):
        with pytest.raises(ExportError, match=re.escape("--va: ") + ".*" + re.escape(msg)):
            parse_sweep(bad, "--va")


def test_csv_reads_back_through_platebooks_reader():
    # Round trip through fitter.reader (the lead's reader, written independently).
    t = unit()
    va, vg = parse_sweep("0:400:10", "--va"), parse_sweep("-4:0:1", "--vg")
    text = curves_csv(curve_family(t, va, vg), card="V7_A.koren.json")
    assert text.splitlines()[2] == "tube,section,va,vg,ia_ma"
    res = read_text(text, file="export.csv")
    assert len(res.units) == 1
    u = res.units[0]
    assert (u.tube, u.section) == ("V7", "A")
    assert u.n_points == va.size * vg.size and u.n_curves == vg.size
    np.testing.assert_allclose(u.ia, t.current(u.va, u.vg), rtol=1e-10, atol=1e-15)


def test_csv_rejects_a_name_that_breaks_cells():
    with pytest.raises(ExportError, match="name: tube 'a,b' cannot go in a CSV cell") as caught:
        curves_csv(curve_family(unit(), [100.0], [-1.0], tube="a,b"))
    assert caught.value.field == "name"  # the field the front end names (--name on the command line)


def test_default_sweep_needs_a_range():
    va, vg = default_sweep(unit())
    assert (va[0], va[-1], va.size, vg[0], vg[-1], vg.size) == (0, 400, 41, -4, 0, 9)
    with pytest.raises(ExportError, match="va: the card records no fitted range; give the plate and grid voltages"):
        default_sweep(unit(valid_range=None))


# -- CLI ---------------------------------------------------------------------------


@pytest.fixture
def card_path(tmp_path):
    return str(save_card(tmp_path / "V7_A.koren.json", unit(), fit={"rms_ma": 0.02}, source=["lot.csv"]))


def _cli(*args):
    from fitter.cli import main

    return CliRunner().invoke(main, ["export", *args])


def test_cli_spice_stdout_and_file(card_path, tmp_path):
    r = _cli(card_path, "--format", "spice", "--cgk", "1.6p", "--cga", "1.7p", "--name", "V7A")
    assert r.exit_code == 0, r.output
    assert ".subckt V7A plate grid cathode" in r.output and "Cgk grid cathode 1.6e-12" in r.output
    assert f"card: {card_path}" in r.output
    out = tmp_path / "v7.lib"
    r = _cli(card_path, "--format", "spice", "-o", str(out))
    assert r.exit_code == 0, r.output
    assert "wrote" in r.output and "pins plate grid cathode" in r.output and "lethal voltages" in r.output
    assert ".subckt V7_A plate grid cathode" in out.read_text()


def test_cli_json_is_one_object(card_path):
    r = _cli(card_path, "--format", "json")
    assert r.exit_code == 0, r.output
    d = json.loads(r.output)
    assert d["fit"] == {"rms_ma": 0.02} and d["source"] == ["lot.csv"] and d["model"] == "koren"


def test_cli_csv(card_path):
    r = _cli(card_path, "--format", "csv", "--va", "0:300:100", "--vg", "-2,0")
    assert r.exit_code == 0, r.output
    rows = [ln for ln in r.output.splitlines() if not ln.startswith("#")]
    assert rows[0] == "tube,section,va,vg,ia_ma" and len(rows) == 1 + 8
    r = _cli(card_path, "--format", "csv")
    assert r.exit_code == 0 and len(r.output.splitlines()) == 3 + 41 * 9


@pytest.mark.parametrize("args,msg", [
    (["--format", "spice", "--va", "0:400:5"], "--va applies to --format csv only"),
    (["--format", "csv", "--cgk", "1p"], "--cgk applies to --format spice only"),
    (["--format", "spice", "--cgk", "lots"], "--cgk: cannot read 'lots'"),
    (["--format", "csv", "--va", "0:400:5"], "give both --va and --vg"),
    (["--format", "csv", "--va", "0:400", "--vg", "0"], "--va: '0:400' should be start:stop:step"),
    (["--format", "spice", "--name", "a b"], "--name: 'a b' is not a usable subcircuit name"),
])
def test_cli_bad_options(card_path, args, msg):
    r = _cli(card_path, *args)
    assert r.exit_code == 1
    assert msg in r.output


def test_cli_bad_card(tmp_path):
    missing = tmp_path / "nope.json"
    r = _cli(str(missing), "--format", "spice")
    assert r.exit_code == 1 and "nope.json: cannot read" in r.output
    broken = tmp_path / "broken.json"
    broken.write_text('{"format": "platebook.model-card", "version": 1, "model": "triodeX"}')
    r = _cli(str(broken), "--format", "json")
    assert r.exit_code == 1 and "field 'model': unknown model 'triodeX'" in r.output


def test_grid_r_is_refused_for_a_card_with_its_own_grid_current(tmp_path):
    # Dempwolf-Zoelzer (DAFx-11) models grid current itself (Gg, xi, Cg, Ig0; ECC83 set
    # from memory); a generic grid resistance would be silently ignored, so it is an error
    from fitter.cli import main

    t = FittedTriode("dempwolf", dict(G=2.242e-3, mu=103.2, gamma=1.26, C=3.40, Gg=6.177e-4, xi=1.314,
                                      Cg=9.901, Ig0=8.025e-8), tube="DZ")
    card = tmp_path / "dz.json"
    save_card(card, t)
    r = CliRunner().invoke(main, ["export", str(card), "--format", "spice", "--grid-r", "1k"])
    assert r.exit_code == 1 and "--grid-r: does not apply" in r.output
