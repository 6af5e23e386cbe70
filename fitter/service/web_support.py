"""Use cases the web front end needs beyond :mod:`fitter.service.stock`, on stored units.

A *unit id* here is the id of a stored fit (``fits.id``): it names one section's fit of one
measurement, so a card, a subcircuit, a plot or a match refers to exactly the figures a
page showed.  Everything goes through the other services (export, point, stages, matching)
with a temporary model card written from the ledger, so the web gives the same answers as
the command line.  No Flask here; errors are :class:`fitter.errors.InputError` naming the
field (uploads: the file, line and column).
"""

from __future__ import annotations

import json
import math
import tempfile
from contextlib import contextmanager
from pathlib import Path

from sqlalchemy import select

from ..errors import InputError, NotFound
from ..ledger.schema import DATASHEET_MARK  # what a datasheet plot's measurement says it is
from ..text import shown
from .stock import _ledger

__all__ = ["unit", "unit_card", "unit_export", "figures_at", "fit_plot", "fit_result", "validate_uploads", "import_uploads",
           "match_by_id", "stage_by_id", "UploadError", "MAX_UPLOAD_BYTES", "tube_page", "match_table",
           "type_nominal", "compare_nominal", "compare_plot", "compare_page"]

#: largest single upload [bytes] (the reader's own row limit applies as well)
MAX_UPLOAD_BYTES = 20 * 1024 * 1024


class UploadError(InputError):
    """Uploaded files that cannot be imported; ``errors`` lists every problem as
    ``{"file", "line", "column", "message"}`` (nothing was stored)."""

    def __init__(self, errors: list):
        self.errors = errors
        first = errors[0] if errors else {"message": "no file"}
        super().__init__(f"{len(errors)} problem(s) in the upload; first: {first['message']}", field="file")


_MAX_ID = 2**63 - 1  # the largest SQL integer (SQLite and PostgreSQL bigint)


def _unit_id(value) -> int:
    try:
        i = int(value)
    except (TypeError, ValueError, OverflowError):
        raise InputError(f"a unit id is a whole number, got {shown(str(value))!r}", field="id") from None
    if i < 1:
        raise InputError(f"a unit id is a positive number, got {i}", field="id")
    if i > _MAX_ID:
        raise NotFound(f"no unit {i} in the ledger (ids go up to {_MAX_ID})", field="id")
    return i


def _load(s, fit_id):
    from ..ledger.schema import Fit, Measurement, Section, SourceFile, Tube

    row = s.execute(select(Fit, Measurement, Section, Tube, SourceFile.name)
                    .join(Measurement, Measurement.id == Fit.measurement_id)
                    .join(Section, Section.id == Measurement.section_id)
                    .join(Tube, Tube.id == Section.tube_id)
                    .join(SourceFile, SourceFile.id == Measurement.source_id)
                    .where(Fit.id == fit_id)).first()
    if row is None:
        raise NotFound(f"no unit {fit_id} in the ledger", field="id")
    return row


def _unit_dict(f, sec, tube) -> dict:
    def num(x):
        return None if x is None or not math.isfinite(x) else float(x)

    return {"id": f.id, "tube": tube.label, "section": sec.name or None,
            "fit": {"model": f.model, "params": dict(f.params) if f.converged else {},
                    "stderr": {k: num(v) for k, v in f.stderr.items()} if f.converged else {},
                    "converged": bool(f.converged), "failure": f.failure,
                    "rms_ma": num((f.figures or {}).get("rms_ma")) if f.converged else None}}


def unit(db, fit_id) -> dict:
    """``{"id", "tube", "section", "fit": {"model", "params", "stderr", "converged", "rms_ma"}}``."""
    fit_id = _unit_id(fit_id)
    with _ledger(db) as ledger, ledger.read() as s:
        f, m, sec, tube, _ = _load(s, fit_id)
        return _unit_dict(f, sec, tube)


def tube_page(db, label) -> dict:
    """What the tube page shows, from one opening of the ledger: the tube as
    :func:`fitter.service.stock.show_tube` gives it, and ``units``: each section's current
    fit as :func:`unit` gives it, by fit id."""
    from ..ledger import store
    from ..ledger.schema import Fit, Measurement, Section, Tube

    if not isinstance(label, str) or not label.strip():
        raise InputError("give a tube label", field="label")
    with _ledger(db) as ledger:
        d = store.tube_detail(ledger, label)
        ids = [x["fit_id"] for x in d["sections"] if x.get("fit_id")]
        units = {}
        if ids:
            with ledger.read() as s:
                for f, sec, tube in s.execute(select(Fit, Section, Tube)
                                              .join(Measurement, Fit.measurement_id == Measurement.id)
                                              .join(Section, Section.id == Measurement.section_id)
                                              .join(Tube, Tube.id == Section.tube_id).where(Fit.id.in_(ids))):
                    units[f.id] = _unit_dict(f, sec, tube)
    d["units"] = units
    return d


