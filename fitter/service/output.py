"""Output-stage use cases: a single-ended or push-pull power stage with fitted tubes.

A specification names the kind (``"single-ended"`` or ``"push-pull"``), the circuit's
values by the fields of :class:`fitter.stage.output.SingleEndedOutput` /
:class:`~fitter.stage.output.PushPullOutput` in SI units (``{"b_plus": 300.0, "load": 3000.0,
"grid_bias": -61.0}``), and the model cards (``tube``; ``tube_a`` and ``tube_b`` for a
push-pull).  ``loads`` adds a sweep of the reflected load.

Problems with a specification are :class:`~fitter.service.specs.SpecError` or
:class:`~fitter.stage.StageInputError` carrying the field; a stage that cannot be solved is a
:class:`~fitter.stage.StageSolveError`.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field, fields
from typing import Mapping

from ..stage.output import LoadSweep, OutputResult, PushPullOutput, SingleEndedOutput, load_sweep, solve_output
from ..stage.solver import StageSolveError
from .specs import SpecError, load_unit

__all__ = ["OUTPUT_KINDS", "OutputSpec", "OutputRun", "build_output", "run_output", "StageSolveError"]

#: kind -> its description class
OUTPUT_KINDS = {"single-ended": SingleEndedOutput, "push-pull": PushPullOutput}


@dataclass(frozen=True)
class OutputSpec:
    """One output stage with its tubes.

    Attributes
    ----------
    kind : str
        ``"single-ended"`` or ``"push-pull"``.
    circuit : mapping
        The stage's fields in SI units; a field left out or None takes its default.
    tube : str, optional
        Model card of the single-ended tube.
    tube_a, tube_b : str, optional
        Model cards of the push-pull tubes.
    thd : float
        THD (fraction) at which the output power is reported.
    loads : sequence of float, optional
        Reflected loads [ohm] for a load sweep.
    level : float
        Output power [W] at which the load sweep reports THD.
    errors : bool
        Propagate the cards' covariance to the main figures (one solve per perturbed
        parameter).
    """

    kind: str
    circuit: Mapping = field(default_factory=dict)
    tube: str | None = None
    tube_a: str | None = None
    tube_b: str | None = None
    thd: float = 0.05
    loads: tuple | None = None
    level: float = 1.0
    errors: bool = False


@dataclass
class OutputRun:
    """The result of :func:`run_output`: the stage's figures and the load sweep (or None)."""

    result: OutputResult
    sweep: LoadSweep | None = None

    def to_dict(self) -> dict:
        d = self.result.to_dict()
        if self.sweep is not None:
            d["load_sweep"] = self.sweep.to_dict()
        return d

    def report(self) -> str:
        text = self.result.report()
        if self.sweep is not None:
            # one caution, at the end
            from .. import CAUTION

            head = text[: -len(CAUTION)].rstrip("\n") if text.endswith(CAUTION) else text
            text = head + "\n\nReflected-load sweep\n" + self.sweep.report()
        return text


def build_output(kind: str, circuit: Mapping):
    """The stage description of ``kind`` from its fields (unknown kind or field: SpecError)."""
    if kind not in OUTPUT_KINDS:
        raise SpecError(f"unknown output stage {kind!r}; kinds are {', '.join(OUTPUT_KINDS)}", field="kind")
    cls = OUTPUT_KINDS[kind]
    names = {f.name for f in fields(cls)}
    for k in circuit:
        if k not in names:
            raise SpecError(f"not a field of a {kind} output stage", field=str(k))
    return cls(**{k: v for k, v in circuit.items() if v is not None})


def _tubes(spec: OutputSpec):
    if spec.kind == "single-ended":
        if spec.tube is None:
            raise SpecError("give the model card of the tube", field="tube")
        return (load_unit(spec.tube, "tube"),)
    for name in ("tube_a", "tube_b"):
        if getattr(spec, name) is None:
            raise SpecError("give the model cards of both tubes", field=name)
    return load_unit(spec.tube_a, "tube_a"), load_unit(spec.tube_b, "tube_b")


def run_output(spec: OutputSpec) -> OutputRun:
    """Solve the stage (every figure) and, with ``loads``, the reflected-load sweep."""
    stage = build_output(spec.kind, spec.circuit)
    if isinstance(spec.thd, bool) or not isinstance(spec.thd, (int, float)) or not (0 < spec.thd < 1):
        raise SpecError(f"must be a fraction between 0 and 1, got {spec.thd!r}", field="thd")
    tubes = _tubes(spec)
    res = solve_output(stage, *tubes, thd=float(spec.thd), errors=bool(spec.errors))
    sweep = None
    if spec.loads is not None:
        loads = list(spec.loads)
        if not loads or len(loads) > 200 or not all(
                isinstance(x, (int, float)) and not isinstance(x, bool) and math.isfinite(x) and x > 0 for x in loads):
            raise SpecError("must be 1 to 200 positive resistances", field="loads")
        sweep = load_sweep(stage, *tubes, loads=loads, thd=float(spec.thd), level=spec.level)
    return OutputRun(res, sweep)
