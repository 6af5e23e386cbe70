"""The matching page: a type's unreserved stock matched at a position into pairs, quads or
bottle pairs, with grades; editors reserve the groups they accept for an order; labels to
print.  A match has a URL (GET parameters) that reproduces it."""

from __future__ import annotations

from flask import Blueprint, g, render_template, request

from fitter.errors import InputError
from fitter.service import stock, web_support

from .auth import ledger, need

bp = Blueprint("matching", __name__)

GROUPS = ("pairs", "quads", "bottles")


def _number(args, name, default=None):
    text = (args.get(name) or "").strip()
    if not text:
        return default
    try:
        return float(text)
    except ValueError:
        raise InputError(f"must be a number, got {text!r}", field=name) from None


def _params(args):
    return {"tube_type": args.get("type", ""), "group": args.get("group", "pairs"),
            "va": _number(args, "va"), "vg": _number(args, "vg"),
            "tolerance_pct": _number(args, "tolerance", 5.0), "include_weak": args.get("weak") == "1"}


@bp.route("/match")
@need("viewer")
def index():
    types = stock.types(db=ledger()).data["types"]
    d = error = None
    if request.args.get("type"):
        try:
            d = stock.match(db=ledger(), **_params(request.args)).data
        except InputError as e:
            error = f"{e.field}: {e.message}" if e.field else str(e)
    t = web_support.match_table(d) if d else None
    return render_template("match.html", title="Matching", types=types, d=d, t=t, error=error, args=request.args,
                           groups=GROUPS)


@bp.route("/match/reserve", methods=["POST"])
@need("editor")
def reserve():
    form = request.form
    accept = [int(x) for x in form.getlist("accept") if x.isdigit()]
    if not accept:
        raise InputError("tick at least one group to reserve", field="accept")
    d = stock.match(db=ledger(), user=g.user["name"], reserve_order=form.get("order", "").strip(), accept=accept,
                    **_params(form)).data
    return render_template("reserved.html", title="Reserved", d=d)


@bp.route("/group/<int:group_id>/labels")
@need("viewer")
def labels(group_id):
    d = stock.labels(db=ledger(), group_id=group_id).data
    return render_template("labels.html", title=f"Labels of group {group_id}", d=d)


