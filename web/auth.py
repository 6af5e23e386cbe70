"""Signing in and out, who is asking, roles, and the CSRF check.

A page request is signed in by the session cookie (``account`` id), an API request by
``Authorization: Bearer <token>``.  The CSRF token is our own (a few lines, no extension):
one random token per session, put into every form by ``csrf_token()`` and compared with
:func:`hmac.compare_digest` on every POST/PUT/PATCH/DELETE that is not a Bearer API call.
"""

from __future__ import annotations

import functools
import hmac
import secrets
import threading

from flask import (Blueprint, abort, current_app, flash, g, redirect, render_template, request, session,
                   url_for)

from fitter.service import accounts as svc

bp = Blueprint("auth", __name__)

ROLE_RANK = {"viewer": 0, "editor": 1, "admin": 2}
#: the one message of a failed sign-in, whatever was wrong (an unknown name or a wrong password)
SIGNIN_FAILED = "That name and password do not match an active account."


_OPENING = threading.Lock()


def ledger():
    """The application's ledger, opened on the first request and kept (a failure to open is
    not kept: the next request tries again)."""
    app = current_app
    led = app.extensions.get("platebook.ledger")
    if led is None:
        with _OPENING:
            led = app.extensions.get("platebook.ledger")
            if led is None:
                from fitter.service.stock import connect

                led = app.extensions["platebook.ledger"] = connect(app.config["LEDGER"])
    return led


def csrf_token() -> str:
    tok = session.get("csrf")
    if not tok:
        tok = session["csrf"] = secrets.token_urlsafe(32)
    return tok


def _bearer() -> str | None:
    h = request.headers.get("Authorization", "")
    return h[7:].strip() if h[:7].lower() == "bearer " else None


def load_user():
    g.user = None
    g.via_token = False
    if request.endpoint == "static":
        return
    token = _bearer()
    if token is not None and request.path.startswith("/api/"):
        g.user = svc.check_token(ledger(), token)
        g.via_token = g.user is not None
        return
    aid = session.get("account")
    if isinstance(aid, int):
        g.user = svc.account(ledger(), aid)
        if g.user is None:
            session.clear()


def check_csrf():
    if request.method in ("GET", "HEAD", "OPTIONS") or g.get("via_token"):
        return
    if request.path.startswith("/api/") and (_bearer() is not None or g.get("user") is None):
        return  # no cookie authority in play: the view answers 401 or the token decided who it is
    sent = request.form.get("csrf_token") or request.headers.get("X-CSRF-Token") or ""
    want = session.get("csrf") or ""
    if not want or not hmac.compare_digest(sent.encode(), want.encode()):
        abort(400, "The form's security token is missing or out of date; reload the page and try again.")


def need(role: str = "viewer"):
    """View decorator: signed in (pages redirect to sign-in, the API answers 401) with at
    least ``role`` (else 403)."""

    def wrap(view):
        @functools.wraps(view)
        def inner(*a, **kw):
            if g.user is None:
                if request.path.startswith("/api/"):
                    return {"errors": [{"field": "authorization", "message":
                                        "sign in: send Authorization: Bearer <token>"}]}, 401
                return redirect(url_for("auth.signin", next=request.full_path if request.method == "GET" else None))
            if ROLE_RANK[g.user["role"]] < ROLE_RANK[role]:
                abort(403, f"This needs the {role} role; you are signed in with the {g.user['role']} role.")
            return view(*a, **kw)

        return inner

    return wrap


def _safe_next(target):
    # only a path on this site (no scheme, no host, no //host)
    if isinstance(target, str) and target.startswith("/") and not target.startswith("//") and "\\" not in target:
        return target
    return url_for("stock.index")


@bp.route("/signin", methods=["GET", "POST"])
def signin():
    error = None
    status = 200
    if request.method == "POST":
        name = request.form.get("name", "")[:64]
        password = request.form.get("password", "")[:1024]
        where = request.remote_addr or "?"
        throttle = current_app.extensions["platebook.throttle"]
        wait = throttle.wait(name, where)
        if wait > 0:
            error = f"Too many failed attempts; try again in {int(wait) + 1} s."
            status = 429
        else:
            who = svc.check_password(ledger(), name, password)
            if who is None:
                throttle.failed(name, where)
                error, status = SIGNIN_FAILED, 401
            else:
                throttle.succeeded(name, where)
                session.clear()
                session["account"] = who["id"]
                csrf_token()
                return redirect(_safe_next(request.args.get("next")))
    return render_template("signin.html", error=error, title="Sign in"), status


@bp.route("/signout", methods=["POST"])
def signout():
    session.clear()
    flash("Signed out.")
    return redirect(url_for("auth.signin"))
