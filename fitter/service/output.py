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
    #: also the frequency response (gain and phase at the secondary, 1 Hz .. 1 MHz)
    response: bool = False
    points_per_decade: int = 40
    #: output power [W] for THD against frequency (ngspice); None: not run
    thd_level: float | None = None


@dataclass
class OutputRun:
    """The result of :func:`run_output`: the stage's figures and the load sweep (or None)."""

    result: OutputResult
    sweep: LoadSweep | None = None
    #: the :class:`~fitter.stage.frequency.FrequencyResponse`, when asked for
    frequency: object | None = None
    #: THD against frequency (:class:`~fitter.stage.transient.FrequencyDistortion`), when asked
    #: for and ngspice is installed
    distortion: object | None = None
    #: asked for but not run (ngspice missing): one line each
    notes: list = field(default_factory=list)
    thd_asked: bool = False

    def to_dict(self) -> dict:
        d = self.result.to_dict()
        if self.sweep is not None:
            d["load_sweep"] = self.sweep.to_dict()
        if self.frequency is not None:
            fr = self.frequency.to_dict()
            d["frequency_response"] = {k: fr[k] for k in ("output", "midband_gain", "midband_gain_db", "f_low_hz",
                                                          "f_high_hz", "points", "notes")}
        if self.thd_asked:
            d["thd_against_frequency"] = None if self.distortion is None else self.distortion.to_dict()
        if self.notes:
            d["notes"] = list(self.notes)
        return d

    def report(self) -> str:
        text = self.result.report()
        if self.sweep is not None:
            # one caution, at the end
            from .. import CAUTION

            head = text[: -len(CAUTION)].rstrip("\n") if text.endswith(CAUTION) else text
            text = head + "\n\nReflected-load sweep\n" + self.sweep.report()
        if self.frequency is not None:
            from .. import CAUTION

            head = text[: -len(CAUTION)].rstrip("\n") if text.endswith(CAUTION) else text
            text = head + "\n\n" + _response_text(self.frequency) + "\n" + CAUTION
        if self.distortion is not None or self.notes:
            from .. import CAUTION

            head = text[: -len(CAUTION)].rstrip("\n") if text.endswith(CAUTION) else text
            extra = ([self.distortion.report()] if self.distortion is not None else []) + \
                ["note: " + n for n in self.notes]
            text = head + "\n\n" + "\n".join(extra) + "\n" + CAUTION
        return text


def _response_text(fr) -> str:
    from ..stage.results import _eng

    d = fr.to_dict()
    L = ["Frequency response at the secondary (linearised at the operating point; tube capacitances, source, "
         "coupling and bypass capacitors, ideal transformer with its primary inductance)",
         f"  mid-band gain   {d['midband_gain']:.4g} ({d['midband_gain_db']:.2f} dB), secondary volts per source volt"
         if d["midband_gain"] else "  mid-band gain   0",
         f"  -3 dB low       {_eng(fr.f_low, 'Hz') if fr.f_low else 'none (no primary inductance or coupling capacitor given)'}",
         f"  -3 dB high      {_eng(fr.f_high, 'Hz') if fr.f_high else 'none (no capacitance given)'}",
         f"  {'f':>10} {'gain dB':>9} {'phase deg':>10}"]
    for p in d["points"][:: max(1, len(d["points"]) // 12)]:
        L.append(f"  {_eng(p['f_hz'], 'Hz').replace(' ', ''):>10} {p['gain_db']:9.2f} {p['phase_deg']:10.1f}")
    for n in fr.notes:
        L.append("  ! " + n)
    return "\n".join(L)


def build_output(kind: str, circuit: Mapping):
    """The stage description of ``kind`` from its fields (unknown kind or field: SpecError)."""
    if kind not in OUTPUT_KINDS:
        raise SpecError(f"unknown output stage {kind!r}; kinds are {', '.join(OUTPUT_KINDS)}", field="kind")
    cls = OUTPUT_KINDS[kind]
    names = {f.name for f in fields(cls)}
    for k in circuit:
        if k not in names:
            raise SpecError(f"not a field of a {kind} output stage; its fields are "
                            f"{', '.join(f.name for f in fields(cls))}", field=str(k))
    return cls(**{k: v for k, v in circuit.items() if v is not None})


def _tubes(spec: OutputSpec):
    if spec.kind == "single-ended":
        if spec.tube is None:
            raise SpecError("give the model card of the tube", field="tube")
        return (load_unit(spec.tube, "tube"),)
    for name in ("tube_a", "tube_b"):
        if getattr(spec, name) is None:
            raise SpecError("give the model cards of both tubes", field=name)
    a, b = load_unit(spec.tube_a, "tube_a"), load_unit(spec.tube_b, "tube_b")
    if _same_tube(spec.tube_a, spec.tube_b, a, b):
        raise SpecError(same_tube_message(a.label if a.tube else None), field="tube_b")
    return a, b


def same_tube_message(label: str | None = None) -> str:
    """The one wording of a push-pull given the same tube twice (the web's check by unit id
    uses it too)."""
    return f"the same tube as tube A{f' ({label})' if label else ''}; a push-pull pair is two different tubes"


def _same_tube(path_a, path_b, a, b) -> bool:
    """Whether the two cards are one tube: the same file, or the same tube and section named
    (two fits of one section are still one tube).  Two sections of one bottle are two tubes."""
    import os

    try:
        if os.path.samefile(path_a, path_b):
            return True
    except (OSError, TypeError, ValueError):
        pass
    return bool(a.tube) and (a.tube, a.section) == (b.tube, b.section)


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
    fr = None
    if spec.response:
        from ..stage.frequency import response

        fr = response(stage, *tubes, points_per_decade=spec.points_per_decade)
    run = OutputRun(res, sweep, fr, thd_asked=spec.thd_level is not None)
    if spec.thd_level is not None:
        _thd_against_frequency(run, stage, tubes, spec.thd_level)
    return run


def _thd_against_frequency(run: OutputRun, stage, tubes, level):
    """THD against frequency at ``level`` [W] into ``run`` (ngspice); without ngspice a note."""
    from ..stage import StageInputError
    from ..stage.transient import SimulatorMissing, output_thd_against_frequency

    if isinstance(level, bool) or not isinstance(level, (int, float)) or not (math.isfinite(level) and level > 0):
        raise SpecError(f"must be a positive output power in watts, got {level!r}", field="thd_level")
    try:
        run.distortion = output_thd_against_frequency(stage, *tubes, power=float(level))
    except SimulatorMissing as e:
        run.notes.append(str(e))
    except StageInputError as e:
        if e.field != "power":
            raise
        raise SpecError(e.message, field="thd_level") from None
