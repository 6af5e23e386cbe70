"""The tube, compare and matching pages beyond the basics: fit plots drawn from the outliers
stored with each fit (no second fit), the compare page's nominal curves, the matching page's
figures side by side, and uploads fitted in a pool that is safe inside a threaded server.

Data are INVENTED (the shared ``synth``/``write_long`` helpers, 12AU7-like units from Koren's
published set, from memory, in tests/conftest.py); the expected outliers are the glitches the
generator put in, by file line.
"""

from __future__ import annotations

import json

import numpy as np
import pytest
from sqlalchemy import select, update

from fitter import CAUTION
from fitter.service import stock, web_support

from .webtools import VA, VG, make_stock


def _glitched_file(synth, tube_types, write_long, path, tube="G01", seed=5, outliers=0.03):
    """A dual bottle whose sections carry glitches; returns (path, {section: glitch lines})."""
    tt = tube_types["12AU7"]
    units = [synth(tt, noise=0.01, outliers=outliers, seed=seed + k, tube=tube, section=s, va_step=20.0,
                   grid_voltages=tuple(np.arange(0.0, -24.01, -4.0))) for k, s in enumerate("AB")]
    write_long(path, units)
    return path, {u.section: set(u.lines[u.outlier].tolist()) for u in units}


def _fit_ids(db, label):
    return {s["section"]: s["fit_id"] for s in stock.show_tube(db, label).data["sections"]}


# -- 1. the tube page: outliers stored at import, the plot only draws ------------------------


def test_import_stores_the_outliers_the_fit_found(fresh, synth, tube_types, write_long, tmp_path):
    from fitter.ledger.db import open_ledger
    from fitter.ledger.schema import Fit
    from fitter.ledger.store import OUTLIERS_KEY

    f, glitches = _glitched_file(synth, tube_types, write_long, tmp_path / "g.csv")
    stock.import_files(fresh, "setup", [str(f)], "DT")
    for sec, fid in _fit_ids(fresh, "G01").items():
        led = open_ledger(fresh)
        try:
            with led.read() as s:
                figures = s.scalar(select(Fit.figures).where(Fit.id == fid))
        finally:
            led.close()
        assert OUTLIERS_KEY in figures and figures["n_outliers"] == len(figures[OUTLIERS_KEY])
        res, how = web_support.fit_result(fresh, fid)
        assert how == "stored"
        # the generator's glitches (tests/conftest.py: x1.35..2 or x0.3..0.65 against 1 % noise)
        # are the points marked, by file line
        assert set(res.unit.lines[res.outliers].tolist()) == glitches[sec]


def test_the_plot_draws_without_fitting_again(fresh, synth, tube_types, write_long, tmp_path, monkeypatch):
    import fitter.fit

    f, _ = _glitched_file(synth, tube_types, write_long, tmp_path / "g.csv")
    stock.import_files(fresh, "setup", [str(f)], "DT")

    def no_fit(*a, **k):
        raise AssertionError("the plot of a stored fit fitted the points again")

    monkeypatch.setattr(fitter.fit, "fit_curves", no_fit)
    svg = web_support.fit_plot(fresh, _fit_ids(fresh, "G01")["A"], "svg")
    assert svg.startswith(b"<?xml") and b"outliers (" in svg  # the legend of the marked glitches
    png = web_support.fit_plot(fresh, _fit_ids(fresh, "G01")["A"], "png")
    assert png[:8] == b"\x89PNG\r\n\x1a\n"


