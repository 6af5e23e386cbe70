"""Fitting and point use cases: curve files in, fits (and the JSON envelope) out; a model
card and an operating point in, small-signal figures out.

A fit runs in three steps so that a front end can show what it likes between them (the
skipped rows before a long fit, a progress bar):

1. :func:`read_units` reads and checks the files of a :class:`FitSpec` (a file given twice, a
   unit in two files, a unit the model cannot take) and returns :class:`FitInputs`;
2. :func:`fit_units` fits them and returns a :class:`FitRun`, whose ``to_dict()`` is the
   envelope ``platebook fit --json`` prints;
3. :func:`write_outputs` writes the model cards and plots a spec asks for into the run.

:func:`fit_files` does all three.  :func:`point` gives a unit's figures at one operating point.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable, Mapping, Sequence

from .. import CAUTION
from ..models import DEFAULT_MODEL, MODELS, get_model
from ..reader import CurveReadError, ReadIssue
from ..errors import InputError
from .specs import NoResult, SpecError

__all__ = ["FitSpec", "FitInputs", "FitRun", "PointSpec", "PointResult", "models_of", "check_fix", "read_units",
           "fit_units", "write_outputs", "fit_files", "point", "drops_whole_unit"]


@dataclass(frozen=True)
class FitSpec:
    """What to fit and how.

    Attributes
    ----------
    files : sequence of str
        Curve files; ``"-"`` stands for ``stdin`` (the bytes a front end received).
    model : str
        A registered model, or ``"all"`` for every one (ranked by BIC).
    fix : mapping
        Parameter name -> value held during the fit.
    floor : float
        Floor of the relative weighting, as a fraction of each unit's largest current.
    robust : bool
        Robust loss and outliers (False: plain weighted least squares).
    skip_bad : bool
        Skip bad rows and units (each one listed) instead of refusing the file.
    jobs : int or None
        Worker processes (None: all cores).
    residuals : bool
        Every point's residual in the envelope.
    max_rows : int or None
        Refuse a file with more data rows.
    save, plot : str or None
        Folders for one model card / one PNG per unit.
    stdin : bytes or None
        The content of ``"-"``.
    """

    files: Sequence[str]
    model: str = DEFAULT_MODEL
    fix: Mapping[str, float] = field(default_factory=dict)
    floor: float = 0.02
    robust: bool = True
    skip_bad: bool = False
    jobs: int | None = None
    residuals: bool = False
    max_rows: int | None = None
    save: str | None = None
    plot: str | None = None
    stdin: bytes | None = None


def models_of(spec: FitSpec) -> list[str]:
    """The registered models a spec fits (``"all"``: every one)."""
    name = str(spec.model).lower()
    if name == "all":
        return list(MODELS)
    try:
        return [get_model(name).name]
    except ValueError as e:
        raise SpecError(str(e), field="model") from None


def check_fix(fix: Mapping[str, float], models: Sequence[str]) -> None:
    """Every held parameter belongs to a model being fitted and lies within its bounds.

    Raises
    ------
    SpecError
        With field ``fix.<name>``.
    """
    known = {p.name for m in models for p in get_model(m).params}
    for name, v in fix.items():
        if name not in known:
            raise SpecError(f"no model being fitted has a parameter {name!r} (known: {', '.join(sorted(known))})",
                            field=f"fix.{name}")
        for m in models:
            p = next((p for p in get_model(m).params if p.name == name), None)
            if p is not None and not (p.lower <= v <= p.upper):
                raise SpecError(f"{m} parameter {name} must lie within its bounds {p.lower:g} .. {p.upper:g}"
                                + ("" if p.unit == "-" else f" {p.unit}"), field=f"fix.{name}")


@dataclass
class FitInputs:
    """The units read from a spec's files and what was left out of them."""

    units: list
    skipped: list  # ReadIssue
    notes: list  # str, the files' notes


def drops_whole_unit(issue: ReadIssue) -> bool:
    """Whether a skipped issue dropped a whole unit (too few points or curves) or a whole
    file (no usable rows), not just a row: the reader and ``check_for_model`` word those
    as ``unit '...' has ...`` and ``no (usable) data rows``."""
    return issue.message.startswith("unit ") or issue.message in ("no data rows", "no usable data rows")


