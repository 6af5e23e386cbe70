"""The JSON API: status codes, shapes, roles, nothing stored on a bad file, and the same
answers as the command line (match, stage) computed independently through `platebook`."""

from __future__ import annotations

import io
import json
import subprocess
import sys

import pytest

from fitter.service import stock

from .webtools import VA, VG, make_stock, token_for

PLATEBOOK = [sys.executable, "-m", "fitter"]


def _auth(token):
    return {"Authorization": f"Bearer {token}"}


def _upload(client, token, files, tube_type="DT"):
    data = {"type": tube_type, "file": [(io.BytesIO(b), n) for n, b in files]}
    return client.post("/api/v1/measurements", data=data, headers=_auth(token), content_type="multipart/form-data")


def _count(db):
    return stock.list_tubes(db).data["total"]


@pytest.fixture
def api(fresh_app, fresh, synth, tube_types, write_long, tmp_path):
    good = make_stock(synth, tube_types, write_long, tmp_path / "good.csv", n_tubes=2, seed=5, prefix="API")
    return fresh_app.test_client(), fresh, good.read_bytes()


def test_uploading_measurements_returns_201_with_every_unit_and_its_fit(api):
    client, db, good = api
    r = _upload(client, token_for(db, "editor"), [("good.csv", good)])
    assert r.status_code == 201, r.get_json()
    units = r.get_json()["units"]
    assert sorted((u["tube"], u["section"]) for u in units) == [("API01", "A"), ("API01", "B"), ("API02", "A"),
                                                                ("API02", "B")]  # what the file holds
    for u in units:
        assert set(u) >= {"id", "tube", "section", "fit"}
        assert set(u["fit"]) >= {"model", "params", "stderr", "converged", "rms_ma"}
        assert u["fit"]["converged"] and u["fit"]["model"] == "koren" and set(u["fit"]["params"]) >= {"mu", "kg1"}
    assert _count(db) == 2


def test_a_bad_file_is_400_with_file_line_and_column_and_stores_nothing(api):
    client, db, good = api
    lines = good.decode().splitlines()
    k = next(i for i, ln in enumerate(lines) if ln and ln[0].isalpha() and "," in ln) + 3  # a data row
    cells = lines[k].split(",")
    cells[2] = "abc"  # the va column of that row
    lines[k] = ",".join(cells)
    bad = ("\n".join(lines) + "\n").encode()
    r = _upload(client, token_for(db, "editor"), [("good.csv", good), ("bad.csv", bad)])
    assert r.status_code == 400
    errs = r.get_json()["errors"]
    assert errs and errs[0]["file"] == "bad.csv" and errs[0]["line"] == k + 1 and errs[0]["column"] is not None
    assert _count(db) == 0  # the good file was not stored either


def test_upload_needs_an_editor_token(api):
    client, db, good = api
    assert client.post("/api/v1/measurements", data={"type": "DT"}).status_code == 401
    assert _upload(client, "pbk_not-a-token", [("good.csv", good)]).status_code == 401
    assert _upload(client, token_for(db, "viewer"), [("good.csv", good)]).status_code == 403
    assert _count(db) == 0


def test_an_unknown_type_is_a_400_naming_the_field(api):
    client, db, good = api
    r = _upload(client, token_for(db, "editor"), [("good.csv", good)], tube_type="NOPE")
    assert r.status_code == 400 and r.get_json()["errors"][0]["field"] == "type"
    assert _count(db) == 0


def test_card_and_spice_of_a_unit_and_404_for_an_unknown_one(api):
    client, db, good = api
    tok = token_for(db, "editor")
    uid = _upload(client, tok, [("good.csv", good)]).get_json()["units"][0]["id"]
    card = client.get(f"/api/v1/units/{uid}/card", headers=_auth(tok))
    assert card.status_code == 200 and card.get_json()["model"] == "koren"
    sp = client.get(f"/api/v1/units/{uid}/spice", headers=_auth(tok)).get_data(as_text=True)
    assert ".SUBCKT" in sp.upper() and ".ENDS" in sp.upper()
    r = client.get("/api/v1/units/99999/card", headers=_auth(tok))
    assert r.status_code == 404 and r.get_json()["errors"][0]["field"] == "id"
    assert client.get("/api/v1/units/abc/spice", headers=_auth(tok)).status_code == 400