def test_a_row_stored_without_outliers_is_fitted_again_to_find_them(fresh, synth, tube_types, write_long,
                                                                    tmp_path):
    from fitter.ledger.db import open_ledger
    from fitter.ledger.schema import Fit
    from fitter.ledger.store import OUTLIERS_KEY

    f, glitches = _glitched_file(synth, tube_types, write_long, tmp_path / "g.csv")
    stock.import_files(fresh, "setup", [str(f)], "DT")
    fid = _fit_ids(fresh, "G01")["B"]
    led = open_ledger(fresh)
    try:
        def strip(s):  # a row as an older Platebook stored it
            figures = dict(s.scalar(select(Fit.figures).where(Fit.id == fid)))
            figures.pop(OUTLIERS_KEY)
            s.execute(update(Fit).where(Fit.id == fid).values(figures=figures))

        led.work(strip)
    finally:
        led.close()
    res, how = web_support.fit_result(fresh, fid)
    assert how == "refit"
    assert set(res.unit.lines[res.outliers].tolist()) == glitches["B"]  # the generator's glitches
    assert b"<svg" in web_support.fit_plot(fresh, fid)


def test_stored_outliers_that_do_not_fit_the_points_are_not_used():
    from fitter.ledger.store import OUTLIERS_KEY, stored_outliers

    assert stored_outliers({OUTLIERS_KEY: [0, 3], "n_points": 5}, 5).tolist() == [True, False, False, True, False]
    assert stored_outliers({OUTLIERS_KEY: [0, 3], "n_points": 5}, 6) is None  # cleaned differently
    assert stored_outliers({OUTLIERS_KEY: [7], "n_points": 5}, 5) is None  # beyond the points
    assert stored_outliers({OUTLIERS_KEY: ["1"], "n_points": 5}, 5) is None
    assert stored_outliers({OUTLIERS_KEY: [True], "n_points": 5}, 5) is None
    assert stored_outliers({"n_points": 5}, 5) is None
    assert stored_outliers(None, 5) is None


def test_model_cards_leave_the_outlier_indices_out(signed_in, stocked, tmp_path):
    from fitter.card import load_card
    from fitter.ledger.store import OUTLIERS_KEY

    fid = _fit_ids(stocked[0], "W01")["A"]
    r = signed_in("viewer").get(f"/unit/{fid}/download/json")
    assert r.status_code == 200
    card = json.loads(r.data)
    assert OUTLIERS_KEY not in card["fit"] and "rms_ma" in card["fit"]
    p = tmp_path / "card.json"
    p.write_bytes(r.data)
    assert load_card(p).label == "W01:A"  # the card reads back through the strict validator
    from fitter.ledger.db import open_ledger
    from fitter.ledger.store import card_of

    led = open_ledger(stocked[0])
    try:
        cards = card_of(led, "W01")
    finally:
        led.close()
    assert len(cards) == 2 and all(OUTLIERS_KEY not in c["fit"] for c in cards)


def test_a_failed_fit_is_drawn_as_failed(fresh, tmp_path):
    # currents that do not depend on the voltages (random): no triode model describes them
    rng = np.random.default_rng(3)
    rows = ["tube,section,va,vg,ia_ma"] + [f"F01,A,{va},{vg},{rng.uniform(0.5, 5):.3f}"
                                           for vg in (0, -2, -4) for va in range(50, 351, 50)]
    p = tmp_path / "noise.csv"
    p.write_text("\n".join(rows) + "\n")
    stock.import_files(fresh, "setup", [str(p)], "DT")
    fid = _fit_ids(fresh, "F01")["A"]
    assert not web_support.unit(fresh, fid)["fit"]["converged"]
    res, how = web_support.fit_result(fresh, fid)
    assert not res.converged and how == "stored" and res.failure
    assert b"FIT FAILED" in web_support.fit_plot(fresh, fid)


def test_tube_page_and_its_plots_by_role(app, signed_in, stocked):
    fids = _fit_ids(stocked[0], "W02")
    html = signed_in("viewer").get("/tube/W02").get_data(as_text=True)
    assert CAUTION in html
    for fid in fids.values():
        assert f"/unit/{fid}/plot.svg" in html
    c = app.test_client()  # signed out: sent to sign in, nothing shown
    assert c.get("/tube/W02").status_code == 302
    assert c.get(f"/unit/{fids['A']}/plot.svg").status_code == 302


