"""The stage page: a common cathode, cathode follower or stack with tubes from the ledger,
its bench report and load-line plot.  Every calculation is a GET URL that reproduces it."""

from __future__ import annotations

import base64

from flask import Blueprint, render_template, request

from fitter.errors import InputError
from fitter.service import web_support

from .auth import ledger, need
from .fields import LABELS, label

bp = Blueprint("stages", __name__)

KINDS = ("common-cathode", "cathode-follower", "stack")
#: what the form shows first (the rest of the fields are under "more")
MAIN = ("b_plus", "ra", "rk", "ck", "rl", "r_top", "r_mid", "vbias", "vneg", "r_upper", "r_lower", "pa_max")


@bp.route("/stage")
@need("viewer")
def index():
    kind = request.args.get("kind", "common-cathode")
    if kind not in KINDS:
        kind = "common-cathode"
    fields = web_support.stage_fields(kind)
    values = {name: request.args.get(name, "") for name, _ in fields}
    out = error = None
    tubes = {k: request.args.get(k, "") for k in ("tube", "bottom", "top")}
    if any(tubes.values()):
        try:
            out = web_support.stage_report(ledger(), kind, values, thd=request.args.get("thd") == "1",
                                           **({"tube": tubes["tube"]} if kind != "stack" else
                                              {"bottom": tubes["bottom"], "top": tubes["top"]}))
            for key in ("plot", "thd"):
                if out.get(key + "_svg"):
                    out[key + "_uri"] = "data:image/svg+xml;base64," + base64.b64encode(out[key + "_svg"]).decode()
        except InputError as e:
            error = f"{label(e.field)}: {e.message}" if e.field else str(e)
        except RuntimeError as e:  # a valid circuit that cannot be solved
            error = f"no solution: {e}"
    main = [(n, d) for n, d in fields if n in MAIN]
    more = [(n, d) for n, d in fields if n not in MAIN]
    return render_template("stage.html", title="Stage", kind=kind, kinds=KINDS, main=main, more=more,
                           values=values, tubes=tubes, out=out, error=error, labels=LABELS)