def test_match_gives_the_same_optimum_as_platebook_match(api, tmp_path):
    client, db, good = api
    tok = token_for(db, "editor")
    units = _upload(client, tok, [("good.csv", good)]).get_json()["units"]
    ids = {f"{u['tube']}:{u['section']}": u["id"] for u in units}
    r = client.post("/api/v1/match", json={"units": list(ids.values()), "va": VA, "vg": VG, "tolerance": 5, "group": 2},
                    headers=_auth(tok))
    assert r.status_code == 200, r.get_json()
    got = r.get_json()
    # the independent route: the same file fitted and matched by the command line
    (tmp_path / "good.csv").write_bytes(good)
    fits = subprocess.run(PLATEBOOK + ["fit", str(tmp_path / "good.csv"), "--model", "koren", "--json"],
                          capture_output=True, text=True, check=True).stdout
    (tmp_path / "fits.json").write_text(fits)
    cli = json.loads(subprocess.run(PLATEBOOK + ["match", str(tmp_path / "fits.json"), "--va", str(VA), "--vg", str(VG),
                                                 "--tolerance", "5", "--json"],
                                    capture_output=True, text=True, check=True).stdout)
    want = sorted((sorted(ids[x] for x in g["units"]), g["mismatch"]["max_pct"]) for g in cli["groups"])
    have = sorted((sorted(g["units"]), g["mismatch"]["max_pct"]) for g in got["groups"])
    assert [w[0] for w in want] == [h[0] for h in have]
    assert [h[1] for h in have] == pytest.approx([w[1] for w in want], rel=1e-9)
    assert len(got["unmatched"]) == len(cli["unmatched"]) + len(cli["excluded"])


def test_match_errors_name_the_field(api):
    client, db, _ = api
    tok = token_for(db, "viewer")
    r = client.post("/api/v1/match", json={"units": [1], "vg": -2}, headers=_auth(tok))
    assert r.status_code == 400 and r.get_json()["errors"][0]["field"] == "va"
    r = client.post("/api/v1/match", json={"units": "x", "va": 1, "vg": -2}, headers=_auth(tok))
    assert r.status_code == 400 and r.get_json()["errors"][0]["field"] == "units"
    r = client.post("/api/v1/match", data="not json", headers=_auth(tok))
    assert r.status_code == 400 and r.get_json()["errors"][0]["field"] == "body"


def test_stage_gives_the_figures_of_platebook_stage_json(api, tmp_path):
    client, db, good = api
    tok = token_for(db, "editor")
    uid = _upload(client, tok, [("good.csv", good)]).get_json()["units"][0]["id"]
    circuit = {"b_plus": 300, "ra": "100k", "rk": "1.5k", "ck": "22u", "rl": "470k", "rg": "1M", "rs": 0,
               "c_load": 0, "cgk": 0, "cga": 0, "cak": 0, "heater": 0, "vhk_max": 100}
    r = client.post("/api/v1/stage", json={"kind": "common-cathode", "circuit": circuit, "tube": uid},
                    headers=_auth(tok))
    assert r.status_code == 200, r.get_json()
    got = r.get_json()
    card = tmp_path / "unit.json"
    card.write_text(client.get(f"/api/v1/units/{uid}/card", headers=_auth(tok)).get_data(as_text=True))
    cli = json.loads(subprocess.run(PLATEBOOK + ["stage", "common-cathode", "--tube", str(card), "--bplus", "300",
                                                 "--ra", "100k", "--rk", "1.5k", "--ck", "22u", "--rl", "470k", "--json"],
                                    capture_output=True, text=True, check=True).stdout)

    def numbers(d, prefix=""):
        out = {}
        for k, v in d.items():
            if isinstance(v, dict):
                out.update(numbers(v, prefix + k + "."))
            elif isinstance(v, (int, float)) and not isinstance(v, bool):
                out[prefix + k] = v
        return out

    a, b = numbers(got), numbers(cli)
    assert a.keys() == b.keys() and len(a) > 10
    for k in a:
        assert a[k] == pytest.approx(b[k], rel=1e-9, abs=1e-12), k


