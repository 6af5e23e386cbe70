"""``platebook match FITS ...``: matched pairs, quads and stacked assignments.

Thin layer: read the fitted units (the JSON of ``platebook fit --json`` or a folder of
model cards), parse the position and criterion, call :mod:`fitter.match`, print a
table or one JSON object, write the CSV for labelling.  Exit status 0 ok, 1 input
error, 2 the matching or a stage solve failed.
"""

from __future__ import annotations

import csv
import json
import math

import click

from ..card import CardError, load_fits
from ..match import (DEFAULT_GRADES, CathodeBias, Criterion, FixedBias, MatchError, StackedSlot,
                     assign_stacks, match_units, select_units)
from . import fail, main, value
from ..text import shown as _shown
from .options import Count, OptionError, Value, number


def _fail(message: str, code: int = 1):
    fail(message, code)


def _val(text, option):
    return value(text, option)


def _positive(text, option, unreadable, what, shown=None):
    """A positive finite float from ``text``; errors quote ``shown`` (default ``text``)."""
    shown = text if shown is None else shown
    try:
        v = number(text, option)
    except OptionError:
        _fail(f"{option}: cannot read {shown!r}{unreadable}")
    if not v > 0:
        _fail(f"{option}: must be a positive {what}, got {shown!r}")
    return v


def _percent(text, option):
    s = str(text).strip().rstrip("%").strip()
    return _positive(s, option, "; give a percentage such as 5 or 5%", "percentage", shown=text)


def _mapping(text, option, percent=True):
    out = {}
    if not text:
        return out
    for part in str(text).split(","):
        if "=" not in part:
            _fail(f"{option}: cannot read {part!r}; use figure=value, e.g. ia=5,gm=10")
        k, v = part.split("=", 1)
        out[k.strip()] = _percent(v, f"{option} {k.strip()}") if percent else _number(v, f"{option} {k.strip()}")
    return out


def _number(text, option):
    return _positive(text, option, " as a number", "number")


def _labels(text):
    return [s.strip() for s in text.split(",") if s.strip()] if text else None


def _grades(text):
    if not text:
        return DEFAULT_GRADES
    g = []
    for part in text.split(","):
        if "=" not in part:
            _fail(f"--grades: cannot read {part!r}; use name=max%, e.g. tight=1,close=2.5,matched=5")
        name, v = part.split("=", 1)
        g.append((name.strip(), _percent(v, f"--grades {name.strip()}")))
    return tuple(sorted(g, key=lambda x: x[1]))


# -- reading the fitted units ------------------------------------------------


def read_fits(path):
    """(units, failed) from a ``platebook fit --json`` file or a folder of model cards,
    read by the card validator (:func:`fitter.card.load_fits`)."""
    try:
        return load_fits(path)
    except CardError as e:
        _fail(str(e))


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
@click.option("--figures", "figure_list", default="ia,gm", show_default=True,
              help="Figures compared: of ia, gm, rp, mu, gain (gain: stage positions).")
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
              target_ma, target_split, same_bottle, group, quad_mode, tolerance, figure_list,
              figure_tolerance, weights, distance, grades, only, exclude, bottle_balance, extrapolate,
              errors, time_limit, as_json, csv_path):
    """Match the units in FITS by what each does in the position it will work in.

    FITS is the JSON printed by 'platebook fit --json' or a folder of model cards.
    Give one position: --va/--vg (fixed bias), --bplus/--ra/--rk (cathode bias), or
    --stack with --slot and --partner (one slot of a stacked stage).  With --stack and
    --stages N, assign units to the bottom and top of N identical stacks instead.
    """
    if csv_path == "-":
        _fail("--csv -: give a file name (the table or the JSON goes to standard output)")
    units, failed = read_fits(fits)
    try:
        units = select_units(units, _labels(only), _labels(exclude)) if units else units
    except MatchError as e:
        _fail(str(e))
    if not units:
        _fail(f"{_shown(fits)}: no fitted unit converged; nothing to match")
    stack = None
    if stack_kind:
        from ..stage import Stack

        b, k, t = _val(bplus, "--bplus"), _val(rk, "--rk"), _val(r_top, "--r-top")
        if b is None or k is None:
            _fail("--stack: needs --bplus and --rk")
        try:
            if stack_kind == "srpp":
                stack = Stack.srpp(b_plus=b, rk=k, r_top=t)
            else:
                m = _val(r_mid, "--r-mid")
                if t is None or m is None:
                    _fail("--stack mu-follower: needs --r-top and --r-mid")
                stack = Stack.mu_follower(b_plus=b, rk=k, r_top=t, r_mid=m)
        except ValueError as e:
            _fail(f"--stack: {e}")
    if stages is None:
        source = click.get_current_context().get_parameter_source("target_split")
        stray = [opt for opt, given in (("--target-ma", target_ma is not None),
                                        ("--target-split", source == click.core.ParameterSource.COMMANDLINE),
                                        ("--same-bottle", same_bottle)) if given]
        if stray:
            _fail(f"{', '.join(stray)}: only for a stacked assignment (--stack with --stages N)")
    if stages is not None:
        if stack is None:
            _fail("--stages: give the stacked stage with --stack (and --bplus, --rk, --r-top)")
        split = _percent(target_split, "--target-split")
        if split >= 100:
            _fail(f"--target-split: must lie between 0 and 100 %, got {target_split!r}")
        tm = None if target_ma is None else _number(target_ma, "--target-ma")
        try:
            res = assign_stacks(units, stack, stages, target_ma=tm, target_split=split / 100.0,
                                same_bottle=same_bottle, extrapolate=extrapolate, time_limit=time_limit)
        except MatchError as e:
            _fail(str(e))
        except RuntimeError as e:
            _fail(f"a stack could not be solved: {e}", 2)
        res.excluded = failed + res.excluded
        if csv_path:
            _write_csv(csv_path, [{"stack": f"S{k}", "slot": slot_name, "unit": s[slot_name],
                                   "ia_ma": 1e3 * s["ia"], "split_pct": 100 * s["split"], "gain": s["gain"],
                                   "deviation_pct": 100 * s["deviation"]}
                                  for k, s in enumerate(res.stages, 1) for slot_name in ("bottom", "top")])
        click.echo(json.dumps(res.to_dict(), indent=2) if as_json else res.table())
        return
    position = _position(va, vg, bplus, ra, rk, unbypassed, stack, slot, partner, units)
    try:
        crit = Criterion(tolerance_pct=_percent(tolerance, "--tolerance"),
                         figures=tuple(_labels(figure_list) or ()),
                         tolerances=_mapping(figure_tolerance, "--figure-tolerance") or None,
                         weights=_mapping(weights, "--weights", percent=False) or None, norm=distance)
    except MatchError as e:
        _fail(str(e))
    bb = None if bottle_balance is None else _percent(bottle_balance, "--bottle-balance")
    try:
        res = match_units(units, position, group=int(group), criterion=crit, mode=quad_mode,
                          extrapolate=extrapolate, errors=errors, bottle_balance_pct=bb,
                          grades=_grades(grades), time_limit=time_limit)
    except MatchError as e:
        _fail(str(e))
    except RuntimeError as e:
        _fail(f"the position could not be solved: {e}", 2)
    res.excluded = failed + res.excluded
    if csv_path:
        _write_csv(csv_path, res.csv_rows())
    click.echo(json.dumps(res.to_dict(), indent=2) if as_json else res.table())


