"""Spreadsheet exports are read: each dialect gives exactly the plain CSV's numbers and fit.

The data are INVENTED (the ``synth`` fixture of tests/conftest.py).  The reference for
every comparison is the same data written as the plain long-layout CSV of the issue's
input specification (issue 2, section 1); the dialects are those spreadsheet programs
write (issue 8, section 5): ';' with decimal commas, tabs, quoted fields, units in the
header, CR-only line ends, a UTF-8 byte-order mark, UTF-16 "Unicode text", trailing
empty columns.
"""

from __future__ import annotations

import re

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from fitter.fit import fit_curves
from fitter.reader import CurveReadError, read_curves, read_text

PARAMS = dict(mu=21.5, ex=1.3, kg1=1180.0, kp=84.0, kvb=300.0)  # Koren's 12AU7 set, from memory (conftest)


@pytest.fixture(scope="module")
def unit(synth):
    # a 12AU7-like unit, coarse grid so that each test stays quick
    return synth("koren", PARAMS, grid_voltages=[0.0, -4.0, -8.0, -12.0, -16.0], va_max=300.0,
                 va_step=20.0, i_max=30e-3, noise=0.01, seed=11)


def rows(unit, scale=1e3):
    """(va, vg, ia in the column's unit) as the shortest round-trip decimal strings."""
    return [(repr(float(a)), repr(float(g)), repr(float(i * scale))) for a, g, i in zip(unit.va, unit.vg, unit.ia)]


def plain(unit) -> str:
    return "# INVENTED\nva,vg,ia_ma\n" + "".join(f"{a},{g},{i}\n" for a, g, i in rows(unit))


def comma(x: str) -> str:
    return x.replace(".", ",")


def read_one(tmp_path, content, name="d.csv"):
    p = tmp_path / name
    if isinstance(content, bytes):
        p.write_bytes(content)
    else:
        p.write_bytes(content.encode("utf-8"))
    res = read_curves(p)
    assert len(res.units) == 1
    return res, res.units[0]


def same_as_plain(tmp_path, unit, text, note):
    """The dialect gives the plain file's points exactly, its fit exactly, and a note."""
    _, ref = read_one(tmp_path, plain(unit), "plain.csv")
    res, got = read_one(tmp_path, text)
    order_r = np.lexsort((ref.va, ref.vg))
    order_g = np.lexsort((got.va, got.vg))
    for a in ("va", "vg", "ia"):
        np.testing.assert_array_equal(getattr(got, a)[order_g], getattr(ref, a)[order_r])
    f_ref = fit_curves(ref, "koren")
    f_got = fit_curves(got, "koren")
    assert f_ref.converged and f_got.converged
    assert f_got.params == f_ref.params  # exactly: the same numbers in, the same fit out
    assert any(re.search(note, n) for n in res.notes), res.notes
    return res, got


def test_semicolon_decimal_comma_gives_the_same_fit(tmp_path, unit):
    text = "Va (V);Vg (V);Ia (mA)\n" + "".join(f"{comma(a)};{comma(g)};{comma(i)}\n" for a, g, i in rows(unit))
    same_as_plain(tmp_path, unit, text, r"';' separators.*decimal commas|decimal commas.*';' separators")


def test_tab_separated_gives_the_same_fit(tmp_path, unit):
    text = "va\tvg\tia_ma\n" + "".join(f"{a}\t{g}\t{i}\n" for a, g, i in rows(unit))
    same_as_plain(tmp_path, unit, text, r"tab separators")


def test_quoted_fields_give_the_same_fit(tmp_path, unit):
    text = '"tube","va","vg","ia_ma"\n' + "".join(f'"X1","{a}","{g}","{i}"\n' for a, g, i in rows(unit))
    _, got = same_as_plain(tmp_path, unit, text, r"quoted fields")
    assert got.tube == "X1"


def test_quoted_decimal_commas_with_comma_separators_give_the_same_fit(tmp_path, unit):
    # some locales quote every number and keep ',' as the separator
    text = "va,vg,ia_ma\n" + "".join(f'"{comma(a)}","{comma(g)}","{comma(i)}"\n' for a, g, i in rows(unit))
    same_as_plain(tmp_path, unit, text, r"decimal commas")


