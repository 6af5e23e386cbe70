"""``platebook fit`` and ``platebook point``: options -> specification -> :mod:`fitter.service.fitting`
-> table or JSON."""

from __future__ import annotations

import json
import sys
from pathlib import Path

import click

from . import fail, main
from .fields import message
from .options import Count, OptionError, Value, number
from .. import CAUTION
from ..errors import InputError
from ..models import DEFAULT_MODEL, MODELS
from ..text import shown


def fail_input(message: str) -> None:
    """Print an input error to stderr and exit with status 1."""
    fail(message, 1)


def _parse_fix(items) -> tuple[dict, dict]:
    """``NAME=VALUE`` items -> (name -> value, name -> the item as typed)."""
    fix, typed = {}, {}
    for item in items:
        if "=" not in item:
            fail_input(f"--fix {item!r}: expected NAME=VALUE, e.g. --fix n=1.5")
        name, value = item.split("=", 1)
        name = name.strip()
        try:
            fix[name] = number(value, f"--fix {name}")
        except OptionError as e:
            finite = "not a finite number" in e.format_message()
            fail_input(f"--fix {item!r}: {value!r} is not a {'finite ' if finite else ''}number")
        typed[name] = item
    return fix, typed


def _input_error(e, typed=None) -> str:
    """One line for a service error; a held parameter is named as typed (``--fix 'n=9'``)."""
    field = getattr(e, "field", None) or ""
    if typed is not None and field.startswith("fix.") and field[4:] in typed:
        return f"--fix {typed[field[4:]]!r}: {e.message}"
    return message(e)


def _progress(total: int, enabled: bool):
    if not enabled:
        class _Null:
            def __enter__(self):
                return self

            def __exit__(self, *a):
                return False

            def update(self, n):
                pass
        return _Null()
    return click.progressbar(length=total, label="fitting", file=sys.stderr, show_pos=True)


def _lines(text) -> str:
    """``text`` with control characters escaped line by line (names come from files)."""
    return "\n".join(shown(line) for line in str(text).split("\n"))


def _fmt(x, spec=".4g"):
    return "-" if x is None else format(x, spec)


def _table(rows_by_unit, multi: bool, loose_limit: float) -> str:
    """The readable fit table; a fit whose relative rms is above ``loose_limit`` is marked."""

    head = f"{'unit':<16} {'model':<9} {'pts':>4} {'out':>3} {'rms mA':>8} {'rel %':>6} {'mu':>9}  parameters"
    lines = [head, "-" * len(head)]
    for results in rows_by_unit:
        for rank, r in enumerate(results):
            name = shown(r.label) if rank == 0 else ""
            if not r.converged:
                lines.append(f"{name:<16} {r.model.name:<9} {r.n_points:>4} {'':>3} {'FAILED':>8}  {shown(r.failure)}")
                continue
            mark = "*" if multi and rank == 0 else " "
            others = "  ".join(
                f"{k} {r.params[k]:.4g}" + (f"±{r.stderr[k]:.2g}" if r.stderr.get(k) is not None else "")
                for k in r.model.param_names if k in r.free and k != "mu")
            fixed = [k for k in r.model.plate_param_names if k not in r.free]
            if fixed:
                others += "  (fixed: " + ", ".join(f"{k} {r.params[k]:.4g}" for k in fixed) + ")"
            mu = r.params.get("mu")
            mus = f"{mu:.4g}" if mu is not None else "-"
            if r.stderr.get("mu") is not None:
                mus += f"±{r.stderr['mu']:.2g}"
            loose = "!" if r.rel_rms > loose_limit else " "
            lines.append(f"{name:<16} {r.model.name:<8}{mark} {r.n_points:>4} {r.n_outliers:>3} "
                         f"{r.rms_ma:>8.4f} {100 * r.rel_rms:>5.2f}{loose} {mus:>9}  {others}")
    return "\n".join(lines)


@main.command("fit")
@click.argument("files", nargs=-1, required=True, type=click.Path(dir_okay=False, path_type=Path))
@click.option("--model", "model_name", default=DEFAULT_MODEL, show_default=True,
              type=click.Choice(list(MODELS) + ["all"], case_sensitive=False),
              help="Model to fit; 'all' fits every registered model and ranks them by BIC.")
