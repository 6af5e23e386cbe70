"""Matching as a use case: a specification with field names in, a result out.

:func:`match` takes a plain mapping (what a command line, a web form or an API body
holds, by field name), reads the fitted units (:func:`fitter.card.load_fits`, the one
strict reader of fit files and cards) or takes them as given, builds the position and
the criterion, and returns :func:`fitter.match.match_units`'s :class:`MatchResult` (pairs
or quads) or :func:`fitter.match.assign_stacks`'s :class:`StackAssignment` (with
``stages``).  Both have ``to_dict()``, ``table()`` and ``csv_rows()``.

Every input error is a :class:`fitter.match.MatchError` (an
:class:`fitter.errors.InputError`) whose ``field`` is one of :data:`SPEC_FIELDS`; a front
end names it its own way with ``e.text(names)``.  A file that cannot be read raises
:class:`fitter.card.CardError` (file and field).  A position or stack that cannot be solved
raises ``RuntimeError`` (a failed solve, not an input error).

Example
-------
>>> match({"source": "fits.json", "va": 250, "vg": -2, "tolerance": 5})  # doctest: +SKIP
"""

from __future__ import annotations

import dataclasses
import math
from typing import Mapping

from ..match import (DEFAULT_GRADES, POSITION_RANGE, CathodeBias, Criterion, FixedBias, MatchError, MatchResult,
                     StackAssignment, StackedSlot, assign_stacks, match_units, select_units)
from ..text import shown
from ..triode import FittedTriode
from ..units import parse_value

__all__ = ["POSITION_RANGE", "SPEC_FIELDS", "MatchError", "match"]

#: The fields of a matching specification (all optional but a source of units and a position).
SPEC_FIELDS = {
    "source": "a 'platebook fit --json' file or a folder of model cards",
    "units": "the fitted units themselves (a list of FittedTriode), instead of a source",
    "only": "labels of the units to use (default: all)",
    "exclude": "labels of units to leave out",
    "position": "the kind of position, 'fixed-bias', 'cathode-bias', 'stacked-slot' or 'push-pull' (default: "
                "the one whose fields are given); its fields must then be the only position fields given",
    "va": "fixed-bias position: plate voltage [V]",
    "vg": "fixed-bias position: grid voltage [V]",
    "bplus": "cathode-biased or stacked position: B+ [V]",
    "ra": "cathode-biased position: plate resistor [ohm]",
    "rk": "cathode resistor [ohm] (cathode-biased position or stack bottom)",
    "bypassed": "whether Rk is bypassed (default true; sets the gain figure)",
    "stack": "a stacked stage: 'srpp' or 'mu-follower'",
    "r_top": "stack: resistor from the top cathode to the mid node [ohm]",
    "r_mid": "mu follower: load resistor between the tubes [ohm]",
    "slot": "match units for one slot of the stack: 'bottom' or 'top'",
    "partner": "label of the unit in the other slot",
    "stages": "stacked assignment: the number of identical stacks to fill",
    "target_ma": "stacked assignment: target current [mA] (default: the median)",
    "target_split": "stacked assignment: target share of the tube voltage across the bottom tube [%] "
                    "(default 50)",
    "same_bottle": "stacked assignment: both sections of one bottle per stack",
    "group": "2 (pairs) or 4 (quads)",
    "quad": "quads: 'all' (four within tolerance) or 'sides' (two matched pairs)",
    "tolerance": "tolerance [%] of every compared figure (default 5)",
    "figures": "figures compared, of ia, gm, rp, mu, gain (default ia, gm)",
    "figure_tolerance": "per-figure tolerance [%], a mapping figure -> percent",
    "weights": "per-figure weight of the mismatch, a mapping figure -> weight",
    "distance": "'max' (largest weighted relative difference) or 'sum'",
    "grades": "grade bands: (name, largest mismatch [%]) pairs, or a mapping name -> percent",
    "bottle_balance": "only bottles whose sections agree within this [%]",
    "extrapolate": "let units whose data do not cover the position take part",
    "errors": "propagate fit covariances to each unit's figures",
    "time_limit": "solver time limit [s] (default 60)",
    "push_pull": "push-pull position: the output stage's fields (fitter.stage.output.PushPullOutput: "
                 "b_plus, load or turns_ratio, grid_bias or rk, ...), a mapping; the figures then "
                 "default to ia, h2 (DC imbalance and H2 of a pair)",
    "reference": "push-pull position: label of the unit on the other side while each unit's figures "
                 "are taken (default: the unit of median idle current)",
    "level": "push-pull position: drive for the h2 figure, a fraction of the largest (default 0.8)",
}

