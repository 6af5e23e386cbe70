"""A tube's page (sections, history, fits drawn over their points, figures at a point the
user types, downloads) and its plots and files."""

from __future__ import annotations

from flask import Blueprint, Response, current_app, render_template, request

from fitter.errors import InputError
from fitter.service import web_support

from .auth import ledger, need

bp = Blueprint("tubes", __name__)


@bp.route("/tube/<path:label>")
@need("viewer")
def tube(label):
    d = web_support.tube_page(ledger(), label)
    point = None
    point_error = None
    va, vg = request.args.get("va", ""), request.args.get("vg", "")
    at = request.args.get("unit", "")
    if va or vg:
        try:
            point = web_support.figures_at(ledger(), at, va, vg)
        except InputError as e:  # shown beside the form, the page still renders
            point_error = f"{e.field or ''}: {e.message}" if e.field else str(e)
    units = d["units"]
    return render_template("tube.html", title=f"Tube {d['label']}", d=d, units=units, point=point,
                           point_error=point_error, va=va, vg=vg, at=at)


@bp.route("/unit/<int:fit_id>/plot.<fmt>")
@need("viewer")
def plot(fit_id, fmt):
    if fmt not in ("svg", "png"):
        raise InputError("plots are svg or png", field="format")
    data = current_app.extensions["platebook.plots"].get((fit_id, fmt),
                                                         lambda: web_support.fit_plot(ledger(), fit_id, fmt))
    resp = Response(data, mimetype="image/svg+xml" if fmt == "svg" else "image/png")
    resp.headers["Cache-Control"] = "private, max-age=86400"
    return resp


@bp.route("/unit/<int:fit_id>/download/<fmt>")
@need("viewer")
def download(fit_id, fmt):
    name, text = web_support.unit_export(ledger(), fit_id, fmt)
    mime = {"json": "application/json", "spice": "text/plain", "csv": "text/csv"}[fmt]
    resp = Response(text, mimetype=mime)
    resp.headers["Content-Disposition"] = f'attachment; filename="{name}"'
    return resp
