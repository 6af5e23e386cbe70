"""The ledger's schema migrations: Alembic's scripts in ``migrations/``, run programmatically
(never from a URL in a file) to bring a ledger to :data:`fitter.ledger.schema.HEAD`."""

from __future__ import annotations

from pathlib import Path

from .errors import LedgerError
from .schema import HEAD

def alembic_config(connection=None):
    from alembic.config import Config

    cfg = Config()
    cfg.set_main_option("script_location", str(Path(__file__).with_name("migrations")))
    cfg.attributes["connection"] = connection
    return cfg


def current_revision(connection) -> str | None:
    from alembic.runtime.migration import MigrationContext

    return MigrationContext.configure(connection).get_current_revision()


def _stamped_head(connection) -> bool:
    """Is the database stamped with :data:`HEAD`?  (Alembic's version table, read directly.)"""
    from sqlalchemy import inspect, text

    if "alembic_version" not in inspect(connection).get_table_names():
        return False
    return connection.execute(text("SELECT version_num FROM alembic_version")).scalars().all() == [HEAD]


def upgrade(ledger) -> bool:
    """Bring the ledger's schema to :data:`HEAD` (Alembic); True when it changed anything.

    Runs in one transaction (both databases have transactional DDL), retried like any unit
    of work, so two processes opening a new ledger at once do not trip over each other.
    """
    with ledger.read_engine.connect() as c:
        if _stamped_head(c):  # the usual case: no need to load Alembic at all
            return False
        rev = current_revision(c)
    if rev == HEAD:
        return False
    from alembic import command

    if rev is not None and rev not in _known_revisions():
        raise LedgerError(f"the ledger's schema (revision {rev}) is newer than this Platebook knows; "
                          "update Platebook", field="db")

    def run(session):
        conn = session.connection()
        if current_revision(conn) == HEAD:  # another process got there first
            return False
        command.upgrade(alembic_config(conn), "head")
        return True

    return ledger.work(run)


def _known_revisions() -> set:
    from alembic.script import ScriptDirectory

    return {s.revision for s in ScriptDirectory.from_config(alembic_config()).walk_revisions()}

