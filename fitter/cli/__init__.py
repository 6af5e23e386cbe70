"""The ``platebook`` command line.

Each area's commands live in their own module here and register themselves on
:data:`main` when that module is imported.  The group imports a module only when one of
its commands runs (:data:`COMMANDS` maps each command to its module and keeps its short
help for ``platebook --help``), so ``platebook point`` does not pay for the fitting
engine's imports, nor ``platebook --help`` for any of them.

Exit status: 0 fine, 1 bad input (usage, file, card, option), 2 a fit or a solve failed,
3 an internal error (a bug: one line on stderr, the traceback only with ``--debug`` or
``PLATEBOOK_DEBUG=1``).
"""

from __future__ import annotations

import importlib
import os
import warnings
import sys

import click

from .. import __version__

#: command name -> (module under fitter.cli, the help's first paragraph).  ``--help`` of the
#: group lists these without importing the modules; a test checks they match the commands.
COMMANDS: dict[str, tuple[str, str]] = {
    "fit": ("fitcmd", "Fit triode models to the plate curves in FILE(s)."),
    "point": ("fitcmd", "Small-signal figures of a fitted unit (model CARD) at one operating point."),
    "export": ("export", "Export the fitted unit in CARD for other design tools."),
    "stage": ("stage", "Operating point, gain, output impedance and limits of a stage with fitted tubes."),
    "distortion": ("stage", "Harmonics and THD of a stage (quasi-static, mid-band), at a level or swept."),
    "match": ("match", "Match the units in FITS by what each does in the position it will work in."),
    "response": ("design", "Frequency response of a stage: gain and phase from 1 Hz to 1 MHz, the -3 dB points."),
    "sweep": ("design", "Sweep one component or supply of a stage and tabulate what a designer weighs."),
    "stock": ("stock", "The stock ledger: every tube, measurement, fit, re-test, grade and reservation."),
    "output": ("output", "Output stages: a power triode into a transformer, single-ended or push-pull."),
    "users": ("users", "Accounts of the web front end (viewer, editor, admin) and their API tokens."),
    "serve": ("serve", "Serve the web front end on this machine (127.0.0.1) over the ledger."),
}

#: exit status of an unexpected internal error (1 is bad input, 2 a failed fit or solve)
INTERNAL_ERROR = 3


def _debug_wanted(ctx) -> bool:
    return bool(ctx.params.get("debug")) or os.environ.get("PLATEBOOK_DEBUG", "") not in ("", "0")


#: the messages of numpy's floating-point warnings
_FP_WARNING = r"(overflow|invalid value|divide by zero|underflow) encountered"


class _Group(click.Group):
    """The top-level group.

    * click exits 2 on usage errors; Platebook's contract is 1 (2 means a fit or solve
      failed), so that a script can tell a typo from a failed fit.
    * Commands are loaded on demand from :data:`COMMANDS`.
    * An exception that escapes a command is either an input error (an
      :class:`~fitter.errors.InputError` the command did not catch itself, or a file or
      folder named by the user that cannot be read or written: exit 1 with its message)
      or a bug: exit 3 with one line, the traceback only when debugging.
    """

    def list_commands(self, ctx):
        return sorted(set(COMMANDS) | set(self.commands))

    def get_command(self, ctx, name):
        if name not in self.commands and name in COMMANDS:
            importlib.import_module(f"{__name__}.{COMMANDS[name][0]}")
        return self.commands.get(name)

    def format_commands(self, ctx, formatter):
        # the short help from the table, so that listing the commands imports none of them
        names = self.list_commands(ctx)
        if not names:
            return
        limit = formatter.width - 6 - max(len(n) for n in names)
        rows = []
        for name in names:
            if name in COMMANDS:
                text = click.Command(name, help=COMMANDS[name][1]).get_short_help_str(limit)
            else:
                text = self.commands[name].get_short_help_str(limit)
            rows.append((name, text))
        with formatter.section("Commands"):
            formatter.write_dl(rows)

    def make_context(self, info_name, args, parent=None, **extra):
        try:
            return super().make_context(info_name, args, parent, **extra)
        except click.UsageError as e:
            e.exit_code = 1
            raise

    def invoke(self, ctx):
        try:
            with warnings.catch_warnings():
                # numpy's floating-point warnings (overflow far outside a tube's range) are not
                # for the user: every figure shown is checked for finiteness, and a fit or solve
                # that overflowed everywhere is reported as failed (bench/fuzz.py checks both)
                warnings.filterwarnings("ignore", category=RuntimeWarning, message=_FP_WARNING)
                return super().invoke(ctx)
        except click.UsageError as e:
            e.exit_code = 1
            raise
        except (click.exceptions.ClickException, click.exceptions.Exit, click.Abort,
                SystemExit, KeyboardInterrupt):
            raise
        except Exception as e:  # noqa: BLE001  (the one place that turns a bug into exit 3)
            from ..errors import InputError
            from ..text import shown  # messages may carry names from untrusted input

            if isinstance(e, InputError):
                from .fields import message  # the field named as the option that sets it

                click.echo(f"error: {shown(message(e))}", err=True)
                raise SystemExit(1) from None
            if isinstance(e, BrokenPipeError):
                # the reader of our output went away (`platebook ... | head`): nothing to report;
                # stdout goes to devnull so that the flush at exit does not raise again
                # (the Python documentation's note on SIGPIPE)
                try:
                    os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
                except (OSError, ValueError, AttributeError):
                    pass
                raise SystemExit(1) from None
            if isinstance(e, OSError) and e.filename is not None:
                # a file or folder the user named cannot be read or written: their input, not a bug
                click.echo(f"error: {shown(e.filename)}: {shown(e.strerror or e)}", err=True)
                raise SystemExit(1) from None
            if _debug_wanted(ctx):
                import traceback

                traceback.print_exc(file=sys.stderr)
            message = shown(" ".join(str(e).split())) or "(no message)"
            click.echo(f"internal error: {type(e).__name__}: {message} — please report it; "
                       "run with --debug for details", err=True)
            raise SystemExit(INTERNAL_ERROR) from None


@click.group(cls=_Group, context_settings={"help_option_names": ["-h", "--help"]})
@click.version_option(__version__, prog_name="platebook")
@click.option("--debug", is_flag=True,
              help="Show the traceback of an internal error (also PLATEBOOK_DEBUG=1).")
def main(debug):
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
