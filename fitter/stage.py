"""Amplifier stages analysed with fitted triodes: operating point and small signal.

Three stage descriptions (plain dataclasses, SI units, keyword arguments):

* :class:`CommonCathode`: B+, plate resistor, cathode resistor (bypassed or not) or
  fixed grid bias, an AC load through a coupling capacitor;
* :class:`CathodeFollower`: cathode resistor to ground or to a negative rail, grid
  bias from a divider or a grid leak;
* :class:`Stack`: two triodes in series across B+, the bottom one a common-cathode
  stage and the top one its active load.  One parametrised circuit covers the mu
  follower (a load resistor between the tubes, the top grid AC-coupled from the
  bottom plate and DC-biased from the resistor string at the top cathode) and the
  SRPP (top grid tied to the bottom plate); the output is taken at the top cathode
  or at the bottom plate.

:func:`solve` gives a :class:`StageResult`: every node voltage, each tube's
voltages, current, dissipation and heater-cathode voltage, the mid-band gain to each
output, output impedance, Miller input capacitance, corner frequencies, slew limit,
and error bars propagated from the fit covariance (:func:`fitter.triode.propagate`).
:func:`spread` runs one stage over many units of a type and reports min / median /
max of every figure.  :func:`quasi_static` gives the mid-band large-signal transfer
used by :mod:`fitter.distortion`.

Node names (the keys of ``nodes_v`` in :meth:`StageResult.to_dict`):

* common cathode: ``grid``, ``cathode``, ``plate``;
* cathode follower: ``grid``, ``cathode``, ``plate``;
* stack: ``grid`` (bottom grid), ``cathode_bottom``, ``plate_bottom``, ``mid`` (the
  junction of the top bias resistor and the load resistor), ``cathode_top``,
  ``grid_top``, ``plate_top`` (= B+).

How the circuits are solved
---------------------------
Every tube equation is written as ``I = f(a0 - a1 I, b0 - b1 I)``: plate and grid
voltage fall linearly as the tube's own current rises (a1, b1 >= 0).  The residual
``F(I) = I - f(...)`` then rises with slope ``1 + a1 dIa/dva + b1 dIa/dvg >= 1``, so
its root is unique, lies within ``|F(I0)|`` of any starting point ``I0``, and a
Newton iteration kept inside that bracket (bisecting whenever a step would leave
it) cannot diverge, at cutoff (where ``f`` and its slopes vanish) or anywhere else.
The stack is solved by an outer bracketed Newton iteration on the bottom plate
voltage, whose residual (current arriving from the top network minus current taken
by the bottom tube and the load) is monotone, with the two single-tube solves
nested inside.  Everything is vectorised: one call solves many units, input levels
or waveform samples at once.

Mid-band large-signal ("quasi-static") solutions treat the coupling and bypass
capacitors as batteries holding their DC charge.  Small-signal figures are central
differences of that solution (input step 1 mV, injected current 1e-4 of the
standing current), accurate to about 1e-7.

References
----------
The small-signal formulas the tests check against are the classic ones of the
valve handbooks (e.g. F. Langford-Smith, *Radiotron Designer's Handbook*, 4th ed.,
1953, ch. 12; *RCA Receiving Tube Manual*, application notes on resistance-coupled
amplifiers).
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass, field
from typing import Sequence

import numpy as np

from .triode import FittedTriode, error_from_differences, perturbed

__all__ = [
    "CAUTION",
    "CommonCathode",
    "CathodeFollower",
    "Stack",
    "StageResult",
    "SpreadResult",
    "StageSolveError",
    "solve",
    "spread",
    "quasi_static",
    "operating_point",
    "stage_kind",
    "stage_title",
    "output_node",
    "tube_positions",
]

#: The one-line caution every report describing a circuit carries.
from . import CAUTION  # noqa: E402  (re-exported: one wording, in fitter/__init__.py)


class StageSolveError(RuntimeError):
    """A stage could not be solved; the message says where and why."""


# ---------------------------------------------------------------------------
# Stage descriptions
# ---------------------------------------------------------------------------


def _check_positive(obj, name, allow_zero=False, optional=False):
    v = getattr(obj, name)
    if v is None:
        if optional:
            return
        raise ValueError(f"{type(obj).__name__}.{name}: a value is required")
    if isinstance(v, bool) or not isinstance(v, (int, float)):
        raise ValueError(f"{type(obj).__name__}.{name}: must be a number, got {v!r}")
    if not math.isfinite(v):
        raise ValueError(f"{type(obj).__name__}.{name}: must be finite, got {v!r}")
    if v < 0 or (v == 0 and not allow_zero):
        need = "must not be negative" if allow_zero else "must be positive"
        raise ValueError(f"{type(obj).__name__}.{name}: {need}, got {v!r}")


def _check_number(obj, name, optional=False):
    v = getattr(obj, name)
    if v is None and optional:
        return
    if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v):
        raise ValueError(f"{type(obj).__name__}.{name}: must be a finite number, got {v!r}")


@dataclass(frozen=True, kw_only=True)
class _Common:
    """Fields shared by every stage (all optional).

    Parameters
    ----------
    rg : float
        Grid leak of the input tube [ohm] (sets the input resistance).
    c_in : float or None
        Input coupling capacitor [F]; None: direct coupling (no low corner).
    rs : float
        Source resistance driving the input [ohm]; sets the input high corner.
    rl : float or None
        AC load at the output through the output coupling capacitor [ohm]; None: none.
    c_out : float or None
        Output coupling capacitor [F] (only for the low corner).
    c_load : float
        Capacitance loading the output [F] (cable, next stage).
    cgk, cga, cak : float
        Interelectrode capacitances grid-cathode, grid-plate (grid-anode) and
        plate-cathode of each tube [F].
    pa_max : float or None
        Plate dissipation limit of each tube [W]; None: not checked.
    heater : float
        Heater reference voltage to ground [V]: 0 for grounded heaters, or the
        elevation of the heater supply.
    vhk_max : float
        Heater-cathode voltage limit [V] (datasheets often give 100-200 V).
    """

    rg: float = 1e6
    c_in: float | None = None
    rs: float = 0.0
    rl: float | None = None
    c_out: float | None = None
    c_load: float = 0.0
    cgk: float = 0.0
    cga: float = 0.0
    cak: float = 0.0
    pa_max: float | None = None
    heater: float = 0.0
    vhk_max: float = 100.0

    def _check_common(self):
        _check_positive(self, "rg")
        _check_positive(self, "c_in", optional=True)
        _check_positive(self, "rs", allow_zero=True)
        _check_positive(self, "rl", optional=True)
        _check_positive(self, "c_out", optional=True)
        for name in ("c_load", "cgk", "cga", "cak"):
            _check_positive(self, name, allow_zero=True)
        _check_positive(self, "pa_max", optional=True)
        _check_number(self, "heater")
        _check_positive(self, "vhk_max")

    def to_dict(self) -> dict:
        """The circuit's values in SI units (None where not given)."""
        return {"kind": stage_kind(self), **asdict(self)}


@dataclass(frozen=True, kw_only=True)
class CommonCathode(_Common):
    """Common-cathode stage.

    Parameters
    ----------
    b_plus : float
        Supply voltage [V].
    ra : float
        Plate resistor [ohm].
    rk : float
        Cathode resistor [ohm]; 0 with fixed grid bias.
    ck : float or None
        Cathode bypass capacitor [F]; None: Rk unbypassed.
    vbias : float or None
        Fixed grid bias, the grid's DC voltage to ground [V]; None: the grid leak
        returns the grid to 0 V.
    Other fields: see the shared fields (:class:`_Common`).
    """

    b_plus: float
    ra: float
    rk: float = 0.0
    ck: float | None = None
    vbias: float | None = None

    def __post_init__(self):
        _check_positive(self, "b_plus")
        _check_positive(self, "ra")
        _check_positive(self, "rk", allow_zero=True)
        _check_positive(self, "ck", optional=True)
        _check_number(self, "vbias", optional=True)
        if self.vbias is not None and self.vbias >= self.b_plus:
            raise ValueError("CommonCathode.vbias: the grid bias must be below B+")
        self._check_common()


