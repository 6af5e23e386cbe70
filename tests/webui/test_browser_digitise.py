"""A real browser (Playwright driving Debian's chromium) digitises a datasheet plot on a real
server on 127.0.0.1: upload the image, mark the axes at the tick pixels (through the zoom),
mark the plot area, click each curve once, type the grid voltages, move a point, save and
fit; the fit is drawn over the image and the tube is in the stock.  A screenshot after each
step at a laptop (1366x768) and a tablet (820x1180) size.

The page is a synthetic sheet from tests/digitise_pages.py (an INVENTED tube drawn with
Koren's published equations); its tick pixels and one pixel per curve come from matplotlib's
own data -> pixel transform and the page's rotation.  Screenshots go to
$PLATEBOOK_SCREENSHOTS when set, else to a temporary folder the test prints (as in
tests/webui/test_browser.py, whose server and browser fixtures this file uses).
"""

from __future__ import annotations

import sys
from pathlib import Path

import pytest

from .test_browser import ARGS, CHROMIUM, _need_browser, server, shots  # noqa: F401 (fixtures)
from .webtools import PASSWORD

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
from digitise_pages import make_page  # noqa: E402

SIZES = {"laptop": (1366, 768), "tablet": (820, 1180)}


def _view(page):
    """(canvas box on the screen, scale, offset x, offset y) as the page's script set them."""
    canvas = page.locator("#digi-canvas")
    canvas.scroll_into_view_if_needed()
    box = canvas.bounding_box()
    d = page.evaluate("() => { const c = document.getElementById('digi-canvas'); "
                      "return [Number(c.dataset.scale), Number(c.dataset.ox), Number(c.dataset.oy)]; }")
    return box, d[0], d[1], d[2]


def _screen(page, px, py):
    box, s, ox, oy = _view(page)
    return box["x"] + ox + px * s, box["y"] + oy + py * s


def _click_image(page, px, py, zoom=True):
    """Click the image pixel (px, py); with ``zoom``, first zoom in twice with the wheel over
    it (the pixel stays under the pointer), so the click lands within a fraction of a pixel."""
    x, y = _screen(page, px, py)
    if zoom:
        page.mouse.move(x, y)
        for _ in range(2):
            before = _view(page)[1]
            page.mouse.wheel(0, -120)
            page.wait_for_function("(s) => Number(document.getElementById('digi-canvas').dataset.scale) > s",
                                   arg=before)
        x, y = _screen(page, px, py)
    page.mouse.click(x, y)


def _plot(page, server, pid):  # noqa: F811 (the fixture's value)
    r = page.request.get(f"{server}/api/v1/plots/{pid}")
    assert r.ok, r.text()
    return r.json()


