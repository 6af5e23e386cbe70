"""Design use cases of the web front end on stored units: a stage over a type's whole stock
(the spread), output stages (single-ended, push-pull) and design sweeps.

Everything goes through the other services (:mod:`fitter.service.stages`,
:mod:`~fitter.service.output`, :mod:`~fitter.service.design`) with temporary model cards
written from the ledger, so the web gives the same figures as ``platebook stage --spread``,
``platebook output ... --json`` and ``platebook sweep ... --json``.  Tubes are named as a
person types them (``label:section`` or a unit id, :func:`web_support.resolve_unit`); a
type's stock is its in-stock sections' current fits (:func:`fitter.ledger.store.stock_units`).
No Flask here; every problem is an :class:`~fitter.errors.InputError` naming the field.
"""

from __future__ import annotations

import json
import math
import tempfile
from contextlib import contextmanager
from dataclasses import MISSING, fields
from pathlib import Path

from ..errors import InputError
from ..text import shown
from .stock import _ledger
from .web_support import _card_files, _unit_id, resolve_unit

__all__ = ["OUTPUT_KINDS", "SWEEP_KINDS", "output_fields", "sweep_fields", "stock_cards", "spread_report",
           "output_run", "output_report", "sweep_run", "sweep_report", "MAX_STOCK", "percent", "parse_circuit"]

OUTPUT_KINDS = ("single-ended", "push-pull")
SMALL_KINDS = ("common-cathode", "cathode-follower", "stack")
SWEEP_KINDS = SMALL_KINDS + OUTPUT_KINDS
#: the fields that are words or switches, not numbers
_WORDS = ("top_grid", "output")
_SWITCHES = ("bypassed",)
#: most in-stock sections a spread or a sweep over a stock takes at once
MAX_STOCK = 2000
#: most points of a sweep from the web (the engine takes up to 1000)
MAX_POINTS = 200


def _tubes_of(kind) -> tuple:
    """The tube fields of a kind of stage, in order."""
    return {"stack": ("bottom", "top"), "push-pull": ("tube_a", "tube_b")}.get(kind, ("tube",))


def _kind_class(kind, kinds=SWEEP_KINDS):
    from .output import OUTPUT_KINDS as OUT
    from .stages import KINDS

    if kind not in kinds:
        raise InputError(f"must be one of {', '.join(kinds)}, got {shown(str(kind))!r}", field="kind")
    return OUT[kind] if kind in OUT else KINDS[kind]


def output_fields(kind) -> list:
    """(field, default) of an output stage (single-ended or push-pull), in the stage's order."""
    cls = _kind_class(kind, OUTPUT_KINDS)
    return [(f.name, None if f.default is MISSING else f.default) for f in fields(cls)]


def sweep_fields(kind) -> list:
    """The fields of a kind of stage that a sweep can vary (numbers: resistors, capacitors,
    supplies, bias, limits; not the words or switches), as the sweep service takes them."""
    cls = _kind_class(kind)
    return [f.name for f in fields(cls) if f.name not in _WORDS + _SWITCHES]


def _number(value, name):
    from ..units import parse_value

    if isinstance(value, bool) or not (value is None or isinstance(value, (int, float, str))):
        raise InputError("must be a number", field=name)
    if isinstance(value, str):
        try:
            value = float(parse_value(value))
        except ValueError:
            raise InputError(f"cannot read {shown(value)!r}; give a number such as 100k or 2.2u", field=name) from None
    if value is not None and not math.isfinite(value):
        raise InputError("must be a finite number", field=name)
    return value


def _switch(value, name) -> bool:
    if isinstance(value, bool):
        return value
    text = str(value).strip().lower()
    if text in ("1", "yes", "true", "on"):
        return True
    if text in ("0", "no", "false", "off"):
        return False
    raise InputError(f"must be yes or no, got {shown(str(value))!r}", field=name)


