"""The stock ledger: every tube, measurement, fit, re-test, grade and reservation, kept in
SQLite (the default, no set-up) or PostgreSQL (a shop where several people work).

It stores and loads; the engine (``fitter.*`` outside this package) never imports it, it
imports the engine.  Modules:

* :mod:`fitter.ledger.db`: opening a ledger from a URL (SQLite pragmas, PostgreSQL), units of
  work with retries, password-free URLs and errors;
* :mod:`fitter.ledger.schema`: the tables (SQLAlchemy 2 declarative mapping) and the binary
  layout of stored points;
* :mod:`fitter.ledger.migrations`: Alembic's scripts (run programmatically by ``migrate.upgrade``);
* :mod:`fitter.ledger.store`: the use cases on the tables (import, re-test drift, grade, list,
  match, reserve, sell, retire, re-fit, back up, restore, copy);
* :mod:`fitter.ledger.plots`: datasheet plots being digitised (the image, the work in progress,
  the measurements saved from it).

The front ends reach it through :mod:`fitter.service.stock`.  :mod:`fitter.ledger.migrate`
runs the migrations; :mod:`fitter.ledger.errors` holds ``LedgerError``.
"""

# accounts and background uploads keep their tables on the schema's one metadata (migrations
# 0002_accounts and 0003_upload_jobs): imported here, they are registered whenever any part
# of the ledger is
from . import accounts as _accounts  # noqa: E402,F401
from . import jobs as _jobs  # noqa: E402,F401
