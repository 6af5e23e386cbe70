"""``platebook match FITS ...``: matched pairs, quads and stacked assignments.

Thin layer: options -> a matching specification (field names, numbers read by the one
number parser) -> :func:`fitter.service.matching.match` -> a table, one JSON object, and
the CSV for labelling.  Errors come back carrying their field, which :data:`MATCH_FIELDS`
names as an option.  Exit status 0 ok, 1 input error, 2 the matching or a stage solve
failed.
"""

from __future__ import annotations

import csv
import json

import click

from . import fail, main
from .fields import OPTIONS
from .options import Count, OptionError, Value, number

#: field of a matching specification -> the option that sets it: the CLI's one table
MATCH_FIELDS = OPTIONS


def _fail(message: str, code: int = 1):
    fail(message, code)


def _num(text, option, percent=False):
    """The number in an option's text (engineering notation; a trailing % with ``percent``),
    or None; its range is the service's to check."""
    if text is None:
        return None
    try:
        return number(text, option, percent=percent)
    except OptionError as e:
        _fail(e.format_message())


def _mapping(text, option, percent=True):
    out = {}
    if not text:
        return out
    for part in str(text).split(","):
        if "=" not in part:
            _fail(f"{option}: cannot read {part!r}; use figure=value, e.g. ia=5,gm=10")
        k, v = part.split("=", 1)
        out[k.strip()] = _num(v, f"{option} {k.strip()}", percent)
    return out


#: ``platebook output``'s option names, taken as the stage's fields they set
_OPTION_FIELDS = {"bplus": "b_plus", "bias": "grid_bias", "rdc": "r_primary", "turns": "turns_ratio",
                  "pa-max": "pa_max", "grid-onset": "grid_onset"}


def _stage_fields(text):
    """``b_plus=400,load=5k,grid_bias=-84`` (or as ``platebook output``'s options:
    ``bplus=400,load=5k,bias=-84``; ``unbypassed`` alone) -> {field: number} (engineering
    notation)."""
    if not text:
        return None
    out = {}
    for part in str(text).split(","):
        if part.strip() == "unbypassed":
            out["bypassed"] = False
            continue
        if "=" not in part:
            _fail(f"--push-pull: cannot read {part!r}; use field=value, e.g. bplus=400,load=5k,bias=-84")
        k, v = (x.strip() for x in part.split("=", 1))
        k = _OPTION_FIELDS.get(k, k.replace("-", "_"))
        out[k] = (v.lower() in ("true", "yes")) if k == "bypassed" else _num(v, f"--push-pull {k}")
    return out


def _labels(text):
    return [s.strip() for s in text.split(",") if s.strip()] if text else None


def _grades(text):
    if not text:
        return None
    g = []
    for part in text.split(","):
        if "=" not in part:
            _fail(f"--grades: cannot read {part!r}; use name=max%, e.g. tight=1,close=2.5,matched=5")
        name, v = part.split("=", 1)
        g.append((name.strip(), _num(v, f"--grades {name.strip()}", percent=True)))
    return g


# -- the command ---------------------------------------------------------------


@main.command("match")
@click.argument("fits")
@click.option("--va", default=None, help="Fixed-bias position: plate voltage [V].")
@click.option("--vg", default=None, help="Fixed-bias position: grid voltage [V] (negative).")
@click.option("--bplus", default=None, help="Cathode-biased or stacked position: B+ [V].")
@click.option("--ra", default=None, help="Cathode-biased position: plate resistor [ohm].")
@click.option("--rk", default=None, help="Cathode resistor [ohm] (cathode-biased or stack bottom).")
@click.option("--unbypassed", is_flag=True, help="Rk is not bypassed (sets the gain figure).")
@click.option("--stack", "stack_kind", type=click.Choice(["srpp", "mu-follower"]), default=None,
              help="A stacked stage: SRPP or mu follower (with --bplus, --rk, --r-top, --r-mid).")
@click.option("--r-top", default=None, help="Stack: resistor from the top cathode to the mid node [ohm].")
@click.option("--r-mid", default=None, help="Mu follower: load resistor between the tubes [ohm].")
@click.option("--stages", type=Count(1), default=None,
              help="Stacked assignment: fill this many identical stacks (2 for left/right channels).")
@click.option("--slot", type=click.Choice(["bottom", "top"]), default=None,
              help="Match units for one slot of the stack, with --partner in the other slot.")
@click.option("--partner", default=None, help="Label of the unit in the other slot (with --slot).")
@click.option("--push-pull", "push_pull", default=None,
              help="Push-pull position: the output stage as 'platebook output push-pull' takes it, its options "
                   "as name=value, e.g. bplus=400,load=5k,bias=-84 (or rk=650,unbypassed); compares each unit's idle current and H2 current "
                   "(figures ia,h2: a pair's DC imbalance and H2).")
@click.option("--reference", default=None,
              help="Push-pull position: unit on the other side (default: the one of median current).")
@click.option("--level", default=None, help="Push-pull position: drive for H2, a fraction of the largest (0.8).")
@click.option("--target-ma", default=None, help="Stacked assignment: target current [mA] (default: median).")
@click.option("--target-split", default="50", show_default=True,
              help="Stacked assignment: target share of the tube voltage across the bottom tube [%].")
@click.option("--same-bottle", is_flag=True, help="Stacked assignment: both sections of one bottle per stack.")
@click.option("--group", type=click.Choice(["2", "4"]), default="2", show_default=True,
              help="Pairs or quads.")
@click.option("--quad", "quad_mode", type=click.Choice(["all", "sides"]), default="all", show_default=True,
              help="Quads: all four within tolerance, or two matched pairs (sides) whose sums match.")