def parse_circuit(circuit) -> dict:
    """The circuit's fields, text in engineering notation read as numbers; empty values left
    out (the stage's default); a switch (``bypassed``) from yes/no.  The field is named."""
    if not isinstance(circuit, dict):
        raise InputError("give the circuit's fields as an object", field="circuit")
    out = {}
    for k, v in circuit.items():
        k = str(k)
        if v is None or (isinstance(v, str) and not v.strip()):
            continue
        if k in _SWITCHES:
            out[k] = _switch(v, k)
        elif k in _WORDS:
            if not isinstance(v, str):
                raise InputError("must be a word", field=k)
            out[k] = v.strip()
        else:
            out[k] = _number(v, k)
    return out


def _fraction(value, name, default):
    """A fraction from a number (as the services take it)."""
    if value is None or (isinstance(value, str) and not value.strip()):
        return default
    v = _number(value, name)
    if not (0 < v < 1):
        raise InputError(f"must be a fraction between 0 and 1, got {v:g}", field=name)
    return v


def percent(value, name, default):
    """A percentage as typed on a page (``5``, ``5%``) -> a fraction."""
    if value is None or (isinstance(value, str) and not value.strip()):
        return default
    text = str(value).strip().rstrip("%").strip()
    try:
        v = float(text)
    except ValueError:
        raise InputError(f"cannot read {shown(str(value))!r}; give a percentage such as 5", field=name) from None
    if not (0 < v < 100):
        raise InputError(f"must lie between 0 and 100 %, got {shown(str(value))!r}", field=name)
    return v / 100.0


def _resolve_tubes(db, kind, given: dict) -> dict:
    """Unit ids of the tubes a kind of stage takes, from ``given`` (label:section or id);
    two positions must be two different sections."""
    ids = {}
    for name in _tubes_of(kind):
        v = given.get(name)
        if v in (None, ""):
            raise InputError("give a tube (label:section, or a unit id)", field=name)
        if isinstance(v, bool) or not isinstance(v, (int, str)):
            raise InputError("give a unit id or label:section", field=name)
        ids[name] = _unit_id(v) if isinstance(v, int) else resolve_unit(db, v, name)
    names = _tubes_of(kind)
    if len(names) == 2 and ids[names[0]] == ids[names[1]]:
        if kind == "push-pull":
            from .output import same_tube_message

            raise InputError(same_tube_message(), field=names[1])
        raise InputError("the two tubes must be two different sections", field=names[1])
    extra = sorted(k for k, v in given.items() if k not in names and v not in (None, ""))
    if extra:
        raise InputError(f"a {kind} stage takes {' and '.join(names)}, not {extra[0]}", field=extra[0])
    return ids


# -- a type's stock ------------------------------------------------------------------------


@contextmanager
def stock_cards(db, tube_type, field="type"):
    """A temporary folder with a model card for each in-stock section of ``tube_type`` (its
    current fit), in label order; yields ``(folder, labels, skipped)``.  No such type, or no
    fitted in-stock section, is an error about ``field``."""
    from ..card import card_dict
    from ..ledger import store

    if not isinstance(tube_type, str) or not tube_type.strip():
        raise InputError("choose a tube type", field=field)
    try:
        with _ledger(db) as ledger:
            info, units, skipped = store.stock_units(ledger, tube_type.strip())
    except InputError as e:
        raise InputError(e.message, field=field) from None
    if not units:
        raise InputError(f"no in-stock tube of type {shown(tube_type)} has a fitted section", field=field)
    if len(units) > MAX_STOCK:
        raise InputError(f"{len(units)} in-stock sections; at most {MAX_STOCK} at once", field=field)
    with tempfile.TemporaryDirectory(prefix="platebook-stock-") as tmp:
        for k, u in enumerate(units):
            Path(tmp, f"unit{k:05d}.json").write_text(json.dumps(card_dict(u, None, ["ledger"]), allow_nan=False))
        yield tmp, [u.label for u in units], skipped