@dataclass(frozen=True, kw_only=True)
class CathodeFollower(_Common):
    """Cathode follower.

    Parameters
    ----------
    b_plus : float
        Supply voltage at the plate end [V].
    rk : float
        Cathode resistor [ohm], returned to ``vneg``.
    vneg : float
        Voltage the cathode resistor returns to [V]: 0 (ground) or a negative rail.
    ra : float
        Plate resistor [ohm] (0: plate straight to B+, the usual case).
    r_upper, r_lower : float or None
        Grid bias divider from B+ to ground [ohm]; its junction feeds the grid
        through ``rg``.  None: the grid leak ``rg`` returns the grid to 0 V.
    Other fields: see the shared fields (:class:`_Common`).
    """

    b_plus: float
    rk: float
    vneg: float = 0.0
    ra: float = 0.0
    r_upper: float | None = None
    r_lower: float | None = None

    def __post_init__(self):
        _check_positive(self, "b_plus")
        _check_positive(self, "rk")
        _check_number(self, "vneg")
        if self.vneg > 0:
            raise ValueError(
                f"CathodeFollower.vneg: the cathode resistor returns to ground or a "
                f"negative rail, got {self.vneg!r} V"
            )
        _check_positive(self, "ra", allow_zero=True)
        if (self.r_upper is None) != (self.r_lower is None):
            raise ValueError("CathodeFollower.r_upper/r_lower: give both divider resistors or neither")
        _check_positive(self, "r_upper", optional=True)
        _check_positive(self, "r_lower", optional=True)
        self._check_common()

    @property
    def grid_dc(self) -> float:
        """DC grid voltage to ground [V]."""
        if self.r_upper is None:
            return 0.0
        return self.b_plus * self.r_lower / (self.r_upper + self.r_lower)


@dataclass(frozen=True, kw_only=True)
class Stack(_Common):
    """Two triodes in series across B+: mu follower or SRPP (one parametrised circuit).

    The bottom tube is a common-cathode stage (cathode resistor ``rk`` to ground,
    bypassed by ``ck`` or not, or fixed bias ``vbias``).  From its plate ``r_mid``
    leads to the node ``mid`` and ``r_top`` from there to the top cathode; the top
    plate is at B+.

    Parameters
    ----------
    b_plus : float
        Supply voltage [V].
    rk : float
        Bottom cathode resistor [ohm]; 0 with fixed grid bias.
    ck : float or None
        Bottom cathode bypass capacitor [F]; None: unbypassed.
    vbias : float or None
        Fixed bias of the bottom grid [V]; None: grid leak to 0 V.
    r_top : float
        Resistor from the top cathode to ``mid`` [ohm]: it sets the top tube's bias.
    r_mid : float
        Load resistor from ``mid`` to the bottom plate [ohm]; 0 for the SRPP.
    top_grid : {"coupled", "tied"}
        ``"coupled"`` (mu follower): the top grid is AC-coupled from the bottom plate
        through ``c_top`` and DC-biased from ``mid`` through ``rg_top``.
        ``"tied"`` (SRPP): the top grid is wired to the bottom plate.
    rg_top : float
        Top grid bias resistor [ohm] (coupled only).
    c_top : float or None
        Top grid coupling capacitor [F] (coupled only; sets a low corner).
    output : {"top-cathode", "bottom-plate"}
        Where the output (and the load ``rl``) is taken.
    Other fields: see the shared fields (:class:`_Common`).  The interelectrode
    capacitances, dissipation and heater limits apply to both tubes.
    """

    b_plus: float
    rk: float
    r_top: float
    r_mid: float = 0.0
    ck: float | None = None
    vbias: float | None = None
    top_grid: str = "tied"
    rg_top: float = 1e6
    c_top: float | None = None
    output: str = "top-cathode"

    def __post_init__(self):
        _check_positive(self, "b_plus")
        _check_positive(self, "rk", allow_zero=True)
        _check_positive(self, "r_top")
        _check_positive(self, "r_mid", allow_zero=True)
        _check_positive(self, "ck", optional=True)
        _check_number(self, "vbias", optional=True)
        if self.vbias is not None and self.vbias >= self.b_plus:
            raise ValueError("Stack.vbias: the grid bias must be below B+")
        if self.top_grid not in ("coupled", "tied"):
            raise ValueError(f"Stack.top_grid: must be 'coupled' or 'tied', got {self.top_grid!r}")
        _check_positive(self, "rg_top")
        _check_positive(self, "c_top", optional=True)
        if self.output not in ("top-cathode", "bottom-plate"):
            raise ValueError(
                f"Stack.output: must be 'top-cathode' or 'bottom-plate', got {self.output!r}"
            )
        self._check_common()

    @classmethod
    def srpp(cls, *, b_plus, rk, r_top=None, **kw) -> "Stack":
        """An SRPP: top grid tied to the bottom plate, ``r_top`` (default ``rk``)
        between the top cathode and the bottom plate, output at the top cathode."""
        kw.setdefault("output", "top-cathode")
        return cls(b_plus=b_plus, rk=rk, r_top=rk if r_top is None else r_top,
                   r_mid=0.0, top_grid="tied", **kw)

    @classmethod
    def mu_follower(cls, *, b_plus, rk, r_top, r_mid, **kw) -> "Stack":
        """A mu follower: load resistor ``r_mid`` between the tubes, top grid AC-coupled
        from the bottom plate and biased from ``mid``; output at the top cathode
        unless ``output="bottom-plate"``."""
        return cls(b_plus=b_plus, rk=rk, r_top=r_top, r_mid=r_mid, top_grid="coupled", **kw)


_KINDS = {CommonCathode: "common-cathode", CathodeFollower: "cathode-follower", Stack: "stack"}


def stage_kind(stage) -> str:
    """``"common-cathode"``, ``"cathode-follower"`` or ``"stack"``."""
    try:
        return _KINDS[type(stage)]
    except KeyError:
        raise ValueError(
            f"not a stage description: {type(stage).__name__}; use CommonCathode, "
            "CathodeFollower or Stack"
        ) from None


def stage_title(stage) -> str:
    """Human-readable name: "Common-cathode stage", "Stack (SRPP)", ..."""
    if isinstance(stage, Stack):
        return "Stack (SRPP)" if stage.top_grid == "tied" else "Stack (mu follower)"
    return {"common-cathode": "Common-cathode stage", "cathode-follower": "Cathode follower"}[stage_kind(stage)]


def tube_positions(stage) -> tuple[str, ...]:
    """Names of the tube positions: ``("tube",)`` or ``("bottom", "top")``."""
    return ("bottom", "top") if isinstance(stage, Stack) else ("tube",)


def output_node(stage) -> str:
    """The node the output (and the load) is taken from."""
    if isinstance(stage, CommonCathode):
        return "plate"
    if isinstance(stage, CathodeFollower):
        return "cathode"
    return "cathode_top" if stage.output == "top-cathode" else "plate_bottom"


def _output_nodes(stage) -> tuple[str, ...]:
    """Nodes that are outputs (gain and zout are reported for each)."""
    if isinstance(stage, Stack):
        return ("cathode_top", "plate_bottom")
    return (output_node(stage),)


# ---------------------------------------------------------------------------
# Vectorised tube evaluation
# ---------------------------------------------------------------------------


class _Bank:
    """Units of one model, evaluated elementwise against 1-D state arrays.

    Parameters are scalars where they are the same for every unit, else arrays of
    the state length.  Grid-current parameters are kept scalar (units are grouped
    by them) because the models test them with ``if``.
    """

    def __init__(self, model, params):
        self.model = model
        self.params = params
        # models without a grid-current part never give a negative plate current
        self.nonnegative = not (model.grid_current is not None
                                and (np.any(params.get("Gg", 0.0) != 0) or np.any(params.get("Ig0", 0.0) != 0)))

    @classmethod
    def of(cls, triodes: Sequence[FittedTriode]) -> "_Bank":
        model = triodes[0].model
        params = {}
        for name in model.param_names:
            vals = np.array([t.params[name] for t in triodes], dtype=float)
            if len(vals) == 1 or np.all(vals == vals[0]):
                params[name] = float(vals[0])
            else:
                params[name] = vals
        return cls(model, params)

    def arrays(self):
        """The parameters that differ between units (for broadcasting shapes)."""
        return [v for v in self.params.values() if isinstance(v, np.ndarray)]

    def repeat(self, k: int) -> "_Bank":
        """Each unit repeated ``k`` times (units major), for ``k`` cases per unit."""
        if k == 1:
            return self
        return _Bank(self.model, {n: (np.repeat(v, k) if isinstance(v, np.ndarray) else v)
                                  for n, v in self.params.items()})

    def current(self, va, vg):
        return self.model.current(va, vg, **self.params)

    def gradient(self, va, vg):
        return self.model.voltage_gradient(va, vg, **self.params)

    def current_and_gradient(self, va, vg):
        return self.model.current_with_gradient(va, vg, **self.params)


def _group_key(t: FittedTriode):
    return (t.model.name,) + tuple(t.params[p] for p in t.model.grid_param_names)


# ---------------------------------------------------------------------------
# Root finders
# ---------------------------------------------------------------------------

_I_ABS = 1e-16  # [A]
#: try the joint Newton iteration first for mid-band stack solves (the nested bracketed
#: iteration is the fallback, and the only method for the DC solve)
_JOINT = True
_JOINT_MAXIT = 12
_REL = 1e-13
_MAXIT = 80


