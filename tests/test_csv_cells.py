"""Spreadsheets: no cell of a CSV Platebook writes can start a formula.

A cell starting with ``=``, ``+``, ``-``, ``@``, a tab or a carriage return is run as a
formula by common spreadsheets (common practice; the OWASP note on CSV injection lists
the same characters).  Every text cell goes through :func:`fitter.text.csv_cell`; numbers,
negative ones included, stay numbers.  Each file is read back with Python's csv module.

Units are invented, with Koren's published 12AU7 set (from memory of Koren's table,
Glass Audio 8(5), 1996, rev. 2003) scaled a little per unit.
"""

from __future__ import annotations

import csv
import io

import numpy as np
import pytest
from click.testing import CliRunner

from fitter.card import save_card
from fitter.cli import main
from fitter.export import ExportError, curve_family, curves_csv
from fitter.reader import read_text
from fitter.triode import FittedTriode

AU7 = dict(mu=21.5, ex=1.3, kg1=1180.0, kp=84.0, kvb=300.0)  # Koren's table, from memory
RANGE = {"va": (0.0, 400.0), "vg": (-20.0, 0.0), "ia": (0.0, 0.04)}
FORMULA_START = tuple("=+-@\t\r")

#: tube names a spreadsheet would run as formulas
HOSTILE = ["=HYPERLINK(\"http://x\",\"y\")", "+1+2", "-2+3", "@SUM(A1)", "=cmd|' /C calc'!A0", "D;=E"]


def run(*args):
    return CliRunner().invoke(main, [str(a) for a in args])


def is_number(cell: str) -> bool:
    try:
        float(cell)
    except ValueError:
        return False
    return True


def assert_no_formula(rows):
    for row in rows:
        for cell in row:
            if cell and cell.startswith(FORMULA_START):
                assert is_number(cell), f"cell {cell!r} would start a formula"


@pytest.fixture
def stock(tmp_path):
    folder = tmp_path / "cards"
    folder.mkdir()
    for k, tube in enumerate(HOSTILE + ["N1", "N2"]):
        p = dict(AU7, kg1=AU7["kg1"] * (1 + 0.01 * k))
        save_card(folder / f"c{k}.json", FittedTriode("koren", p, tube=tube, valid_range=RANGE))
    return folder


def test_match_csv_text_cells_cannot_start_a_formula(stock, tmp_path):
    out = tmp_path / "labels.csv"
    r = run("match", stock, "--va", "250", "--vg", "-8.5", "--tolerance", "10", "--csv", out)
    assert r.exit_code == 0, r.output
    rows = list(csv.reader(io.StringIO(out.read_text())))
    header, body = rows[0], rows[1:]
    assert_no_formula(rows)
    tubes = [row[header.index("tube")] for row in body]
    # each hostile name is there, kept as text behind an apostrophe (or unchanged if safe)
    assert sorted(t.removeprefix("'") for t in tubes) == sorted(HOSTILE + ["N1", "N2"])
    assert "'=HYPERLINK(\"http://x\",\"y\")" in tubes and "'@SUM(A1)" in tubes


def test_match_csv_numbers_stay_numbers_negative_ones_included(stock, tmp_path):
    out = tmp_path / "labels.csv"
    r = run("match", stock, "--va", "250", "--vg", "-8.5", "--tolerance", "10", "--csv", out)
    assert r.exit_code == 0, r.output
    # QUOTE_NONNUMERIC reading turns every unquoted cell into a float: numbers were
    # written unquoted, text quoted (so a ';' in a name cannot split a cell either)
    rows = list(csv.reader(io.StringIO(out.read_text()), quoting=csv.QUOTE_NONNUMERIC))
    header = rows[0]
    for row in rows[1:]:
        d = dict(zip(header, row))
        assert d["vg_v"] == -8.5 and d["va_v"] == 250.0  # the position given on the command line
        assert isinstance(d["ia_ma"], float) and d["ia_ma"] > 0
        assert isinstance(d["tube"], str) and isinstance(d["unit"], str)
    text = out.read_text()
    assert ",-8.5," in text and "\"D;=E\"" in text


def test_curve_csv_names_cannot_start_a_formula_and_numbers_stay_numbers():
    t = FittedTriode("koren", AU7, tube="=1+1", section="@A", valid_range=RANGE)
    text = curves_csv(curve_family(t, [0.0, 100.0], [-4.0, 0.0]), card="cards/x.json")
    rows = [r for r in csv.reader(io.StringIO(text)) if r and not r[0].startswith("#")]
    assert rows[0] == ["tube", "section", "va", "vg", "ia_ma"]
    assert_no_formula(rows)
    assert {(r[0], r[1]) for r in rows[1:]} == {("'=1+1", "'@A")}
    vg = sorted({float(r[3]) for r in rows[1:]})
    assert vg == [-4.0, 0.0] and all(is_number(r[2]) and is_number(r[4]) for r in rows[1:])
    # and Platebook's own reader still reads the file (the name keeps its apostrophe)
    res = read_text(text, file="x.csv")
    assert res.units[0].tube == "'=1+1" and res.units[0].n_points == 4


def test_curve_csv_card_comment_is_one_cell_on_one_line():
    t = FittedTriode("koren", AU7, tube="V7", valid_range=RANGE)
    text = curves_csv(curve_family(t, [100.0], [-1.0]), card="a,=1+1;\"b\n=2+2\rc.json")
    lines = text.split("\n")
    assert lines[1].startswith("# card: ") and len(lines) == 5  # 2 comments, header, 1 row, ""
    rows = list(csv.reader(io.StringIO(text)))
    assert len(rows[1]) == 1 and ";" not in rows[1][0] and '"' not in rows[1][0]
    assert_no_formula(rows)


@pytest.mark.parametrize("name", ["a;b", "a,b", "a\"b", "a\tb", "a\nb"])
def test_curve_csv_refuses_names_that_would_split_a_cell(name):
    t = FittedTriode("koren", AU7, tube="V7", valid_range=RANGE)
    with pytest.raises(ExportError, match="cannot go in a CSV cell"):
        curves_csv(curve_family(t, [100.0], [-1.0], tube=name))


def test_cli_curve_csv_with_a_formula_name(tmp_path):
    card = save_card(tmp_path / "c.json", FittedTriode("koren", AU7, tube="V7", valid_range=RANGE))
    out = tmp_path / "curves.csv"
    r = run("export", card, "--format", "csv", "--va", "0:200:100", "--vg", "-2,0", "--name", "-A1+1", "-o", out)
    assert r.exit_code == 0, r.output
    rows = [r for r in csv.reader(io.StringIO(out.read_text())) if r and not r[0].startswith("#")]
    assert_no_formula(rows)
    assert {r[0] for r in rows[1:]} == {"'-A1+1"}
    np.testing.assert_allclose(sorted({float(r[3]) for r in rows[1:]}), [-2.0, 0.0])
