"""``platebook match``: JSON keys and labels, table, CSV, failed fits, input errors.

Units are Koren parameter sets with an invented spread (12AX7: mu 100, ex 1.4, kg1 1060,
kp 600, kvb 300 and 12AU7: mu 21.5, ex 1.3, kg1 1180, kp 84, kvb 300, Koren's published
table, from memory).
"""

from __future__ import annotations

import csv
import json
import math

import networkx as nx
import numpy as np
import pytest
from click.testing import CliRunner

from fitter.card import save_card
from fitter.cli import main
from fitter.triode import FittedTriode

AX7 = dict(mu=100.0, ex=1.4, kg1=1060.0, kp=600.0, kvb=300.0)
AU7 = dict(mu=21.5, ex=1.3, kg1=1180.0, kp=84.0, kvb=300.0)


def fit_entry(tube, section, params, converged=True):
    """One entry in the layout of 'platebook fit --json'."""
    return {"tube": tube, "section": section, "model": "koren", "converged": converged,
            "failure": None if converged else "too few points", "params": params if converged else {},
            "stderr": {}, "rms_ma": 0.01, "n_points": 60,
            "valid_range": {"va_v": [0.0, 400.0], "vg_v": [-4.0, 0.0], "ia_ma": [0.0, 5.0]}}


@pytest.fixture
def fits(tmp_path):
    r = np.random.default_rng(5)
    entries = []
    for k in range(12):
        p = dict(AX7, kg1=AX7["kg1"] * math.exp(r.normal(0, 0.06)), mu=AX7["mu"] * math.exp(r.normal(0, 0.02)))
        entries.append(fit_entry(f"X{k:02d}", "A" if k % 2 == 0 else "B", p))
    entries.append(fit_entry("BAD", None, {}, converged=False))
    path = tmp_path / "fits.json"
    path.write_text(json.dumps({"fits": entries}))
    return path, entries


def run(args):
    return CliRunner().invoke(main, args)


def test_json_groups_labels_and_optimality(fits, tmp_path):
    path, entries = fits
    r = run(["match", str(path), "--va", "250", "--vg", "-2", "--group", "2", "--tolerance", "5", "--json"])
    assert r.exit_code == 0, r.output
    d = json.loads(r.output)
    labels = {f"{e['tube']}:{e['section']}" for e in entries if e["converged"]}
    for g in d["groups"]:
        assert set(g["units"]) <= labels
        assert {"max_pct", "ia_pct", "gm_pct"} <= set(g["mismatch"])
        assert isinstance(g["grade"], str)
        assert g["mismatch"]["max_pct"] <= 5.0 + 1e-9
    assert {"unit": "BAD", "reason": "fit did not converge (too few points)"} in d["excluded"]
    assert d["optimality"]["exact"] is True
    seen = [u for g in d["groups"] for u in g["units"]] + [u["unit"] for u in d["unmatched"]]
    assert sorted(seen) == sorted(labels)
    # every grouped unit reports its figures once (the networkx comparison on those
    # figures is the next test)
    fig = {f["unit"]: f for g in d["groups"] for f in g["figures"]}
    assert len(fig) == 2 * len(d["groups"])


def test_pairs_agree_with_networkx_on_reported_figures(tmp_path):
    # a stock written as model cards (folder input); networkx matches the same figures
    r = np.random.default_rng(9)
    folder = tmp_path / "cards"
    folder.mkdir()
    for k in range(40):
        p = dict(AU7, kg1=AU7["kg1"] * math.exp(r.normal(0, 0.1)), mu=AU7["mu"] * math.exp(r.normal(0, 0.03)))
        save_card(folder / f"T{k:02d}.json",
                  FittedTriode("koren", p, tube=f"T{k:02d}",
                               valid_range={"va": (0.0, 400.0), "vg": (-20.0, 0.0), "ia": (0.0, 0.04)}))
    res = run(["match", str(folder), "--va", "250", "--vg", "-8.5", "--tolerance", "4", "--json"])
    assert res.exit_code == 0, res.output
    d = json.loads(res.output)
    from fitter.card import load_cards
    units = load_cards(folder)
    ss = {u.label: u.small_signal(250.0, -8.5) for u in units}
    G = nx.Graph()
    labs = sorted(ss)
    for i, a in enumerate(labs):
        for b in labs[i + 1:]:
            da = abs(ss[a].ia - ss[b].ia) / ((ss[a].ia + ss[b].ia) / 2)
            dg = abs(ss[a].gm - ss[b].gm) / ((ss[a].gm + ss[b].gm) / 2)
            if da <= 0.04 and dg <= 0.04:
                G.add_edge(a, b, weight=-max(da, dg))
    M = nx.max_weight_matching(G, maxcardinality=True)
    assert len(d["groups"]) == len(M)
    assert d["total_mismatch_pct"] == pytest.approx(100 * -sum(G[a][b]["weight"] for a, b in M), abs=1e-6)


