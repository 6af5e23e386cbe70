"""``platebook fit`` and ``platebook point`` (issue section 6).

Run through click's CliRunner on small invented files written to tmp_path (made by
tests/conftest.py from Koren's published sets, from memory), plus real subprocesses
of ``python -m fitter`` on a pseudo-terminal for the progress-bar rules, and one
smoke test of the demo stock in curves/.
"""

from __future__ import annotations

import json
import os
import re
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner

from fitter.cli import main
from fitter.models import MODELS

REPO = Path(__file__).resolve().parents[1]
PNG_MAGIC = b"\x89PNG\r\n\x1a\n"
REQUIRED_KEYS = {"tube", "section", "model", "params", "stderr", "rms_ma", "n_points", "converged"}


def run(*args):
    return CliRunner().invoke(main, [str(a) for a in args], catch_exceptions=False)


@pytest.fixture
def lot(tmp_path, synth, tube_types, write_long):
    """An invented dual triode (12AX7-like, section A with 2 % glitches) plus a 12AU7-like
    unit without a section, in one long-layout file."""
    units = [
        synth(tube_types["12AX7"], seed=1, tube="V1", section="A", outliers=0.02),
        synth(tube_types["12AX7"], seed=2, tube="V1", section="B"),
        synth(tube_types["12AU7"], seed=3, tube="V2"),
    ]
    path = write_long(tmp_path / "lot.csv", units)
    return path, units


def test_help_on_every_command():
    # issue section 6: --help on every command
    for cmd in ([], ["fit"], ["point"]):
        r = run(*cmd, "--help")
        assert r.exit_code == 0 and "Usage:" in r.stdout, cmd


def test_fit_json_is_one_object_with_the_documented_keys(lot):
    # issue section 6: exactly one JSON object on stdout with fits[].tube/section/model/
    # params/stderr/rms_ma/n_points/converged; parameter names exactly those of section 2
    path, units = lot
    r = run("fit", path, "--model", "koren", "--json")
    assert r.exit_code == 0, r.stderr
    doc = json.loads(r.stdout)  # raises on any extra text (a progress bar, a table ...)
    assert isinstance(doc, dict)
    fits = doc["fits"]
    assert [(f["tube"], f["section"]) for f in fits] == [("V1", "A"), ("V1", "B"), ("V2", None)]
    names = set(MODELS["koren"].param_names)
    for f, u in zip(fits, units):
        assert REQUIRED_KEYS <= set(f)
        assert f["model"] == "koren" and f["converged"] is True
        assert set(f["params"]) == names and set(f["stderr"]) == names
        assert f["n_points"] == u.n_points
        assert all(isinstance(v, float) and v > 0 for v in f["stderr"].values())
        # round trip through the file: Koren's published mu (from memory), within 2 %
        assert f["params"]["mu"] == pytest.approx(u.params["mu"], rel=0.02)
        assert 0 < f["rms_ma"] < 1e3 * u.noise_rms()
    # the glitches injected in V1:A are the outliers listed, by line of the file
    listed = {o["line"] for o in fits[0]["outliers"]}
    assert listed == units[0].outlier_lines()
    assert "lethal voltages" in doc["caution"]


def test_fit_table_by_default(lot):
    # issue section 6: by default a readable table
    path, _ = lot
    r = run("fit", path)
    assert r.exit_code == 0
    lines = r.stdout.splitlines()
    assert lines[0].split()[:3] == ["unit", "model", "pts"]
    rows = {ln.split()[0]: ln for ln in lines[2:5]}
    assert set(rows) == {"V1:A", "V1:B", "V2"}
    assert rows["V1:A"].split()[3] == "6"  # 6 outliers listed (2 % of 288 points injected)
    assert "3 unit(s), 3 fit(s), 0 unit(s) without a good fit, 6 outlier point(s)" in r.stdout
    # rules.md: CLI report output carries the high-voltage caution
    assert "lethal voltages" in r.stdout


def test_fix_n_reports_it_as_fixed(tmp_path, synth, write_long):
    # Child-Langmuir (1911/1913): ideal exponent 3/2; --fix n=1.5 holds it there
    s = synth("power", dict(K=1.5e-5, mu=20.0, n=1.5, vc=0.0), grid_voltages=np.arange(0.0, -20.01, -2.0),
              i_max=30e-3, p_max=2.5, min_current=1e-6, seed=5)
    path = write_long(tmp_path / "ideal.csv", [s])
    r = run("fit", path, "--model", "power", "--fix", "n=1.5", "--json")
    assert r.exit_code == 0, r.stderr
    (f,) = json.loads(r.stdout)["fits"]
    assert f["params"]["n"] == 1.5 and f["stderr"]["n"] is None
    assert "n" not in f["free"]
    assert f["params"]["mu"] == pytest.approx(20.0, rel=0.01)
    table = run("fit", path, "--model", "power", "--fix", "n=1.5")
    assert "(fixed: n 1.5)" in table.stdout


