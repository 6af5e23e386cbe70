"""Reading plate-curve files: layouts, validation messages, skipping, cleaning, fuzzing.

Expected values come from the issue's input specification (issue 2, section 1) and
from the small hand-written files below, whose every number is invented and checked
by hand.  Each validation error must name the file, the line and the column.
"""

from __future__ import annotations

import re

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from fitter.fit import FitInputError, fit_curves
from fitter.models import MODELS, get_model
from fitter.reader import (
    NEGATIVE_OFFSET_FRACTION,
    CurveReadError,
    check_for_model,
    clean_curves,
    read_curves,
    read_text,
)


def write(tmp_path, text, name="lot.csv"):
    p = tmp_path / name
    p.write_text(text)
    return p


def read_error(path, **kw) -> CurveReadError:
    with pytest.raises(CurveReadError) as info:
        read_curves(path, **kw)
    return info.value


def assert_names(err: CurveReadError, path, line, column, message):
    """The error lists an issue at ``path``, ``line`` and a column containing ``column``,
    and the printed message says where, in that order."""
    hits = [i for i in err.issues if i.file == str(path) and i.line == line
            and column is not None and i.column is not None and column in i.column
            and re.search(message, i.message)]
    assert hits, f"no issue at {path}, line {line}, column {column} matching {message!r}: {err.issues}"
    text = str(err)
    pattern = re.escape(f"{path}, line {line}, column ") + r"[^:]*" + re.escape(column) + r"[^:]*: .*" + message
    assert re.search(pattern, text), text


# --------------------------------------------------------------------------
# long layout
# --------------------------------------------------------------------------

LONG = """\
# INVENTED test data
# two units of one dual triode
Tube,Section,VA,VG,IA_mA
X1,A,100,0,1.5
X1,A,200,0,4.2
X1,A,100,-1,0.5
X1,A,200,-1,2.1
X1,B,100,0,1.4
X1,B,100,-1,0.45
"""


def test_long_layout_groups_units_and_converts_to_amperes(tmp_path):
    # issue section 1: column names case-insensitive, '#' comments, one unit per
    # (tube, section), currents in A inside the engine
    p = write(tmp_path, LONG)
    res = read_curves(p)
    assert [u.label for u in res.units] == ["X1:A", "X1:B"]
    a, b = res.units
    np.testing.assert_array_equal(a.va, [100, 200, 100, 200])
    np.testing.assert_array_equal(a.vg, [0, 0, -1, -1])
    np.testing.assert_allclose(a.ia, [1.5e-3, 4.2e-3, 0.5e-3, 2.1e-3], rtol=1e-15)
    np.testing.assert_array_equal(a.lines, [4, 5, 6, 7])  # header is line 3 (after 2 comments)
    np.testing.assert_array_equal(b.lines, [8, 9])
    assert a.source == str(p) and a.n_curves == 2 and b.section == "B"


@pytest.mark.parametrize("column,factor", [("ia_ma", 1e-3), ("ia_a", 1.0), ("ia_ua", 1e-6)])
def test_each_current_unit_is_scaled_once(tmp_path, column, factor):
    # issue section 1: plate current as exactly one of ia_ma, ia_a or ia_ua
    p = write(tmp_path, f"va,vg,{column}\n100,0,2.5\n100,-1,1.0\n")
    u = read_curves(p).units[0]
    np.testing.assert_allclose(u.ia, [2.5 * factor, 1.0 * factor], rtol=1e-15)


def test_tube_defaults_to_the_file_stem_and_grid_current_is_read(tmp_path):
    # issue section 1: tube optional (file name's stem if absent); grid current optional
    p = write(tmp_path, "va,vg,ia_ma,ig_ua\n100,0,1.0,3\n100,-1,0.4,0\n", name="V42-sheet.csv")
    u = read_curves(p).units[0]
    assert u.tube == "V42-sheet" and u.section is None
    np.testing.assert_allclose(u.ig, [3e-6, 0.0])


