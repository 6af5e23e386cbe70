"""A real browser (Playwright driving Debian's chromium) through the design pages on a real
server on 127.0.0.1: a stage over a type's whole stock (the spread), a push-pull output stage
with two different power triodes, and a design sweep; screenshots at a laptop's 1366x768 and
a tablet's 820x1180 (look at them).

The screenshots go to $PLATEBOOK_SCREENSHOTS when set, else to a temporary folder whose path
the test prints.  Without chromium or Playwright the test is skipped, except on CI (CI=true),
where it fails (the server, browser and folder as in test_browser.py).  Data are INVENTED:
the 12AU7-like stock of tests/webui/webtools.py and the demo power-triode lot of
curves/stock_power.csv (made by curves/make_demo.py).
"""

from __future__ import annotations

from pathlib import Path

import pytest

from fitter.service import stock

from .test_browser import ARGS, CHROMIUM, _need_browser, server, shots  # noqa: F401 (fixtures)
from .webtools import PASSWORD, make_stock

SIZES = {"laptop": (1366, 768), "tablet": (820, 1180)}
POWER = Path(__file__).resolve().parents[2] / "curves" / "stock_power.csv"


def _images_loaded(page):
    imgs = page.locator("figure img")
    assert imgs.count() >= 1
    for i in range(imgs.count()):
        assert page.evaluate("(el) => el.complete && el.naturalWidth > 0", imgs.nth(i).element_handle())
    return imgs.count()


@pytest.mark.browser
def test_spread_push_pull_and_sweep_in_a_browser(server, shots, fresh, synth, tube_types, write_long,  # noqa: F811
                                                 tmp_path):
    _need_browser()
    from playwright.sync_api import sync_playwright

    f = make_stock(synth, tube_types, write_long, tmp_path / "bench_lot.csv", n_tubes=4, seed=11, prefix="BL")
    stock.import_files(fresh, "setup", [str(f)], "DT")
    stock.add_type(fresh, "setup", "PT", 300.0, -61.0, dual=False, pa_max=40.0)
    stock.import_files(fresh, "setup", [str(POWER)], "PT")
    with sync_playwright() as p:
        browser = p.chromium.launch(executable_path=CHROMIUM, args=ARGS)
        try:
            for size, (w, h) in SIZES.items():
                ctx = browser.new_context(viewport={"width": w, "height": h})
                page = ctx.new_page()
                page.goto(server + "/signin")
                page.fill("input[name=name]", "viewer1")
                page.fill("input[name=password]", PASSWORD)
                page.click("button[type=submit]")
                page.wait_for_url("**/stock")

                # the stage page: a type's whole stock instead of a tube
                page.click("nav >> text=Stage")
                page.select_option("select[name=type]", "DT")
                page.fill("input[name=b_plus]", "300")
                page.fill("input[name=ra]", "100k")
                page.fill("input[name=rk]", "1.5k")
                page.fill("input[name=ck]", "22u")
                page.click("main form button[type=submit]")
                page.wait_for_selector("table.spread")
                assert "type=DT" in page.url  # the address repeats the calculation
                text = page.inner_text("main")
                assert "Spread over 8 sections of type DT" in text
                assert "mid-band gain" in page.inner_text("table.spread")
                assert _images_loaded(page) == 1
                page.screenshot(path=str(shots / f"{size}-d1-spread.png"), full_page=True)

                # a push-pull output stage with two different power triodes
                page.click("nav >> text=Output")
                page.click(".tabs >> text=push-pull")
                page.fill("input[name=tube_a]", "PT-01")
                page.fill("input[name=tube_b]", "PT-04")
                page.fill("input[name=b_plus]", "300")
                page.fill("input[name=load]", "5k")
                page.fill("input[name=grid_bias]", "-61")
                page.fill("input[name=pa_max]", "40")
                page.click("main form button[type=submit]")
                page.wait_for_selector("table.figures-out")
                table = page.inner_text("table.figures-out")
                assert "PT-01" in table and "PT-04" in table
                assert "DC imbalance" in page.inner_text("main")
                assert _images_loaded(page) == 4  # three panels and the frequency response
                page.screenshot(path=str(shots / f"{size}-d2-push-pull.png"), full_page=True)

                # a design sweep of the plate resistor over one tube
                page.click("nav >> text=Sweep")
                page.select_option("select[name=vary]", "ra")
                page.fill("input[name=start]", "47k")
                page.fill("input[name=stop]", "470k")
                page.fill("input[name=points]", "8")
                page.check("input[name=log]")
                page.fill("input[name=tube]", "BL02:A")
                page.fill("input[name=b_plus]", "300")
                page.fill("input[name=rk]", "1.5k")
                page.fill("input[name=ck]", "22u")
                page.click("main form button[type=submit]")
                page.wait_for_selector("table.sweep-table")
                assert page.locator("table.sweep-table tbody tr").count() == 8
                assert _images_loaded(page) == 1
                page.screenshot(path=str(shots / f"{size}-d3-sweep.png"), full_page=True)
                ctx.close()
        finally:
            browser.close()
