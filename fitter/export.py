"""Export a fitted unit for other design tools: SPICE subcircuit, JSON card, CSV curves.

SPICE
    :func:`spice_subcircuit` writes one ``.subckt NAME plate grid cathode`` per unit
    (pins in that order).  A behavioural current source (``B`` element) from plate to
    cathode holds the fitted model with every parameter written as a full-precision
    ``repr`` float, so the simulator computes the same plate current as
    :meth:`FittedTriode.current` to rounding.  The expression for each registered
    model is built by the function in :data:`SPICE_EXPRESSIONS`, keyed by the
    model's registry name; a test loops over :data:`fitter.models.MODELS` so a new
    model without an expression is caught.

    Guards, so that the netlist runs unmodified in ngspice (checked against
    ngspice 39):

    * ``exp`` only appears as ``exp(-abs(z))`` inside the softplus
      ``max(z,0)+ln(1+exp(-abs(z)))``, which equals ln(1 + exp(z)) and cannot
      overflow for any z.  (ngspice clamps ``exp`` at 1e99, so the naive
      ``ln(1+exp(z))`` would silently saturate near 228 instead of failing.)
    * fractional powers are only ever taken of ``max(x,0)``.  In ngspice 39
      ``x**y`` and ``pow(x,y)`` of a negative x return ``|x|^y`` (a positive
      number, not an error) and ``pwr(x,y)`` returns ``sign(x)|x|^y``; either
      would give a spurious current in cutoff or at negative plate voltage.
      The exporter writes ``pwr(max(x,0),y)``.
    * divisions are by fitted constants only, or by ``sqrt(max(kvb + va^2, 1e-24))``,
      the same floor as the Python model, so kvb = 0 at va = 0 is no 0/0.

    Grid conduction: a model without a grid-current part (power, koren, and
    dempwolf with its grid parameters at their defaults) gets a behavioural
    grid-to-cathode path ``Ig = Vs softplus(vg/Vs) / Rg``: about ``vg/Rg`` above
    0 V and exponentially small below it (at vg = -1 V with the defaults it is
    below 1e-13 A).  Rg = 1.5 kOhm and Vs = 50 mV are common practice for a small
    signal triode's grid conduction (roughly 1-2 kOhm effective above 0 V),
    not a fit.  A dempwolf card with fitted grid parameters uses the model's
    own grid current: the plate source carries Ik - Ig and a second source
    carries Ig from grid to cathode, so the cathode current is Ik.

    In a stacked stage ngspice may print "singular matrix ... gmin stepping" at the
    start of its operating-point search: at its all-zero first guess every tube
    has va = 0 and conducts nothing, so the node between the tubes floats.  It
    recovers by itself; a ``.nodeset`` of the plate voltages avoids the message.

JSON
    :func:`card_json` re-emits the unit as a model card (:func:`fitter.card.card_dict`).

CSV
    :func:`curve_family` evaluates the model on a user grid and :func:`curves_csv`
    writes the long layout ``tube,section,va,vg,ia_ma`` that
    :func:`fitter.reader.read_text` reads back.
"""

from __future__ import annotations

import datetime as _dt
import hashlib
import io
import json
import math
import re
import unicodedata
from dataclasses import dataclass
from typing import Callable, Mapping

import numpy as np

from .card import card_dict
from .errors import InputError
from .text import csv_cell, plain_text, shown
from .units import parse_value
from .triode import FittedTriode

__all__ = [
    "ExportError",
    "SPICE_EXPRESSIONS",
    "GRID_RESISTANCE",
    "GRID_KNEE",
    "SpiceExpression",
    "spice_expression",
    "spice_name",
    "spice_comment",
    "SPICE_NAME",
    "spice_subcircuit",
    "card_json",
    "parse_sweep",
    "default_sweep",
    "curve_family",
    "curves_csv",
    "HIGH_VOLTAGE_CAUTION",
]

#: Effective grid-conduction resistance above 0 V of the generic grid path [ohm]
#: (common practice: 1-2 kOhm for small-signal triodes).
GRID_RESISTANCE = 1500.0
#: Softness of the generic grid path's knee [V] (common practice; about a diode's n*Vt).
GRID_KNEE = 0.05

