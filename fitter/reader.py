"""Reading plate-curve files: the long and the wide CSV layouts, with validation.

Long layout: one row per measured point, header row, ``#`` comment lines::

    # invented example
    tube,section,va,vg,ia_ma
    V12,A,100,-1.0,0.52

Columns (case-insensitive): ``va`` [V] and ``vg`` [V] required; the plate current as
exactly one of ``ia_ma``, ``ia_a``, ``ia_ua``; optional ``tube`` (default: the file
name's stem), ``section``, and grid current as one of ``ig_ma``, ``ig_a``, ``ig_ua``.

Wide layout (as digitising a datasheet plot tends to give): a ``va`` column, then one
plate-current column per grid curve, named ``ia_<unit>@vg=<value>``::

    # tube: 6XY-sheet
    # section: A
    va,ia_ma@vg=0,ia_ma@vg=-2,ia_ma@vg=-4
    50,1.2,0.1,
    100,3.9,1.4,0.2

An empty cell means that curve has no point at that plate voltage.  ``# tube:`` and
``# section:`` comment lines name the unit (default: the file's stem, no section).

Spreadsheet exports are read as well, and what was recognised is reported as a note
(the "dialect"): ``;`` or tab separators, decimal commas (``0,52``; then a cell with a
decimal point is refused as ambiguous), quoted fields, headers carrying their unit
(``Va (V)``, ``Vg [V]``, ``Ia [mA]``, ``Ia (A)``, ``Ia [µA]``, ``Ig/mA``; in the wide
layout ``Ia [mA] @ Vg=-4V``, ``Vg=-4,5V (mA)``, or bare ``Vg=-4V`` columns with a
``# current: mA`` line above the header), CR-only line ends, a UTF-8 byte-order mark,
UTF-16 text, and trailing empty columns.  A file in any of these forms gives exactly
the numbers of the same data written as plain CSV.

Everything is converted to SI (V, A) here, once.  Errors name the file, the line
and the column (its 1-based field index in the file, with the header cell's text);
by default every error of a file is collected and the file is rejected with all of
them (:class:`CurveReadError`); with ``skip_bad=True`` bad rows are dropped and each
one is reported instead.

Speed: a long-layout file is first parsed column-wise by numpy's C reader
(``np.loadtxt``).  Only when that finds anything wrong (a bad cell, a row of the wrong
width, a comment or blank line inside the data) is the file read again row by row,
which is what finds and locates every problem.  A file with more data rows than
``max_rows`` (default :data:`DEFAULT_MAX_ROWS`, or the ``PLATEBOOK_MAX_ROWS``
environment variable) is refused before it is parsed; so is one larger than
``max_rows`` x :data:`MAX_BYTES_PER_ROW` bytes, checked before it is read.
"""

from __future__ import annotations

import codecs
import csv
import functools
import io
import os
import re
import sys
import warnings
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Iterable

import numpy as np

from .errors import InputError
from .text import plain_text, shown

__all__ = [
    "CurveSet",
    "ReadIssue",
    "CurveReadError",
    "ReadResult",
    "read_curves",
    "read_text",
    "clean_curves",
    "check_for_model",
    "check_data",
    "data_notes",
    "robust_full_scale",
    "max_rows_limit",
    "NEGATIVE_OFFSET_FRACTION",
    "DEFAULT_MAX_ROWS",
    "MAX_ROWS_ENV",
]

#: Negative plate currents down to this fraction of the file's largest current are
#: taken as instrument offset and clipped to zero (with a note); below it they are an
#: error.  0.5 % of full scale is a typical zero error of a tracer's current range
#: (common practice).
NEGATIVE_OFFSET_FRACTION = 0.005
#: ...but never less than this [A].
NEGATIVE_OFFSET_MIN = 2e-6

#: Data rows a file may have before it is refused (a tracer run is a few thousand
#: points; a whole production lot a few hundred thousand).  The environment variable
#: MAX_ROWS_ENV, the ``max_rows`` argument and ``platebook fit --max-rows`` change it.
DEFAULT_MAX_ROWS = 5_000_000
MAX_ROWS_ENV = "PLATEBOOK_MAX_ROWS"
#: A file larger than max_rows x this is refused before it is read: a long-layout row
#: ("T1,A,250.0,-2.5,1.2345678") is 20-60 bytes, so this leaves room for long names
#: and wide rows while keeping the memory a file can take bounded.
MAX_BYTES_PER_ROW = 256

_SCALE = {"a": 1.0, "ma": 1e-3, "ua": 1e-6}
_KNOWN = ("va", "vg", "ia_ma", "ia_a", "ia_ua", "ig_ma", "ig_a", "ig_ua", "tube", "section")
_KEYS = ("tube", "section")
#: "va", "Va (V)", "VA [V]", "va/V", "Ia [mA]", "ia_ma", "Ig (µA)" (lower-cased, µ -> u)
_PLAIN = re.compile(r"^(?P<q>va|vg|ia|ig)\s*(?:_(?P<u1>[^\s\[\]()/]*)|[\[(]\s*(?P<u2>[^\])]*?)\s*[\])]"
                    r"|/\s*(?P<u3>\S*))?$")
#: wide-layout curve columns: "ia_ma@vg=-2", "Ia [mA] @ Vg=-2V", "Vg=-2,5V (mA)", "Vg=-2V"
_WIDE = re.compile(r"^(?:ia\s*(?:_(?P<u1>[^\s@\[\]()]*)|[\[(]\s*(?P<u2>[^\])]*?)\s*[\])])?\s*@?\s*)?"
                   r"vg\s*=\s*(?P<vg>.*?)\s*(?:(?<=\d)v|(?<=\d)\s+v)?\s*(?:[\[(]\s*(?P<u3>[^\])]*?)\s*[\])])?$")
_WIDE_HINT = re.compile(r"vg\s*=")
_DIRECTIVE = re.compile(r"#\s*(tube|section|current)\s*:\s*(.*?)\s*$", re.IGNORECASE)


@dataclass(frozen=True)
class ReadIssue:
    """One problem found in an input file."""

    file: str
    line: int | None
    column: str | None
    message: str

    def __str__(self) -> str:
        where = self.file
        if self.line is not None:
            where += f", line {self.line}"
        if self.column is not None:
            where += f", column {self.column}"
        return f"{where}: {self.message}"


class CurveReadError(InputError):
    """A curve file could not be read.  ``.issues`` lists every problem found, each with
    its file, line and column; the text lists them all."""

    def __init__(self, issues: Iterable[ReadIssue]):
        self.issues = list(issues)
        n = len(self.issues)
        head = f"{n} error{'s' if n != 1 else ''} in input" if n else "input error"
        shown = self.issues[:50]
        text = "\n".join(f"  {i}" for i in shown)
        if n > len(shown):
            text += f"\n  ... and {n - len(shown)} more"
        super().__init__(f"{head}:\n{text}")


