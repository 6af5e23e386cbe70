"""The stock page: every tube, filtered, sorted, paginated, with the counts at the top."""

from __future__ import annotations

from flask import Blueprint, current_app, redirect, render_template, request, url_for

from fitter.service import web_support

from .auth import ledger, need

bp = Blueprint("stock", __name__)

SORT_CHOICES = [("label", "label"), ("type", "type"), ("status", "status"), ("grade", "grade"),
                ("created", "date added"), ("ia", "Ia at test point"), ("gm", "gm at test point")]


def _int(name, default):
    try:
        return max(1, int(request.args.get(name, default)))
    except ValueError:
        return default


@bp.route("/")
def home():
    return redirect(url_for("stock.index"))


@bp.route("/stock")
@need("viewer")
def index():
    args = {k: request.args.get(k) or None for k in ("type", "grade", "status")}
    sort = request.args.get("sort", "label")
    desc = request.args.get("desc") == "1"
    d = web_support.stock_page(ledger(), tube_type=args["type"], grade=args["grade"], status=args["status"],
                               sort=sort, descending=desc, page=_int("page", 1),
                               per_page=min(500, _int("per_page", current_app.config["PER_PAGE"])))
    return render_template("stock.html", title="Stock", d=d, args=args, sort=sort, desc=desc,
                           sorts=SORT_CHOICES)
