"""The compare page: several tubes' fitted curves on one plot, or tubes against their type's
nominal curves (a digitised datasheet plot, else the median of the stock)."""

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
    nominal = request.args.get("nominal") == "1"
    units = [u.strip() for u in text.replace(",", " ").split() if u.strip()]
    uri = error = basis = grids = None
    if units or nominal:
        try:
            if nominal:
                d = web_support.compare_nominal(ledger(), units)
                basis = d
            else:
                d = web_support.compare_page(ledger(), units)
            svg, grids = d["svg"], d["grids"]
            uri = "data:image/svg+xml;base64," + base64.b64encode(svg).decode()
        except InputError as e:
            error = f"{e.field}: {e.message}" if e.field else str(e)
    return render_template("compare.html", title="Compare", text=text, uri=uri, error=error, nominal=nominal,
                           basis=basis, grids=grids, max_units=web_support.MAX_COMPARE,
                           min_sections=web_support.MIN_MEDIAN_SECTIONS)
