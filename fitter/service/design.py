"""Design use cases: a stage's frequency response, and sweeps of one of its fields over a
range (one tube, or a stock of cards so the spread shows).

Specifications name the kind of stage and the circuit's fields in SI units as
:mod:`fitter.service.stages` does (``{"b_plus": 300.0, "ra": 100e3, "ck": 22e-6}``), the
tubes' model cards (``tube``, or ``bottom`` and ``top``), or, for a sweep, a folder or glob
of cards (``cards``).  Results have ``to_dict()``; errors are :class:`SpecError` or
:class:`~fitter.stage.StageInputError` carrying their field, and a circuit that cannot be
solved is a :class:`~fitter.stage.StageSolveError`.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Mapping

from .specs import SpecError
from .stages import KINDS, _spread_units, _tubes, build_stage, pair_sections

__all__ = ["ResponseSpec", "SweepSpec", "stage_response", "stage_sweep", "stage_thd_against_frequency"]


@dataclass(frozen=True)
class ResponseSpec:
    """Gain and phase of a stage from 1 Hz to 1 MHz (``points_per_decade`` per decade)."""

    kind: str
    circuit: Mapping = field(default_factory=dict)
    tube: str | None = None
    bottom: str | None = None
    top: str | None = None
    points_per_decade: int = 40
    #: output level [V peak] for THD against frequency (ngspice); None: not run
    thd_level: float | None = None


@dataclass(frozen=True)
class SweepSpec:
    """One field of a stage (``vary``: ``"ra"``, ``"b_plus"`` ...) from ``start`` to ``stop``
    in ``points`` steps (``log``: geometric), with the tubes (``tube`` / ``bottom`` and
    ``top``) or over the cards in ``cards`` (a folder or a glob; a stack pairs each tube's
    two sections).  ``thd_limit`` (fraction) sets the headroom, ``level`` [V peak] the THD
    column, ``slew_vpeak`` [V] the slew figure."""

    kind: str
    vary: str
    start: float
    stop: float
    points: int = 20
    log: bool = False
    circuit: Mapping = field(default_factory=dict)
    tube: str | None = None
    bottom: str | None = None
    top: str | None = None
    cards: str | None = None
    thd_limit: float = 0.01
    level: float | None = None
    slew_vpeak: float = 10.0
    #: the push-pull output stage's tubes (``kind`` ``"push-pull"``; ``"single-ended"`` takes ``tube``)
    tube_a: str | None = None
    tube_b: str | None = None


def stage_response(spec: ResponseSpec):
    """The stage's :class:`~fitter.stage.frequency.FrequencyResponse`."""
    from ..stage.frequency import response

    st = build_stage(spec.kind, spec.circuit)
    return response(st, *_tubes(spec.kind, spec), points_per_decade=spec.points_per_decade)


def stage_thd_against_frequency(spec: ResponseSpec):
    """THD against frequency at ``spec.thd_level`` (ngspice transient):
    :class:`~fitter.stage.transient.FrequencyDistortion`.  Without ngspice,
    :class:`~fitter.stage.transient.SimulatorMissing` (one line); a front end reports it as
    a note beside the small-signal response, which needs no simulator."""
    from ..stage.transient import thd_against_frequency

    if spec.thd_level is None:
        raise SpecError("give the output level for THD against frequency", field="thd_level")
    st = build_stage(spec.kind, spec.circuit)
    return thd_against_frequency(st, *_tubes(spec.kind, spec), vout_peak=spec.thd_level)


