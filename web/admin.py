"""Accounts page for admins: every account, its role and state; change a role, disable or
enable, make an API token (shown once).  Creating accounts stays on the command line
(`platebook users add`), where a password is typed without passing through a browser form."""

from __future__ import annotations

from flask import Blueprint, flash, g, redirect, render_template, request, url_for

from fitter.errors import InputError
from fitter.service import accounts

from .auth import ledger, need

bp = Blueprint("admin", __name__)


@bp.route("/accounts")
@need("admin")
def index():
    d = accounts.list_accounts(db=ledger()).data
    return render_template("accounts.html", title="Accounts", d=d, roles=accounts.ROLES, token=None)


@bp.route("/accounts/<name>", methods=["POST"])
@need("admin")
def change(name):
    action = request.form.get("action", "")
    if name == g.user["name"] and action in ("role", "disable"):
        raise InputError("an admin does not change or disable their own account here (another admin can)",
                         field="name")
    if action == "role":
        r = accounts.set_role(db=ledger(), name=name, role=request.form.get("role", ""))
    elif action == "disable":
        r = accounts.set_disabled(db=ledger(), name=name, disabled=True)
    elif action == "enable":
        r = accounts.set_disabled(db=ledger(), name=name, disabled=False)
    elif action == "token":
        r = accounts.new_token(db=ledger(), name=name, note=request.form.get("note", "")[:200])
        d = accounts.list_accounts(db=ledger()).data
        return render_template("accounts.html", title="Accounts", d=d, roles=accounts.ROLES, token=r.data)
    else:
        raise InputError("unknown action", field="action")
    flash(r.lines[0])
    return redirect(url_for("admin.index"))
