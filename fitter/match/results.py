"""What matching returns: groups, what is proven about them, and their reports.

:class:`MatchResult` (pairs and quads) and :class:`StackAssignment` (stacked stages and
channels) are values with ``to_dict()`` (JSON, mA and percent), ``table()`` (the readable
report) and, for labels, ``csv_rows()``; :class:`Optimality` says what is proven.
Figures are SI inside and converted only here.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from .. import CAUTION
from .criterion import DEFAULT_GRADES, FIGURES, Criterion
from .positions import UnitFigures, _f


@dataclass
class Optimality:
    """What is proven about a grouping.

    Attributes
    ----------
    method : str
        How it was found.
    exact : bool
        True when the grouping is proven optimal for the stated objective.
    groups_bound : int
        Upper bound on the number of groups any grouping could reach.
    mismatch_bound : float
        Lower bound on the total mismatch [-] of any grouping with as many groups.
    gap : float
        ``total - mismatch_bound`` [-] (0 when exact).
    note : str
        The argument, in words.
    stats : dict
        Solver figures (rounds, edges, cuts, seconds).
    """

    method: str
    exact: bool
    groups_bound: int
    mismatch_bound: float
    gap: float
    note: str
    stats: dict = field(default_factory=dict)

    def to_dict(self) -> dict:
        return {
            "method": self.method,
            "exact": bool(self.exact),
            "groups_bound": int(self.groups_bound),
            "mismatch_bound_pct": _pct(self.mismatch_bound),
            "gap_pct": _pct(self.gap),
            "note": self.note,
            "stats": dict(self.stats),
        }


def _pct(x):
    if x is None or not np.isfinite(x):
        return None
    return float(100.0 * x)


@dataclass
class Group:
    """One matched group.

    Attributes
    ----------
    units : list of str
        Unit labels (``FittedTriode.label``).
    index : list of int
        Their positions in the unit list.
    kind : str
        ``"pair"``, ``"four within tolerance"`` or ``"two matched pairs"``.
    mismatch : float
        The group's mismatch as optimised [-].
    spread : dict
        Per figure, the largest relative difference between two units of the group [-].
    sides : list of list of str or None
        For two matched pairs: the two sides.
    side_difference : dict or None
        For two matched pairs: relative difference of the sides' summed figures [-].
    grade : str
    """

    units: list
    index: list
    kind: str
    mismatch: float
    spread: dict
    grade: str
    sides: list | None = None
    side_difference: dict | None = None
    outside_data: list = field(default_factory=list)

    def to_dict(self, figs: UnitFigures | None = None) -> dict:
        mm = {f"{f}_pct": _pct(v) for f, v in self.spread.items()}
        mm["max_pct"] = _pct(self.mismatch)
        if self.side_difference is not None:
            mm["sides"] = {f"{f}_pct": _pct(v) for f, v in self.side_difference.items()}
        d = {"units": list(self.units), "kind": self.kind, "mismatch": mm, "grade": self.grade}
        if self.sides is not None:
            d["sides"] = [list(s) for s in self.sides]
        if self.outside_data:
            d["outside_data"] = list(self.outside_data)
        if figs is not None:
            d["figures"] = [figs.unit_dict(k) for k in self.index]
        return d


@dataclass
class MatchResult:
    """Groups found at a position, with the units left over and what is proven.

    Attributes
    ----------
    figures : UnitFigures
    criterion : Criterion
    group_size : int
    groups : list of Group
    unmatched : list of dict
        ``{"unit", "nearest", "reason", ...}`` for every usable unit not in a group.
    excluded : list of dict
        ``{"unit", "reason"}`` for units that could not take part.
    optimality : Optimality
    balance : list of dict
        Section balance of every dual-section bottle.
    """

    figures: UnitFigures
    criterion: Criterion
    group_size: int
    groups: list
    unmatched: list
    excluded: list
    optimality: Optimality
    balance: list = field(default_factory=list)
    quad_mode: str | None = None
    grades: tuple = DEFAULT_GRADES

    @property
    def total_mismatch(self) -> float:
        return float(sum(g.mismatch for g in self.groups))

    def to_dict(self) -> dict:
        pos = self.figures.position
        d = {
            "position": pos.to_dict(),
            "criterion": self.criterion.to_dict(),
            "group_size": self.group_size,
            "groups": [g.to_dict(self.figures) for g in self.groups],
            "unmatched": list(self.unmatched),
            "excluded": list(self.excluded),
            "total_mismatch_pct": _pct(self.total_mismatch),
            "optimality": self.optimality.to_dict(),
            "grades": [{"name": n, "max_pct": float(v)} for n, v in self.grades],
            "section_balance": list(self.balance),
        }
        if self.quad_mode:
            d["quad_mode"] = self.quad_mode
        d["caution"] = CAUTION
        return d

    def csv_rows(self) -> list[dict]:
        """One row per unit, for printing labels: group, grade and the unit's figures."""
        rows = []
        for gi, g in enumerate(self.groups, 1):
            tag = f"{'P' if self.group_size == 2 else 'Q'}{gi}"
            for k, lab in zip(g.index, g.units):
                u = self.figures.unit_dict(k)
                side = ""
                if g.sides:
                    side = "A" if lab in g.sides[0] else "B"
                rows.append({"group": tag, "grade": g.grade, "side": side, "unit": lab,
                             "tube": self.figures.units[k].tube, "section": self.figures.units[k].section or "",
                             "ia_ma": u.get("ia_ma"), "gm_ms": u.get("gm_ms"), "rp_kohm": u.get("rp_kohm"),
                             "mu": u.get("mu"), "gain": u.get("gain"), "va_v": u["va_v"], "vg_v": u["vg_v"],
                             "group_mismatch_pct": _pct(g.mismatch),
                             "label": f"{tag} {g.grade} Ia {u.get('ia_ma'):.3g} mA gm {u.get('gm_ms'):.3g} mA/V"})
        index = {u.label: k for k, u in enumerate(self.figures.units)}
        for un in self.unmatched:
            k = index[un["unit"]]
            u = self.figures.unit_dict(k)
            rows.append({"group": "unmatched", "grade": "", "side": "", "unit": un["unit"],
                         "tube": self.figures.units[k].tube, "section": self.figures.units[k].section or "",
                         "ia_ma": u.get("ia_ma"), "gm_ms": u.get("gm_ms"), "rp_kohm": u.get("rp_kohm"),
                         "mu": u.get("mu"), "gain": u.get("gain"), "va_v": u["va_v"], "vg_v": u["vg_v"],
                         "group_mismatch_pct": None, "label": f"unmatched: {un['reason']}"})
        return rows

    def table(self) -> str:
        """The readable report (what the CLI prints without --json)."""
        pos = self.figures.position
        name = "pairs" if self.group_size == 2 else "quads"
        lines = [f"Matching {len(self.figures.units)} units into {name} at {pos.describe()}", CAUTION]
        lines.append(f"Criterion: {self.criterion.describe()}")
        if self.quad_mode:
            lines.append("Quads: " + ("four units all within tolerance" if self.quad_mode == "all"
                                      else "two matched pairs whose summed figures match (sides A and B)"))
        lines.append("")
        figs = [f for f in ("ia", "gm", "rp", "mu", "gain", "h2") if f in self.figures.values]
        head = f"  {'group':<7}{'grade':<9}{'unit':<16}" + "".join(
            f"{FIGURES[f][0] + (' [' + FIGURES[f][1] + ']' if FIGURES[f][1] else ''):>13}" for f in figs) + \
            f"{'mismatch':>11}"
        lines.append(head)
        for gi, g in enumerate(self.groups, 1):
            tag = f"{'P' if self.group_size == 2 else 'Q'}{gi}"
            for r, (k, lab) in enumerate(zip(g.index, g.units)):
                cells = "".join(f"{self.figures.values[f][k] * FIGURES[f][2]:>13.4g}" for f in figs)
                side = ("A " if lab in g.sides[0] else "B ") if g.sides else ""
                flag = " *" if self.figures.outside[k] else ""
                mis = f"{100 * g.mismatch:>9.2f} %" if r == 0 else ""
                lines.append(f"  {tag if r == 0 else '':<7}{g.grade if r == 0 else '':<9}{side + lab + flag:<16}"
                             f"{cells}{mis}")
            if g.kind != "pair":
                lines.append(f"  {'':<16}({g.kind})")
        lines.append("")
        o = self.optimality
        one = name[:-1] if len(self.groups) == 1 else name
        lines.append(f"{len(self.groups)} {one}, total mismatch {100 * self.total_mismatch:.3f} %; "
                     f"{'optimal' if o.exact else 'not proven optimal'} ({o.note})")
        if not o.exact:
            lines.append(f"  bound: at most {o.groups_bound} {name}; total mismatch at least "
                         f"{100 * o.mismatch_bound:.3f} % (gap {100 * o.gap:.3f} %)")
        if any(self.figures.outside[g.index].any() for g in self.groups):
            lines.append("  * outside the unit's fitted data: extrapolated")
        if self.unmatched:
            lines.append("")
            lines.append("Unmatched:")
            for u in self.unmatched:
                lines.append(f"  {u['unit']:<16}{u['reason']}")
        if self.excluded:
            lines.append("")
            lines.append("Excluded:")
            for u in self.excluded:
                lines.append(f"  {u['unit']:<16}{u['reason']}")
        if self.balance:
            lines.append("")
            lines.append("Section balance (largest relative difference between a bottle's sections):")
            for b in self.balance:
                lines.append(f"  {b['tube']:<16}{b['max_pct']:>7.2f} %   " +
                             ", ".join(f"{k[:-4]} {v:.2f} %" for k, v in b.items() if k.endswith("_pct") and k != "max_pct"))
        return "\n".join(lines)