def unit_card(db, fit_id) -> dict:
    """The model card (dict, as ``platebook fit --save`` writes) of a stored converged fit."""
    from ..card import card_dict
    from ..ledger.store import card_figures, triode_of

    fit_id = _unit_id(fit_id)
    with _ledger(db) as ledger, ledger.read() as s:
        f, m, sec, tube, src = _load(s, fit_id)
        if not f.converged:
            raise InputError(f"the fit of unit {fit_id} failed ({shown(f.failure or '')}); it has no model card",
                             field="id")
        d = card_dict(triode_of(f, tube.label, sec.name), card_figures(f.figures), [src])
        d["created"] = f.fitted_at
        d["platebook"] = f.engine_version
        return d


@contextmanager
def _card_files(db, ids):
    """Temporary model-card files of stored fits (the services take cards)."""
    with tempfile.TemporaryDirectory(prefix="platebook-web-") as tmp:
        paths = []
        for k, i in enumerate(ids):
            p = Path(tmp, f"unit{k}.json")
            p.write_text(json.dumps(unit_card(db, i), allow_nan=False))
            paths.append(str(p))
        yield paths


def unit_export(db, fit_id, fmt) -> tuple[str, str]:
    """(file name, text) of a unit's model card (``json``), SPICE subcircuit (``spice``) or
    curve-family CSV over its fitted range (``csv``)."""
    from ..outfiles import unit_stem
    from .export import ExportSpec, export

    if fmt not in ("json", "spice", "csv"):
        raise InputError(f"must be json, spice or csv, got {shown(str(fmt))!r}", field="format")
    u = unit(db, fit_id)
    with _card_files(db, [u["id"]]) as (card,):
        res = export(ExportSpec(card=card, format=fmt))
    # the temporary card's path means nothing to the reader: name the unit instead
    text = res.text.replace(card, f"ledger unit {u['id']}")
    suffix = {"json": "json", "spice": "lib", "csv": "csv"}[fmt]
    return f"{unit_stem(u['tube'], u['section'])}.{suffix}", text


def figures_at(db, fit_id, va, vg) -> dict:
    """Ia, gm, rp, mu with their errors at (va, vg) [V] (:func:`fitter.service.fitting.point`)."""
    from ..units import parse_value
    from .fitting import PointSpec, point

    vals = {}
    for name, v in (("va", va), ("vg", vg)):
        try:
            vals[name] = float(parse_value(v)) if isinstance(v, str) else float(v)
        except (TypeError, ValueError):
            raise InputError(f"must be a voltage such as 250 or -2.5, got {shown(str(v))!r}", field=name) from None
    with _card_files(db, [fit_id]) as (card,):
        return point(PointSpec(card=card, va=vals["va"], vg=vals["vg"])).to_dict()


def fit_result(db, fit_id):
    """A stored fit as a :class:`fitter.fit.FitResult` for drawing: the stored points cleaned as
    the fit cleaned them, the stored parameters, their residuals and the outliers the fit found
    (stored with the fit since the outliers are kept; a row from before that is fitted again
    to find them by the engine's own rule, as :func:`fitter.fit.fit_curves` did at import).
    Returns ``(result, how)``, ``how`` being ``"stored"`` or ``"refit"``."""
    import numpy as np

    from ..fit import FitResult, fit_curves
    from ..ledger.schema import unpack_points
    from ..ledger.store import stored_outliers
    from ..models import get_model
    from ..reader import CurveSet, clean_curves

    fit_id = _unit_id(fit_id)
    with _ledger(db) as ledger, ledger.read() as s:
        f, m, sec, tube, src = _load(s, fit_id)
        pts = unpack_points(m.points, m.n_points)
        params = dict(f.params)
        converged, failure, figures = f.converged, f.failure, dict(f.figures or {})
        model = get_model(f.model)
        cs = CurveSet(tube=tube.label, section=sec.name or None, va=pts["va"], vg=pts["vg"], ia=pts["ia"],
                      ig=pts["ig"], source=src, lines=pts["lines"])
    u = clean_curves(cs, model)
    if not converged:
        return FitResult(u, model, False, failure or "fit failed"), "stored"
    outliers, how = stored_outliers(figures, u.n_points), "stored"
    if outliers is None:
        refit = fit_curves(cs, model)
        u, how = refit.unit, "refit"
        outliers = refit.outliers if refit.outliers is not None else np.zeros(u.n_points, bool)
    with np.errstate(all="ignore"):
        resid = model.current(u.va, u.vg, **params) - u.ia
    inl = ~outliers
    rms = figures.get("rms_ma")
    rel = figures.get("rel_rms")
    if rms is None:
        rms = 1e3 * float(np.sqrt(np.mean(resid[inl] ** 2))) if inl.any() else float("nan")
    if rel is None:
        rel = float("nan")
    return FitResult(u, model, True, None, params=params, residuals=resid, outliers=outliers, rms_ma=rms,
                     rel_rms=rel), how