@dataclass(frozen=True)
class CurveSet:
    """Measured plate curves of one unit (a tube, or one section of a multi-unit tube).

    Attributes
    ----------
    tube : str
    section : str or None
    va : ndarray
        Plate-to-cathode voltage [V].
    vg : ndarray
        Grid-to-cathode voltage [V].
    ia : ndarray
        Plate current [A].
    ig : ndarray or None
        Grid current [A], where the file carries it.
    source : str
        File the points came from.
    lines : ndarray
        Line number of each point in ``source``.
    notes : tuple of str
        What reading and cleaning did to the data, and what looks wrong in it.
    """

    tube: str
    section: str | None
    va: np.ndarray
    vg: np.ndarray
    ia: np.ndarray
    ig: np.ndarray | None = None
    source: str = ""
    lines: np.ndarray | None = None
    notes: tuple[str, ...] = ()

    @property
    def label(self) -> str:
        return f"{self.tube}:{self.section}" if self.section else self.tube

    @property
    def n_points(self) -> int:
        return int(self.va.size)

    @property
    def grid_voltages(self) -> np.ndarray:
        return np.unique(self.vg)

    @property
    def n_curves(self) -> int:
        return int(self.grid_voltages.size)

    def first_line(self) -> int | None:
        return int(self.lines.min()) if self.lines is not None and self.lines.size else None

    def with_notes(self, *notes: str) -> "CurveSet":
        return replace(self, notes=self.notes + tuple(notes))


@dataclass
class ReadResult:
    """Units read from one or more files, plus what was skipped and noted."""

    units: list[CurveSet] = field(default_factory=list)
    skipped: list[ReadIssue] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)

    def extend(self, other: "ReadResult") -> None:
        self.units.extend(other.units)
        self.skipped.extend(other.skipped)
        self.notes.extend(other.notes)


def robust_full_scale(current) -> float:
    """The largest current magnitude that is not an absurd reading [A].

    The maximum over the points within 10x the 90th percentile of |I|.  In a family of
    plate curves the top decile spans at most a factor of a few below the largest
    current (common practice: the curves are traced up to a current or dissipation
    limit, so many points sit near the top), so for sane data this is the plain
    maximum; a stray 1e38 reading (a tracer overflow, a unit typed as an exponent)
    cannot set the scale unless it is a tenth of the file.
    """
    a = np.abs(np.asarray(current, float))
    a = a[np.isfinite(a)]
    if a.size == 0:
        return 0.0
    k = int(0.9 * (a.size - 1))
    q = float(np.partition(a, k)[k])
    if q <= 0:
        return float(a.max())
    return float(a[a <= 10.0 * q].max())


def max_rows_limit(max_rows: int | None = None) -> int:
    """The row limit in force: ``max_rows``, else $PLATEBOOK_MAX_ROWS, else the default."""
    if max_rows is not None:
        if int(max_rows) < 1:
            raise CurveReadError([ReadIssue("max_rows", None, None, f"the row limit must be at least 1, not {max_rows}")])
        return int(max_rows)
    env = os.environ.get(MAX_ROWS_ENV)
    if env is None or not env.strip():
        return DEFAULT_MAX_ROWS
    try:
        value = int(env.strip().replace("_", ""))
        if value < 1:
            raise ValueError
    except ValueError:
        raise CurveReadError([ReadIssue(f"environment variable {MAX_ROWS_ENV}", None, None,
                                        f"{env.strip()[:40]!r} is not a whole number of rows >= 1")]) from None
    return value


# ---------------------------------------------------------------------------
# Cells
# ---------------------------------------------------------------------------


#: Largest plate or grid voltage read [V]: large transmitting tubes work at some tens of kV
#: (common practice); anything beyond 100 kV is a slip (a misplaced exponent, a column of
#: another quantity) that would only overflow the fit.
VOLTAGE_LIMIT = 1e5


def _float_cells(cells: list[str], lines: np.ndarray, col: str, file: str, issues: list, bad: np.ndarray,
                 allow_empty: bool = False, decimal_comma: bool = False, limit=None) -> np.ndarray:
    """Convert a column of strings to floats, recording non-numeric and non-finite cells.

    With ``decimal_comma`` a comma is the decimal mark and a cell holding a decimal
    point is refused (it could be a thousands separator: 1.234 or 1234?).
    """
    if decimal_comma:
        cells = list(cells)
        for i, c in enumerate(cells):
            if "." in c:
                issues.append(ReadIssue(
                    file, int(lines[i]), col,
                    f"{c.strip()[:40]!r} has a decimal point in a file written with decimal commas "
                    "(is it a thousands separator?); write the number with a decimal comma"))
                bad[i] = True
                cells[i] = "nan"
            elif "," in c:
                cells[i] = c.replace(",", ".")
    try:
        vals = np.array(cells, dtype=float)
    except ValueError:
        vals = np.empty(len(cells))
        block = 4096
        for base in range(0, len(cells), block):
            # blocks that convert in one go are done so; only the others cell by cell
            if len(cells) > block:
                try:
                    vals[base:base + block] = np.array(cells[base:base + block], dtype=float)
                    continue
                except ValueError:
                    pass
            for i in range(base, min(base + block, len(cells))):
                c = cells[i]
                try:
                    vals[i] = float(c)
                except ValueError:
                    vals[i] = np.nan
                    s = c.strip()
                    if s == "" and allow_empty:
                        continue
                    msg = "empty value" if s == "" else f"non-numeric value {s[:40]!r}"
                    issues.append(ReadIssue(file, int(lines[i]), col, msg))
                    bad[i] = True
    nonfinite = ~np.isfinite(vals) & ~bad
    if allow_empty:
        empties = np.array([c.strip() == "" for c in cells]) if nonfinite.any() else nonfinite
        nonfinite &= ~empties
    for i in np.flatnonzero(nonfinite):
        issues.append(ReadIssue(file, int(lines[i]), col, f"value {cells[i].strip()!r} is not finite (NaN or infinite)"))
        bad[i] = True
    if limit is not None:
        top, what = limit
        for i in np.flatnonzero((np.abs(vals) > top) & ~bad):
            issues.append(ReadIssue(file, int(lines[i]), col,
                                    f"{what} {vals[i]:.6g} V is beyond any tube's (at most {top:g} V is read)"))
            bad[i] = True
    return vals


# ---------------------------------------------------------------------------
# Files, dialects and the header
# ---------------------------------------------------------------------------