def _read_files(spec: FitSpec):
    """Read the curve files; ``-`` is the spec's stdin.  A file given twice, or the same unit
    (tube and section) in two files, is an input error: both would be fitted and the second
    model card would overwrite the first."""
    from ..reader import ReadResult, read_curves, read_text

    seen = {}
    for f in spec.files:
        key = "-" if str(f) == "-" else str(Path(f).resolve())
        if key in seen:
            if key == "-":
                raise InputError("standard input given twice", file="-")
            raise InputError(f"given twice (as argument {seen[key]} and {len(seen) + 1})", file=str(f))
        seen[key] = len(seen) + 1
    paths = [Path(f) for f in spec.files if str(f) != "-"]
    read = read_curves(paths, skip_bad=spec.skip_bad, max_rows=spec.max_rows) if paths else ReadResult()
    if "-" in seen:
        raw = spec.stdin or b""
        try:
            text = raw.decode("utf-8-sig")
        except UnicodeDecodeError as e:
            line = raw[: e.start].count(b"\n") + 1
            raise CurveReadError([ReadIssue("<stdin>", line, None, "not UTF-8 text (is this a CSV file?)")]) from None
        read.extend(read_text(text, "<stdin>", default_tube="stdin", skip_bad=spec.skip_bad, max_rows=spec.max_rows))
    where = {}
    for u in read.units:
        key = (u.tube, u.section)
        if key in where and where[key] != u.source:
            raise InputError(f"unit {u.label!r} is in both {where[key]} and {u.source}; give each unit once "
                             "(or name the tube apart with a '# tube:' line)")
        where.setdefault(key, u.source)
    return read


def read_units(spec: FitSpec) -> FitInputs:
    """Read and check the files of ``spec``.

    Raises
    ------
    CurveReadError
        Every problem of the files (and every unit the models cannot take), with file,
        line and column, unless ``skip_bad`` (then they are listed in ``skipped``).
    InputError
        A file given twice, a unit in two files, no units left.
    SpecError
        An unknown model or a held parameter no model has.
    """
    from ..reader import check_for_model

    models = models_of(spec)
    check_fix(spec.fix, models)
    read = _read_files(spec)
    skipped = list(read.skipped)
    units, problems = [], []
    for u in read.units:
        issue = next((i for i in (check_for_model(u, get_model(m)) for m in models) if i), None)
        if issue is None:
            units.append(u)
        elif spec.skip_bad:
            skipped.append(issue)
        else:
            problems.append(issue)
    if problems:
        raise CurveReadError(problems)
    return FitInputs(units, skipped, list(read.notes))


@dataclass
class FitRun:
    """The fits of one run: ``results`` holds each unit's fits, best first."""

    spec: FitSpec
    inputs: FitInputs
    results: list
    written: list = field(default_factory=list)
    not_saved: list = field(default_factory=list)

    @property
    def models(self) -> list[str]:
        return models_of(self.spec)

    @property
    def fits(self) -> list:
        return [r for rs in self.results for r in rs]

    @property
    def n_failed(self) -> int:
        """Units without a good fit."""
        return sum(not rs[0].converged for rs in self.results)

    @property
    def dropped(self) -> list:
        """Skipped issues that left out a whole unit or file."""
        return [s for s in self.inputs.skipped if drops_whole_unit(s)]

    @property
    def loose_limit(self) -> float:
        """Relative rms above which a converged fit is loose (:data:`fitter.fit.LOOSE_FIT_REL_RMS`)."""
        from ..fit import LOOSE_FIT_REL_RMS

        return LOOSE_FIT_REL_RMS

    @property
    def loose(self) -> list:
        """Converged fits looser than :attr:`loose_limit` (the model misses the tube's shape)."""
        return [r for r in self.fits if r.converged and r.rel_rms > self.loose_limit]

    @property
    def failed(self) -> bool:
        """A fit failed or a whole unit was left out: not a complete result."""
        return bool(self.n_failed or self.dropped)

    def to_dict(self) -> dict:
        """The envelope ``platebook fit --json`` prints."""
        from .. import __version__

        return {
            "platebook": __version__,
            "fits": [r.to_dict(residuals=self.spec.residuals) for r in self.fits],
            "best": [{"tube": rs[0].tube, "section": rs[0].section, "model": rs[0].model.name,
                      "converged": rs[0].converged} for rs in self.results] if len(self.models) > 1 else None,
            "skipped": [str(s) for s in self.inputs.skipped],
            "notes": list(self.inputs.notes),
            "written": list(self.written),
            "caution": CAUTION,
        }


def fit_units(spec: FitSpec, inputs: FitInputs, progress: Callable[[int], None] | None = None) -> FitRun:
    """Fit the units read by :func:`read_units`; ``progress(n)`` is called as units finish.

    Raises
    ------
    InputError
        No units left to fit; a unit the fitter refuses (:class:`~fitter.fit.FitInputError`).
    """
    from ..fit import FitOptions, fit_many

    if not inputs.units:
        raise InputError("no units left to fit"
                         + (" after skipping bad input (listed above)" if inputs.skipped else ""))
    opts = FitOptions(fix=dict(spec.fix), floor=spec.floor, robust=spec.robust)
    results = fit_many(inputs.units, models_of(spec), opts, processes=spec.jobs, progress=progress)
    return FitRun(spec, inputs, results)


