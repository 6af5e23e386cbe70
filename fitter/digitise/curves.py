"""From followed lines to curve points and to Platebook's wide CSV layout.

Contract (shared with the web front end, issue 12)::

    def curve_points(trace: Trace, axes: AxisMap, *, n: int = 40) -> tuple[np.ndarray, np.ndarray]
        # (va [V], ia [mA]) thinned/resampled to about n points spread along the curve, va increasing.

    def curves_to_wide_csv(curves: Sequence[tuple[float, Sequence[float], Sequence[float]]], *,
                           tube: str, section: str = "", note: str = "") -> str
        # curves: (grid_v, va, ia_ma) per curve; returns text in Platebook's wide layout (see
        # curves/datasheet_medium_mu_wide.csv and fitter/reader.py: `va,ia_ma@vg=...` header, a
        # `# tube:` directive, empty cells where a curve has no point at that va), with comment lines
        # saying it was digitised from a datasheet plot. fitter.reader.read_curves must read it
        # unchanged. Bad curves (fewer than 3 points, duplicate grid voltages, non-finite) ->
        # DigitiseInputError(field="curves[i]...").

Thinning.  A trace has a point per pixel column, each good to a fraction of a pixel.  The
points kept are spread evenly along the curve's length *on the page* (so a steep stretch keeps
as many as a flat one), and each is the mean of the trace points within
:data:`AVERAGE_PX` pixels of it along the curve, which quiets the pixel noise while the
curve's bend over so short a stretch stays far below a pixel.
"""

from __future__ import annotations

import math
from typing import Sequence

import numpy as np

from ..errors import InputError
from ..text import plain_text
from .axes import AxisMap
from .image import DigitiseInputError
from .trace import Trace

__all__ = ["curve_points", "curves_to_wide_csv", "AVERAGE_PX", "MAX_CURVES", "MAX_POINTS"]

#: half-length of the stretch of trace averaged into each kept point [px along the curve]
AVERAGE_PX = 6.0
#: most curves and points per curve a digitised file may carry
MAX_CURVES = 100
MAX_POINTS = 5000


def curve_points(trace: Trace, axes: AxisMap, *, n: int = 40) -> tuple[np.ndarray, np.ndarray]:
    """(va [V], ia [mA]) at about ``n`` points spread along the traced curve, va increasing.

    Points more than a pixel beyond the zero lines of the axes (negative plate voltage or
    current) are left out: a plate curve has none, and there the tracer has run along an
    axis or into its tick labels (possible when no box is given).  So fewer than ``n``, or
    none, may come back."""
    if not isinstance(trace, Trace):
        raise DigitiseInputError(f"must be a traced curve, got {type(trace).__name__}", field="trace")
    if not isinstance(axes, AxisMap):
        raise DigitiseInputError(f"must be a fitted axis map, got {type(axes).__name__}", field="axes")
    if isinstance(n, bool) or not isinstance(n, (int, np.integer)) or not 2 <= n <= MAX_POINTS:
        raise DigitiseInputError(f"must be a whole number from 2 to {MAX_POINTS}, got {n!r}", field="n")
    try:
        px = np.asarray(trace.px, float)
        py = np.asarray(trace.py, float)
    except (TypeError, ValueError):
        raise DigitiseInputError("the traced points must be numbers", field="trace") from None
    if px.ndim != 1 or px.shape != py.shape:
        raise DigitiseInputError(f"px and py must be lists of one length, got {px.shape} and {py.shape}",
                                 field="trace")
    if px.size == 0:
        raise DigitiseInputError("the traced curve has no points", field="trace")
    if px.size > 100_000 or not (np.isfinite(px).all() and np.isfinite(py).all()):
        raise DigitiseInputError("the traced points must be finite (and at most 100,000)", field="trace")
    if px.size > n:
        seg = np.hypot(np.diff(px), np.diff(py))
        s = np.concatenate([[0.0], np.cumsum(seg)])
        targets = np.linspace(s[0], s[-1], n)
        # the trace point nearest each target; targets that fall in one gap of the trace (a
        # bridged crossing) land on one point, kept once
        centre = np.clip(np.searchsorted(s, targets), 0, px.size - 1)
        centre = np.unique(centre)
        # each kept point: the mean of the trace within AVERAGE_PX along the curve, the window
        # made symmetric about the point (so at the ends the ends stay the ends)
        lo = np.searchsorted(s, s[centre] - AVERAGE_PX, side="left")
        hi = np.searchsorted(s, s[centre] + AVERAGE_PX, side="right")
        half = np.maximum(np.minimum(centre - lo, hi - 1 - centre), 0)
        lo, hi = centre - half, centre + half + 1
        cx = np.concatenate([[0.0], np.cumsum(px)])
        cy = np.concatenate([[0.0], np.cumsum(py)])
        cnt = hi - lo
        px = (cx[hi] - cx[lo]) / cnt
        py = (cy[hi] - cy[lo]) / cnt
    va, ia = axes.to_data(px, py)
    # beyond the zero lines of the axes (by more than a pixel) is off a plate-curve plot: the
    # tracer went on along an axis or into its tick labels
    keep = (va >= -math.hypot(*axes.va_coef[1:])) & (ia >= -math.hypot(*axes.ia_coef[1:]))
    va, ia = va[keep], ia[keep]
    order = np.argsort(va, kind="stable")
    return va[order], ia[order]


def _fmt(v: float) -> str:
    s = f"{v:.6g}"
    return "0" if s == "-0" else s


