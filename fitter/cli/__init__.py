"""The ``platebook`` command line.  Each area's commands live in their own module here
and are attached to :data:`main` at import time."""

from __future__ import annotations

import click

from .. import __version__


@click.group(context_settings={"help_option_names": ["-h", "--help"]})
@click.version_option(__version__, prog_name="platebook")
def main():
    """Platebook: fit triode models to plate curves, analyse stages and match tubes.

    CAUTION: tube circuits and curve tracers work at lethal voltages. Follow your
    local electrical codes and licensed practice; Platebook's figures are no
    substitute for safe working.
    """


# Command modules register themselves on ``main``; keep one import per area.
from . import fitcmd  # noqa: E402,F401
from . import export  # noqa: E402,F401
from . import stage  # noqa: E402,F401