def _bc(v, shape):
    """``v`` as a float array of ``shape`` (a view where it already has that shape)."""
    if isinstance(v, np.ndarray) and v.shape == shape and v.dtype == float:
        return v
    return np.broadcast_to(np.asarray(v, float), shape)


def _solve_tube(bank: _Bank, a0, a1, b0, b1, x0=None):
    """Solve I = f(a0 - a1 I, b0 - b1 I) elementwise (a1, b1 >= 0).

    Returns (I, dIa/dva, dIa/dvg, D) at the solution, D = 1 + a1 dIa/dva + b1 dIa/dvg
    (the slope of the residual; the sensitivity of I to a0 is dIa/dva / D).
    """
    shape = np.broadcast(a0, a1, b0, b1, *bank.arrays()).shape
    if x0 is not None:
        shape = np.broadcast(np.zeros(shape), x0).shape
    x = np.zeros(shape) if x0 is None else np.broadcast_to(np.asarray(x0, float), shape).copy()
    lo = np.full(shape, -np.inf)
    hi = np.full(shape, np.inf)
    for it in range(_MAXIT):
        va = a0 - a1 * x
        vg = b0 - b1 * x
        f, gva, gvg = bank.current_and_gradient(va, vg)
        F = x - f
        D = 1.0 + a1 * gva + b1 * gvg
        if it == 0:
            # F' >= 1 (the models rise with va and vg), so the root is within |F| of x;
            # the factor 4 leaves room where a model's slope is slightly negative.
            lo = np.where(F > 0, x - 4.0 * F, x)
            hi = np.where(F > 0, x, x - 4.0 * F)
        else:
            lo = np.where(F < 0, np.maximum(lo, x), lo)
            hi = np.where(F > 0, np.minimum(hi, x), hi)
        with np.errstate(divide="ignore", invalid="ignore"):
            xn = x - F / D
        tol = _I_ABS + _REL * np.abs(x)
        # a step below the tolerance is taken even onto a bracket end (it is converged)
        bad = ~((xn > lo) & (xn < hi)) & ~(np.abs(xn - x) <= tol)
        xn = np.where(bad, 0.5 * (lo + hi), xn)
        xn = np.where(F == 0, x, xn)
        if np.all(np.abs(xn - x) <= tol):
            break
        x = xn
    else:
        raise StageSolveError(
            f"tube equation did not converge in {_MAXIT} iterations at "
            f"{int(np.sum(np.abs(xn - x) > tol))} of {x.size} points"
        )
    if np.any(np.abs(F) > 1e-9 * np.maximum(np.abs(x), 1e-6)):
        raise StageSolveError("tube equation: no consistent plate current found (model not monotone?)")
    return x, gva, gvg, D


def _solve_outer(fun, x0, lo, hi, xtol):
    """Bracketed Newton on an increasing residual ``fun(x) -> (F, dF, state)``.

    ``lo``/``hi`` are assumed to bracket the root; if the iteration ends on a bracket
    end with a residual that is not small, the bracket is widened and it goes on.
    """
    x = np.clip(x0, lo, hi)
    lo = np.array(lo, dtype=float, copy=True)
    hi = np.array(hi, dtype=float, copy=True)
    span = hi - lo
    widen = 0
    for it in range(4 * _MAXIT):
        F, dF, state = fun(x)
        lo = np.where(F < 0, np.maximum(lo, x), lo)
        hi = np.where(F > 0, np.minimum(hi, x), hi)
        with np.errstate(divide="ignore", invalid="ignore"):
            xn = x - F / dF
        bad = ~((xn > lo) & (xn < hi)) & ~(np.abs(xn - x) <= xtol)
        xn = np.where(bad, 0.5 * (lo + hi), xn)
        xn = np.where(F == 0, x, xn)
        step = np.abs(xn - x)
        if np.all(step <= xtol):
            # residual [A] small against the iteration's scale, or below what the inner
            # solves resolve (1e-13 A) where both tubes are cut off
            stuck = np.abs(F) > 1e-9 * np.abs(dF) * span + 1e-13
            if not np.any(stuck):
                return x, state
            widen += 1
            if widen > 6:
                break
            lo = np.where(stuck & (F > 0), lo - span, lo)
            hi = np.where(stuck & (F < 0), hi + span, hi)
            xn = np.where(stuck, 0.5 * (lo + hi), xn)
        x = xn
    raise StageSolveError("stack: the bottom-plate voltage iteration did not converge")


# ---------------------------------------------------------------------------
# The circuits' equations
# ---------------------------------------------------------------------------
#
# Each solver returns a dict of arrays: node voltages under their node names, and
# for each tube position p the keys p+".va", p+".vgk", p+".ia".  ``vin`` is the
# signal added to the input grid, ``inj`` a dict node -> current injected into that
# node [A] (for output impedances), ``gl`` the load conductance [S] (0: no load).


def _single_tube_nodes(vg, k, p, I):
    """Node voltages and tube figures of a one-tube stage (grid, cathode, plate, current),
    all broadcast to the shape of the current."""
    return {"grid": vg + 0 * I, "cathode": k + 0 * I, "plate": p,
            "tube.va": p - k, "tube.vgk": vg - k, "tube.ia": I}


def _cc_dc(st: CommonCathode, banks, n, dvg=0.0):
    (bank,) = banks
    vg = (0.0 if st.vbias is None else st.vbias) + dvg
    I, *_ = _solve_tube(bank, st.b_plus, st.ra + st.rk, vg, st.rk)
    I = np.broadcast_to(I, np.broadcast(I, np.zeros(n)).shape)
    k = st.rk * I
    p = st.b_plus - st.ra * I
    return _single_tube_nodes(vg, k, p, I)


def _cc_mid(st: CommonCathode, banks, op, vin, inj, gl):
    (bank,) = banks
    ix = inj.get("plate", 0.0)
    g = 1.0 / st.ra + gl
    rth = 1.0 / g
    pth = rth * (st.b_plus / st.ra + gl * op["plate"] + ix)
    if st.ck is not None:
        kc, ru = op["cathode"], 0.0
    else:
        kc, ru = 0.0, st.rk
    vg = op["grid"] + vin
    I, *_ = _solve_tube(bank, pth - kc, rth + ru, vg - kc, ru, x0=op["tube.ia"])
    k = kc + ru * I
    p = pth - rth * I
    return _single_tube_nodes(vg, k, p, I)


def _cf_dc(st: CathodeFollower, banks, n, dvg=0.0):
    (bank,) = banks
    vg = st.grid_dc + dvg
    I, *_ = _solve_tube(bank, st.b_plus - st.vneg, st.ra + st.rk, vg - st.vneg, st.rk)
    I = np.broadcast_to(I, np.broadcast(I, np.zeros(n)).shape)
    k = st.vneg + st.rk * I
    p = st.b_plus - st.ra * I
    return _single_tube_nodes(vg, k, p, I)


def _cf_mid(st: CathodeFollower, banks, op, vin, inj, gl):
    (bank,) = banks
    ix = inj.get("cathode", 0.0)
    g = 1.0 / st.rk + gl
    rth = 1.0 / g
    kth = rth * (ix + st.vneg / st.rk + gl * op["cathode"])
    vg = op["grid"] + vin
    I, *_ = _solve_tube(bank, st.b_plus - kth, st.ra + rth, vg - kth, rth, x0=op["tube.ia"])
    k = kth + rth * I
    p = st.b_plus - st.ra * I
    return _single_tube_nodes(vg, k, p, I)


