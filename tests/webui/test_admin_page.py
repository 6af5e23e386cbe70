"""The accounts page: admins only; role changes, disabling and tokens go through the
accounts service; an admin cannot lock themselves out here."""

from __future__ import annotations

from fitter.service import accounts

from .webtools import PASSWORD, csrf_of, sign_in


def test_only_admins_see_the_accounts_page(signed_in):
    assert signed_in("viewer").get("/accounts").status_code == 403
    assert signed_in("editor").get("/accounts").status_code == 403
    html = signed_in("admin").get("/accounts").get_data(as_text=True)
    assert "viewer1" in html and "editor1" in html


def test_an_admin_changes_a_role_disables_and_makes_a_token(fresh_app, fresh):
    c = fresh_app.test_client()
    assert sign_in(c, "admin1").status_code == 302
    tok = csrf_of(c.get("/accounts").get_data(as_text=True))
    assert c.post("/accounts/viewer1", data={"csrf_token": tok, "action": "role", "role": "editor"}).status_code == 302
    assert {a["name"]: a["role"] for a in accounts.list_accounts(fresh).data["accounts"]}["viewer1"] == "editor"
    r = c.post("/accounts/editor1", data={"csrf_token": tok, "action": "token", "note": "tracer"})
    html = r.get_data(as_text=True)
    token = html.split("<p><code>")[1].split("</code>")[0]
    assert accounts.check_token(fresh, token)["name"] == "editor1"
    c.post("/accounts/editor1", data={"csrf_token": tok, "action": "disable"})
    assert accounts.check_token(fresh, token) is None
    assert sign_in(fresh_app.test_client(), "editor1", PASSWORD).status_code == 401


def test_an_admin_cannot_disable_themselves_here(signed_in):
    c = signed_in("admin")
    tok = csrf_of(c.get("/accounts").get_data(as_text=True))
    r = c.post("/accounts/admin1", data={"csrf_token": tok, "action": "disable"})
    assert r.status_code == 400 and "their own account" in r.get_data(as_text=True)
