"""Accounts of the web front end: create, list, change role, disable, API tokens, and the
checks a sign-in and an API call make.

Passwords are hashed with :func:`werkzeug.security.generate_password_hash` (salted, its
default method); tokens are 32 random bytes shown once, stored as their SHA-256.  Every
function takes the ledger's URL (``db``, None for the default) like
:mod:`fitter.service.stock` and returns plain data; input errors are
:class:`fitter.errors.InputError` naming the field.
"""

from __future__ import annotations

import hashlib
import re
import secrets
import threading
import time

from sqlalchemy import select

from ..errors import InputError
from .stock import Result, _ledger

__all__ = ["ROLES", "add_account", "list_accounts", "set_role", "set_disabled", "set_password", "new_token",
           "revoke_token", "check_password", "check_token", "SignInThrottle", "MIN_PASSWORD"]

ROLES = ("viewer", "editor", "admin")
MIN_PASSWORD = 10
_NAME = re.compile(r"[A-Za-z0-9][A-Za-z0-9._@-]{0,63}")
#: a fixed hash checked when the account does not exist, so that an unknown name costs the
#: same time as a wrong password (the answer must not tell them apart)
_DUMMY = None


def _name(name) -> str:
    if not isinstance(name, str) or not _NAME.fullmatch(name):
        raise InputError("an account name is 1-64 letters, digits or . _ @ -, starting with a letter or digit",
                         field="name")
    return name


def _role(role) -> str:
    if role not in ROLES:
        raise InputError(f"must be one of {', '.join(ROLES)}, got {role!r}", field="role")
    return role


def _password(pw) -> str:
    if not isinstance(pw, str) or len(pw) < MIN_PASSWORD:
        raise InputError(f"a password has at least {MIN_PASSWORD} characters", field="password")
    if len(pw) > 1024:
        raise InputError("a password has at most 1024 characters", field="password")
    return pw


def _row(a) -> dict:
    return {"id": a.id, "name": a.name, "role": a.role, "disabled": a.disabled, "created_at": a.created_at}


def _get(s, name):
    from ..ledger.accounts import Account

    a = s.scalar(select(Account).where(Account.name == name))
    if a is None:
        raise InputError(f"no account named {name!r}", field="name")
    return a


def add_account(db=None, name="", role="viewer", password="") -> Result:
    from werkzeug.security import generate_password_hash

    from ..ledger.accounts import Account
    from ..ledger.schema import now

    name, role, pw = _name(name), _role(role), _password(password)
    h = generate_password_hash(pw)

    def run(s):
        if s.scalar(select(Account.id).where(Account.name == name)) is not None:
            raise InputError(f"an account named {name!r} exists already", field="name")
        a = Account(name=name, role=role, password_hash=h, disabled=False, created_at=now())
        s.add(a)
        s.flush()
        return _row(a)

    with _ledger(db) as ledger:
        d = ledger.work(run)
    return Result("account", d, (f"account {name} ({role}) created",))


def list_accounts(db=None) -> Result:
    from ..ledger.accounts import Account, ApiToken

    with _ledger(db) as ledger, ledger.read() as s:
        rows = []
        for a in s.scalars(select(Account).order_by(Account.name)):
            d = _row(a)
            d["tokens"] = [{"id": t.id, "prefix": t.prefix, "note": t.note, "created_at": t.created_at}
                           for t in s.scalars(select(ApiToken).where(ApiToken.account_id == a.id,
                                                                      ApiToken.revoked.is_(False)))]
            rows.append(d)
    lines = [f"{'account':<20}{'role':<8}{'state':<10}tokens"]
    lines += [f"{d['name']:<20}{d['role']:<8}{'disabled' if d['disabled'] else 'active':<10}"
              + (", ".join(t["prefix"] + "..." for t in d["tokens"]) or "-") for d in rows]
    return Result("accounts", {"accounts": rows}, tuple(lines))


def _change(db, name, fn, text):
    name = _name(name)

    def run(s):
        a = _get(s, name)
        fn(a)
        return _row(a)

    with _ledger(db) as ledger:
        d = ledger.work(run)
    return Result("account", d, (text(d),))


def set_role(db=None, name="", role="") -> Result:
    role = _role(role)
    return _change(db, name, lambda a: setattr(a, "role", role), lambda d: f"account {d['name']} is now {d['role']}")


def set_disabled(db=None, name="", disabled=True) -> Result:
    return _change(db, name, lambda a: setattr(a, "disabled", bool(disabled)),
                   lambda d: f"account {d['name']} {'disabled' if d['disabled'] else 'enabled'}")


def set_password(db=None, name="", password="") -> Result:
    from werkzeug.security import generate_password_hash

    h = generate_password_hash(_password(password))
    return _change(db, name, lambda a: setattr(a, "password_hash", h), lambda d: f"password of {d['name']} changed")


