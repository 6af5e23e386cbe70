"""Axes from the user's marks: pixel <-> (plate voltage, plate current).

Contract (shared with the web front end, issue 12)::

    @dataclass(frozen=True)
    class AxisMark:
        px: float            # image pixel column (x to the right), may be fractional
        py: float            # image pixel row (y downwards)
        axis: str            # "va" (plate voltage axis, volts) or "ia" (plate current axis, mA)
        value: float

    @dataclass(frozen=True)
    class AxisMap:
        def to_data(self, px, py) -> tuple[np.ndarray, np.ndarray]     # (va [V], ia [mA])
        def to_pixel(self, va, ia_ma) -> tuple[np.ndarray, np.ndarray] # inverse
        residuals: tuple[float, ...]   # per mark, in pixels, in the order given (how far the mark is
                                       # from where the fitted map puts its value)
        rms_px: float
        worst: int | None              # index of the mark with the largest residual, if it stands out
        def to_dict(self) -> dict      # JSON-ready: coefficients, residuals, rms_px, worst

    def fit_axes(marks: Sequence[AxisMark]) -> AxisMap
        # >= 2 marks per axis (else DigitiseInputError field "marks"); two marks of one axis at the
        # same pixel, non-finite values, equal values -> error naming "marks[i]...".
        # With 2 marks per axis: axis-aligned scale+offset. With >= 3 marks on an axis: that axis's
        # value is an affine function of (px, py), least squares (corrects rotation and skew).

The map.  Each axis's value is ``a + bx * px + by * py``.  With two marks on an axis the map
is axis-aligned (plate voltage from the column alone, current from the row alone).  With three
or more, the value's gradient is fitted by least squares.  Marks clicked along one axis line
are collinear, and collinear marks cannot say how the value changes across that line; but on
any plot the lines of equal plate voltage run parallel to the current axis and the lines of
equal current parallel to the voltage axis.  So when an axis's marks are (nearly) collinear the
gradient is taken at right angles to the *other* axis's line (through that axis's marks), and
only its size and the offset are fitted: rotation and skew are both corrected.  When the marks
spread in both directions (marks on grid-line crossings anywhere in the plot), all three
coefficients are fitted.

A mark's residual is its distance in pixels from the line where the fitted map gives its value
(the value error divided by the gradient's length).  ``worst`` names the mark with the largest
residual when it is at least :data:`WORST_MIN_PX` and 1.5 times the next largest of its axis.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Sequence

import numpy as np

from .image import DigitiseInputError

__all__ = ["AxisMark", "AxisMap", "fit_axes", "WORST_MIN_PX"]

#: A residual below this [px] is click noise, never singled out as the worst mark.
WORST_MIN_PX = 1.5
#: Marks whose spread across their own line is below this [px] count as collinear.
_COLLINEAR_PX = 3.0
_AXES = ("va", "ia")


@dataclass(frozen=True)
class AxisMark:
    """A point of known value that the user clicked on one axis.

    ``px`` is the pixel column (x to the right), ``py`` the pixel row (y downwards), ``axis``
    is ``"va"`` (plate voltage, V) or ``"ia"`` (plate current, mA), ``value`` the axis value
    at that point."""

    px: float
    py: float
    axis: str
    value: float


@dataclass(frozen=True)
class AxisMap:
    """The fitted pixel -> data map.  ``va_coef`` and ``ia_coef`` are ``(a, bx, by)`` with
    ``value = a + bx * px + by * py`` (V, and mA)."""

    va_coef: tuple[float, float, float]
    ia_coef: tuple[float, float, float]
    residuals: tuple[float, ...]
    rms_px: float
    worst: int | None
    #: how each axis was fitted: "aligned" (2 marks), "across other axis" (collinear marks)
    #: or "affine" (marks spread in both directions)
    kinds: tuple[str, str] = ("aligned", "aligned")

    def _matrix(self) -> np.ndarray:
        return np.array([[self.va_coef[1], self.va_coef[2]], [self.ia_coef[1], self.ia_coef[2]]])

    def to_data(self, px, py) -> tuple[np.ndarray, np.ndarray]:
        """(va [V], ia [mA]) at pixel column ``px`` and row ``py`` (arrays broadcast)."""
        px = np.asarray(px, float)
        py = np.asarray(py, float)
        a, bx, by = self.va_coef
        c, cx, cy = self.ia_coef
        return a + bx * px + by * py, c + cx * px + cy * py

    def to_pixel(self, va, ia_ma) -> tuple[np.ndarray, np.ndarray]:
        """(px, py) of plate voltage ``va`` [V] and current ``ia_ma`` [mA] (the inverse map)."""
        va = np.asarray(va, float)
        ia_ma = np.asarray(ia_ma, float)
        inv = np.linalg.inv(self._matrix())
        u = va - self.va_coef[0]
        v = ia_ma - self.ia_coef[0]
        return inv[0, 0] * u + inv[0, 1] * v, inv[1, 0] * u + inv[1, 1] * v

    def to_dict(self) -> dict:
        def coef(c):
            return {"a": float(c[0]), "bx": float(c[1]), "by": float(c[2])}

        return {
            "va": coef(self.va_coef) | {"unit": "V", "fit": self.kinds[0]},
            "ia": coef(self.ia_coef) | {"unit": "mA", "fit": self.kinds[1]},
            "residuals_px": [float(r) for r in self.residuals],
            "rms_px": float(self.rms_px),
            "worst": self.worst,
        }


#: largest pixel coordinate and axis value accepted (far beyond any page and any tube)
_MAX_PX = 1e6
_MAX_VALUE = 1e7


def _number(x, field: str, limit: float) -> float:
    if isinstance(x, bool):
        raise DigitiseInputError(f"must be a number, got {x!r}", field=field)
    try:
        v = float(x)
    except (TypeError, ValueError):
        raise DigitiseInputError(f"must be a number, got {type(x).__name__}", field=field) from None
    if not math.isfinite(v):
        raise DigitiseInputError(f"must be a finite number, got {v}", field=field)
    if abs(v) > limit:
        raise DigitiseInputError(f"{v:g} is beyond any plot (at most {limit:g} in size)", field=field)
    return v


def _check(marks) -> list[tuple[float, float, str, float]]:
    if isinstance(marks, (str, bytes)) or not isinstance(marks, Sequence):
        raise DigitiseInputError("must be a list of axis marks", field="marks")
    if len(marks) > 1000:
        raise DigitiseInputError(f"{len(marks)} marks given; at most 1000 are accepted", field="marks")
    out = []
    for i, m in enumerate(marks):
        f = f"marks[{i}]"
        if not isinstance(m, AxisMark):
            raise DigitiseInputError(f"must be an axis mark, got {type(m).__name__}", field=f)
        if m.axis not in _AXES:
            raise DigitiseInputError(f"axis must be 'va' or 'ia', got {str(m.axis)[:20]!r}", field=f"{f}.axis")
        out.append((_number(m.px, f"{f}.px", _MAX_PX), _number(m.py, f"{f}.py", _MAX_PX), m.axis,
                    _number(m.value, f"{f}.value", _MAX_VALUE)))
    for axis in _AXES:
        idx = [i for i, m in enumerate(out) if m[2] == axis]
        if len(idx) < 2:
            what = "plate voltage (va)" if axis == "va" else "plate current (ia)"
            raise DigitiseInputError(f"at least two marks on the {what} axis are needed, {len(idx)} given",
                                     field="marks")
        for k, j in enumerate(idx):
            for i in idx[:k]:
                if math.hypot(out[i][0] - out[j][0], out[i][1] - out[j][1]) < 0.5:
                    raise DigitiseInputError(f"is at the same pixel as marks[{i}] (both on the {axis} axis)",
                                             field=f"marks[{j}]")
                if out[i][3] == out[j][3]:
                    raise DigitiseInputError(f"has the same value ({out[j][3]:g}) as marks[{i}] on the {axis} axis; "
                                             "each mark of an axis needs its own value", field=f"marks[{j}].value")
    return out


def _direction(pts: np.ndarray) -> tuple[np.ndarray, float]:
    """Unit direction of the marks' principal line and their spread across it [px]."""
    c = pts - pts.mean(axis=0)
    _, s, vt = np.linalg.svd(c, full_matrices=False)
    across = float(s[1] / math.sqrt(len(pts))) if len(s) > 1 else 0.0
    return vt[0], across