#: fields only a stacked assignment (``stages``) uses
_STACKED_ONLY = ("target_ma", "target_split", "same_bottle")

#: the fields that belong to one kind of position only
_POSITION_FIELDS = {"fixed-bias": ("va", "vg"), "cathode-bias": ("ra", "bypassed"),
                    "stacked-slot": ("slot", "partner"), "push-pull": ("push_pull", "reference", "level")}


def match(spec: Mapping) -> MatchResult | StackAssignment:
    """Match the units a specification names at the position it gives.

    Parameters
    ----------
    spec : mapping
        Field name -> value (:data:`SPEC_FIELDS`); a value of None counts as not given.
        Numbers may be given as numbers or as text in engineering notation (``"1.5k"``).

    Returns
    -------
    MatchResult or StackAssignment
        Units whose fit failed in the source are listed in ``excluded``.

    Raises
    ------
    MatchError
        An input error, with ``field`` set where it is about one field.
    fitter.card.CardError
        The source cannot be read.
    RuntimeError
        A stage in the position could not be solved.
    """
    s = _Spec(spec)
    units, failed = s.units()
    units = select_units(units, s.labels("only"), s.labels("exclude")) if units else units
    if not units:
        raise MatchError("no fitted unit converged; nothing to match", field="source",
                         subject=shown(s.get("source", "the units")))
    stack = s.stack()
    time_limit = s.number("time_limit", positive=True)
    time_limit = 60.0 if time_limit is None else time_limit
    extrapolate = s.flag("extrapolate", False)
    stages = s.get("stages")
    if isinstance(stages, str) and stages.strip().isdigit():
        stages = int(stages)
    if stages is None:
        stray = [f for f in _STACKED_ONLY if s.get(f) is not None and s.get(f) is not False]
        if stray:
            raise MatchError("only for a stacked assignment ({stack} with {stages} N)", field=stray[0],
                             subject=", ".join("{" + f + "}" for f in stray),
                             refs=tuple(stray) + ("stack", "stages"))
    else:
        if stack is None:
            raise MatchError("give the stacked stage with {stack} (and {bplus}, {rk}, {r_top})",
                             field="stages", subject="{stages}", refs=("stages", "stack", "bplus", "rk", "r_top"))
        split = s.number("target_split", positive=True)
        split = 50.0 if split is None else split
        if split >= 100:
            raise MatchError(f"must lie between 0 and 100 %, got {split:g}", field="target_split",
                             subject="target split")
        res = assign_stacks(units, stack, stages, target_ma=s.number("target_ma", positive=True),
                            target_split=split / 100.0, same_bottle=s.flag("same_bottle", False),
                            extrapolate=extrapolate, time_limit=time_limit)
        return dataclasses.replace(res, excluded=failed + res.excluded)
    position, units = s.position(stack, units)
    criterion = s.criterion(push_pull=s.get("push_pull") is not None)
    bottle_balance = s.number("bottle_balance", positive=True)
    group = s.get("group", 2)
    if isinstance(group, str) and group.strip() in ("2", "4"):
        group = int(group)
    res = match_units(units, position, group=group, criterion=criterion, mode=s.choice("quad", ("all", "sides"), "all"),
                      extrapolate=extrapolate, errors=s.flag("errors", False), bottle_balance_pct=bottle_balance,
                      grades=s.grades(), time_limit=time_limit)
    return dataclasses.replace(res, excluded=failed + res.excluded)


