"""The digitising pages: upload a datasheet plot (picker or drop) and list the plots being
worked on; the work page, whose script (static/digitise.js) runs the steps through the JSON
API (/api/v1/plots/..., signed in by the session, the CSRF token in an X-CSRF-Token header)."""

from __future__ import annotations

from flask import Blueprint, abort, g, redirect, render_template, request, url_for

from fitter.errors import InputError
from fitter.models import MODELS
from fitter.service import digitise, stock

from .auth import ledger, need

bp = Blueprint("digitise", __name__)


def _index(**extra):
    return render_template("digitise_index.html", title="Digitise a plot", plots=digitise.list_plots(ledger()),
                           max_mb=_max_mb(), **extra)


def _max_mb():
    from fitter.digitise import MAX_IMAGE_BYTES

    return MAX_IMAGE_BYTES // 1_000_000


@bp.route("/digitise", methods=["GET"])
@need("editor")
def index():
    return _index()


@bp.route("/digitise", methods=["POST"])
@need("editor")
def upload():
    f = request.files.get("file")
    if f is None or not (f.filename or ""):
        return _index(error="Choose an image file (PNG or JPEG) first."), 400
    try:
        d = digitise.upload_plot(ledger(), g.user["name"], f.filename, f.read())
    except InputError as e:
        return _index(error=e.message), 400
    return redirect(url_for("digitise.work", plot_id=d["id"]))


@bp.route("/digitise/<int:plot_id>", methods=["GET"])
@need("editor")
def work(plot_id):
    try:
        d = digitise.plot_info(ledger(), plot_id)
    except InputError as e:
        if e.field == "id":
            abort(404)
        raise
    types = [t["type"] for t in stock.types(db=ledger()).data["types"]]
    return render_template("digitise.html", title=f"Digitise {d['name']}", d=d, types=types, models=list(MODELS))