def _decode(raw: bytes, file: str, notes: list) -> str:
    if raw.startswith(codecs.BOM_UTF16_LE) or raw.startswith(codecs.BOM_UTF16_BE):
        # a spreadsheet's "Unicode text" export
        try:
            text = raw.decode("utf-16")
        except UnicodeDecodeError:
            raise CurveReadError([ReadIssue(file, None, None, "starts like UTF-16 text but is not valid UTF-16")]) from None
        notes.append("UTF-16 text")
        return text
    if raw.startswith(codecs.BOM_UTF8):
        notes.append("UTF-8 byte-order mark")
    try:
        return raw.decode("utf-8-sig")
    except UnicodeDecodeError as e:
        nl = raw.count(b"\n", 0, e.start)
        line = (nl if nl else raw.count(b"\r", 0, e.start)) + 1
        raise CurveReadError([ReadIssue(
            file, line, None,
            "not UTF-8 text (is this a CSV file? a spreadsheet's export should be saved as 'CSV UTF-8')")]) from None


def read_curves(paths, skip_bad: bool = False, max_rows: int | None = None) -> ReadResult:
    """Read one or more curve files (long or wide layout).

    Parameters
    ----------
    paths : path or iterable of paths
    skip_bad : bool
        Drop bad rows (and units left with too few curves) and report each one in
        ``ReadResult.skipped`` instead of rejecting the file.
    max_rows : int, optional
        Refuse a file with more data rows than this (default: :func:`max_rows_limit`).

    Raises
    ------
    CurveReadError
        Listing every problem (file, line, column) when a file is rejected.
    """
    if isinstance(paths, (str, Path)):
        paths = [paths]
    limit = max_rows_limit(max_rows)
    out = ReadResult()
    errors: list[ReadIssue] = []
    for p in paths:
        p = Path(p)
        try:
            size = p.stat().st_size
            if size > limit * MAX_BYTES_PER_ROW:
                errors.append(ReadIssue(str(p), None, None, _too_big(f"{size / 1e6:.0f} MB", limit)
                                        + f" (files over {MAX_BYTES_PER_ROW} bytes per allowed row are not read)"))
                continue
            raw = p.read_bytes()
        except OSError as e:
            errors.append(ReadIssue(str(p), None, None, f"cannot read file: {e.strerror or e}"))
            continue
        try:
            dialect: list[str] = []
            # an ASCII file goes on as bytes (the fast path parses them without a copy)
            source = raw if raw.isascii() else _decode(raw, str(p), dialect)
            del raw
            out.extend(_read(source, str(p), p.stem, skip_bad, limit, dialect))
        except CurveReadError as e:
            errors.extend(e.issues)
        except MemoryError:
            errors.append(ReadIssue(str(p), None, None, "not enough memory to read this file; split it into smaller files"))
    if errors:
        raise CurveReadError(errors)
    return out


def _too_big(what: str, limit: int) -> str:
    return (f"file too large: {what}, more than the limit of {limit:,} data rows allows; split it, or raise the "
            f"limit (--max-rows or the {MAX_ROWS_ENV} environment variable)")


def read_text(text: str, file: str = "<text>", default_tube: str = "unit", skip_bad: bool = False,
              max_rows: int | None = None) -> ReadResult:
    """Read curve data from a string; see :func:`read_curves`."""
    if not isinstance(text, str):
        raise CurveReadError([ReadIssue(file, None, None, "input is not text")])
    dialect: list[str] = []
    if text.startswith("\ufeff"):
        text = text[1:]
        dialect.append("UTF-8 byte-order mark")
    return _read(text, file, default_tube, skip_bad, max_rows_limit(max_rows), dialect)


def _preamble(text: str):
    """The header line, its number, where the data start, and the directives above it."""
    directives = {}
    pos, no = 0, 0
    n = len(text)
    while pos < n:
        end = text.find("\n", pos)
        if end < 0:
            end = n
        no += 1
        line = text[pos:end]
        pos = end + 1
        s = line.strip()
        if not s:
            continue
        if s.startswith("#"):
            m = _DIRECTIVE.match(s)
            if m:
                directives[m.group(1).lower()] = m.group(2)
            continue
        return line.rstrip("\r"), no, min(pos, n), directives
    return None, None, n, directives


def _separator(header: str) -> str:
    """The field separator, judged from the header: the most frequent of tab, ';' and
    ',' (outside quotes); ties go to tab, then ';' (a header with decimal commas in its
    grid voltages has as many ';' as ',')."""
    bare = re.sub(r'"[^"]*"', "", header)
    counts = {sep: bare.count(sep) for sep in ("\t", ";", ",")}
    best = max(counts.values())
    return next(sep for sep in ("\t", ";", ",") if counts[sep] == best) if best else ","


def _split_fields(line: str, sep: str, quoted: bool) -> list[str]:
    if not quoted or '"' not in line:
        return line.split(sep)
    try:
        return next(csv.reader([line], delimiter=sep, quotechar='"'), [""])
    except csv.Error:  # a NUL byte, a stray quote: the plain split, whose cells are then refused
        return line.split(sep)


_SEP_NAME = {",": "','", ";": "';'", "\t": "tab"}


def _normalise(cell: str) -> str:
    return cell.strip().lower().replace("µ", "u").replace("μ", "u")


def _col(i: int, original: str) -> str:
    return f"{i} ({original!r})" if original else f"{i}"


def _canonical(i: int, original: str, file: str, header_line: int, issues: list):
    """The canonical name of a long-layout header cell (``va``, ``ia_ma`` ...), or None
    with an issue.  Returns (name, carried_unit) where carried_unit says the cell wrote
    its unit spreadsheet-style (``Ia [mA]``)."""
    n = _normalise(original)
    label = _col(i, original)
    if n == "":
        issues.append(ReadIssue(file, header_line, label, "empty column name"))
        return None, False
    if n in _KEYS or n in _KNOWN:
        return n, False
    m = _PLAIN.match(n)
    if m:
        q = m.group("q")
        unit = next((u for u in m.group("u1", "u2", "u3") if u is not None), None)
        styled = m.group("u2") is not None or m.group("u3") is not None
        if q in ("va", "vg"):
            if unit in (None, "v"):
                return q, styled
            issues.append(ReadIssue(file, header_line, label,
                                    f"unknown voltage unit {unit!r}: plate and grid voltages are read in V "
                                    f"(name the column {q} or '{q.capitalize()} (V)')"))
            return None, False
        if unit is None or unit == "":
            issues.append(ReadIssue(file, header_line, label,
                                    f"a header cell {original.strip()!r} has no unit: use {q}_ma, {q}_a or {q}_ua, "
                                    f"or '{q.capitalize()} (mA)'"))
            return None, False
        if unit in _SCALE:
            return f"{q}_{unit}", styled
        issues.append(ReadIssue(file, header_line, label,
                                f"unknown current unit {unit!r}; use {q}_ma, {q}_a or {q}_ua"))
        return None, False
    issues.append(ReadIssue(
        file, header_line, label,
        "unknown column; known columns are " + ", ".join(_KNOWN)
        + " (or 'Va (V)', 'Ia [mA]' ..., or ia_<unit>@vg=<V> for the wide layout)"))
    return None, False


