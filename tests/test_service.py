"""The service layer (fitter/service/): each use case called with a specification gives the
same figures as the command line's ``--json`` output, its errors carry the field they are
about (and the CLI's one table names that field as its option), the command modules hold no
numerics, and a model added to the registry (with its SPICE expression) goes through fit,
card, point, stage and export with nothing else changed.

Data are invented: curves from Koren's 12AX7 parameter set (from memory of Koren's table,
Glass Audio 8(5), 1996, rev. 2003) through the ``synth`` fixture, two sections per tube.
Agreement between the service and the CLI is checked figure for figure (both run the same
engine, so any difference is a front end doing numerics of its own); the load lines are
checked against Kirchhoff's voltage law (common practice).
"""

from __future__ import annotations

import ast
import dataclasses
import json
import math
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner

from fitter.cli import main
from fitter.cli.fields import OPTIONS, message, option
from fitter.errors import InputError
from fitter.export import SPICE_EXPRESSIONS, ExportError
from fitter.models import MODELS
from fitter.service.export import ExportSpec, export
from fitter.service.fitting import FitSpec, PointSpec, check_fix, fit_files, point
from fitter.service.specs import NoResult, SpecError
from fitter.service.stages import (DistortionSpec, SpreadSpec, StageSpec, build_stage, pair_sections, solve_stage,
                                   spread_stage, stage_distortion, stage_load_lines)
from fitter.stage import StageInputError

KOREN_12AX7 = dict(mu=100.0, ex=1.4, kg1=1060.0, kp=600.0, kvb=300.0)  # Koren's table, from memory
GRIDS = [-3.0, -2.5, -2.0, -1.5, -1.0, -0.5, 0.0]
CC = {"b_plus": 300.0, "ra": 100e3, "rk": 1.5e3, "ck": 22e-6, "rl": 470e3}
CC_ARGS = ["--bplus", "300", "--ra", "100k", "--rk", "1.5k", "--ck", "22u", "--rl", "470k"]
CLI = Path(__file__).resolve().parent.parent / "fitter" / "cli"


def run(*args):
    return CliRunner().invoke(main, [str(a) for a in args], catch_exceptions=False)


def _without_timing(envelope: dict) -> dict:
    # a fit's wall time is the one figure that differs between two runs of the same fit
    for f in envelope["fits"]:
        f.pop("elapsed_ms", None)
    return envelope


@pytest.fixture(scope="module")
def lot(tmp_path_factory, synth, write_long):
    """Two invented tubes of two sections each, fitted once; their cards in a folder."""
    tmp = tmp_path_factory.mktemp("lot")
    units = []
    for i, tube in enumerate(("SV-01", "SV-02")):
        for j, sec in enumerate(("A", "B")):
            p = dict(KOREN_12AX7, kg1=KOREN_12AX7["kg1"] * (1 + 0.04 * i - 0.03 * j))
            units.append(synth("koren", p, GRIDS, i_max=4e-3, p_max=1.0, noise=0.005, seed=10 * i + j,
                               tube=tube, section=sec))
    csv = write_long(tmp / "lot.csv", units)
    run_ = fit_files(FitSpec([str(csv)], jobs=1, save=str(tmp / "cards")))
    assert not run_.failed
    cards = sorted((tmp / "cards").glob("*.json"))
    return {"csv": csv, "cards": tmp / "cards", "a": cards[0], "b": cards[1], "tmp": tmp}


# -- the service and the CLI agree --------------------------------------------


def test_fit_service_gives_the_envelope_that_fit_json_prints(lot):
    res = run("fit", lot["csv"], "--json", "--jobs", "1")
    assert res.exit_code == 0, res.output
    cli = _without_timing(json.loads(res.stdout))
    service = _without_timing(fit_files(FitSpec([str(lot["csv"])], jobs=1)).to_dict())
    assert service == cli


def test_fit_service_with_every_model_ranks_like_the_cli(lot):
    res = run("fit", lot["csv"], "--json", "--jobs", "1", "--model", "all")
    cli = _without_timing(json.loads(res.stdout))
    service = _without_timing(fit_files(FitSpec([str(lot["csv"])], model="all", jobs=1)).to_dict())
    assert service["best"] == cli["best"] and len(service["fits"]) == len(MODELS) * 4
    assert service == cli


def test_point_service_gives_the_figures_of_point_json(lot):
    res = run("point", lot["a"], "--va", "250", "--vg", "-2", "--json")
    assert res.exit_code == 0, res.output
    assert point(PointSpec(str(lot["a"]), 250.0, -2.0)).to_dict() == json.loads(res.stdout)