def _spread_rows(res) -> list:
    """The spread's table: one row per figure (those the text report shows, less the gain in
    dB, the gain's own row again), with min, median, max in display units and the count of
    units where it exists.  The input capacitance comes from the tube capacitances of the
    circuit (Cgk, Cga; the cards have none): without them its row says "not given" (``note``,
    no numbers) instead of a spread of zeros."""
    import numpy as np

    from ..stage.circuits import output_node
    from ..stage.results import _describe

    out_node = output_node(res.stage)
    rows = []
    for key, v in res.values.items():
        if key in ("slew_vpeak", "zin", "c_out_node", "gain.grid", "gain." + out_node, "zout." + out_node,
                   "gain_db"):
            continue
        v = np.asarray(v, float)
        ok = np.isfinite(v)
        if not ok.any():
            continue
        _, scale, unit, label = _describe(key)
        if key == "cin" and not (getattr(res.stage, "cgk", 0) or getattr(res.stage, "cga", 0)):
            rows.append({"key": key, "figure": label, "unit": unit, "min": None, "median": None, "max": None,
                         "count": 0, "note": "not given (give the tube capacitances Cgk and Cga)"})
            continue
        rows.append({"key": key, "figure": label, "unit": unit, "min": float(np.min(v[ok]) * scale),
                     "median": float(np.median(v[ok]) * scale), "max": float(np.max(v[ok]) * scale),
                     "count": int(ok.sum())})
    return rows


def spread_report(db, kind, circuit, tube_type) -> dict:
    """A small-signal stage over every in-stock section of ``tube_type``
    (:func:`fitter.service.stages.spread_stage`; a stack pairs each tube's two sections):
    ``{"result": to_dict(), "report", "rows": [{"figure", "unit", "min", "median", "max",
    "count"}], "skipped", "plot_svg"}``."""
    from ..plotting_web import spread_svg
    from .stages import SpreadSpec, spread_stage

    _kind_class(kind, SMALL_KINDS)
    c = parse_circuit(circuit)
    with stock_cards(db, tube_type) as (folder, labels, skipped):
        res = spread_stage(SpreadSpec(kind=kind, circuit=c, cards=folder))
    svg = spread_svg(res, title_type=tube_type)
    return {"result": res.to_dict(), "report": res.report(), "rows": _spread_rows(res), "skipped": skipped,
            "plot_svg": svg, "n_units": len(res.labels), "pairing": res.pairing}


# -- output stages --------------------------------------------------------------------------


def _output_inputs(db, kind, circuit, tubes, thd, loads, level) -> dict:
    """The output request read and checked: the circuit in SI, the tubes' unit ids, thd,
    loads and level (every problem an InputError naming its field)."""
    _kind_class(kind, OUTPUT_KINDS)
    c = parse_circuit(circuit)
    if not isinstance(tubes, dict):
        raise InputError("give the tubes as an object", field="tube")
    ids = _resolve_tubes(db, kind, tubes)
    thd = _fraction(thd, "thd", 0.05)
    if loads is not None:
        if isinstance(loads, str):
            loads = [p for p in loads.split(",")] if loads.strip() else None
        if loads is not None:
            if not isinstance(loads, (list, tuple)) or not loads:
                raise InputError("give reflected loads separated by commas, e.g. 2k,3k,5k", field="loads")
            loads = tuple(_number(x, "loads") for x in loads)
            if any(x is None for x in loads):
                raise InputError("give reflected loads separated by commas, e.g. 2k,3k,5k", field="loads")
    level = 1.0 if level is None or level == "" else _number(level, "level")
    return {"kind": kind, "circuit": c, "ids": ids, "thd": thd, "loads": loads, "level": level}


def _run_output(db, x: dict, response: bool):
    from .output import OutputSpec, run_output

    names = _tubes_of(x["kind"])
    with _card_files(db, [x["ids"][n] for n in names]) as cards:
        spec = OutputSpec(x["kind"], x["circuit"], **dict(zip(names, cards)), thd=x["thd"], loads=x["loads"],
                          level=x["level"], response=bool(response))
        return run_output(spec)


def _key(what: str, x: dict) -> tuple:
    """A cache key of a checked request: stored fits never change, so the unit ids and the
    values fix the answer."""
    return (what,) + tuple((k, tuple(sorted(v.items())) if isinstance(v, dict) else v) for k, v in sorted(x.items()))