class _Data:
    """The data part of a file, after its header line.

    ``source`` is the whole file as ASCII bytes (read from an ASCII file) or as text;
    ``start`` is where the data begin in it.  The fast path reads the bytes in place;
    the row-by-row path asks for ``text``.
    """

    def __init__(self, source, start: int):
        self.source, self.start = source, start
        end = len(source)
        while end > start and source[end - 1:end].isspace():
            end -= 1
        self.end = end  # trailing blank lines and spaces left out
        self._text = None

    @property
    def text(self) -> str:
        if self._text is None:
            part = self.source[self.start:]
            self._text = part.decode("ascii") if isinstance(part, bytes) else part
        return self._text

    def rows(self) -> int:
        nl = b"\n" if isinstance(self.source, bytes) else "\n"
        return self.source.count(nl, self.start, self.end) + 1 if self.end > self.start else 0

    def has(self, char: str) -> bool:
        c = char.encode() if isinstance(self.source, bytes) else char
        return self.source.find(c, self.start, self.end) >= 0

    def ascii_bytes(self):
        """(bytes, start, end) of the data with a newline just before ``start``; None
        when the data are not ASCII (those go the row-by-row way)."""
        if isinstance(self.source, bytes):
            return self.source, self.start, self.end
        part = self.source[self.start:self.end]
        if not part.isascii():
            return None
        return b"\n" + part.encode("ascii"), 1, len(part) + 1


def _read(source, file: str, default_tube: str, skip_bad: bool, limit: int, dialect: list) -> ReadResult:
    if isinstance(source, bytes):
        if b"\r" in source and b"\n" not in source:
            source = source.replace(b"\r", b"\n")
            dialect.append("CR line ends")
        prefix = source[:1 << 16].decode("ascii")
        header, header_line, start, directives = _preamble(prefix)
        if header is None or start >= len(prefix) and len(source) > len(prefix):
            header, header_line, start, directives = _preamble(source.decode("ascii"))
    else:
        if "\r" in source and "\n" not in source:
            source = source.replace("\r", "\n")
            dialect.append("CR line ends")
        header, header_line, start, directives = _preamble(source)
    if header is None:
        raise CurveReadError([ReadIssue(file, None, None, "no header row (file is empty or only comments)")])
    data = _Data(source, start)
    rows = data.rows()
    if rows > limit:
        raise CurveReadError([ReadIssue(file, None, None, _too_big(f"{rows:,} lines after the header", limit))])
    sep = _separator(header)
    quoted = '"' in header or data.has('"')
    cells = _split_fields(header, sep, quoted)
    originals = [c.strip() for c in cells]
    trailing = 0
    while len(originals) > 1 and originals[-1] == "":
        originals.pop()
        trailing += 1
    if sep != ",":
        dialect.append(f"{_SEP_NAME[sep]} separators")
    if quoted:
        dialect.append("quoted fields")
    if trailing:
        dialect.append(f"{trailing} trailing empty column(s) ignored")
    if len(originals) == 1:
        one = originals[0]
        hint = ("separate the columns with ',', ';' or a tab" if re.search(r"\s", one.strip())
                else "is the separator one of ',', ';' or a tab?")
        raise CurveReadError([ReadIssue(file, header_line, _col(1, one),
                                        f"only one column found in the header: {hint}")])
    ctx = _Context(file, header_line, sep, quoted, len(originals), trailing, dialect, limit)
    if any(_WIDE_HINT.search(_normalise(o)) for o in originals):
        res = _read_wide(originals, ctx, data.text, directives, default_tube, skip_bad)
    else:
        res = _read_long(originals, ctx, data, default_tube, skip_bad)
    if ctx.dialect:
        res.notes.insert(0, f"{file}: read as a spreadsheet export: " + ", ".join(dict.fromkeys(ctx.dialect)))
    return res


@dataclass
class _Context:
    file: str
    header_line: int
    sep: str
    quoted: bool
    width: int  # header fields, without trailing empty ones
    trailing: int  # trailing empty header fields
    dialect: list
    limit: int


# ---------------------------------------------------------------------------
# Rows: the fast column-wise path and the row-by-row validating path
# ---------------------------------------------------------------------------



_INNER_BLANK_OR_COMMENT = re.compile(rb"\n[ \t\r\f\v]*(?:#|\n)")
#: Below this many lines the row-by-row path is as quick as the column-wise one (whose
#: two loadtxt calls cost ~100 us each), so small files, the common case of bad input,
#: go straight to it.
FAST_PATH_MIN_ROWS = 500


def _fast_columns(data: _Data, ctx: _Context, kinds: list[str]):
    """Parse the data rows column-wise with numpy's C reader.

    ``kinds`` gives each field "f" (number) or "s" (text).  Returns (columns, line
    numbers) or None whenever anything is unusual, so that the row-by-row path finds
    and locates it: non-ASCII text, a blank or comment line inside the data, a cell
    that is not a finite number, a row of the wrong width, text with both decimal
    commas and decimal points.
    """
    got = data.ascii_bytes()
    if got is None:
        return None
    raw, a, b = got
    nrows = raw.count(b"\n", a, b) + 1
    if b <= a or nrows < FAST_PATH_MIN_ROWS or _INNER_BLANK_OR_COMMENT.search(raw, a - 1, b):
        return None
    first = ctx.header_line + 1
    comma = ctx.sep != "," and raw.find(b",", a, b) >= 0
    if comma and raw.find(b".", a, b) >= 0:
        return None
    # Every row has exactly `width` fields (the header's, with or without its trailing
    # empty ones): loadtxt refuses a row too short for the last column it is asked
    # for, and the separator count then rules out a row that is too long.
    seps = raw.count(ctx.sep.encode(), a, b)
    width = next((w for w in (len(kinds) + ctx.trailing, len(kinds)) if seps == nrows * (w - 1)), None)
    if width is None:
        return None
    numbers = [j for j, k in enumerate(kinds) if k == "f"]
    texts = [j for j, k in enumerate(kinds) if k == "s"] + list(range(len(kinds), width))
    if comma:
        raw, a, b = raw[a:b].replace(b",", b"."), 0, b - a
    elif raw[b:].strip(b"\r\n"):
        raw, a, b = raw[a:b], 0, b - a  # trailing spaces: loadtxt would take them for a row

    def stream():
        f = io.BytesIO(raw)
        f.seek(a)
        return f

    kw = dict(delimiter=ctx.sep, comments=None, quotechar='"' if ctx.quoted else None, encoding=None, ndmin=2)
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            num = np.loadtxt(stream(), usecols=numbers, **kw)
            # text keys repeat: interned, each distinct name is stored once
            txt = np.loadtxt(stream(), usecols=texts, dtype=object, converters=sys.intern, **kw) if texts else None
    except (ValueError, TypeError, IndexError):
        return None
    if num.shape != (nrows, len(numbers)) or (txt is not None and txt.shape != (nrows, len(texts))):
        return None
    if not np.all(np.isfinite(num)):
        return None
    cols: list = [None] * len(kinds)
    for k, j in enumerate(numbers):
        cols[j] = np.ascontiguousarray(num[:, k])
    del num
    for k, j in enumerate(texts):
        c = txt[:, k]
        if j >= len(kinds):
            if any(v.strip() for v in c[_run_starts(c)].tolist()):
                return None  # a value under an empty header cell
            continue
        if comma:
            # the text columns went through the comma -> point swap too; no point was
            # in the file, so every point in them was a comma
            if any("." in v for v in c[_run_starts(c)].tolist()):
                c = np.array([v.replace(".", ",") for v in c.tolist()], dtype=object)
        cols[j] = c
    if comma:
        ctx.dialect.append("decimal commas")
    return cols, np.arange(first, first + nrows, dtype=np.int64)


