"""Fixtures of the web tests: a temporary SQLite ledger with an invented stock, accounts of
each role, the application and signed-in test clients.

Data are INVENTED: 12AU7-like dual triodes from Koren's published set (from memory, in
tests/conftest.py) with a spread of kg1, written by the shared ``synth``/``write_long``
helpers and imported through the stock service.
"""

from __future__ import annotations

import pytest

from fitter.service import accounts, stock

from .webtools import PASSWORD, ROLES, VA, VG, make_stock, sign_in


@pytest.fixture(scope="session")
def stocked(tmp_path_factory, synth, tube_types, write_long):
    """(ledger path, stock file): a ledger with type DT, three tubes and an account per role."""
    root = tmp_path_factory.mktemp("web")
    db = str(root / "ledger.sqlite")
    stock.init(db)
    stock.add_type(db, "setup", "DT", VA, VG)
    f = make_stock(synth, tube_types, write_long, root / "stock.csv")
    stock.import_files(db, "setup", [str(f)], "DT")
    for r in ROLES:
        accounts.add_account(db, r + "1", r, PASSWORD)
    return db, f


@pytest.fixture
def fresh(tmp_path):
    """An empty ledger with type DT and an account per role (for tests that store things)."""
    db = str(tmp_path / "ledger.sqlite")
    stock.init(db)
    stock.add_type(db, "setup", "DT", VA, VG)
    for r in ROLES:
        accounts.add_account(db, r + "1", r, PASSWORD)
    return db


def _app(db):
    from web import create_app

    return create_app({"LEDGER": db, "SECRET_KEY": "test-key-" + db, "SIGNIN_BACKOFF_S": 1.0})


@pytest.fixture
def app(stocked):
    return _app(stocked[0])


@pytest.fixture
def fresh_app(fresh):
    return _app(fresh)


@pytest.fixture
def signed_in(app):
    """signed_in(role) -> a test client signed in with that role's account."""

    def make(role):
        c = app.test_client()
        r = sign_in(c, role + "1")
        assert r.status_code == 302, r.get_data(as_text=True)
        return c

    return make


@pytest.fixture
def fresh_signed_in(fresh_app):
    def make(role):
        c = fresh_app.test_client()
        assert sign_in(c, role + "1").status_code == 302
        return c

    return make
