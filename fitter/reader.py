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

Everything is converted to SI (V, A) here, once.  Errors name the file, the line
and the column; by default every error of a file is collected and the file is
rejected with all of them (:class:`CurveReadError`); with ``skip_bad=True`` bad rows
are dropped and each one is reported instead.
"""

from __future__ import annotations

import re
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Iterable

import numpy as np

__all__ = [
    "CurveSet",
    "ReadIssue",
    "CurveReadError",
    "ReadResult",
    "read_curves",
    "read_text",
    "clean_curves",
    "check_for_model",
    "NEGATIVE_OFFSET_FRACTION",
]

#: Negative plate currents down to this fraction of the file's largest current are
#: taken as instrument offset and clipped to zero (with a note); below it they are an
#: error.  0.5 % of full scale is a typical zero error of a tracer's current range
#: (common practice).
NEGATIVE_OFFSET_FRACTION = 0.005
#: ...but never less than this [A].
NEGATIVE_OFFSET_MIN = 2e-6

_SCALE = {"a": 1.0, "ma": 1e-3, "ua": 1e-6}
_WIDE = re.compile(r"^ia_(?P<unit>[a-z]+)\s*@\s*vg\s*=\s*(?P<vg>.*)$")
_KNOWN = ("va", "vg", "ia_ma", "ia_a", "ia_ua", "ig_ma", "ig_a", "ig_ua", "tube", "section")


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


class CurveReadError(ValueError):
    """A curve file could not be read.  ``.issues`` lists every problem found."""

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
        What reading and cleaning did to the data.
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


def _float_cells(cells: list[str], lines: np.ndarray, col: str, file: str, issues: list, bad: np.ndarray,
                 allow_empty: bool = False) -> np.ndarray:
    """Convert a column of strings to floats, recording non-numeric and non-finite cells."""
    try:
        vals = np.array(cells, dtype=float)
    except ValueError:
        vals = np.empty(len(cells))
        for i, c in enumerate(cells):
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
    return vals


def _split_lines(text: str):
    """Data lines with their 1-based line numbers, the header, and comment directives."""
    header = None
    header_line = None
    data, numbers = [], []
    directives = {}
    for no, raw in enumerate(text.split("\n"), start=1):
        line = raw.rstrip("\r")
        s = line.strip()
        if not s:
            continue
        if s.startswith("#"):
            m = re.match(r"#\s*(tube|section)\s*:\s*(.*?)\s*$", s, re.IGNORECASE)
            if m:
                directives[m.group(1).lower()] = m.group(2)
            continue
        if header is None:
            header, header_line = line, no
        else:
            data.append(line)
            numbers.append(no)
    return header, header_line, data, np.array(numbers, dtype=np.int64), directives


def _columns(data, numbers, ncol, file, issues, names=None):
    """Split data lines into ``ncol`` columns of strings; rows of the wrong width are issues.

    One ``split`` over the joined text is several times faster than one per line,
    which matters for million-row files.
    """
    counts = np.fromiter((line.count(",") for line in data), dtype=np.int64, count=len(data))
    ok = counts == ncol - 1
    for i in np.flatnonzero(~ok):
        found = int(counts[i]) + 1
        if found > ncol:
            col, what = f"{ncol + 1}", "unexpected extra field(s)"
        else:
            col = f"{found + 1} ({names[found]!r})" if names else f"{found + 1}"
            what = "missing value(s)"
        issues.append(ReadIssue(file, int(numbers[i]), col, f"{what}: expected {ncol} fields, found {found}"))
    good = data if ok.all() else [line for line, k in zip(data, ok) if k]
    lines = numbers[ok]
    if not good:
        return [[] for _ in range(ncol)], lines
    flat = ",".join(good).split(",")
    return [flat[k::ncol] for k in range(ncol)], lines


def _decode(raw: bytes, file: str) -> str:
    try:
        return raw.decode("utf-8-sig")
    except UnicodeDecodeError as e:
        line = raw[: e.start].count(b"\n") + 1
        raise CurveReadError([ReadIssue(file, line, None, "not UTF-8 text (is this a CSV file?)")]) from None


def read_curves(paths, skip_bad: bool = False) -> ReadResult:
    """Read one or more curve files (long or wide layout).

    Parameters
    ----------
    paths : path or iterable of paths
    skip_bad : bool
        Drop bad rows (and units left with too few curves) and report each one in
        ``ReadResult.skipped`` instead of rejecting the file.

    Raises
    ------
    CurveReadError
        Listing every problem (file, line, column) when a file is rejected.
    """
    if isinstance(paths, (str, Path)):
        paths = [paths]
    out = ReadResult()
    errors: list[ReadIssue] = []
    for p in paths:
        p = Path(p)
        try:
            raw = p.read_bytes()
        except OSError as e:
            errors.append(ReadIssue(str(p), None, None, f"cannot read file: {e.strerror or e}"))
            continue
        try:
            out.extend(read_text(_decode(raw, str(p)), str(p), default_tube=p.stem, skip_bad=skip_bad))
        except CurveReadError as e:
            errors.extend(e.issues)
    if errors:
        raise CurveReadError(errors)
    return out


def read_text(text: str, file: str = "<text>", default_tube: str = "unit", skip_bad: bool = False) -> ReadResult:
    """Read curve data from a string; see :func:`read_curves`."""
    if not isinstance(text, str):
        raise CurveReadError([ReadIssue(file, None, None, "input is not text")])
    header, header_line, data, numbers, directives = _split_lines(text)
    if header is None:
        raise CurveReadError([ReadIssue(file, None, None, "no header row (file is empty or only comments)")])
    names = [h.strip().lower() for h in header.split(",")]
    if any(_WIDE.match(n) for n in names):
        return _read_wide(names, header_line, data, numbers, directives, file, default_tube, skip_bad)
    return _read_long(names, header_line, data, numbers, file, default_tube, skip_bad)


def _header_issues(names, header_line, file):
    issues = []
    seen = {}
    for i, n in enumerate(names, start=1):
        label = f"{i} ({n!r})" if n else f"{i}"
        if n == "":
            issues.append(ReadIssue(file, header_line, label, "empty column name"))
            continue
        if n in seen:
            issues.append(ReadIssue(file, header_line, label, f"duplicate column {n!r} (also column {seen[n]})"))
            continue
        seen[n] = i
        if n not in _KNOWN:
            m = re.match(r"^(ia|ig)_(.*)$", n)
            if m:
                issues.append(ReadIssue(
                    file, header_line, label,
                    f"unknown current unit {m.group(2)!r}; use {m.group(1)}_ma, {m.group(1)}_a or {m.group(1)}_ua"))
            else:
                issues.append(ReadIssue(
                    file, header_line, label,
                    "unknown column; known columns are " + ", ".join(_KNOWN)
                    + " (or ia_<unit>@vg=<V> for the wide layout)"))
    return issues, seen


def _read_long(names, header_line, data, numbers, file, default_tube, skip_bad):
    issues, seen = _header_issues(names, header_line, file)
    for req in ("va", "vg"):
        if req not in seen:
            issues.append(ReadIssue(file, header_line, None, f"missing required column {req!r}"))
    ia_cols = [c for c in ("ia_ma", "ia_a", "ia_ua") if c in seen]
    ig_cols = [c for c in ("ig_ma", "ig_a", "ig_ua") if c in seen]
    if not ia_cols:
        issues.append(ReadIssue(file, header_line, None, "missing plate current column (one of ia_ma, ia_a, ia_ua)"))
    if len(ia_cols) > 1:
        issues.append(ReadIssue(file, header_line, ", ".join(ia_cols), "plate current given in more than one column; keep exactly one"))
    if len(ig_cols) > 1:
        issues.append(ReadIssue(file, header_line, ", ".join(ig_cols), "grid current given in more than one column; keep at most one"))
    if issues:
        raise CurveReadError(issues)

    cols, lines = _columns(data, numbers, len(names), file, issues, names)
    n = lines.size
    bad = np.zeros(n, dtype=bool)

    def column(name):
        return cols[seen[name] - 1]

    va = _float_cells(column("va"), lines, "va", file, issues, bad)
    vg = _float_cells(column("vg"), lines, "vg", file, issues, bad)
    ia_col = ia_cols[0]
    ia = _float_cells(column(ia_col), lines, ia_col, file, issues, bad) * _SCALE[ia_col[3:]]
    ig = None
    if ig_cols:
        ig_col = ig_cols[0]
        ig = _float_cells(column(ig_col), lines, ig_col, file, issues, bad) * _SCALE[ig_col[3:]]
    tubes = [t.strip() for t in column("tube")] if "tube" in seen else None
    sections = [s.strip() for s in column("section")] if "section" in seen else None
    if tubes is not None:
        for i, t in enumerate(tubes):
            if not t and not bad[i]:
                issues.append(ReadIssue(file, int(lines[i]), "tube", "empty tube identifier"))
                bad[i] = True
    notes = _check_currents(ia, lines, bad, issues, file, ia_col)
    return _finish(file, default_tube, issues, skip_bad, bad, lines, va, vg, ia, ig, tubes, sections, notes)


def _check_currents(ia, lines, bad, issues, file, col):
    notes = []
    good = ~bad
    if not good.any():
        return notes
    full = float(np.max(np.abs(ia[good])))
    tol = max(NEGATIVE_OFFSET_FRACTION * full, NEGATIVE_OFFSET_MIN)
    neg = good & (ia < 0)
    small = neg & (ia >= -tol)
    big = neg & (ia < -tol)
    for i in np.flatnonzero(big):
        issues.append(ReadIssue(
            file, int(lines[i]), col,
            f"negative plate current {ia[i] * 1e3:.4g} mA is beyond the instrument offset "
            f"(-{tol * 1e3:.3g} mA allowed)"))
        bad[i] = True
    if small.any():
        ia[small] = 0.0
        notes.append(f"{file}: {int(small.sum())} small negative current(s) down to "
                     f"-{tol * 1e3:.3g} mA taken as instrument offset and clipped to zero")
    return notes


def _finish(file, default_tube, issues, skip_bad, bad, lines, va, vg, ia, ig, tubes, sections, notes,
            default_section=None):
    result = ReadResult(notes=list(notes))
    issues.sort(key=lambda i: (i.line or 0))
    if issues and not skip_bad:
        raise CurveReadError(issues)
    result.skipped.extend(issues)
    good = ~bad
    keys_t = np.array(tubes, dtype=object) if tubes is not None else None
    keys_s = np.array(sections, dtype=object) if sections is not None else None
    idx = np.flatnonzero(good)
    if idx.size == 0:
        issue = ReadIssue(file, None, None, "no data rows" if not bad.size else "no usable data rows")
        if skip_bad:
            result.skipped.append(issue)
            return result
        raise CurveReadError([issue])
    # group rows by (tube, section), keeping the order of first appearance
    if keys_t is None and keys_s is None:
        groups = {(default_tube, default_section): idx}
    else:
        t = keys_t[idx] if keys_t is not None else [default_tube] * idx.size
        sec = keys_s[idx] if keys_s is not None else [""] * idx.size
        buckets: dict = {}
        for i, key in zip(idx.tolist(), zip(t, sec)):
            buckets.setdefault(key, []).append(i)
        groups = {(tube, section or None): np.array(m, dtype=np.int64) for (tube, section), m in buckets.items()}
    errors = []
    for (tube, section), m in groups.items():
        label = f"{tube}:{section}" if section else tube
        curves = np.unique(vg[m])
        if curves.size < 2:
            issue = ReadIssue(
                file, int(lines[m].min()), "vg",
                f"unit {label!r} has {curves.size} grid curve(s) (vg = {', '.join(f'{v:g}' for v in curves)} V); "
                "at least 2 are needed to identify mu")
            if skip_bad:
                result.skipped.append(issue)
                continue
            errors.append(issue)
            continue
        result.units.append(CurveSet(
            tube=tube, section=section, va=va[m].copy(), vg=vg[m].copy(), ia=ia[m].copy(),
            ig=None if ig is None else ig[m].copy(), source=file, lines=lines[m].copy(),
        ))
    if errors:
        raise CurveReadError(errors)
    return result


def _read_wide(names, header_line, data, numbers, directives, file, default_tube, skip_bad):
    issues = []
    if names[0] != "va":
        issues.append(ReadIssue(file, header_line, f"1 ({names[0]!r})",
                                "the wide layout's first column must be 'va'"))
    curves = []  # (column index, vg, scale, name)
    seen = {}
    for i, n in enumerate(names[1:], start=2):
        label = f"{i} ({n!r})"
        m = _WIDE.match(n)
        if not m:
            issues.append(ReadIssue(file, header_line, label,
                                    "in the wide layout every column after 'va' must be ia_<unit>@vg=<V>"))
            continue
        unit = m.group("unit")
        if unit not in _SCALE:
            issues.append(ReadIssue(file, header_line, label, f"unknown current unit {unit!r}; use ia_ma, ia_a or ia_ua"))
            continue
        try:
            v = float(m.group("vg")) + 0.0  # -0 and 0 are the same curve
            if not np.isfinite(v):
                raise ValueError
        except ValueError:
            issues.append(ReadIssue(file, header_line, label, f"grid voltage {m.group('vg')!r} is not a finite number"))
            continue
        if v in seen:
            issues.append(ReadIssue(file, header_line, label, f"duplicate curve for vg = {v:g} V (also column {seen[v]})"))
            continue
        seen[v] = i
        curves.append((i - 1, v, _SCALE[unit], n))
    if issues:
        raise CurveReadError(issues)
    cols, lines = _columns(data, numbers, len(names), file, issues, names)
    bad_rows = np.zeros(lines.size, dtype=bool)
    va = _float_cells(cols[0], lines, "va", file, issues, bad_rows)
    all_va, all_vg, all_ia, all_lines, all_bad = [], [], [], [], []
    for j, v, scale, name in curves:
        bad = bad_rows.copy()
        cells = cols[j]
        vals = _float_cells(cells, lines, name, file, issues, bad, allow_empty=True)
        present = np.isfinite(vals) | bad
        all_va.append(va[present])
        all_vg.append(np.full(int(present.sum()), v))
        all_ia.append(np.where(bad[present], 0.0, vals[present]) * scale)
        all_lines.append(lines[present])
        all_bad.append(bad[present])
    va_l = np.concatenate(all_va) if all_va else np.empty(0)
    vg_l = np.concatenate(all_vg) if all_vg else np.empty(0)
    ia_l = np.concatenate(all_ia) if all_ia else np.empty(0)
    ln_l = np.concatenate(all_lines) if all_lines else np.empty(0, dtype=np.int64)
    bad_l = np.concatenate(all_bad) if all_bad else np.empty(0, dtype=bool)
    notes = _check_currents(ia_l, ln_l, bad_l, issues, file, "plate current")
    tube = directives.get("tube") or default_tube
    section = directives.get("section") or None
    return _finish(file, tube, issues, skip_bad, bad_l, ln_l, va_l, vg_l, ia_l, None, None, None, notes,
                   default_section=section)


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
        notes.append(f"{int(outside.sum())} point(s) with negative plate voltage dropped (outside the model's domain)")
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


def check_for_model(unit: CurveSet, model) -> ReadIssue | None:
    """An issue when ``unit`` has too few points or curves to identify ``model``."""
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
