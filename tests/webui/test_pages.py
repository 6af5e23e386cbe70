"""Pages through Flask's test client on a temporary ledger: each renders with the caution,
each role sees what it may, and nothing is served to someone signed out."""

from __future__ import annotations

import pytest

from fitter import CAUTION

from .webtools import PASSWORD, csrf_of, sign_in


def test_signed_out_visitors_are_sent_to_sign_in_from_every_page(app):
    c = app.test_client()
    for path in ("/stock", "/tube/W01", "/upload", "/unit/1/plot.svg", "/unit/1/download/spice"):
        r = c.get(path)
        assert r.status_code == 302 and "/signin" in r.headers["Location"], path


@pytest.mark.parametrize("role", ["viewer", "editor", "admin"])
def test_stock_page_lists_every_tube_with_counts_and_the_caution(signed_in, role):
    html = signed_in(role).get("/stock").get_data(as_text=True)
    assert CAUTION in html
    for label in ("W01", "W02", "W03"):  # the three invented tubes of the fixture
        assert f">{label}</a>" in html
    assert "<b>3</b> tubes" in html


def test_stock_page_filters_by_status_and_paginates(signed_in):
    c = signed_in("viewer")
    html = c.get("/stock?status=sold").get_data(as_text=True)
    assert "No tube matches" in html
    html = c.get("/stock?per_page=2&page=2").get_data(as_text=True)
    assert ">W03</a>" in html and ">W01</a>" not in html and "page 2 of 2" in html


def test_stock_page_sorts_by_plate_current(signed_in, stocked):
    from fitter.service import stock

    # expected order from the stock service's own figures (mean Ia of each bottle's sections)
    tubes = stock.list_tubes(stocked[0]).data["tubes"]
    order = sorted(tubes, key=lambda t: sum(s["ia_ma"] for s in t["sections"]) / len(t["sections"]))
    html = signed_in("viewer").get("/stock?sort=ia&desc=1").get_data(as_text=True)
    pos = [html.index(f">{t['label']}</a>") for t in reversed(order)]
    assert pos == sorted(pos)


def test_tube_page_shows_sections_plots_parameters_and_downloads(signed_in, stocked):
    from fitter.service import stock

    d = stock.show_tube(stocked[0], "W01").data
    html = signed_in("viewer").get("/tube/W01").get_data(as_text=True)
    assert CAUTION in html
    for s in d["sections"]:
        assert f"/unit/{s['fit_id']}/plot.svg" in html
        assert f"/unit/{s['fit_id']}/download/spice" in html
        assert f"{s['ia_ma']:.4g}" in html  # the service's figure, as printed by the page
    assert "kg1" in html and "Std. error" in html


def test_figures_at_a_typed_point_equal_the_point_service(signed_in, stocked):
    from fitter.service import stock, web_support

    fid = stock.show_tube(stocked[0], "W02").data["sections"][0]["fit_id"]
    want = web_support.figures_at(stocked[0], fid, 200, -4)  # the service the CLI's point uses
    html = signed_in("viewer").get(f"/tube/W02?unit={fid}&va=200&vg=-4").get_data(as_text=True)
    assert f"{want['ia_ma']:.4g}" in html and f"{want['mu']:.4g}" in html


def test_a_bad_point_is_named_beside_the_form(signed_in, stocked):
    from fitter.service import stock

    fid = stock.show_tube(stocked[0], "W02").data["sections"][0]["fit_id"]
    r = signed_in("viewer").get(f"/tube/W02?unit={fid}&va=lots&vg=-4")
    assert r.status_code == 200 and "va: must be a voltage" in r.get_data(as_text=True)


def test_an_unknown_tube_is_a_clear_error_page(signed_in):
    r = signed_in("viewer").get("/tube/NOPE")
    assert r.status_code == 404 and "no tube labelled" in r.get_data(as_text=True)
    assert CAUTION in r.get_data(as_text=True)


def test_fit_plot_is_svg_and_cached_by_fit_id(app, signed_in, stocked):
    from fitter.service import stock

    fid = stock.show_tube(stocked[0], "W01").data["sections"][0]["fit_id"]
    c = signed_in("viewer")
    r = c.get(f"/unit/{fid}/plot.svg")
    assert r.status_code == 200 and r.mimetype == "image/svg+xml" and b"<svg" in r.data
    cache = app.extensions["platebook.plots"]
    assert (cache.misses, cache.hits) == (1, 0)
    assert c.get(f"/unit/{fid}/plot.svg").data == r.data
    assert (cache.misses, cache.hits) == (1, 1)


def test_downloads_are_the_export_services_text(signed_in, stocked):
    from fitter.service import stock, web_support

    fid = stock.show_tube(stocked[0], "W01").data["sections"][0]["fit_id"]
    c = signed_in("viewer")
    for fmt, marker in (("spice", ".SUBCKT"), ("json", '"params"'), ("csv", "va")):
        r = c.get(f"/unit/{fid}/download/{fmt}")
        assert r.status_code == 200 and "attachment" in r.headers["Content-Disposition"]
        text = r.get_data(as_text=True)
        # the same text as the service's, but for the line stamping when it was made (a second
        # may pass between the two)
        def unstamped(t):
            return [ln for ln in t.splitlines() if '"created"' not in ln and "created by Platebook" not in ln]
        assert unstamped(text) == unstamped(web_support.unit_export(stocked[0], fid, fmt)[1])
        assert "/tmp" not in text and "platebook-web-" not in text  # no temporary path leaks out
        assert marker.lower() in r.get_data(as_text=True).lower()


