"""The ledger's one error type (kept apart so that every ledger module can raise it)."""

from __future__ import annotations

from ..errors import InputError


class LedgerError(InputError):
    """The ledger could not be opened or used; the message never holds a password."""