def _stack_solve(st: Stack, banks, vg1, mid_op=None, inj=None, gl=0.0, x0=None, n=1):
    """Solve the stack for bottom grid voltage ``vg1``.

    ``mid_op`` None: DC (capacitors open).  Otherwise mid-band with the capacitors
    holding the charge of the DC solution ``mid_op``.
    """
    bottom, top = banks
    inj = inj or {}
    B = st.b_plus
    rm, rt = st.r_mid, st.r_top
    gt = 1.0 / rt
    dc = mid_op is None
    if dc:
        kc, ru = 0.0, st.rk
        glp = glk = 0.0
        ixp = ixk = 0.0
    else:
        kc, ru = (mid_op["cathode_bottom"], 0.0) if st.ck is not None else (0.0, st.rk)
        out_top = st.output == "top-cathode"
        glk = gl if out_top else 0.0
        glp = 0.0 if out_top else gl
        ixp = inj.get("plate_bottom", 0.0)
        ixk = inj.get("cathode_top", 0.0)
        coupled = st.top_grid == "coupled"
        gg = 1.0 / st.rg_top if coupled else 0.0
        vc0 = (mid_op["plate_bottom"] - mid_op["grid_top"]) if coupled else 0.0
        w = 1.0 / (1.0 + rm * (gt + gg))
        DK = gt + glk - gt * gt * rm * w
        cK = 1.0 / DK
        k20 = mid_op["cathode_top"]
        p10 = mid_op["plate_bottom"]
        dkap = gt * w * (rm * gg + 1.0) / DK

    shape = np.broadcast(vg1, gl, ixp, ixk, np.zeros(n)).shape
    warm = {"i1": None if x0 is None else x0[0], "i2": None if x0 is None else x0[1]}

    def top_coeffs(p1):
        if dc:
            a0 = B - p1
            a1 = rm + rt
            g2 = p1 if st.top_grid == "tied" else None
            b1 = rt if st.top_grid == "coupled" else rm + rt
            return a0, a1, 0.0, b1, -1.0, 0.0, g2
        g2 = p1 - vc0
        kap = (ixk + glk * k20 + gt * w * (rm * gg * g2 + p1)) / DK
        return B - kap, cK, g2 - kap, cK, -dkap, 1.0 - dkap, g2

    def residual(p1):
        i1, f1va, f1vg, D1 = _solve_tube(bottom, p1 - kc, ru, vg1 - kc, ru, x0=warm["i1"])
        a0, a1, b0, b1, da0, db0, g2 = top_coeffs(p1)
        i2, f2va, f2vg, D2 = _solve_tube(top, a0, a1, b0, b1, x0=warm["i2"])
        warm["i1"], warm["i2"] = i1, i2
        di1 = f1va / D1
        di2 = (f2va * da0 + f2vg * db0) / D2
        if dc:
            F = i1 - i2
            dF = di1 - di2
        else:
            k2 = cK * i2 + (B - a0)
            idown = i2 + ixk - glk * (k2 - k20)
            F = i1 + glp * (p1 - p10) - ixp - idown
            dF = di1 + glp - (di2 * (1.0 - glk * cK) - glk * dkap)
        return F, dF, (i1, i2)

    def joint(p1, i1, i2):
        """Newton on (P1, I1, I2) together: one tube evaluation each per step.  Its
        step in P1 is the nested iteration's step with the inner solves cut to one
        Newton step, so near the root it is the same iteration, only cheaper."""
        with np.errstate(divide="ignore", invalid="ignore"):
            return _joint_loop(p1, i1, i2)

    def _joint_loop(p1, i1, i2):
        tol_p = 1e-12 * B
        for it in range(_JOINT_MAXIT):
            va1 = p1 - kc - ru * i1
            vg = vg1 - kc - ru * i1
            f1, f1va, f1vg = bottom.current_and_gradient(va1, vg)
            a0, a1, b0, b1, da0, db0, _ = top_coeffs(p1)
            va2 = a0 - a1 * i2
            vg2 = b0 - b1 * i2
            f2, f2va, f2vg = top.current_and_gradient(va2, vg2)
            r1 = i1 - f1
            r2 = i2 - f2
            D1 = 1.0 + ru * (f1va + f1vg)
            D2 = 1.0 + a1 * f2va + b1 * f2vg
            c2 = f2va * da0 + f2vg * db0
            if dc:
                r3 = i1 - i2
                e, h = -1.0, 0.0
            else:
                k2 = cK * i2 + (B - a0)
                r3 = i1 + glp * (p1 - p10) - ixp - (i2 + ixk - glk * (k2 - k20))
                e, h = -(1.0 - glk * cK), glp + glk * dkap
            dp = -(r3 - r1 / D1 - e * r2 / D2) / (f1va / D1 + e * c2 / D2 + h)
            dp = np.minimum(np.maximum(dp, -0.2 * B), 0.2 * B)
            di1 = (-r1 + f1va * dp) / D1
            di2 = (-r2 + c2 * dp) / D2
            if not np.isfinite(dp + di1 + di2).all():
                return None
            # currents to 1e-11 relative (node voltages then agree with ngspice to about
            # 1e-11, far below any figure a report shows); the plate voltage to 1e-12 B+
            if ((np.abs(dp) <= tol_p) & (np.abs(di1) <= _I_ABS + 1e-11 * np.abs(i1))
                    & (np.abs(di2) <= _I_ABS + 1e-11 * np.abs(i2))).all():
                return p1, i1, i2
            p1 = p1 + dp
            # currents stay non-negative where the model cannot give a negative one
            i1 = np.where(i1 + di1 < 0, 0.5 * i1, i1 + di1) if bottom.nonnegative else i1 + di1
            i2 = np.where(i2 + di2 < 0, 0.5 * i2, i2 + di2) if top.nonnegative else i2 + di2
        return None

    got = None
    if _JOINT and not dc:
        got = joint(np.broadcast_to(mid_op["plate_bottom"], shape).astype(float),
                    np.broadcast_to(x0[0], shape).astype(float), np.broadcast_to(x0[1], shape).astype(float))
    elif _JOINT:
        # DC start: bottom plate at B+/2 and the current the bottom tube draws there
        pstart = np.full(shape, 0.5 * B)
        # one Newton step of the bottom tube's equation from zero current (F' >= 1 keeps
        # it between zero and the bottom tube's unloaded current)
        va_s, vg_s = pstart - kc, vg1 - kc
        f0, g0a, g0g = bottom.current_and_gradient(va_s, vg_s)
        istart = np.broadcast_to(f0 / (1.0 + ru * (g0a + g0g)), shape).astype(float)
        got = joint(pstart, istart, istart.copy())
    if got is not None:
        p1, i1, i2 = got
    else:
        p0 = (0.5 * B) if dc else mid_op["plate_bottom"]
        p0 = np.broadcast_to(p0, shape).astype(float)
        lo = np.full(shape, -0.5 * B)
        hi = np.full(shape, 1.5 * B)
        p1, (i1, i2) = _solve_outer(residual, p0, lo, hi, xtol=1e-12 * B)
    i1 = _bc(i1, shape)
    i2 = _bc(i2, shape)
    k1 = kc + ru * i1
    if dc:
        mid = p1 + rm * i2
        k2 = mid + rt * i2
        g2 = mid if st.top_grid == "coupled" else p1
    else:
        a0, a1, b0, b1, _, _, g2 = top_coeffs(p1)
        k2 = cK * i2 + (B - a0)
        mid = rm * w * (gt * k2 + gg * g2) + w * p1
    g1 = np.broadcast_to(vg1, shape) + 0.0
    return {
        "grid": g1, "cathode_bottom": k1 + 0 * p1, "plate_bottom": p1, "mid": mid,
        "cathode_top": k2, "grid_top": g2 + 0 * p1, "plate_top": B + 0 * p1,
        "bottom.va": p1 - k1, "bottom.vgk": g1 - k1, "bottom.ia": i1,
        "top.va": B - k2, "top.vgk": g2 - k2, "top.ia": i2,
    }


def _stack_dc(st: Stack, banks, n, dvg=0.0):
    vg = (0.0 if st.vbias is None else st.vbias) + dvg
    return _stack_solve(st, banks, vg + np.zeros(n), n=n)


def _stack_mid(st: Stack, banks, op, vin, inj, gl):
    return _stack_solve(st, banks, op["grid"] + vin, mid_op=op, inj=inj, gl=gl,
                        x0=(op["bottom.ia"], op["top.ia"]), n=np.size(vin))


_DC = {CommonCathode: _cc_dc, CathodeFollower: _cf_dc, Stack: _stack_dc}
_MID = {CommonCathode: _cc_mid, CathodeFollower: _cf_mid, Stack: _stack_mid}


def _repeat_op(op, k):
    return {key: np.repeat(np.atleast_1d(v), k) for key, v in op.items()}


# ---------------------------------------------------------------------------
# Analysis of one stage over a bank of units (vectorised)
# ---------------------------------------------------------------------------

_H_VIN = 1e-3  # [V] input step for the small-signal differences