@pytest.mark.parametrize("va,vg,ia,scale", [
    ("Va (V)", "Vg (V)", "Ia (mA)", 1e3),
    ("Va [V]", "Vg [V]", "Ia [mA]", 1e3),
    ("VA/V", "VG/V", "Ia (A)", 1.0),
    ("Va (V)", "Vg (V)", "Ia [µA]", 1e6),
    ("Va (V)", "Vg (V)", "Ia [μA]", 1e6),  # Greek mu, as some keyboards give
])
def test_headers_with_units_give_the_same_fit(tmp_path, unit, va, vg, ia, scale):
    text = f"{va},{vg},{ia}\n" + "".join(f"{a},{g},{i}\n" for a, g, i in rows(unit, scale))
    if scale == 1e3:
        same_as_plain(tmp_path, unit, text, r"units in the header")
    else:
        # another current unit: the same currents up to the unit conversion's rounding
        _, ref = read_one(tmp_path, plain(unit), "plain.csv")
        res, got = read_one(tmp_path, text)
        np.testing.assert_allclose(got.ia, ref.ia, rtol=1e-15, atol=0)
        assert any("units in the header" in n for n in res.notes)


def test_cr_only_line_ends_give_the_same_fit(tmp_path, unit):
    res, got = same_as_plain(tmp_path, unit, plain(unit).replace("\n", "\r"), r"CR line ends")
    # line numbers count the CR-ended lines: the first point is on line 3
    assert got.first_line() == 3


def test_utf8_byte_order_mark_gives_the_same_fit(tmp_path, unit):
    same_as_plain(tmp_path, unit, "\ufeff" + plain(unit), r"byte-order mark")


def test_utf16_unicode_text_gives_the_same_fit(tmp_path, unit):
    # a spreadsheet's "Unicode text" export: UTF-16 with a byte-order mark, tabs
    text = "va\tvg\tia_ma\r\n" + "".join(f"{a}\t{g}\t{i}\r\n" for a, g, i in rows(unit))
    same_as_plain(tmp_path, unit, text.encode("utf-16"), r"UTF-16")


def test_trailing_empty_columns_give_the_same_fit(tmp_path, unit):
    text = "va;vg;ia_ma;;\n" + "".join(f"{comma(a)};{comma(g)};{comma(i)};;\n" for a, g, i in rows(unit))
    same_as_plain(tmp_path, unit, text, r"2 trailing empty column")


def test_everything_at_once_gives_the_same_fit(tmp_path, unit):
    text = ("\ufeff# INVENTED\r" + '"Tube";"Va (V)";"Vg (V)";"Ia [mA]";\r'
            + "".join(f'"X1";{comma(a)};{comma(g)};{comma(i)};\r' for a, g, i in rows(unit)))
    same_as_plain(tmp_path, unit, text, r"byte-order mark.*CR line ends.*';' separators")


def test_wide_layout_with_unit_headers_and_decimal_commas(tmp_path):
    # the plain wide file of the reader docstring, written the spreadsheet way
    plain_wide = "va,ia_ma@vg=0,ia_ma@vg=-2.5,ia_ma@vg=-5\n50,1.2,0.1,\n100,3.9,1.4,0.2\n150,6.5,2.9,0.6\n"
    sheet = ("Va (V);Ia [mA] @ Vg=0V;Ia [mA] @ Vg=-2,5V;Ia [mA] @ Vg=-5V\n"
             "50;1,2;0,1;\n100;3,9;1,4;0,2\n150;6,5;2,9;0,6\n")
    bare = "# current: mA\nVa (V);Vg=0V;Vg=-2,5V;Vg = -5 V\n50;1,2;0,1;\n100;3,9;1,4;0,2\n150;6,5;2,9;0,6\n"
    ref = read_text(plain_wide, "p.csv").units[0]
    for text in (sheet, bare):
        res = read_text(text, "s.csv")
        got = res.units[0]
        for a in ("va", "vg", "ia"):
            np.testing.assert_array_equal(getattr(got, a), getattr(ref, a))
        assert any("decimal commas" in n for n in res.notes)


def test_wide_column_without_a_current_unit_is_explained(tmp_path):
    err = pytest.raises(CurveReadError, read_text, "Va (V);Vg=0V;Vg=-2V\n100;1;2\n", "w.csv").value
    assert re.search(r"line 1, column 2 \('Vg=0V'\): 'Vg=0V' does not say the current's unit.*# current: mA",
                     str(err)), str(err)


def test_current_header_without_unit_is_explained():
    err = pytest.raises(CurveReadError, read_text, "Va,Vg,Ia\n100,0,1\n", "u.csv").value
    assert "u.csv, line 1, column 3 ('Ia'): a header cell 'Ia' has no unit: use ia_ma, ia_a or ia_ua, " \
           "or 'Ia (mA)'" in str(err)
    assert "missing plate current" not in str(err)  # the one cause, not a second message


def test_space_separated_file_suggests_a_separator():
    err = pytest.raises(CurveReadError, read_text, "va vg ia_ma\n100 0 1\n", "s.csv").value
    assert re.search(r"s\.csv, line 1, column 1 .*only one column found in the header: separate the columns "
                     r"with ',', ';' or a tab", str(err)), str(err)


