"""Following one plotted curve from a single click.

Contract (shared with the web front end, issue 12)::

    @dataclass(frozen=True)
    class Trace:
        px: np.ndarray; py: np.ndarray   # ordered by px, one point per followed column (or step)
        stop_left: str; stop_right: str  # why it stopped: "edge", "end of line", "box"
        def to_dict(self) -> dict

    def trace_curve(image: PlotImage, seed: tuple[float, float], *,
                    box: tuple[float, float, float, float] | None = None) -> Trace
        # follow the dark line through `seed` both ways along x; box = (x0, y0, x1, y1) pixel limits
        # of the plot area (default: whole image); crosses grid lines, ticks, labels, other curves.
        # seed not on or near (a few px) a line -> DigitiseInputError(field="seed").

How it follows.  From the seed the tracer steps one column at a time, each way, and looks
only at a stretch of each column around where it expects the line (its runs of ink, start
and end, found by one vectorised pass over that stretch).  It predicts the row from the
points it has accepted (a straight line through the last few, so the slope carries it), and
takes the run of ink nearest the prediction within a window that widens with the slope and
with the columns it has had to bridge.  A run is accepted only if its length fits the line
being followed (the line's own thickness plus the rise across one column; not under half of
that, not much over it) and its centre is close to the prediction; otherwise the column is
bridged on the prediction:

* a vertical grid line, an axis or a tick makes a long run in its column (a rotated page's
  grid line a run of tens of pixels);
* a horizontal grid line, another curve or a printed load line crossing the curve merge with
  it into one long run for a few columns; after them the runs part, and the slope picks the
  curve again;
* a label touching the curve does the same; one beside it is a separate run, further from
  the prediction than the curve;
* where a curve ends beside a grid line, the grid line's run is too thin and too far off the
  prediction to be taken up.

The point of an accepted column is the ink-weighted centre of its run (one pixel of margin
either side, so a blurred line's edges count), which gives the row to a fraction of a pixel;
of a run somewhat longer than the line (something starting to touch it), only its core
nearest the prediction, or the part where the line is expected, counts.

The tracer stops at the box's edge ("box"; "edge" when the box is the whole image); where
the line runs straight and level for :data:`FLAT_PX` columns (it has run into an axis: all
but the first few columns of the level stretch are dropped, "end of line"); when no ink is
found near the prediction over :data:`GAP_PX` pixels of its length ("end of line"); or when
it has bridged :data:`BRIDGE_PX` columns without finding the line again ("end of line").
Steep stretches are followed column by column too (a run per column as long as the rise),
to slopes of about 15 rows per column.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from .image import DigitiseInputError, PlotImage

__all__ = ["Trace", "trace_curve", "INK_THRESHOLD", "GAP_PX", "BRIDGE_PX", "SEED_RADIUS_PX", "FLAT_PX"]

#: ink level above which a pixel belongs to a line
INK_THRESHOLD = 0.4
#: length of line [px] without any ink near the prediction after which the line has ended
GAP_PX = 8
#: columns bridged over crossings (without an accepted run) before giving up
BRIDGE_PX = 40
#: how far from the seed a line is looked for [px]
SEED_RADIUS_PX = 5
#: accepted points the prediction's straight line is fitted through
_HISTORY = 8
#: columns dropped where a line ends (its last column is cut off square, so its centre is off)
_END_TRIM = 2
#: columns of a level stretch kept (where the curve meets the axis it runs into)
_FLAT_KEEP = 10
#: a line followed this many columns straight (rms FLAT_TOL_PX) and level (slope at most
#: FLAT_SLOPE, a rotated page's axis included) is an axis or a grid line that the curve has
#: run into: a triode's plate curve is never level that long except where it lies on the
#: zero-current axis
FLAT_PX = 40
FLAT_TOL_PX = 0.3
FLAT_SLOPE = 0.06


@dataclass(frozen=True)
class Trace:
    """The followed line: pixel columns ``px`` (increasing) and rows ``py`` (sub-pixel), and
    why the tracer stopped on each side ("edge", "end of line" or "box")."""

    px: np.ndarray
    py: np.ndarray
    stop_left: str
    stop_right: str

    def to_dict(self) -> dict:
        return {"px": [round(float(x), 3) for x in self.px], "py": [round(float(y), 3) for y in self.py],
                "stop_left": self.stop_left, "stop_right": self.stop_right, "n": int(self.px.size)}


def _column(ink: np.ndarray, x: int, lo: int, hi: int):
    """Runs of ink in column x between rows lo and hi: (starts, ends (exclusive), values of
    rows lo..hi).  A run cut by lo or hi is reported as far as it is seen."""
    col = ink[lo:hi, x]
    b = col > INK_THRESHOLD
    e = (np.flatnonzero(b[1:] != b[:-1]) + (lo + 1)).tolist()
    if b[0]:
        e.insert(0, lo)
    if b[-1]:
        e.append(hi)
    return e[0::2], e[1::2], col


def _centre(col, lo: int, s: int, e: int, margin: int = 1) -> float:
    """Ink-weighted centre row of the run [s, e) (``margin`` pixels more each side; ``col``
    holds the column's values from row ``lo``)."""
    a = max(s - margin - lo, 0)
    b = min(e + margin - lo, col.shape[0])
    vals = col[a:b].tolist()
    tot = 0.0
    mom = 0.0
    for i, v in enumerate(vals):
        v -= 0.3
        if v > 0.0:
            tot += v
            mom += v * i
    if tot <= 0.0:
        return 0.5 * (s + e - 1)
    return lo + a + mom / tot


def _touched_centre(col, lo: int, s: int, e: int, yp: float, expect: float) -> float:
    """Centre of the line in a run longer than the line: something touches it (a crossing
    line, a label).  Where the run has two or more cores (pixels above 70 % of its darkest,
    parted by lighter ones), the core nearest the prediction ``yp``; otherwise the part of
    the run within half the expected length of the prediction."""
    vals = col[s - lo:e - lo].tolist()
    top = 0.7 * max(vals)
    cores = []
    start = None
    for i, v in enumerate(vals + [0.0]):
        if v > top and start is None:
            start = i
        elif v <= top and start is not None:
            cores.append((s + start, s + i))
            start = None
    if len(cores) > 1:
        a, b = min(cores, key=lambda c: max(c[0] - yp, yp - (c[1] - 1), 0.0))
        return _centre(col, lo, a, b)
    half = 0.5 * expect
    return _centre(col, lo, max(s, int(math.floor(yp - half))), min(e, int(math.ceil(yp + half)) + 1), 0)


def _predict(hx: list, hy: list, x: int) -> tuple[float, float]:
    """(row predicted at column x, slope) from the accepted points' last few: the slope of a
    least-squares line through them, anchored at the last point."""
    n = len(hx)
    if n == 1:
        return hy[-1], 0.0
    k = min(n, _HISTORY)
    xs = hx[-k:]
    ys = hy[-k:]
    mx = sum(xs) / k
    my = sum(ys) / k
    sxx = 0.0
    sxy = 0.0
    for u, v in zip(xs, ys):
        du = u - mx
        sxx += du * du
        sxy += du * (v - my)
    if sxx <= 0:
        return hy[-1], 0.0
    slope = sxy / sxx
    return hy[-1] + slope * (x - hx[-1]), slope


def _flat(xs: list, ys: list) -> bool:
    """Whether the last FLAT_PX points lie on a straight line within FLAT_SLOPE of level
    (rms distance from it at most FLAT_TOL_PX), over about as many columns."""
    if len(xs) < FLAT_PX or abs(xs[-1] - xs[-FLAT_PX]) > 1.5 * FLAT_PX:
        return False
    x = xs[-FLAT_PX:]
    y = ys[-FLAT_PX:]
    mx = sum(x) / FLAT_PX
    my = sum(y) / FLAT_PX
    sxx = sxy = syy = 0.0
    for u, v in zip(x, y):
        u -= mx
        v -= my
        sxx += u * u
        sxy += u * v
        syy += v * v
    slope = sxy / sxx
    if abs(slope) > FLAT_SLOPE:
        return False
    # residual sum of squares of the least-squares line: syy - sxy^2 / sxx
    return max(syy - slope * sxy, 0.0) / FLAT_PX <= FLAT_TOL_PX ** 2


def _follow(ink, box, hx: list, hy: list, step: int, thick: float) -> tuple[list, list, str, float]:
    """Step from the last history point in direction ``step`` (+1 or -1); returns the new
    points (in stepping order), the stop reason and the line thickness seen."""
    x0, y0, x1, y1, whole = box
    out_x, out_y = [], []
    x = hx[-1]
    gap = 0.0  # length of line [px] without ink near the prediction
    since = 0  # columns since the last accepted one
    bridged = 0
    lengths = []
    at_box = "edge" if whole else "box"
    while True:
        x += step
        if x < x0 or x >= x1:
            return out_x, out_y, at_box, thick
        yp, slope = _predict(hx, hy, x)
        if yp < y0 - 1 or yp > y1:
            return out_x, out_y, at_box, thick
        a = abs(slope)
        expect = thick + a
        limit = expect + max(3.0, 0.6 * expect)  # longest run that is still the line itself
        win = 2.0 + 0.75 * thick + a + 0.5 * since * (1.0 + a)
        lo = max(y0, int(yp - win - limit - 2))
        hi = min(y1, int(yp + win + limit + 3))
        starts, ends, col = _column(ink, x, lo, hi)
        best = None
        bestd = 1e18
        wlo, whi = yp - win, yp + win
        for s, e in zip(starts, ends):
            if e <= wlo:
                continue
            if s > whi:
                break
            # distance from the prediction to the run (0 inside it), then to its middle
            d = max(s - yp, yp - (e - 1), 0.0) + 0.01 * abs(0.5 * (s + e - 1) - yp)
            if d < bestd:
                bestd, best = d, (s, e)
        since += 1
        if best is not None:
            s, e = best
            length = e - s
            # a run much shorter than the line is not the line either (a thin grid line
            # where the curve has ended)
            if 0.5 * expect - 0.5 <= length <= limit:
                if length <= expect + 0.75:
                    y = _centre(col, lo, s, e)
                else:
                    y = _touched_centre(col, lo, s, e, yp, expect)
                # the line's centre stays close to the prediction (continuity of slope): a
                # run further off is something else the window caught (a grid line where the
                # curve ends, the other line of a crossing)
                if abs(y - yp) <= 1.0 + 0.5 * thick + 0.5 * a + 0.5 * since * (1.0 + a):
                    hx.append(x)
                    hy.append(y)
                    out_x.append(x)
                    out_y.append(y)
                    lengths.append(length - a)
                    if len(lengths) % 5 == 0:
                        thick = min(max(float(np.median(lengths[-25:])), 1.0), 12.0)
                    gap = 0.0
                    since = 0
                    bridged = 0
                    if len(out_x) % 8 == 0 and _flat(out_x, out_y):
                        # an axis or a grid line the curve has run into: drop the straight stretch
                        del out_x[len(out_x) - FLAT_PX + _FLAT_KEEP:], out_y[len(out_y) - FLAT_PX + _FLAT_KEEP:]
                        return out_x, out_y, "end of line", thick
                    continue
            bridged += 1
        else:
            gap += math.hypot(1.0, slope)
            if gap > GAP_PX:
                return out_x[:len(out_x) - _END_TRIM], out_y[:len(out_y) - _END_TRIM], "end of line", thick
        if bridged > BRIDGE_PX:
            return out_x, out_y, "end of line", thick


def _seed_run(ink, sx: float, sy: float, box):
    """(column, start, end, centre) of the line at the seed, or None: the run nearest the seed
    within SEED_RADIUS_PX in the seed's column or its neighbours, not a long vertical run."""
    x0, y0, x1, y1, _ = box
    cx = int(round(sx))
    longest = 4 * SEED_RADIUS_PX + 10  # a longer run is a vertical line (grid, axis), not a curve
    lo = max(y0, int(sy) - SEED_RADIUS_PX - longest - 2)
    hi = min(y1, int(sy) + SEED_RADIUS_PX + longest + 3)
    best = None
    for dx in (0, 1, -1, 2, -2, 3, -3):
        x = cx + dx
        if x < x0 or x >= x1:
            continue
        starts, ends, col = _column(ink, x, lo, hi)
        for s, e in zip(starts, ends):
            if e - s > longest:
                continue
            d = max(s - sy, sy - (e - 1), 0.0)
            if d > SEED_RADIUS_PX:
                continue
            score = d + 0.5 * abs(dx)
            if best is None or score < best[0]:
                best = (score, x, s, e, _centre(col, lo, s, e))
    return None if best is None else best[1:]


def _box(image: PlotImage, box) -> tuple[int, int, int, int, bool]:
    W, H = image.width, image.height
    if box is None:
        return 0, 0, W, H, True
    try:
        vals = [float(v) for v in box]
    except (TypeError, ValueError):
        raise DigitiseInputError("must be four numbers (x0, y0, x1, y1)", field="box") from None
    if len(vals) != 4 or not all(math.isfinite(v) for v in vals):
        raise DigitiseInputError("must be four finite numbers (x0, y0, x1, y1)", field="box")
    bx0, by0, bx1, by1 = vals
    bx0, bx1 = sorted((bx0, bx1))
    by0, by1 = sorted((by0, by1))
    x0, y0 = max(0, int(math.floor(bx0))), max(0, int(math.floor(by0)))
    x1, y1 = min(W, int(math.ceil(bx1)) + 1), min(H, int(math.ceil(by1)) + 1)
    if x1 - x0 < 8 or y1 - y0 < 8:
        raise DigitiseInputError(f"the box ({bx0:g}, {by0:g}) .. ({bx1:g}, {by1:g}) leaves less than 8 x 8 pixels of "
                                 f"the {W} x {H} image", field="box")
    whole = x0 == 0 and y0 == 0 and x1 == W and y1 == H
    return x0, y0, x1, y1, whole


def trace_curve(image: PlotImage, seed: tuple[float, float], *,
                box: tuple[float, float, float, float] | None = None) -> Trace:
    """Follow the line through ``seed`` (px, py) both ways along x (see the module's notes).

    Raises
    ------
    DigitiseInputError
        ``seed`` not two finite numbers, outside the box, or not on or within
        :data:`SEED_RADIUS_PX` pixels of a line (field ``seed``); a bad ``box`` (field ``box``).
    """
    if not isinstance(image, PlotImage):
        raise DigitiseInputError(f"must be a loaded image, got {type(image).__name__}", field="image")
    try:
        sx, sy = (float(v) for v in seed)
    except (TypeError, ValueError):
        raise DigitiseInputError("must be two numbers (px, py)", field="seed") from None
    if not (math.isfinite(sx) and math.isfinite(sy)):
        raise DigitiseInputError("must be two finite numbers (px, py)", field="seed")
    b = _box(image, box)
    x0, y0, x1, y1, _ = b
    if not (x0 <= sx < x1 and y0 <= sy < y1):
        raise DigitiseInputError(f"({sx:g}, {sy:g}) is outside the plot area ({x0}, {y0}) .. ({x1 - 1}, {y1 - 1})",
                                 field="seed")
    ink = image.ink
    found = _seed_run(ink, sx, sy, b)
    if found is None:
        raise DigitiseInputError(f"no line at or within {SEED_RADIUS_PX} px of ({sx:.1f}, {sy:.1f}); "
                                 "click on the curve itself", field="seed")
    x, s, e, y = found
    thick = float(min(max(e - s, 1), 12))
    rx, ry, stop_right, thick_r = _follow(ink, b, [x], [y], +1, thick)
    # leftwards, the prediction starts from the first points found rightwards (the slope is known)
    hx = list(reversed(rx[:_HISTORY])) + [x]
    hy = list(reversed(ry[:_HISTORY])) + [y]
    lx, ly, stop_left, _ = _follow(ink, b, hx, hy, -1, thick_r if rx else thick)
    px = np.array(lx[::-1] + [x] + rx, dtype=float)
    py = np.array(ly[::-1] + [y] + ry, dtype=float)
    return Trace(px=px, py=py, stop_left=stop_left, stop_right=stop_right)
