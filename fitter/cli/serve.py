"""``platebook serve``: the web front end on this machine, with waitress.

It listens on 127.0.0.1 only (a shop that wants it on its network puts a reverse proxy
with HTTPS in front, or runs gunicorn: README).  The ledger is ``--db`` or the default.
"""

from __future__ import annotations

import os

import click

from . import fail, main


@main.command("serve")
@click.option("--db", default=None, metavar="URL", help="The ledger (default: $PLATEBOOK_DB, else the data folder's).")
@click.option("--port", type=click.IntRange(1, 65535), default=8150, show_default=True, help="TCP port on 127.0.0.1.")
@click.option("--threads", type=click.IntRange(1, 64), default=4, show_default=True, help="Worker threads.")
@click.option("--secure-cookies", is_flag=True, help="Send the session cookie over HTTPS only (behind a TLS proxy).")
def serve(db, port, threads, secure_cookies):
    """Serve the web front end on this machine (127.0.0.1) over the ledger."""
    from ..errors import InputError
    from ..service import stock

    try:
        where = stock.init(db).data["db"]  # create or upgrade the ledger before the first request
    except InputError as e:
        fail(str(e))
    import waitress

    from web import create_app

    app = create_app({"LEDGER": db, "SESSION_COOKIE_SECURE": secure_cookies, "JOB_WORKER": True})
    if not os.environ.get("PLATEBOOK_SECRET_KEY"):
        click.echo("note: no PLATEBOOK_SECRET_KEY set; sessions end when the server stops")
    click.echo(f"Platebook on http://127.0.0.1:{port}/ over {where} (Ctrl-C stops it)")
    try:
        waitress.serve(app, host="127.0.0.1", port=port, threads=threads, ident="platebook")
    except OSError as e:
        fail(f"--port: cannot listen on 127.0.0.1:{port}: {e.strerror or e}")