def test_several_files_are_read_together(tmp_path):
    # issue section 6: `platebook fit FILE...` -- units of several files, in file order
    p1 = write(tmp_path, LONG, "a.csv")
    p2 = write(tmp_path, "va,vg,ia_ma\n100,0,1\n100,-1,0.4\n", "b.csv")
    res = read_curves([p1, p2])
    assert [u.label for u in res.units] == ["X1:A", "X1:B", "b"]


# --------------------------------------------------------------------------
# validation: every error of issue section 1 names file, line and column
# --------------------------------------------------------------------------


@pytest.mark.parametrize("header,missing", [
    ("vg,ia_ma", "va"),
    ("va,ia_ma", "vg"),
    ("va,vg", "plate current"),
])
def test_missing_required_column(tmp_path, header, missing):
    # issue section 1: va, vg and the plate current are required.  The column does
    # not exist, so the message names it in its text and gives the header line.
    p = write(tmp_path, f"# INVENTED\n{header}\n1,2\n")
    err = read_error(p)
    issue = next(i for i in err.issues if "missing" in i.message)
    assert issue.file == str(p) and issue.line == 2
    assert missing in issue.message
    assert f"{p}, line 2" in str(err)


def test_duplicate_column(tmp_path):
    # issue section 1: duplicate columns are an error
    p = write(tmp_path, "va,vg,VA,ia_ma\n1,2,3,4\n")
    # the column is named as the file writes it (its 1-based index and header text)
    assert_names(read_error(p), p, 1, "3 ('VA')", r"duplicate column 'va'")


@pytest.mark.parametrize("header,col,message", [
    ("va,vg,ia_kA", "3 ('ia_kA')", r"unknown current unit 'ka'"),
    ("va,vg,ia_ma,ig_mv", "4 ('ig_mv')", r"unknown current unit 'mv'"),
    ("va,vg,ia_ma,temperature", "4 ('temperature')", r"unknown column"),
])
def test_unknown_unit_or_column(tmp_path, header, col, message):
    # issue section 1: unknown-unit columns are an error
    p = write(tmp_path, f"{header}\n1,2,3,4\n")
    assert_names(read_error(p), p, 1, col, message)


def test_plate_current_in_two_units_is_refused(tmp_path):
    # issue section 1: plate current as exactly ONE of ia_ma, ia_a, ia_ua
    p = write(tmp_path, "va,vg,ia_ma,ia_ua\n100,0,1,1000\n")
    assert_names(read_error(p), p, 1, "3 ('ia_ma'), 4 ('ia_ua')", r"more than one column")


@pytest.mark.parametrize("cell,message", [
    ("abc", r"non-numeric value 'abc'"),
    ("1.2.3", r"non-numeric value '1\.2\.3'"),
    ("", r"empty value"),
    ("nan", r"not finite"),
    ("NaN", r"not finite"),
    ("inf", r"not finite"),
    ("-Infinity", r"not finite"),
])
@pytest.mark.parametrize("column", ["va", "vg", "ia_ma"])
def test_bad_values_are_located(tmp_path, cell, message, column):
    # issue section 1: non-numeric, NaN or infinite values; the bad cell is on line 4
    rows = {"va": ["100", "200", "100"], "vg": ["0", "0", "-1"], "ia_ma": ["1.0", "3.0", "0.4"]}
    rows[column][1] = cell
    body = "\n".join(",".join(rows[c][i] for c in ("va", "vg", "ia_ma")) for i in range(3))
    p = write(tmp_path, f"# INVENTED\nva,vg,ia_ma\n{body}\n")
    assert_names(read_error(p), p, 4, column, message)


def test_every_error_of_a_file_is_listed(tmp_path):
    # issue section 1: "a bad file is rejected with all of its errors listed"
    p = write(tmp_path, "va,vg,ia_ma\nx,0,1\n100,y,1\n100,-1,z\n200,-1,1\n")
    err = read_error(p)
    # columns by 1-based index and header text
    assert [(i.line, i.column) for i in err.issues] == [(2, "1 ('va')"), (3, "2 ('vg')"), (4, "3 ('ia_ma')")]
    assert str(err).startswith("3 errors in input")


