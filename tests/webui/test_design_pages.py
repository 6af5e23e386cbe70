"""The design pages and their API: a stage over a type's whole stock (spread), output stages
(single-ended, push-pull with two tubes) and design sweeps; each page's figures against the
command line run independently on model cards fetched through the API, errors naming the
field in the page's words (web/fields.py), viewers allowed, the signed-out refused.

Data are INVENTED (tests/webui/webtools.py: 12AU7-like dual triodes, three tubes W01..W03).
The circuits are small-signal-triode versions of common practice (250-300 V, 10 kohm
reflected load, fixed bias at the type's test point -8.5 V)."""

from __future__ import annotations

import html as htmllib
import json
import re
import subprocess
import sys

import pytest

from fitter import CAUTION
from fitter.service import stock, web_design, web_support

from .webtools import token_for

PLATEBOOK = [sys.executable, "-m", "fitter"]
SECTIONS = [f"W0{k}:{s}" for k in (1, 2, 3) for s in ("A", "B")]  # the invented stock (conftest.py)
SE = "b_plus=250&load=10k&grid_bias=-8.5&pa_max=2.75"
SE_CLI = ["--bplus", "250", "--load", "10k", "--bias", "-8.5", "--pa-max", "2.75"]


def _auth(token):
    return {"Authorization": f"Bearer {token}"}


def _cli(args) -> dict:
    r = subprocess.run(PLATEBOOK + args + ["--json"], capture_output=True, text=True)
    assert r.returncode == 0, r.stderr
    return json.loads(r.stdout)


def _numbers(d, prefix=""):
    out = {}
    if isinstance(d, list):
        for i, v in enumerate(d):
            out.update(_numbers(v, f"{prefix}{i}."))
    elif isinstance(d, dict):
        for k, v in d.items():
            out.update(_numbers(v, prefix + k + "."))
    elif isinstance(d, (int, float)) and not isinstance(d, bool):
        out[prefix.rstrip(".")] = d
    return out


def _same_figures(a, b):
    x, y = _numbers(a), _numbers(b)
    assert x.keys() == y.keys() and len(x) > 10
    for k in x:
        assert x[k] == pytest.approx(y[k], rel=1e-9, abs=1e-12), k


@pytest.fixture
def cards(stocked, app, tmp_path):
    """cards(labels) -> paths of the model cards of those sections, fetched through the API."""
    db = stocked[0]
    client = app.test_client()
    tok = token_for(db, "viewer")

    def get(labels, folder="cards"):
        (tmp_path / folder).mkdir(exist_ok=True)
        paths = []
        for lab in labels:
            uid = web_support.resolve_unit(db, lab)
            p = tmp_path / folder / (lab.replace(":", "_") + ".json")
            p.write_text(client.get(f"/api/v1/units/{uid}/card", headers=_auth(tok)).get_data(as_text=True))
            paths.append(str(p))
        return paths

    return get


def _errors(html):
    return [htmllib.unescape(e) for e in re.findall(r'class="error">([^<]*)<', html)]