def _run_starts(*keys) -> np.ndarray:
    """Indices where any of the key arrays changes value (0 included)."""
    n = next(k.size for k in keys if k is not None)
    change = np.zeros(n, dtype=bool)
    if n:
        change[0] = True
    for k in keys:
        if k is not None and n > 1:
            change[1:] |= k[1:] != k[:-1]
    return np.flatnonzero(change)


@functools.lru_cache(maxsize=None)
def _skipped_lines(sep: str):
    """Blank lines, comment lines, and a spreadsheet's empty rows (";;;")."""
    return re.compile(rf"^[^\S\n]*(?:#[^\n]*|(?:{re.escape(sep)}[^\S\n]*)*)$", re.M)


def _slow_rows(data: str, ctx: _Context, names: list[str], issues: list, directives: dict):
    """Split the data rows one by one: columns of strings and their line numbers.

    Blank lines, comment lines and rows of empty fields are skipped (comment lines may
    carry directives); a row of the wrong width is an issue naming the first missing
    or extra field.  Rows of the right width (nearly all) are split in one go: a
    ``split`` over the joined text is several times faster than one per line.
    """
    ncol, sep = ctx.width, ctx.sep
    lines = data.split("\n")
    if "\r" in data:
        lines = [line.rstrip("\r") for line in lines]
    use = np.ones(len(lines), dtype=bool)
    k, last = 0, 0
    for m in _skipped_lines(sep).finditer(data):  # blank and comment lines: few, found by one scan
        k += data.count("\n", last, m.start())
        last = m.start()
        use[k] = False
        d = _DIRECTIVE.match(m.group().strip())
        if d:
            directives[d.group(1).lower()] = d.group(2)
    counts = np.fromiter((line.count(sep) for line in lines), dtype=np.int64, count=len(lines))
    regular = use & (counts == ncol - 1)
    if ctx.quoted:
        regular &= np.fromiter(('"' not in line for line in lines), dtype=bool, count=len(lines))
    other = [o for o in ("\t", ";", ",") if o != sep]
    extra_rows, extra_numbers = [], []
    for i in np.flatnonzero(use & ~regular):
        line, no = lines[i], ctx.header_line + 1 + int(i)
        fields = _split_fields(line, sep, ctx.quoted)
        if len(fields) > ncol and not any(f.strip() for f in fields[ncol:]):
            fields = fields[:ncol]
        if not any(f.strip() for f in fields):
            continue  # a spreadsheet's empty row (";;;")
        found = len(fields)
        if found != ncol:
            if found > ncol:
                first_extra = next(j for j in range(ncol, found) if fields[j].strip())
                col, what = f"{first_extra + 1}", "unexpected extra field(s)"
            else:
                col = _col(found + 1, names[found]) if names else f"{found + 1}"
                what = "missing value(s)"
            hint = next((f" (is the separator {_SEP_NAME[o]}?)" for o in other if o in line), "")
            issues.append(ReadIssue(ctx.file, no, col, f"{what}: expected {ncol} fields, found {found}{hint}"))
            continue
        extra_rows.append(fields)
        extra_numbers.append(no)
    idx = np.flatnonzero(regular)
    numbers = idx + ctx.header_line + 1
    if idx.size:
        joined = sep.join(lines if idx.size == len(lines) else [lines[i] for i in idx.tolist()])
        del lines  # before the split: the cells take several times the lines' memory
        flat = joined.split(sep)
        del joined
        cols = [flat[j::ncol] for j in range(ncol)]
        del flat
    else:
        cols = [[] for _ in range(ncol)]
    if extra_rows:
        numbers = np.concatenate([numbers, np.array(extra_numbers, dtype=np.int64)])
        order = np.argsort(numbers, kind="stable")
        numbers = numbers[order]
        cols = [[(c + list(e))[i] for i in order.tolist()] for c, e in zip(cols, zip(*extra_rows))]
    return cols, numbers.astype(np.int64)


def _comma_decimal(ctx: _Context, cols: list[list[str]]) -> bool:
    """Decimal commas: a number cell holds a comma (it cannot be a separator there)."""
    found = any("," in c for col in cols for c in col)
    if found:
        ctx.dialect.append("decimal commas")
    return found


# ---------------------------------------------------------------------------
# Long layout
# ---------------------------------------------------------------------------


