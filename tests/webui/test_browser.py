"""A real browser (Playwright driving Debian's chromium) through the whole flow on a real
server on 127.0.0.1: sign in, upload, open a tube, check the plot and figures, download a
SPICE file; screenshots of every page at laptop and tablet sizes.

The screenshots go to $PLATEBOOK_SCREENSHOTS when set (look at them), else to a temporary
folder whose path the test prints.  Without chromium or Playwright the test is skipped, except
on CI (CI=true), where it fails: `make test` installs Debian's chromium.
"""

from __future__ import annotations

import os
import threading
from pathlib import Path

import pytest

from .webtools import PASSWORD, make_stock

CHROMIUM = "/usr/bin/chromium"
ARGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
        "--disable-component-update", "--disable-sync", "--no-first-run"]
SIZES = {"laptop": (1366, 800), "tablet": (820, 1180)}


def _need_browser():
    missing = None
    try:
        import playwright.sync_api  # noqa: F401
    except ImportError:
        missing = "the playwright package (pip install -e '.[test]')"
    if not Path(CHROMIUM).exists():
        missing = f"{CHROMIUM} (make test installs Debian's chromium)"
    if missing:
        if os.environ.get("CI", "").lower() == "true":
            pytest.fail(f"{missing} is missing (CI must run the browser test)")
        pytest.skip(f"{missing} is missing")


@pytest.fixture
def server(fresh_app):
    """The app on a real waitress server on 127.0.0.1 (a free port), stopped after the test."""
    import waitress.server

    srv = waitress.server.create_server(fresh_app, host="127.0.0.1", port=0, threads=4)
    t = threading.Thread(target=srv.run, daemon=True)
    t.start()
    yield f"http://127.0.0.1:{srv.effective_port}"
    srv.close()
    t.join(timeout=10)


@pytest.fixture
def shots(tmp_path_factory):
    folder = Path(os.environ.get("PLATEBOOK_SCREENSHOTS") or tmp_path_factory.mktemp("screenshots"))
    folder.mkdir(parents=True, exist_ok=True)
    print(f"screenshots in {folder}")
    return folder


@pytest.mark.browser
def test_sign_in_upload_open_a_tube_and_download_its_spice_file(server, shots, synth, tube_types, write_long,
                                                                tmp_path):
    _need_browser()
    from playwright.sync_api import sync_playwright

    stock_csv = make_stock(synth, tube_types, write_long, tmp_path / "counter_lot.csv", n_tubes=3, seed=7,
                           prefix="LOT")
    xss = make_stock(synth, tube_types, write_long, tmp_path / "odd_name.csv", n_tubes=1, seed=8,
                     label="<script>alert(1)</script>")
    dialogs = []
    with sync_playwright() as p:
        browser = p.chromium.launch(executable_path=CHROMIUM, args=ARGS)
        try:
            for size, (w, h) in SIZES.items():
                ctx = browser.new_context(viewport={"width": w, "height": h}, accept_downloads=True)
                page = ctx.new_page()
                page.on("dialog", lambda d: (dialogs.append(d.message), d.dismiss()))
                page.goto(server + "/stock")
                assert "/signin" in page.url  # signed out: sent to sign in
                page.screenshot(path=str(shots / f"{size}-1-signin.png"), full_page=True)
                page.fill("input[name=name]", "editor1")
                page.fill("input[name=password]", PASSWORD)
                page.click("button[type=submit]")
                page.wait_for_url("**/stock")
                page.goto(server + "/upload")
                files = [str(stock_csv), str(xss)] if size == "laptop" else [str(stock_csv)]
                page.set_input_files("input[type=file]", files)
                page.screenshot(path=str(shots / f"{size}-2-upload.png"), full_page=True)
                page.click("#upload-form button[type=submit]")
                page.wait_for_selector(".done, .problems")
                text = page.inner_text("main")
                if size == "laptop":
                    assert "Stored 8 unit(s)" in text  # three dual triodes + one
                else:
                    # the same bytes again: recognised, not stored twice
                    assert "already in the ledger" in text and "Nothing new stored" in text
                page.screenshot(path=str(shots / f"{size}-3-uploaded.png"), full_page=True)
                page.goto(server + "/stock")
                assert "<script>alert(1)</script>" in page.inner_text("table")  # shown as text
                page.screenshot(path=str(shots / f"{size}-4-stock.png"), full_page=True)
                page.click("text=LOT01")
                page.wait_for_url("**/tube/LOT01")
                img = page.locator("figure img").first
                img.wait_for()
                assert page.evaluate("(el) => el.complete && el.naturalWidth > 0", img.element_handle())
                page.fill("input[name=va]", "200")
                page.fill("input[name=vg]", "-4")
                page.click("#point ~ form button[type=submit]")
                page.wait_for_selector("table.figures")
                assert "mA/V" in page.inner_text("table.figures")
                page.screenshot(path=str(shots / f"{size}-5-tube.png"), full_page=True)
                with page.expect_download() as dl:
                    page.click("text=SPICE subcircuit")
                body = Path(dl.value.path()).read_text()
                assert ".SUBCKT" in body.upper() and dl.value.suggested_filename.endswith(".lib")
                page.goto(server + "/match?type=DT&group=pairs&tolerance=5")
                assert "group(s) at va 250 V, vg -8.5 V" in page.inner_text("main")
                page.screenshot(path=str(shots / f"{size}-7-matching.png"), full_page=True)
                page.goto(server + "/stage?kind=stack&bottom=LOT01:A&top=LOT01:B&b_plus=300&rk=1k&r_top=1k&r_mid=47k"
                          "&top_grid=coupled&thd=1")
                assert page.locator("pre.report").count() == 2  # a mu follower of the two sections of LOT01, and its THD
                assert "mu follower" in page.inner_text("pre.report >> nth=0").lower()
                page.screenshot(path=str(shots / f"{size}-8-stage.png"), full_page=True)
                page.goto(server + "/compare?units=LOT01:A+LOT02:A+LOT03:B")
                assert page.locator("figure img").count() == 1
                page.screenshot(path=str(shots / f"{size}-9-compare.png"), full_page=True)
                page.goto(server + "/tube/" + "%3Cscript%3Ealert(1)%3C%2Fscript%3E")
                page.screenshot(path=str(shots / f"{size}-6-odd-name.png"), full_page=True)
                ctx.close()
        finally:
            browser.close()
    assert dialogs == []  # no script from a tube name ever ran