@click.option("--json", "as_json", is_flag=True, help="Print exactly one JSON object to stdout.")
@click.option("--save", "save_dir", type=click.Path(path_type=Path),
              help="Write one model card (JSON) per unit into this folder.")
@click.option("--plot", "plot_dir", type=click.Path(path_type=Path),
              help="Write one PNG per unit (curves with the fit, and residuals) into this folder.")
@click.option("--skip-bad", is_flag=True,
              help="Skip bad rows and units (each one reported) instead of rejecting the file.")
@click.option("--fix", "fix_items", multiple=True, metavar="NAME=VALUE",
              help="Hold a parameter at a value, e.g. --fix n=1.5 or --fix mu=100. Repeatable.")
@click.option("--floor", default=0.02, show_default=True, type=Value(1e-6, 1.0),
              help="Floor of the relative weighting, as a fraction of each unit's largest current.")
@click.option("--plain", is_flag=True, help="Plain weighted least squares (no robust loss, no outliers).")
@click.option("--jobs", type=Count(1, 256), default=None,
              help="Worker processes (default: all cores).")
@click.option("--residuals", is_flag=True, help="With --json, include every point's residual.")
@click.option("--max-rows", type=click.IntRange(1, None), default=None,
              help="Refuse a file with more data rows than this (default 5,000,000, or $PLATEBOOK_MAX_ROWS).")
def fit_command(files, model_name, as_json, save_dir, plot_dir, skip_bad, fix_items, floor, plain, jobs,
                residuals, max_rows):
    """Fit triode models to the plate curves in FILE(s).

    FILE is CSV in the long layout (tube, section, va, vg, ia_ma / ia_a / ia_ua, optional
    ig_*) or the wide layout (va, then ia_ma@vg=<V> columns). Each (tube, section) is
    one unit; FILE '-' is standard input. Exit status: 0 all fits good, 1 input error, 2 one
    or more fits failed (or --skip-bad left out a whole unit).
    """
    from ..service.fitting import FitSpec, check_fix, fit_units, models_of, read_units, write_outputs

    if residuals and not as_json:
        fail_input("--residuals goes with --json (the residuals are listed in the JSON output)")
    fix, typed = _parse_fix(fix_items)
    stdin = None
    if any(str(f) == "-" for f in files):
        stdin = sys.stdin.buffer.read() if hasattr(sys.stdin, "buffer") else sys.stdin.read().encode()
    spec = FitSpec(files=[str(f) for f in files], model=model_name.lower(), fix=fix, floor=floor, robust=not plain,
                   skip_bad=skip_bad, jobs=jobs, residuals=residuals, max_rows=max_rows,
                   save=None if save_dir is None else str(save_dir), plot=None if plot_dir is None else str(plot_dir),
                   stdin=stdin)
    models = models_of(spec)
    try:
        check_fix(fix, models)
        inputs = read_units(spec)
    except InputError as e:  # a file's problems (CurveReadError) list their lines and columns
        fail_input(_input_error(e, typed))
    for s in inputs.skipped:
        click.echo(f"skipped: {_lines(s)}", err=True)
    if as_json:  # the text output lists them with the table
        for n in inputs.notes:
            click.echo(f"note: {_lines(n)}", err=True)

    show_bar = sys.stdout.isatty() and not as_json and len(inputs.units) > 1
    try:
        with _progress(len(inputs.units), show_bar) as bar:
            run = fit_units(spec, inputs, progress=bar.update)
        # progress on stderr when it is a terminal (never with --json, whose terminal shows one object)
        show = plot_dir is not None and sys.stderr.isatty() and not as_json and len(run.results) > 1
        with (click.progressbar(length=len(run.results), label="plotting", file=sys.stderr, show_pos=True)
              if show else _progress(0, False)) as pbar:
            write_outputs(run, plot_progress=pbar.update)
    except InputError as e:
        fail_input(_input_error(e, typed))

    results, flat = run.results, run.fits
    if as_json:
        click.echo(json.dumps(run.to_dict(), allow_nan=False))
    else:
        click.echo(_table(results, len(models) > 1, run.loose_limit))
        notes = _notes(results, inputs.notes)
        if notes:
            click.echo("\n" + notes)
        if len(models) > 1:
            click.echo("\n* best model for the unit (lowest BIC among converged fits)")
        if run.loose:
            click.echo(f"\n! loose fit: relative rms above {100 * run.loose_limit:g} %, well above the ~1 % "
                       "scatter of tracer data; the model misses the tube's shape somewhere")
        n_out = sum(r.n_outliers for r in flat if r.converged)
        click.echo(f"\n{len(inputs.units)} unit(s), {len(flat)} fit(s), {run.n_failed} unit(s) without a good fit, "
                   f"{n_out} outlier point(s) down-weighted")
        if save_dir or plot_dir:
            click.echo(f"\n{len(run.written)} file(s) written:")
            for w in run.written:
                click.echo(f"  {shown(w)}")
            if run.not_saved:
                click.echo("no model card for (fit failed): " + ", ".join(shown(n) for n in run.not_saved))
        click.echo(CAUTION)
    if run.dropped:
        click.echo(f"error: --skip-bad left out {len(run.dropped)} whole unit(s) or file(s) (listed above as "
                   "skipped); the results cover only the rest", err=True)
    if run.failed:
        raise SystemExit(2)