def output_run(db, kind, circuit, tubes: dict, thd=None, loads=None, level=None, response=False):
    """An output stage with stored units (:func:`fitter.service.output.run_output`): its
    :class:`~fitter.service.output.OutputRun`, whose ``to_dict()`` is what ``platebook output
    KIND --json`` prints.  ``tubes``: ``{"tube": ...}`` or ``{"tube_a": ..., "tube_b": ...}``
    (label:section or id); ``thd`` a fraction (default 0.05); ``loads`` reflected loads [ohm]
    for the load sweep; ``level`` its output power [W] (default 1)."""
    return _run_output(db, _output_inputs(db, kind, circuit, tubes, thd, loads, level), response)


def output_report(db, kind, circuit, tubes: dict, thd=None, loads=None, level=None, cache=None) -> dict:
    """:func:`output_run` with the frequency response, for a page: ``{"result": to_dict(),
    "report", "panels_svg": [...], "response_svg"}``; ``panels_svg`` holds the plots of
    :func:`fitter.plotting_output.plot_output` one panel each (load lines, harmonics against
    power, the push-pull's composite characteristic, the load sweep).  With ``cache`` (an
    object with ``get(key, make)``, such as :class:`web.plots.PlotCache`) the answer is kept
    by the unit ids and values asked for."""
    x = _output_inputs(db, kind, circuit, tubes, thd, loads, level)

    def make():
        from ..plotting_web import output_panels, response_svg

        run = _run_output(db, x, response=True)
        panels = output_panels(run, "svg")
        resp = response_svg(run.frequency)
        return {"result": run.to_dict(), "report": run.report(), "panels_svg": panels, "response_svg": resp}

    out = cache.get(_key("output", x), make) if cache is not None else make()
    return dict(out)


# -- design sweeps ---------------------------------------------------------------------------


def _points(value):
    if value is None or value == "":
        return 20
    if isinstance(value, bool):
        raise InputError("must be a whole number", field="points")
    try:
        n = int(str(value).strip()) if not isinstance(value, int) else value
    except ValueError:
        raise InputError(f"must be a whole number, got {shown(str(value))!r}", field="points") from None
    if not 2 <= n <= MAX_POINTS:
        raise InputError(f"must be 2 to {MAX_POINTS}, got {n}", field="points")
    return n


def _sweep_inputs(db, kind, vary, start, stop, points, log, circuit, tubes, tube_type, thd_limit, level,
                  slew_vpeak) -> dict:
    """The sweep request read and checked (every problem an InputError naming its field);
    tubes as unit ids (``ids``), or ``tube_type`` for a type's stock."""
    _kind_class(kind)
    if not isinstance(vary, str) or not vary.strip():
        raise InputError("choose the field to sweep", field="vary")
    vary = vary.strip()
    if vary not in sweep_fields(kind):
        raise InputError(f"a {kind} stage has no field {shown(vary)!r} to sweep; fields: "
                         + ", ".join(sweep_fields(kind)), field="vary")
    lo, hi = _number(start, "start"), _number(stop, "stop")
    for name, v in (("start", lo), ("stop", hi)):
        if v is None:
            raise InputError("give the range's " + name, field=name)
    n = _points(points)
    log = _switch(log, "log") if log not in (None, "") else False
    c = {k: v for k, v in parse_circuit(circuit or {}).items() if k != vary}
    output = kind in OUTPUT_KINDS
    common = {"thd_limit": _fraction(thd_limit, "thd_limit", 0.05 if output else 0.01),
              "level": None if level in (None, "") else _number(level, "level")}
    if not output:
        common["slew_vpeak"] = 10.0 if slew_vpeak in (None, "") else _number(slew_vpeak, "slew_vpeak")
    x = {"kind": kind, "vary": vary, "start": lo, "stop": hi, "points": n, "log": log, "circuit": c,
         "common": common, "ids": None, "type": None}
    tubes = {k: v for k, v in (tubes or {}).items() if v not in (None, "")}
    if tube_type not in (None, ""):
        if tubes:
            raise InputError("a sweep over a type's stock takes its tubes from the stock; leave out the tubes",
                             field=sorted(tubes)[0])
        x["type"] = tube_type
    else:
        x["ids"] = _resolve_tubes(db, kind, tubes)
    return x