def _position(va, vg, bplus, ra, rk, unbypassed, stack, slot, partner, units):
    given = [name for name, v in (("--va/--vg", va or vg), ("--ra", ra), ("--slot", slot)) if v]
    if len(given) > 1:
        _fail(f"give one position: {' and '.join(given)} were both given")
    try:
        if va is not None or vg is not None:
            if va is None or vg is None:
                _fail("fixed-bias position: give both --va and --vg")
            return FixedBias(_val(va, "--va"), _val(vg, "--vg"))
        if slot is not None:
            if stack is None:
                _fail("--slot: give the stacked stage with --stack")
            if partner is None:
                _fail("--slot: name the unit in the other slot with --partner")
            found = [u for u in units if u.label == partner]
            if not found:
                _fail(f"--partner: unknown unit {partner!r}")
            rest = [u for u in units if u.label != partner]
            units[:] = rest
            return StackedSlot(stack, slot, found[0])
        if ra is not None:
            if bplus is None or rk is None:
                _fail("cathode-biased position: give --bplus, --ra and --rk")
            return CathodeBias(_val(bplus, "--bplus"), _val(ra, "--ra"), _val(rk, "--rk"), not unbypassed)
    except MatchError as e:
        _fail(str(e))
    _fail("no position: give --va and --vg, or --bplus, --ra and --rk, or --stack with --slot/--partner "
          "(or --stages for a stacked assignment)")


def _write_csv(path, rows):
    """Write the rows as CSV, atomically (fitter.outfiles).  Text cells are quoted and pass
    through fitter.text.csv_cell, so no label or name can start a spreadsheet formula (even
    where a semicolon is the separator); numbers are written unquoted and stay numbers."""
    import io

    from ..outfiles import OutputError, write_atomic
    from ..text import csv_cell

    if not rows:
        rows = [{"group": "", "unit": ""}]
    out = io.StringIO()
    w = csv.writer(out, quoting=csv.QUOTE_NONNUMERIC, lineterminator="\n")
    w.writerow(list(rows[0].keys()))
    for r in rows:
        w.writerow([_csv_value(v, csv_cell) for v in r.values()])
    try:
        write_atomic(path, out.getvalue())
    except OutputError as e:
        _fail(f"--csv {e}")


def _csv_value(v, csv_cell):
    import numbers

    if v is None:
        return ""
    if isinstance(v, bool):
        return str(v).lower()
    if isinstance(v, numbers.Integral):
        return int(v)
    if isinstance(v, numbers.Real):
        f = float(v)
        # 6 significant digits, written as a number (QUOTE_NONNUMERIC leaves it unquoted)
        return float(f"{f:.6g}") if math.isfinite(f) else ""
    return csv_cell(str(v))
