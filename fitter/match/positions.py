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

#: the test positions accepted [V]: wider than any receiving or power triode's ratings (common
#: practice), and it keeps the model equations away from floating-point overflow and underflow
POSITION_RANGE = {"va": (1.0, 10_000.0), "vg": (-1_000.0, 1_000.0)}


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
        for name in ("va", "vg"):
            lo, hi = POSITION_RANGE[name]
            v = getattr(self, name)
            if not lo <= v <= hi:
                raise MatchError(f"must be between {lo:g} and {hi:g} V, got {v:g}", subject=f"position {name}",
                                 field=name)

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



@dataclass(frozen=True)
class PushPullSlot:
    """A side of a push-pull output stage (:class:`fitter.stage.output.PushPullOutput`):
    matching by what the pair does.

    A pair's trouble in push-pull is its DC imbalance (a standing current in the primary,
    which saturates the core) and the even harmonics the halves no longer cancel (H2).
    Neither is a figure of one tube, so each unit is put in side A opposite ``reference``
    (a typical unit of the type) and two figures are taken from that solve:

    * ``ia``: its idle plate current in the stage.  With fixed bias the DC imbalance of a
      pair is exactly the difference of the two idle currents (the transformer has no DC
      voltage), so the relative difference of ``ia`` is the imbalance as a fraction of the
      mean current.  With a shared cathode resistor each current also depends on the
      partner a little; the reference stands in for it.
    * ``h2``: the amplitude of its plate current's second harmonic [A] at ``level`` (a
      fraction of the reference pair's largest drive), signed so that it is positive for a
      rising transconductance.  The output of a push-pull is the difference of the two
      plate currents; the grids are in antiphase, so the second harmonics of the two
      currents are in phase and cancel in that difference but for their difference.  Each
      tube is a generator of second-harmonic current g2 behind its rp; measured opposite the
      reference, h2 = g2 - v2 / rp with v2 = Z (g2 - g2_ref) (Z: the load in parallel with
      the two rp), so h2_A - h2_B = (g2_A - g2_B)(1 - Z / rp), and the pair's H2 / H1 is
      proportional to |h2_A - h2_B| with one constant for the stage and type (to first
      order: a test finds the ratio the same within 15 % over pairs whose units differ in
      curvature; units that differ only in scale leave a far smaller H2 of higher order,
      and a near-zero h2 difference).  The relative difference of ``h2`` thus ranks pairs
      by their predicted H2, as the relative difference of ``ia`` ranks them by their DC
      imbalance.

    ``gm``, ``rp``, ``mu`` (at each unit's own idle point) are given too, so the usual
    criteria still work here.  :func:`pair_prediction` solves a chosen pair in the stage
    for the figures themselves.
    """

    stage: object
    reference: FittedTriode
    level: float = 0.5

    def __post_init__(self):
        from ..stage.output import PushPullOutput

        if not isinstance(self.stage, PushPullOutput):
            raise MatchError(f"'stage' must be a PushPullOutput, got {type(self.stage).__name__}",
                             subject="push-pull slot", field="stage")
        if not isinstance(self.reference, FittedTriode):
            raise MatchError("'reference' must be a FittedTriode", subject="push-pull slot", field="reference")
        _positive("push-pull level", self.level, field="level")
        if self.level > 1:
            raise MatchError(f"must be a fraction of the largest drive (0 to 1], got {self.level!r}",
                             subject="push-pull level", field="level")

    def describe(self) -> str:
        st = self.stage
        bias = f"grid {st.grid_bias:g} V" if st.grid_bias is not None else f"shared Rk {st.rk:g} ohm"
        return (f"push-pull side (B+ = {st.b_plus:g} V, {st.reflected_load:g} ohm plate to plate, {bias}), "
                f"opposite {self.reference.label}, H2 at {self.level:g} of the largest drive")

    def to_dict(self) -> dict:
        from dataclasses import asdict

        return {"kind": "push-pull", "stage": asdict(self.stage), "reference": self.reference.label,
                "level": float(self.level)}


def _push_pull_values(position, units):
    from ..stage import StageInputError, StageSolveError
    from ..stage.output import _banks, _drive_limits, _idle, _period_waveforms

    st = position.stage
    banks_ref = _banks(st, (position.reference, position.reference))
    op_ref = _idle(st, banks_ref)
    lim = _drive_limits(st, banks_ref, op_ref)
    amp = position.level * lim["grid"]
    theta = 2 * np.pi * np.arange(128) / 128
    vin = amp * np.sin(theta)
    n = len(units)
    out = {k: np.full(n, np.nan) for k in ("ia", "gm", "rp", "mu", "va", "vg", "h2")}
    for k, u in enumerate(units):
        try:
            banks = _banks(st, (u, position.reference))
            op = _idle(st, banks)
            # a shared bypassed cathode sits at its level's mean current, as pair_prediction has it
            w = _period_waveforms(st, banks, op, vin)
        except (StageSolveError, StageInputError):  # the stage cannot run it (cut off): no figures
            continue
        ia = w["A.ia"]
        out["h2"][k] = -(2.0 / theta.size) * float(ia @ np.cos(2 * theta))
        out["ia"][k] = op["A.ia"]
        out["va"][k] = op["A.va"]
        out["vg"][k] = op["A.vgk"]
        dva, dvg = u.gradient(op["A.va"], op["A.vgk"])
        dva, dvg = float(dva), float(dvg)
        out["gm"][k] = dvg
        out["rp"][k] = 1.0 / dva if dva > 0 else np.inf
        out["mu"][k] = dvg * out["rp"][k]
    return out


def pair_prediction(position: PushPullSlot, a: FittedTriode, b: FittedTriode) -> dict:
    """The pair (a, b) solved in the position's stage at its level: ``imbalance_ma`` (A - B),
    ``h2_db``, ``h3_db``, ``thd_pct`` and ``power_w``."""
    from ..stage.output import _banks, _drive_limits, _idle, _spectra, _sweep_from

    st = position.stage
    banks_ref = _banks(st, (position.reference, position.reference))
    amp = position.level * _drive_limits(st, banks_ref, _idle(st, banks_ref))["grid"]
    banks = _banks(st, (a, b))
    op = _idle(st, banks)
    s = _sweep_from(st, [amp], _spectra(st, banks, op, [amp])[1])
    return {"imbalance_ma": 1e3 * (op["A.ia"] - op["B.ia"]), "h2_db": float(s.h2[0]),
            "h3_db": float(s.h3[0]), "thd_pct": 100 * float(s.thd[0]), "power_w": float(s.power[0])}


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
    if isinstance(position, PushPullSlot):
        return _push_pull_values(position, units)
    raise MatchError(
        f"unknown position {type(position).__name__}; use FixedBias, CathodeBias, StackedSlot or PushPullSlot")


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
        elif "h2" in values and not values["h2"][k] > 0:
            problem[k] = "its second-harmonic current in this push-pull stage is not positive (no curvature to compare)"
        elif outside[k] and not extrapolate:
            problem[k] = "the position is outside its fitted data (extrapolation not allowed)"
    errs = None
    if errors:
        names = [k for k in ("ia", "gm", "rp", "mu", "gain", "h2") if k in values]
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