def _digest(token: str) -> str:
    return hashlib.sha256(token.encode("utf-8", "surrogatepass")).hexdigest()


def new_token(db=None, name="", note="") -> Result:
    """A new API token for the account; the token itself is in the result only (never stored)."""
    from ..ledger.accounts import ApiToken
    from ..ledger.schema import now
    from ..text import plain_text

    name = _name(name)
    note = plain_text(note or "", "note", empty=True)
    token = "pbk_" + secrets.token_urlsafe(32)

    def run(s):
        a = _get(s, name)
        t = ApiToken(account_id=a.id, sha256=_digest(token), prefix=token[:10], note=note, created_at=now(),
                     revoked=False)
        s.add(t)
        s.flush()
        return {"id": t.id, "prefix": t.prefix, "account": a.name}

    with _ledger(db) as ledger:
        d = ledger.work(run)
    d["token"] = token
    return Result("token", d, (f"API token for {name} (shown once, keep it safe): {token}",))


def revoke_token(db=None, prefix="") -> Result:
    from ..ledger.accounts import ApiToken

    def run(s):
        ts = s.scalars(select(ApiToken).where(ApiToken.prefix == prefix, ApiToken.revoked.is_(False))).all()
        if not ts:
            raise InputError(f"no active token starting {prefix!r}", field="prefix")
        for t in ts:
            t.revoked = True
        return len(ts)

    with _ledger(db) as ledger:
        n = ledger.work(run)
    return Result("revoke", {"revoked": n}, (f"{n} token(s) revoked",))


def check_password(db, name, password) -> dict | None:
    """The account (``{"id", "name", "role"}``) when the name and password are right and the
    account is active; else None, in about the same time whatever was wrong."""
    global _DUMMY
    from werkzeug.security import check_password_hash, generate_password_hash

    from ..ledger.accounts import Account

    if _DUMMY is None:
        _DUMMY = generate_password_hash(secrets.token_hex(16))
    a = None
    if isinstance(name, str) and _NAME.fullmatch(name):
        with _ledger(db, upgrade=False) as ledger, ledger.read() as s:
            a = s.scalar(select(Account).where(Account.name == name))
            a = None if a is None else _row(a) | {"hash": a.password_hash}
    ok = check_password_hash(a["hash"] if a else _DUMMY, password if isinstance(password, str) else "")
    if a is None or not ok or a["disabled"]:
        return None
    return {"id": a["id"], "name": a["name"], "role": a["role"]}


def check_token(db, token) -> dict | None:
    """The account of an active API token, or None."""
    from ..ledger.accounts import Account, ApiToken

    if not isinstance(token, str) or not token or len(token) > 200:
        return None
    with _ledger(db, upgrade=False) as ledger, ledger.read() as s:
        row = s.execute(select(Account).join(ApiToken, ApiToken.account_id == Account.id)
                        .where(ApiToken.sha256 == _digest(token), ApiToken.revoked.is_(False))).scalar()
        if row is None or row.disabled:
            return None
        return {"id": row.id, "name": row.name, "role": row.role}


def account(db, account_id) -> dict | None:
    """The active account with this id (a session's owner), or None."""
    from ..ledger.accounts import Account

    with _ledger(db, upgrade=False) as ledger, ledger.read() as s:
        a = s.get(Account, account_id)
        if a is None or a.disabled:
            return None
        return {"id": a.id, "name": a.name, "role": a.role}


class SignInThrottle:
    """Back-off after failed sign-ins, per (account name, client address): after ``free``
    failures each further attempt must wait ``base * 2**(k - free)`` seconds (at most
    ``cap``) since the last failure.  Kept in the process's memory (a restart forgets it);
    a success clears the pair."""

    def __init__(self, free: int = 3, base: float = 1.0, cap: float = 300.0, clock=time.monotonic):
        self.free, self.base, self.cap, self.clock = free, base, cap, clock
        self._fails: dict = {}
        self._lock = threading.Lock()

    def wait(self, name, address) -> float:
        """Seconds still to wait before an attempt is looked at (0: go ahead)."""
        with self._lock:
            n, last = self._fails.get((name, address), (0, 0.0))
        if n < self.free:
            return 0.0
        delay = min(self.cap, self.base * 2.0 ** (n - self.free))
        return max(0.0, last + delay - self.clock())

    def failed(self, name, address):
        with self._lock:
            n, _ = self._fails.get((name, address), (0, 0.0))
            self._fails[(name, address)] = (n + 1, self.clock())
            if len(self._fails) > 100_000:  # bounded memory under a flood of names
                self._fails.pop(next(iter(self._fails)))

    def succeeded(self, name, address):
        with self._lock:
            self._fails.pop((name, address), None)