def test_model_all_ranks_every_model(lot):
    # issue section 3: --model all fits every registered model and ranks them; the data
    # are Koren curves, so Koren must be the best model of every unit
    path, _ = lot
    r = run("fit", path, "--model", "all", "--json")
    assert r.exit_code == 0, r.stderr
    doc = json.loads(r.stdout)
    assert len(doc["fits"]) == 3 * len(MODELS)
    assert [b["model"] for b in doc["best"]] == ["koren"] * 3
    for f in doc["fits"]:
        m = MODELS[f["model"]]
        if f["converged"]:
            assert set(f["params"]) == set(m.param_names)
        else:
            assert f["failure"] and f["params"] == {}
    # per unit the fits are in rank order: converged first, by BIC
    for k in range(3):
        group = doc["fits"][k * len(MODELS):(k + 1) * len(MODELS)]
        assert len({(f["tube"], f["section"]) for f in group}) == 1
        assert group[0]["model"] == "koren"
        conv = [f["bic"] for f in group if f["converged"]]
        assert conv == sorted(conv)
    table = run("fit", path, "--model", "all")
    assert re.search(r"V1:A\s+koren\s+\*", table.stdout)


def test_save_writes_cards_that_point_reads(lot, tmp_path):
    # issue section 6: --save DIR writes one card per unit; `platebook point CARD --va
    # --vg --json` gives ia_ma, gm_ms, rp_ohm, mu and their *_err
    path, units = lot
    cards = tmp_path / "cards"
    r = run("fit", path, "--save", cards)
    assert r.exit_code == 0
    files = sorted(p.name for p in cards.iterdir())
    assert files == ["V1_A.koren.json", "V1_B.koren.json", "V2.koren.json"]
    p = run("point", cards / "V1_A.koren.json", "--va", 250, "--vg", -2, "--json")
    assert p.exit_code == 0, p.stderr
    d = json.loads(p.stdout)
    for k in ("ia_ma", "gm_ms", "rp_ohm", "mu"):
        assert isinstance(d[k], float) and isinstance(d[k + "_err"], float) and d[k + "_err"] > 0, k
    # the figures are those of Koren's 12AX7 set (from memory) at 250 V, -2 V, within 2 %
    from fitter.triode import FittedTriode

    truth = FittedTriode("koren", units[0].params).small_signal(250.0, -2.0).to_dict()
    for k in ("ia_ma", "gm_ms", "rp_ohm", "mu"):
        assert d[k] == pytest.approx(truth[k], rel=0.02), k
    assert d["mu"] == pytest.approx(d["gm_ms"] * 1e-3 * d["rp_ohm"], rel=1e-9)  # mu = gm rp
    assert d["warnings"] == []
    text = run("point", cards / "V1_A.koren.json", "--va", 250, "--vg", -2)
    assert text.exit_code == 0 and "transconductance gm" in text.stdout


def test_point_warns_far_outside_the_data(lot, tmp_path):
    # issue section 5: the loaded card warns far outside its data (va 10..400 V here)
    path, _ = lot
    cards = tmp_path / "cards"
    run("fit", path, "--save", cards)
    d = json.loads(run("point", cards / "V2.koren.json", "--va", 1000, "--vg", -2, "--json").stdout)
    assert len(d["warnings"]) == 1 and "va 1000 V is outside the plate voltages traced" in d["warnings"][0]
    r = run("point", cards / "V2.koren.json", "--va", 1000, "--vg", -2)
    assert "warning:" in r.stderr and "extrapolating" in r.stderr


def test_plot_writes_one_png_per_unit(lot, tmp_path):
    # issue section 6: --plot DIR writes one PNG per unit (PNG signature: the PNG spec)
    path, _ = lot
    plots = tmp_path / "plots"
    r = run("fit", path, "--plot", plots)
    assert r.exit_code == 0
    pngs = sorted(plots.glob("*.png"))
    assert [p.name for p in pngs] == ["V1_A.koren.png", "V1_B.koren.png", "V2.koren.png"]
    for p in pngs:
        data = p.read_bytes()
        assert data[:8] == PNG_MAGIC and len(data) > 5000