def _read_long(originals, ctx: _Context, data, default_tube, skip_bad):
    file, header_line = ctx.file, ctx.header_line
    issues = []
    seen = {}
    styled = False
    for i, orig in enumerate(originals, start=1):
        name, s = _canonical(i, orig, file, header_line, issues)
        styled |= s
        if name is None:
            continue
        if name in seen:
            issues.append(ReadIssue(file, header_line, _col(i, orig), f"duplicate column {name!r} (also column {seen[name]})"))
            continue
        seen[name] = i
    # a column whose header was refused above is not "missing" as well
    mentioned = {m.group("q") for o in originals if (m := _PLAIN.match(_normalise(o)))}
    for req in ("va", "vg"):
        if req not in seen and req not in mentioned:
            issues.append(ReadIssue(file, header_line, None, f"missing required column {req!r}"))
    ia_cols = [c for c in ("ia_ma", "ia_a", "ia_ua") if c in seen]
    ig_cols = [c for c in ("ig_ma", "ig_a", "ig_ua") if c in seen]
    if not ia_cols and "ia" not in mentioned:
        issues.append(ReadIssue(file, header_line, None, "missing plate current column (one of ia_ma, ia_a, ia_ua)"))
    if len(ia_cols) > 1:
        issues.append(ReadIssue(file, header_line, ", ".join(_col(seen[c], originals[seen[c] - 1]) for c in ia_cols),
                                "plate current given in more than one column; keep exactly one"))
    if len(ig_cols) > 1:
        issues.append(ReadIssue(file, header_line, ", ".join(_col(seen[c], originals[seen[c] - 1]) for c in ig_cols),
                                "grid current given in more than one column; keep at most one"))
    if issues:
        raise CurveReadError(issues)
    if styled:
        ctx.dialect.append("units in the header")

    names = [None] * len(originals)
    for name, i in seen.items():
        names[i - 1] = name
    kinds = ["s" if n in _KEYS else "f" for n in names]
    label = {name: _col(i, originals[i - 1]) for name, i in seen.items()}
    ia_col = ia_cols[0]
    ig_col = ig_cols[0] if ig_cols else None

    fast = _fast_columns(data, ctx, kinds)
    if fast is not None:
        cols, lines = fast
        bad = np.zeros(lines.size, dtype=bool)

        def column(name):
            return cols[seen[name] - 1]

        va, vg = column("va"), column("vg")
        ia = column(ia_col) * _SCALE[ia_col[3:]]
        ig = column(ig_col) * _SCALE[ig_col[3:]] if ig_col else None
        tubes = column("tube") if "tube" in seen else None
        sections = column("section") if "section" in seen else None
        if tubes is not None and any(not t.strip() for t in tubes[_run_starts(tubes)].tolist()):
            fast = None  # an empty tube name: the row-by-row path reports it
        elif not (np.all(np.abs(va) <= VOLTAGE_LIMIT) and np.all(np.abs(vg) <= VOLTAGE_LIMIT)):
            fast = None  # an absurd voltage: the row-by-row path reports it where it is
        else:
            issues = []
            notes = _check_currents(ia, lines, bad, issues, file, label[ia_col])
            if not issues:
                return _finish(file, default_tube, issues, skip_bad, bad, lines, va, vg, ia, ig, tubes, sections,
                               notes, current_column=ia_col, labels=label)
    issues = []
    cols, lines = _slow_rows(data.text, ctx, list(originals), issues, {})
    if len(lines) > ctx.limit:
        raise CurveReadError([ReadIssue(file, None, None, _too_big(f"{len(lines):,} data rows", ctx.limit))])
    n = lines.size
    bad = np.zeros(n, dtype=bool)

    def column(name):
        return cols[seen[name] - 1]

    comma = _comma_decimal(ctx, [column(c) for c in seen if c not in _KEYS])
    va = _float_cells(column("va"), lines, label["va"], file, issues, bad, decimal_comma=comma,
                      limit=(VOLTAGE_LIMIT, "plate voltage"))
    vg = _float_cells(column("vg"), lines, label["vg"], file, issues, bad, decimal_comma=comma,
                      limit=(VOLTAGE_LIMIT, "grid voltage"))
    ia = _float_cells(column(ia_col), lines, label[ia_col], file, issues, bad, decimal_comma=comma) * _SCALE[ia_col[3:]]
    ig = None
    if ig_col:
        ig = _float_cells(column(ig_col), lines, label[ig_col], file, issues, bad, decimal_comma=comma) * _SCALE[ig_col[3:]]
    tubes = np.array([t.strip() for t in column("tube")], dtype=object) if "tube" in seen else None
    sections = np.array([s.strip() for s in column("section")], dtype=object) if "section" in seen else None
    if tubes is not None:
        for i in np.flatnonzero(tubes == ""):
            if not bad[i]:
                issues.append(ReadIssue(file, int(lines[i]), label["tube"], "empty tube identifier"))
                bad[i] = True
    notes = _check_currents(ia, lines, bad, issues, file, label[ia_col])
    return _finish(file, default_tube, issues, skip_bad, bad, lines, va, vg, ia, ig, tubes, sections, notes,
                   current_column=ia_col, labels=label)


def _check_currents(ia, lines, bad, issues, file, col):
    """Clip small negative currents (instrument offset) with a note; larger ones are errors.

    ``col`` is the column label, or an array of labels per point (wide layout).
    """
    notes = []
    good = ~bad
    if not good.any():
        return notes
    full = robust_full_scale(ia[good])
    tol = max(NEGATIVE_OFFSET_FRACTION * full, NEGATIVE_OFFSET_MIN)
    neg = good & (ia < 0)
    if not neg.any():
        return notes
    small = neg & (ia >= -tol)
    big = neg & (ia < -tol)
    for i in np.flatnonzero(big):
        issues.append(ReadIssue(
            file, int(lines[i]), col if isinstance(col, str) else col[i],
            f"negative plate current {ia[i] * 1e3:.4g} mA is beyond the instrument offset "
            f"(-{tol * 1e3:.3g} mA allowed)"))
        bad[i] = True
    if small.any():
        worst = int(np.flatnonzero(small)[np.argmin(ia[small])])
        notes.append(f"{file}: {int(small.sum())} small negative current(s) taken as instrument offset and clipped "
                     f"to zero; the most negative is {ia[worst] * 1e3:.4g} mA (line {int(lines[worst])})")
        ia[small] = 0.0
    return notes


def _groups(idx: np.ndarray, tubes, sections, default_tube, default_section):
    """Rows of each (tube, section), in the order of first appearance.

    Rows of one unit usually come in one run, so the keys are compared run by run
    (vectorised), and only the runs go through a dictionary (which also strips the
    keys' blanks).
    """
    if tubes is None and sections is None:
        return {(default_tube, default_section): idx}
    n = idx.size
    t = tubes[idx] if tubes is not None else None
    s = sections[idx] if sections is not None else None
    starts = _run_starts(t, s)
    ends = np.append(starts[1:], n)
    runs: dict = {}
    for a, b in zip(starts.tolist(), ends.tolist()):
        key = (t[a].strip() if t is not None else default_tube, s[a].strip() if s is not None else "")
        runs.setdefault(key, []).append(idx[a:b])
    return {(tube, section or None): (r[0] if len(r) == 1 else np.concatenate(r)) for (tube, section), r in runs.items()}


def _finish(file, default_tube, issues, skip_bad, bad, lines, va, vg, ia, ig, tubes, sections, notes,
            default_section=None, current_column=None, labels=None):
    result = ReadResult(notes=list(notes))
    issues.sort(key=lambda i: (i.line or 0))
    if issues and not skip_bad:
        raise CurveReadError(issues)
    result.skipped.extend(issues)
    idx = np.flatnonzero(~bad)
    if idx.size == 0:
        issue = ReadIssue(file, None, None, "no data rows" if not bad.size else "no usable data rows")
        if skip_bad:
            result.skipped.append(issue)
            return result
        raise CurveReadError([issue])
    groups = _groups(idx, tubes, sections, default_tube, default_section)
    errors = []
    for (tube, section), m in groups.items():
        label = f"{tube}:{section}" if section else tube
        name_issue = _name_issue(file, tube, section, int(lines[m].min()), tubes is None, labels or {})
        if name_issue is not None:
            if skip_bad:
                result.skipped.append(name_issue)
            else:
                errors.append(name_issue)
            continue
        curves = np.unique(vg[m])
        if curves.size < 2:
            issue = ReadIssue(
                file, int(lines[m].min()), "vg",
                f"unit {label!r} has {curves.size} grid curve(s) (vg = {', '.join(f'{v:g}' for v in curves[:5])} V); "
                "at least 2 are needed to identify mu: add the family's other curves, or check that the vg "
                "column holds each point's grid voltage")
            if skip_bad:
                result.skipped.append(issue)
                continue
            errors.append(issue)
            continue
        unit = CurveSet(
            tube=tube, section=section, va=va[m].copy(), vg=vg[m].copy(), ia=ia[m].copy(),
            ig=None if ig is None else ig[m].copy(), source=file, lines=lines[m].copy(),
        )
        result.units.append(unit.with_notes(*data_notes(unit, current_column)))
    if errors:
        raise CurveReadError(errors)
    return result


