"""Text that came from a file, shown or written safely.

Names of tubes and sections, file names and notes come from files that other people made.
They reach three other programs: a terminal, a spreadsheet and a circuit simulator.  Each has
its own hazard, and each has one function here:

* :func:`shown` escapes control and escape characters before text reaches a terminal (an
  ANSI escape sequence in a tube name must not recolour or rewrite the user's screen);
* :func:`csv_cell` keeps a text cell from starting a spreadsheet formula (``=``, ``+``,
  ``-``, ``@``, a leading tab or carriage return), while numbers stay numbers;
* :func:`plain_text` checks that a field is a short, printable, single-line string (the rule
  for tube, section and source names in cards and in the ledger).

SPICE text is handled in :mod:`fitter.export`, which lets nothing but validated names and
sanitised comments into a netlist.
"""

from __future__ import annotations

import re
import unicodedata

from .errors import InputError

__all__ = ["shown", "csv_cell", "csv_value", "plain_text", "MAX_NAME"]

#: Longest tube or section name accepted (characters).
MAX_NAME = 64

_NUMBER = re.compile(r"^[-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?$")


def _unsafe(ch: str) -> bool:
    # Cc: C0/C1 controls (ESC, CR, LF, BEL, DEL ...); Cf: format characters (bidi overrides,
    # zero-width joiners) that make a name display as something it is not; Zl/Zp: line and
    # paragraph separators; Cs/Co/Cn: surrogates, private use, unassigned.
    return unicodedata.category(ch) in {"Cc", "Cf", "Zl", "Zp", "Cs", "Co", "Cn"}


def shown(text) -> str:
    """``text`` with every control, format or separator character escaped (``\\x1b``, ``\\n``,
    ``\\u202e``); printable text, accents included, is left as it is."""
    s = str(text)
    if not any(_unsafe(c) for c in s):
        return s
    out = []
    for c in s:
        if _unsafe(c):
            out.append(c.encode("unicode_escape").decode("ascii") if ord(c) < 0x10000 or c.isascii()
                       else f"\\U{ord(c):08x}")
        else:
            out.append(c)
    return "".join(out)


def csv_cell(value):
    """A value ready for a CSV cell that a spreadsheet will open.

    Numbers (and text that reads as a plain number, ``-2.5`` included) are returned as they
    are; text that would start a formula gets a leading apostrophe, which spreadsheets show
    as text (common practice; the OWASP note on CSV injection lists the same characters).
    """
    if value is None or isinstance(value, (bool, int, float)):
        return value
    s = str(value)
    if s and s[0] in "=+-@\t\r" and not _NUMBER.match(s):
        return "'" + s
    return s


def csv_value(value, digits: int = 6):
    """A report's value for a CSV cell: a number to ``digits`` significant digits (written
    unquoted), an empty cell for a missing or non-finite one, ``true``/``false``, or text made
    safe by :func:`csv_cell`."""
    import math
    import numbers

    if value is None:
        return ""
    if isinstance(value, bool):
        return str(value).lower()
    if isinstance(value, numbers.Integral):
        return int(value)
    if isinstance(value, numbers.Real):
        f = float(value)
        return float(f"{f:.{digits}g}") if math.isfinite(f) else ""
    return csv_cell(str(value))


def plain_text(value, field: str, *, max_len: int = MAX_NAME, empty: bool = False,
               file: str | None = None) -> str:
    """``value`` if it is a plain, short, printable, single-line string; else an
    :class:`~fitter.errors.InputError` naming ``field``."""
    if not isinstance(value, str):
        raise InputError(f"must be text, got {type(value).__name__}", field=field, file=file)
    if not value and not empty:
        raise InputError("must not be empty", field=field, file=file)
    if len(value) > max_len:
        raise InputError(f"is {len(value)} characters long; at most {max_len} are allowed",
                         field=field, file=file)
    bad = next((c for c in value if _unsafe(c)), None)
    if bad is not None:
        raise InputError(f"contains the control character {shown(bad)}; names must be plain printable text",
                         field=field, file=file)
    return value
