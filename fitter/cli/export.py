"""``platebook export``: a model card as a SPICE subcircuit, a JSON card or CSV curves.

Options -> :class:`fitter.service.export.ExportSpec` -> :func:`fitter.service.export.export`
-> the text, on standard output or written atomically to ``-o``.
"""

from __future__ import annotations


import click

from ..errors import InputError
from .. import CAUTION
from ..service.export import GRID_RESISTANCE
from ..outfiles import OutputError, write_atomic
from ..text import shown
from . import fail, main, value
from .fields import message


def _fail(message: str) -> None:
    fail(message)


def _value(text, option: str) -> float | None:
    return value(text, option)


@main.command("export")
@click.argument("card", type=click.Path(dir_okay=False))
@click.option("--format", "fmt", type=click.Choice(["spice", "json", "csv"]), required=True,
              help="spice: a .subckt (pins plate grid cathode); json: the model card; "
                   "csv: the model's curve family, long layout tube,section,va,vg,ia_ma.")
@click.option("--name", default=None,
              help="Subcircuit name (spice) or tube name written (json, csv). "
                   "Default: the card's tube[_section].")
@click.option("-o", "--output", default=None,
              help="Write to this file instead of standard output.")
@click.option("--va", "va_spec", default=None, metavar="START:STOP:STEP|LIST",
              help="csv: plate voltages [V], e.g. 0:400:5 (default: the card's fitted range, 41 points).")
@click.option("--vg", "vg_spec", default=None, metavar="START:STOP:STEP|LIST",
              help="csv: grid voltages [V], e.g. -4:0:0.5 or -4,-2,0 (default: the fitted range, 9 curves).")
@click.option("--cgk", default=None, help="spice: grid-cathode capacitance, e.g. 1.6p.")
@click.option("--cga", default=None, help="spice: grid-plate capacitance, e.g. 1.7p.")
@click.option("--cak", default=None, help="spice: plate-cathode capacitance, e.g. 0.5p.")
@click.option("--grid-r", "grid_r", default=None,
              help=f"spice: effective grid-conduction resistance above 0 V for models without "
                   f"grid current (default {GRID_RESISTANCE:g} ohm, common practice).")
def export_command(card, fmt, name, output, va_spec, vg_spec, cgk, cga, cak, grid_r):
    """Export the fitted unit in CARD for other design tools.

    \b
    platebook export V7_A.koren.json --format spice --cgk 1.6p --cga 1.7p -o V7A.lib
    platebook export V7_A.koren.json --format csv --va 0:400:5 --vg -4:0:0.5
    platebook export V7_A.koren.json --format json --name V7-spare
    """
    from ..service.export import ExportSpec, export
    from ..service.specs import NoResult

    spice_only = {"--cgk": cgk, "--cga": cga, "--cak": cak, "--grid-r": grid_r}
    csv_only = {"--va": va_spec, "--vg": vg_spec}
    for opts, which in ((spice_only, "spice"), (csv_only, "csv")):
        for opt, v in opts.items():
            if v is not None and fmt != which:
                _fail(f"{opt} applies to --format {which} only (this is --format {fmt})")
    if fmt == "csv" and (va_spec is None) != (vg_spec is None):
        _fail("give both --va and --vg, or neither to use the card's fitted range")
    spec = ExportSpec(card=str(card), format=fmt, name=name, cgk=_value(cgk, "--cgk"), cga=_value(cga, "--cga"),
                      cak=_value(cak, "--cak"), grid_resistance=_value(grid_r, "--grid-r"), va=va_spec, vg=vg_spec)
    try:
        res = export(spec)
    except NoResult as e:
        fail(f"--va/--vg: {e}", 2)
    except InputError as e:
        _fail(message(e))
    for kind, remark in res.remarks:
        click.echo(f"{kind}: {shown(remark)}", err=True)
    text, summary = res.text, res.summary

    if output is None or output == "-":  # '-': standard output, as for most command-line tools
        click.echo(text, nl=False)
        return
    try:
        write_atomic(output, text)
    except OutputError as e:
        _fail(f"-o {e}")
    click.echo(f"wrote {shown(str(output))}: {shown(summary)}")
    if fmt == "spice":
        click.echo(CAUTION)
