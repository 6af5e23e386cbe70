"""``platebook stock ...``: the stock ledger on the command line.

Thin layer over :mod:`fitter.service.stock`: parse the options into the use case's fields,
call it, print its text report or its JSON.  Errors name the option (the service's field,
mapped by :data:`OPTION_OF`).  Exit status 0 ok, 1 input or database error, 2 a fit failed
(the measurement is stored all the same).
"""

from __future__ import annotations

import getpass
import os

import click

from . import fail, main
from .fields import run_service

#: the service's field names, as this front end calls them
OPTION_OF = {
    "db": "--db", "user": "--user", "type": "--type", "va": "--va", "vg": "--vg", "group": "--group",
    "accept": "--accept", "group_id": "GROUP", "order": "--order", "labels": "LABEL", "files": "FILE",
    "model": "--model", "sort": "--sort", "status": "--status", "limit": "--limit", "offset": "--offset",
    "weak_pct": "--weak", "balance_pct": "--balance", "position": "--va/--vg", "folder": "FOLDER",
    "target": "TARGET", "nominal_card": "--nominal-card", "pa_max": "--pa-max", "vhk_max": "--vhk-max",
    "location": "--location", "notes": "--notes", "instrument": "--instrument", "measurement": "MEASUREMENT",
    "label": "LABEL",
}

USER_ENV = "PLATEBOOK_USER"


def _default_user() -> str:
    try:
        return os.environ.get(USER_ENV) or getpass.getuser()
    except Exception:  # no login name (some containers): the history then needs --user
        return ""


def _run(ctx, fn, as_json=False, **fields):
    run_service(ctx, fn, as_json, OPTION_OF, **fields)


_json = click.option("--json", "as_json", is_flag=True, help="Print one JSON object.")


@main.group("stock")
@click.option("--db", default=None, metavar="URL",
              help="The ledger: a SQLite file or postgresql+psycopg://USER@HOST/DB (default: $PLATEBOOK_DB, else "
                   "the data folder's ledger.sqlite).")
@click.option("--user", default=None, help="Who is acting, for the history (default: $PLATEBOOK_USER or the login).")
@click.pass_context
def stock(ctx, db, user):
    """The stock ledger: every tube, measurement, fit, re-test, grade and reservation."""
    ctx.obj = {"db": db, "user": user if user is not None else _default_user()}


@stock.command("init")
@_json
@click.pass_context
def init_cmd(ctx, as_json):
    """Create the ledger, or bring its schema up to date."""
    from ..service import stock as svc

    _run(ctx, svc.init, as_json)


@stock.command("type")
@click.argument("designation")
@click.option("--va", type=float, required=True, help="Test position: plate voltage [V] (grading uses it).")
@click.option("--vg", type=float, required=True, help="Test position: grid voltage [V].")
@click.option("--single", is_flag=True, help="A single triode (default: dual, two sections per bottle).")
@click.option("--pa-max", type=float, default=None, help="Plate dissipation limit per section [W].")
@click.option("--vhk-max", type=float, default=None, help="Heater-cathode voltage limit [V].")
@click.option("--nominal-card", default=None, type=click.Path(dir_okay=False),
              help="A model card of the datasheet curves: nominal figures at the test position "
                   "(default: the median of the stock).")
@click.option("--notes", default="", help="Free notes.")
@_json
@click.pass_context
def type_cmd(ctx, designation, va, vg, single, pa_max, vhk_max, nominal_card, notes, as_json):
    """Add a tube type DESIGNATION with its test position."""
    from ..service import stock as svc

    _run(ctx, svc.add_type, as_json, designation=designation, va=va, vg=vg, dual=not single, pa_max=pa_max,
         vhk_max=vhk_max, nominal_card=nominal_card, notes=notes)


@stock.command("types")
@_json
@click.pass_context
def types_cmd(ctx, as_json):
    """List the tube types."""
    from ..service import stock as svc

    _run(ctx, svc.types, as_json)


@stock.command("import")
@click.argument("files", nargs=-1, required=True)
@click.option("--type", "tube_type", required=True, help="The tube type of the file's tubes.")
@click.option("--instrument", default="", help="The instrument the curves were traced on.")
@click.option("--notes", default="", help="Free notes on this measurement.")
@click.option("--model", default="koren", show_default=True, help="Model to fit.")
@click.option("--jobs", type=click.IntRange(1, 256), default=None, help="Worker processes (default: all cores).")
@_json
@click.pass_context
def import_cmd(ctx, files, tube_type, instrument, notes, model, jobs, as_json):
    """Import curve FILE(s): read, fit and store each all or nothing.  A tube label already
    in the ledger makes a re-test, shown with its drift; a file imported before is skipped."""
    from ..service import stock as svc

    _run(ctx, svc.import_files, as_json, paths=list(files), tube_type=tube_type, instrument=instrument,
         notes=notes, model=model, jobs=jobs)