def test_row_with_the_wrong_number_of_fields(tmp_path):
    p = write(tmp_path, "va,vg,ia_ma\n100,0,1\n100,-1\n200,0,2,9\n200,-1,1\n")
    err = read_error(p)
    assert_names(err, p, 3, "ia_ma", r"expected 3 fields, found 2")
    assert_names(err, p, 4, "4", r"expected 3 fields, found 4")


def test_negative_current_beyond_the_offset_is_an_error(tmp_path):
    # issue section 1: negative currents beyond a small instrument offset are an
    # error.  Largest current 10 mA -> offset allowed 0.5 % = 0.05 mA (the reader's
    # documented NEGATIVE_OFFSET_FRACTION).
    assert NEGATIVE_OFFSET_FRACTION == pytest.approx(0.005)
    p = write(tmp_path, "va,vg,ia_ma\n100,0,10\n100,-1,-0.2\n200,-1,3\n")
    assert_names(read_error(p), p, 3, "ia_ma", r"negative plate current -0\.2 mA is beyond")


def test_small_negative_current_is_clipped_with_a_note(tmp_path):
    # issue section 1: "clip small offsets to zero and say so"
    p = write(tmp_path, "va,vg,ia_ma\n100,0,10\n100,-1,-0.02\n200,-1,3\n")
    res = read_curves(p)
    np.testing.assert_array_equal(res.units[0].ia, [10e-3, 0.0, 3e-3])
    assert any("clipped to zero" in n and str(p) in n for n in res.notes), res.notes


def test_unit_with_one_grid_curve(tmp_path):
    # issue section 1: a unit with fewer than 2 grid curves is an error (mu cannot be
    # identified); the issue points at the unit's first line and the vg column
    p = write(tmp_path, "tube,va,vg,ia_ma\nOK,100,0,1\nOK,100,-1,0.4\nONE,100,-1,1\nONE,200,-1,2\n")
    err = read_error(p)
    assert_names(err, p, 4, "vg", r"unit 'ONE' has 1 grid curve")
    assert len(err.issues) == 1


def test_too_few_points_for_the_model(tmp_path):
    # issue section 1: too few points to identify the chosen model.  koren has 5
    # parameters; 6 points cannot identify them.
    p = write(tmp_path, "va,vg,ia_ma\n# INVENTED\n100,0,1\n200,0,3\n300,0,5\n100,-1,.4\n200,-1,2\n300,-1,4\n")
    u = read_curves(p).units[0]
    issue = check_for_model(u, get_model("koren"))
    assert issue is not None and issue.file == str(p) and issue.line == 3
    assert re.search(r"6 point\(s\); the koren model \(5 parameters\) needs at least \d+", issue.message)
    assert str(issue).startswith(f"{p}, line 3")
    # the fitter refuses it the same way
    with pytest.raises(FitInputError, match=re.escape(f"{p}, line 3") + r".*needs at least"):
        fit_curves(u, "koren")
    # the power law (4 parameters) needs fewer points, but still more than 6
    assert check_for_model(u, get_model("power")) is not None


def test_unreadable_and_non_utf8_files(tmp_path):
    # rules.md: bad input always gets a clear error naming what was wrong and where
    err = read_error(tmp_path / "nope.csv")
    assert "nope.csv" in str(err) and "cannot read file" in str(err)
    p = tmp_path / "bin.csv"
    p.write_bytes(b"va,vg,ia_ma\n100,0,1\n\xff\xfe\x00\n")
    err = read_error(p)
    assert err.issues[0].line == 3 and "not UTF-8" in err.issues[0].message


def test_empty_file(tmp_path):
    # issue section 1: a header row is required; a file of comments only has none
    p = write(tmp_path, "# only a comment\n\n")
    err = read_error(p)
    assert f"{p}: no header row" in str(err)


# --------------------------------------------------------------------------
# skipping bad rows
# --------------------------------------------------------------------------


