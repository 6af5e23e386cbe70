"""Stage and distortion use cases: a stage specification with field names in, a result out.

A specification names the kind of stage (``"common-cathode"``, ``"cathode-follower"``,
``"stack"``), the circuit's values by the fields of :mod:`fitter.stage.circuits` in SI units
(``{"b_plus": 300.0, "ra": 100e3, "rk": 1.5e3, "ck": 22e-6}``), and the model cards of the
tubes (``tube``, or ``bottom`` and ``top`` for a stack).  A spread takes a folder of cards or a
glob instead, and pairs the two sections of each tube for a stack.

Every problem with a specification is a :class:`~fitter.service.specs.SpecError` or a
:class:`~fitter.stage.StageInputError` carrying its field; a circuit that cannot be solved is
a :class:`~fitter.stage.StageSolveError`.
"""

from __future__ import annotations

import glob
from collections import Counter, defaultdict
from dataclasses import dataclass, field
from typing import Mapping

from ..stage import CathodeFollower, CommonCathode, Stack, StageInputError, StageSolveError, solve, spread
from .specs import SpecError, load_unit

__all__ = ["StageSolveError", "KINDS", "StageSpec", "SpreadSpec", "DistortionSpec", "build_stage", "solve_stage", "spread_stage",
           "stage_distortion", "stage_load_lines", "pair_sections"]

#: kind of stage -> its description class
KINDS = {"common-cathode": CommonCathode, "cathode-follower": CathodeFollower, "stack": Stack}


@dataclass(frozen=True)
class StageSpec:
    """One stage with its tubes.

    Attributes
    ----------
    kind : str
        ``"common-cathode"``, ``"cathode-follower"`` or ``"stack"``.
    circuit : mapping
        The circuit's fields in SI units (``b_plus`` [V], ``ra`` [ohm], ``ck`` [F] ...);
        a field left out or None takes the stage's default.
    tube : str, optional
        Model card of the tube (common cathode, cathode follower).
    bottom, top : str, optional
        Model cards of a stack's tubes.
    errors : bool
        Propagate the fits' covariance to every figure.
    slew_vpeak : float
        Output peak amplitude for the slew-rate check [V].
    """

    kind: str
    circuit: Mapping = field(default_factory=dict)
    tube: str | None = None
    bottom: str | None = None
    top: str | None = None
    errors: bool = True
    slew_vpeak: float = 10.0


@dataclass(frozen=True)
class SpreadSpec:
    """One stage over many units: ``cards`` is a folder of model cards or a glob
    (``"cards/HM-*.json"``)."""

    kind: str
    circuit: Mapping
    cards: str
    slew_vpeak: float = 10.0


@dataclass(frozen=True)
class DistortionSpec:
    """Harmonics of a stage at one level (``vin_peak`` or ``vout_peak`` [V]), or a THD sweep
    (``sweep=True``: ``levels``, ``thd_limit`` as a fraction)."""

    kind: str
    circuit: Mapping
    tube: str | None = None
    bottom: str | None = None
    top: str | None = None
    vin_peak: float | None = None
    vout_peak: float | None = None
    sweep: bool = False
    levels: int = 30
    thd_limit: float = 0.01
    n_samples: int = 256
    grid_onset: float = 0.0


def build_stage(kind: str, circuit: Mapping):
    """The stage description of ``kind`` from the circuit's fields (None: the default).

    Raises
    ------
    SpecError
        An unknown kind (field ``kind``), an unknown field, or a required value missing.
    StageInputError
        An impossible value (its field named).
    """
    cls = KINDS.get(kind)
    if cls is None:
        raise SpecError(f"unknown kind of stage {kind!r}; kinds: {', '.join(KINDS)}", field="kind")
    fields = cls.__dataclass_fields__
    given = {k: v for k, v in dict(circuit).items() if v is not None}
    unknown = sorted(k for k in given if k not in fields)
    if unknown:
        raise SpecError(f"a {kind} stage has no field {unknown[0]!r}", field=unknown[0])
    from dataclasses import MISSING

    for name, f in fields.items():
        if name not in given and f.default is MISSING and f.default_factory is MISSING:
            raise StageInputError("a value is required", field=name, owner=cls.__name__)
    return cls(**given)