from . import CAUTION as HIGH_VOLTAGE_CAUTION  # noqa: E402  (one wording, in fitter/__init__.py)

#: Subcircuit names: ASCII letters, digits and ``_``, starting with a letter or digit, at
#: most 32 characters (a leading digit, as in 12AX7, runs in ngspice 39: checked by
#: tests/test_spice_safety.py).  Matched with ``fullmatch``, so no trailing newline slips by.
SPICE_NAME = re.compile(r"[A-Za-z0-9][A-Za-z0-9_]{0,31}")
_NAME_MAX = 32

#: Characters a netlist comment may carry: printable ASCII without the backslash (a line
#: continuation in some SPICE readers), backtick, ``$`` and braces (parameter and shell
#: syntax).  Anything else, line breaks and control characters first, becomes ``?``.
_COMMENT_OK = frozenset(
    "ABCDEFGHIJKLMNOPQRSTUVWXYZabcdefghijklmnopqrstuvwxyz0123456789 _.,:;()[]+-=/<>'\"%&!?@~^|#*")
_COMMENT_MAX = 300
# control, format, surrogate, private, unassigned, line and paragraph separators
_CONTROL = frozenset({"Cc", "Cf", "Cs", "Co", "Cn", "Zl", "Zp"})


class ExportError(InputError):
    """An export could not be made; ``field`` names the value at fault (``"name"``,
    ``"cga"``, ``"va"``), and the text reads ``field: message``."""

    def __init__(self, message: str, *, field: str | None = None):
        super().__init__(message, field=field)

    def __str__(self) -> str:
        return f"{self.field}: {self.message}" if self.field else self.message


@dataclass(frozen=True)
class SpiceExpression:
    """Behavioural-source expressions of one fitted unit.

    Attributes
    ----------
    plate : str
        Plate current, plate to cathode [A], in terms of ``va`` and ``vg`` node
        expressions.
    grid : str or None
        The model's own grid current, grid to cathode [A]; None when the model has
        no grid-current part (the exporter then adds the generic grid path).
    """

    plate: str
    grid: str | None


# ---------------------------------------------------------------------------
# Expression builders, one per registered model, keyed by registry name
# ---------------------------------------------------------------------------


def _finite(x, what: str = "parameter value", field: str | None = None) -> float:
    """``x`` as a finite Python float (so only our own formatting reaches a netlist)."""
    try:
        v = float(x)
    except (TypeError, ValueError):
        raise ExportError(f"{what} {shown(repr(x))[:40]} is not a number", field=field) from None
    if not math.isfinite(v):
        raise ExportError(f"{what} {v!r} is not finite", field=field)
    return v


def _n(x: float) -> str:
    """A float as SPICE text with every digit kept; negatives parenthesised."""
    x = _finite(x)
    s = repr(x)
    return f"({s})" if x < 0 else s


def spice_comment(text) -> str:
    """``text`` made safe for one SPICE comment line.

    One line of printable ASCII from a fixed set (:data:`_COMMENT_OK`): accents are
    dropped (Zölzer -> Zolzer), line breaks, control characters and anything else become
    ``?``, and the text is cut to 300 characters.  Text from a card, a CSV or a file name
    reaches a netlist only through this function or as a validated name.
    """
    s = unicodedata.normalize("NFKD", str(text))
    s = "".join(c for c in s if not unicodedata.combining(c))
    s = "".join(c if c in _COMMENT_OK else "?" for c in s)
    return s if len(s) <= _COMMENT_MAX else s[: _COMMENT_MAX - 3] + "..."


def _softplus(z: str) -> str:
    """ln(1 + exp(z)) that cannot overflow: max(z,0) + ln(1 + exp(-|z|))."""
    return f"(max({z},0)+ln(1+exp(-abs({z}))))"


def _pos_pow(x: str, e: float) -> str:
    """x^e of max(x, 0): never a fractional power of a negative number."""
    return f"pwr(max({x},0),{_n(e)})"


