"""Design sweeps of the output stages (fitter.stage.sweeps.component_sweep with
fitter.stage.output), the sweep service and ``platebook sweep single-ended|push-pull``.

The tubes are the 300B-like pair of tests/test_output_stage.py (Koren's published set from
memory, and an invented partner), whose stage figures that file checks against ngspice, the
2A3 manual and the handbook; here every sweep point must equal that stage solved directly.
"""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from click.testing import CliRunner

from fitter import CAUTION
from fitter.card import save_card
from fitter.cli import main
from fitter.service.design import SweepSpec, stage_sweep
from fitter.service.specs import SpecError
from fitter.stage import StageInputError
from fitter.stage.output import PushPullOutput, SingleEndedOutput, load_sweep, solve_output
from fitter.stage.sweeps import component_sweep
from test_output_stage import P300B, TA, TB
from fitter.triode import FittedTriode

# a weaker third unit (an invented worn tube)
TC = FittedTriode("koren", dict(P300B, kg1=2100.0), tube="PC")


def test_single_ended_sweep_point_equals_the_stage_solved_directly():
    st = SingleEndedOutput(b_plus=330.0, turns_ratio=19.4, r_primary=150.0, grid_bias=-61.0, pa_max=40.0)
    loads = [2000.0, 3500.0, 6000.0]
    sw = component_sweep(st, "load", loads, [(TA,), (TC,)], thd_limit=0.05, level=1.0)
    for i, RL in enumerate(loads):
        for u, t in enumerate((TA, TC)):
            r = solve_output(SingleEndedOutput(b_plus=330.0, load=RL, r_primary=150.0, grid_bias=-61.0, pa_max=40.0),
                             t, thd=0.05)
            f = sw.figures
            # the sweep solves all units at once; solve_output defines the figures (1e-6: the
            # batched path's tolerance, tests/test_output_batch.py)
            assert f["p_max"][i, u] == pytest.approx(r.figures["p_max"], rel=1e-6)
            assert f["zout"][i, u] == pytest.approx(r.figures["z_out"], rel=1e-9)
            assert f["damping"][i, u] == pytest.approx(r.figures["damping"], rel=1e-9)
            assert f["tube.ia"][i, u] == pytest.approx(r.op["tube.ia"], rel=1e-9)
            assert f["tube.pa"][i, u] == pytest.approx(r.op["tube.pa"], rel=1e-9)
            p_thd = r.figures["p_thd"]
            assert (math.isnan(f["p_thd"][i, u]) if p_thd is None else f["p_thd"][i, u] == pytest.approx(p_thd, rel=1e-6))
            assert f["pa_ratio"][i, u] == pytest.approx(max(r.op["tube.pa"], r.figures["pa_full"]["tube"]) / 40.0, rel=1e-6)
    # the reflected-load sweep of fitter.stage.output agrees (THD at 1 W on the same power sweep)
    ls = load_sweep(st, TA, loads=loads, thd=0.05, level=1.0)
    assert np.allclose(ls.p_max, sw.figures["p_max"][:, 0], rtol=1e-6, atol=0)
    assert np.allclose(ls.thd_at, sw.figures["thd"][:, 0], rtol=1e-6, atol=0)


def test_push_pull_sweep_point_equals_the_stage_solved_directly():
    st = PushPullOutput(b_plus=450.0, load=5000.0, r_primary=150.0, rk=650.0, bypassed=False)
    sw = component_sweep(st, "rk", [450.0, 800.0], [(TA, TB)], thd_limit=0.05, level=2.0)
    for i, rk in enumerate((450.0, 800.0)):
        r = solve_output(PushPullOutput(b_plus=450.0, load=5000.0, r_primary=150.0, rk=rk, bypassed=False),
                         TA, TB, thd=0.05)
        for p in ("A", "B"):
            assert sw.figures[f"{p}.ia"][i, 0] == pytest.approx(r.op[f"{p}.ia"], rel=1e-9)
        assert sw.figures["imbalance"][i, 0] == pytest.approx(r.figures["imbalance"], rel=1e-9, abs=1e-12)
        assert sw.figures["p_max"][i, 0] == pytest.approx(r.figures["p_max"], rel=1e-6)
        assert sw.figures["thd"][i, 0] == pytest.approx(np.interp(2.0, r.sweep.power, r.sweep.thd), rel=1e-6)
    # more cathode resistance, less idle current (common practice: cathode bias)
    assert sw.figures["A.ia"][1, 0] < sw.figures["A.ia"][0, 0]


