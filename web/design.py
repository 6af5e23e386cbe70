"""The design pages: output stages (single-ended and push-pull with tubes from the ledger:
the report, the load-line and power/THD plots, the frequency response) and design sweeps
(any sweepable field of a small-signal or output stage over a range, for one tube or a
type's stock: the table and the sweep plot).  Every calculation is a GET URL that
reproduces it; views parse the request, call :mod:`fitter.service.web_design`, render."""

from __future__ import annotations

from flask import Blueprint, current_app, render_template, request

from fitter.errors import InputError
from fitter.service import web_design, web_support

from .auth import ledger, need
from .fields import LABELS, form_hints, label
from .stages import data_uri, error_text, split_fields, tube_types

bp = Blueprint("design", __name__)

#: the output stage's fields the form shows first (the rest, the response's, under "more")
OUTPUT_MAIN = ("b_plus", "load", "turns_ratio", "speaker", "r_primary", "grid_bias", "rk", "bypassed", "pa_max")
SMALL_MAIN = ("b_plus", "ra", "rk", "ck", "rl", "r_top", "r_mid", "vbias", "vneg", "r_upper", "r_lower", "pa_max")


def _cache():
    """The design pages' own small cache (their answers are larger than a fit plot)."""
    from .plots import PlotCache

    return current_app.extensions.setdefault("platebook.design", PlotCache(32))


def _kind(allowed, default):
    kind = request.args.get("kind", default)
    return kind if kind in allowed else default


def _fields(kind):
    return web_design.output_fields(kind) if kind in web_design.OUTPUT_KINDS else web_support.stage_fields(kind)


def _tube_names(kind):
    return {"stack": ("bottom", "top"), "push-pull": ("tube_a", "tube_b")}.get(kind, ("tube",))


@bp.route("/output")
@need("viewer")
def output():
    kind = _kind(web_design.OUTPUT_KINDS, "single-ended")
    fields = _fields(kind)
    values = {name: request.args.get(name, "") for name, _ in fields}
    extra = {k: request.args.get(k, "") for k in ("thd", "loads", "level")}
    tubes = {k: request.args.get(k, "") for k in _tube_names(kind)}
    out = error = None
    if any(v.strip() for v in tubes.values()):
        try:
            out = web_design.output_report(ledger(), kind, values, tubes,
                                           thd=web_design.percent(extra["thd"], "thd", 0.05),
                                           loads=extra["loads"] or None, level=extra["level"] or None,
                                           cache=_cache())
            out["panel_uris"] = [data_uri(svg) for svg in out.pop("panels_svg")]
            out["response_uri"] = data_uri(out.pop("response_svg"))
        except (InputError, RuntimeError) as e:
            error = error_text(e)
    main, more = split_fields(fields, OUTPUT_MAIN)
    return render_template("output.html", title="Output stage", kind=kind, kinds=web_design.OUTPUT_KINDS,
                           main=main, more=more, values=values, extra=extra, tubes=tubes, out=out, error=error,
                           labels=LABELS, hints=form_hints(kind, fields, web_support.required_fields(kind)))


@bp.route("/sweep")
@need("viewer")
def sweep():
    kind = _kind(web_design.SWEEP_KINDS, "common-cathode")
    output = kind in web_design.OUTPUT_KINDS
    fields = _fields(kind)
    values = {name: request.args.get(name, "") for name, _ in fields}
    a = request.args
    rng = {k: a.get(k, "") for k in ("vary", "start", "stop", "points", "thd_limit", "level", "slew_vpeak")}
    log = a.get("log") == "1"
    tubes = {k: a.get(k, "") for k in _tube_names(kind)}
    tube_type = a.get("type", "").strip()
    out = error = None
    if rng["vary"] and (tube_type or any(v.strip() for v in tubes.values())):
        try:
            out = web_design.sweep_report(
                ledger(), kind, rng["vary"], rng["start"], rng["stop"], rng["points"] or None, log, values,
                tubes, tube_type or None, thd_limit=web_design.percent(rng["thd_limit"], "thd_limit", None),
                level=rng["level"] or None, slew_vpeak=None if output else (rng["slew_vpeak"] or None),
                name=label, cache=_cache())
            out["plot_uri"] = data_uri(out.pop("plot_svg"))
        except (InputError, RuntimeError) as e:
            error = error_text(e)
    main_names = OUTPUT_MAIN if output else SMALL_MAIN
    main, more = split_fields(fields, main_names)
    return render_template("sweep.html", title="Design sweep", kind=kind, kinds=web_design.SWEEP_KINDS,
                           output=output, sweepable=web_design.sweep_fields(kind), main=main, more=more,
                           values=values, rng=rng, log=log, tubes=tubes, types=tube_types(), tube_type=tube_type,
                           out=out, error=error, labels=LABELS,
                           hints=form_hints(kind, fields, web_support.required_fields(kind)))