def _power_expression(p: Mapping[str, float], va: str, vg: str) -> SpiceExpression:
    # Ia = K max(0, vg + va/mu + vc)^n
    x = f"{vg}+{va}/{_n(p['mu'])}+{_n(p['vc'])}"
    return SpiceExpression(f"{_n(p['K'])}*{_pos_pow(x, p['n'])}", None)


def _koren_expression(p: Mapping[str, float], va: str, vg: str) -> SpiceExpression:
    # Koren (1996/2003): E1 = (va/kp) ln(1+exp(kp (1/mu + vg/sqrt(kvb + va^2))));
    # Ia = 2 E1^ex / kg1 for E1 > 0.
    # the floor is the Python model's own (fitter.models._koren_parts): with kvb = 0
    # (its lower bound) at va = 0 it gives E1 = 0 instead of 0/0
    s = f"sqrt(max({_n(p['kvb'])}+{va}*{va},1e-24))"
    z = f"{_n(p['kp'])}*(1/{_n(p['mu'])}+{vg}/{s})"
    e1 = f"({va}/{_n(p['kp'])})*{_softplus(z)}"
    return SpiceExpression(f"(2/{_n(p['kg1'])})*{_pos_pow(e1, p['ex'])}", None)


def _dempwolf_expression(p: Mapping[str, float], va: str, vg: str) -> SpiceExpression:
    # Dempwolf & Zoelzer (2011): Ik = G (ln(1+exp(C (va/mu + vg)))/C)^gamma,
    # Ig = Gg (ln(1+exp(Cg vg))/Cg)^xi + Ig0, Ia = Ik - Ig.
    c, mu = _n(p["C"]), _n(p["mu"])
    u = f"{_softplus(f'{c}*({va}/{mu}+{vg})')}/{c}"
    ik = f"{_n(p['G'])}*{_pos_pow(u, p['gamma'])}"
    if p.get("Gg", 0.0) == 0.0 and p.get("Ig0", 0.0) == 0.0:
        return SpiceExpression(ik, None)
    cg = _n(p["Cg"])
    ug = f"{_softplus(f'{cg}*{vg}')}/{cg}"
    ig = f"({_n(p['Gg'])}*{_pos_pow(ug, p['xi'])}+{_n(p['Ig0'])})"
    return SpiceExpression(f"{ik}-{ig}", ig)


#: Registry name -> builder ``(params, va, vg) -> SpiceExpression``.
SPICE_EXPRESSIONS: dict[str, Callable[..., SpiceExpression]] = {
    "power": _power_expression,
    "koren": _koren_expression,
    "dempwolf": _dempwolf_expression,
}


def spice_expression(
    triode: FittedTriode, va: str = "V(plate,cathode)", vg: str = "V(grid,cathode)"
) -> SpiceExpression:
    """The behavioural-source expressions of ``triode``'s fitted model.

    Parameters
    ----------
    triode : FittedTriode
        The fitted unit.
    va, vg : str
        SPICE expressions of the plate-to-cathode and grid-to-cathode voltage [V].

    Returns
    -------
    SpiceExpression
        Plate current [A] (and the model's own grid current [A], if it has one).

    Raises
    ------
    ExportError
        If no SPICE expression is known for the model.
    """
    name = triode.model.name
    builder = SPICE_EXPRESSIONS.get(name)
    if builder is None:
        raise ExportError(
            f"model {name!r} has no SPICE expression; models with one: {', '.join(SPICE_EXPRESSIONS)}"
        )
    return builder(triode.params, va, vg)


# ---------------------------------------------------------------------------
# SPICE subcircuit
# ---------------------------------------------------------------------------


def spice_name(triode: FittedTriode) -> str:
    """Default subcircuit name: the unit's label with anything but [A-Za-z0-9_] as ``_``,
    cut to 32 characters (a cut name ends in a hash of the label, so it stays distinct)."""
    label = str(triode.label)
    s = re.sub(r"[^A-Za-z0-9_]+", "_", label).strip("_") or "TRIODE"
    if len(s) > _NAME_MAX:
        tag = hashlib.sha256(label.encode("utf-8", "surrogatepass")).hexdigest()[:8]
        s = s[: _NAME_MAX - 9].rstrip("_") + "_" + tag
    return s


