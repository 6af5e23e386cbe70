"""The ``platebook`` command line.  Each area's commands live in their own module here
and are attached to :data:`main` at import time."""

from __future__ import annotations

import click

from .. import __version__


class _Group(click.Group):
    """click exits 2 on usage errors; Platebook's contract is 1 (2 means a fit or solve
    failed), so that a script can tell a typo from a failed fit."""

    def make_context(self, info_name, args, parent=None, **extra):
        try:
            return super().make_context(info_name, args, parent, **extra)
        except click.UsageError as e:
            e.exit_code = 1
            raise

    def invoke(self, ctx):
        try:
            return super().invoke(ctx)
        except click.UsageError as e:
            e.exit_code = 1
            raise


@click.group(cls=_Group, context_settings={"help_option_names": ["-h", "--help"]})
@click.version_option(__version__, prog_name="platebook")
def main():
    """Platebook: fit triode models to plate curves, analyse stages and match tubes.

    CAUTION: tube circuits and curve tracers work at lethal voltages. Follow your
    local electrical codes and licensed practice; Platebook's figures are no
    substitute for safe working.
    """


# -- helpers shared by the command modules ---------------------------------------


def fail(message: str, code: int = 1):
    """Print ``error: message`` to stderr and exit: 1 for usage or input errors, 2 when
    a fit or a solve failed.

    Messages quote names from files (tube names, file names); control and escape characters
    in them are shown escaped (:func:`fitter.text.shown`), line by line, so that no file can
    send a terminal sequence through an error message."""
    from ..text import shown

    text = "\n".join(shown(line) for line in str(message).split("\n"))
    click.echo(f"error: {text}", err=True)
    raise SystemExit(code)


def value(text, option: str, optional: bool = True, on_error=None):
    """An option's engineering-notation value (100k, 4.7M, 22u ...) in SI, or None.

    Errors name the option; ``on_error`` (default :func:`fail`) reports them.
    """
    from ..units import parse_value

    report = on_error or fail
    if text is None:
        if optional:
            return None
        report(f"{option}: a value is required")
    try:
        return parse_value(text, option)
    except ValueError as e:
        report(str(e))


# Command modules register themselves on ``main``; keep one import per area.
from . import fitcmd  # noqa: E402,F401
from . import export  # noqa: E402,F401
from . import stage  # noqa: E402,F401
from . import match  # noqa: E402,F401
from . import stock  # noqa: E402,F401