# --------------------------------------------------------------------------
# exit codes
# --------------------------------------------------------------------------


def test_bad_input_exits_1_with_file_line_column_on_stderr(tmp_path):
    # issue section 6: 1 for an input error; section 1: the message names file, line, column
    p = tmp_path / "bad.csv"
    p.write_text("# INVENTED\nva,vg,ia_ma\n100,0,1\n200,0,abc\n100,-1,0.4\n")
    for extra in ([], ["--json"]):
        r = run("fit", p, *extra)
        assert r.exit_code == 1
        assert f"{p}, line 4, column 3 ('ia_ma'): non-numeric value 'abc'" in r.stderr  # column: index and header text
        assert r.stdout == ""  # nothing half-written on stdout, JSON or not


def test_skip_bad_reports_skipped_rows_and_fits_the_rest(lot, tmp_path):
    # issue section 1: by default a bad file is rejected; the option skips bad rows and
    # reports each one
    path, units = lot
    text = path.read_text().splitlines()
    line = int(units[1].lines[5])  # a row of V1:B
    text[line - 1] = text[line - 1].rsplit(",", 1)[0] + ",oops"
    bad = tmp_path / "lot_bad.csv"
    bad.write_text("\n".join(text) + "\n")
    assert run("fit", bad).exit_code == 1
    r = run("fit", bad, "--skip-bad", "--json")
    assert r.exit_code == 0
    doc = json.loads(r.stdout)
    assert doc["skipped"] == [f"{bad}, line {line}, column 5 ('ia_ma'): non-numeric value 'oops'"]
    assert f"skipped: {bad}, line {line}" in r.stderr
    assert [f["n_points"] for f in doc["fits"]] == [units[0].n_points, units[1].n_points - 1, units[2].n_points]


def test_failed_fit_exits_2_and_says_why(tmp_path):
    # issue section 6: 2 when one or more fits failed.  Random currents (invented
    # garbage) cannot be described by a triode model.
    rng = np.random.default_rng(4)
    rows = [f"{va:g},{vg:g},{rng.uniform(0, 10):.4f}" for vg in (0, -1, -2, -3) for va in range(20, 401, 20)]
    p = tmp_path / "junk.csv"
    p.write_text("# INVENTED garbage\nva,vg,ia_ma\n" + "\n".join(rows) + "\n")
    r = run("fit", p, "--json")
    assert r.exit_code == 2
    (f,) = json.loads(r.stdout)["fits"]
    assert f["converged"] is False and f["failure"] and f["params"] == {}
    t = run("fit", p)
    assert t.exit_code == 2 and "FAILED" in t.stdout and "1 unit(s) without a good fit" in t.stdout


@pytest.mark.parametrize("args,message", [
    (["--fix", "zz=1"], r"--fix 'zz=1': no model being fitted has a parameter 'zz'"),
    (["--fix", "n=1.5"], r"no model being fitted has a parameter 'n'"),  # koren has no n
    (["--fix", "mu"], r"--fix 'mu': expected NAME=VALUE"),
    (["--fix", "mu=abc"], r"--fix 'mu=abc': 'abc' is not a number"),
])
def test_bad_fix_exits_1(lot, args, message):
    # issue section 6: a usage error exits 1 with a message naming the option
    path, _ = lot
    r = run("fit", path, *args)
    assert r.exit_code == 1
    assert re.search(message, r.stderr), r.stderr


def test_too_few_points_exits_1_naming_the_file(tmp_path):
    # issue sections 1 and 6: too few points for the model is an input error (exit 1)
    p = tmp_path / "few.csv"
    p.write_text("va,vg,ia_ma\n100,0,1\n200,0,3\n100,-1,0.4\n200,-1,2\n")
    r = run("fit", p)
    assert r.exit_code == 1
    assert re.search(re.escape(f"{p}, line 2") + r".*needs at least", r.stderr)


def test_missing_file_exits_1(tmp_path):
    # issue section 6: input error -> 1; rules.md: the message names the file
    r = run("fit", tmp_path / "absent.csv")
    assert r.exit_code == 1 and "absent.csv" in r.stderr and "cannot read file" in r.stderr


def test_bad_card_exits_1_naming_the_field(tmp_path):
    # issue section 6: input error -> 1; rules.md: the message names file and field
    p = tmp_path / "card.json"
    p.write_text(json.dumps({"format": "platebook.model-card", "version": 1, "model": "nope"}))
    r = run("point", p, "--va", 250, "--vg", -2)
    assert r.exit_code == 1 and f"{p}: field 'model': unknown model 'nope'" in r.stderr


