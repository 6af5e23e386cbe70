"""``platebook users ...``: accounts of the web front end (kept in the ledger).

Thin layer over :mod:`fitter.service.accounts`.  A password is read from the terminal
(asked twice), or from standard input with ``--password-stdin`` for scripts; it is never an
option (an option would sit in the shell history and the process list).
"""

from __future__ import annotations

import sys

import click

from . import main
from .fields import run_service

OPTION_OF = {"db": "--db", "name": "NAME", "role": "--role", "password": "password", "prefix": "PREFIX",
             "note": "--note"}


def _run(ctx, fn, as_json=False, **fields):
    run_service(ctx, fn, as_json, OPTION_OF, **fields)


_json = click.option("--json", "as_json", is_flag=True, help="Print one JSON object.")


def _read_password(from_stdin: bool) -> str:
    if from_stdin:
        return sys.stdin.readline().rstrip("\r\n")
    return click.prompt("password", hide_input=True, confirmation_prompt=True)


@main.group("users")
@click.option("--db", default=None, metavar="URL", help="The ledger (default: $PLATEBOOK_DB, else the data folder's).")
@click.pass_context
def users(ctx, db):
    """Accounts of the web front end (viewer, editor, admin) and their API tokens."""
    ctx.obj = {"db": db}


@users.command("add")
@click.argument("name")
@click.option("--role", type=click.Choice(["viewer", "editor", "admin"]), default="viewer", show_default=True)
@click.option("--password-stdin", is_flag=True, help="Read the password from the first line of standard input.")
@_json
@click.pass_context
def add_cmd(ctx, name, role, password_stdin, as_json):
    """Create the account NAME."""
    from ..service import accounts as svc

    _run(ctx, svc.add_account, as_json, name=name, role=role, password=_read_password(password_stdin))


@users.command("list")
@_json
@click.pass_context
def list_cmd(ctx, as_json):
    """Every account with its role, state and token prefixes."""
    from ..service import accounts as svc

    _run(ctx, svc.list_accounts, as_json)


@users.command("role")
@click.argument("name")
@click.argument("role", type=click.Choice(["viewer", "editor", "admin"]))
@_json
@click.pass_context
def role_cmd(ctx, name, role, as_json):
    """Give NAME the role ROLE."""
    from ..service import accounts as svc

    _run(ctx, svc.set_role, as_json, name=name, role=role)


@users.command("password")
@click.argument("name")
@click.option("--password-stdin", is_flag=True, help="Read the password from the first line of standard input.")
@click.pass_context
def password_cmd(ctx, name, password_stdin):
    """Set a new password for NAME."""
    from ..service import accounts as svc

    _run(ctx, svc.set_password, name=name, password=_read_password(password_stdin))


@users.command("disable")
@click.argument("name")
@click.option("--enable", is_flag=True, help="Enable the account again.")
@click.pass_context
def disable_cmd(ctx, name, enable):
    """Disable NAME (it can no longer sign in or use its tokens; nothing is deleted)."""
    from ..service import accounts as svc

    _run(ctx, svc.set_disabled, name=name, disabled=not enable)


@users.command("token")
@click.argument("name")
@click.option("--note", default="", help="What the token is for.")
@_json
@click.pass_context
def token_cmd(ctx, name, note, as_json):
    """Make an API token for NAME (printed once; only its hash is kept)."""
    from ..service import accounts as svc

    _run(ctx, svc.new_token, as_json, name=name, note=note)


@users.command("revoke")
@click.argument("prefix")
@click.pass_context
def revoke_cmd(ctx, prefix):
    """Revoke the API token(s) starting with PREFIX (as listed)."""
    from ..service import accounts as svc

    _run(ctx, svc.revoke_token, prefix=prefix)