def test_tube_page_bad_input_is_named(signed_in):
    c = signed_in("viewer")
    r = c.get("/tube/NO-SUCH")
    assert r.status_code == 404 and "label" in r.get_data(as_text=True)
    assert "no tube labelled" in r.get_data(as_text=True)
    r = c.get("/unit/99999/plot.svg")
    assert r.status_code == 404 and "no unit 99999" in r.get_data(as_text=True)
    r = c.get("/unit/1/plot.gif")
    assert r.status_code == 400 and "format" in r.get_data(as_text=True)
    html = c.get("/tube/W01?unit=1&va=lots&vg=-2").get_data(as_text=True)
    assert "va: must be a voltage" in html


def test_the_pages_svg_plot_shows_what_the_fit_found(fresh, synth, tube_types, write_long, tmp_path):
    import re
    import xml.dom.minidom

    f, glitches = _glitched_file(synth, tube_types, write_long, tmp_path / "g.csv")
    stock.import_files(fresh, "setup", [str(f)], "DT")
    fid = _fit_ids(fresh, "G01")["A"]
    res, _ = web_support.fit_result(fresh, fid)
    svg = web_support.fit_plot(fresh, fid, "svg").decode()
    xml.dom.minidom.parseString(svg)  # well-formed
    grids = sorted(set(res.unit.vg.tolist()))
    assert svg.count("<polyline") >= len(grids)  # a fitted curve per grid voltage
    assert f"outliers ({len(glitches['A'])}, down-weighted)" in svg
    assert "G01:A" in svg and "plate voltage Va [V]" in svg and CAUTION in svg
    # every measured point is drawn once: dots on the curves and again beneath as residuals
    dots = len(re.findall(r"h0", svg))
    assert dots == 2 * (res.unit.n_points - len(glitches["A"]))


def test_nice_ticks_are_round_and_cover_the_range():
    from fitter.plotting import nice_ticks

    # steps of 1, 2, 2.5 or 5 times a power of ten (common practice for axis ticks)
    assert nice_ticks(0, 400) == [0, 100, 200, 300, 400]
    assert nice_ticks(0, 19.6) == [0, 5, 10, 15]
    assert nice_ticks(-0.27, 0.27) == [-0.2, -0.1, 0.0, 0.1, 0.2]
    assert nice_ticks(1.0, 1.0) == [1.0]


def test_a_tube_label_is_text_in_the_svg(fresh, synth, tube_types, write_long, tmp_path):
    from fitter.plotting import svg_fit_plot
    from fitter.reader import clean_curves

    from dataclasses import replace

    res, _ = _one_result(fresh, synth, tube_types, write_long, tmp_path)
    evil = replace(res, unit=replace(clean_curves(res.unit), tube="<script>alert(1)</script>&"))
    svg = svg_fit_plot(evil).decode()
    assert "<script>" not in svg and "&lt;script&gt;alert(1)&lt;/script&gt;&amp;" in svg


def _one_result(db, synth, tube_types, write_long, tmp_path):
    f, _ = _glitched_file(synth, tube_types, write_long, tmp_path / "one.csv", tube="E01")
    stock.import_files(db, "setup", [str(f)], "DT")
    return web_support.fit_result(db, _fit_ids(db, "E01")["A"])


# -- 4. uploads fitted in a pool that is safe inside a threaded server --------------------------


def test_a_pool_is_forked_only_from_a_single_threaded_process(monkeypatch):
    import multiprocessing as mp
    import threading

    import fitter.fit

    if "fork" not in mp.get_all_start_methods() or "forkserver" not in mp.get_all_start_methods():
        pytest.skip("this platform has no fork or no fork server")
    monkeypatch.setattr(threading, "active_count", lambda: 1)  # the command line
    assert fitter.fit.pool_context().get_start_method() == "fork"
    monkeypatch.setattr(threading, "active_count", lambda: 5)  # a threaded server
    assert fitter.fit.pool_context().get_start_method() == "forkserver"