def _check_name(name) -> str:
    if not (isinstance(name, str) and SPICE_NAME.fullmatch(name)):
        raise ExportError(
            f"{shown(repr(name))} is not a usable subcircuit name; use letters, digits and _ "
            f"(no spaces or other characters), starting with a letter or digit, at most {_NAME_MAX} characters",
            field="name")
    return name


def _check_cap(value, what: str) -> float | None:
    if value is None:
        return None
    v = _finite(value, "capacitance", field=what)
    if v < 0:
        raise ExportError(f"capacitance must be a finite value >= 0, got {value!r}", field=what)
    return v if v > 0 else None


def _range_text(triode: FittedTriode) -> list[str]:
    r = triode.valid_range
    if not r:
        return ["fitted range: not recorded on the card"]

    def g(x, scale=1.0):
        return f"{scale * _finite(x, 'fitted range value'):.6g}"

    out = [f"fitted range: va {g(r['va'][0])} .. {g(r['va'][1])} V, vg {g(r['vg'][0])} .. {g(r['vg'][1])} V"]
    if "ia" in r:
        out[0] += f", ia {g(r['ia'][0], 1e3)} .. {g(r['ia'][1], 1e3)} mA"
    return out


def spice_subcircuit(
    triode: FittedTriode,
    name: str | None = None,
    cgk: float | None = None,
    cga: float | None = None,
    cak: float | None = None,
    card: str | None = None,
    grid_resistance: float = GRID_RESISTANCE,
    grid_knee: float = GRID_KNEE,
) -> str:
    """A SPICE subcircuit ``.subckt NAME plate grid cathode`` of one fitted unit.

    Parameters
    ----------
    triode : FittedTriode
        The fitted unit.
    name : str, optional
        Subcircuit name; default :func:`spice_name` of the unit.
    cgk, cga, cak : float, optional
        Grid-cathode, grid-plate and plate-cathode capacitances [F]; omitted when
        None or 0.
    card : str, optional
        Path of the card the unit came from, written into the header.
    grid_resistance : float
        Effective resistance of the generic grid-conduction path above 0 V [ohm].
    grid_knee : float
        Softness of that path's knee [V].

    Returns
    -------
    str
        The netlist text (header comments, ``.subckt`` ... ``.ends``), ending in a newline.

    Raises
    ------
    ExportError
        For an unusable name or capacitance, or a model without a SPICE expression.
    """
    from . import __version__

    name = _check_name(spice_name(triode) if name is None else name)
    caps = {k: _check_cap(v, k) for k, v in (("cgk", cgk), ("cga", cga), ("cak", cak))}
    for what, v in (("grid_resistance", grid_resistance), ("grid_knee", grid_knee)):
        if not _finite(v, "value", field=what) > 0:
            raise ExportError(f"must be a positive finite value, got {v!r}", field=what)
    grid_resistance, grid_knee = float(grid_resistance), float(grid_knee)
    va, vg = "V(plate,cathode)", "V(grid,cathode)"
    expr = spice_expression(triode, va, vg)
    model = triode.model
    err = triode.stderr()
    created = _dt.datetime.now(_dt.timezone.utc).replace(microsecond=0).isoformat()

    head = [
        f"Platebook SPICE model of {triode.label}",
        f"tube: {triode.tube}    section: {triode.section or '-'}",
        f"model: {model.name} ({model.title})",
        f"reference: {model.reference}",
        *_range_text(triode),
        f"card: {card or '-'}",
        f"created by Platebook {__version__} on {created}",
        "pins: plate grid cathode",
        "parameters (value +- standard error):",
    ]
    for p in model.params:
        e = err.get(p.name)
        if e is not None and math.isfinite(float(e)):
            es = f" +- {float(e):.3g}"
        elif triode.free and p.name not in triode.free:
            es = " (held fixed in the fit)"
        else:
            es = ""
        unit = f" {p.unit}" if p.unit != "-" else ""
        head.append(f"  {p.name} = {_finite(triode.params[p.name])!r}{unit}{es}")
    if expr.grid is None:
        head.append(
            f"grid conduction: generic path Ig = Vs*softplus(vg/Vs)/Rg, Rg = {grid_resistance:g} ohm, "
            f"Vs = {grid_knee:g} V (common practice, not fitted)"
        )
    else:
        head.append("grid conduction: the model's own fitted grid current")
    head.append("runs unmodified in ngspice (checked with ngspice 39); guarded against exp overflow "
                "and fractional powers of negative numbers")
    head.append(HIGH_VOLTAGE_CAUTION)

    # every header line is one sanitised comment: a name or path with a line break and a
    # .control block must not become netlist text (ngspice would run its shell command)
    lines = ["* " + spice_comment(h) for h in head]
    lines.append(f".subckt {name} plate grid cathode")
    lines.append(f"Bplate plate cathode I={expr.plate}")
    if expr.grid is None:
        vs = _n(grid_knee)
        z = f"{vg}/{vs}"
        lines.append(f"Bgrid grid cathode I={vs}*{_softplus(z)}/{_n(grid_resistance)}")
    else:
        lines.append(f"Bgrid grid cathode I={expr.grid}")
    pins = {"cgk": ("grid", "cathode"), "cga": ("grid", "plate"), "cak": ("plate", "cathode")}
    for k, c in caps.items():
        if c is not None:
            a, b = pins[k]
            lines.append(f"C{k[1:]} {a} {b} {_finite(c)!r}")
    lines.append(f".ends {name}")
    return "\n".join(lines) + "\n"