def _analyse(stage, banks, n, slew_vpeak):
    """Every figure of ``stage`` for ``n`` units at once: dict name -> array (n,), SI."""
    kind = type(stage)
    op = _DC[kind](stage, banks, n)
    op = {k: _bc(v, (n,)) for k, v in op.items()}
    outs = _output_nodes(stage)
    # small-signal batch: +-h at the input, then +-i injected at each output (load off)
    cases = 2 + 2 * len(outs)
    iq = np.maximum(np.abs(op[tube_positions(stage)[0] + ".ia"]), 1e-9)
    vin = np.zeros((n, cases))
    vin[:, 0], vin[:, 1] = _H_VIN, -_H_VIN
    gl = np.full((n, cases), 0.0 if stage.rl is None else 1.0 / stage.rl)
    inj = {}
    hi = 1e-4 * iq
    for j, node in enumerate(outs):
        a = np.zeros((n, cases))
        a[:, 2 + 2 * j] = hi
        a[:, 3 + 2 * j] = -hi
        gl[:, 2 + 2 * j: 4 + 2 * j] = 0.0
        inj[node] = a.ravel()
    bank_k = tuple(b.repeat(cases) for b in banks)
    mid = _MID[kind](stage, bank_k, _repeat_op(op, cases), vin.ravel(), inj, gl.ravel())
    mid = {k: np.asarray(v, float).reshape(n, cases) for k, v in mid.items()}

    fig = {}
    nodes = [k for k in op if "." not in k]
    for node in nodes:
        fig["node." + node] = op[node]
    for node in nodes:
        fig["gain." + node] = (mid[node][:, 0] - mid[node][:, 1]) / (2 * _H_VIN)
    for j, node in enumerate(outs):
        fig["zout." + node] = (mid[node][:, 2 + 2 * j] - mid[node][:, 3 + 2 * j]) / (2 * hi)
    out = output_node(stage)
    fig["gain"] = fig["gain." + out]
    fig["zout"] = fig["zout." + out]
    with np.errstate(divide="ignore"):
        fig["gain_db"] = 20 * np.log10(np.abs(fig["gain"]))

    positions = tube_positions(stage)
    for pos, bank in zip(positions, banks):
        va, vgk, ia = op[pos + ".va"], op[pos + ".vgk"], op[pos + ".ia"]
        gva, gvg = bank.gradient(va, vg=vgk)
        gva = np.broadcast_to(gva, (n,))
        gvg = np.broadcast_to(gvg, (n,))
        with np.errstate(divide="ignore", invalid="ignore"):
            rp = np.where(gva > 0, 1.0 / gva, np.inf)
        fig[pos + ".va"] = va
        fig[pos + ".vgk"] = vgk
        fig[pos + ".ia"] = ia
        fig[pos + ".pa"] = va * ia
        fig[pos + ".gm"] = gvg
        fig[pos + ".rp"] = rp
        with np.errstate(divide="ignore", invalid="ignore"):
            fig[pos + ".mu"] = np.where(gva > 0, gvg / np.where(gva > 0, gva, 1.0), np.nan)
        cath = "cathode" if pos == "tube" else "cathode_" + pos
        fig[pos + ".vhk"] = op[cath] - stage.heater
    fig["ia"] = op[positions[0] + ".ia"]

    # input: resistance, Miller capacitance Cgk (1 - A_k) + Cga (1 - A_p)
    first = positions[0]
    cath = "cathode" if first == "tube" else "cathode_bottom"
    plate = "plate" if first == "tube" else "plate_bottom"
    if isinstance(stage, CathodeFollower) and stage.r_upper is not None:
        zin = stage.rg + stage.r_upper * stage.r_lower / (stage.r_upper + stage.r_lower)
    else:
        zin = stage.rg
    fig["zin"] = np.full(n, float(zin))
    fig["cin"] = stage.cgk * (1 - fig["gain." + cath]) + stage.cga * (1 - fig["gain." + plate])

    # corners (single-pole estimates)
    two_pi = 2 * np.pi
    if stage.c_in is not None:
        fig["f_low.input"] = np.full(n, 1.0 / (two_pi * stage.c_in * (stage.rs + zin)))
    rl = np.inf if stage.rl is None else stage.rl
    if stage.c_out is not None and stage.rl is not None:
        fig["f_low.output"] = 1.0 / (two_pi * stage.c_out * (fig["zout"] + rl))
    if getattr(stage, "ck", None) is not None and stage.rk > 0:
        mu, rp = fig[first + ".mu"], fig[first + ".rp"]
        if isinstance(stage, CommonCathode):
            rload = 1.0 / (1.0 / stage.ra + (0.0 if stage.rl is None else 1.0 / stage.rl))
        else:
            # impedance of the top network seen from the bottom plate (bottom rp removed)
            with np.errstate(divide="ignore"):
                gz = 1.0 / fig["zout.plate_bottom"] - 1.0 / rp
                rload = np.where(gz > 0, 1.0 / np.maximum(gz, 1e-300), np.inf)
        rseen = 1.0 / (1.0 / stage.rk + (mu + 1) / (rp + rload))
        fig["f_low.bypass"] = 1.0 / (two_pi * stage.ck * rseen)
    if isinstance(stage, Stack) and stage.top_grid == "coupled" and stage.c_top is not None:
        ap, am = fig["gain.plate_bottom"], fig["gain.mid"]
        with np.errstate(divide="ignore", invalid="ignore"):
            reff = stage.rg_top / np.abs(1.0 - am / ap)
        fig["f_low.top_coupling"] = 1.0 / (two_pi * stage.c_top * (reff + fig["zout.plate_bottom"]))
    c_node = stage.c_load + stage.cak + (stage.cga if out.startswith("plate") else 0.0)
    zl = 1.0 / (1.0 / fig["zout"] + (0.0 if stage.rl is None else 1.0 / stage.rl))
    fig["c_out_node"] = np.full(n, c_node)
    with np.errstate(divide="ignore"):
        fig["f_high.output"] = np.where(c_node > 0, 1.0 / (two_pi * zl * max(c_node, 1e-300)), np.inf)
        if stage.rs > 0:
            rsrc = 1.0 / (1.0 / stage.rs + 1.0 / zin)
            fig["f_high.input"] = np.where(fig["cin"] > 0, 1.0 / (two_pi * rsrc * np.maximum(fig["cin"], 1e-300)), np.inf)
    # slew: the standing current is what the passive side can put into C at the zero crossing
    fig["slew_current"] = fig["ia"]
    fig["slew_vpeak"] = np.full(n, float(slew_vpeak))
    with np.errstate(divide="ignore"):
        fig["slew_fmax"] = np.where(
            c_node > 0, fig["ia"] / (two_pi * max(c_node, 1e-300) * slew_vpeak), np.inf)
    return fig


def _check_triodes(stage, triodes):
    positions = tube_positions(stage)
    if len(triodes) != len(positions):
        what = "two triodes (bottom, top)" if len(positions) == 2 else "one triode"
        raise ValueError(f"{stage_kind(stage)}: needs {what}, got {len(triodes)}")
    for t in triodes:
        if not isinstance(t, FittedTriode):
            raise ValueError(f"{stage_kind(stage)}: tubes must be FittedTriode objects, got {type(t).__name__}")


def operating_point(stage, *triodes) -> dict:
    """DC node voltages [V] and tube va, vgk [V], ia [A] (floats, SI)."""
    stage_kind(stage)
    _check_triodes(stage, triodes)
    banks = tuple(_Bank.of([t]) for t in triodes)
    op = _DC[type(stage)](stage, banks, 1)
    return {k: float(np.asarray(v).ravel()[0]) for k, v in op.items()}


def quasi_static(stage, *triodes, vin, op=None, dc_grid=False) -> dict:
    """Mid-band large-signal transfer for an array of input-grid signals.

    Parameters
    ----------
    stage : CommonCathode, CathodeFollower or Stack
    *triodes : FittedTriode
        One tube, or bottom then top for a stack.
    vin : array_like
        Signal added to the input grid's DC voltage [V].
    op : dict or None
        The DC operating point (from :func:`operating_point`); computed if None.
    dc_grid : bool
        If True, solve the DC circuit with the grid moved by ``vin`` instead (the DC
        load line of the stage; capacitors open).

    Returns
    -------
    dict
        Arrays shaped like ``vin``: node voltages [V] by node name, and for each tube
        position ``p`` the keys ``p.va``, ``p.vgk`` [V] and ``p.ia`` [A].  Capacitors
        hold their DC charge (quasi-static, mid-band); the load ``rl`` is connected.
    """
    stage_kind(stage)
    _check_triodes(stage, triodes)
    vin = np.asarray(vin, dtype=float)
    shape = vin.shape
    flat = vin.ravel()
    banks = tuple(_Bank.of([t]) for t in triodes)
    if dc_grid:
        res = _DC[type(stage)](stage, banks, flat.size, dvg=flat)
    else:
        if op is None:
            op = operating_point(stage, *triodes)
        opk = {k: np.full(flat.size, v) for k, v in op.items()}
        gl = 0.0 if stage.rl is None else 1.0 / stage.rl
        res = _MID[type(stage)](stage, banks, opk, flat, {}, gl)
    return {k: np.broadcast_to(np.asarray(v, float), flat.shape).reshape(shape) for k, v in res.items()}


# ---------------------------------------------------------------------------
# Results
# ---------------------------------------------------------------------------