def test_an_upload_of_ten_units_in_a_threaded_server_fits_them_all_in_a_fork_server(
        fresh_signed_in, fresh, synth, tube_types, write_long, tmp_path, monkeypatch):
    import io
    import os
    import threading

    import fitter.fit

    from .webtools import csrf_of

    if "forkserver" not in __import__("multiprocessing").get_all_start_methods():
        pytest.skip("this platform has no fork server")
    monkeypatch.setattr(os, "cpu_count", lambda: 2)  # a pool even on a one-core machine
    used = []
    real = fitter.fit.pool_context

    def spy(*a, **k):
        ctx = real(*a, **k)
        used.append(ctx.get_start_method())
        return ctx

    monkeypatch.setattr(fitter.fit, "pool_context", spy)
    f = make_stock(synth, tube_types, write_long, tmp_path / "ten.csv", n_tubes=5, seed=21, prefix="P")
    c = fresh_signed_in("editor")
    token = csrf_of(c.get("/upload").get_data(as_text=True))
    box = {}

    def request():  # as a waitress worker thread serves it, beside the main thread
        box["r"] = c.post("/upload", data={"csrf_token": token, "type": "DT", "model": "koren",
                                           "file": [(io.BytesIO(f.read_bytes()), "ten.csv")]},
                          content_type="multipart/form-data")

    th = threading.Thread(target=request)
    th.start()
    th.join(timeout=300)
    assert not th.is_alive()
    assert box["r"].status_code == 200 and "Stored 10 unit(s)" in box["r"].get_data(as_text=True)
    assert used == ["forkserver"]
    tubes = stock.list_tubes(fresh).data["tubes"]
    assert len(tubes) == 5
    secs = [s for t in tubes for s in t["sections"]]
    assert len(secs) == 10 and all(s["ia_ma"] is not None for s in secs)  # every unit fitted and stored


# -- 3. the matching page: the units' figures side by side ---------------------------------------


def _cells(html, unit):
    """The figure cells of a unit's row on the matching page."""
    import re

    m = re.search(r"<td>" + re.escape(unit) + r"(?: <small[^<]*</small>)?</td>\s*((?:<td class=\"num\">[^<]*</td>)+)",
                  html)
    assert m, f"no row for {unit}"
    return [float(x) for x in re.findall(r'<td class="num">([^<]*)</td>', m.group(1))]


def test_matching_page_shows_each_units_ia_and_gm_beside_the_mismatch(signed_in, stocked):
    db = stocked[0]
    want = stock.match(db, tube_type="DT", group="pairs", tolerance_pct=5).data  # the service itself
    assert want["groups"], "the invented stock should give at least one pair at 5 %"
    html = signed_in("viewer").get("/match?type=DT&group=pairs&tolerance=5").get_data(as_text=True)
    assert "Ia mA" in html and "gm mA/V" in html and "Apart %" in html
    for g in want["groups"]:
        ias = []
        for u in g["units"]:
            ia, gm = _cells(html, u)[:2]
            # independently: the tube page's figures at the type's test point (= the match position here)
            tube, sec = u.split(":")
            s = next(x for x in stock.show_tube(db, tube).data["sections"] if x["section"] == sec)
            assert ia == pytest.approx(s["ia_ma"], rel=1e-3) and gm == pytest.approx(s["gm_ms"], rel=1e-3)
            ias.append(s["ia_ma"])
        mm = g["mismatch"]
        assert f"Ia {mm['ia_pct']:.2f}" in html and f"gm {mm['gm_pct']:.2f}" in html
        # the spread of two units is their difference over their mean (fitter/match/criterion.py's
        # 2 tanh(span/2), the usual relative difference: common practice)
        assert 100 * abs(ias[0] - ias[1]) / ((ias[0] + ias[1]) / 2) == pytest.approx(mm["ia_pct"], abs=0.01)