def _fit_axis(axis: str, pts: np.ndarray, vals: np.ndarray, idx: list[int], other_pts: np.ndarray):
    """(a, bx, by), kind for one axis."""
    n = len(vals)
    if n == 2:
        k = 0 if axis == "va" else 1
        d = pts[1, k] - pts[0, k]
        if abs(d) < 0.5:
            which = "column" if axis == "va" else "row"
            raise DigitiseInputError(
                f"is in the same pixel {which} as marks[{idx[0]}]; two marks of the {axis} axis must be apart "
                f"along that axis", field=f"marks[{idx[1]}]")
        b = (vals[1] - vals[0]) / d
        a = vals[0] - b * pts[0, k]
        return ((a, b, 0.0) if axis == "va" else (a, 0.0, b)), "aligned"
    _, across = _direction(pts)
    if across >= _COLLINEAR_PX:
        A = np.column_stack([np.ones(n), pts[:, 0], pts[:, 1]])
        coef, *_ = np.linalg.lstsq(A, vals, rcond=None)
        return tuple(float(c) for c in coef), "affine"
    # collinear: the gradient is at right angles to the other axis's line
    d_other, _ = _direction(other_pts)
    normal = np.array([-d_other[1], d_other[0]])
    s = pts @ normal
    if np.ptp(s) < 0.5:
        raise DigitiseInputError(f"the {axis} marks lie along the other axis's line; put them along the {axis} axis",
                                 field="marks")
    A = np.column_stack([np.ones(n), s])
    (a, b), *_ = np.linalg.lstsq(A, vals, rcond=None)
    return (float(a), float(b * normal[0]), float(b * normal[1])), "across other axis"