def _name(value, field: str, empty: bool) -> str:
    if value is None and empty:
        return ""
    try:
        text = plain_text(value, field, empty=empty)
    except InputError as e:
        raise DigitiseInputError(e.message, field=field) from None
    text = text.strip()
    if not text and not empty:
        raise DigitiseInputError("must not be blank", field=field)
    if "#" in text or "," in text:
        raise DigitiseInputError("must not contain '#' or ','", field=field)
    return text


def _values(seq, field: str) -> np.ndarray:
    if isinstance(seq, (str, bytes)):
        raise DigitiseInputError("must be a list of numbers", field=field)
    try:
        a = np.asarray(seq, dtype=float)
    except (TypeError, ValueError):
        raise DigitiseInputError("must be a list of numbers", field=field) from None
    if a.ndim != 1:
        raise DigitiseInputError("must be a flat list of numbers", field=field)
    bad = np.flatnonzero(~np.isfinite(a))
    if bad.size:
        raise DigitiseInputError(f"is not a finite number ({a[bad[0]]})", field=f"{field}[{int(bad[0])}]")
    return a


def curves_to_wide_csv(curves: Sequence[tuple[float, Sequence[float], Sequence[float]]], *,
                       tube: str, section: str = "", note: str = "") -> str:
    """Digitised curves as a wide-layout CSV text that :func:`fitter.reader.read_text` reads
    as one unit of ``tube`` (and ``section``).

    Each curve is ``(grid_v, va, ia_ma)``.  Rows are the plate voltages of every curve (as
    written, to six significant digits), a curve's cell empty where it has no point.

    Raises
    ------
    DigitiseInputError
        ``curves`` not a list of (grid voltage, va, ia) with 1..100 curves, or ``curves[i]``:
        fewer than 3 points, more than 5000, va and ia of different lengths, non-finite values
        (``curves[i].va[j]``), two points at one plate voltage, a grid voltage that is not a
        finite number or repeats another curve's (``curves[i].grid_v``); ``tube``, ``section``
        or ``note`` that is not plain text.
    """
    tube = _name(tube, "tube", empty=False)
    section = _name(section, "section", empty=True)
    if not isinstance(note, str):
        raise DigitiseInputError(f"must be text, got {type(note).__name__}", field="note")
    if len(note) > 2000:
        raise DigitiseInputError(f"is {len(note)} characters long; at most 2000 are allowed", field="note")
    if isinstance(curves, (str, bytes)) or not isinstance(curves, Sequence):
        raise DigitiseInputError("must be a list of (grid voltage, va, ia) curves", field="curves")
    if not 1 <= len(curves) <= MAX_CURVES:
        raise DigitiseInputError(f"{len(curves)} curves given; 1 to {MAX_CURVES} are accepted", field="curves")
    cols = []  # (vg, {va text: ia text})
    seen: dict[str, int] = {}
    all_va: dict[str, float] = {}
    for i, c in enumerate(curves):
        f = f"curves[{i}]"
        if isinstance(c, (str, bytes)) or not isinstance(c, Sequence) or len(c) != 3:
            raise DigitiseInputError("must be (grid voltage, va list, ia list)", field=f)
        g, va, ia = c
        if isinstance(g, bool):
            raise DigitiseInputError("must be a number", field=f"{f}.grid_v")
        try:
            vg = float(g)
        except (TypeError, ValueError):
            raise DigitiseInputError("must be a number", field=f"{f}.grid_v") from None
        if not math.isfinite(vg):
            raise DigitiseInputError(f"must be a finite number, got {vg}", field=f"{f}.grid_v")
        if abs(vg) > 10_000:
            raise DigitiseInputError(f"{vg:g} V is beyond any tube's grid voltage", field=f"{f}.grid_v")
        key = _fmt(vg + 0.0)
        if key in seen:
            raise DigitiseInputError(f"vg = {key} V is also curves[{seen[key]}]'s grid voltage; "
                                     "each curve needs its own", field=f"{f}.grid_v")
        seen[key] = i
        va = _values(va, f"{f}.va")
        ia = _values(ia, f"{f}.ia")
        if va.size != ia.size:
            raise DigitiseInputError(f"has {va.size} plate voltages but {ia.size} currents", field=f)
        if va.size < 3:
            raise DigitiseInputError(f"has {va.size} point(s); at least 3 are needed", field=f)
        if va.size > MAX_POINTS:
            raise DigitiseInputError(f"has {va.size} points; at most {MAX_POINTS} are accepted", field=f)
        cells: dict[str, str] = {}
        for j, (a, b) in enumerate(zip(va.tolist(), ia.tolist())):
            k = _fmt(a)
            if k in cells:
                raise DigitiseInputError(f"a second point at va = {k} V (each plate voltage once per curve)",
                                         field=f"{f}.va[{j}]")
            cells[k] = _fmt(b)
            all_va[k] = float(k)
        cols.append((key, cells))
    rows = sorted(all_va, key=all_va.__getitem__)
    out = ["# Plate curves digitised from a datasheet plot (points read off an image of the page, not measured);"
           " written by Platebook's digitiser.",
           "# Reading error: about a pixel of the page in voltage and current."]
    for line in note.splitlines():
        line = line.strip()
        if line:
            try:
                plain_text(line, "note", max_len=2000)
            except InputError as e:
                raise DigitiseInputError(e.message, field="note") from None
            out.append("# note: " + line)
    out.append(f"# tube: {tube}")
    if section:
        out.append(f"# section: {section}")
    out.append("va," + ",".join(f"ia_ma@vg={k}" for k, _ in cols))
    for r in rows:
        out.append(r + "," + ",".join(cells.get(r, "") for _, cells in cols))
    return "\n".join(out) + "\n"