def test_skip_bad_reports_each_skipped_row(tmp_path):
    # issue section 1: "An option skips bad rows and reports each one"
    p = write(tmp_path, (
        "tube,va,vg,ia_ma\n"
        "G,100,0,1\nG,200,0,x\nG,100,-1,0.4\nG,200,-1,nan\nG,300,-1,3\n"
        "B,100,-1,1\nB,200,-1,bad\n"))
    res = read_curves(p, skip_bad=True)
    assert [u.label for u in res.units] == ["G"]
    np.testing.assert_array_equal(res.units[0].lines, [2, 4, 6])
    where = sorted((i.line, i.column) for i in res.skipped)
    # line 3 and 5: bad values; line 8: bad value; unit B left with one curve (line 7)
    assert where == [(3, "4 ('ia_ma')"), (5, "4 ('ia_ma')"), (7, "vg"), (8, "4 ('ia_ma')")]
    assert all(i.file == str(p) for i in res.skipped)
    # without the option the same file is rejected with those errors
    err = read_error(p)
    assert {(i.line, i.column) for i in err.issues} >= {(3, "4 ('ia_ma')"), (5, "4 ('ia_ma')"), (8, "4 ('ia_ma')")}


# --------------------------------------------------------------------------
# wide layout
# --------------------------------------------------------------------------

WIDE = """\
# INVENTED: digitised "typical" curves of a made-up sheet
# tube: SHEET-7
# section: B
va,ia_mA@vg=0,ia_mA@vg=-2,ia_mA@vg=-4
50,1.2,,
100,3.9,1.4,
150,6.0,2.9,0.6
"""


def test_wide_layout_with_empty_cells_and_directives(tmp_path):
    # README / reader docstring: va column, then ia_<unit>@vg=<V> per curve; an empty
    # cell means no point there; '# tube:' and '# section:' name the unit
    p = write(tmp_path, WIDE)
    res = read_curves(p)
    (u,) = res.units
    assert u.tube == "SHEET-7" and u.section == "B"
    pts = sorted(zip(u.vg.tolist(), u.va.tolist(), (u.ia * 1e3).round(9).tolist(), u.lines.tolist()))
    assert pts == [
        (-4.0, 150.0, 0.6, 7),
        (-2.0, 100.0, 1.4, 6), (-2.0, 150.0, 2.9, 7),
        (0.0, 50.0, 1.2, 5), (0.0, 100.0, 3.9, 6), (0.0, 150.0, 6.0, 7),
    ]


def test_wide_layout_without_directive_uses_the_stem(tmp_path):
    # reader docstring: without '# tube:' the unit is named after the file's stem (as in
    # the long layout, issue section 1); ia_ua is micro-amperes
    p = write(tmp_path, "va,ia_ua@vg=-1.5,ia_ua@vg=0\n100,20,90\n", name="sheet9.csv")
    (u,) = read_curves(p).units
    assert u.tube == "sheet9" and u.section is None
    np.testing.assert_allclose(sorted(u.ia), [20e-6, 90e-6])


@pytest.mark.parametrize("header,col,message", [
    ("va,ia_ma@vg=0,ia_xx@vg=-2", "3 ('ia_xx@vg=-2')", r"unknown current unit 'xx'"),
    ("va,ia_ma@vg=0,ia_ma@vg=zero", "3 ('ia_ma@vg=zero')", r"grid voltage 'zero' is not a finite number"),
    ("va,ia_ma@vg=-2,ia_ma@vg=-2.0", "3 ('ia_ma@vg=-2.0')", r"duplicate curve for vg = -2 V"),
    ("va,ia_ma@vg=0,vg", "3 ('vg')", r"every column after 'va'"),
    ("vg,ia_ma@vg=0,ia_ma@vg=-1", "1 ('vg')", r"first column must be 'va'"),
])
def test_wide_layout_header_errors(tmp_path, header, col, message):
    # issue section 1 (missing, duplicate or unknown-unit columns), for the wide header
    p = write(tmp_path, f"{header}\n100,1,2\n")
    assert_names(read_error(p), p, 1, col, message)


def test_wide_layout_cell_errors(tmp_path):
    # issue section 1: non-numeric or infinite values, located by line and curve column
    p = write(tmp_path, "va,ia_ma@vg=0,ia_ma@vg=-2\n50,1.2,x\n100,inf,1\n150,6,2\n")
    err = read_error(p)
    assert_names(err, p, 2, "ia_ma@vg=-2", r"non-numeric value 'x'")
    assert_names(err, p, 3, "ia_ma@vg=0", r"not finite")


