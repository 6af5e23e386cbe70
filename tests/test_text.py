"""Text from files shown and written safely (fitter.text) and the InputError base."""

import csv
import io

import pytest

from fitter.errors import InputError
from fitter.text import csv_cell, plain_text, shown


def test_shown_escapes_terminal_control_sequences():
    s = shown("V1\x1b[2J\x1b]0;pwned\x07\r\nA\u202eB")
    assert "\x1b" not in s and "\x07" not in s and "\r" not in s and "\n" not in s and "\u202e" not in s
    assert s.startswith("V1\\x1b[2J")


def test_shown_leaves_printable_names_alone():
    assert shown("ECC83 Ä µ-Sektion") == "ECC83 Ä µ-Sektion"


@pytest.mark.parametrize("text", ["=1+1", "+cmd", "@SUM(A1)", "\t=1", "\r=1", "-cmd|' /C calc'!A0"])
def test_csv_cell_text_cannot_start_a_formula(text):
    # the characters that start a formula in common spreadsheets (common practice; OWASP CSV injection)
    out = csv_cell(text)
    assert out.startswith("'") and out[1:] == text


@pytest.mark.parametrize("value", [-2.5, 0, 3, "-2.5", "+4", "1e-3", "-8"])
def test_csv_cell_numbers_stay_numbers(value):
    out = csv_cell(value)
    assert out == value
    buf = io.StringIO()
    csv.writer(buf).writerow([out])
    float(buf.getvalue().strip())


@pytest.mark.parametrize("value, msg", [
    (5, "must be text"), ("", "must not be empty"), ("x" * 65, "at most 64"),
    ("A\n.control", "control character"), ("A\u202e", "control character"),
])
def test_plain_text_rejects_non_plain_names_naming_the_field(value, msg):
    with pytest.raises(InputError, match=msg) as e:
        plain_text(value, "section", file="c.json")
    assert e.value.field == "section" and e.value.file == "c.json"
    assert str(e.value).startswith("c.json: field 'section': ")


def test_input_error_names_file_line_and_column():
    e = InputError("not a number", file="a.csv", line=4, column=2)
    assert str(e) == "a.csv: line 4, column 2: not a number"
    assert e.to_dict()["line"] == 4
