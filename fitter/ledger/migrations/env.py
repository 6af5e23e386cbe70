"""Alembic's environment for the ledger: always run programmatically, on the connection
that :func:`fitter.ledger.migrate.upgrade` passes in (never from a URL in a file)."""

from alembic import context

from fitter.ledger.schema import Base

connection = context.config.attributes.get("connection")
if connection is None:
    raise RuntimeError("the ledger's migrations run through fitter.ledger.migrate.upgrade")
context.configure(connection=connection, target_metadata=Base.metadata,
                  render_as_batch=connection.dialect.name == "sqlite")
with context.begin_transaction():
    context.run_migrations()
