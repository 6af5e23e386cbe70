"""Digitising a datasheet plot through the web front end: the pages and every /api/v1/plots
route (Flask's test client): the normal flow, bad input with the field named, roles, signed out.

The plot is a synthetic page from tests/digitise_pages.py (an INVENTED tube drawn with
Koren's published equations, N. Koren, Glass Audio 8(5), 1996); its tick pixels and one pixel
per curve come from matplotlib's own data -> pixel transform, the outside reference for the
axis map and the traced points.
"""

from __future__ import annotations

import io
import sys
from pathlib import Path

import numpy as np
import pytest

from fitter.ledger.db import open_ledger
from fitter.service import stock
from fitter.service.digitise import INSTRUMENT

from .webtools import csrf_of, token_for

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
from digitise_pages import make_page  # noqa: E402


@pytest.fixture(scope="module")
def page():
    return make_page("coloured")  # PNG, coloured curves, not rotated


def _auth(token):
    return {"Authorization": f"Bearer {token}"}


def _marks(page, per_axis=3):
    """Truth ticks as marks: the second, a middle and the last tick of each axis."""
    out = []
    for axis in ("va", "ia"):
        ticks = [t for t in page.ticks if t[2] == axis]
        pick = [ticks[1], ticks[len(ticks) // 2], ticks[-1]][:per_axis]
        out += [{"px": t[0], "py": t[1], "axis": axis, "value": t[3]} for t in pick]
    return out


def _post_form(client, path, fields, headers=None):
    """A multipart POST encoded in memory (the test client's own encoder leaves a temporary
    file open for bodies over 500 kB, which pytest reports as a ResourceWarning)."""
    from werkzeug.datastructures import FileStorage
    from werkzeug.test import encode_multipart

    data = {k: FileStorage(io.BytesIO(v[0]), v[1]) if isinstance(v, tuple) else v for k, v in fields.items()}
    boundary, body = encode_multipart(data)
    return client.post(path, data=body, headers=headers or {}, content_type=f"multipart/form-data; boundary={boundary}")


def _blank_pixel(page):
    """A pixel in the middle of a minor grid cell, far from every curve and the load line (by
    the page's truth), where there is no line to follow."""
    va_t = sorted((t[3], t[0]) for t in page.ticks if t[2] == "va")
    ia_t = sorted((t[3], t[1]) for t in page.ticks if t[2] == "ia")
    sp = page.spec
    bplus, i0 = sp.load_line
    for va in np.arange(sp.va_step / sp.minor / 2, sp.va_max, sp.va_step / sp.minor)[::-1]:
        for ia in np.arange(sp.ia_step_ma / sp.minor / 2, sp.ia_max_ma, sp.ia_step_ma / sp.minor)[::-1]:
            near = [abs(page.truth_ma(va, vg) - ia) for vg in sp.grid_voltages] + [abs(i0 * (1 - va / bplus) - ia)]
            if min(near) > 0.15 * sp.ia_max_ma:
                return [float(np.interp(va, *zip(*va_t))), float(np.interp(ia, *zip(*ia_t)))]
    raise AssertionError("no blank cell on the page")


def _upload(client, headers, data, name="sheet.png"):
    return _post_form(client, "/api/v1/plots", {"file": (data, name)}, headers)


@pytest.fixture
def editor_api(fresh_app, fresh, page):
    """(client, headers, db, plot id): the page uploaded by an editor's token."""
    c = fresh_app.test_client()
    h = _auth(token_for(fresh, "editor"))
    r = _upload(c, h, page.data)
    assert r.status_code == 201, r.get_json()
    return c, h, fresh, r.get_json()["id"]


def _err(r, status=400):
    assert r.status_code == status, (r.status_code, r.get_data(as_text=True))
    return r.get_json()["errors"][0]


def test_the_whole_flow_through_the_api_saves_a_fitted_measurement_of_the_plot(editor_api, page, fresh_app):
    c, h, db, pid = editor_api
    base = f"/api/v1/plots/{pid}"
    info = c.get(base, headers=h).get_json()
    assert (info["width"], info["height"]) == (page.width, page.height) and info["marks"] == [] and info["axes"] is None
    img = c.get(base + "/image", headers=h)
    assert img.status_code == 200 and img.mimetype == "image/png" and img.data == page.data  # bytes as sent

    r = c.put(base + "/axes", json={"marks": _marks(page), "box": list(page.box)}, headers=h)
    assert r.status_code == 200, r.get_json()
    axes = r.get_json()["axes"]
    # the marks are matplotlib's own tick pixels, so a straight map fits them to a fraction of a pixel
    assert len(axes["residuals"]) == 6 and axes["rms_px"] < 0.5 and axes["worst"] is None

    from fitter.service.digitise import image_cache

    misses = image_cache.misses
    curves = []
    for vg, px, py in page.seeds:
        t = c.post(base + "/trace", json={"seed": [px, py]}, headers=h)
        assert t.status_code == 200, t.get_json()
        d = t.get_json()
        assert len(d["points"]) >= 10 and len(d["px"]) == len(d["va"]) == len(d["ia_ma"])
        # within 2 % of full scale of the truth (the page's Koren curves, published equations)
        truth = page.truth_ma(np.array(d["va"]), vg)
        assert np.max(np.abs(np.array(d["ia_ma"]) - truth)) < 0.02 * page.spec.ia_max_ma
        curves.append({"grid_v": vg, "points": d["points"], "seed": d["seed"]})
    assert image_cache.misses == misses  # decoded once, at the upload: every trace found it in the cache
    # a hand correction: one point moved by two pixels down
    curves[0]["points"][5] = [curves[0]["points"][5][0], curves[0]["points"][5][1] + 2.0]
    r = c.put(base + "/curves", json={"curves": curves}, headers=h)
    assert r.status_code == 200 and r.get_json()["curves"][0]["points"][5] == curves[0]["points"][5]

    r = c.post(base + "/measurement", json={"tube": "MC7-SHEET", "type": "DT", "section": "", "model": "koren"},
               headers=h)
    assert r.status_code == 201, r.get_json()
    d = r.get_json()
    (u,) = d["units"]
    assert u["tube"] == "MC7-SHEET" and u["fit"]["converged"] and not d["failed"]
    assert set(u["fit"]) >= {"model", "params", "stderr", "converged", "rms_ma"}  # as POST /measurements returns
    # the fit, drawn back in pixels, runs through the traced points (a few pixels at most)
    by_vg = {o["grid_v"]: o for o in d["overlay"]}
    assert sorted(by_vg) == sorted(page.spec.grid_voltages)
    for cur in curves[1:]:
        o = by_vg[cur["grid_v"]]
        p = np.array(cur["points"])
        inside = (p[:, 0] > min(o["px"])) & (p[:, 0] < max(o["px"]))
        assert np.median(np.abs(np.interp(p[inside, 0], o["px"], o["py"]) - p[inside, 1])) < 3.0
    # stored as a measurement marked as digitised, the tube in the stock
    (sheet,) = stock.list_tubes(db).data["tubes"]
    assert sheet["label"] == "MC7-SHEET" and sheet["status"] == "reference"  # the type's reference, not stock
    led = open_ledger(db)
    try:
        from fitter.ledger.schema import Measurement

        with led.read() as s:
            (m,) = s.query(Measurement).all()
            assert m.instrument == INSTRUMENT and m.id in d["measurement_ids"]
    finally:
        led.close()
    # the same curves saved again: recognised (same bytes), nothing stored twice, the same unit
    r2 = c.post(base + "/measurement", json={"tube": "MC7-SHEET", "type": "DT"}, headers=h)
    assert r2.status_code == 201 and r2.get_json()["again"] and [x["id"] for x in r2.get_json()["units"]] == [u["id"]]
    # a reload (or another device) finds the work where it was
    again = c.get(base, headers=h).get_json()
    assert len(again["marks"]) == 6 and again["box"] == list(page.box) and len(again["curves"]) == len(curves)
    assert again["saved"]["units"] == [u["id"]] and again["measurement_ids"] == d["measurement_ids"]
    assert again["curves"][0]["points"][5] == curves[0]["points"][5]
    # the tube page says where the points came from
    from .webtools import sign_in

    b = fresh_app.test_client()
    assert sign_in(b, "viewer1").status_code == 302
    assert INSTRUMENT in b.get("/tube/MC7-SHEET").get_data(as_text=True)


def test_two_marks_on_an_axis_are_reported_as_exact_not_as_a_zero_residual(editor_api, page):
    """Two marks fix an axis's scale exactly (two points, a straight line): their 0 px
    residual checks nothing, so the answer says so; a third mark gives a check."""
    c, h, _, pid = editor_api
    base = f"/api/v1/plots/{pid}/axes"
    two = _marks(page, per_axis=2)
    axes = c.put(base, json={"marks": two}, headers=h).get_json()["axes"]
    assert axes["residuals"] == [0.0] * 4  # exact by construction
    assert axes["checked"] == {"va": False, "ia": False} and axes["exact"] == [True] * 4
    assert axes["rms_px_axis"] == {"va": None, "ia": None}
    assert "px (rms)" not in axes["summary"]
    assert "Two marks on each axis fix the scale exactly" in axes["summary"]
    assert "a third mark on an axis gives a check" in axes["summary"]
    # a third plate-voltage mark 4 px off its tick (a slipped click): the va axis is checked
    ticks = [t for t in page.ticks if t[2] == "va"]
    t = ticks[-1]
    third = {"px": t[0] + 4.0, "py": t[1], "axis": "va", "value": t[3]}
    axes = c.put(base, json={"marks": two[:2] + [third] + two[2:]}, headers=h).get_json()["axes"]
    assert axes["checked"] == {"va": True, "ia": False} and axes["exact"] == [False, False, False, True, True]
    # the page is not rotated, so the three marks lie on one row: the straight line value(px)
    # through them by least squares (numpy.linalg.lstsq, computed here) leaves their residuals
    va = [m for m in two[:2] + [third] if m["axis"] == "va"]
    x = np.array([m["px"] for m in va])
    y = np.array([m["value"] for m in va])
    (a, b), *_ = np.linalg.lstsq(np.column_stack([np.ones(3), x]), y, rcond=None)
    rms = float(np.sqrt(np.mean(((a + b * x - y) / b) ** 2)))
    assert rms > 0.5  # the slipped click shows
    assert axes["rms_px_axis"]["va"] == pytest.approx(rms, rel=1e-6) and axes["rms_px_axis"]["ia"] is None
    assert axes["summary"].startswith(f"Axes set. The 3 plate voltage marks lie {axes['rms_px_axis']['va']:.2f} px")
    assert "the two current marks fix theirs exactly: a third mark on that axis gives a check" in axes["summary"]


def test_bad_input_names_the_field(editor_api, page):
    c, h, db, pid = editor_api
    base = f"/api/v1/plots/{pid}"
    assert _err(_upload(c, h, b"not an image at all", "x.png"))["field"] == "file"
    assert _err(_post_form(c, "/api/v1/plots", {}, h))["field"] == "file"
    marks = _marks(page, 2)
    bad = [dict(m) for m in marks]
    bad[1]["value"] = "abc"
    assert _err(c.put(base + "/axes", json={"marks": bad}, headers=h))["field"] == "marks[1].value"
    bad = [dict(m) for m in marks]
    bad[2]["px"] = page.width + 50
    assert _err(c.put(base + "/axes", json={"marks": bad}, headers=h))["field"] == "marks[2].px"
    bad = [dict(m) for m in marks]
    bad[1]["value"] = bad[0]["value"]  # two ticks of one axis with the same value: the engine refuses
    assert _err(c.put(base + "/axes", json={"marks": bad}, headers=h))["field"].startswith("marks[")
    assert _err(c.put(base + "/axes", json={"marks": marks, "colour": 1}, headers=h))["field"] == "colour"
    assert _err(c.put(base + "/axes", json=[1, 2], headers=h))["field"] == "body"
    # nothing of that was stored
    assert c.get(base, headers=h).get_json()["marks"] == []
    # tracing needs the axes first
    vg, px, py = page.seeds[0]
    assert _err(c.post(base + "/trace", json={"seed": [px, py]}, headers=h))["field"] == "marks"
    assert c.put(base + "/axes", json={"marks": marks}, headers=h).status_code == 200
    blank = _blank_pixel(page)
    e = _err(c.post(base + "/trace", json={"seed": [-5, 10]}, headers=h))
    assert e["field"] == "seed" and "outside the image" in e["message"]
    assert _err(c.post(base + "/trace", json={"seed": [px, py], "n": 1}, headers=h))["field"] == "n"
    r = c.post(base + "/trace", json={"seed": blank}, headers=h)
    assert r.status_code == 400 and r.get_json()["errors"][0]["field"] == "seed"
    good = c.post(base + "/trace", json={"seed": [px, py]}, headers=h).get_json()["points"]
    curves = [{"grid_v": None, "points": good}]
    assert _err(c.put(base + "/curves", json={"curves": [{"grid_v": "x", "points": good}]}, headers=h))["field"] \
        == "curves[0].grid_v"
    assert _err(c.put(base + "/curves", json={"curves": [{"grid_v": 0, "points": [[1, 1], [2, 2], [1e9, 3]]}]},
                      headers=h))["field"] == "curves[0].points[2]"
    assert c.put(base + "/curves", json={"curves": curves}, headers=h).status_code == 200
    save = {"tube": "X1", "type": "DT"}
    assert _err(c.post(base + "/measurement", json=save, headers=h))["field"] == "curves[0].grid_v"
    curves[0]["grid_v"] = vg
    assert c.put(base + "/curves", json={"curves": curves}, headers=h).status_code == 200
    assert _err(c.post(base + "/measurement", json={"tube": "X1", "type": "NOPE"}, headers=h))["field"] == "type"
    assert _err(c.post(base + "/measurement", json={"tube": "", "type": "DT"}, headers=h))["field"] == "tube"
    assert _err(c.post(base + "/measurement", json={"type": "DT"}, headers=h))["field"] == "tube"
    assert _err(c.post(base + "/measurement", json={**save, "model": "nope"}, headers=h))["field"] == "model"
    assert stock.list_tubes(db).data["total"] == 0  # nothing stored by any of it
    # an unknown plot is a 404; an id that is no number a 400
    for method, path, body in (("get", "/api/v1/plots/999", None), ("get", "/api/v1/plots/999/image", None),
                               ("put", "/api/v1/plots/999/axes", {"marks": []}),
                               ("post", "/api/v1/plots/999/trace", {"seed": [1, 1]}),
                               ("put", "/api/v1/plots/999/curves", {"curves": []}),
                               ("post", "/api/v1/plots/999/measurement", save)):
        assert _err(getattr(c, method)(path, json=body, headers=h), 404)["field"] == "id"
    assert _err(c.get("/api/v1/plots/abc", headers=h))["field"] == "id"


def test_an_image_over_the_size_limit_is_refused_before_it_is_read(fresh):
    from fitter.digitise import MAX_IMAGE_BYTES
    from fitter.errors import InputError
    from fitter.service import digitise as svc

    with pytest.raises(InputError, match="at most") as e:
        svc.upload_plot(fresh, "ann", "huge.png", b"\x89PNG\r\n\x1a\n" + bytes(MAX_IMAGE_BYTES))
    assert e.value.field == "file"
    assert svc.list_plots(fresh) == []


def test_a_failed_fit_is_stored_and_reported_as_failed(editor_api, page):
    c, h, db, pid = editor_api
    base = f"/api/v1/plots/{pid}"
    assert c.put(base + "/axes", json={"marks": _marks(page)}, headers=h).status_code == 200
    # eight hand-placed points per curve whose current falls as the plate voltage rises: no triode
    # does that (common practice), and the Koren fit runs a parameter to its bound and fails
    x0, y0, x1, y1 = page.box
    pts = [[x0 + f * (x1 - x0), y0 + (0.1 + 0.6 * f) * (y1 - y0)] for f in np.linspace(0.1, 0.9, 8)]
    curves = [{"grid_v": 0.0, "points": pts}, {"grid_v": -4.0, "points": [[x, y + 40] for x, y in pts]}]
    assert c.put(base + "/curves", json={"curves": curves}, headers=h).status_code == 200
    r = c.post(base + "/measurement", json={"tube": "BAD-SHEET", "type": "DT"}, headers=h)
    assert r.status_code == 201, r.get_json()
    d = r.get_json()
    assert d["failed"] and not d["units"][0]["fit"]["converged"] and d["units"][0]["fit"]["failure"]
    assert d["overlay"] == []  # no fit to draw
    assert c.get(base, headers=h).get_json()["saved"]["failed"] is True


def test_roles_and_signing_out(fresh_app, fresh, page):
    c = fresh_app.test_client()
    # signed out: pages send to sign in, the API answers 401
    r = c.get("/digitise")
    assert r.status_code == 302 and "/signin" in r.headers["Location"]
    assert _err(c.get("/api/v1/plots/1"), 401)["field"] == "authorization"
    assert _upload(c, {}, page.data).status_code == 401
    # a viewer reads but changes nothing
    editor, viewer = _auth(token_for(fresh, "editor")), _auth(token_for(fresh, "viewer"))
    assert _upload(c, viewer, page.data).status_code == 403
    pid = _upload(c, editor, page.data).get_json()["id"]
    assert c.get(f"/api/v1/plots/{pid}", headers=viewer).status_code == 200
    assert c.get(f"/api/v1/plots/{pid}/image", headers=viewer).data == page.data
    for method, path, body in (("put", "axes", {"marks": []}), ("post", "trace", {"seed": [1, 1]}),
                               ("put", "curves", {"curves": []}),
                               ("post", "measurement", {"tube": "X", "type": "DT"})):
        assert getattr(c, method)(f"/api/v1/plots/{pid}/{path}", json=body, headers=viewer).status_code == 403
    from .webtools import sign_in

    v = fresh_app.test_client()
    assert sign_in(v, "viewer1").status_code == 302
    assert v.get("/digitise").status_code == 403
    assert v.get(f"/digitise/{pid}").status_code == 403
    assert "Digitise" not in v.get("/stock").get_data(as_text=True)  # no link for a viewer


def test_the_pages_upload_and_open_the_work_and_the_script_needs_the_csrf_token(fresh_app, fresh, page):
    from .webtools import sign_in

    c = fresh_app.test_client()
    assert sign_in(c, "editor1").status_code == 302
    html = c.get("/digitise").get_data(as_text=True)
    assert "High voltage." in html and 'href="/digitise"' in html and "None yet." in html
    assert 'href="/digitise"' in c.get("/upload").get_data(as_text=True)  # linked from the upload page
    # a file that is no image: the form again, the problem named, nothing stored
    r = _post_form(c, "/digitise", {"csrf_token": csrf_of(html), "file": (b"%PDF-1.4", "sheet.pdf")})
    assert r.status_code == 400 and "Nothing was stored" in r.get_data(as_text=True)
    r = _post_form(c, "/digitise", {"csrf_token": csrf_of(html)})
    assert r.status_code == 400 and "Choose an image file" in r.get_data(as_text=True)
    # no CSRF token: refused
    r = _post_form(c, "/digitise", {"file": (page.data, "sheet.png")})
    assert r.status_code == 400
    r = _post_form(c, "/digitise", {"csrf_token": csrf_of(html), "file": (page.data, "<b>sheet</b>.png")})
    assert r.status_code == 302
    work = r.headers["Location"]
    pid = int(work.rsplit("/", 1)[1])
    html = c.get(work).get_data(as_text=True)
    assert "High voltage." in html and 'id="digi-canvas"' in html and f'data-plot="{pid}"' in html
    assert "<b>sheet</b>" not in html and "&lt;b&gt;sheet&lt;/b&gt;.png" in html  # a name is text
    assert "digitise.js" in html and "<script>" not in html  # no inline script (CSP)
    assert c.get("/digitise").get_data(as_text=True).count(f'href="/digitise/{pid}"') == 1  # listed
    assert c.get("/digitise/999").status_code == 404
    # the page's script calls the API with the session cookie: the CSRF token must come along
    marks = {"marks": _marks(page, 2)}
    assert c.put(f"/api/v1/plots/{pid}/axes", json=marks).status_code == 400
    token = csrf_of(html.replace('data-csrf="', 'name="csrf_token" value="'))
    r = c.put(f"/api/v1/plots/{pid}/axes", json=marks, headers={"X-CSRF-Token": token})
    assert r.status_code == 200 and r.get_json()["axes"] is not None
    assert c.get(f"/api/v1/plots/{pid}").get_json()["counts"] == {"va": 2, "ia": 2}


# -- generated requests (schemathesis) against a plot that exists -------------------------------

PLOT_OPS = [(m.upper(), path) for path, ops in __import__("web.api", fromlist=["OPENAPI"]).OPENAPI["paths"].items()
            if path.startswith("/plots") for m in ops]


@pytest.fixture(scope="module")
def plot_schema(tmp_path_factory, page):
    """(schema, editor token, plot id): a ledger of its own with the sheet uploaded and its axes set."""
    import schemathesis

    from fitter.service import accounts
    from fitter.service import digitise as svc
    from web import create_app

    from .webtools import PASSWORD, VA, VG

    db = str(tmp_path_factory.mktemp("plots-schema") / "ledger.sqlite")
    stock.init(db)
    stock.add_type(db, "setup", "DT", VA, VG)
    accounts.add_account(db, "editor1", "editor", PASSWORD)
    pid = svc.upload_plot(db, "setup", "sheet.png", page.data)["id"]
    svc.set_axes(db, pid, _marks(page), list(page.box))
    app = create_app({"LEDGER": db, "SECRET_KEY": "plots-schema-key", "SIGNIN_BACKOFF_S": 1.0})
    return schemathesis.openapi.from_wsgi("/api/v1/openapi.json", app), accounts.new_token(db, "editor1").data["token"], pid


@pytest.mark.parametrize(("method", "path"), PLOT_OPS, ids=[f"{m} {p}" for m, p in PLOT_OPS])
def test_generated_requests_on_a_real_plot_get_no_server_error(plot_schema, method, path):
    from hypothesis import HealthCheck, given, settings
    from schemathesis import GenerationMode
    from schemathesis.checks import not_a_server_error
    from schemathesis.specs.openapi.checks import response_schema_conformance, status_code_conformance

    schema, token, pid = plot_schema
    op = schema[path][method]

    @given(op.as_strategy(generation_mode=GenerationMode.POSITIVE))
    @settings(max_examples=25, deadline=None, derandomize=True, database=None,
              suppress_health_check=[HealthCheck.too_slow, HealthCheck.filter_too_much])
    def run(case):
        if "{id}" in path:
            case.path_parameters = {"id": pid}  # the plot that exists, so the steps' own checks run
        case.call_and_validate(headers={"Authorization": f"Bearer {token}"},
                               checks=[not_a_server_error, status_code_conformance, response_schema_conformance])

    run()