def fit_axes(marks: Sequence[AxisMark]) -> AxisMap:
    """Fit the pixel -> (va, ia) map to the marks (see the module's notes).

    Raises
    ------
    DigitiseInputError
        Fewer than two marks on an axis (``marks``); a mark with a non-finite or non-numeric
        coordinate or value, an unknown axis, the same pixel or the same value as another
        mark of its axis (``marks[i]...``); axes that come out parallel (``marks``).
    """
    ms = _check(marks)
    pts = {ax: np.array([(m[0], m[1]) for m in ms if m[2] == ax], float) for ax in _AXES}
    vals = {ax: np.array([m[3] for m in ms if m[2] == ax], float) for ax in _AXES}
    idx = {ax: [i for i, m in enumerate(ms) if m[2] == ax] for ax in _AXES}
    coefs, kinds = {}, {}
    for ax in _AXES:
        other = "ia" if ax == "va" else "va"
        coefs[ax], kinds[ax] = _fit_axis(ax, pts[ax], vals[ax], idx[ax], pts[other])
    M = np.array([coefs["va"][1:], coefs["ia"][1:]], dtype=float)
    g1, g2 = float(np.hypot(*M[0])), float(np.hypot(*M[1]))
    ok = all(math.isfinite(g) and g > 0 for g in (g1, g2))
    # the sine of the angle between the two axes' gradients; a plot's axes are far from parallel
    if not ok or abs(M[0, 0] / g1 * M[1, 1] / g2 - M[0, 1] / g1 * M[1, 0] / g2) < 0.2:
        raise DigitiseInputError("the va and ia marks give (nearly) parallel axes: put the va marks along the plate "
                                 "voltage axis and the ia marks along the current axis", field="marks")
    res = np.zeros(len(ms))
    for ax in _AXES:
        a, bx, by = coefs[ax]
        g = math.hypot(bx, by)
        fitted = a + bx * pts[ax][:, 0] + by * pts[ax][:, 1]
        res[idx[ax]] = np.abs(fitted - vals[ax]) / g
    rms = float(np.sqrt(np.mean(res ** 2)))
    worst = None
    k = int(np.argmax(res))
    if res[k] >= WORST_MIN_PX:
        same = [i for i in idx[ms[k][2]] if i != k]
        nxt = float(res[same].max()) if same else 0.0
        if res[k] >= 1.5 * nxt:
            worst = k
    return AxisMap(va_coef=tuple(float(c) for c in coefs["va"]), ia_coef=tuple(float(c) for c in coefs["ia"]),
                   residuals=tuple(float(r) for r in res), rms_px=rms, worst=worst,
                   kinds=(kinds["va"], kinds["ia"]))
