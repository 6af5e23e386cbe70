"""``platebook export``: a model card as a SPICE subcircuit, a JSON card or CSV curves."""

from __future__ import annotations


import click
import numpy as np

from ..card import CardError, load_card, read_json
from ..export import (
    GRID_RESISTANCE,
    HIGH_VOLTAGE_CAUTION,
    ExportError,
    card_json,
    curve_family,
    curves_csv,
    default_sweep,
    parse_sweep,
    spice_name,
    spice_subcircuit,
)
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
    try:
        triode = load_card(card)
    except CardError as e:
        _fail(str(e))
    spice_only = {"--cgk": cgk, "--cga": cga, "--cak": cak, "--grid-r": grid_r}
    csv_only = {"--va": va_spec, "--vg": vg_spec}
    for opts, which in ((spice_only, "spice"), (csv_only, "csv")):
        for opt, v in opts.items():
            if v is not None and fmt != which:
                _fail(f"{opt} applies to --format {which} only (this is --format {fmt})")

    own_grid = triode.model.carries_grid_current(triode.params)
    if grid_r is not None and own_grid:
        _fail(f"--grid-r does not apply to {card}: its {triode.model.name} model carries its own fitted "
              "grid current, which the subcircuit uses")
    try:
        if fmt == "spice":
            sub_name = name or spice_name(triode)
            text = spice_subcircuit(
                triode,
                name=sub_name,
                cgk=_value(cgk, "--cgk"),
                cga=_value(cga, "--cga"),
                cak=_value(cak, "--cak"),
                card=str(card),
                grid_resistance=GRID_RESISTANCE if grid_r is None else _value(grid_r, "--grid-r"),
            )
            summary = f"subcircuit {sub_name}, pins plate grid cathode, model {triode.model.name}"
        elif fmt == "json":
            raw = read_json(card)  # already validated by load_card above
            text = card_json(triode, fit=raw.get("fit"), source=raw.get("source"), tube=name)
            summary = f"model card of {name or triode.label}, model {triode.model.name}"
        else:
            if (va_spec is None) != (vg_spec is None):
                _fail("give both --va and --vg, or neither to use the card's fitted range")
            if va_spec is None:
                va, vg = default_sweep(triode)
            else:
                va, vg = parse_sweep(va_spec, "va"), parse_sweep(vg_spec, "vg")
            with np.errstate(all="ignore"):  # overflow far out is caught on the result just below
                fam = curve_family(triode, va, vg, tube=name)
            if not np.all(np.isfinite(fam.ia)):
                bad = int(np.argmax(~np.isfinite(fam.ia)))
                fail(f"--va/--vg: the model gives no finite plate current at va {fam.va[bad]:g} V, "
                     f"vg {fam.vg[bad]:g} V; choose a grid within a tube's range", 2)
            grid_va, grid_vg = np.meshgrid(va, vg)
            with np.errstate(all="ignore"):
                why = (triode.envelope.outside(grid_va, grid_vg, triode.current)
                       if triode.envelope is not None else None)
            if why is not None:
                click.echo(f"warning: the grid reaches outside the measured data ({shown(why)}; "
                           f"{triode.envelope.describe()}); those points are extrapolated", err=True)
            elif triode.envelope is None and triode.outside_range(va, vg):
                r = triode.valid_range
                click.echo(
                    f"note: the grid reaches outside the fitted data "
                    f"(va {r['va'][0]:g}..{r['va'][1]:g} V, vg {r['vg'][0]:g}..{r['vg'][1]:g} V); "
                    "those curves are extrapolated",
                    err=True,
                )
            text = curves_csv(fam, card=str(card))
            summary = f"{fam.va.size} points ({vg.size} curves x {va.size} plate voltages) of {fam.tube}"
    except ExportError as e:
        _fail(message(e))

    if output is None or output == "-":  # '-': standard output, as for most command-line tools
        click.echo(text, nl=False)
        return
    try:
        write_atomic(output, text)
    except OutputError as e:
        _fail(f"-o {e}")
    click.echo(f"wrote {shown(str(output))}: {shown(summary)}")
    if fmt == "spice":
        click.echo(HIGH_VOLTAGE_CAUTION)