def fit_plot(db, fit_id, fmt="svg") -> bytes:
    """The plot of a stored fit (:func:`fit_result`) over its measured points, residuals
    beneath, outliers marked: the curves and residuals drawn are those of the stored
    parameters.  SVG (the page's) is written directly (:func:`fitter.plotting.svg_fit_plot`,
    about 10 ms against 150-200 ms through matplotlib); PNG is matplotlib's
    (:func:`fitter.plotting.plot_bytes`, as ``platebook fit --plot`` draws)."""
    from ..plotting import plot_bytes, svg_fit_plot

    if fmt not in ("svg", "png"):
        raise InputError(f"must be svg or png, got {shown(str(fmt))!r}", field="format")
    res, _ = fit_result(db, fit_id)
    return svg_fit_plot(res) if fmt == "svg" else plot_bytes(res, "png")


# -- uploads ----------------------------------------------------------------------


@contextmanager
def _upload_folder(files):
    """The uploaded (name, bytes) pairs as files in a private temporary folder, named
    ``upload-<n>.csv`` (no name a user gave becomes a path); yields [(path, shown name)]."""
    with tempfile.TemporaryDirectory(prefix="platebook-upload-") as tmp:
        out = []
        for k, (name, data) in enumerate(files, 1):
            p = Path(tmp, f"upload-{k}.csv")
            p.write_bytes(data)
            out.append((p, shown(str(name or f"upload-{k}.csv"))[:200]))
        yield out


def _issues(paths, model):
    from ..models import get_model
    from ..reader import CurveReadError, check_for_model, read_curves

    errors = []
    names = {str(p): n for p, n in paths}
    m = get_model(model)
    for p, name in paths:
        try:
            read = read_curves([p])
        except CurveReadError as e:
            errors += [{"file": names.get(i.file, name), "line": i.line, "column": i.column, "message": i.message}
                       for i in e.issues]
            continue
        except InputError as e:
            errors.append({"file": name, "line": e.line, "column": e.column, "message": e.message})
            continue
        if not read.units:
            errors.append({"file": name, "line": None, "column": None, "message": "no units in the file"})
        for u in read.units:
            i = check_for_model(u, m)
            if i:
                errors.append({"file": name, "line": i.line, "column": i.column, "message": i.message})
    return errors


def validate_uploads(files, model="koren") -> list:
    """Every problem of the uploaded ``(name, bytes)`` files, as dicts with file, line,
    column and message (empty: they can be imported)."""
    files = list(files)
    errors = []
    for name, data in files:
        if len(data) > MAX_UPLOAD_BYTES:
            errors.append({"file": shown(str(name)), "line": None, "column": None,
                           "message": f"is {len(data)} bytes; at most {MAX_UPLOAD_BYTES} bytes per file"})
    if errors:
        return errors
    with _upload_folder(files) as paths:
        return _issues(paths, model)