def test_stage_input_errors_name_the_field(api):
    client, db, good = api
    tok = token_for(db, "editor")
    uid = _upload(client, tok, [("good.csv", good)]).get_json()["units"][0]["id"]
    r = client.post("/api/v1/stage", json={"kind": "common-cathode", "circuit": {"b_plus": 300, "ra": "lots", "rk": 1000},
                                           "tube": uid}, headers=_auth(tok))
    assert r.status_code == 400 and r.get_json()["errors"][0]["field"] == "ra"
    r = client.post("/api/v1/stage", json={"kind": "pentode", "circuit": {}, "tube": uid}, headers=_auth(tok))
    assert r.status_code == 400 and r.get_json()["errors"][0]["field"] == "kind"


def test_openapi_document_is_json_and_describes_every_route(fresh_app):
    r = fresh_app.test_client().get("/api/v1/openapi.json")
    assert r.status_code == 200
    doc = json.loads(r.get_data(as_text=True))
    assert doc["openapi"].startswith("3.")
    assert {"/measurements", "/units/{id}/card", "/units/{id}/spice", "/match", "/stage"} <= set(doc["paths"])
    # every route of the blueprint is in the document (Flask's own url map, read independently)
    rules = {r.rule.replace("/api/v1", "").replace("<unit_id>", "{id}").replace("<plot_id>", "{id}")
             for r in fresh_app.url_map.iter_rules() if r.rule.startswith("/api/v1")}
    assert rules == set(doc["paths"])


def test_a_session_cookie_does_not_replace_csrf_on_the_api(fresh_signed_in):
    c = fresh_signed_in("editor")
    r = c.post("/api/v1/match", json={"units": [1], "va": 1, "vg": -1})
    assert r.status_code == 400 and "security token" in r.get_json()["errors"][0]["message"]


def test_the_same_file_twice_is_stored_once_and_the_second_answer_says_so(api):
    client, db, good = api
    tok = token_for(db, "editor")
    first = _upload(client, tok, [("good.csv", good)]).get_json()
    again = _upload(client, tok, [("copy.csv", good)])
    assert again.status_code == 201
    assert again.get_json()["units"] == [] and again.get_json()["files"][0]["duplicate"] is True
    assert len(first["units"]) == 4 and _count(db) == 2


def test_the_same_curves_under_another_label_are_stored_with_a_warning(api):
    """A re-labelled copy (other bytes, the same measured points) is stored: a dealer may
    re-label on purpose; the answer warns which tube's points it repeats."""
    client, db, good = api
    tok = token_for(db, "editor")
    first = _upload(client, tok, [("good.csv", good)]).get_json()
    assert first["warnings"] == []
    copy = good.decode().replace("API02", "RELABEL").encode()
    r = _upload(client, tok, [("copy.csv", copy)])
    assert r.status_code == 201
    d = r.get_json()
    assert sorted(u["tube"] for u in d["units"]) == ["API01", "API01", "RELABEL", "RELABEL"]  # all stored
    assert d["warnings"] == [
        "copy.csv: RELABEL:A: the same measured points as API02:A; stored all the same (a re-labelled copy of the "
        "same curves?)",
        "copy.csv: RELABEL:B: the same measured points as API02:B; stored all the same (a re-labelled copy of the "
        "same curves?)"]
    assert _count(db) == 3
