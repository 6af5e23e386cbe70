"""The compare page: several sections' curves on one plot; input errors named."""

from __future__ import annotations

import base64
import re

from fitter import CAUTION


def test_compare_draws_one_plot_with_every_named_section(signed_in):
    html = signed_in("viewer").get("/compare?units=W01:A+W02:B,W03:A").get_data(as_text=True)
    assert CAUTION in html
    m = re.search(r'src="data:image/svg\+xml;base64,([^"]+)"', html)
    assert m
    svg = base64.b64decode(m.group(1)).decode()
    for label in ("W01:A", "W02:B", "W03:A"):  # each unit in the legend
        assert label in svg
    assert "3 units compared" in svg


def test_compare_errors_are_named(signed_in):
    c = signed_in("viewer")
    assert "units: name at least two tubes" in c.get("/compare?units=W01:A").get_data(as_text=True)
    assert "units: a tube appears twice" in c.get("/compare?units=W01:A+W01:A").get_data(as_text=True)
    assert "units: no tube labelled" in c.get("/compare?units=W01:A+NOPE:A").get_data(as_text=True)


def _caption(html):
    import html as h

    m = re.search(r'<figcaption class="hint">([^<]*)</figcaption>', html)
    assert m, "no caption under the plot"
    return h.unescape(m.group(1))


def _svg(html):
    return base64.b64decode(re.search(r'src="data:image/svg\+xml;base64,([^"]+)"', html).group(1)).decode()


def test_the_caption_names_the_grid_voltages_drawn(signed_in):
    # the invented stock is traced at 0..-24 V in 4 V steps (webtools.make_stock): seven, all drawn
    html = signed_in("viewer").get("/compare?units=W01:A+W02:B").get_data(as_text=True)
    assert _caption(html) == "Drawn at every grid voltage W01:A was measured at: 0, -4, -8, -12, -16, -20, -24 V."
    assert "Not drawn" not in _svg(html)


def test_grid_voltages_left_out_for_legibility_are_named(fresh_signed_in, fresh):
    from pathlib import Path

    from fitter.service import stock

    curves = Path(__file__).resolve().parents[2] / "curves"
    stock.add_type(fresh, "setup", "MM", 250.0, -8.5)  # the demo stock's type (curves/make_demo.py)
    stock.import_files(fresh, "setup", [str(curves / "stock_medium_mu.csv")], "MM")
    c = fresh_signed_in("viewer")
    for q in ("units=MM-01:A+MM-02:A+MM-05:B", "units=MM-01:A&nominal=1"):
        html = c.get("/compare?" + q).get_data(as_text=True)
        # the demo stock is traced at 0..-18 V in 2 V steps: ten, more than the plot draws
        assert _caption(html) == ("Drawn at every second of the 10 grid voltages MM-01:A was measured at: "
                                  "0, -4, -8, -12, -16 V; -2, -6, -10, -14, -18 V left out for legibility.")
        svg = _svg(html)
        assert "Not drawn, for legibility" in svg and "0, -4, -8, -12, -16 V" in svg