# flat figure name -> (json name, display scale, display unit, label)
def _describe(key: str):
    if key.startswith("node."):
        n = key[5:]
        return f"v{n}_v", 1.0, "V", f"{n.replace('_', ' ')} voltage"
    if key.startswith("gain."):
        n = key[5:]
        return f"gain_{n}", 1.0, "", f"gain to {n.replace('_', ' ')}"
    if key.startswith("zout."):
        n = key[5:]
        return f"zout_{n}_ohm", 1.0, "ohm", f"output impedance at {n.replace('_', ' ')}"
    if key.startswith("f_low.") or key.startswith("f_high."):
        a, b = key.split(".")
        return f"{a}_{b}_hz", 1.0, "Hz", f"{'low' if a == 'f_low' else 'high'} corner ({b.replace('_', ' ')})"
    if "." in key:
        pos, q = key.split(".")
        scale, unit, name = {
            "va": (1.0, "V", "va_v"), "vgk": (1.0, "V", "vgk_v"), "ia": (1e3, "mA", "ia_ma"),
            "pa": (1.0, "W", "pa_w"), "gm": (1e3, "mA/V", "gm_ms"), "rp": (1.0, "ohm", "rp_ohm"),
            "mu": (1.0, "", "mu"), "vhk": (1.0, "V", "vhk_v"),
        }[q]
        return f"{pos}.{name}", scale, unit, f"{pos} {q}"
    return {
        "ia": ("ia_ma", 1e3, "mA", "standing current"),
        "gain": ("gain", 1.0, "", "mid-band gain"),
        "gain_db": ("gain_db", 1.0, "dB", "mid-band gain"),
        "zout": ("zout_ohm", 1.0, "ohm", "output impedance"),
        "zin": ("zin_ohm", 1.0, "ohm", "input resistance"),
        "cin": ("cin_pf", 1e12, "pF", "input capacitance"),
        "c_out_node": ("c_out_node_pf", 1e12, "pF", "capacitance at the output"),
        "slew_current": ("slew_current_ma", 1e3, "mA", "slew current"),
        "slew_vpeak": ("slew_vpeak_v", 1.0, "V", "slew check amplitude"),
        "slew_fmax": ("slew_fmax_hz", 1.0, "Hz", "slew-limited frequency"),
    }[key]


def _num(x):
    x = float(x)
    return x if math.isfinite(x) else None


_ASSUMPTIONS = [
    "DC: capacitors open, no grid current; small signal: mid-band (coupling and bypass "
    "capacitors short, interelectrode capacitances ignored except for the input capacitance "
    "and the corners)",
    "output impedance is seen at the output node with the load removed",
    "corner frequencies are single-pole estimates, one capacitor at a time",
    "slew limit: the standing current is what the passive side can put into the output "
    "capacitance (class-A limit of the weaker direction), f = I / (2 pi C Vpeak)",
]


@dataclass
class StageResult:
    """Figures of one stage with one set of tubes (SI inside; display units in to_dict).

    Attributes
    ----------
    stage : the stage description
    labels : tuple of str
        Unit label of each tube position.
    models : tuple of str
    figures : dict
        Flat figure name -> value, SI units (see :meth:`to_dict` for the names).
    errors : dict
        Flat figure name -> one-sigma error from the fit covariance (NaN: unknown).
    warnings : list of str
    assumptions : list of str
    """

    stage: object
    triodes: tuple
    figures: dict
    errors: dict
    warnings: list
    assumptions: list
    error_note: str = ""

    @property
    def labels(self):
        return tuple(t.label for t in self.triodes)

    @property
    def positions(self):
        return tube_positions(self.stage)

    def __getitem__(self, key):
        return self.figures[key]

    def to_dict(self) -> dict:
        """JSON-ready figures in the trade's display units.

        Top level: ``ia_ma``, ``gain`` (mid-band, signed, to the output), ``gain_db``,
        ``zout_ohm``, ``v<node>_v`` for every node (to ground), ``gain_<node>``,
        ``zout_<node>_ohm``, ``zin_ohm``, ``cin_pf``, ``f_low_<cap>_hz``,
        ``f_high_output_hz`` / ``f_high_input_hz``, ``slew_current_ma``,
        ``slew_vpeak_v``, ``slew_fmax_hz``; ``nodes_v``; ``tubes`` (per position:
        label, model, va_v, vgk_v, ia_ma, pa_w, pa_max_w, gm_ms, rp_ohm, mu, vhk_v,
        vhk_max_v); ``errors`` (same names, one sigma, null where unknown);
        ``warnings``, ``assumptions``, ``caution`` and ``circuit``.
        """
        d = {"stage": stage_kind(self.stage), "output": output_node(self.stage)}
        tubes = {}
        for pos, t in zip(self.positions, self.triodes):
            tubes[pos] = {"label": t.label, "model": t.model.name,
                          "pa_max_w": self.stage.pa_max, "vhk_max_v": self.stage.vhk_max}
        nodes = {}
        errors = {}
        for key, v in self.figures.items():
            name, scale, _, _ = _describe(key)
            val = _num(v * scale)
            err = self.errors.get(key, np.nan)
            if "." in name:
                pos, q = name.split(".")
                tubes[pos][q] = val
            else:
                d[name] = val
            if key.startswith("node."):
                nodes[key[5:]] = val
            errors[name if "." not in name else f"tubes.{name}"] = _num(err * scale)
        d["nodes_v"] = nodes
        d["tubes"] = tubes
        d["errors"] = errors
        d["warnings"] = list(self.warnings)
        d["assumptions"] = list(self.assumptions)
        d["caution"] = CAUTION
        d["circuit"] = self.stage.to_dict()
        return d

    def report(self) -> str:
        """The readable bench report (what the CLI prints)."""
        return _report(self)


def _fmt(v, err=None, unit="", digits=4):
    if v is None or not np.isfinite(v):
        return "n/a" if v is None or np.isnan(v) else ("inf" if v > 0 else "-inf")
    s = f"{v:.{digits}g}"
    if err is not None and np.isfinite(err) and err > 0:
        s += f" ± {err:.2g}"
    return s + (f" {unit}" if unit else "")


def _eng(v, unit=""):
    from .units import format_value

    if v is None or not np.isfinite(v):
        return "inf" if v is not None and v > 0 else "n/a"
    import re

    if not unit:
        return format_value(float(v))
    if unit == "ohm" and abs(v) < 1.0:
        # "917 mohm" would read as megohms
        return f"{float(v):.3g} ohm"
    # "46.19 kHz", "57.07 kohm", "22 uF": a space between the number and prefix + unit
    return re.sub(r"^([-+]?[\d.]+(?:e[-+]?\d+)?)", r"\1 ", format_value(float(v), unit)).rstrip()


def _circuit_line(st) -> str:
    parts = [f"B+ {st.b_plus:g} V"]
    if isinstance(st, CommonCathode):
        parts.append(f"Ra {_eng(st.ra)}")
        if st.rk > 0:
            parts.append(f"Rk {_eng(st.rk)}" + (f" bypassed by {_eng(st.ck, 'F')}" if st.ck else " unbypassed"))
        if st.vbias is not None:
            parts.append(f"fixed bias {st.vbias:g} V")
    elif isinstance(st, CathodeFollower):
        parts.append(f"Rk {_eng(st.rk)} to {st.vneg:g} V")
        if st.ra:
            parts.append(f"Ra {_eng(st.ra)}")
        if st.r_upper is not None:
            parts.append(f"grid divider {_eng(st.r_upper)}/{_eng(st.r_lower)} ({st.grid_dc:.4g} V)")
    else:
        parts.append(f"bottom Rk {_eng(st.rk)}" + (f" bypassed by {_eng(st.ck, 'F')}" if st.ck else " unbypassed"))
        if st.vbias is not None:
            parts.append(f"fixed bias {st.vbias:g} V")
        parts.append(f"r_top {_eng(st.r_top)}")
        parts.append(f"r_mid {_eng(st.r_mid)}")
        parts.append("top grid tied to bottom plate (SRPP)" if st.top_grid == "tied"
                     else f"top grid coupled, biased from mid via {_eng(st.rg_top)} (mu follower)")
    parts.append(f"grid leak {_eng(st.rg)}")
    if st.rl is not None:
        parts.append(f"load {_eng(st.rl)}" + (f" via {_eng(st.c_out, 'F')}" if st.c_out else ""))
    if st.c_load:
        parts.append(f"load C {_eng(st.c_load, 'F')}")
    return ", ".join(parts)