@pytest.mark.parametrize("args", [
    ["fit", "{lot}", "--model", "bogus"],
    ["fit", "{lot}", "--floor", "7"],
    ["fit"],
    ["point", "{card}", "--va", "250"],
])
def test_usage_errors_exit_1(lot, tmp_path, args):
    # issue section 6: exit status 1 for a usage or input error (2 means a fit failed)
    path, _ = lot
    cards = tmp_path / "cards"
    run("fit", path, "--save", cards)
    args = [a.format(lot=path, card=cards / "V2.koren.json") for a in args]
    r = run(*args)
    assert "error" in r.stderr.lower()  # click (or the option parser) explains the usage error ...
    assert r.exit_code == 1  # ... but with status 1, not 2


# --------------------------------------------------------------------------
# real subprocesses: `python -m fitter`, progress bar only on a terminal
# --------------------------------------------------------------------------


def run_on_terminal(args, cwd):
    """Run ``python -m fitter ARGS`` with stdin/stdout/stderr on a pseudo-terminal."""
    pty = pytest.importorskip("pty")
    import select

    master, slave = pty.openpty()
    env = dict(os.environ, COLUMNS="100")
    proc = subprocess.Popen([sys.executable, "-m", "fitter", *map(str, args)], stdin=slave, stdout=slave,
                            stderr=slave, cwd=cwd, env=env, close_fds=True)
    os.close(slave)
    out = b""
    try:
        while True:
            ready, _, _ = select.select([master], [], [], 120)
            if not ready:
                break
            try:
                chunk = os.read(master, 65536)
            except OSError:  # the child closed the terminal
                break
            if not chunk:
                break
            out += chunk
    finally:
        proc.wait(timeout=120)
        os.close(master)
    return proc.returncode, out.decode("utf-8", "replace")


def test_python_m_fitter_json_on_a_terminal_has_no_progress_bar(lot):
    # issue section 6: a progress bar on a terminal, but none with --json.  Both runs
    # are real `python -m fitter` processes whose stdout AND stderr are a terminal, so
    # anything the bar printed would be in `out`.
    path, units = lot
    code, out = run_on_terminal(["fit", path.name, "--json"], cwd=path.parent)
    assert code == 0, out
    doc = json.loads(out)  # exactly one JSON object and nothing else
    assert [f["n_points"] for f in doc["fits"]] == [u.n_points for u in units]
    assert "fitting" not in out
    # the positive control: without --json the same terminal does show the bar
    code, out = run_on_terminal(["fit", path.name], cwd=path.parent)
    assert code == 0
    assert re.search(r"fitting\s+\[#+\]\s+3/3", out), out[:500]


def test_demo_stock_fits(tmp_path):
    # smoke test of the repository's demo stock (invented data, curves/make_demo.py); the
    # re-test file traces a tube of the stock again (for the ledger), so it is fitted apart
    files = sorted(f for f in (REPO / "curves").glob("*.csv") if not f.name.startswith("retest_"))
    assert files, "no demo files in curves/"
    r = run("fit", *files, "--model", "koren", "--json", "--jobs", "2")
    assert r.exit_code == 0, r.stdout[-2000:] + r.stderr[-2000:]
    doc = json.loads(r.stdout)
    assert len(doc["fits"]) >= 10 and all(f["converged"] for f in doc["fits"])


@pytest.mark.parametrize("fix, message", [("kp=0", "kp must lie within its bounds 1 .. 5000"),
                                          ("mu=-5", "mu must lie within its bounds 0.5 .. 500")])
def test_fix_outside_the_bounds_is_an_input_error(lot, fix, message):
    # issue section 6: exit 1 for a usage or input error; the bounds are the registry's
    # (fitter/models.py), and a value outside them cannot be a fit result
    path, _ = lot
    r = run("fit", path, "--fix", fix)
    assert r.exit_code == 1 and message in r.stderr and f"--fix '{fix}'" in r.stderr


def test_skip_bad_lists_what_it_skipped_even_when_nothing_is_left(tmp_path):
    # rules: bad input gets a clear error naming what was wrong and where
    p = tmp_path / "tiny.csv"
    p.write_text("tube,va,vg,ia_ma\nX,100,-1,1.0\nX,150,-1,2.0\nX,100,-2,x\n")
    r = run("fit", p, "--skip-bad")
    assert r.exit_code == 1
    assert f"skipped: {p}, line 4, column 4 ('ia_ma'): non-numeric value 'x'" in r.stderr
    assert "no units left to fit" in r.stderr