def test_table_and_csv(fits, tmp_path):
    path, _ = fits
    out = tmp_path / "labels.csv"
    r = run(["match", str(path), "--va", "250", "--vg", "-2", "--tolerance", "5", "--csv", str(out)])
    assert r.exit_code == 0, r.output
    assert "Matching 12 units into pairs" in r.output
    assert "Criterion: Ia within 5 %" in r.output
    assert "lethal voltages" in r.output
    with out.open() as fh:
        rows = list(csv.DictReader(fh))
    assert {"group", "grade", "unit", "ia_ma", "gm_ms", "label"} <= set(rows[0])
    assert len(rows) == 12


def test_quads_cathode_bias_and_caution(fits):
    path, _ = fits
    r = run(["match", str(path), "--bplus", "300", "--ra", "100k", "--rk", "1.5k", "--group", "4",
             "--quad", "sides", "--tolerance", "8", "--json"])
    assert r.exit_code == 0, r.output
    d = json.loads(r.output)
    assert d["position"]["kind"] == "cathode-bias"
    assert "lethal" in d["caution"]
    for g in d["groups"]:
        assert g["kind"].startswith("two matched pairs")
        assert len(g["sides"]) == 2 and len(g["units"]) == 4


def test_stacked_assignment_cli(tmp_path):
    entries = []
    for k, f in enumerate((1.0, 1.03, 0.97, 1.1, 0.92, 1.01)):
        e = fit_entry(f"S{k}", None, dict(AU7, kg1=AU7["kg1"] * f))
        e["valid_range"] = {"va_v": [0.0, 400.0], "vg_v": [-20.0, 0.0], "ia_ma": [0.0, 40.0]}
        entries.append(e)
    path = tmp_path / "fits.json"
    path.write_text(json.dumps({"fits": entries}))
    r = run(["match", str(path), "--stack", "srpp", "--bplus", "300", "--rk", "800", "--stages", "2", "--json"])
    assert r.exit_code == 0, r.output
    d = json.loads(r.output)
    assert len(d["stages"]) == 2 and d["optimality"]["exact"]
    r = run(["match", str(path), "--stack", "srpp", "--bplus", "300", "--rk", "800", "--stages", "2"])
    assert "lethal" in r.output and "S1" in r.output


@pytest.mark.parametrize("args,message", [
    (["--va", "250"], "give both --va and --vg"),
    (["--va", "250", "--vg", "-2", "--only", "X00:A,NOPE"], "unknown unit 'NOPE'"),
    (["--va", "900", "--vg", "-2"], "outside every unit's fitted data"),
    (["--va", "250", "--vg", "-2", "--tolerance", "five"], "--tolerance: cannot read 'five'"),
    (["--va", "250", "--vg", "-2", "--figures", "ia,volume"], "unknown figure 'volume'"),
    ([], "no position"),
])
def test_input_errors(fits, args, message):
    path, _ = fits
    r = run(["match", str(path)] + args)
    assert r.exit_code == 1
    assert message in r.output


def test_bad_files(tmp_path):
    p = tmp_path / "bad.json"
    p.write_text('{"fits": [{"tube": "A", "converged": true, "model": "koren", "params": {"mu": "x"}}]}')
    r = run(["match", str(p), "--va", "250", "--vg", "-2"])
    assert r.exit_code == 1 and "field 'fits[0].params.mu': must be a finite number" in r.output
    p.write_text("{not json")
    r = run(["match", str(p), "--va", "250", "--vg", "-2"])
    assert r.exit_code == 1 and "line 1" in r.output
    r = run(["match", str(tmp_path / "missing.json"), "--va", "250", "--vg", "-2"])
    assert r.exit_code == 1 and "cannot read" in r.output
    p.write_text('{"fits": []}')
    r = run(["match", str(p), "--va", "250", "--vg", "-2"])
    assert r.exit_code == 1 and "empty" in r.output


def test_fit_json_of_every_model_is_matched_by_each_units_best_model(fits, tmp_path):
    # 'platebook fit --model all --json' lists every model's fit of a unit and names the
    # best in "best"; the match must use that one fit per unit (issue 4 section 4: FITS
    # is the JSON that 'platebook fit --json' prints)
    path, entries = fits
    good = [e for e in entries if e["converged"]]
    worse = [dict(e, model="power", params=dict(K=1e-5, mu=80.0, n=1.5, vc=0.0)) for e in good]
    best = [{"tube": e["tube"], "section": e["section"], "model": "koren", "converged": True} for e in good]
    both = tmp_path / "all.json"
    both.write_text(json.dumps({"fits": good + worse, "best": best}))
    r_all = run(["match", str(both), "--va", "250", "--vg", "-2", "--json"])
    r_one = run(["match", str(path), "--va", "250", "--vg", "-2", "--json"])
    assert r_all.exit_code == 0, r_all.output
    assert json.loads(r_all.output)["groups"] == json.loads(r_one.output)["groups"]