def import_uploads(db, user, files, tube_type, model="koren", instrument="", notes="") -> dict:
    """Import uploaded curve files into the ledger as type ``tube_type``: every file is read
    and checked first, and nothing is stored unless all are good (:class:`UploadError`
    lists every problem).  Returns ``{"files": [...], "units": [unit dicts]}``."""
    from ..ledger.schema import Fit, Measurement, SourceFile
    from ..models import get_model
    from . import stock

    files = [(n, d) for n, d in files]
    if not files:
        raise InputError("choose at least one file", field="file")
    try:
        model = get_model(model).name
    except ValueError as e:
        raise InputError(str(e), field="model") from None
    if not isinstance(tube_type, str) or not tube_type.strip():
        raise InputError("choose the tube type of the files", field="type")
    errors = validate_uploads(files, model)
    if errors:
        raise UploadError(errors)
    with stock._ledger(db) as ledger, ledger.read() as s:  # the type must exist before anything is read again
        from ..ledger.store import _type

        _type(s, tube_type)
    import hashlib

    with _upload_folder(files) as paths:
        # the stored source name is the uploaded name, so the ledger shows what the user sent
        named = []
        for p, name in paths:
            q = p.with_name(_safe_name(name, p.name))
            p.rename(q)
            named.append((q, name))
        res = stock.import_files(db=db, user=user, paths=[str(p) for p, _ in named], tube_type=tube_type,
                                 model=model, instrument=instrument, notes=notes)
    d = res.to_dict()
    # the units stored now (a file whose bytes were imported before adds none)
    shas = [hashlib.sha256(data).hexdigest() for (_, data), fd in zip(files, d["files"]) if not fd["duplicate"]]
    units = []
    with _ledger(db) as ledger, ledger.read() as s:
        for sha in shas:
            fits = s.scalars(select(Fit).join(Measurement, Measurement.id == Fit.measurement_id)
                             .join(SourceFile, SourceFile.id == Measurement.source_id)
                             .where(SourceFile.sha256 == sha).order_by(Fit.id)).all()
            for f in fits:
                _, _, sec, tube, _ = _load(s, f.id)
                units.append(_unit_dict(f, sec, tube))
    for fd, (name, _) in zip(d["files"], files):
        fd["file"] = shown(str(name))
    # stored all the same, but said: the same measured points under another tube's label
    warnings = [f"{fd['file']}: {w}" for fd in d["files"] for w in fd.get("warnings", [])]
    return {"files": d["files"], "units": units, "failed": res.failed, "lines": list(res.lines),
            "warnings": warnings}


def _safe_name(name: str, fallback: str) -> str:
    """A plain file name from an uploaded name: letters, digits, dot, dash, underscore."""
    import re

    base = re.sub(r"[^A-Za-z0-9._-]+", "_", name.rsplit("/", 1)[-1].rsplit("\\", 1)[-1]).strip("._")[:100]
    return base if base and not base.startswith(".") else fallback


# -- matching and stages on stored units ------------------------------------------


def _ids(values, field) -> list:
    if not isinstance(values, (list, tuple)) or not values:
        raise InputError("give a list of unit ids", field=field)
    ids = [_unit_id(v) for v in values]
    if len(set(ids)) != len(ids):
        raise InputError("a unit id appears twice", field=field)
    return ids


def match_by_id(db, ids, va, vg, tolerance=5.0, group=2) -> dict:
    """Match stored units at a fixed-bias position with :func:`fitter.service.matching.match`:
    ``{"groups": [{"units": [ids], "mismatch": {"max_pct"}, "grade"}], "unmatched": [...]}``."""
    from ..card import load_card
    from .matching import match

    ids = _ids(ids, "units")
    if group not in (2, 4):
        raise InputError(f"must be 2 or 4, got {group!r}", field="group")
    with _card_files(db, ids) as cards:
        triodes = [load_card(c) for c in cards]
    by_label = {}
    for i, t in zip(ids, triodes):
        by_label.setdefault(t.label, i)
    if len(by_label) != len(ids):
        raise InputError("two of the units are the same tube section (two fits of one section)", field="units")
    res = match({"units": triodes, "va": va, "vg": vg, "tolerance": tolerance, "group": group})
    d = res.to_dict()
    groups = [{"units": [by_label[x] for x in g.units], "mismatch": {"max_pct": 100.0 * g.mismatch},
               "grade": g.grade} for g in res.groups]
    def left(x):
        lab = x.get("unit") if isinstance(x, dict) else x
        return {"id": by_label.get(lab), "unit": lab, "reason": x.get("reason") if isinstance(x, dict) else None}

    return {"groups": groups, "unmatched": [left(x) for x in d["unmatched"] + d["excluded"]],
            "total_mismatch_pct": d["total_mismatch_pct"], "optimality": d["optimality"],
            "position": d["position"], "criterion": d["criterion"]}


#: names of the figures a match compares, as a table heads them
FIGURE_HEADS = {"ia": ("Ia", "mA", "ia_ma"), "gm": ("gm", "mA/V", "gm_ms"), "rp": ("rp", "kΩ", "rp_kohm"),
                "mu": ("mu", "", "mu")}