def test_two_fits_of_one_tube_are_no_push_pull_pair(fresh, fresh_signed_in, fresh_app, synth, tube_types,
                                                      write_long, tmp_path):
    """Two unit ids of one section (its first fit and a re-fit) are one tube: the output service
    refuses them for tube B on the page and in the API (common practice: a pair is two tubes)."""
    from .webtools import make_stock

    stock.import_files(fresh, "setup", [str(make_stock(synth, tube_types, write_long, tmp_path / "s.csv",
                                                       n_tubes=1))], "DT")
    first = stock.show_tube(fresh, "W01").data["sections"][0]["fit_id"]
    r = stock.refit(fresh, "setup", "DT", jobs=1)
    assert not r.data["failed"], r.data
    again = web_support.resolve_unit(fresh, "W01:A")
    assert again != first
    page = fresh_signed_in("viewer").get(f"/output?kind=push-pull&tube_a={first}&tube_b={again}&b_plus=250"
                                         "&load=20k&grid_bias=-8.5").get_data(as_text=True)
    assert _errors(page) == ["tube B: the same tube as tube A (W01:A); a push-pull pair is two different tubes"]
    r = fresh_app.test_client().post("/api/v1/output", headers=_auth(token_for(fresh, "viewer")), json={
        "kind": "push-pull", "circuit": {"b_plus": 250, "load": "20k", "grid_bias": -8.5}, "tube_a": first,
        "tube_b": again})
    assert r.status_code == 400 and r.get_json()["errors"][0]["field"] == "tube_b"
    # the other section of the same bottle is another tube: a pair
    page = fresh_signed_in("viewer").get(f"/output?kind=push-pull&tube_a={first}&tube_b=W01:B&b_plus=250"
                                         "&load=20k&grid_bias=-8.5").get_data(as_text=True)
    assert _errors(page) == [] and "DC imbalance" in page


# -- the stage page's spread ---------------------------------------------------------------


def test_spread_of_a_type_is_the_command_lines_spread_over_its_cards(signed_in, cards, tmp_path):
    c = signed_in("viewer")
    r = c.get("/stage?kind=common-cathode&type=DT&b_plus=300&ra=100k&rk=1.5k&ck=22u")
    page = r.get_data(as_text=True)
    assert r.status_code == 200 and not _errors(page) and CAUTION in page
    assert "Spread over 6 sections of type DT" in page
    assert page.count('src="data:image/svg+xml;base64,') == 1
    cards(SECTIONS)
    cli = _cli(["stage", "common-cathode", "--spread", str(tmp_path / "cards"), "--bplus", "300", "--ra", "100k",
                "--rk", "1.5k", "--ck", "22u"])
    assert cli["n_units"] == 6
    rows = re.findall(r"<tr><td>mid-band gain</td><td></td><td class=\"num\">([^<]+)</td><td class=\"num\">([^<]+)"
                      r"</td><td class=\"num\">([^<]+)</td><td class=\"num\">(\d+)</td>", page)
    assert rows, "no gain row in the spread table"
    g = cli["figures"]["gain"]
    assert rows[0] == (f"{g['min']:.4g}", f"{g['median']:.4g}", f"{g['max']:.4g}", "6")
    ia = cli["figures"]["ia_ma"]
    assert f"<td>standing current</td><td>mA</td><td class=\"num\">{ia['min']:.4g}</td>" in page
    # textbook check (bypassed common cathode, no load: gain = -mu Ra / (Ra + rp), Radiotron
    # Designer's Handbook, from memory) with the median tube's own mu and rp from the table
    mu = cli["figures"]["tube.mu"]["median"]
    rp = cli["figures"]["tube.rp_ohm"]["median"]
    assert g["median"] == pytest.approx(-mu * 100e3 / (100e3 + rp), rel=0.02)


def _spread_table(page) -> dict:
    """figure -> the cells after its unit in the spread table (numbers, or one note)."""
    body = page[page.index('class="grid spread"'):]
    body = body[:body.index("</table>")]
    rows = re.findall(r"<tr><td>([^<]*)</td><td>[^<]*</td>(.*?)</tr>", body)
    out = {}
    for fig, cells in rows:
        assert fig not in out, f"{fig} appears twice in the spread table"
        out[fig] = [htmllib.unescape(c) for c in re.findall(r"<td[^>]*>([^<]*)</td>", cells)]
    return out