def test_stage_service_gives_the_figures_of_stage_json(lot):
    res = run("stage", "common-cathode", "--tube", lot["a"], *CC_ARGS, "--json")
    assert res.exit_code == 0, res.output
    assert solve_stage(StageSpec("common-cathode", CC, tube=str(lot["a"]))).to_dict() == json.loads(res.stdout)


def test_stack_spread_pairs_each_tubes_two_sections_as_the_cli_does(lot):
    args = ["--bplus", "300", "--rk", "1.5k", "--r-top", "1.5k", "--rl", "100k"]
    res = run("stage", "stack", *args, "--spread", lot["cards"], "--json")
    assert res.exit_code == 0, res.output
    d = spread_stage(SpreadSpec("stack", {"b_plus": 300.0, "rk": 1.5e3, "r_top": 1.5e3, "rl": 100e3},
                                str(lot["cards"]))).to_dict()
    assert d == json.loads(res.stdout)
    # section A of each tube at the bottom, section B on top (the pairing rule)
    assert d["units"] == ["SV-01:A/SV-01:B", "SV-02:A/SV-02:B"]


def test_pairing_falls_back_to_both_positions_when_a_tube_has_one_section(lot):
    from fitter.card import load_cards

    units = load_cards(lot["cards"])[:3]  # SV-02 keeps one section
    bottoms, tops, words = pair_sections(units)
    assert tops is None and len(bottoms) == 3 and words == "each unit in both positions"


def test_distortion_service_gives_the_figures_of_distortion_json(lot):
    res = run("distortion", "common-cathode", "--tube", lot["a"], *CC_ARGS, "--vout", "20", "--json")
    assert res.exit_code == 0, res.output
    spec = DistortionSpec("common-cathode", CC, tube=str(lot["a"]), vout_peak=20.0)
    assert stage_distortion(spec).to_dict() == json.loads(res.stdout)
    res = run("distortion", "common-cathode", "--tube", lot["a"], *CC_ARGS, "--sweep", "--levels", "8", "--json")
    spec = DistortionSpec("common-cathode", CC, tube=str(lot["a"]), sweep=True, levels=8)
    assert stage_distortion(spec).to_dict() == json.loads(res.stdout)


def test_export_service_gives_the_text_the_cli_prints(lot):
    res = run("export", lot["a"], "--format", "csv", "--va", "0:300:50", "--vg", "-2,0")
    assert res.exit_code == 0, res.output
    out = export(ExportSpec(str(lot["a"]), "csv", va="0:300:50", vg="-2,0"))
    assert out.text == res.stdout
    res = run("export", lot["a"], "--format", "spice", "--cgk", "1.6p")
    text = export(ExportSpec(str(lot["a"]), "spice", cgk=1.6e-12)).text
    # the header's creation time is the only line that may differ between the two runs
    same = lambda t: [ln for ln in t.splitlines() if "created" not in ln]  # noqa: E731
    assert res.exit_code == 0 and len(same(text)) > 10
    assert same(text) == same(res.stdout)


def test_load_lines_are_data_that_obey_kirchhoff(lot):
    result = solve_stage(StageSpec("common-cathode", CC, tube=str(lot["a"]), errors=False))
    data = stage_load_lines(result)
    (ln,) = data.lines
    # DC load line of a common-cathode stage: va + ia (Ra + Rk) = B+ (Kirchhoff's voltage law)
    assert ln.dc_resistance == pytest.approx(CC["ra"] + CC["rk"])
    assert ln.va_q + ln.ia_q * (CC["ra"] + CC["rk"]) == pytest.approx(CC["b_plus"], rel=1e-9)
    assert (ln.dc_va[0], ln.dc_ia[-1]) == pytest.approx((300.0, 300.0 / 101.5e3))
    # AC line: Ra || RL seen by the tube with Rk bypassed (common practice), fitted to the path
    assert ln.ac_resistance == pytest.approx(1 / (1 / CC["ra"] + 1 / CC["rl"]), rel=0.02)
    # the swing passes through the operating point and stays on the AC line
    mid = ln.swing_va.size // 2
    assert (ln.swing_va[mid], ln.swing_ia[mid]) == pytest.approx((ln.va_q, ln.ia_q), rel=1e-9)
    # the operating point lies on the plate curve at its own grid voltage (the model, sampled
    # every 0.75 V: linear interpolation is good to a few parts in 1e4 there)
    pc = ln.curves
    assert pc.vg_q == ln.vgk_q and pc.vg[0] == 0.0 and np.all(np.diff(pc.vg) == -pc.step)
    assert np.interp(ln.va_q, pc.va, pc.ia_q_curve) == pytest.approx(ln.ia_q, rel=1e-3)
    d = data.to_dict()
    assert d["tubes"]["tube"]["dc"]["resistance_ohm"] == pytest.approx(101.5e3)
    assert len(d["tubes"]["tube"]["curves"]["ia_ma"]) == pc.vg.size
    assert d["swing_limit"] == data.swing_limit and json.dumps(d, allow_nan=False)


