"""The upload page: one or more curve files, every error with file, line and column,
nothing stored on error."""

from __future__ import annotations

from flask import Blueprint, current_app, g, redirect, render_template, request, url_for

from fitter.errors import InputError
from fitter.models import MODELS
from fitter.service import jobs, stock, web_support

from .auth import ledger, need

bp = Blueprint("upload", __name__)


def _form(**extra):
    types = stock.types(db=ledger()).data["types"]
    return render_template("upload.html", title="Upload", types=types, models=list(MODELS),
                           max_mb=web_support.MAX_UPLOAD_BYTES // (1024 * 1024), **extra)


@bp.route("/upload", methods=["GET"])
@need("editor")
def form():
    return _form()


@bp.route("/upload", methods=["POST"])
@need("editor")
def post():
    files = [(f.filename or "", f.read()) for f in request.files.getlist("file") if f and (f.filename or "")]
    chosen = {"type": request.form.get("type", ""), "model": request.form.get("model", "koren")}
    extra = {"instrument": request.form.get("instrument", "")[:200], "notes": request.form.get("notes", "")[:2000]}
    if sum(len(d) for _, d in files) > current_app.config["BACKGROUND_BYTES"]:
        try:
            job_id = jobs.submit(ledger(), g.user["name"], files, chosen["type"], chosen["model"], **extra)
        except web_support.UploadError as e:
            return _form(errors=e.errors, chosen=chosen), 400
        except InputError as e:
            return _form(errors=[{"file": e.file, "line": e.line, "column": e.column,
                                  "message": (f"{e.field}: " if e.field and not e.file else "") + e.message}],
                         chosen=chosen), 400
        return redirect(url_for("upload.job", job_id=job_id))
    try:
        res = web_support.import_uploads(ledger(), g.user["name"], files, chosen["type"], chosen["model"],
                                         instrument=request.form.get("instrument", "")[:200],
                                         notes=request.form.get("notes", "")[:2000])
    except web_support.UploadError as e:
        return _form(errors=e.errors, chosen=chosen), 400
    except InputError as e:
        return _form(errors=[{"file": e.file, "line": e.line, "column": e.column,
                              "message": (f"{e.field}: " if e.field and not e.file else "") + e.message}],
                     chosen=chosen), 400
    return _form(done=res, chosen=chosen)


@bp.route("/jobs/<int:job_id>")
@need("editor")
def job(job_id):
    d = jobs.job(ledger(), job_id)
    return render_template("job.html", title=f"Upload job {job_id}", d=d)
