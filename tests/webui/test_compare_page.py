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