def test_spread_table_shows_each_figure_once_and_no_input_capacitance_it_does_not_know(signed_in):
    c = signed_in("viewer")
    table = _spread_table(c.get("/stage?kind=common-cathode&type=DT&b_plus=300&ra=100k&rk=1.5k&ck=22u")
                          .get_data(as_text=True))
    assert "mid-band gain" in table  # once (the dB row was the same gain again)
    # the cards carry no capacitances and the circuit gives none: not a spread of zeros
    assert table["input capacitance"] == ["not given (give the tube capacitances Cgk and Cga)"]
    table = _spread_table(c.get("/stage?kind=common-cathode&type=DT&b_plus=300&ra=100k&rk=1.5k&ck=22u"
                                "&cgk=1.6p&cga=1.5p").get_data(as_text=True))
    lo, med, hi, n = table["input capacitance"]
    gain = float(table["mid-band gain"][1])
    # Miller effect (textbook, e.g. Radiotron Designer's Handbook, from memory): Cgk + (1 - A) Cga
    # with a bypassed cathode; the median unit's gain from the same table
    assert float(med) == pytest.approx(1.6 + (1 - gain) * 1.5, rel=0.02) and n == "6"
    assert float(lo) <= float(med) <= float(hi)


def test_spread_of_stacks_pairs_each_bottles_sections_and_leaves_out_what_is_not_in_stock(fresh_signed_in, fresh,
                                                                                          synth, tube_types,
                                                                                          write_long, tmp_path):
    from .webtools import make_stock

    f = make_stock(synth, tube_types, write_long, tmp_path / "lot.csv", n_tubes=3, seed=5, prefix="Q")
    stock.import_files(fresh, "setup", [str(f)], "DT")
    stock.set_status(fresh, "setup", ["Q02"], "sold")
    c = fresh_signed_in("viewer")
    page = c.get("/stage?kind=stack&type=DT&b_plus=300&rk=1k&r_top=1k").get_data(as_text=True)
    assert not _errors(page)
    assert "Spread over 2 pairs of type DT" in page  # Q01 and Q03: Q02 is sold
    assert "the two sections of each tube" in page and "Q02" not in page
    assert re.search(r"<td>mid-band gain</td><td></td>(<td class=\"num\">[^<]+</td>){3}<td class=\"num\">2</td>", page)


def test_spread_errors_name_the_field_in_the_pages_words(signed_in):
    c = signed_in("viewer")
    page = c.get("/stage?kind=common-cathode&type=NOPE&b_plus=300&ra=100k&rk=1k").get_data(as_text=True)
    assert _errors(page)[0].startswith("tube type (its whole stock): ")
    page = c.get("/stage?kind=common-cathode&type=DT&tube=W01:A&b_plus=300&ra=100k&rk=1k").get_data(as_text=True)
    assert _errors(page) == ["tube type (its whole stock): choose tubes or a type's whole stock, not both"]
    page = c.get("/stage?kind=common-cathode&type=DT&b_plus=300&ra=-5&rk=1k").get_data(as_text=True)
    assert _errors(page)[0].startswith("Ra [Ω]: ")


# -- output stages ------------------------------------------------------------------------------


def test_single_ended_page_shows_the_report_and_three_plots_and_matches_the_command_line(signed_in, stocked, cards):
    c = signed_in("viewer")
    page = c.get(f"/output?kind=single-ended&tube=W01:A&{SE}&loads=5k,10k,20k").get_data(as_text=True)
    assert not _errors(page) and CAUTION in page
    # load lines, harmonics against power, the load sweep, each a figure; the frequency response
    assert page.count('src="data:image/svg+xml;base64,') == 4
    (card,) = cards(["W01:A"])
    cli = _cli(["output", "single-ended", "--tube", card, *SE_CLI, "--load-sweep", "5k,10k,20k"])
    want = web_design.output_run(stocked[0], "single-ended", {"b_plus": "250", "load": "10k", "grid_bias": "-8.5",
                                                               "pa_max": "2.75"}, {"tube": "W01:A"},
                                 loads="5k,10k,20k")
    _same_figures(want.to_dict(), cli)
    shown = web_design.output_run(stocked[0], "single-ended", {"b_plus": "250", "load": "10k", "grid_bias": "-8.5",
                                                                "pa_max": "2.75"}, {"tube": "W01:A"},
                                  loads="5k,10k,20k", response=True)  # the page's report has the response too
    assert htmllib.escape(shown.report()).replace("&#x27;", "&#39;") in page
    assert f"{cli['max_output']['power_w']:.3g} W ({cli['max_output']['limit']})" in page
    assert "Reflected-load sweep" in page and "Frequency response at the secondary" in page