def write_outputs(run: FitRun, plot_progress: Callable[[int], None] | None = None) -> FitRun:
    """Write one model card per unit into ``spec.save`` and one PNG per unit into
    ``spec.plot`` (atomically, collision-free names); the paths written go into ``run.written``.

    Raises
    ------
    InputError
        A folder or file that cannot be written (with how many files were written before).
    """
    spec = run.spec
    if not (spec.save or spec.plot):
        return run
    from ..card import card_filename, save_card
    from ..outfiles import OutputError, prepare_folder, unit_stems

    # one stem per unit of this run, never shared (fitter.outfiles.unit_stems)
    stems = unit_stems((rs[0].tube, rs[0].section) for rs in run.results)
    try:
        if spec.save:
            folder = Path(spec.save)
            prepare_folder(folder)
            for rs, stem in zip(run.results, stems):
                best = rs[0]
                if best.converged:
                    path = folder / card_filename(best.triode, stem)
                    save_card(path, best.triode, best.figures(), [best.unit.source])
                    run.written.append(str(path))
                else:
                    run.not_saved.append(best.label)
        if spec.plot:
            from ..plotting import save_fit_plots

            folder = Path(spec.plot)
            prepare_folder(folder)
            best = [rs[0] for rs in run.results]
            paths = [folder / f"{stem}.{b.model.name}.png" for b, stem in zip(best, stems)]
            run.written.extend(str(p) for p in save_fit_plots(best, paths, processes=spec.jobs,
                                                               progress=plot_progress))
    except OutputError as e:
        done = f" ({len(run.written)} file(s) written before it)" if run.written else ""
        raise InputError(f"{e}{done}") from None
    return run


def fit_files(spec: FitSpec) -> FitRun:
    """Read, check and fit the files of ``spec`` and write what it asks for."""
    return write_outputs(fit_units(spec, read_units(spec)))


# -- point --------------------------------------------------------------------


@dataclass(frozen=True)
class PointSpec:
    """A model card and an operating point: plate and grid voltage to the cathode [V]."""

    card: str
    va: float
    vg: float


@dataclass(frozen=True)
class PointResult:
    """Small-signal figures of a unit at one point (:class:`~fitter.triode.SmallSignal`),
    with the notes of a point outside the measured data."""

    triode: object
    va: float
    vg: float
    figures: object
    warnings: tuple

    def to_dict(self) -> dict:
        """``ia_ma``, ``gm_ms``, ``rp_ohm``, ``mu`` with their ``*_err``, the unit and the warnings."""
        d = self.figures.to_dict()
        d.update({"tube": self.triode.tube, "section": self.triode.section, "model": self.triode.model.name,
                  "warnings": list(self.warnings)})
        return d


def point(spec: PointSpec) -> PointResult:
    """The unit's plate current, gm, rp and mu at ``(va, vg)`` with errors from the fit.

    Raises
    ------
    SpecError
        A voltage that is not finite (field ``va`` or ``vg``).
    CardError
        A card that cannot be read (its file and field named).
    NoResult
        The model gives no finite plate current there.
    """
    import math
    import warnings

    import numpy as np

    from ..triode import OutsideDataWarning

    for name in ("va", "vg"):
        v = getattr(spec, name)
        if not (isinstance(v, (int, float)) and math.isfinite(v)):
            raise SpecError(f"must be a finite voltage, got {v!r}", field=name)
    from ..card import load_card

    triode = load_card(spec.card)  # a CardError names the card's file and field
    with warnings.catch_warnings(record=True) as caught, np.errstate(all="ignore"):
        # numpy's overflow far outside any tube is caught on the figures below, not printed
        warnings.simplefilter("always", OutsideDataWarning)
        ss = triode.small_signal(spec.va, spec.vg)
    notes = tuple(str(w.message) for w in caught if issubclass(w.category, OutsideDataWarning))
    res = PointResult(triode, float(spec.va), float(spec.vg), ss, notes)
    d = ss.to_dict()
    if d["ia_ma"] is None or d["gm_ms"] is None:
        raise NoResult(f"{triode.label}: the model gives no finite plate current at va {spec.va:g} V, "
                       f"vg {spec.vg:g} V; no figures there", field="va")
    return res
