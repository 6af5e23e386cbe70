"""The compare page: several tubes' fitted curves on one plot."""

from __future__ import annotations

import base64

from flask import Blueprint, render_template, request

from fitter.errors import InputError
from fitter.service import web_support

from .auth import ledger, need

bp = Blueprint("compare", __name__)


@bp.route("/compare")
@need("viewer")
def index():
    text = request.args.get("units", "")
    units = [u.strip() for u in text.replace(",", " ").split() if u.strip()]
    uri = error = None
    if units:
        try:
            uri = "data:image/svg+xml;base64," + base64.b64encode(web_support.compare_plot(ledger(), units)).decode()
        except InputError as e:
            error = f"{e.field}: {e.message}" if e.field else str(e)
    return render_template("compare.html", title="Compare", text=text, uri=uri, error=error,
                           max_units=web_support.MAX_COMPARE)