@pytest.mark.browser
def test_digitise_a_datasheet_plot_in_the_browser(server, fresh, shots, tmp_path):  # noqa: F811
    _need_browser()
    from playwright.sync_api import sync_playwright

    from fitter.service import stock

    # the sheet's invented high-mu type, its test point inside the drawn curves (250 V, -1.5 V)
    stock.add_type(fresh, "setup", "HX1", 250.0, -1.5)

    sheet = make_page("high_mu")  # JPEG, turned by 0.6 degrees, a load line across the curves
    image = tmp_path / "hx1_sheet.jpg"
    image.write_bytes(sheet.data)
    va_ticks = [t for t in sheet.ticks if t[2] == "va"]
    ia_ticks = [t for t in sheet.ticks if t[2] == "ia"]
    marks = [va_ticks[1], va_ticks[len(va_ticks) // 2], va_ticks[-2], ia_ticks[1], ia_ticks[len(ia_ticks) // 2],
             ia_ticks[-2]]
    dialogs, errors, refused = [], [], []
    with sync_playwright() as p:
        browser = p.chromium.launch(executable_path=CHROMIUM, args=ARGS)
        try:
            for size, (w, h) in SIZES.items():
                ctx = browser.new_context(viewport={"width": w, "height": h})
                page = ctx.new_page()
                page.on("dialog", lambda d: (dialogs.append(d.message), d.dismiss()))
                page.on("pageerror", lambda e: errors.append(str(e)))
                page.on("console", lambda m: errors.append(m.text) if m.type == "error"
                        and not m.text.startswith("Failed to load resource") else None)
                # every answer an error but the browser's own favicon request
                page.on("response", lambda r: refused.append((r.status, r.url.split("/", 3)[3])) if r.status >= 400
                        and not r.url.endswith("/favicon.ico") else None)
                page.goto(server + "/digitise")
                assert "/signin" in page.url
                page.fill("input[name=name]", "editor1")
                page.fill("input[name=password]", PASSWORD)
                page.click("button[type=submit]")
                page.wait_for_url("**/digitise")
                page.set_input_files("input[type=file]", str(image))
                page.screenshot(path=str(shots / f"digitise-{size}-0-upload.png"), full_page=True)
                page.click("#upload-form button[type=submit]")
                page.wait_for_url("**/digitise/*")
                pid = int(page.url.rsplit("/", 1)[1])
                page.wait_for_selector("#digi[data-loaded='1']")
                page.wait_for_function("() => Number(document.getElementById('digi-canvas').dataset.scale) < 1")
                page.screenshot(path=str(shots / f"digitise-{size}-1-start.png"), full_page=True)

                # step 1: the axis marks, each clicked at its tick pixel, its value typed
                for px, py, axis, value in marks:
                    page.check(f"input[name=next-axis][value={axis}]")
                    _click_image(page, px, py)
                    page.keyboard.type(f"{value:g}")
                    page.keyboard.press("Enter")
                    page.click("#zoom-fit")
                # every mark has its residual back from the server
                page.wait_for_function("(n) => [...document.querySelectorAll('#marks tbody tr td:nth-child(4)')]"
                                       ".filter(td => td.textContent.endsWith('px')).length === n", arg=len(marks))
                assert page.inner_text("#axes-summary").startswith("Axes set")
                d = _plot(page, server, pid)
                assert [m["axis"] for m in d["marks"]] == [m[2] for m in marks]
                # clicked through the zoom: within a pixel of matplotlib's tick positions
                for m, t in zip(d["marks"], marks):
                    assert abs(m["px"] - t[0]) < 1.0 and abs(m["py"] - t[1]) < 1.0, (m, t)
                assert d["axes"]["rms_px"] < 1.5
                page.screenshot(path=str(shots / f"digitise-{size}-2-axes.png"), full_page=True)
                if size == "laptop":  # a mistyped value: that mark is ringed and named, then deleted
                    px, py, _, value = va_ticks[3]
                    page.check("input[name=next-axis][value=va]")
                    _click_image(page, px, py)
                    page.keyboard.type(f"{value + 50:g}")
                    page.keyboard.press("Enter")
                    page.click("#zoom-fit")
                    page.wait_for_selector("#marks tbody tr.worst")
                    assert page.locator("#marks tbody tr").nth(len(marks)).get_attribute("class") == "worst"
                    assert f"Mark {len(marks) + 1} (plate voltage {value + 50:g})" in page.inner_text("#axes-summary")
                    page.screenshot(path=str(shots / f"digitise-{size}-2b-bad-mark.png"), full_page=True)
                    page.click(f"#marks button[aria-label='delete mark {len(marks) + 1}']")
                    page.wait_for_function("() => !document.querySelector('#marks tbody tr.worst')")
                    assert page.locator("#marks tbody tr").count() == len(marks)
                    # the value of another mark of that axis: refused, the mark named in the page's words
                    _click_image(page, px, py)
                    page.keyboard.type(f"{marks[0][3]:g}")
                    page.keyboard.press("Enter")
                    page.click("#zoom-fit")
                    page.wait_for_function("() => document.getElementById('digi-error').textContent !== ''")
                    assert page.inner_text("#digi-error").startswith(f"Mark {len(marks) + 1} value: has the same value"), page.inner_text("#digi-error")
                    page.screenshot(path=str(shots / f"digitise-{size}-2c-same-value.png"), full_page=True)
                    page.click(f"#marks button[aria-label='delete mark {len(marks) + 1}']")
                    page.wait_for_function("() => document.getElementById('digi-error').textContent === ''")

                # step 2: the plot area, two corners
                page.click("button.next[data-go='2']")
                x0, y0, x1, y1 = sheet.box
                _click_image(page, x0, y0, zoom=False)
                _click_image(page, x1, y1, zoom=False)
                page.wait_for_function("() => document.getElementById('box-summary').textContent.startsWith('From')")
                page.screenshot(path=str(shots / f"digitise-{size}-3-area.png"), full_page=True)

                # step 3: each curve clicked once, its grid voltage typed
                page.click("button.next[data-go='3']")
                for k, (vg, px, py) in enumerate(sheet.seeds, 1):
                    _click_image(page, px, py, zoom=False)
                    page.wait_for_function("(n) => document.querySelectorAll('#curves tbody tr').length === n", arg=k)
                    page.keyboard.type(f"{vg:g}")
                page.wait_for_timeout(900)  # the last grid voltage is sent after a short pause in typing
                d = _plot(page, server, pid)
                assert [c["grid_v"] for c in d["curves"]] == [s[0] for s in sheet.seeds]
                assert all(len(c["points"]) >= 10 for c in d["curves"])
                page.screenshot(path=str(shots / f"digitise-{size}-4-curves.png"), full_page=True)

                # step 4: drag one point of the second curve down by 6 screen pixels
                page.click("button.next[data-go='4']")
                page.select_option("#edit-curve", "1")
                before = d["curves"][1]["points"][10]
                x, y = _screen(page, *before)
                page.mouse.move(x, y)
                page.mouse.down()
                page.mouse.move(x, y + 3)
                page.mouse.move(x, y + 6)
                page.mouse.up()
                scale = _view(page)[1]
                page.wait_for_function(  # the moved point reached the server
                    "([url, py]) => fetch(url).then(r => r.json())"
                    ".then(d => d.curves[1].points.some(p => Math.abs(p[1] - py) < 0.6))",
                    arg=[f"{server}/api/v1/plots/{pid}", before[1] + 6 / scale], polling=200)
                d = _plot(page, server, pid)
                assert before not in d["curves"][1]["points"]
                page.screenshot(path=str(shots / f"digitise-{size}-5-moved.png"), full_page=True)

                # step 5: save as a tube's measurement and fit
                page.click("button.next[data-go='5']")
                label = f"HX1-{size.upper()}"
                page.fill("#save-form input[name=tube]", label)
                page.select_option("#save-form select[name=type]", "HX1")
                page.click("#save-form button[type=submit]")
                page.wait_for_selector("#save-result p.ok, #save-result p.error")
                text = page.inner_text("#save-result")
                assert "Stored and fitted" in text and label in text, text
                d = _plot(page, server, pid)
                overlay = d["saved"]["overlay"]
                assert len(overlay) == len(sheet.seeds)
                # the fit is drawn: the canvas shows the fit's yellow band along the overlay
                page.click("#zoom-fit")
                box, s, ox, oy = _view(page)
                pts = [[ox + o["px"][k] * s, oy + o["py"][k] * s] for o in overlay for k in range(5, len(o["px"]), 9)]
                hits = page.evaluate(
                    "(pts) => { const c = document.getElementById('digi-canvas'); const g = c.getContext('2d');"
                    " const r = window.devicePixelRatio || 1; let n = 0;"
                    " for (const [x, y] of pts) { const d = g.getImageData(Math.round(x * r) - 3, Math.round(y * r) - 3,"
                    " 7, 7).data; for (let i = 0; i < d.length; i += 4) {"
                    " if (d[i] > 200 && d[i + 1] > 170 && d[i + 2] < 110) { n++; break; } } } return n; }", pts)
                assert hits > 0.5 * len(pts), (hits, len(pts))
                page.screenshot(path=str(shots / f"digitise-{size}-6-fitted.png"), full_page=True)

                # a reload resumes where the user was, the fit still drawn
                page.reload()
                page.wait_for_selector("#digi[data-loaded='1']")
                assert page.locator("#marks tbody tr").count() == len(marks)
                assert page.locator("#curves tbody tr").count() == len(sheet.seeds)
                assert "Saved earlier" in page.inner_text("#save-result")

                page.click(f"#save-result a:has-text('{label}')")
                page.wait_for_url(f"**/tube/{label}")
                assert f"datasheet-plot-{pid}.csv" in page.inner_text("main")  # the measurement's source
                page.goto(server + "/stock?type=HX1")
                row = page.locator("table tbody tr", has_text=label).inner_text()
                # Ia at the type's test point from the fit, against the drawn truth (Koren's equations)
                ia_cell = float(row.split()[-2])
                assert abs(ia_cell - float(sheet.truth_ma(250.0, -1.5))) < 0.015 * sheet.spec.ia_max_ma, row
                page.screenshot(path=str(shots / f"digitise-{size}-7-stock.png"), full_page=True)
                ctx.close()
        finally:
            browser.close()
    assert dialogs == [] and errors == [], (dialogs, errors)
    assert refused == [(400, "api/v1/plots/1/axes")]  # only the value typed twice on purpose (laptop, plot 1)


@pytest.mark.browser
def test_two_marks_per_axis_are_called_exact_and_the_prompt_follows_the_typing(server, fresh, shots,  # noqa: F811
                                                                                tmp_path):
    """Two marks fix an axis exactly, so the page claims no "0.00 px" check for them, and says
    a third mark gives one; the status line's "type its value" is answered once it is typed."""
    _need_browser()
    from playwright.sync_api import sync_playwright

    sheet = make_page("coloured")  # PNG, not rotated
    image = tmp_path / "sheet.png"
    image.write_bytes(sheet.data)
    ticks = {a: [t for t in sheet.ticks if t[2] == a] for a in ("va", "ia")}
    errors = []
    with sync_playwright() as p:
        browser = p.chromium.launch(executable_path=CHROMIUM, args=ARGS)
        try:
            page = browser.new_page(viewport={"width": 1366, "height": 768})
            page.on("pageerror", lambda e: errors.append(str(e)))
            page.goto(server + "/digitise")
            page.fill("input[name=name]", "editor1")
            page.fill("input[name=password]", PASSWORD)
            page.click("button[type=submit]")
            page.wait_for_url("**/digitise")
            page.set_input_files("input[type=file]", str(image))
            page.click("#upload-form button[type=submit]")
            page.wait_for_url("**/digitise/*")
            page.wait_for_selector("#digi[data-loaded='1']")
            page.wait_for_function("() => Number(document.getElementById('digi-canvas').dataset.scale) < 1")
            marks = [ticks["va"][1], ticks["va"][-2], ticks["ia"][1], ticks["ia"][-2]]
            for k, (px, py, axis, value) in enumerate(marks, 1):
                page.check(f"input[name=next-axis][value={axis}]")
                _click_image(page, px, py, zoom=False)
                assert page.inner_text("#digi-status") == f"Mark {k} placed: type its value."
                page.keyboard.type(f"{value:g}")
                unit = "V" if axis == "va" else "mA"
                # typed: the prompt is answered, not left standing
                assert page.inner_text("#digi-status") == f"Mark {k}: {value:g} {unit}. Click the next mark, or go on."
                page.keyboard.press("Enter")
            page.wait_for_function("() => document.getElementById('axes-summary').textContent.startsWith('Axes set')")
            summary = page.inner_text("#axes-summary")
            assert "px (rms)" not in summary and "fix the scale exactly" in summary, summary
            offs = page.locator("#marks tbody tr td:nth-child(4)").all_inner_texts()
            assert offs == ["exact"] * 4, offs
            page.screenshot(path=str(shots / "digitise-two-marks.png"), full_page=True)
            # a third current mark: that axis is checked, in px, the other still exact
            px, py, _, value = ticks["ia"][len(ticks["ia"]) // 2]
            page.check("input[name=next-axis][value=ia]")
            _click_image(page, px, py, zoom=False)
            page.keyboard.type(f"{value:g}")
            page.keyboard.press("Enter")
            page.wait_for_function("() => document.getElementById('axes-summary').textContent.includes('3 current')")
            offs = page.locator("#marks tbody tr td:nth-child(4)").all_inner_texts()
            assert offs[:2] == ["exact", "exact"] and all(o.endswith(" px") for o in offs[2:]), offs
            assert "the two plate voltage marks fix theirs exactly" in page.inner_text("#axes-summary")
            page.screenshot(path=str(shots / "digitise-three-current-marks.png"), full_page=True)
        finally:
            browser.close()
    assert errors == [], errors