# ---------------------------------------------------------------------------
# JSON card
# ---------------------------------------------------------------------------


def card_json(triode: FittedTriode, fit=None, source=None, tube: str | None = None) -> str:
    """The unit as a model-card JSON text (``platebook.model-card`` version 1).

    ``tube`` renames the unit in the card (field ``name``); fit figures and sources are
    carried over from the arguments.
    """
    d = card_dict(triode, fit=fit, source=source)
    if tube is not None:
        if not str(tube).strip():
            raise ExportError("the tube name must not be empty", field="name")
        try:
            d["tube"] = plain_text(str(tube), "name")
        except InputError as e:
            raise ExportError(e.message, field="name") from None
    return json.dumps(d, indent=2) + "\n"


# ---------------------------------------------------------------------------
# CSV curve family
# ---------------------------------------------------------------------------


def parse_sweep(text: str, what: str) -> np.ndarray:
    """A voltage grid from ``start:stop:step`` (stop included) or a comma list.

    Parameters
    ----------
    text : str
        ``"0:400:5"`` or ``"-4,-2,0"`` [V].
    what : str
        The field named in errors (``"va"`` or ``"vg"``).

    Returns
    -------
    ndarray
        The grid voltages [V], ascending for a range.

    Raises
    ------
    ExportError
        Naming ``what`` when the text cannot be read, the step is not positive,
        or the grid would have more than 100 000 points.
    """
    s = str(text).strip()
    hint = "give start:stop:step (e.g. 0:400:5) or a comma list (e.g. -4,-2,0)"
    if ":" in s:
        parts = s.split(":")
        if len(parts) != 3:
            raise ExportError(f"{text!r} should be start:stop:step, e.g. 0:400:5", field=what)
        try:
            a, b, h = (parse_value(x, what) for x in parts)
        except ValueError:
            raise ExportError(f"cannot read {text!r}; {hint}", field=what) from None
        if not all(map(math.isfinite, (a, b, h))):
            raise ExportError(f"{text!r} has a value that is not finite", field=what)
        if h <= 0:
            raise ExportError(f"step must be positive in {text!r}", field=what)
        if b < a:
            raise ExportError(f"stop is below start in {text!r}", field=what)
        if b > a and h > b - a:
            raise ExportError(f"the step {h:g} is larger than the range {a:g}..{b:g} in {text!r}", field=what)
        steps = (b - a) / h  # inf when the range or the ratio is beyond a float
        if not steps < 100_000:
            raise ExportError(f"{text!r} gives too many points; at most 100000", field=what)
        n = int(math.floor(steps + 1e-9)) + 1
        with np.errstate(over="ignore", invalid="ignore"):
            raw = a + h * np.arange(n)
            grid = np.round(raw, 12)  # (rounding scales by 1e12: keep the raw value where that overflows)
        return np.where(np.isfinite(grid), grid, raw)
    try:
        vals = np.array([parse_value(x, what) for x in s.split(",") if x.strip() != ""])
    except ValueError:
        raise ExportError(f"cannot read {text!r}; {hint}", field=what) from None
    if vals.size == 0 or not np.all(np.isfinite(vals)):
        raise ExportError(f"{text!r} gives no finite voltages", field=what)
    return vals