def test_wide_layout_with_one_curve_is_refused(tmp_path):
    # issue section 1: fewer than 2 grid curves, in the wide layout
    p = write(tmp_path, "va,ia_ma@vg=-1\n100,1\n200,3\n")
    assert_names(read_error(p), p, 2, "vg", r"1 grid curve")


# --------------------------------------------------------------------------
# cleaning: its own pure step
# --------------------------------------------------------------------------


def test_cleaning_sorts_averages_duplicates_and_drops_negative_plate_voltage():
    # issue section 1: sort; average duplicate points, with a note; drop points outside
    # the model's domain (va < 0), with a note
    text = "va,vg,ia_ma\n200,0,4\n100,-1,1\n100,-1,3\n-5,-1,0\n100,0,2\n"
    (u,) = read_text(text, "mem.csv").units
    c = clean_curves(u, MODELS["koren"])
    np.testing.assert_array_equal(c.vg, [-1, 0, 0])
    np.testing.assert_array_equal(c.va, [100, 100, 200])
    np.testing.assert_allclose(c.ia, [2e-3, 2e-3, 4e-3])  # (1 + 3)/2 mA averaged
    notes = " | ".join(c.notes)
    assert "negative plate voltage dropped" in notes and "1 point(s)" in notes
    assert "averaged" in notes and "1 duplicate row" in notes
    # pure: the input is untouched
    assert u.va.size == 5 and u.notes == ()


def test_clean_data_get_no_notes():
    # issue section 1: cleaning notes say what changed, so unchanged data get none
    (u,) = read_text("va,vg,ia_ma\n100,0,2\n200,0,4\n100,-1,1\n", "mem.csv").units
    assert clean_curves(u).notes == ()


# --------------------------------------------------------------------------
# fuzzing: the reader raises its own error and nothing else
# --------------------------------------------------------------------------

CELLS = st.one_of(
    st.sampled_from(["0", "-0", "1", "-1", "1e308", "1e400", "-1e400", "nan", "inf", "", " ", "x",
                     "1_0", "0x10", "1e-320", "A", "B", "\t3", "--1", "-50"]),
    st.floats(allow_nan=True, allow_infinity=True).map(repr),
    st.text(max_size=4),
)
GOOD = {  # plausible cells per column, so that many fuzzed files are read successfully
    "va": st.integers(0, 400).map(str),
    "vg": st.sampled_from(["0", "-1", "-2", "-0.5"]),
    "tube": st.sampled_from(["T1", "T2", ""]),
    "section": st.sampled_from(["A", "B", ""]),
}
GOOD_CURRENT = st.floats(-0.05, 20.0, allow_nan=False).map(lambda x: f"{x:.4g}")


@st.composite
def csv_like(draw):
    """Text that looks like a curve file, mostly valid with a few bad cells, in either
    layout, so that the fuzzing reaches the validation and grouping code."""
    if draw(st.booleans()):
        vgs = draw(st.lists(st.sampled_from(["0", "-1", "-2", "-2.0", "1e400", "x", ""]), min_size=1, max_size=4))
        units = st.sampled_from(["ma", "ua", "a", "x"])
        header = ["va"] + [f"ia_{draw(units)}@vg={v}" for v in vgs]
    else:
        extra = draw(st.lists(st.sampled_from(["tube", "section", "ig_ua", "ia_a", "foo", "va", "ig_x"]),
                              max_size=2))
        header = draw(st.permutations(["va", "vg", "ia_ma"] + extra))
    if draw(st.integers(0, 9)) == 0:
        header = [draw(st.sampled_from(["VA", "", "ia_ma@vg=", "Ia_mA"])) if i == 0 else h
                  for i, h in enumerate(header)]

    def cell(name):
        if draw(st.integers(0, 19)) == 0:
            return draw(CELLS)
        if name.startswith("ia_ma@") or name.startswith("ia_ua@"):
            return draw(st.one_of(GOOD_CURRENT, st.just("")))
        return draw(GOOD.get(name, GOOD_CURRENT))

    width = len(header) + (draw(st.sampled_from([-1, 1])) if draw(st.integers(0, 9)) == 0 else 0)
    n = draw(st.integers(0, 15))
    rows = [[cell(header[j] if j < len(header) else "x") for j in range(max(width, 0))] for _ in range(n)]
    lines = [",".join(header)] + [",".join(r) for r in rows]
    if draw(st.booleans()):
        lines.insert(0, draw(st.sampled_from(["# tube: Q", "# section:", "#", "# tube:   "])))
    return draw(st.sampled_from(["\n", "\r\n"])).join(lines)