@stock.command("list")
@click.option("--type", "tube_type", default=None, help="Only this type.")
@click.option("--grade", default=None, help="Only tubes with this latest grade.")
@click.option("--status", default=None, help="Only tubes with this status (in-stock, reserved, sold, retired).")
@click.option("--sort", default="label", show_default=True, help="label, type, status, grade or created.")
@click.option("--desc", is_flag=True, help="Sort descending.")
@click.option("--limit", type=int, default=100, show_default=True, help="Tubes per page.")
@click.option("--offset", type=int, default=0, show_default=True, help="Skip this many tubes.")
@_json
@click.pass_context
def list_cmd(ctx, tube_type, grade, status, sort, desc, limit, offset, as_json):
    """Tubes with their latest figures at the type's test position and their grade."""
    from ..service import stock as svc

    _run(ctx, svc.list_tubes, as_json, tube_type=tube_type, grade=grade, status=status, sort=sort,
         descending=desc, limit=limit, offset=offset)


@stock.command("show")
@click.argument("label")
@_json
@click.pass_context
def show_cmd(ctx, label, as_json):
    """One tube: figures, drift since its first measurement, grades, groups, history."""
    from ..service import stock as svc

    _run(ctx, svc.show_tube, as_json, label=label)


@stock.command("grade")
@click.option("--type", "tube_type", required=True, help="Grade every in-stock or reserved tube of this type.")
@click.option("--weak", "weak_pct", type=float, default=80.0, show_default=True,
              help="Weak below this share of nominal Ia or gm [%].")
@click.option("--balance", "balance_pct", type=float, default=10.0, show_default=True,
              help="Out of balance when a bottle's sections differ by more than this [%].")
@_json
@click.pass_context
def grade_cmd(ctx, tube_type, weak_pct, balance_pct, as_json):
    """Grade tubes against the type's nominal figures at its test position."""
    from ..service import stock as svc

    _run(ctx, svc.grade, as_json, tube_type=tube_type, weak_pct=weak_pct, balance_pct=balance_pct)


@stock.command("match")
@click.option("--type", "tube_type", required=True, help="Match the in-stock, unreserved tubes of this type.")
@click.option("--va", type=float, default=None, help="Plate voltage [V] (default: the type's test position).")
@click.option("--vg", type=float, default=None, help="Grid voltage [V] (default: the type's test position).")
@click.option("--group", type=click.Choice(["pairs", "quads", "bottles"]), default="pairs", show_default=True,
              help="Section pairs, section quads, or pairs of whole bottles (dual triodes).")
@click.option("--tolerance", type=float, default=5.0, show_default=True,
              help="Ia and gm within this many percent of the pair's mean.")
@click.option("--extrapolate", is_flag=True, help="Let units whose data do not cover the position take part.")
@click.option("--reserve", "reserve_order", default=None, metavar="ORDER",
              help="Reserve the groups found (or those named by --accept) for this order.")
@click.option("--accept", default=None, help="With --reserve: the group numbers to reserve, e.g. 1,3.")
@click.option("--include-weak", is_flag=True, help="Let tubes whose latest grade is weak take part.")
@_json
@click.pass_context
def match_cmd(ctx, tube_type, va, vg, group, tolerance, extrapolate, reserve_order, accept, include_weak, as_json):
    """Match tubes straight from the ledger; optionally reserve the groups for an order."""
    from ..service import stock as svc

    picks = None
    if accept:
        try:
            picks = [int(x) for x in accept.split(",") if x.strip()]
        except ValueError:
            fail(f"--accept: cannot read {accept!r}; give group numbers such as 1,3")
    _run(ctx, svc.match, as_json, tube_type=tube_type, va=va, vg=vg, group=group, tolerance_pct=tolerance,
         extrapolate=extrapolate, reserve_order=reserve_order, accept=picks, include_weak=include_weak)