def test_every_response_carries_the_security_headers(signed_in):
    r = signed_in("viewer").get("/stock")
    csp = r.headers["Content-Security-Policy"]
    assert "default-src 'self'" in csp and "frame-ancestors 'none'" in csp and "unsafe-inline" not in csp
    assert r.headers["X-Content-Type-Options"] == "nosniff"


def test_pages_load_nothing_from_elsewhere(signed_in):
    html = signed_in("editor").get("/upload").get_data(as_text=True)
    assert "http://" not in html and "https://" not in html and "<script>" not in html
    assert '<script src="/static/upload.js">' in html


def test_session_cookie_is_httponly_and_samesite_lax(app):
    c = app.test_client()
    r = sign_in(c, "viewer1")
    cookie = r.headers["Set-Cookie"]
    assert "HttpOnly" in cookie and "SameSite=Lax" in cookie


def test_sign_in_failure_says_the_same_for_unknown_account_and_wrong_password(app):
    a = sign_in(app.test_client(), "nobody-here", PASSWORD)
    b = sign_in(app.test_client(), "viewer1", "wrong password!")
    assert a.status_code == b.status_code == 401
    assert a.get_data(as_text=True) == b.get_data(as_text=True).replace(csrf_of(b.get_data(as_text=True)),
                                                                         csrf_of(a.get_data(as_text=True)))


def test_repeated_sign_in_failures_slow_down_then_let_the_right_password_in(app):
    throttle = app.extensions["platebook.throttle"]
    now = [1000.0]
    throttle.clock = lambda: now[0]  # a hand-moved clock: the test waits for nothing
    c = app.test_client()
    for _ in range(3):  # SIGNIN_FREE_FAILURES
        assert sign_in(c, "editor1", "wrong password!").status_code == 401
    r = sign_in(c, "editor1")  # the right password, but within the back-off (1 s after 3 failures)
    assert r.status_code == 429 and "try again" in r.get_data(as_text=True)
    assert sign_in(app.test_client(), "viewer1").status_code == 302  # another account is not held up
    now[0] += 1.01
    assert sign_in(c, "editor1", "wrong password!").status_code == 401  # looked at again: a 4th failure
    now[0] += 1.5
    assert sign_in(c, "editor1").status_code == 429  # the wait doubled to 2 s
    now[0] += 0.6
    assert sign_in(c, "editor1").status_code == 302


def test_a_form_without_its_csrf_token_is_refused(signed_in):
    c = signed_in("editor")
    r = c.post("/upload", data={"type": "DT"})
    assert r.status_code == 400 and "security token" in r.get_data(as_text=True)
    r = c.post("/signout", data={"csrf_token": "forged"})
    assert r.status_code == 400


def test_a_viewer_cannot_upload(signed_in):
    c = signed_in("viewer")
    assert c.get("/upload").status_code == 403
    page = c.get("/stock").get_data(as_text=True)
    assert "/upload" not in page
    r = c.post("/upload", data={"csrf_token": csrf_of(page), "type": "DT"})
    assert r.status_code == 403


def test_a_disabled_account_is_signed_out_at_its_next_request(app, stocked):
    from fitter.service import accounts

    c = app.test_client()
    accounts.add_account(stocked[0], "temp1", "viewer", PASSWORD)
    assert sign_in(c, "temp1").status_code == 302
    accounts.set_disabled(stocked[0], "temp1", True)
    assert c.get("/stock").status_code == 302


def test_a_retested_tube_shows_its_drift_and_both_measurements(fresh_signed_in, fresh, synth, tube_types, write_long,
                                                              tmp_path):
    from fitter.service import stock

    from .webtools import make_stock

    first = make_stock(synth, tube_types, write_long, tmp_path / "first.csv", n_tubes=1, seed=31, prefix="RT")
    again = make_stock(synth, tube_types, write_long, tmp_path / "again.csv", n_tubes=1, seed=32, prefix="RT")
    stock.import_files(fresh, "ann", [str(first)], "DT")
    stock.import_files(fresh, "ann", [str(again)], "DT")
    d = stock.show_tube(fresh, "RT01").data  # the stock service's drift, the page must show it
    html = fresh_signed_in("viewer").get("/tube/RT01").get_data(as_text=True)
    for s in d["sections"]:
        assert f"Ia {s['drift']['ia_pct']:+.2f}" in html
    assert html.count("re-test</td>") == 2 and html.count("first test</td>") == 2


def test_an_upload_over_the_size_limit_is_a_clear_413(fresh):
    from web import create_app

    app = create_app({"LEDGER": fresh, "SECRET_KEY": "k", "MAX_CONTENT_LENGTH": 2000})
    c = app.test_client()
    assert sign_in(c, "editor1").status_code == 302
    tok = csrf_of(c.get("/upload").get_data(as_text=True))
    import io

    r = c.post("/upload", data={"csrf_token": tok, "type": "DT", "file": [(io.BytesIO(b"x" * 5000), "big.csv")]},
               content_type="multipart/form-data")
    assert r.status_code == 413 and "larger than 0.00191 MB" in r.get_data(as_text=True)  # 2000 bytes