def _notes(rows_by_unit, file_notes) -> str:
    """The notes of reading, cleaning and fitting, under the table: the files' first,
    then each unit's (once per unit, whichever of its models' fits carried them)."""
    lines = [f"note: {_lines(n)}" for n in file_notes]
    for results in rows_by_unit:
        seen = dict.fromkeys(n for r in results for n in r.notes)
        lines.extend(f"note: {results[0].label}: {_lines(n)}" for n in seen)
    return "\n".join(lines)


@main.command("point")
@click.argument("card", type=click.Path(dir_okay=False, path_type=Path))
@click.option("--va", type=Value(), required=True, help="Plate-to-cathode voltage [V], e.g. 250 or 250V.")
@click.option("--vg", type=Value(), required=True, help="Grid-to-cathode voltage [V], e.g. -2 or -2V.")
@click.option("--json", "as_json", is_flag=True, help="Print one JSON object.")
def point_command(card, va, vg, as_json):
    """Small-signal figures of a fitted unit (model CARD) at one operating point.

    Gives plate current, transconductance gm, plate resistance rp and mu = gm·rp,
    each with its standard error propagated from the fit covariance.
    """
    from ..service.fitting import PointSpec, point
    from ..service.specs import NoResult

    try:
        res = point(PointSpec(str(card), va, vg))
    except NoResult as e:
        fail(str(e), 2)
    except InputError as e:
        fail_input(message(e))
    triode, notes, d = res.triode, list(res.warnings), res.to_dict()
    if as_json:
        click.echo(json.dumps(d, allow_nan=False))
        return
    for n in notes:
        click.echo(f"warning: {n}", err=True)

    def pm(v, e, unit, spec=".4g"):
        if v is None:
            return "-"
        v += 0.0  # -0.0 (cut off) prints as 0
        return (f"{v:{spec}} ± {e:.2g} {unit}" if e is not None else f"{v:{spec}} {unit}").rstrip()

    click.echo(f"{triode.label} ({triode.model.name}) at va {va:g} V, vg {vg:g} V")
    click.echo(f"  plate current  ia = {pm(d['ia_ma'], d['ia_ma_err'], 'mA')}")
    click.echo(f"  transconductance gm = {pm(d['gm_ms'], d['gm_ms_err'], 'mA/V')}")
    rp = d["rp_ohm"]
    click.echo(f"  plate resistance rp = {pm(rp / 1e3 if rp else None, (d['rp_ohm_err'] or 0) / 1e3 if d['rp_ohm_err'] is not None else None, 'kΩ')}")
    click.echo(f"  amplification factor mu = {pm(d['mu'], d['mu_err'], '')}")
    click.echo(CAUTION)