def match_table(d) -> dict:
    """The matching page's table from :func:`fitter.service.stock.match`'s ``data``: for each
    group its units side by side with their figures at the position (Ia, gm, and whatever
    else the criterion compared), each figure's spread in the group and the mismatch that
    decided it, so a dealer sees why the units were put together.  Bottle pairs list their
    sections as they pair up (A with A, B with B).

    ``{"figures": [(key, head, unit)], "groups": [{"n", "grade", "mismatch_pct",
    "spread": {key: pct}, "limit": key, "rows": [{"unit", "pair", "figs": {key: value}}]}]}``.
    """
    crit = (d.get("criterion") or {}).get("figures") or ["ia", "gm"]
    shown_figs = [f for f in ("ia", "gm") if f in FIGURE_HEADS] + [f for f in crit if f in FIGURE_HEADS
                                                                     and f not in ("ia", "gm")]
    heads = [(f, FIGURE_HEADS[f][0], FIGURE_HEADS[f][1]) for f in shown_figs]

    def values(fig):
        return {f: (fig or {}).get(FIGURE_HEADS[f][2]) for f in shown_figs}

    groups = []
    if "pairs" in d:  # bottle pairs: every section pair side by side
        figs = d.get("figures") or {}
        for k, p in enumerate(d["pairs"], 1):
            rows = []
            for j, side in enumerate(p.get("sections") or []):
                for u in side:
                    rows.append({"unit": u, "pair": j + 1, "figs": values(figs.get(u))})
            spread = {f: (p.get("spread_pct") or {}).get(f) for f in shown_figs}
            groups.append({"n": k, "grade": p.get("grade"), "mismatch_pct": p.get("mismatch_pct"), "spread": spread,
                           "limit": _limit(spread, p.get("mismatch_pct")), "rows": rows,
                           "title": " + ".join(p.get("bottles") or [])})
    else:
        for k, g in enumerate(d.get("groups") or [], 1):
            figs = {x.get("unit"): x for x in g.get("figures") or []}
            sides = g.get("sides")
            side_of = {u: j + 1 for j, side in enumerate(sides or []) for u in side}
            rows = [{"unit": u, "pair": side_of.get(u), "figs": values(figs.get(u))} for u in g.get("units") or []]
            if sides:
                rows.sort(key=lambda r: r["pair"] or 0)
            mm = g.get("mismatch") or {}
            spread = {f: mm.get(f"{f}_pct") for f in shown_figs}
            groups.append({"n": k, "grade": g.get("grade"), "mismatch_pct": mm.get("max_pct"), "spread": spread,
                           "limit": _limit(spread, mm.get("max_pct")), "rows": rows,
                           "title": ", ".join(g.get("units") or [])})
    return {"figures": heads, "groups": groups, "compared": list(crit)}


def _limit(spread, mismatch):
    """The figure whose spread is the group's mismatch (the one that decided it), or None."""
    if mismatch is None:
        return None
    best = [f for f, v in spread.items() if v is not None and abs(v - mismatch) <= 1e-9 * max(1.0, abs(mismatch))]
    return best[0] if best else None


STAGE_KINDS = ("common-cathode", "cathode-follower", "stack")


def _parse_circuit(circuit) -> dict:
    """The circuit's fields with text in engineering notation turned into numbers (field named)."""
    from ..units import parse_value

    values = {}
    for k, v in circuit.items():
        if isinstance(v, str) and k not in ("top_grid", "output"):
            try:
                v = float(parse_value(v))
            except ValueError:
                raise InputError(f"cannot read {shown(v)!r}; give a number such as 100k or 2.2u", field=k) from None
        elif isinstance(v, bool) or not (v is None or isinstance(v, (int, float, str))):
            raise InputError("must be a number", field=str(k))
        values[str(k)] = v
    return values


def stage_by_id(db, kind, circuit, tube=None, bottom=None, top=None):
    """Solve a stage with stored units (:func:`fitter.service.stages.solve_stage`); the
    result's ``to_dict()`` is what ``platebook stage --json`` prints."""
    from .stages import StageSpec, solve_stage

    if kind not in STAGE_KINDS:
        raise InputError(f"must be one of {', '.join(STAGE_KINDS)}, got {shown(str(kind))!r}", field="kind")
    if not isinstance(circuit, dict):
        raise InputError("give the circuit's fields as an object", field="circuit")
    names = ("tube",) if kind != "stack" else ("bottom", "top")
    given = {"tube": tube, "bottom": bottom, "top": top}
    for n in names:
        if given[n] is None:
            raise InputError("give the unit id", field=n)
    ids = [_unit_id(given[n]) for n in names]
    circuit = _parse_circuit(circuit)
    with _card_files(db, ids) as cards:
        spec = StageSpec(kind=kind, circuit=circuit, **dict(zip(names, cards)))
        return solve_stage(spec)


# -- the stock page -------------------------------------------------------------------

#: sorts of the stock page: the ledger's own, and by a section figure at the test position
FIGURE_SORTS = {"ia": "ia_ma", "gm": "gm_ms"}


