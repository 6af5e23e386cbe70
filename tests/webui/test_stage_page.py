"""The stage page: tubes from the ledger by label:section, the report equal to the stage
service's, a plot, field errors named, and a stack refusing the same section twice."""

from __future__ import annotations

from fitter import CAUTION
from fitter.service import web_support


def test_common_cathode_report_is_the_services_report(signed_in, stocked):
    c = signed_in("viewer")
    q = "kind=common-cathode&tube=W01:A&b_plus=300&ra=100k&rk=1.5k&ck=22u&rl=470k"
    html = c.get("/stage?" + q).get_data(as_text=True)
    want = web_support.stage_report(stocked[0], "common-cathode",
                                    {"b_plus": "300", "ra": "100k", "rk": "1.5k", "ck": "22u", "rl": "470k"},
                                    tube="W01:A")
    import html as h

    assert h.escape(want["report"]).replace("&#x27;", "&#39;") in html
    assert 'src="data:image/svg+xml;base64,' in html and CAUTION in html


def test_mu_follower_with_two_sections_of_one_bottle(signed_in):
    html = signed_in("viewer").get("/stage?kind=stack&bottom=W02:A&top=W02:B&b_plus=300&rk=1k&r_top=1k"
                                   "&r_mid=47k").get_data(as_text=True)
    assert 'class="report"' in html and 'class="error"' not in html
    assert "W02:A" in html and "W02:B" in html  # both sections named in the report


def test_a_stack_refuses_the_same_section_twice_and_bad_values_are_named(signed_in):
    c = signed_in("viewer")
    html = c.get("/stage?kind=stack&bottom=W02:A&top=W02:A&b_plus=300&rk=1k&r_top=1k").get_data(as_text=True)
    # errors name the field by the form's own label (web/fields.py)
    assert "top tube: the bottom and the top must be two different sections" in html
    html = c.get("/stage?kind=common-cathode&tube=W01:A&b_plus=300&ra=lots&rk=1k").get_data(as_text=True)
    assert "Ra [Ω]: cannot read" in html
    html = c.get("/stage?kind=common-cathode&tube=W01:Z&b_plus=300&ra=100k&rk=1k").get_data(as_text=True)
    assert "tube: no fitted section" in html


def test_thd_sweep_plot_and_report_on_request(signed_in, stocked):
    c = signed_in("viewer")
    q = "kind=common-cathode&tube=W01:A&b_plus=300&ra=100k&rk=1.5k&ck=22u&rl=470k"
    assert "THD against level</h2>" not in c.get("/stage?" + q).get_data(as_text=True)
    html = c.get("/stage?" + q + "&thd=1").get_data(as_text=True)
    assert "THD against level</h2>" in html and html.count('src="data:image/svg+xml;base64,') == 2
    want = web_support.stage_report(stocked[0], "common-cathode",
                                    {"b_plus": "300", "ra": "100k", "rk": "1.5k", "ck": "22u", "rl": "470k"},
                                    tube="W01:A", thd=True)["thd_report"]  # the distortion service's sweep
    assert want.splitlines()[0] in html


def _form_fields(html):
    """(name, placeholder, hint) of each circuit field of a page's form, in the page's order."""
    import html as h
    import re

    return [(n, h.unescape(p), h.unescape(t)) for n, p, t in re.findall(
        r'<input name="([a-z_0-9]+)" value="[^"]*" size="8" placeholder="([^"]*)"><small class="fhint">([^<]*)</small>',
        html)]


def test_the_stage_form_shows_each_fields_default_and_what_an_empty_ck_means(signed_in):
    from dataclasses import fields

    from fitter.stage import CommonCathode, Stack

    c = signed_in("viewer")
    html = c.get("/stage?kind=common-cathode").get_data(as_text=True)
    form = _form_fields(html)
    # every field of the stage, by its own name (the API and the page's address use them)
    assert sorted(n for n, _, _ in form) == sorted(f.name for f in fields(CommonCathode))
    hints = {n: (p, t) for n, p, t in form}
    # supply, plate, cathode first: not the dataclass's order, which starts with the shared fields
    assert [n for n, _, _ in form][:5] == ["b_plus", "ra", "rk", "ck", "rl"]
    assert hints["b_plus"] == ("", "required") and hints["ra"] == ("", "required")
    assert hints["rk"] == ("0", "default 0") and hints["rg"] == ("1M", "default 1M")  # CommonCathode's defaults
    assert hints["ck"] == ("", "empty: Rk unbypassed")  # CommonCathode: ck None means Rk unbypassed
    assert hints["pa_max"] == ("", "empty: not checked")
    assert "An empty Ck means the cathode resistor is unbypassed" in html
    html = c.get("/stage?kind=stack").get_data(as_text=True)
    hints = {n: (p, t) for n, p, t in _form_fields(html)}
    assert set(hints) == {f.name for f in fields(Stack)}
    assert hints["ck"][1] == "empty: Rk unbypassed" and hints["r_top"][1] == "required"
    assert hints["top_grid"] == ("tied", "default tied")
    # a cathode follower has no Ck, and the page does not talk about one
    html = c.get("/stage?kind=cathode-follower").get_data(as_text=True)
    assert "An empty Ck" not in html and "ck" not in {n for n, _, _ in _form_fields(html)}
    # the values given stay in the form, and an empty Ck is solved, and reported, as unbypassed
    html = c.get("/stage?kind=common-cathode&tube=W01:A&b_plus=300&ra=100k&rk=1.5k").get_data(as_text=True)
    assert '<input name="ra" value="100k"' in html and "Rk 1.5k unbypassed" in html


def test_output_and_sweep_forms_show_defaults_too(signed_in):
    c = signed_in("viewer")
    hints = {n: t for n, _, t in _form_fields(c.get("/output?kind=single-ended").get_data(as_text=True))}
    # an output stage's empty Ck is an ideal bypass (fitter/stage/output.py), not an unbypassed Rk
    assert hints["ck"] == "empty: an ideal bypass" and hints["b_plus"] == "required"
    assert hints["speaker"] == "default 8" and hints["load"] == "empty: from the turns ratio"
    hints = {n: t for n, _, t in _form_fields(c.get("/sweep?kind=common-cathode").get_data(as_text=True))}
    assert hints["ck"] == "empty: Rk unbypassed" and hints["vhk_max"] == "default 100"
