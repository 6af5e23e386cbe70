"""Platebook's web front end: the stock, tubes, uploads and the JSON API over the ledger.

:func:`create_app` builds the Flask application.  Views are thin: they parse the request,
call :mod:`fitter.service` (stock, web_support, accounts) and render; no numerics here.

Security in one place (this module and :mod:`web.auth`): session cookies HttpOnly and
SameSite=Lax (Secure when ``SESSION_COOKIE_SECURE``), a CSRF token on every form (our own:
a random token in the session, compared in constant time on every unsafe request that is
not an API call with a Bearer token), a Content-Security-Policy allowing only this origin
and no inline script, ``X-Content-Type-Options: nosniff``, ``frame-ancestors 'none'``.
"""

from __future__ import annotations

import os
import secrets

from flask import Flask, g, render_template, request

from fitter import CAUTION

__all__ = ["create_app", "DEFAULTS"]

#: settings and their defaults (``config`` passed to :func:`create_app` overrides them)
DEFAULTS = {
    "LEDGER": None,  # the ledger's URL or SQLite path (None: $PLATEBOOK_DB or the data folder's)
    "SESSION_COOKIE_HTTPONLY": True,
    "SESSION_COOKIE_SAMESITE": "Lax",
    "SESSION_COOKIE_SECURE": False,  # set True behind HTTPS
    "SESSION_COOKIE_NAME": "platebook_session",
    "MAX_CONTENT_LENGTH": 64 * 1024 * 1024,  # a whole request; each file has its own limit
    "PER_PAGE": 50,
    "PLOT_CACHE_SIZE": 256,  # plots kept in memory, by fit id (a stored fit never changes)
    "SIGNIN_FREE_FAILURES": 3,  # failures per account and address before the back-off starts
    "SIGNIN_BACKOFF_S": 1.0,
    "BACKGROUND_BYTES": 2 * 1024 * 1024,  # uploads larger than this run as a background job
    "JOB_WORKER": False,  # start the background worker thread (platebook serve does)
}

CSP = ("default-src 'self'; script-src 'self'; style-src 'self'; img-src 'self' data:; "
       "object-src 'none'; base-uri 'none'; form-action 'self'; frame-ancestors 'none'")


def create_app(config: dict | None = None) -> Flask:
    """The application, configured by :data:`DEFAULTS`, then ``PLATEBOOK_*`` environment
    variables (``PLATEBOOK_SECRET_KEY``), then ``config``."""
    from fitter.service.accounts import SignInThrottle

    from . import admin, api, auth, compare, design, digitise, matching, stages, stock, tubes, upload
    from .plots import PlotCache

    app = Flask(__name__)
    app.config.update(DEFAULTS)
    key = os.environ.get("PLATEBOOK_SECRET_KEY")
    app.config["SECRET_KEY"] = key or secrets.token_hex(32)  # a fresh key signs everyone out on restart
    app.config.update(config or {})
    app.extensions["platebook.throttle"] = SignInThrottle(free=app.config["SIGNIN_FREE_FAILURES"],
                                                          base=app.config["SIGNIN_BACKOFF_S"])
    app.extensions["platebook.plots"] = PlotCache(app.config["PLOT_CACHE_SIZE"])
    if app.config["JOB_WORKER"]:
        from fitter.service.jobs import Worker

        app.extensions["platebook.worker"] = Worker(app.config["LEDGER"]).start()
    for bp in (auth.bp, stock.bp, tubes.bp, upload.bp, matching.bp, stages.bp, design.bp, compare.bp, admin.bp,
               api.bp, digitise.bp):
        app.register_blueprint(bp)
    app.before_request(auth.load_user)
    app.before_request(auth.check_csrf)

    @app.after_request
    def headers(resp):
        resp.headers["Content-Security-Policy"] = CSP
        resp.headers["X-Content-Type-Options"] = "nosniff"
        resp.headers["X-Frame-Options"] = "DENY"
        resp.headers["Referrer-Policy"] = "same-origin"
        if "Cache-Control" not in resp.headers and not request.path.startswith("/static/"):
            resp.headers["Cache-Control"] = "no-store"
        return resp

    @app.context_processor
    def common():
        return {"caution": CAUTION, "user": g.get("user"), "csrf_token": auth.csrf_token}

    def page_error(code, title, text):
        if request.path.startswith("/api/"):
            return {"errors": [{"field": None, "message": text}]}, code
        return render_template("error.html", title=title, text=text), code

    from fitter.errors import InputError, NotFound
    from fitter.service.web_support import UploadError

    @app.errorhandler(InputError)
    def input_error(e):
        """A service's input error: the field (or file, line, column) and the message."""
        if request.path.startswith("/api/"):
            errors = e.errors if isinstance(e, UploadError) else [e.to_dict()]
            return {"errors": errors}, 400
        if isinstance(e, NotFound):  # a tube, unit, plot or job that is not there
            return render_template("error.html", title="Not found", text=str(e)), 404
        return render_template("error.html", title="That did not work", text=str(e),
                               errors=getattr(e, "errors", None)), 400

    app.register_error_handler(400, lambda e: page_error(400, "Bad request", e.description))
    app.register_error_handler(403, lambda e: page_error(403, "Not allowed", e.description))
    app.register_error_handler(404, lambda e: page_error(404, "Not found", "There is nothing at this address."))
    app.register_error_handler(405, lambda e: page_error(405, "Not allowed", "This address does not take that method."))
    app.register_error_handler(413, lambda e: page_error(
        413, "Too large", f"The upload is larger than {app.config['MAX_CONTENT_LENGTH'] / (1024 * 1024):.3g} MB "
                          "allowed in one request; send fewer files at a time."))
    app.register_error_handler(500, lambda e: page_error(500, "Server error",
                                                         "Something went wrong on our side; nothing was changed."))
    return app