@dataclass
class StackAssignment:
    """Units assigned to the bottom and top slots of N identical stacks.

    Attributes
    ----------
    stack : fitter.stage.Stack
    stages : list of dict
        Per stack: ``bottom``, ``top`` (labels), ``ia`` [A], ``split`` (fraction of
        the two tubes' voltage across the bottom tube), ``gain``, ``va_bottom``,
        ``va_top`` [V], ``deviation`` (from the target) [-].
    target : dict
        ``ia`` [A] and ``split`` [-] aimed at.
    deviation : float
        Largest deviation of a stack from the target [-].
    spread : float
        Largest relative spread of gain or current between the stacks [-].
    optimality : Optimality
    unused : list of str
    excluded : list of dict
    """

    stack: object
    stages: list
    target: dict
    deviation: float
    spread: float
    optimality: Optimality
    unused: list
    excluded: list
    same_bottle: bool = False

    @property
    def objective(self) -> float:
        return self.deviation + self.spread

    def to_dict(self) -> dict:
        return {
            "stack": self.stack.to_dict(),
            "target": {"ia_ma": 1e3 * self.target["ia"], "split": self.target["split"]},
            "stages": [{
                "bottom": s["bottom"], "top": s["top"], "ia_ma": _f(1e3 * s["ia"]),
                "split": _f(s["split"]), "gain": _f(s["gain"]), "va_bottom_v": _f(s["va_bottom"]),
                "va_top_v": _f(s["va_top"]), "deviation_pct": _pct(s["deviation"]),
                "outside_data": s["outside_data"]} for s in self.stages],
            "deviation_pct": _pct(self.deviation),
            "spread_pct": _pct(self.spread),
            "objective_pct": _pct(self.objective),
            "same_bottle": self.same_bottle,
            "unused": list(self.unused),
            "excluded": list(self.excluded),
            "optimality": self.optimality.to_dict(),
            "caution": CAUTION,
        }

    def csv_rows(self) -> list[dict]:
        """One row per (stack, slot), for printing labels."""
        return [{"stack": f"S{k}", "slot": slot, "unit": s[slot], "ia_ma": 1e3 * s["ia"],
                 "split_pct": 100 * s["split"], "gain": s["gain"], "deviation_pct": 100 * s["deviation"]}
                for k, s in enumerate(self.stages, 1) for slot in ("bottom", "top")]

    def table(self) -> str:
        from ..stage import stage_title

        lines = [f"{len(self.stages)} x {stage_title(self.stack)} (B+ = {self.stack.b_plus:g} V, "
                 f"Rk = {self.stack.rk:g} ohm, R top = {self.stack.r_top:g} ohm, R mid = {self.stack.r_mid:g} ohm)",
                 CAUTION,
                 f"Target: {1e3 * self.target['ia']:.4g} mA, {100 * self.target['split']:.1f} % of the tube "
                 "voltage across the bottom tube" + ("; both sections of one bottle per stack" if self.same_bottle else ""),
                 "",
                 f"  {'stack':<7}{'bottom':<14}{'top':<14}{'Ia [mA]':>9}{'split':>8}{'gain':>9}"
                 f"{'Va bot':>9}{'Va top':>9}{'dev':>8}"]
        for k, s in enumerate(self.stages, 1):
            lines.append(f"  {'S' + str(k):<7}{s['bottom']:<14}{s['top']:<14}{1e3 * s['ia']:>9.4g}"
                         f"{100 * s['split']:>7.1f}%{s['gain']:>9.4g}{s['va_bottom']:>9.1f}{s['va_top']:>9.1f}"
                         f"{100 * s['deviation']:>7.2f}%")
        lines.append("")
        lines.append(f"largest deviation from target {100 * self.deviation:.2f} %, spread between stacks "
                     f"{100 * self.spread:.2f} % (gain and current); "
                     f"{'optimal' if self.optimality.exact else 'not proven optimal'} ({self.optimality.note})")
        if self.unused:
            lines.append("unused: " + ", ".join(self.unused))
        for e in self.excluded:
            lines.append(f"excluded {e['unit']}: {e['reason']}")
        return "\n".join(lines)