class _Spec:
    """A specification's fields, read and checked one by one (each error names its field)."""

    def __init__(self, spec):
        if not isinstance(spec, Mapping):
            raise MatchError(f"a matching specification is a mapping of fields, got {type(spec).__name__}")
        for key in spec:
            if key not in SPEC_FIELDS:
                raise MatchError(f"unknown field {shown(key)!r}; the fields are {', '.join(SPEC_FIELDS)}",
                                 field=str(key))
        self.d = {k: v for k, v in spec.items() if v is not None}

    def get(self, name, default=None):
        return self.d.get(name, default)

    def number(self, name, positive=False):
        v = self.d.get(name)
        if v is None:
            return None
        if isinstance(v, bool):
            raise MatchError(f"must be a number, got {v!r}", field=name, subject=name)
        try:
            x = parse_value(v, name) if not isinstance(v, (int, float)) else float(v)
        except ValueError as e:
            raise MatchError(str(e).split(": ", 1)[-1], field=name, subject=name) from None
        if not math.isfinite(x):
            raise MatchError(f"must be a finite number, got {v!r}", field=name, subject=name)
        if positive and not x > 0:
            raise MatchError(f"must be positive, got {x:g}", field=name, subject=name)
        return x

    def flag(self, name, default):
        v = self.d.get(name, default)
        if not isinstance(v, bool):
            raise MatchError(f"must be true or false, got {v!r}", field=name, subject=name)
        return v

    def choice(self, name, options, default):
        v = self.d.get(name, default)
        if v not in options:
            raise MatchError(f"must be one of {', '.join(map(repr, options))}, got {shown(v)!r}", field=name,
                             subject=name)
        return v

    def labels(self, name):
        v = self.d.get(name)
        if v is None:
            return None
        if isinstance(v, str):
            v = [x.strip() for x in v.split(",") if x.strip()]
        if not isinstance(v, (list, tuple)) or not all(isinstance(x, str) for x in v):
            raise MatchError("must be a list of unit labels", field=name, subject=name)
        return list(v)

    def mapping(self, name):
        v = self.d.get(name)
        if v is None or (isinstance(v, Mapping) and not v):
            return None
        if not isinstance(v, Mapping):
            raise MatchError("must map figure names to numbers, e.g. {'ia': 5, 'gm': 10}", field=name, subject=name)
        return {str(f): _Spec({name: x}).number(name) for f, x in v.items()}

    # -- the parts of a matching ------------------------------------------------------

    def units(self):
        if "units" in self.d:
            if "source" in self.d:
                raise MatchError("give the units or a source, not both", field="units")
            units = self.d["units"]
            if not isinstance(units, (list, tuple)) or not all(isinstance(u, FittedTriode) for u in units):
                raise MatchError("must be a list of FittedTriode", field="units", subject="units")
            return list(units), []
        if "source" not in self.d:
            raise MatchError("give the fitted units: a fit file or a folder of model cards", field="source")
        from ..card import load_fits

        return load_fits(self.d["source"])

    def stack(self):
        kind = self.d.get("stack")
        if kind is None:
            return None
        kind = self.choice("stack", ("srpp", "mu-follower"), None)
        from ..stage import Stack

        b, k, t = self.number("bplus"), self.number("rk"), self.number("r_top")
        if b is None or k is None:
            raise MatchError("needs {bplus} and {rk}", field="stack", subject="{stack}", refs=("stack", "bplus", "rk"))
        try:
            if kind == "srpp":
                return Stack.srpp(b_plus=b, rk=k, r_top=t)
            m = self.number("r_mid")
            if t is None or m is None:
                raise MatchError("needs {r_top} and {r_mid}", field="stack", subject="{stack} mu-follower",
                                 refs=("stack", "r_top", "r_mid"))
            return Stack.mu_follower(b_plus=b, rk=k, r_top=t, r_mid=m)
        except MatchError:
            raise
        except ValueError as e:
            raise MatchError(str(e), field="stack", subject="stack") from None

    def position(self, stack, units):
        """(position, units): a stacked slot takes its partner out of the units."""
        kind = self.d.get("position")
        if kind is not None:
            kind = self.choice("position", tuple(_POSITION_FIELDS), None)
            for other, fields in _POSITION_FIELDS.items():
                for f in fields:
                    if other != kind and f in self.d:
                        raise MatchError(f"belongs to a {other} position, not a {kind} one", field=f, subject=f)
        va, vg, bplus, ra, rk = (self.number(f) for f in ("va", "vg", "bplus", "ra", "rk"))
        slot = self.d.get("slot")
        pp = self.d.get("push_pull")
        given = [(text, f) for text, f, v in (("{va}/{vg}", "va", va is not None or vg is not None),
                                              ("{ra}", "ra", ra is not None), ("{slot}", "slot", slot is not None),
                                              ("{push_pull}", "push_pull", pp is not None)) if v]
        if len(given) > 1:
            raise MatchError(f"give one position: {' and '.join(t for t, _ in given)} were both given",
                             field=given[1][1], refs=("va", "vg", "ra", "slot", "push_pull"))
        if pp is not None:
            return self.push_pull(pp, units), units
        if va is not None or vg is not None:
            if va is None or vg is None:
                raise MatchError("fixed-bias position: give both {va} and {vg}", field="vg" if vg is None else "va",
                                 refs=("va", "vg"))
            return FixedBias(va, vg), units
        if slot is not None:
            if stack is None:
                raise MatchError("give the stacked stage with {stack}", field="slot", subject="{slot}",
                                 refs=("slot", "stack"))
            partner = self.d.get("partner")
            if partner is None:
                raise MatchError("name the unit in the other slot with {partner}", field="partner",
                                 subject="{slot}", refs=("slot", "partner"))
            found = [u for u in units if u.label == partner]
            if not found:
                raise MatchError(f"unknown unit {shown(partner)!r}", field="partner", subject="partner")
            return StackedSlot(stack, slot, found[0]), [u for u in units if u.label != partner]
        if ra is not None:
            if bplus is None or rk is None:
                raise MatchError("cathode-biased position: give {bplus}, {ra} and {rk}",
                                 field="bplus" if bplus is None else "rk", refs=("bplus", "ra", "rk"))
            return CathodeBias(bplus, ra, rk, self.flag("bypassed", True)), units
        raise MatchError("no position: give {va} and {vg}, or {bplus}, {ra} and {rk}, or {stack} with "
                         "{slot}/{partner} (or {stages} for a stacked assignment)",
                         refs=("va", "vg", "bplus", "ra", "rk", "stack", "slot", "partner", "stages"))

    def push_pull(self, fields, units):
        """The push-pull position: the stage from its fields, the reference unit by label or
        the unit of median idle current in the stage."""
        from ..match import PushPullSlot, unit_figures
        from ..stage import StageInputError
        from .output import build_output
        from .specs import SpecError

        if not isinstance(fields, Mapping):
            raise MatchError("must map the push-pull stage's fields to values, e.g. {'b_plus': 400, "
                             "'load': 5000, 'grid_bias': -84}", field="push_pull", subject="push_pull")
        circuit = {}
        for k, v in fields.items():
            if isinstance(v, str):
                try:
                    v = parse_value(v, str(k))
                except ValueError as e:
                    raise MatchError(str(e), field="push_pull", subject="push_pull") from None
            circuit[str(k)] = v
        try:
            stage = build_output("push-pull", circuit)
        except (StageInputError, SpecError) as e:
            raise MatchError(f"{e.field}: {e.message}", field="push_pull", subject="push_pull") from None
        level = self.number("level", positive=True)
        level = 0.8 if level is None else level
        ref = self.d.get("reference")
        if ref is not None:
            found = [u for u in units if u.label == ref]
            if not found:
                raise MatchError(f"unknown unit {shown(ref)!r}", field="reference", subject="reference")
            return PushPullSlot(stage, found[0], level)
        first = PushPullSlot(stage, units[0], level)
        ia = unit_figures(units, first, extrapolate=True).values["ia"]
        ok = [k for k in range(len(units)) if ia[k] == ia[k]]
        if not ok:
            raise MatchError("no unit conducts in this push-pull stage", field="push_pull", subject="push_pull")
        ok.sort(key=lambda k: ia[k])
        return PushPullSlot(stage, units[ok[len(ok) // 2]], level)

    def criterion(self, push_pull: bool = False) -> Criterion:
        figures = self.d.get("figures", ("ia", "h2") if push_pull else ("ia", "gm"))
        if isinstance(figures, str):
            figures = [x.strip() for x in figures.split(",") if x.strip()]
        if not isinstance(figures, (list, tuple)):
            raise MatchError("must be a list of figure names", field="figures", subject="figures")
        tolerance = self.number("tolerance")
        return Criterion(tolerance_pct=5.0 if tolerance is None else tolerance, figures=tuple(figures),
                         tolerances=self.mapping("figure_tolerance"), weights=self.mapping("weights"),
                         norm=self.choice("distance", ("max", "sum"), "max"))

    def grades(self):
        g = self.d.get("grades")
        if g is None:
            return DEFAULT_GRADES
        items = list(g.items()) if isinstance(g, Mapping) else g
        if not isinstance(items, (list, tuple)) or not all(isinstance(x, (list, tuple)) and len(x) == 2
                                                           and isinstance(x[0], str) for x in items):
            raise MatchError("must be (name, largest mismatch %) pairs, e.g. tight=1,close=2.5", field="grades",
                             subject="grades")
        out = []
        for name, limit in items:
            try:
                out.append((name.strip(), _Spec({"grades": limit}).number("grades", positive=True)))
            except MatchError as e:
                raise MatchError(f"{shown(name)!r}: {e.message}", field="grades", subject="grades") from None
        if not out:
            raise MatchError("no grade bands given", field="grades", subject="grades")
        return tuple(sorted(out, key=lambda x: x[1]))
