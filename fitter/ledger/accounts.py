"""Accounts of the web front end, stored in the ledger beside the stock.

An account has a name, a role (``viewer`` reads; ``editor`` also uploads, grades and
reserves; ``admin`` also manages accounts), a password hash (werkzeug's salted scrypt/pbkdf2
string, never the password), and may be disabled (nothing is deleted).  API tokens belong to
an account; only the SHA-256 of a token is stored (a token is 32 random bytes, so a plain
hash is enough: there is nothing to guess), with a short prefix to tell tokens apart in a
listing.

The tables share :class:`fitter.ledger.schema.Base` (and so its metadata and naming
convention); the migration ``0002_accounts`` creates them.
"""

from __future__ import annotations

from sqlalchemy import Boolean, ForeignKey, Integer, String, Text
from sqlalchemy.orm import Mapped, mapped_column

from .schema import Base

__all__ = ["Account", "ApiToken", "ROLES"]

#: roles, each allowed what the ones before it may do
ROLES = ("viewer", "editor", "admin")


class Account(Base):
    """A person (or a script) who signs in to the web front end."""

    __tablename__ = "accounts"
    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    name: Mapped[str] = mapped_column(String(64), unique=True)
    role: Mapped[str] = mapped_column(String(16))
    password_hash: Mapped[str] = mapped_column(Text)
    disabled: Mapped[bool] = mapped_column(Boolean, default=False)
    created_at: Mapped[str] = mapped_column(String(40))


class ApiToken(Base):
    """An API token of an account: its SHA-256 only, and a prefix to recognise it by."""

    __tablename__ = "api_tokens"
    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    account_id: Mapped[int] = mapped_column(ForeignKey("accounts.id"), index=True)
    sha256: Mapped[str] = mapped_column(String(64), unique=True)
    prefix: Mapped[str] = mapped_column(String(16))
    note: Mapped[str] = mapped_column(Text, default="")
    created_at: Mapped[str] = mapped_column(String(40))
    revoked: Mapped[bool] = mapped_column(Boolean, default=False)