def stock_page(db, tube_type=None, grade=None, status=None, sort="label", descending=False, page=1,
               per_page=50) -> dict:
    """One page of the stock (:func:`fitter.service.stock.list_tubes`), also sortable by
    Ia or gm at the type's test position (the mean over a bottle's fitted sections; tubes
    without a fitted section last), with the counts of the whole stock by status, and the
    types and grades there are to filter by."""
    from ..ledger.schema import STATUSES, Grade, Tube, TubeType
    from ..ledger.store import SORTS
    from sqlalchemy import func

    from . import stock

    if not (isinstance(page, int) and page >= 1):
        raise InputError(f"must be 1 or more, got {page!r}", field="page")
    if not (isinstance(per_page, int) and 1 <= per_page <= 500):
        raise InputError(f"must be 1 .. 500, got {per_page!r}", field="per_page")
    filters = dict(tube_type=tube_type or None, grade=grade or None, status=status or None)
    if sort in SORTS:
        d = stock.list_tubes(db=db, sort=sort, descending=descending, limit=per_page,
                             offset=(page - 1) * per_page, **filters).data
    elif sort in FIGURE_SORTS:
        key = FIGURE_SORTS[sort]
        d = stock.list_tubes(db=db, sort="label", limit=100_000, offset=0, **filters).data

        def mean(t):
            v = [s[key] for s in t["sections"] if s.get(key) is not None]
            return sum(v) / len(v) if v else None

        have = sorted((t for t in d["tubes"] if mean(t) is not None), key=mean, reverse=bool(descending))
        tubes = have + [t for t in d["tubes"] if mean(t) is None]
        d = {"total": d["total"], "offset": (page - 1) * per_page,
             "tubes": tubes[(page - 1) * per_page: page * per_page]}
    else:
        raise InputError(f"unknown sort {shown(str(sort))!r}; sort by {', '.join(SORTS + tuple(FIGURE_SORTS))}",
                         field="sort")
    with _ledger(db) as ledger, ledger.read() as s:
        by_status = dict(s.execute(select(Tube.status, func.count(Tube.id)).group_by(Tube.status)).all())
        types = s.scalars(select(TubeType.designation).order_by(TubeType.designation)).all()
        grades = s.scalars(select(Grade.grade).distinct().order_by(Grade.grade)).all()
    d["counts"] = {"all": int(sum(by_status.values())), **{k: int(by_status.get(k, 0)) for k in STATUSES}}
    d["types"], d["grades"], d["statuses"] = list(types), list(grades), list(STATUSES)
    d["page"], d["per_page"] = page, per_page
    d["pages"] = max(1, -(-d["total"] // per_page))
    return d


# -- the stage page ---------------------------------------------------------------------


def resolve_unit(db, text, field="tube") -> int:
    """A unit id from what a person types: the id itself, or a tube label with its section
    (``MM-01:A``; a single triode's label alone), meaning that section's current fit."""
    from . import stock

    text = (text or "").strip() if isinstance(text, str) else text
    if text in (None, ""):
        raise InputError("give a tube (label:section, or a unit id)", field=field)
    if isinstance(text, int) or text.isdigit():
        return _unit_id(text)
    label, _, section = text.rpartition(":") if ":" in text else (text, "", "")
    try:
        secs = stock.show_tube(db=db, label=label).data["sections"]
    except InputError as e:
        raise InputError(e.message, field=field) from None
    for s in secs:
        if (s["section"] or "") == section and s.get("fit_id") and s.get("converged"):
            return s["fit_id"]
    names = ", ".join(f"{label}:{s['section']}" if s["section"] else label for s in secs if s.get("converged"))
    raise InputError(f"no fitted section {shown(text)!r}" + (f" (fitted: {names})" if names else ""), field=field)


def stage_fields(kind) -> list:
    """(field, default) of a kind of stage, in the stage's order (the page's form)."""
    from dataclasses import MISSING

    from .stages import KINDS

    if kind not in KINDS:
        raise InputError(f"must be one of {', '.join(KINDS)}, got {shown(str(kind))!r}", field="kind")
    out = []
    for name, f in KINDS[kind].__dataclass_fields__.items():
        out.append((name, None if f.default is MISSING else f.default))
    return out


def required_fields(kind) -> tuple:
    """The fields a kind of stage (small-signal or output) cannot do without: those with no
    default (the form marks them; the others take their default when left empty)."""
    from dataclasses import MISSING, fields

    from ..stage.output import PushPullOutput, SingleEndedOutput
    from .stages import KINDS

    cls = {**KINDS, "single-ended": SingleEndedOutput, "push-pull": PushPullOutput}.get(kind)
    if cls is None:
        raise InputError(f"must be a kind of stage, got {shown(str(kind))!r}", field="kind")
    return tuple(f.name for f in fields(cls) if f.default is MISSING and f.default_factory is MISSING)


def stage_report(db, kind, circuit, tube=None, bottom=None, top=None, thd=False) -> dict:
    """A stage solved with tubes from the ledger: ``{"result": to_dict(), "report": text,
    "plot_svg": load-line plot (SVG bytes)}``, with ``thd``: also ``"thd_svg"`` and
    ``"thd_report"`` of a THD sweep up to grid-current onset; tubes by label:section or id."""
    from ..plotting_stage import save_load_line_plot, save_thd_plot
    from .stages import DistortionSpec, stage_distortion

    ids = {}
    for n, v in (("tube", tube), ("bottom", bottom), ("top", top)):
        if v not in (None, ""):
            ids[n] = resolve_unit(db, v, n)
    if kind == "stack" and ids.get("bottom") is not None and ids.get("bottom") == ids.get("top"):
        raise InputError("the bottom and the top must be two different sections", field="top")
    res = stage_by_id(db, kind, {k: v for k, v in circuit.items() if v not in (None, "")}, **ids)
    out = {"result": res.to_dict(), "report": res.report(), "units": ids}
    with tempfile.TemporaryDirectory(prefix="platebook-stage-") as tmp:
        out["plot_svg"] = save_load_line_plot(res, Path(tmp, "stage.svg")).read_bytes()
        if thd:
            names = ("tube",) if kind != "stack" else ("bottom", "top")
            given = _parse_circuit({k: v for k, v in circuit.items() if v not in (None, "")})
            with _card_files(db, [ids[n] for n in names]) as cards:
                sw = stage_distortion(DistortionSpec(kind=kind, circuit=given, sweep=True, **dict(zip(names, cards))))
            out["thd_svg"] = save_thd_plot(sw, Path(tmp, "thd.svg")).read_bytes()
            out["thd_report"] = sw.report()
    return out


# -- the compare page --------------------------------------------------------------------

MAX_COMPARE = 8
#: fewest converged sections a median nominal is taken from
MIN_MEDIAN_SECTIONS = 3
#: statuses of the tubes that are in stock (a median nominal is taken over them)
IN_STOCK = ("in-stock", "reserved")


def _compared_units(db, units, most):
    texts = [u for u in units if str(u).strip()]
    if len(texts) > most:
        raise InputError(f"at most {most} tubes at once, got {len(texts)}", field="units")
    ids = [resolve_unit(db, t, "units") for t in texts]
    if len(set(ids)) != len(ids):
        raise InputError("a tube appears twice", field="units")
    return ids


def compare_plot(db, units) -> bytes:
    """One SVG with the model curves of several stored units (label:section or unit id, at
    most :data:`MAX_COMPARE`), each its own colour (:func:`fitter.plotting_compare.plot_compare`)."""
    return compare_page(db, units)["svg"]


def compare_page(db, units) -> dict:
    """:func:`compare_plot` with the grid voltages drawn: ``{"svg", "grids"}``, ``grids`` from
    :func:`fitter.plotting_compare.grid_choice` with its sentence in ``grids["note"]``."""
    from ..card import load_card
    from ..plotting_compare import save_compare_plot

    if len([u for u in units if str(u).strip()]) < 2:
        raise InputError("name at least two tubes to compare", field="units")
    ids = _compared_units(db, units, MAX_COMPARE)
    with _card_files(db, ids) as cards:
        triodes = [load_card(c) for c in cards]
    with tempfile.TemporaryDirectory(prefix="platebook-compare-") as tmp:
        return {"svg": save_compare_plot(triodes, Path(tmp, "compare.svg")).read_bytes(), "grids": _grids(triodes)}


def _grids(triodes) -> dict:
    from ..plotting_compare import grid_choice, grid_note

    choice = grid_choice(triodes)
    return {**choice, "note": grid_note(choice)}


def type_nominal(db, tube_type, model=None) -> dict:
    """The reference curves of a tube type: ``{"triode", "basis", "kind", "n", "fit_id"}``.

    (a) ``kind="datasheet"``: the current fit of a unit of the type whose measurement was
    digitised from a datasheet plot (its instrument says :data:`DATASHEET_MARK`; the newest
    such measurement); (b) else ``kind="median"``: a model whose every parameter is the
    median of that parameter over the current converged fits of ``model`` of the type's
    sections in stock (:data:`IN_STOCK`, datasheet units left out; at least
    :data:`MIN_MEDIAN_SECTIONS`), labelled as what it is, never as a datasheet.
    """
    import statistics

    from ..ledger import store
    from ..ledger.schema import Section, Tube
    from ..models import get_model
    from ..triode import FittedTriode

    if not isinstance(tube_type, str) or not tube_type.strip():
        raise InputError("give a tube type", field="type")
    with _ledger(db) as ledger, ledger.read() as s:
        tt = store._type(s, tube_type)
        tubes = {t.id: t for t in s.scalars(select(Tube).where(Tube.type_id == tt.id))}
        secs = {x.id: x for x in s.scalars(select(Section).where(Section.tube_id.in_(list(tubes))))} if tubes else {}
        latest = store._latest_fits(s, list(tubes)) if tubes else {}
        sheets, stocked = [], []
        for sid, (m, f) in latest.items():
            if not f.converged:
                continue
            sec = secs[sid]
            t = tubes[sec.tube_id]
            if DATASHEET_MARK in (m.instrument or "").lower():
                sheets.append((m.id, f, t.label, sec.name, m.instrument))
            elif t.status in IN_STOCK and (model is None or f.model == model):
                stocked.append(f)
        if sheets:
            _, f, label, sec_name, instrument = max(sheets, key=lambda x: x[0])
            tri = store.triode_of(f, label, sec_name)
            who = f"{label}:{sec_name}" if sec_name else label
            return {"triode": tri, "kind": "datasheet", "n": 1, "fit_id": f.id, "type": tt.designation,
                    "basis": f"digitised datasheet plot ({who}, {tri.model.name})"}
        if model is None and stocked:
            model = statistics.mode(f.model for f in stocked)
            stocked = [f for f in stocked if f.model == model]
        if len(stocked) < MIN_MEDIAN_SECTIONS:
            raise InputError(f"type {shown(tt.designation)} has no unit digitised from a datasheet plot and "
                             f"{len(stocked)} converged section(s) of the {shown(str(model or 'same'))} model in "
                             f"stock; a nominal needs one or the other (at least {MIN_MEDIAN_SECTIONS} sections)",
                             field="nominal")
        m = get_model(model)
        params = {}
        for name in m.param_names:
            vals = [float(f.params[name]) for f in stocked if name in f.params]
            if vals:
                params[name] = statistics.median(vals)
        tri = FittedTriode(m, params, (), None, tube=f"{tt.designation} nominal", section=None)
        return {"triode": tri, "kind": "median", "n": len(stocked), "fit_id": None, "type": tt.designation,
                "basis": f"median of {len(stocked)} sections in stock ({m.name})"}


def compare_nominal(db, units) -> dict:
    """Tubes of one type (label:section or unit id, at most :data:`MAX_COMPARE` - 1) drawn
    solid against their type's nominal (:func:`type_nominal`), dashed, the basis in the legend
    and the title: ``{"svg": bytes, "basis", "kind", "type"}``."""
    from ..card import load_card
    from ..ledger.schema import Fit, Measurement, Section, Tube, TubeType
    from ..plotting_compare import save_compare_plot

    if not [u for u in units if str(u).strip()]:
        raise InputError("name a tube to draw against its type's nominal", field="units")
    ids = _compared_units(db, units, MAX_COMPARE - 1)
    with _ledger(db) as ledger, ledger.read() as s:
        rows = s.execute(select(Fit.id, Fit.model, TubeType.designation)
                         .join(Measurement, Measurement.id == Fit.measurement_id)
                         .join(Section, Section.id == Measurement.section_id).join(Tube, Tube.id == Section.tube_id)
                         .join(TubeType, TubeType.id == Tube.type_id).where(Fit.id.in_(ids))).all()
    info = {i: (model, tt) for i, model, tt in rows}
    types = sorted({info[i][1] for i in ids})
    if len(types) > 1:
        raise InputError(f"the tubes are of different types ({', '.join(shown(t) for t in types)}); "
                         "a nominal is one type's", field="units")
    nom = type_nominal(db, types[0], model=info[ids[0]][0])
    if nom["fit_id"] in ids:
        raise InputError("that unit is the type's datasheet curves themselves", field="units")
    with _card_files(db, ids) as cards:
        triodes = [load_card(c) for c in cards]
    label = f"nominal: {nom['basis']}"
    with tempfile.TemporaryDirectory(prefix="platebook-compare-") as tmp:
        path = save_compare_plot(triodes + [nom["triode"]], Path(tmp, "compare.svg"),
                                 labels=[t.label for t in triodes] + [label], dashed=[len(triodes)],
                                 title=f"{', '.join(t.label for t in triodes)} against the {types[0]} nominal "
                                       f"({nom['basis']})")
        return {"svg": path.read_bytes(), "basis": nom["basis"], "kind": nom["kind"], "type": types[0],
                "n": nom["n"], "grids": _grids(triodes + [nom["triode"]])}