def test_single_ended_output_impedance_is_rp_over_n_squared(stocked):
    # textbook: with an ideal transformer and no primary resistance the secondary sees rp / n^2
    # (Radiotron Designer's Handbook, from memory); rp from the point service at the operating point
    db = stocked[0]
    run = web_design.output_run(db, "single-ended", {"b_plus": 250, "turns_ratio": 35.0, "grid_bias": -8.5},
                                {"tube": "W02:B"})
    d = run.to_dict()
    op = d["tubes"]["tube"]
    rp = web_support.figures_at(db, web_support.resolve_unit(db, "W02:B"), op["va_v"], op["vgk_v"])["rp_ohm"]
    assert d["output_impedance_ohm"] == pytest.approx(rp / 35.0**2, rel=0.01)


def test_push_pull_page_with_two_tubes_and_its_api_match_the_command_line(signed_in, stocked, app, cards):
    c = signed_in("viewer")
    q = "kind=push-pull&tube_a=W01:A&tube_b=W03:B&b_plus=250&load=20k&grid_bias=-8.5"
    page = c.get("/output?" + q).get_data(as_text=True)
    assert not _errors(page)
    assert "W01:A" in page and "W03:B" in page and "DC imbalance (A - B)" in page
    # load lines, harmonics against power, the composite characteristic; the frequency response
    assert page.count('src="data:image/svg+xml;base64,') == 4
    a, b = cards(["W01:A", "W03:B"])
    cli = _cli(["output", "push-pull", "--tube-a", a, "--tube-b", b, "--bplus", "250", "--load", "20k",
                "--bias", "-8.5"])
    tok = token_for(stocked[0], "viewer")
    ida, idb = (web_support.resolve_unit(stocked[0], x) for x in ("W01:A", "W03:B"))
    r = app.test_client().post("/api/v1/output", headers=_auth(tok), json={
        "kind": "push-pull", "circuit": {"b_plus": 250, "load": "20k", "grid_bias": -8.5}, "tube_a": ida,
        "tube_b": idb})
    assert r.status_code == 200, r.get_json()
    _same_figures(r.get_json(), cli)
    assert f"{cli['imbalance_ma']:.3g} mA" in page
    # the two tubes differ, so the primary carries a DC imbalance (common practice: real pairs)
    assert cli["imbalance_ma"] != 0


def test_output_errors_name_the_field(signed_in, stocked, app):
    c = signed_in("viewer")
    page = c.get("/output?kind=push-pull&tube_a=W01:A&tube_b=W01:A&b_plus=250&load=20k&grid_bias=-8.5")
    assert _errors(page.get_data(as_text=True)) == [
        "tube B: the same tube as tube A; a push-pull pair is two different tubes"]
    page = c.get("/output?kind=single-ended&tube=W01:A&b_plus=250&load=lots&grid_bias=-8.5").get_data(as_text=True)
    assert _errors(page)[0].startswith("reflected load [Ω]: cannot read 'lots'")
    page = c.get("/output?kind=single-ended&tube=W01:A&b_plus=250&load=10k").get_data(as_text=True)
    assert _errors(page)[0].startswith("fixed grid bias [V]: give a fixed grid bias or a cathode resistor")
    page = c.get(f"/output?kind=single-ended&tube=W01:A&{SE}&thd=150").get_data(as_text=True)
    assert _errors(page)[0].startswith("THD for the output power [%]: must lie between 0 and 100")
    tok = token_for(stocked[0], "viewer")
    api = app.test_client()
    r = api.post("/api/v1/output", headers=_auth(tok), json={"kind": "single-ended", "circuit": {"b_plus": 250},
                                                              "tube": "W01:A"})
    assert r.status_code == 400 and r.get_json()["errors"][0]["field"] == "load"
    r = api.post("/api/v1/output", headers=_auth(tok), json={"kind": "single-ended", "tube": "W01:A", "wattage": 3})
    assert r.status_code == 400 and r.get_json()["errors"][0]["field"] == "wattage"