@click.option("--tolerance", default="5", show_default=True,
              help="P [%]: Ia and gm may differ by at most P % of the pair's mean.")
@click.option("--figures", "figure_list", default=None,
              help="Figures compared: of ia, gm, rp, mu, gain (gain: stage positions), h2 (push-pull) "
                   "[default: ia,gm; ia,h2 with --push-pull].")
@click.option("--figure-tolerance", default=None, help="Per-figure tolerance [%], e.g. ia=5,gm=10.")
@click.option("--weights", default=None, help="Per-figure weights of the mismatch, e.g. ia=1,gm=0.5.")
@click.option("--distance", type=click.Choice(["max", "sum"]), default="max", show_default=True,
              help="Mismatch: the largest weighted relative difference, or their sum.")
@click.option("--grades", default=None, help="Grade bands name=max%, e.g. tight=1,close=2.5,matched=5,loose=10.")
@click.option("--only", default=None, help="Comma-separated unit labels to use (default: all).")
@click.option("--exclude", default=None, help="Comma-separated unit labels to leave out.")
@click.option("--bottle-balance", default=None, help="Only bottles whose sections agree within this [%].")
@click.option("--extrapolate", is_flag=True, help="Let units whose data do not cover the position take part.")
@click.option("--errors", is_flag=True, help="Propagate fit covariances to each unit's figures.")
@click.option("--time-limit", default=60.0, show_default=True, type=Value(0, low_open=True, what="time"),
              help="Solver time limit [s].")
@click.option("--json", "as_json", is_flag=True, help="Print one JSON object.")
@click.option("--csv", "csv_path", default=None, help="Write a CSV (one row per unit) for labelling.")
def match_cmd(fits, va, vg, bplus, ra, rk, unbypassed, stack_kind, r_top, r_mid, stages, slot, partner,
              push_pull, reference, level, target_ma, target_split, same_bottle, group, quad_mode, tolerance, figure_list,
              figure_tolerance, weights, distance, grades, only, exclude, bottle_balance, extrapolate,
              errors, time_limit, as_json, csv_path):
    """Match the units in FITS by what each does in the position it will work in.

    FITS is the JSON printed by 'platebook fit --json' or a folder of model cards.
    Give one position: --va/--vg (fixed bias), --bplus/--ra/--rk (cathode bias),
    --stack with --slot and --partner (one slot of a stacked stage), or --push-pull (a
    side of a push-pull output stage: pairs matched by their DC imbalance and H2).  With --stack and
    --stages N, assign units to the bottom and top of N identical stacks instead.
    """
    if csv_path == "-":
        _fail("--csv -: give a file name (the table or the JSON goes to standard output)")
    given = click.get_current_context().get_parameter_source("target_split") == click.core.ParameterSource.COMMANDLINE
    spec = {
        "source": fits, "only": _labels(only), "exclude": _labels(exclude),
        "va": _num(va, "--va"), "vg": _num(vg, "--vg"), "bplus": _num(bplus, "--bplus"), "ra": _num(ra, "--ra"),
        "rk": _num(rk, "--rk"), "bypassed": not unbypassed, "stack": stack_kind, "r_top": _num(r_top, "--r-top"),
        "r_mid": _num(r_mid, "--r-mid"), "slot": slot, "partner": partner, "stages": stages,
        "push_pull": _stage_fields(push_pull), "reference": reference, "level": _num(level, "--level"),
        "target_ma": _num(target_ma, "--target-ma"),
        "target_split": _num(target_split, "--target-split", percent=True) if given else None,
        "same_bottle": same_bottle, "group": int(group), "quad": quad_mode,
        "tolerance": _num(tolerance, "--tolerance", percent=True), "figures": (None if figure_list is None else (_labels(figure_list) or [])),
        "figure_tolerance": _mapping(figure_tolerance, "--figure-tolerance") or None,
        "weights": _mapping(weights, "--weights", percent=False) or None, "distance": distance,
        "grades": _grades(grades), "bottle_balance": _num(bottle_balance, "--bottle-balance", percent=True),
        "extrapolate": extrapolate, "errors": errors, "time_limit": time_limit,
    }
    from ..errors import InputError
    from ..service.matching import MatchError, match

    try:
        res = match(spec)
    except MatchError as e:
        _fail(e.text(MATCH_FIELDS))
    except InputError as e:  # the fit file or a card (file and field)
        _fail(str(e))
    except RuntimeError as e:
        _fail(f"{'a stack' if stages is not None else 'the position'} could not be solved: {e}", 2)
    if csv_path:
        _write_csv(csv_path, res.csv_rows())
    click.echo(json.dumps(res.to_dict(), indent=2) if as_json else res.table())


def _write_csv(path, rows):
    """Write the rows as CSV, atomically (fitter.outfiles).  Text cells are quoted and pass
    through fitter.text.csv_cell, so no label or name can start a spreadsheet formula (even
    where a semicolon is the separator); numbers are written unquoted and stay numbers."""
    import io

    from ..outfiles import OutputError, write_atomic
    from ..text import csv_value

    if not rows:
        rows = [{"group": "", "unit": ""}]
    out = io.StringIO()
    w = csv.writer(out, quoting=csv.QUOTE_NONNUMERIC, lineterminator="\n")
    w.writerow(list(rows[0].keys()))
    for r in rows:
        w.writerow([csv_value(v) for v in r.values()])
    try:
        write_atomic(path, out.getvalue())
    except OutputError as e:
        _fail(f"--csv {e}")