def test_unsolvable_points_are_left_out_with_a_note():
    # at 120 V the -61 V bias cuts the tube off at idle (solve_output raises): NaN and a note
    st = SingleEndedOutput(b_plus=300.0, load=3000.0, grid_bias=-61.0)
    sw = component_sweep(st, "b_plus", [60.0, 300.0], [(TA,)], thd_limit=0.05)
    assert np.isnan(sw.figures["p_max"][0, 0]) and np.isfinite(sw.figures["p_max"][1, 0])
    assert any("could not be solved" in n for n in sw.notes)
    with pytest.raises(StageInputError) as e:
        component_sweep(st, "rk", [100.0, 200.0], [(TA,)])  # fixed bias and a cathode resistor both
    assert e.value.field == "grid_bias"


def test_service_pairs_a_push_pull_stock_in_card_order(tmp_path):
    for t in (TA, TB, TC):
        save_card(tmp_path / f"{t.tube}.koren.json", t)
    spec = SweepSpec("push-pull", "load", 3000.0, 6000.0, 3, circuit={"b_plus": 400.0, "grid_bias": -84.0},
                     cards=str(tmp_path))
    sw = stage_sweep(spec)
    assert sw.labels == ["PA/PB"] and "one left out" in sw.pairing
    with pytest.raises(SpecError) as e:
        stage_sweep(SweepSpec("push-pull", "bypassed", 0, 1, 2, circuit={"b_plus": 400.0}, cards=str(tmp_path)))
    assert e.value.field == "vary"


def test_cli_sweep_single_ended_over_a_stock(tmp_path):
    for t in (TA, TB, TC):
        save_card(tmp_path / f"{t.tube}.koren.json", t)
    png = tmp_path / "sw.png"
    args = ["sweep", "single-ended", "--spread", str(tmp_path), "--bplus", "330", "--rdc", "150", "--turns", "19.4",
            "--bias", "-61", "--pa-max", "40", "--vary", "load=2k:6k:3", "--level", "1"]
    res = CliRunner().invoke(main, args + ["--json"], catch_exceptions=False)
    assert res.exit_code == 0, res.output
    d = json.loads(res.output)
    assert d["kind"] == "single-ended" and d["field"] == "load" and d["units"] == ["PA", "PB", "PC"]
    direct = [solve_output(SingleEndedOutput(b_plus=330.0, load=2000.0, r_primary=150.0, grid_bias=-61.0), t)
              .figures["p_max"] for t in (TA, TB, TC)]
    assert d["points"][0]["p_max_w"]["max"] == pytest.approx(max(direct), rel=1e-6)
    assert d["points"][0]["p_max_w"]["min"] == pytest.approx(min(direct), rel=1e-6)
    res = CliRunner().invoke(main, args + ["--plot", str(png)], catch_exceptions=False)
    assert res.exit_code == 0 and CAUTION in res.output and png.read_bytes()[:4] == b"\x89PNG"
    res = CliRunner().invoke(main, args[:-4] + ["--vary", "ra=1k:2k"])
    assert res.exit_code == 1 and "no component or supply 'ra'" in res.output
    res = CliRunner().invoke(main, ["sweep", "push-pull", "--tube-a", str(tmp_path / "PA.koren.json"), "--bplus", "400",
                                    "--load", "5k", "--vary", "bias=-90:-70:3"])
    assert res.exit_code == 1 and res.output.startswith("error: --tube-b")