# -- design sweeps ---------------------------------------------------------------------------------


def test_sweep_over_a_types_stock_matches_the_command_line(signed_in, stocked, app, cards, tmp_path):
    c = signed_in("viewer")
    q = "kind=common-cathode&vary=ra&start=47k&stop=220k&points=5&log=1&type=DT&b_plus=300&rk=1.5k&ck=22u"
    page = c.get("/sweep?" + q).get_data(as_text=True)
    assert not _errors(page) and CAUTION in page
    assert page.count('src="data:image/svg+xml;base64,') == 1
    cards(SECTIONS)
    cli = _cli(["sweep", "common-cathode", "--vary", "ra=47k:220k:5:log", "--spread", str(tmp_path / "cards"),
                "--bplus", "300", "--rk", "1.5k", "--ck", "22u"])
    body = re.search(r'<table class="grid sweep-table">(.*?)</table>', page, re.S).group(1)
    assert body.count("<tr>") == 1 + 5  # head + one row per value
    g = cli["points"][0]["gain"]
    assert f"{g['median']:.4g} [{g['min']:.4g}..{g['max']:.4g}]" in body
    tok = token_for(stocked[0], "viewer")
    r = app.test_client().post("/api/v1/sweep", headers=_auth(tok), json={
        "kind": "common-cathode", "vary": "ra", "start": "47k", "stop": 220e3, "points": 5, "log": True,
        "type": "DT", "circuit": {"b_plus": 300, "rk": "1.5k", "ck": "22u"}})
    assert r.status_code == 200, r.get_json()
    got = r.get_json()
    assert got["units"] == cli["units"] and len(got["units"]) == 6
    _same_figures(got["points"], cli["points"])
    # a larger plate resistor gives more gain, towards mu (textbook, common practice)
    meds = [abs(p["gain"]["median"]) for p in got["points"]]
    assert meds == sorted(meds)


def test_sweep_of_an_output_stage_with_one_tube_matches_the_command_line(signed_in, stocked, app, cards):
    c = signed_in("viewer")
    q = "kind=single-ended&vary=load&start=5k&stop=20k&points=4&tube=W02:A&b_plus=250&grid_bias=-8.5&level=0.05"
    page = c.get("/sweep?" + q).get_data(as_text=True)
    assert not _errors(page)
    (card,) = cards(["W02:A"])
    cli = _cli(["sweep", "single-ended", "--vary", "load=5k:20k:4", "--tube", card, "--bplus", "250", "--bias",
                "-8.5", "--level", "0.05"])
    tok = token_for(stocked[0], "viewer")
    r = app.test_client().post("/api/v1/sweep", headers=_auth(tok), json={
        "kind": "single-ended", "vary": "load", "start": 5e3, "stop": 20e3, "points": 4, "tube": "W02:A",
        "circuit": {"b_plus": 250, "grid_bias": -8.5}, "level": 0.05})
    assert r.status_code == 200, r.get_json()
    _same_figures(r.get_json()["points"], cli["points"])
    assert f"{cli['points'][-1]['p_max_w']:.4g}" in page


