"""Positions (where a tube will work) and every unit's figures in one.

A *position* is a fixed-bias point (:class:`FixedBias`), a cathode-biased common-cathode
stage (:class:`CathodeBias`), or a slot of a stacked stage (:class:`StackedSlot`, solved
with :mod:`fitter.stage`).  :func:`unit_figures` computes each unit's Ia, gm, rp, mu (and
for stages the gain) there from its fitted model, and flags units whose fitted data do
not cover the position (``FittedTriode.outside_range``).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Sequence

import numpy as np

from ..triode import FittedTriode, propagate
from .criterion import FIGURES, MatchError, _positive

@dataclass(frozen=True)
class FixedBias:
    """A fixed-bias working point.

    Parameters
    ----------
    va : float
        Plate-to-cathode voltage [V].
    vg : float
        Grid-to-cathode voltage [V].
    """

    va: float
    vg: float

    def __post_init__(self):
        _positive("position va", self.va, field="va")
        if isinstance(self.vg, bool) or not isinstance(self.vg, (int, float)) or not math.isfinite(self.vg):
            raise MatchError(f"must be a finite number, got {self.vg!r}", subject="position vg", field="vg")

    def describe(self) -> str:
        return f"fixed bias: va = {self.va:g} V, vg = {self.vg:g} V"

    def to_dict(self) -> dict:
        return {"kind": "fixed-bias", "va_v": float(self.va), "vg_v": float(self.vg)}


@dataclass(frozen=True)
class CathodeBias:
    """A cathode-biased common-cathode stage: each unit finds its own working point.

    Parameters
    ----------
    b_plus : float
        Supply voltage [V].
    ra : float
        Plate resistor (or the DC resistance of the load) [ohm].
    rk : float
        Cathode resistor [ohm].
    bypassed : bool
        Whether Rk is bypassed (sets the gain figure).
    """

    b_plus: float
    ra: float
    rk: float
    bypassed: bool = True

    def __post_init__(self):
        _positive("position B+", self.b_plus, field="bplus")
        _positive("position Ra", self.ra, allow_zero=True, field="ra")
        _positive("position Rk", self.rk, field="rk")

    def stage(self):
        from ..stage import CommonCathode

        return CommonCathode(b_plus=float(self.b_plus), ra=float(self.ra), rk=float(self.rk),
                             ck=1.0 if self.bypassed else None) if self.ra > 0 else None

    def describe(self) -> str:
        return (f"cathode bias: B+ = {self.b_plus:g} V, Ra = {self.ra:g} ohm, Rk = {self.rk:g} ohm"
                f" ({'bypassed' if self.bypassed else 'unbypassed'})")

    def to_dict(self) -> dict:
        return {"kind": "cathode-bias", "b_plus_v": float(self.b_plus), "ra_ohm": float(self.ra),
                "rk_ohm": float(self.rk), "bypassed": bool(self.bypassed)}


@dataclass(frozen=True)
class StackedSlot:
    """One slot of a stacked stage (:class:`fitter.stage.Stack`) with a given partner.

    Parameters
    ----------
    stack : fitter.stage.Stack
    slot : {"bottom", "top"}
        The slot the units being matched go in.
    partner : FittedTriode
        The unit in the other slot (for example a reference unit of the type).
    """

    stack: object
    slot: str
    partner: FittedTriode

    def __post_init__(self):
        from ..stage import Stack

        if not isinstance(self.stack, Stack):
            raise MatchError(f"'stack' must be a fitter.stage.Stack, got {type(self.stack).__name__}",
                             subject="stacked slot", field="stack")
        if self.slot not in ("bottom", "top"):
            raise MatchError(f"'slot' must be 'bottom' or 'top', got {self.slot!r}", subject="stacked slot",
                             field="slot")
        if not isinstance(self.partner, FittedTriode):
            raise MatchError("'partner' must be a FittedTriode", subject="stacked slot", field="partner")

    def describe(self) -> str:
        other = "top" if self.slot == "bottom" else "bottom"
        return (f"{self.slot} slot of a stack (B+ = {self.stack.b_plus:g} V, Rk = {self.stack.rk:g} ohm, "
                f"R top = {self.stack.r_top:g} ohm), {other} = {self.partner.label}")

    def to_dict(self) -> dict:
        return {"kind": "stacked-slot", "slot": self.slot, "partner": self.partner.label,
                "circuit": self.stack.to_dict()}



@dataclass
class UnitFigures:
    """Each unit's figures in a position (SI units).

    Attributes
    ----------
    units : list of FittedTriode
    values : dict
        ``ia`` [A], ``gm`` [S], ``rp`` [ohm], ``mu`` [-], ``va`` [V], ``vg`` [V] (the
        unit's own working point), and ``gain`` [-] for stage positions; arrays.
    errors : dict or None
        One-sigma errors of the same figures from the fit covariance (NaN: unknown).
    outside : ndarray of bool
        The position lies outside the unit's fitted data (extrapolated).
    problem : list of str or None
        Why a unit cannot be matched at this position (None: usable).
    """

    position: object
    units: list
    values: dict
    errors: dict | None
    outside: np.ndarray
    problem: list

    @property
    def labels(self):
        return [u.label for u in self.units]

    def unit_dict(self, k: int) -> dict:
        d = {"unit": self.units[k].label, "va_v": _f(self.values["va"][k]), "vg_v": _f(self.values["vg"][k])}
        for name, (_, unit, scale) in FIGURES.items():
            if name in self.values:
                key = f"{name}_{unit.replace('/', '_per_').lower()}" if unit else name
                key = {"ia_ma": "ia_ma", "gm_ma_per_v": "gm_ms", "rp_kohm": "rp_kohm"}.get(key, key)
                d[key] = _f(self.values[name][k] * scale)
                if self.errors is not None:
                    d[key + "_err"] = _f(self.errors[name][k] * scale)
        d["outside_data"] = bool(self.outside[k])
        return d



def _f(x):
    """A finite float, or None (JSON has no NaN)."""
    x = float(x)
    return x if math.isfinite(x) else None


def _model_groups(units):
    groups: dict = {}
    for k, u in enumerate(units):
        key = (u.model.name,) + tuple(u.params[p] for p in u.model.grid_param_names)
        groups.setdefault(key, []).append(k)
    return groups


def _fixed_bias_values(units, va, vg):
    n = len(units)
    out = {k: np.full(n, np.nan) for k in ("ia", "gm", "rp", "mu")}
    for idx in _model_groups(units).values():
        model = units[idx[0]].model
        params = {}
        for p in model.param_names:
            vals = np.array([units[k].params[p] for k in idx], float)
            params[p] = float(vals[0]) if p in model.grid_param_names else vals
        ia = np.broadcast_to(model.current(va, vg, **params), (len(idx),))
        dva, dvg = model.voltage_gradient(va, vg, **params)
        dva = np.broadcast_to(dva, (len(idx),))
        dvg = np.broadcast_to(dvg, (len(idx),))
        with np.errstate(divide="ignore"):
            rp = np.where(dva > 0, 1.0 / np.where(dva > 0, dva, 1.0), np.inf)
        out["ia"][idx] = ia
        out["gm"][idx] = dvg
        out["rp"][idx] = rp
        out["mu"][idx] = dvg * rp
    out["va"] = np.full(n, float(va))
    out["vg"] = np.full(n, float(vg))
    return out


def _stage_values(position, units):
    from ..stage import spread

    if isinstance(position, CathodeBias):
        st = position.stage()
        if st is None:
            raise MatchError("a cathode-biased stage needs a plate resistor above 0", subject="position Ra", field="ra")
        r = spread(st, units)
        v = r.values
        pos = "tube"
    else:
        if position.slot == "bottom":
            r = spread(position.stack, units, tops=position.partner)
        else:
            r = spread(position.stack, [position.partner] * len(units), tops=list(units))
        v = r.values
        pos = position.slot
    return {
        "ia": np.asarray(v[f"{pos}.ia"], float), "gm": np.asarray(v[f"{pos}.gm"], float),
        "rp": np.asarray(v[f"{pos}.rp"], float), "mu": np.asarray(v[f"{pos}.mu"], float),
        "va": np.asarray(v[f"{pos}.va"], float), "vg": np.asarray(v[f"{pos}.vgk"], float),
        "gain": np.asarray(v["gain"], float),
    }


def _values(position, units):
    if isinstance(position, FixedBias):
        return _fixed_bias_values(units, position.va, position.vg)
    if isinstance(position, (CathodeBias, StackedSlot)):
        return _stage_values(position, units)
    raise MatchError(
        f"unknown position {type(position).__name__}; use FixedBias, CathodeBias or StackedSlot")


def unit_figures(units: Sequence[FittedTriode], position, errors: bool = False,
                 extrapolate: bool = False) -> UnitFigures:
    """Every unit's figures in ``position``, computed from its fitted model.

    Parameters
    ----------
    units : sequence of FittedTriode
    position : FixedBias, CathodeBias or StackedSlot
    errors : bool
        Also propagate the fit covariance to every figure
        (:func:`fitter.triode.propagate`, one unit at a time).
    extrapolate : bool
        Let units whose fitted data do not cover the position take part (they stay
        flagged ``outside``); by default they are kept out with that reason.

    Raises
    ------
    MatchError
        No units, or the position is outside every unit's data (unless
        ``extrapolate``).
    """
    units = list(units)
    if not units:
        raise MatchError("no units to match: the set is empty")
    for u in units:
        if not isinstance(u, FittedTriode):
            raise MatchError(f"units must be FittedTriode objects, got {type(u).__name__}")
    values = _values(position, units)
    n = len(units)
    outside = np.array([u.outside_range(values["va"][k], values["vg"][k], ia=values["ia"][k])
                        for k, u in enumerate(units)], bool)
    if outside.all() and not extrapolate:
        why = units[0].outside_reason(values["va"][0], values["vg"][0], ia=values["ia"][0])
        rng = f" (e.g. {why})" if why else ""
        raise MatchError(f"the position ({position.describe()}) is outside every unit's fitted data{rng}; "
                         "choose a point inside the measured curves or allow extrapolation")
    problem: list = [None] * n
    for k in range(n):
        ia, gm = values["ia"][k], values["gm"][k]
        if not (np.isfinite(ia) and np.isfinite(gm)):
            problem[k] = "its model gives no finite figures at this position"
        elif ia <= 0 or gm <= 0:
            problem[k] = "cut off at this position (Ia = 0)"
        elif outside[k] and not extrapolate:
            problem[k] = "the position is outside its fitted data (extrapolation not allowed)"
    errs = None
    if errors:
        names = [k for k in ("ia", "gm", "rp", "mu", "gain") if k in values]
        errs = {k: np.full(n, np.nan) for k in names}
        for k, u in enumerate(units):
            if u.covariance is None or not u.free:
                continue

            def fn(t):
                v = _values(position, [t])
                return np.array([v[name][0] for name in names])

            _, s = propagate(fn, u)
            for name, e in zip(names, s):
                errs[name][k] = e
    return UnitFigures(position, units, values, errs, outside, problem)