def test_matching_page_lists_bottle_pairs_section_by_section(fresh_signed_in, fresh, synth, tube_types, write_long,
                                                            tmp_path):
    f = make_stock(synth, tube_types, write_long, tmp_path / "m.csv", n_tubes=4, seed=11, prefix="M")
    stock.import_files(fresh, "setup", [str(f)], "DT")
    want = stock.match(fresh, tube_type="DT", group="bottles", tolerance_pct=10).data
    assert want["pairs"], "the invented stock should give at least one bottle pair at 10 %"
    html = fresh_signed_in("editor").get("/match?type=DT&group=bottles&tolerance=10").get_data(as_text=True)
    for p in want["pairs"]:
        for j, side in enumerate(p["sections"], 1):
            for u in side:
                assert f"<td>{u} <small class=\"hint\">pair {j}</small></td>" in html
                ia, gm = _cells(html, u)[:2]
                assert ia == pytest.approx(want["figures"][u]["ia_ma"], rel=1e-3)
        assert f"{p['mismatch_pct']:.2f}" in html
    assert html.count('name="accept"') == len(want["pairs"])  # an editor gets a box per group


def test_matching_page_bad_input_and_roles(app, signed_in):
    c = signed_in("viewer")
    assert "tolerance: must be a number" in c.get("/match?type=DT&tolerance=lots").get_data(as_text=True)
    assert "va: must be a number" in c.get("/match?type=DT&va=high").get_data(as_text=True)
    html = c.get("/match?type=NOPE").get_data(as_text=True)
    assert "type: " in html
    assert 'name="accept"' not in c.get("/match?type=DT&tolerance=5").get_data(as_text=True)
    assert app.test_client().get("/match?type=DT").status_code == 302  # signed out


# -- 2. the compare page: a tube against its type's nominal ----------------------------------------


def test_nominal_is_the_median_of_the_stock_when_there_is_no_datasheet_plot(signed_in, stocked):
    db = stocked[0]
    secs = [(t["label"], s["section"]) for t in stock.list_tubes(db, tube_type="DT").data["tubes"]
            for s in t["sections"] if s.get("ia_ma") is not None]
    nom = web_support.type_nominal(db, "DT", model="koren")
    assert nom["kind"] == "median" and nom["n"] == len(secs) and nom["fit_id"] is None
    assert nom["basis"] == f"median of {len(secs)} sections in stock (koren)" and "datasheet" not in nom["basis"]
    # each parameter the median of the sections' own (numpy's median, computed here from each unit)
    params = [web_support.unit(db, web_support.resolve_unit(db, f"{t}:{s}"))["fit"]["params"] for t, s in secs]
    for name in ("mu", "ex", "kg1", "kp", "kvb"):
        assert nom["triode"].params[name] == pytest.approx(float(np.median([p[name] for p in params])), rel=1e-12)
    html = signed_in("viewer").get("/compare?units=W01:A&nominal=1").get_data(as_text=True)
    assert CAUTION in html and f"median of {len(secs)} sections in stock (koren) — not a datasheet" in html
    import base64
    import re

    svg = base64.b64decode(re.search(r'src="data:image/svg\+xml;base64,([^"]+)"', html).group(1)).decode()
    assert "nominal: median of" in svg and "W01:A" in svg and "against the DT nominal" in svg
    assert "stroke-dasharray" in svg  # the nominal dashed


def test_nominal_is_a_unit_digitised_from_a_datasheet_plot_when_there_is_one(fresh_signed_in, fresh, synth,
                                                                            tube_types, write_long, tmp_path):
    f = make_stock(synth, tube_types, write_long, tmp_path / "s.csv", n_tubes=2, seed=3, prefix="N")
    stock.import_files(fresh, "setup", [str(f)], "DT")
    sheet = make_stock(synth, tube_types, write_long, tmp_path / "sheet.csv", n_tubes=1, seed=8, label="DT-SHEET")
    stock.import_files(fresh, "setup", [str(sheet)], "DT", instrument="Datasheet plot, digitised by hand")
    nom = web_support.type_nominal(fresh, "DT")
    assert nom["kind"] == "datasheet" and nom["basis"].startswith("digitised datasheet plot (DT-SHEET:")
    assert nom["fit_id"] in _fit_ids(fresh, "DT-SHEET").values()
    assert nom["triode"].params == web_support.unit(fresh, nom["fit_id"])["fit"]["params"]
    html = fresh_signed_in("viewer").get("/compare?units=N01:A+N02:B&nominal=1").get_data(as_text=True)
    assert "the curves of a digitised datasheet plot (DT-SHEET:" in html
    c = fresh_signed_in("viewer")
    sheet_unit = f"DT-SHEET:{nom['triode'].section}"
    err = c.get(f"/compare?units={sheet_unit}&nominal=1").get_data(as_text=True)
    assert "units: that unit is the type&#39;s datasheet curves themselves" in err