# -- errors carry the field ----------------------------------------------------


@pytest.mark.parametrize("call, field", [
    (lambda c: build_stage("common-cathode", {"b_plus": 300.0, "ra": -1.0}), "ra"),
    (lambda c: build_stage("common-cathode", {"ra": 100e3}), "b_plus"),
    (lambda c: build_stage("cathode-follower", {"b_plus": 300.0, "rk": 10e3, "r_upper": 1e6}), "r_lower"),
    (lambda c: build_stage("stack", {"b_plus": 300.0, "rk": 1e3, "r_top": 1e3, "top_grid": "floating"}), "top_grid"),
    (lambda c: build_stage("common-cathode", {"b_plus": 300.0, "ra": 1e5, "rq": 1.0}), "rq"),
    (lambda c: solve_stage(StageSpec("common-cathode", CC, tube=str(c["tmp"] / "none.json"))), "tube"),
    (lambda c: solve_stage(StageSpec("stack", {"b_plus": 300.0, "rk": 1e3, "r_top": 1e3}, bottom=str(c["a"]))), "top"),
    (lambda c: solve_stage(StageSpec("common-cathode", CC, tube=str(c["a"]), slew_vpeak=-1.0)), "slew_vpeak"),
    (lambda c: stage_distortion(DistortionSpec("common-cathode", CC, tube=str(c["a"]), vout_peak=900.0)), "vout_peak"),
    (lambda c: stage_distortion(DistortionSpec("common-cathode", CC, tube=str(c["a"]), sweep=True,
                                               thd_limit=2.0)), "thd_limit"),
    (lambda c: spread_stage(SpreadSpec("common-cathode", CC, str(c["tmp"] / "none-*.json"))), "spread"),
    (lambda c: check_fix({"zz": 1.0}, ["koren"]), "fix.zz"),
    (lambda c: check_fix({"mu": 1e4}, ["koren"]), "fix.mu"),
    (lambda c: fit_files(FitSpec([str(c["csv"])], model="nosuch")), "model"),
    (lambda c: point(PointSpec(str(c["a"]), math.inf, -2.0)), "va"),
    (lambda c: export(ExportSpec(str(c["a"]), "spice", name="two words")), "name"),
    (lambda c: export(ExportSpec(str(c["a"]), "spice", cga=-1e-12)), "cga"),
    (lambda c: export(ExportSpec(str(c["a"]), "csv", va="0:400:-5", vg="-2,0")), "va"),
    (lambda c: export(ExportSpec(str(c["a"]), "spice", va="0:400:5")), "va"),
    (lambda c: export(ExportSpec(str(c["a"]), "json", name=" ")), "name"),
])
def test_errors_carry_their_field_and_the_cli_names_its_option(lot, call, field):
    with pytest.raises(InputError) as caught:
        call(lot)
    e = caught.value
    assert e.field == field
    assert type(e) in (SpecError, StageInputError, ExportError)  # the service's and engine's field errors
    opt = option(field)
    if field in ("rq",):  # a field no stage has: no option either, the message names the field
        assert opt is None and message(e).startswith("rq: ")
    else:
        assert opt is not None and message(e).startswith(f"{opt}: ")
        assert "--" not in e.message  # the engine and the service never name a flag


def test_no_finite_result_is_a_failure_not_bad_input(lot):
    with pytest.raises(NoResult, match="no finite plate current"):
        point(PointSpec(str(lot["a"]), 1e300, -2.0))


def test_every_option_in_the_field_table_exists_on_a_command():
    import click

    from fitter.cli import COMMANDS

    seen = set()

    def walk(cmd):
        if isinstance(cmd, click.Group):
            for sub in cmd.commands.values():
                walk(sub)
        for p in cmd.params:
            seen.update(p.opts)
    ctx = click.Context(main)
    for name in COMMANDS:
        walk(main.get_command(ctx, name))
    missing = sorted(o for o in OPTIONS.values() if o.startswith("-") and o not in seen)
    assert missing == []


