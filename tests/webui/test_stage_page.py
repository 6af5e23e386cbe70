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