def _name_issue(file, tube, section, line, tube_from_file_name, labels):
    """A tube or section name that is not plain text (control characters, or longer than a
    card or the ledger keeps) is an input error: names travel on to terminals, cards, netlists
    and spreadsheets, so they are checked once, here."""
    for column, name in (("tube", tube), ("section", section)):
        if name is None:
            continue
        try:
            plain_text(name, column)
        except InputError as e:
            if column == "tube" and tube_from_file_name:
                return ReadIssue(file, None, None,
                                 f"the tube name '{shown(name)}' (from a '# tube:' line or the file name) {e.message}; "
                                 "give a plain name in a 'tube' column or a '# tube: NAME' line")
            return ReadIssue(file, line, labels.get(column, column), f"{column} name '{shown(name)}' {e.message}")
    return None


# ---------------------------------------------------------------------------
# Wide layout
# ---------------------------------------------------------------------------


def _read_wide(originals, ctx: _Context, data, directives, default_tube, skip_bad):
    file, header_line = ctx.file, ctx.header_line
    issues = []
    first, _ = _canonical(1, originals[0], file, header_line, [])
    if first != "va":
        issues.append(ReadIssue(file, header_line, _col(1, originals[0]),
                                "the wide layout's first column must be 'va'"))
    # the data's own directives (below the header) count too, as in the long layout
    default_unit = _normalise(directives.get("current", "")).removeprefix("ia_").removeprefix("ia") or None
    curves = []  # (column index, vg, scale, label)
    seen = {}
    styled = False
    for i, orig in enumerate(originals[1:], start=2):
        n = _normalise(orig)
        label = _col(i, orig)
        m = _WIDE.match(n)
        if not m:
            issues.append(ReadIssue(file, header_line, label,
                                    "in the wide layout every column after 'va' must be ia_<unit>@vg=<V> "
                                    "(or 'Ia [mA] @ Vg=-2V')"))
            continue
        given = [u for u in m.group("u1", "u2", "u3") if u is not None]
        unit = given[0] if given else default_unit
        styled |= not n.startswith("ia_")
        if unit is None or unit == "":
            issues.append(ReadIssue(file, header_line, label,
                                    f"{orig!r} does not say the current's unit: write 'Ia [mA] @ Vg=...' or "
                                    "ia_ma@vg=..., or put a '# current: mA' line above the header"))
            continue
        if unit not in _SCALE:
            issues.append(ReadIssue(file, header_line, label, f"unknown current unit {unit!r}; use ia_ma, ia_a or ia_ua"))
            continue
        text = m.group("vg")
        try:
            v = float(text.replace(",", ".") if "." not in text else text) + 0.0  # -0 and 0 are the same curve
            if not np.isfinite(v):
                raise ValueError
        except ValueError:
            issues.append(ReadIssue(file, header_line, label, f"grid voltage {text!r} is not a finite number"))
            continue
        if abs(v) > VOLTAGE_LIMIT:
            issues.append(ReadIssue(file, header_line, label,
                                    f"grid voltage {v:.6g} V is beyond any tube's (at most {VOLTAGE_LIMIT:g} V is read)"))
            continue
        if v in seen:
            issues.append(ReadIssue(file, header_line, label, f"duplicate curve for vg = {v:g} V (also column {seen[v]})"))
            continue
        seen[v] = i
        curves.append((i - 1, v, _SCALE[unit], label, unit))
    if issues:
        raise CurveReadError(issues)
    if styled:
        ctx.dialect.append("units in the header")
    cols, lines = _slow_rows(data, ctx, list(originals), issues, directives)
    if len(lines) > ctx.limit:
        raise CurveReadError([ReadIssue(file, None, None, _too_big(f"{len(lines):,} data rows", ctx.limit))])
    comma = _comma_decimal(ctx, cols)
    bad_rows = np.zeros(lines.size, dtype=bool)
    va = _float_cells(cols[0], lines, _col(1, originals[0]), file, issues, bad_rows, decimal_comma=comma,
                      limit=(VOLTAGE_LIMIT, "plate voltage"))
    all_va, all_vg, all_ia, all_lines, all_bad, all_cols = [], [], [], [], [], []
    for j, v, scale, label, _ in curves:
        bad = bad_rows.copy()
        vals = _float_cells(cols[j], lines, label, file, issues, bad, allow_empty=True, decimal_comma=comma)
        present = np.isfinite(vals) | bad
        all_va.append(va[present])
        all_vg.append(np.full(int(present.sum()), v))
        all_ia.append(np.where(bad[present], 0.0, vals[present]) * scale)
        all_lines.append(lines[present])
        all_bad.append(bad[present])
        all_cols.append(np.full(int(present.sum()), label, dtype=object))
    va_l = np.concatenate(all_va) if all_va else np.empty(0)
    vg_l = np.concatenate(all_vg) if all_vg else np.empty(0)
    ia_l = np.concatenate(all_ia) if all_ia else np.empty(0)
    ln_l = np.concatenate(all_lines) if all_lines else np.empty(0, dtype=np.int64)
    bad_l = np.concatenate(all_bad) if all_bad else np.empty(0, dtype=bool)
    col_l = np.concatenate(all_cols) if all_cols else np.empty(0, dtype=object)
    notes = _check_currents(ia_l, ln_l, bad_l, issues, file, col_l)
    tube = directives.get("tube") or default_tube
    section = directives.get("section") or None
    units = {u for *_, u in curves}
    return _finish(file, tube, issues, skip_bad, bad_l, ln_l, va_l, vg_l, ia_l, None, None, None, notes,
                   default_section=section, current_column=f"ia_{units.pop()}" if len(units) == 1 else None)


# ---------------------------------------------------------------------------
# Cleaning: its own pure step
# ---------------------------------------------------------------------------