def _run_sweep(db, x: dict):
    from .design import SweepSpec, stage_sweep

    head = (x["kind"], x["vary"], x["start"], x["stop"], x["points"], x["log"], x["circuit"])
    if x["type"] is not None:
        with stock_cards(db, x["type"]) as (folder, _, _):
            return stage_sweep(SweepSpec(*head, cards=folder, **x["common"]))
    names = _tubes_of(x["kind"])
    with _card_files(db, [x["ids"][k] for k in names]) as cards:
        return stage_sweep(SweepSpec(*head, **dict(zip(names, cards)), **x["common"]))


def sweep_run(db, kind, vary, start, stop, points=None, log=False, circuit=None, tubes=None, tube_type=None,
              thd_limit=None, level=None, slew_vpeak=None):
    """A design sweep with stored units (:func:`fitter.service.design.stage_sweep`): one tube
    (or two, for a stack or a push-pull), or every in-stock section of ``tube_type``.  Its
    :class:`~fitter.stage.sweeps.ComponentSweep`, whose ``to_dict()`` is what ``platebook
    sweep KIND --json`` prints.  ``thd_limit`` a fraction (default 1 %, output stages 5 %);
    ``level`` the THD column's output [V peak, or W for an output stage]."""
    return _run_sweep(db, _sweep_inputs(db, kind, vary, start, stop, points, log, circuit, tubes, tube_type,
                                        thd_limit, level, slew_vpeak))


def sweep_report(db, kind, vary, start, stop, points=None, log=False, circuit=None, tubes=None, tube_type=None,
                 thd_limit=None, level=None, slew_vpeak=None, name=lambda f: f, cache=None) -> dict:
    """:func:`sweep_run` for a page: ``{"result": to_dict(), "report" (fields named by
    ``name``), "table": {"head": [...], "rows": [[cell, ...]]}, "plot_svg"}``; with a stock
    each cell is the median with the min..max range.  With ``cache`` (``get(key, make)``), a
    sweep of named tubes is kept by their unit ids and the values (a stock's sweep is not:
    the stock changes)."""
    x = _sweep_inputs(db, kind, vary, start, stop, points, log, circuit, tubes, tube_type, thd_limit, level,
                      slew_vpeak)

    def make():
        from ..plotting_web import sweep_svg

        sw = _run_sweep(db, x)
        svg = sweep_svg(sw)
        return {"result": sw.to_dict(), "report": sw.report(name), "table": _sweep_table(sw), "plot_svg": svg,
                "n_units": sw.n_units}

    if cache is None or x["type"] is not None:
        return make()
    flat = {k: v for k, v in x.items() if k != "common"}
    flat.update(x["common"])
    return dict(cache.get(_key("sweep", flat), make))


def _cell(x) -> str:
    if x is None or not math.isfinite(x):
        return "-"
    if abs(x) >= 1e4:  # "10.52k", not "1.052e+04"
        from ..units import format_value

        return format_value(float(x))
    return f"{x:.4g}"


def _sweep_table(sw) -> dict:
    from ..stage.results import _eng
    from ..stage.sweeps import _unit_of

    many = sw.n_units > 1
    head = []
    for k in sw.figure_names:
        unit, _ = sw.figure_unit(k)
        head.append(sw.figure_label(k) + (f" [{unit}]" if unit else ""))
    stats = {k: sw.stats(k) for k in sw.figure_names}
    rows = []
    for i, v in enumerate(sw.values):
        cells = []
        for k in sw.figure_names:
            _, scale = sw.figure_unit(k)
            lo, med, hi = (float(s[i]) * scale for s in stats[k])
            cells.append(f"{_cell(med)} [{_cell(lo)}..{_cell(hi)}]" if many else _cell(med))
        rows.append([_eng(float(v), _unit_of(sw.field))] + cells)
    return {"field": sw.field, "head": head, "rows": rows, "many": many}