def test_engine_messages_name_no_command_line_flag():
    # every string literal in the engine modules the CLI and the web share; docstrings
    # may mention the CLI, messages may not
    root = CLI.parent
    files = [root / "fit.py", root / "export.py", *sorted((root / "stage").glob("*.py"))]
    offenders = []
    for f in files:
        tree = ast.parse(f.read_text())
        docs = {id(n.body[0].value) for n in ast.walk(tree)
                if isinstance(n, (ast.Module, ast.FunctionDef, ast.ClassDef)) and n.body
                and isinstance(n.body[0], ast.Expr) and isinstance(n.body[0].value, ast.Constant)}
        for n in ast.walk(tree):
            if isinstance(n, ast.Constant) and isinstance(n.value, str) and id(n) not in docs:
                if any(tok.startswith("--") and tok[2:3].isalpha() for tok in n.value.replace("(", " ").split()):
                    offenders.append(f"{f.name}:{n.lineno}: {n.value[:60]!r}")
    assert offenders == []


# -- no numerics and no file reading in the thinned command modules -------------

THIN = ["fitcmd.py", "stage.py", "export.py", "fields.py", "options.py", "__init__.py", "output.py", "stock.py",
        "design.py", "match.py"]


@pytest.mark.parametrize("name", THIN)
def test_command_modules_import_no_numerics_and_read_no_files(name):
    tree = ast.parse((CLI / name).read_text())
    imported = set()
    for n in ast.walk(tree):
        if isinstance(n, ast.Import):
            imported.update(a.name.split(".")[0] for a in n.names)
        elif isinstance(n, ast.ImportFrom) and n.level == 0:
            imported.add(n.module.split(".")[0])
        elif isinstance(n, ast.ImportFrom):
            imported.update(f"fitter.{n.module}" if n.module else a.name for a in n.names)
    assert not imported & {"numpy", "scipy", "lmfit", "pandas", "math"}
    calls = [n.func for n in ast.walk(tree) if isinstance(n, ast.Call)]
    called = {f.attr if isinstance(f, ast.Attribute) else getattr(f, "id", "") for f in calls}
    called -= {"open"}
    called |= {f.id for f in calls if isinstance(f, ast.Name) and f.id == "open"}  # os.open(os.devnull) is no reading
    readers = {"open", "read_text", "read_bytes", "load_card", "load_cards", "load_fits", "read_json",
               "read_curves", "fit_many", "fit_curves", "solve", "spread", "small_signal", "quasi_static"}
    assert not called & readers, called & readers


# -- a new model touches the registry and its SPICE expression only -------------


def test_a_model_added_to_the_registry_goes_through_fit_card_point_stage_and_export(lot, tmp_path, monkeypatch):
    new = dataclasses.replace(MODELS["koren"], name="koren-copy", title="a copy of Koren's model (test)")
    monkeypatch.setitem(MODELS, new.name, new)
    monkeypatch.setitem(SPICE_EXPRESSIONS, new.name, SPICE_EXPRESSIONS["koren"])

    run_ = fit_files(FitSpec([str(lot["csv"])], model=new.name, jobs=1, save=str(tmp_path)))
    assert not run_.failed and {r.model.name for r in run_.fits} == {new.name}
    card = sorted(tmp_path.glob("*.json"))[0]
    assert json.loads(card.read_text())["model"] == new.name
    base = fit_files(FitSpec([str(lot["csv"])], jobs=1)).fits[0]
    # the same equations fitted to the same data: the same parameters (regression against koren itself)
    for k, v in base.params.items():
        assert run_.fits[0].params[k] == pytest.approx(v, rel=1e-9)

    res = run("point", card, "--va", "250", "--vg", "-2", "--json")
    assert res.exit_code == 0 and json.loads(res.stdout)["model"] == new.name
    res = run("stage", "common-cathode", "--tube", card, *CC_ARGS, "--json")
    assert res.exit_code == 0, res.output
    assert json.loads(res.stdout)["tubes"]["tube"]["model"] == new.name
    res = run("export", card, "--format", "spice")
    assert res.exit_code == 0 and f"* model: {new.name}" in res.stdout
    res = run("distortion", "common-cathode", "--tube", card, *CC_ARGS, "--vout", "10", "--json")
    assert res.exit_code == 0, res.output
    assert 0 < json.loads(res.stdout)["thd_pct"] < 100
