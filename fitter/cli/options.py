"""Numbers typed on the command line: one parser, one kind of error.

Every numeric option of every command goes through :func:`fitter.units.parse_value`
(engineering notation: ``300V``, ``-2V``, ``1K5``, ``4.7M``, ``22u``), which refuses
``nan``, ``inf`` and numbers too large for a float.  An unreadable or out-of-range
value gives one line, ``error: --option: what is wrong``, and exit status 1, whether it
is found while click parses the options (:class:`Value`) or later in a command's body
(:func:`number`).

A negative value after an option that takes a value (``--vg -2V``) is that option's
value: click's parser takes the next token whole for an option that needs one; the
tests check it.
"""

from __future__ import annotations

import click

from ..units import parse_value

__all__ = ["OptionError", "Value", "Count", "number", "option_name"]


class OptionError(click.ClickException):
    """A bad option value: printed as one line ``error: ...`` (no usage text), exit 1."""

    exit_code = 1

    def show(self, file=None):
        click.echo(f"error: {self.format_message()}", err=True, file=file)


def option_name(param) -> str:
    """The long name of a click parameter (``--vg``), or its name for an argument."""
    if param is None:
        return "value"
    opts = [o for o in getattr(param, "opts", ()) if o.startswith("--")] or list(getattr(param, "opts", ()))
    return max(opts, key=len) if opts else (param.name or "value")


def _shown(text) -> str:
    s = str(text)
    return s if len(s) <= 40 else s[:37] + "..."


def number(text, option: str, *, low: float | None = None, high: float | None = None,
           low_open: bool = False, high_open: bool = False, percent: bool = False,
           what: str = "value") -> float:
    """``text`` read by :func:`parse_value` and checked against a range.

    Parameters
    ----------
    text : str or float
        What the user typed (``"300V"``, ``"-2"``, ``"5%"`` when ``percent``).
    option : str
        The option named in errors (``"--vg"``).
    low, high : float, optional
        Bounds of the accepted range; ``low_open`` / ``high_open`` exclude them.
    percent : bool
        Accept a trailing ``%`` (the value stays in percent).
    what : str
        The kind of value named in range errors (``"percentage"``).

    Raises
    ------
    OptionError
        One line naming the option, when the text cannot be read, is not finite, or
        lies outside the range.
    """
    s = str(text).strip()
    if percent and s.endswith("%"):
        s = s[:-1].strip()
    try:
        v = parse_value(s, option)
    except ValueError as e:
        msg = str(e)
        if percent and "cannot read" in msg:
            msg = f"{option}: cannot read {_shown(text)!r}; give a percentage such as 5 or 5%"
        raise OptionError(msg) from None
    too_low = low is not None and (v <= low if low_open else v < low)
    too_high = high is not None and (v >= high if high_open else v > high)
    if too_low or too_high:
        raise OptionError(f"{option}: {_range_words(low, high, low_open, high_open, what, percent)}, "
                          f"got {_shown(text)!r}")
    return v


def _range_words(low, high, low_open, high_open, what, percent):
    unit = " %" if percent else ""
    if low == 0 and low_open and high is None:
        return f"must be a positive {what}"
    if low is not None and high is not None:
        return f"must lie between {low:g} and {high:g}{unit}"
    if low is not None:
        return f"must be {'above' if low_open else 'at least'} {low:g}{unit}"
    return f"must be {'below' if high_open else 'at most'} {high:g}{unit}"


class Value(click.ParamType):
    """A click type for a number in engineering notation, optionally within a range.

    ``Value()`` accepts any finite number (``--vg -2V``); ``Value(low=1e-6, high=1)`` a
    range; ``Value(low=0, low_open=True)`` a positive number.
    """

    name = "value"

    def __init__(self, low: float | None = None, high: float | None = None, *, low_open: bool = False,
                 high_open: bool = False, percent: bool = False, what: str = "value"):
        self.low, self.high = low, high
        self.low_open, self.high_open = low_open, high_open
        self.percent, self.what = percent, what

    def convert(self, value, param, ctx):
        return number(value, option_name(param), low=self.low, high=self.high, low_open=self.low_open,
                      high_open=self.high_open, percent=self.percent, what=self.what)


class Count(click.ParamType):
    """A click type for a whole number within a range (``--jobs``, ``--levels``), with the
    same one-line errors as :class:`Value`."""

    name = "integer"

    def __init__(self, low: int | None = None, high: int | None = None):
        self.low, self.high = low, high

    def convert(self, value, param, ctx):
        option = option_name(param)
        v = number(value, option)
        if v != int(v):
            raise OptionError(f"{option}: must be a whole number, got {_shown(value)!r}")
        if (self.low is not None and v < self.low) or (self.high is not None and v > self.high):
            span = (f"from {self.low} to {self.high}" if self.low is not None and self.high is not None
                    else f"of at least {self.low}" if self.low is not None else f"of at most {self.high}")
            raise OptionError(f"{option}: must be a whole number {span}, got {_shown(value)!r}")
        return int(v)