def test_row_with_another_separator_suggests_it():
    err = pytest.raises(CurveReadError, read_text, "va,vg,ia_ma\n100,0,1\n200;0;2\n100,-1,0.4\n", "m.csv").value
    assert "m.csv, line 3, column 2 ('vg'): missing value(s): expected 3 fields, found 1 (is the separator ';'?)" \
        in str(err)


def test_decimal_point_in_a_decimal_comma_file_is_refused_where_it_is():
    # 1.500 could be one and a half or fifteen hundred: refused, not guessed
    text = "va;vg;ia_ma\n100;0;1,5\n200;0;3,5\n100;-1;1.500\n200;-1;2,0\n"
    err = pytest.raises(CurveReadError, read_text, text, "c.csv").value
    assert re.search(r"c\.csv, line 4, column 3 \('ia_ma'\): '1\.500' has a decimal point in a file written "
                     r"with decimal commas", str(err)), str(err)


def test_errors_in_a_dialect_file_name_the_original_line_and_column():
    # column = the 1-based field index of the file, with the header text as written
    text = "\ufeff# INVENTED\r\r" + '"Tube";"Va (V)";"Vg (V)";"Ia [mA]";;\r' + '"X";100;0;1,5;;\r"X";200;0;abc;;\r'
    err = pytest.raises(CurveReadError, read_text, text, "e.csv").value
    assert "e.csv, line 5, column 4 ('Ia [mA]'): non-numeric value 'abc'" in str(err), str(err)


def test_value_under_an_empty_trailing_header_is_an_error():
    err = pytest.raises(CurveReadError, read_text, "va;vg;ia_ma;\n100;0;1;\n200;0;2;7\n100;-1;1;\n",
                        "t.csv").value
    assert "t.csv, line 3, column 4: unexpected extra field(s)" in str(err), str(err)


def test_spreadsheet_empty_rows_are_skipped():
    res = read_text("va;vg;ia_ma\n100;0;1\n;;\n200;0;2\n100;-1;0,5\n", "r.csv")
    np.testing.assert_array_equal(res.units[0].lines, [2, 4, 5])


# --------------------------------------------------------------------------
# fuzzing the dialect handling: nothing but the reader's own error, ever
# --------------------------------------------------------------------------

HEADERS = ["va", "Va (V)", "VA [V]", "vg", "Vg (V)", "ia_ma", "Ia [mA]", "Ia (A)", "Ia [µA]", "Ia", "tube",
           "section", "Vg=-2V", "Ia [mA] @ Vg=0V", "ia_ma@vg=-1,5", "", "Ig (mA)", "Va (kV)"]
CELLS = ["100", "0", "-1", "2,5", "2.5", "1.234,5", '"3,1"', '"x"', "", " ", "nan", "1e38", "-0,01", "T1", "A",
         '"', "#", "µ"]


@st.composite
def sheet_like(draw):
    sep = draw(st.sampled_from([",", ";", "\t"]))
    header = draw(st.lists(st.sampled_from(HEADERS), min_size=1, max_size=5))
    if draw(st.booleans()):
        header = [f'"{h}"' for h in header]
    rows = [[draw(st.sampled_from(CELLS)) if draw(st.integers(0, 3)) == 0
             else draw(st.sampled_from(["100", "200", "0", "-2", "1,5", "3.5"]))
             for _ in range(len(header) + draw(st.sampled_from([0, 0, 0, 1, -1])))]
            for _ in range(draw(st.integers(0, 8)))]
    lines = [sep.join(header)] + [sep.join(r) for r in rows]
    if draw(st.booleans()):
        lines.insert(0, draw(st.sampled_from(["# current: mA", "# tube: Q", "#"])))
    text = draw(st.sampled_from(["\n", "\r\n", "\r"])).join(lines)
    return ("\ufeff" if draw(st.booleans()) else "") + text


@settings(max_examples=200, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(text=sheet_like(), skip=st.booleans(), as_bytes=st.sampled_from(["str", "utf-8", "utf-16"]))
def test_fuzz_spreadsheet_like_text_raises_only_reader_errors(tmp_path, text, skip, as_bytes):
    # issue 8, section 8: every input gets the reader's own error or units that are sane
    try:
        if as_bytes == "str":
            res = read_text(text, "fuzz.csv", skip_bad=skip)
        else:
            p = tmp_path / "fuzz.csv"
            p.write_bytes(text.encode(as_bytes))
            res = read_curves(p, skip_bad=skip)
    except CurveReadError as e:
        assert e.issues and all(str(i) for i in e.issues)
        return
    for u in res.units:
        assert u.va.shape == u.vg.shape == u.ia.shape == u.lines.shape
        assert np.all(np.isfinite(u.va)) and np.all(np.isfinite(u.vg)) and np.all(np.isfinite(u.ia))
        assert u.n_curves >= 2