def _report(r: StageResult) -> str:
    st = r.stage
    f, e = r.figures, r.errors
    tubes = ", ".join(f"{p} {t.label} ({t.model.name})" for p, t in zip(r.positions, r.triodes))
    lines = [f"{stage_title(st)}: {tubes}", CAUTION, "",
             "Circuit: " + _circuit_line(st), "", "DC operating point (node voltages to ground)"]
    for key in f:
        if key.startswith("node."):
            lines.append(f"  {key[5:]:<15}{_fmt(f[key], e.get(key), 'V')}")
    lines.append(f"  {'current':<15}{_fmt(f['ia'] * 1e3, e.get('ia', np.nan) * 1e3, 'mA')}")
    lines.append("")
    lines.append("Tubes")
    for pos, t in zip(r.positions, r.triodes):
        g = lambda q: f[f"{pos}.{q}"]  # noqa: E731
        ge = lambda q: e.get(f"{pos}.{q}", np.nan)  # noqa: E731
        lines.append(f"  {pos} ({t.label}): Va {_fmt(g('va'), ge('va'), 'V')}, "
                     f"Vgk {_fmt(g('vgk'), ge('vgk'), 'V')}, Ia {_fmt(g('ia') * 1e3, ge('ia') * 1e3, 'mA')}")
        pa = g("pa")
        if st.pa_max:
            pct = 100 * pa / st.pa_max
            verdict = "OVER THE LIMIT" if pa > st.pa_max else "ok"
            lines.append(f"      dissipation {_fmt(pa, ge('pa'), 'W', 3)} of {st.pa_max:g} W ({pct:.0f} %) {verdict}")
        else:
            lines.append(f"      dissipation {_fmt(pa, ge('pa'), 'W', 3)} (no limit given: --pa-max)")
        lines.append(f"      gm {_fmt(g('gm') * 1e3, ge('gm') * 1e3, 'mA/V', 3)}, rp {_eng(g('rp'), 'ohm')}"
                     + (f" ± {_eng(ge('rp'), 'ohm')}" if np.isfinite(ge('rp')) else "") + ", "
                     f"mu {_fmt(g('mu'), ge('mu'), '', 3)}")
        vhk = g("vhk")
        verdict = "EXCEEDS THE LIMIT" if abs(vhk) > st.vhk_max else "ok"
        lines.append(f"      heater-cathode {vhk:+.4g} V (heater at {st.heater:g} V, limit {st.vhk_max:g} V) {verdict}")
    lines.append("")
    lines.append("Small signal (mid-band)")
    out = output_node(st)
    for node in _output_nodes(st):
        mark = " (output)" if node == out else ""
        lines.append(f"  gain to {node.replace('_', ' ')}{mark}: {_fmt(f['gain.' + node], e.get('gain.' + node), '', 4)}"
                     + (f"  ({20 * np.log10(abs(f['gain.' + node])):.1f} dB)" if f['gain.' + node] != 0 else "  (no gain)"))
        z = f["zout." + node]
        ze = e.get("zout." + node, np.nan)
        lines.append(f"  output impedance at {node.replace('_', ' ')}: {_eng(z, 'ohm')}"
                     + (f" ± {_eng(ze, 'ohm')}" if np.isfinite(ze) else ""))
    lines.append(f"  input resistance {_eng(f['zin'], 'ohm')}, input capacitance {_fmt(f['cin'] * 1e12, e.get('cin', np.nan) * 1e12, 'pF', 3)}"
                 + (" (Miller: Cgk (1 - A_k) + Cga (1 - A_p))" if st.cga or st.cgk else " (give --cgk/--cga)"))
    lows = [(k[6:], v) for k, v in f.items() if k.startswith("f_low.")]
    if lows:
        lines.append("  low corners: " + ", ".join(f"{n.replace('_', ' ')} {_fmt(v, None, 'Hz', 3)}" for n, v in lows))
    highs = [(k[7:], v) for k, v in f.items() if k.startswith("f_high.") and np.isfinite(v)]
    if highs:
        lines.append("  high corners: " + ", ".join(f"{n} {_eng(v, 'Hz')}" for n, v in highs)
                     + f" (output C {_fmt(f['c_out_node'] * 1e12, None, 'pF', 3)})")
    else:
        lines.append("  high corners: none (give --cload and the interelectrode capacitances, --rs for the input)")
    if np.isfinite(f["slew_fmax"]):
        lines.append(f"  slew: {_fmt(f['slew_current'] * 1e3, None, 'mA', 3)} into {_fmt(f['c_out_node'] * 1e12, None, 'pF', 3)}"
                     f" allows {f['slew_vpeak']:g} V peak up to {_eng(f['slew_fmax'], 'Hz')}")
    if r.warnings:
        lines.append("")
        lines.append("Warnings")
        lines.extend("  ! " + w for w in r.warnings)
    lines.append("")
    lines.append("Notes: " + (r.error_note or "error bars: one sigma from the fit covariance"))
    lines.extend("  - " + a for a in r.assumptions)
    return "\n".join(lines)


def _warnings(stage, triodes, fig) -> list[str]:
    out = []
    for pos, t in zip(tube_positions(stage), triodes):
        name = f"{pos} tube {t.label}" if pos != "tube" else f"tube {t.label}"
        va, vgk, ia = fig[f"{pos}.va"], fig[f"{pos}.vgk"], fig[f"{pos}.ia"]
        if ia < 1e-6:
            out.append(f"{name} is practically cut off at the operating point (Ia {ia * 1e3:.3g} mA)")
        if vgk >= 0:
            out.append(f"{name}: grid at {vgk:+.3g} V to its cathode: grid current will flow"
                       + ("" if t.model.grid_current else " (not in this model)"))
        if t.envelope is not None:
            why = t.envelope.outside(va, vgk, ia)
            if why is not None:
                out.append(f"{name}: operating point (Va {va:.4g} V, Vgk {vgk:.4g} V) is outside the measured "
                           f"data: {why} ({t.envelope.describe()}); the model is extrapolating")
        elif t.outside_range(va, vgk):
            rg = t.valid_range
            out.append(f"{name}: operating point (Va {va:.4g} V, Vgk {vgk:.4g} V) is outside the fitted "
                       f"data (va {rg['va'][0]:.4g}..{rg['va'][1]:.4g} V, vg {rg['vg'][0]:.4g}..{rg['vg'][1]:.4g} V): "
                       "the model is extrapolating")
        if stage.pa_max is not None and fig[f"{pos}.pa"] > stage.pa_max:
            out.append(f"{name} dissipates {fig[f'{pos}.pa']:.3g} W, over the {stage.pa_max:g} W limit")
        elif t.envelope is not None and fig[f"{pos}.pa"] > t.envelope.pa_max * (1 + t.envelope.HEADROOM):
            # no limit given, but the tube was never measured this hot: its data say nothing
            # about it there (and it may be past the tube's rating)
            out.append(f"{name} dissipates {fig[f'{pos}.pa']:.3g} W, more than the {t.envelope.pa_max:.3g} W "
                       "reached anywhere in its measured data; check the tube's rated dissipation")
    vk = [fig[f"{p}.vhk"] + stage.heater for p in tube_positions(stage)]
    over = [p for p in tube_positions(stage) if abs(fig[f"{p}.vhk"]) > stage.vhk_max]
    if over:
        best = 0.5 * (max(vk) + min(vk))
        worst = 0.5 * (max(vk) - min(vk))
        single = list(tube_positions(stage)) == ["tube"]
        who = "the tube" if single else f"the {' and '.join(over)} tube"
        msg = (f"heater-cathode voltage of {who} exceeds the {stage.vhk_max:g} V limit "
               f"(heater at {stage.heater:g} V)")
        if single:
            msg += f"; elevate the heater supply to about {best:.0f} V, near the cathode's DC voltage"
        elif worst <= stage.vhk_max:
            msg += f"; elevate the heater supply to about {best:.0f} V (then at most {worst:.0f} V)"
        else:
            msg += "; no single heater elevation brings every cathode within the limit"
        out.append(msg)
    return out


def _figure_names(stage, fig) -> list:
    return list(fig.keys())


def _analyse_cases(stage, cases, keys, slew_vpeak) -> np.ndarray:
    """Figures ``keys`` for every case (a tuple of triodes per position), one row per case.

    Cases are solved together, one vectorised :func:`_analyse` per group of cases that
    share their models and grid-current parameters (which the banks keep scalar).
    """
    rows = np.full((len(cases), len(keys)), np.nan)
    groups: dict = {}
    for i, c in enumerate(cases):
        groups.setdefault(tuple(_group_key(t) for t in c), []).append(i)
    for idx in groups.values():
        banks = tuple(_Bank.of([cases[i][j] for i in idx]) for j in range(len(cases[0])))
        fig = _analyse(stage, banks, len(idx), slew_vpeak)
        for col, k in enumerate(keys):
            rows[idx, col] = np.broadcast_to(fig[k], (len(idx),))
    return rows