def _only_reader_errors(call):
    try:
        res = call()
    except CurveReadError as e:
        assert e.issues and all(str(i) for i in e.issues)
        return
    for u in res.units:
        # a unit that was read is sane: finite SI arrays of equal length, >= 2 curves
        assert u.va.shape == u.vg.shape == u.ia.shape
        assert np.all(np.isfinite(u.va)) and np.all(np.isfinite(u.vg)) and np.all(np.isfinite(u.ia))
        assert u.n_curves >= 2


FUZZ = settings(max_examples=200, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])


@FUZZ
@given(text=st.text(max_size=300), skip=st.booleans())
def test_fuzz_arbitrary_text(text, skip):
    # issue section 8: arbitrary text never raises anything but the reader's own error
    _only_reader_errors(lambda: read_text(text, "fuzz.csv", skip_bad=skip))


@FUZZ
@given(text=csv_like(), skip=st.booleans())
def test_fuzz_csv_like_text(text, skip):
    # issue section 8, on text close to real files (reaches validation and grouping)
    _only_reader_errors(lambda: read_text(text, "fuzz.csv", skip_bad=skip))


@FUZZ
@given(data=st.binary(max_size=300))
def test_fuzz_arbitrary_bytes_in_a_file(tmp_path, data):
    # issue section 8: arbitrary bytes in a file (not UTF-8, NUL bytes ...) too
    p = tmp_path / "fuzz.csv"
    p.write_bytes(data)
    _only_reader_errors(lambda: read_curves(p))


# --------------------------------------------------------------------------
# the fast column-wise path and the row-by-row path agree
# --------------------------------------------------------------------------


def test_fast_and_row_by_row_paths_give_the_same_units(tmp_path, monkeypatch, synth, write_long):
    # the row-by-row path is the reference (it is what locates every error); the fast
    # path must give exactly its numbers, line numbers and notes
    import fitter.reader as reader

    units = [synth("koren", dict(mu=21.5, ex=1.3, kg1=1180.0, kp=84.0, kvb=300.0), grid_voltages=[0, -4, -8],
                   va_step=1.0, seed=s, tube=f"U{s}", section="AB"[s % 2]) for s in range(3)]
    p = write_long(tmp_path / "lot.csv", units)
    text = p.read_text().splitlines()
    text[5] = text[5].rsplit(",", 1)[0] + ",-0.0001"  # a small offset reading: clipped, with a note
    p.write_text("\n".join(text) + "\n")
    taken = []
    real = reader._fast_columns
    monkeypatch.setattr(reader, "_fast_columns", lambda *a, **k: taken.append(real(*a, **k)) or taken[-1])
    fast = read_curves(p)
    assert taken and taken[0] is not None  # this file did go the fast way
    monkeypatch.setattr(reader, "_fast_columns", lambda *a, **k: None)
    slow = read_curves(p)
    assert [u.label for u in fast.units] == [u.label for u in slow.units] == ["U0:A", "U1:B", "U2:A"]
    for f, s in zip(fast.units, slow.units):
        for a in ("va", "vg", "ia", "lines"):
            np.testing.assert_array_equal(getattr(f, a), getattr(s, a))
        assert f.notes == s.notes
    assert fast.notes == slow.notes and any("clipped" in n for n in fast.notes)


def test_comment_and_blank_lines_inside_the_data_keep_line_numbers():
    # such files take the row-by-row path; line numbers still count every line
    text = "va,vg,ia_ma\n100,0,2\n# a remark\n\n200,0,4\n100,-1,1\n"
    (u,) = read_text(text, "c.csv").units
    np.testing.assert_array_equal(u.lines, [2, 5, 6])
