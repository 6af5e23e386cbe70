"""The matching page: the stock service's groups shown, reserved by an editor for an order,
labels printed; a viewer may look but not reserve."""

from __future__ import annotations

from fitter import CAUTION
from fitter.service import stock

from .webtools import VA, VG, csrf_of, make_stock


def test_matching_page_shows_the_stock_services_pairs(signed_in, stocked):
    want = stock.match(stocked[0], tube_type="DT", group="pairs", tolerance_pct=5).data  # the service itself
    html = signed_in("viewer").get("/match?type=DT&group=pairs&tolerance=5").get_data(as_text=True)
    assert CAUTION in html
    assert f"<b>{len(want['groups'])}</b> group(s) at va {VA:g} V, vg {VG:g} V" in html
    for g in want["groups"]:
        assert ", ".join(g["units"]) in html and f"{g['mismatch']['max_pct']:.2f}" in html
    assert 'name="accept"' not in html  # a viewer gets no reserve boxes


def test_a_bad_tolerance_is_named(signed_in):
    html = signed_in("viewer").get("/match?type=DT&tolerance=lots").get_data(as_text=True)
    assert "tolerance: must be a number" in html


def test_an_editor_reserves_a_bottle_pair_and_prints_its_labels(fresh_signed_in, fresh, synth, tube_types,
                                                               write_long, tmp_path):
    f = make_stock(synth, tube_types, write_long, tmp_path / "m.csv", n_tubes=4, seed=11, prefix="M")
    stock.import_files(fresh, "setup", [str(f)], "DT")
    want = stock.match(fresh, tube_type="DT", group="bottles", tolerance_pct=10).data
    assert want["pairs"], "the invented stock should give at least one bottle pair at 10 %"
    c = fresh_signed_in("editor")
    page = c.get("/match?type=DT&group=bottles&tolerance=10").get_data(as_text=True)
    r = c.post("/match/reserve", data={"csrf_token": csrf_of(page), "type": "DT", "group": "bottles",
                                       "tolerance": "10", "accept": "1", "order": "order-77"})
    assert r.status_code == 200, r.get_data(as_text=True)
    html = r.get_data(as_text=True)
    assert "order-77" in html
    first = want["pairs"][0]["bottles"]
    for b in first:
        assert stock.show_tube(fresh, b).data["status"] == "reserved"
    group_id = stock.show_tube(fresh, first[0]).data["groups"][0]["group"]
    labels = c.get(f"/group/{group_id}/labels").get_data(as_text=True)
    assert labels.count("order-77") >= 4 and CAUTION in labels  # a label per section of both bottles


def test_a_viewer_cannot_reserve(signed_in):
    c = signed_in("viewer")
    page = c.get("/match?type=DT").get_data(as_text=True)
    r = c.post("/match/reserve", data={"csrf_token": csrf_of(page), "type": "DT", "accept": "1", "order": "x"})
    assert r.status_code == 403