def stage_sweep(spec: SweepSpec):
    """The stage's :class:`~fitter.stage.sweeps.ComponentSweep` over ``spec.vary``.

    The swept field need not be in ``circuit`` (a required one, such as ``ra``, takes the
    range's first value to build the stage); a value it has there is replaced.
    """
    from ..stage.sweeps import component_sweep
    from .output import OUTPUT_KINDS

    if spec.kind in OUTPUT_KINDS:
        return _output_sweep(spec)
    cls = KINDS.get(spec.kind)
    if cls is None:
        build_stage(spec.kind, spec.circuit)  # raises the unknown-kind error
    if not isinstance(spec.vary, str) or not spec.vary:
        raise SpecError("name the field to sweep", field="vary")
    if spec.vary not in cls.__dataclass_fields__:
        names = [f for f in cls.__dataclass_fields__ if f not in ("top_grid", "output")]
        raise SpecError(f"a {spec.kind} stage has no field {spec.vary!r}; fields that can be swept: "
                        + ", ".join(names), field="vary")
    values, st = _range_and_first_stage(spec, dict(spec.circuit), lambda c: build_stage(spec.kind, c))
    if spec.cards is not None:
        given = [k for k in ("tube", "bottom", "top") if getattr(spec, k) is not None]
        if given:
            raise SpecError("a sweep over a stock takes its tubes from the cards; leave out the tube cards",
                            field=given[0])
        units = _spread_units(spec.cards)
        pairing = ""
        if spec.kind == "stack":
            bottoms, tops, pairing = pair_sections(units)
            cases = list(zip(bottoms, tops if tops is not None else bottoms))
        else:
            cases = [(u,) for u in units]
    else:
        cases = [_tubes(spec.kind, spec)]
        pairing = ""
    return component_sweep(st, spec.vary, values, cases, log=spec.log, thd_limit=spec.thd_limit, level=spec.level,
                           slew_vpeak=spec.slew_vpeak, pairing=pairing)


def _range_and_first_stage(spec: SweepSpec, circuit: dict, build):
    """The swept values and the stage at the first; every value of the range is built (checked)
    before any solving, and an impossible one is an error about the range (field ``vary``)."""
    from ..stage import StageInputError
    from ..stage.sweeps import sweep_values

    try:
        values = sweep_values(spec.start, spec.stop, spec.points, spec.log)
    except StageInputError as e:
        raise SpecError(f"{spec.vary}, {e.field} of the range: {e.message}", field="vary") from None
    first = None
    for v in values:
        try:
            built = build({**circuit, spec.vary: float(v)})
        except StageInputError as e:
            if e.field != spec.vary:
                raise
            raise SpecError(f"{spec.vary} = {float(v):g} in the range: {e.message}", field="vary") from None
        first = first or built
    return values, first


def _output_sweep(spec: SweepSpec):
    """:func:`stage_sweep` of an output stage (:mod:`fitter.service.output`): ``level`` is an
    output power [W]; over a stock, a push-pull pairs the cards in their order (1+2, 3+4 ...,
    as a box of tubes would be used unsorted; an odd one left out)."""
    from ..stage.sweeps import component_sweep
    from .output import OUTPUT_KINDS, _tubes as output_tubes, build_output

    cls = OUTPUT_KINDS[spec.kind]
    numeric = [f for f in cls.__dataclass_fields__ if f != "bypassed"]
    if not isinstance(spec.vary, str) or spec.vary not in numeric:
        raise SpecError(f"a {spec.kind} stage has no field {spec.vary!r}; fields that can be swept: "
                        + ", ".join(numeric), field="vary")
    circuit = dict(spec.circuit)
    if spec.vary == "load":
        circuit["turns_ratio"] = None
    elif spec.vary == "turns_ratio":
        circuit["load"] = None
    values, st = _range_and_first_stage(spec, circuit, lambda c: build_output(spec.kind, c))
    pairing = ""
    if spec.cards is not None:
        given = [k for k in ("tube", "tube_a", "tube_b", "bottom", "top") if getattr(spec, k) is not None]
        if given:
            raise SpecError("a sweep over a stock takes its tubes from the cards; leave out the tube cards",
                            field=given[0])
        units = _spread_units(spec.cards)
        if spec.kind == "single-ended":
            cases = [(u,) for u in units]
        else:
            if len(units) < 2:
                raise SpecError("a push-pull over a stock needs at least two units", field="cards")
            cases = [(units[i], units[i + 1]) for i in range(0, len(units) - 1, 2)]
            pairing = "cards paired in their order" + (", one left out" if len(units) % 2 else "")
    else:
        from .output import OutputSpec

        cases = [output_tubes(OutputSpec(spec.kind, {}, tube=spec.tube, tube_a=spec.tube_a, tube_b=spec.tube_b))]
    return component_sweep(st, spec.vary, values, cases, log=spec.log, thd_limit=spec.thd_limit, level=spec.level,
                           pairing=pairing)