def test_sweep_errors_name_the_field(signed_in):
    c = signed_in("viewer")
    base = "/sweep?kind=common-cathode&tube=W01:A&b_plus=300&rk=1.5k"
    page = c.get(base + "&vary=watts&start=1&stop=2").get_data(as_text=True)
    assert _errors(page)[0].startswith("field to sweep: a common-cathode stage has no field 'watts'")
    page = c.get(base + "&vary=ra&start=lots&stop=220k").get_data(as_text=True)
    assert _errors(page)[0].startswith("from: cannot read 'lots'")
    page = c.get(base + "&vary=ra&start=47k&stop=220k&points=5000").get_data(as_text=True)
    assert _errors(page)[0].startswith("points: must be 2 to 200")
    page = c.get(base + "&vary=ra&start=47k&stop=220k&type=DT").get_data(as_text=True)
    assert _errors(page)[0].startswith("tube: a sweep over a type's stock takes its tubes from the stock")


# -- who may ---------------------------------------------------------------------------------


DESIGN_URLS = [f"/output?kind=single-ended&tube=W01:A&{SE}",
               "/sweep?kind=cathode-follower&vary=rk&start=1k&stop=20k&points=4&tube=W01:B&b_plus=250",
               "/stage?kind=cathode-follower&type=DT&b_plus=250&rk=10k", "/output?kind=push-pull", "/sweep"]


@pytest.mark.parametrize("url", DESIGN_URLS)
def test_signed_out_is_sent_to_sign_in_and_every_role_may_calculate(app, signed_in, url):
    r = app.test_client().get(url)
    assert r.status_code == 302 and "/signin" in r.headers["Location"]
    for role in ("viewer", "editor", "admin"):
        r = signed_in(role).get(url)
        assert r.status_code == 200 and not _errors(r.get_data(as_text=True)), role


@pytest.mark.parametrize("path", ["/api/v1/output", "/api/v1/sweep"])
def test_the_api_refuses_no_token_and_lets_a_viewer_calculate(app, stocked, path):
    body = ({"kind": "single-ended", "tube": "W01:A", "circuit": {"b_plus": 250, "load": "10k", "grid_bias": -8.5}}
            if path.endswith("output") else
            {"kind": "single-ended", "tube": "W01:A", "vary": "load", "start": "5k", "stop": "10k", "points": 2,
             "circuit": {"b_plus": 250, "grid_bias": -8.5}})
    client = app.test_client()
    r = client.post(path, json=body)
    assert r.status_code == 401
    r = client.post(path, json=body, headers=_auth(token_for(stocked[0], "viewer")))
    assert r.status_code == 200, r.get_json()


def test_the_navigation_and_the_stage_page_link_to_the_design_pages(signed_in):
    page = signed_in("viewer").get("/stage").get_data(as_text=True)
    assert 'href="/output"' in page and 'href="/sweep"' in page  # the navigation
    assert 'href="/output?kind=single-ended"' in page and 'href="/sweep?kind=common-cathode"' in page


def test_a_repeated_output_or_sweep_page_comes_from_the_cache_by_unit_ids(app, signed_in):
    c = signed_in("viewer")
    url = f"/output?kind=single-ended&tube=W03:A&{SE}&thd=3"
    first = c.get(url).get_data(as_text=True)
    cache = app.extensions["platebook.design"]
    hits = cache.hits
    # the same tube by its unit id and the same values written differently: the same answer, kept
    uid = web_support.resolve_unit(app.config["LEDGER"], "W03:A")
    again = c.get(f"/output?kind=single-ended&tube={uid}&b_plus=250&load=10000&grid_bias=-8.5&pa_max=2.75&thd=3%")
    assert cache.hits == hits + 1
    assert re.findall(r'<pre class="report">(.*?)</pre>', first, re.S) == \
        re.findall(r'<pre class="report">(.*?)</pre>', again.get_data(as_text=True), re.S)
    other = c.get(f"/output?kind=single-ended&tube=W03:B&{SE}&thd=3").get_data(as_text=True)
    assert cache.hits == hits + 1 and "W03:B" in other  # another tube is solved afresh
    url = "/sweep?kind=cathode-follower&vary=rk&start=1k&stop=20k&points=3&tube=W01:B&b_plus=250"
    c.get(url)
    c.get(url)
    assert cache.hits == hits + 2