def test_nominal_errors_are_named(fresh_signed_in, fresh, synth, tube_types, write_long, tmp_path):
    f = make_stock(synth, tube_types, write_long, tmp_path / "one.csv", n_tubes=1, seed=4, prefix="L")
    stock.import_files(fresh, "setup", [str(f)], "DT")  # two sections: too few for a median
    stock.add_type(fresh, "setup", "OT", VA, VG)
    g = make_stock(synth, tube_types, write_long, tmp_path / "other.csv", n_tubes=1, seed=6, prefix="O")
    stock.import_files(fresh, "setup", [str(g)], "OT")
    c = fresh_signed_in("viewer")
    html = c.get("/compare?units=L01:A&nominal=1").get_data(as_text=True)
    assert "nominal: type DT has no unit digitised from a datasheet plot and 2 converged section(s)" in html
    assert "units: the tubes are of different types (DT, OT)" in c.get(
        "/compare?units=L01:A+O01:A&nominal=1").get_data(as_text=True)
    assert "units: name a tube to draw against" in c.get("/compare?units=&nominal=1").get_data(as_text=True)
    assert "units: at most 7 tubes" in c.get("/compare?nominal=1&units=" + "+".join(
        f"X{k}:A" for k in range(8))).get_data(as_text=True)
    assert "units: no tube labelled" in c.get("/compare?units=NOPE:A&nominal=1").get_data(as_text=True)


def test_compare_needs_a_signed_in_viewer(app):
    assert app.test_client().get("/compare?units=W01:A&nominal=1").status_code == 302


def test_a_curve_is_broken_where_the_model_is_not_finite():
    from fitter.plotting import _polyline

    assert _polyline(np.array([1.0, 2, np.nan, 4, 5, 6]), np.array([1.0, 2, 3, 4, np.inf, 6])) == [
        "1.0,1.0 2.0,2.0", "4.0,4.0", "6.0,6.0"]
    assert _polyline(np.array([np.nan]), np.array([1.0])) == []


def test_tube_page_says_when_the_test_point_lies_outside_the_measured_data(fresh_signed_in, fresh, synth,
                                                                           tube_types, write_long, tmp_path):
    # a type whose test point (vg -40 V) lies beyond the stock's traced grid voltages (0..-24 V):
    # the Ia and gm shown there are the model's extrapolation, and the page says so
    stock.add_type(fresh, "setup", "FAR", VA, -40.0)
    f = make_stock(synth, tube_types, write_long, tmp_path / "far.csv", n_tubes=1, seed=12, prefix="FAR")
    stock.import_files(fresh, "setup", [str(f)], "FAR")
    html = fresh_signed_in("viewer").get("/tube/FAR01").get_data(as_text=True)
    assert html.count("the test point lies outside its measured data") == 2  # both sections
    assert "vg -40 V is outside the traced grid voltages" in html
    # inside the data: no such note
    g = make_stock(synth, tube_types, write_long, tmp_path / "near.csv", n_tubes=1, seed=13, prefix="NEAR")
    stock.import_files(fresh, "setup", [str(g)], "DT")
    assert "outside its measured data" not in fresh_signed_in("viewer").get("/tube/NEAR01").get_data(as_text=True)
