"""The base of every input error, and the field it is about.

Every error about something a user gave (a file, a model card, an option, a form field, an
API body) is an :class:`InputError` or a subclass.  It carries *where* the problem is (the
file, line and column, or the field) separately from the message, so each front end can
name the place in its own words: ``--ra`` on the command line, a form field on the web.
The engine never names a command-line flag.
"""

from __future__ import annotations

__all__ = ["InputError"]


class InputError(ValueError):
    """Something a user gave is wrong.

    Parameters
    ----------
    message : str
        What is wrong, in the user's words.
    field : str, optional
        The field it is about (``"params.mu"``, ``"ra"``, ``"valid_range.va_v"``).
    file : str, optional
        The file it came from.
    line, column : int, optional
        Where in that file (1-based).
    """

    def __init__(self, message: str, *, field: str | None = None, file: str | None = None,
                 line: int | None = None, column: int | None = None):
        self.message = message
        self.field = field
        self.file = file
        self.line = line
        self.column = column
        super().__init__(self.__str__())

    def where(self) -> str:
        """``file: line L, column C: field 'f'`` (whatever parts are known)."""
        parts = []
        if self.file is not None:
            parts.append(str(self.file))
        if self.line is not None:
            parts.append(f"line {self.line}" + (f", column {self.column}" if self.column is not None else ""))
        if self.field is not None:
            parts.append(f"field {self.field!r}")
        return ": ".join(parts)

    def __str__(self) -> str:
        w = self.where()
        return f"{w}: {self.message}" if w else self.message

    def to_dict(self) -> dict:
        return {"file": self.file, "line": self.line, "column": self.column, "field": self.field,
                "message": self.message}


class NotFound(InputError):
    """What was asked for by its label or id (a tube, a type, a unit, a plot, a job) is not in
    the ledger: a page answers 404, not 400."""