def solve(stage, *triodes: FittedTriode, errors: bool = True, slew_vpeak: float = 10.0) -> StageResult:
    """Operating point and small-signal figures of ``stage`` with the given tubes.

    Parameters
    ----------
    stage : CommonCathode, CathodeFollower or Stack
        The circuit (SI units).
    *triodes : FittedTriode
        One tube; for a :class:`Stack`, the bottom tube then the top tube.
    errors : bool
        Propagate the fit covariance of every tube to every figure
        (central differences as in :func:`fitter.triode.propagate`, every perturbed
        parameter set of every tube solved together in one vectorised pass; the tubes'
        contributions are added in quadrature, the units being independent).
    slew_vpeak : float
        Output peak amplitude for the slew-rate check [V].

    Returns
    -------
    StageResult

    Raises
    ------
    ValueError
        Wrong number or kind of tubes, or an impossible circuit value.
    StageSolveError
        The circuit equations could not be solved.
    """
    stage_kind(stage)
    _check_triodes(stage, triodes)
    if not (isinstance(slew_vpeak, (int, float)) and slew_vpeak > 0):
        raise ValueError(f"slew_vpeak: must be a positive number of volts, got {slew_vpeak!r}")
    banks = tuple(_Bank.of([t]) for t in triodes)
    raw = _analyse(stage, banks, 1, slew_vpeak)
    keys = list(raw)
    figures = {k: float(raw[k][0]) for k in keys}
    errs = {k: np.nan for k in keys}
    note = "no error bars: not requested"
    if errors:
        note = "no error bars: the model card(s) carry no covariance"
        var = np.zeros(len(keys))
        known = False
        # every perturbed parameter set of every tube (the others at their fitted values)
        # stacked along one axis and solved together, instead of one solve per set
        cases, parts = [], []
        for i, t in enumerate(triodes):
            if t.covariance is None or not t.free:
                continue
            sets, steps = perturbed(t)
            parts.append((t, len(cases), len(sets), steps))
            cases += [tuple(tt if j == i else x for j, x in enumerate(triodes)) for tt in sets]
        if cases:
            rows = _analyse_cases(stage, cases, keys, slew_vpeak)
            # infinite figures (no capacitance given) carry no error: NaN, not inf - inf
            rows = np.where(np.isfinite(rows), rows, np.nan)
            for t, start, count, steps in parts:
                var += error_from_differences(rows[start:start + count], steps, t.covariance) ** 2
            known = True
        if known:
            errs = {k: float(np.sqrt(v)) for k, v in zip(keys, var)}
            with_cov = [t.label for t in triodes if t.covariance is not None and t.free]
            note = ("error bars: one sigma from the fit covariance of " + ", ".join(with_cov)
                    + ("" if len(with_cov) == len(triodes) else " (the other card carries none)"))
    warns = _warnings(stage, triodes, figures)
    return StageResult(stage, tuple(triodes), figures, errs, warns, list(_ASSUMPTIONS), note)


# ---------------------------------------------------------------------------
# Spread over many units
# ---------------------------------------------------------------------------


@dataclass
class SpreadResult:
    """min / median / max of every figure of a stage over many units.

    Attributes
    ----------
    stage : the stage description
    labels : list of str
        One label per case (``"bottom/top"`` for stacks).
    values : dict
        Flat figure name -> array of the value for each case (SI).
    """

    stage: object
    labels: list
    values: dict
    pairing: str = ""
    #: summary lines: how many units carry each kind of warning, and mixed types
    warnings: list = field(default_factory=list)

    def stats(self, key):
        v = np.asarray(self.values[key], float)
        return float(np.min(v)), float(np.median(v)), float(np.max(v))

    def to_dict(self) -> dict:
        figs = {}
        for key, v in self.values.items():
            name, scale, unit, label = _describe(key)
            lo, med, hi = self.stats(key)
            figs[name] = {"min": _num(lo * scale), "median": _num(med * scale), "max": _num(hi * scale),
                          "unit": unit}
        out = {"stage": stage_kind(self.stage), "n_units": len(self.labels), "units": list(self.labels),
               "figures": figs, "caution": CAUTION, "circuit": self.stage.to_dict()}
        if self.pairing:
            out["pairing"] = self.pairing
        out["warnings"] = list(self.warnings)
        g = np.abs(self.values["gain"])
        i_lo = int(np.nanargmin(g))
        i_hi = int(np.nanargmax(g))
        out["lowest_gain_unit"] = self.labels[i_lo]
        out["highest_gain_unit"] = self.labels[i_hi]
        return out

    def report(self) -> str:
        lines = [f"{stage_title(self.stage)} over {len(self.labels)} units" +
                 (f" ({self.pairing})" if self.pairing else ""), CAUTION, "",
                 "Circuit: " + _circuit_line(self.stage), "",
                 f"  {'figure':<34}{'min':>12}{'median':>12}{'max':>12}"]
        out = output_node(self.stage)
        for key in self.values:
            if key in ("slew_vpeak", "zin", "c_out_node", "gain.grid", "gain." + out, "zout." + out):
                continue
            if not np.any(np.isfinite(self.values[key])):
                continue
            name, scale, unit, label = _describe(key)
            lo, med, hi = self.stats(key)
            lab = f"{label} [{unit}]" if unit else label
            lines.append(f"  {lab:<34}{lo * scale:>12.4g}{med * scale:>12.4g}{hi * scale:>12.4g}")
        d = self.to_dict()
        lines.append("")
        lines.append(f"lowest |gain|: {d['lowest_gain_unit']}, highest |gain|: {d['highest_gain_unit']}")
        if self.warnings:
            lines.append("")
            lines.append("Warnings")
            lines.extend("  ! " + w for w in self.warnings)
        return "\n".join(lines)


def spread(stage, units: Sequence[FittedTriode], tops=None, slew_vpeak: float = 10.0) -> SpreadResult:
    """Solve ``stage`` for many units at once and collect every figure.

    Parameters
    ----------
    stage : CommonCathode, CathodeFollower or Stack
    units : sequence of FittedTriode
        The units (for a stack: the bottom tubes).
    tops : FittedTriode, sequence of FittedTriode, or None
        Stacks only: one top tube for every case, a sequence paired with ``units``
        element by element, or None to put each unit in both positions.

    Returns
    -------
    SpreadResult
    """
    stage_kind(stage)
    units = list(units)
    if not units:
        raise ValueError("spread: no units given")
    for t in units:
        if not isinstance(t, FittedTriode):
            raise ValueError(f"spread: units must be FittedTriode objects, got {type(t).__name__}")
    if isinstance(stage, Stack):
        if tops is None:
            tops = list(units)
            pairing = "each unit in both positions"
        elif isinstance(tops, FittedTriode):
            tops = [tops] * len(units)
            pairing = f"top fixed: {tops[0].label}"
        else:
            tops = list(tops)
            if len(tops) != len(units):
                raise ValueError(f"spread: {len(units)} bottom units but {len(tops)} top units")
            pairing = "paired bottom/top"
        cases = list(zip(units, tops))
        labels = [f"{b.label}/{t.label}" for b, t in cases]
    else:
        if tops is not None:
            raise ValueError("spread: 'tops' is for stacks only")
        cases = [(u,) for u in units]
        labels = [u.label for u in units]
        pairing = ""
    groups: dict = {}
    for i, c in enumerate(cases):
        groups.setdefault(tuple(_group_key(t) for t in c), []).append(i)
    values: dict = {}
    n = len(cases)
    for idx in groups.values():
        banks = tuple(_Bank.of([cases[i][j] for i in idx]) for j in range(len(cases[0])))
        fig = _analyse(stage, banks, len(idx), slew_vpeak)
        for k, v in fig.items():
            values.setdefault(k, np.full(n, np.nan))[idx] = np.broadcast_to(v, (len(idx),))
    return SpreadResult(stage, labels, values, pairing, _spread_warnings(stage, cases, labels, values))


#: kinds of per-unit warning, as (marker in the message, summary wording)
_WARNING_KINDS = (
    ("extrapolating", "operating point outside their fitted data (the model is extrapolating)"),
    ("cut off", "practically cut off at the operating point"),
    ("over the", "over the plate dissipation limit"),
    ("grid current", "grid at or above its cathode: grid current"),
    ("heater-cathode", "over the heater-cathode limit"),
)


def _spread_warnings(stage, cases, labels, values) -> list[str]:
    """Per-unit warnings of a spread, summarised: 'k of N units: ...' with the labels."""
    n = len(cases)
    hits: dict = {}
    for i, c in enumerate(cases):
        fig = {k: float(v[i]) for k, v in values.items()}
        for w in _warnings(stage, c, fig):
            for marker, text in _WARNING_KINDS:
                if marker in w:
                    hits.setdefault(text, []).append(labels[i])
                    break
    out = []
    for _, text in _WARNING_KINDS:
        if text in hits:
            who = hits[text]
            shown = ", ".join(who[:8]) + (f" and {len(who) - 8} more" if len(who) > 8 else "")
            out.append(f"{len(who)} of {n} units: {text} ({shown})")
    first = tube_positions(stage)[0]
    mu = np.asarray(values.get(first + ".mu", []), float)
    mu = mu[np.isfinite(mu)]
    if mu.size and np.min(mu) > 0 and np.max(mu) / np.min(mu) > 1.5:
        out.append(f"the units look like different tube types (mu at the operating point from "
                   f"{np.min(mu):.3g} to {np.max(mu):.3g}); a spread is meant for units of one type")
    return out