def default_sweep(triode: FittedTriode) -> tuple[np.ndarray, np.ndarray]:
    """The card's fitted range as a grid: 41 plate voltages by 9 grid voltages [V].

    Raises
    ------
    ExportError
        If the card records no fitted range (then the grid must be given).
    """
    r = triode.valid_range
    if not r:
        raise ExportError("the card records no fitted range; give the plate and grid voltages", field="va")
    va = np.round(np.linspace(r["va"][0], r["va"][1], 41), 6)
    vg = np.round(np.linspace(r["vg"][0], r["vg"][1], 9), 6)
    return va, vg


@dataclass(frozen=True)
class CurveFamily:
    """A model's plate curves on a grid (long layout, SI units)."""

    tube: str
    section: str | None
    va: np.ndarray
    vg: np.ndarray
    ia: np.ndarray

    def to_dict(self) -> dict:
        return {
            "tube": self.tube,
            "section": self.section,
            "va_v": self.va.tolist(),
            "vg_v": self.vg.tolist(),
            "ia_ma": (1e3 * self.ia).tolist(),
        }


def curve_family(triode: FittedTriode, va, vg, tube: str | None = None) -> CurveFamily:
    """Evaluate ``triode`` on every (va, vg) of the grid, one curve per grid voltage.

    Parameters
    ----------
    triode : FittedTriode
    va, vg : array_like
        Plate voltages and grid voltages of the grid [V].
    tube : str, optional
        Name written in the ``tube`` column (default: the unit's tube).

    Returns
    -------
    CurveFamily
        Points ordered by grid voltage, then plate voltage; ``ia`` [A].
    """
    va = np.atleast_1d(np.asarray(va, float))
    vg = np.atleast_1d(np.asarray(vg, float))
    G, A = np.meshgrid(vg, va, indexing="ij")
    ia = np.asarray(triode.current(A.ravel(), G.ravel()), float)
    return CurveFamily(tube or triode.tube, triode.section, A.ravel(), G.ravel(), ia)


def curves_csv(family: CurveFamily, card: str | None = None) -> str:
    """The long-layout CSV text ``tube,section,va,vg,ia_ma`` of a curve family.

    The names go through :func:`fitter.text.csv_cell`, so none can start a spreadsheet
    formula; a name holding a comma, semicolon (the separator in some locales), quote or
    control character is refused, since :mod:`fitter.reader` reads plain unquoted cells.
    The card path in the comment line is one sanitised line without separators.
    """
    from . import __version__

    cells = []
    for what, v in (("tube", family.tube), ("section", family.section or "")):
        v = str(v)
        if re.search(r"[,;\"]", v) or any(unicodedata.category(c) in _CONTROL for c in v):
            raise ExportError(f"{what} {shown(repr(v))} cannot go in a CSV cell "
                              "(comma, semicolon, quote or newline/control character)",
                              field="name" if what == "tube" else None)
        cells.append(csv_cell(v))
    tube, sec = cells
    out = io.StringIO()
    out.write(f"# model curves written by Platebook {__version__}, not measurements\n")
    if card:
        out.write(f"# card: {_csv_comment(card)}\n")
    out.write("tube,section,va,vg,ia_ma\n")
    for a, g, i in zip(family.va, family.vg, family.ia):
        out.write(f"{tube},{sec},{_finite(a, 'va')!r},{_finite(g, 'vg')!r},{1e3 * _finite(i, 'ia'):.12g}\n")
    return out.getvalue()


def _csv_comment(text) -> str:
    # a comment line of the CSV: one line, and no comma, semicolon or quote, so a
    # spreadsheet keeps it in one cell (which starts with '#', not a formula)
    return re.sub(r"[,;\"]", "?", spice_comment(text))