def _tubes(kind, spec):
    if kind == "stack":
        if spec.bottom is None or spec.top is None:
            raise SpecError("give the model cards of both tubes", field="bottom" if spec.bottom is None else "top")
        return (load_unit(spec.bottom, "bottom"), load_unit(spec.top, "top"))
    if spec.tube is None:
        raise SpecError("give the model card of the tube", field="tube")
    return (load_unit(spec.tube, "tube"),)


def solve_stage(spec: StageSpec):
    """Operating point, gain, impedances and limits: a :class:`~fitter.stage.StageResult`."""
    st = build_stage(spec.kind, spec.circuit)
    tubes = _tubes(spec.kind, spec)
    return solve(st, *tubes, errors=spec.errors, slew_vpeak=spec.slew_vpeak)


def stage_load_lines(result):
    """The load lines and swings of a solved stage, as data (:func:`fitter.stage.load_lines`)."""
    from ..stage.loadlines import load_lines

    return load_lines(result)


def _spread_units(where: str):
    from ..card import CardError, load_card, load_cards

    try:
        if any(c in str(where) for c in "*?["):
            files = sorted(glob.glob(str(where)))
            if not files:
                raise SpecError(f"no model cards match {where}", field="spread")
            units = [load_card(f) for f in files]
        else:
            units = load_cards(where)
    except CardError as e:
        raise SpecError(str(e), field="spread") from None
    labels = Counter(u.label for u in units)
    twice = sorted(k for k, n in labels.items() if n > 1)
    if twice:
        raise SpecError(f"unit {twice[0]!r} appears {labels[twice[0]]} times in {where}"
                        + (f" (and {len(twice) - 1} more unit(s))" if len(twice) > 1 else "")
                        + "; each unit once, or the spread counts it twice", field="spread")
    return units


def pair_sections(units):
    """A stack's cases from a lot of units: when every tube has exactly two sections, each
    tube's first section (by name) at the bottom and its second on top; otherwise every
    unit in both positions.

    Returns
    -------
    (bottoms, tops or None, pairing) : the units, the tops (None: each unit on both), and
    the pairing in words.
    """
    by_tube = defaultdict(list)
    for u in units:
        by_tube[u.tube].append(u)
    if all(len(v) == 2 for v in by_tube.values()):
        bottoms, tops = [], []
        for v in by_tube.values():
            v = sorted(v, key=lambda t: t.section or "")
            bottoms.append(v[0])
            tops.append(v[1])
        return bottoms, tops, "the two sections of each tube (first section at the bottom)"
    return list(units), None, "each unit in both positions"


def spread_stage(spec: SpreadSpec):
    """min / median / max of every figure over the units in ``spec.cards``: a
    :class:`~fitter.stage.SpreadResult` (a stack pairs each tube's two sections)."""
    st = build_stage(spec.kind, spec.circuit)
    units = _spread_units(spec.cards)
    tops, pairing = None, ""
    if spec.kind == "stack":
        units, tops, pairing = pair_sections(units)
    res = spread(st, units, tops, slew_vpeak=spec.slew_vpeak)
    if pairing:
        res.pairing = pairing
    return res


def stage_distortion(spec: DistortionSpec):
    """Harmonics at one level (:class:`~fitter.stage.distortion.Distortion`) or a THD sweep
    (:class:`~fitter.stage.distortion.DistortionSweep`)."""
    from ..stage import distortion as dist

    st = build_stage(spec.kind, spec.circuit)
    tubes = _tubes(spec.kind, spec)
    if spec.sweep:
        if spec.vin_peak is not None or spec.vout_peak is not None:
            raise SpecError("give either a sweep or a level, not both", field="sweep")
        return dist.sweep(st, *tubes, levels=spec.levels, thd_limit=spec.thd_limit, n_samples=spec.n_samples,
                          grid_onset=spec.grid_onset)
    if (spec.vin_peak is None) == (spec.vout_peak is None):
        raise SpecError("give one level: the input peak or the output peak, or a sweep", field="vin_peak")
    return dist.analyse(st, *tubes, vin_peak=spec.vin_peak, vout_peak=spec.vout_peak, n_samples=spec.n_samples,
                        grid_onset=spec.grid_onset)