@stock.command("reserve")
@click.argument("labels", nargs=-1, required=True)
@click.option("--order", required=True, help="The order the tubes are reserved for.")
@_json
@click.pass_context
def reserve_cmd(ctx, labels, order, as_json):
    """Reserve tubes LABEL... (or sections LABEL:SECTION) as one group for an order."""
    from ..service import stock as svc

    _run(ctx, svc.reserve, as_json, labels=list(labels), order=order)


@stock.command("labels")
@click.argument("group", type=int)
@_json
@click.pass_context
def labels_cmd(ctx, group, as_json):
    """Text labels for the tubes of a reserved or sold GROUP."""
    from ..service import stock as svc

    _run(ctx, svc.labels, as_json, group_id=group)


@stock.command("sell")
@click.argument("labels", nargs=-1, required=True)
@click.option("--order", default=None, help="The order they were sold for.")
@_json
@click.pass_context
def sell_cmd(ctx, labels, order, as_json):
    """Mark tubes as sold (their reserved group is sold with them)."""
    from ..service import stock as svc

    _run(ctx, svc.set_status, as_json, labels=list(labels), status="sold", order=order)


@stock.command("release")
@click.argument("labels", nargs=-1, required=True)
@_json
@click.pass_context
def release_cmd(ctx, labels, as_json):
    """Put reserved tubes back in stock (their group is released)."""
    from ..service import stock as svc

    _run(ctx, svc.set_status, as_json, labels=list(labels), status="in-stock")


@stock.command("retire")
@click.argument("labels", nargs=-1, required=True)
@click.option("--reason", default="", help="Why.")
@_json
@click.pass_context
def retire_cmd(ctx, labels, reason, as_json):
    """Retire tubes (kept in the ledger, never matched again)."""
    from ..service import stock as svc

    _run(ctx, svc.set_status, as_json, labels=list(labels), status="retired", reason=reason)


@stock.command("edit")
@click.argument("label")
@click.option("--location", default=None, help="Where the tube is kept.")
@click.option("--notes", default=None, help="Free notes on the tube.")
@_json
@click.pass_context
def edit_cmd(ctx, label, location, notes, as_json):
    """Set where tube LABEL is kept, or its notes (the history keeps the old values)."""
    from ..service import stock as svc

    _run(ctx, svc.edit, as_json, label=label, location=location, notes=notes)


@stock.command("supersede")
@click.argument("measurement", type=int)
@click.option("--reason", default="", help="Why.")
@_json
@click.pass_context
def supersede_cmd(ctx, measurement, reason, as_json):
    """Mark MEASUREMENT (its number in 'stock show') superseded: kept, no longer current."""
    from ..service import stock as svc

    _run(ctx, svc.supersede, as_json, measurement=measurement, reason=reason)


@stock.command("refit")
@click.option("--type", "tube_type", required=True, help="Re-fit the measurements of this type.")
@click.option("--model", default="koren", show_default=True, help="Model to fit.")
@click.option("--jobs", type=click.IntRange(1, 256), default=None, help="Worker processes (default: all cores).")
@_json
@click.pass_context
def refit_cmd(ctx, tube_type, model, jobs, as_json):
    """Fit stored measurements again with the current engine (the old fits stay)."""
    from ..service import stock as svc

    _run(ctx, svc.refit, as_json, tube_type=tube_type, model=model, jobs=jobs)


@stock.command("history")
@click.argument("label", required=False)
@click.option("--limit", type=int, default=50, show_default=True, help="The latest this many events.")
@_json
@click.pass_context
def history_cmd(ctx, label, limit, as_json):
    """What happened (to one tube, LABEL, or to the whole ledger), who did it and when."""
    from ..service import stock as svc

    _run(ctx, svc.history, as_json, label=label, limit=limit)


@stock.command("backup")
@click.argument("folder")
@_json
@click.pass_context
def backup_cmd(ctx, folder, as_json):
    """Back up the whole ledger to a new FOLDER (CSV files, source files, model cards)."""
    from ..service import stock as svc

    _run(ctx, svc.backup, as_json, folder=folder)


@stock.command("restore")
@click.argument("folder")
@_json
@click.pass_context
def restore_cmd(ctx, folder, as_json):
    """Restore a back-up FOLDER into an empty ledger."""
    from ..service import stock as svc

    _run(ctx, svc.restore, as_json, folder=folder)


@stock.command("copy")
@click.argument("target")
@_json
@click.pass_context
def copy_cmd(ctx, target, as_json):
    """Copy the whole ledger into the empty ledger TARGET (a SQLite file or a PostgreSQL URL)."""
    from ..service import stock as svc

    _run(ctx, svc.copy, as_json, target=target)