def clean_curves(unit: CurveSet, model=None) -> CurveSet:
    """Sort, average duplicate points and drop points outside the model's domain.

    Every change is recorded in the returned set's ``notes``.  The models of
    :mod:`fitter.models` are defined for plate voltages >= 0.
    """
    notes = []
    va, vg, ia, ig, lines = unit.va, unit.vg, unit.ia, unit.ig, unit.lines
    outside = va < 0
    if outside.any():
        k = int(outside.sum())
        notes.append(f"{k} point(s) with negative plate voltage dropped ({100 * k / va.size:.3g} % of {va.size}; "
                     "outside the model's domain)")
        keep = ~outside
        va, vg, ia = va[keep], vg[keep], ia[keep]
        ig = None if ig is None else ig[keep]
        lines = None if lines is None else lines[keep]
    order = np.lexsort((va, vg))
    va, vg, ia = va[order], vg[order], ia[order]
    ig = None if ig is None else ig[order]
    lines = None if lines is None else lines[order]
    key_change = np.ones(va.size, dtype=bool)
    key_change[1:] = (va[1:] != va[:-1]) | (vg[1:] != vg[:-1])
    if not key_change.all():
        group = np.cumsum(key_change) - 1
        counts = np.bincount(group)
        ndup = int((counts > 1).sum())
        notes.append(f"{ndup} repeated (va, vg) point(s) averaged ({int(counts.sum() - counts.size)} duplicate row(s))")
        starts = np.flatnonzero(key_change)
        ia = np.bincount(group, weights=ia) / counts
        if ig is not None:
            ig = np.bincount(group, weights=ig) / counts
        va, vg = va[starts], vg[starts]
        lines = None if lines is None else lines[starts]
    return replace(unit, va=va, vg=vg, ia=ia, ig=ig, lines=lines, notes=unit.notes + tuple(notes))


# ---------------------------------------------------------------------------
# Is this plausibly one triode's plate-curve family?
# ---------------------------------------------------------------------------

#: The largest plate current of a triode family, in the file's unit, outside which the
#: header's unit is suspect.  Common practice: receiving and audio power triodes draw
#: from about 0.01 mA (near cutoff) to about 500 mA (the largest audio power triodes);
#: the *largest* current of a traced family is at least about 0.5 mA (a high-mu
#: preamp triode at 100 V and zero grid), and beyond 5 A only transmitting tubes go.
_LARGEST_MA_RANGE = (0.5, 5000.0)


def data_notes(unit: CurveSet, current_column: str | None = None) -> list[str]:
    """What looks wrong in a unit's data without being certain: warning notes.

    ``current_column`` is the plate-current column the file used (``ia_ma`` ...),
    when known.
    """
    notes = []
    if unit.ia.size == 0:
        return notes
    full = robust_full_scale(unit.ia)
    if current_column in ("ia_ma", "ia_a", "ia_ua") and full > 0:
        in_ma = full * 1e3
        shown = full / _SCALE[current_column[3:]]
        lo, hi = _LARGEST_MA_RANGE
        name = {"ma": "milliamperes", "a": "amperes", "ua": "microamperes"}
        if in_ma < lo or in_ma > hi:
            # which unit would put the largest current inside the typical range
            fits = [u for u, s in _SCALE.items() if lo <= shown * s * 1e3 <= hi]
            guess = f": are they in {name[fits[0]]} (name the column ia_{fits[0]})?" if fits else ""
            notes.append(f"plate currents look like the wrong unit: the largest is {shown:.3g} under an "
                         f"'{current_column}' header, i.e. {in_ma:.3g} mA, where a triode family's largest current "
                         f"is typically {lo:g} .. {hi:g} mA{guess}")
    wild = np.abs(unit.ia) > 10.0 * full
    if wild.any():
        k = int(np.argmax(np.abs(unit.ia)))
        where = f" at line {int(unit.lines[k])}" if unit.lines is not None else ""
        notes.append(f"{int(wild.sum())} reading(s) more than 10x the rest of the currents (the largest "
                     f"{unit.ia[k] * 1e3:.3g} mA{where}): an overflow or a typing slip?")
    vg = unit.vg
    if vg.size and float(vg.min()) > 0:
        notes.append(f"every grid voltage is positive ({float(vg.min()):g} .. {float(vg.max()):g} V): plate curves are "
                     "taken mostly at negative grid; check the sign of the vg column")
    return notes


def _grid_trend(va, vg, ia) -> tuple[int, int]:
    """(falls, rises) of the plate current from one grid curve to the next at equal va."""
    order = np.lexsort((vg, va))
    a, i = va[order], ia[order]
    same = a[1:] == a[:-1]
    d = np.diff(i)[same]
    return int((d < 0).sum()), int((d > 0).sum())


def check_data(unit: CurveSet) -> ReadIssue | None:
    """An issue when the unit's data cannot be a triode's plate curves as labelled:
    all currents zero, no positive plate voltage, the va and vg columns swapped, or
    currents that fall as the grid voltage rises."""
    va, vg, ia = unit.va, unit.vg, unit.ia
    if ia.size == 0:
        return None
    label = unit.label

    def issue(message):
        return ReadIssue(unit.source, unit.first_line(), None, f"unit {label!r}: {message}")

    if not np.any(ia != 0):
        return issue(f"all {ia.size} plate currents are zero: nothing to fit (is the plate-current column the "
                     "right one, and were the readings recorded?)")
    nva, nvg = np.unique(va).size, np.unique(vg).size
    # A family has a few grid curves of many plate voltages each, and the plate
    # voltages reach well above the grid voltages' magnitude (common practice).
    swapped = float(vg.max()) > max(float(va.max()), 0.0) and nvg > nva
    if swapped:
        return issue(f"plate voltages look like grid voltages: are the va and vg columns swapped? (va has {nva} "
                     f"value(s) from {float(va.min()):g} to {float(va.max()):g} V, vg has {nvg} from "
                     f"{float(vg.min()):g} to {float(vg.max()):g} V)")
    if float(va.max()) <= 0:
        return issue(f"no plate voltage is above 0 V (va from {float(va.min()):g} to {float(va.max()):g} V): "
                     "check the sign of the va column")
    falls, rises = _grid_trend(va, vg, ia)
    # A triode's plate current rises with its grid voltage at any plate voltage (the
    # grid controls the space charge: Child-Langmuir); noise can reverse a few steps,
    # never nine in ten.
    if falls >= 4 and falls > 0.9 * (falls + rises):
        return issue(f"the plate current falls as the grid voltage rises at {falls} of {falls + rises} steps "
                     "between curves: is the sign of the vg column flipped (bias written as a positive number)?")
    return None


def check_for_model(unit: CurveSet, model) -> ReadIssue | None:
    """An issue when ``unit``'s data are implausible (:func:`check_data`) or too few
    points or curves to identify ``model``."""
    bad = check_data(unit)
    if bad is not None:
        return bad
    nfree = model.n_plate_params
    need = max(2 * nfree, nfree + 3)
    if unit.n_points < need:
        return ReadIssue(unit.source, unit.first_line(), None,
                         f"unit {unit.label!r} has {unit.n_points} point(s); the {model.name} model "
                         f"({nfree} parameters) needs at least {need}")
    if unit.n_curves < 2:
        return ReadIssue(unit.source, unit.first_line(), "vg",
                         f"unit {unit.label!r} has {unit.n_curves} grid curve(s); at least 2 are needed")
    return None
