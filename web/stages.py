"""The stage page: a common cathode, cathode follower or stack with tubes from the ledger,
its bench report and load-line plot; or a type's whole stock as a spread (the figures' min,
median, max and count over every in-stock section, and a plot of the spread).  Every
calculation is a GET URL that reproduces it."""

from __future__ import annotations

import base64

from flask import Blueprint, render_template, request

from fitter.errors import InputError
from fitter.service import stock, web_design, web_support

from .auth import ledger, need
from .fields import LABELS, form_hints, label

bp = Blueprint("stages", __name__)

KINDS = ("common-cathode", "cathode-follower", "stack")
#: what the form shows first (the rest of the fields are under "more")
MAIN = ("b_plus", "ra", "rk", "ck", "rl", "r_top", "r_mid", "vbias", "vneg", "r_upper", "r_lower", "pa_max")


def data_uri(svg: bytes) -> str:
    """An SVG as a data: URI (the page carries its plots; the CSP allows data: images)."""
    return "data:image/svg+xml;base64," + base64.b64encode(svg).decode()


def error_text(e: Exception) -> str:
    """An error for a page: the field in the page's words (web/fields.py), then the message."""
    if isinstance(e, InputError):
        return f"{label(e.field)}: {e.message}" if e.field else str(e)
    return f"no solution: {e}"  # a valid circuit that cannot be solved (StageSolveError)


def tube_types() -> list:
    return [t["type"] for t in stock.types(db=ledger()).data["types"]]


@bp.route("/stage")
@need("viewer")
def index():
    kind = request.args.get("kind", "common-cathode")
    if kind not in KINDS:
        kind = "common-cathode"
    fields = web_support.stage_fields(kind)
    values = {name: request.args.get(name, "") for name, _ in fields}
    out = spread = error = None
    tubes = {k: request.args.get(k, "") for k in ("tube", "bottom", "top")}
    tube_type = request.args.get("type", "").strip()
    circuit = {k: v for k, v in values.items() if v not in (None, "")}
    try:
        if tube_type:
            given = [k for k, v in tubes.items() if v.strip()]
            if given:
                raise InputError("choose tubes or a type's whole stock, not both", field="type")
            spread = web_design.spread_report(ledger(), kind, circuit, tube_type)
            spread["plot_uri"] = data_uri(spread.pop("plot_svg"))
        elif any(tubes.values()):
            out = web_support.stage_report(ledger(), kind, values, thd=request.args.get("thd") == "1",
                                           **({"tube": tubes["tube"]} if kind != "stack" else
                                              {"bottom": tubes["bottom"], "top": tubes["top"]}))
            for key in ("plot", "thd"):
                if out.get(key + "_svg"):
                    out[key + "_uri"] = data_uri(out[key + "_svg"])
    except (InputError, RuntimeError) as e:
        error = error_text(e)
    main, more = split_fields(fields, MAIN)
    return render_template("stage.html", title="Stage", kind=kind, kinds=KINDS, main=main, more=more,
                           values=values, tubes=tubes, out=out, spread=spread, error=error, labels=LABELS,
                           hints=form_hints(kind, fields, web_support.required_fields(kind)),
                           types=tube_types(), tube_type=tube_type)


def split_fields(fields, first) -> tuple:
    """The form's fields shown first, in the order of ``first`` (supply, plate, cathode ...,
    not the stage's own order, which starts with the shared fields), and the rest."""
    main = sorted((f for f in fields if f[0] in first), key=lambda f: first.index(f[0]))
    return main, [f for f in fields if f[0] not in first]
