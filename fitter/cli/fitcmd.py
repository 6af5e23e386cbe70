"""``platebook fit`` and ``platebook point``."""

from __future__ import annotations

import json
import math
import sys
import warnings
from pathlib import Path

import click

from . import fail, main
from .options import Count, OptionError, Value, number
from .. import CAUTION
from ..card import CardError, load_card, save_card, card_filename
from ..models import MODELS, get_model
from ..reader import CurveReadError, ReadIssue, check_for_model, read_curves
from ..text import shown
from ..triode import OutsideDataWarning



def fail_input(message: str) -> None:
    """Print an input error to stderr and exit with status 1."""
    fail(message, 1)


def _parse_fix(items, model_names):
    fix = {}
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
        known = {p.name for m in model_names for p in get_model(m).params}
        if name not in known:
            fail_input(f"--fix {item!r}: no model being fitted has a parameter {name!r} "
                       f"(known: {', '.join(sorted(known))})")
        for m in model_names:
            spec = next((p for p in get_model(m).params if p.name == name), None)
            if spec is not None and not (spec.lower <= fix[name] <= spec.upper):
                fail_input(f"--fix {item!r}: {m} parameter {name} must lie within its bounds "
                           f"{spec.lower:g} .. {spec.upper:g}" + ("" if spec.unit == "-" else f" {spec.unit}"))
    return fix


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


def _table(rows_by_unit, multi: bool) -> str:
    """The readable fit table."""
    from ..fit import LOOSE_FIT_REL_RMS

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
            loose = "!" if r.rel_rms > LOOSE_FIT_REL_RMS else " "
            lines.append(f"{name:<16} {r.model.name:<8}{mark} {r.n_points:>4} {r.n_outliers:>3} "
                         f"{r.rms_ma:>8.4f} {100 * r.rel_rms:>5.2f}{loose} {mus:>9}  {others}")
    return "\n".join(lines)


@main.command("fit")
@click.argument("files", nargs=-1, required=True, type=click.Path(dir_okay=False, path_type=Path))
@click.option("--model", "model_name", default="koren", show_default=True,
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
    # the engine (scipy.optimize) only when fitting: `fit --help` and `point` stay quick
    from ..fit import LOOSE_FIT_REL_RMS, FitInputError, FitOptions, fit_many

    if residuals and not as_json:
        fail_input("--residuals goes with --json (the residuals are listed in the JSON output)")
    models = list(MODELS) if model_name.lower() == "all" else [model_name.lower()]
    fix = _parse_fix(fix_items, models)
    try:
        read = _read_inputs(files, skip_bad, max_rows)
    except CurveReadError as e:
        fail_input(str(e))
    skipped: list[ReadIssue] = list(read.skipped)
    units = []
    problems = []
    for u in read.units:
        issue = next((i for i in (check_for_model(u, get_model(m)) for m in models) if i), None)
        if issue is None:
            units.append(u)
        elif skip_bad:
            skipped.append(issue)
        else:
            problems.append(issue)
    if problems:
        fail_input(str(CurveReadError(problems)))
    for s in skipped:
        click.echo(f"skipped: {_lines(s)}", err=True)
    if as_json:  # the text output lists them with the table
        for n in read.notes:
            click.echo(f"note: {_lines(n)}", err=True)
    if not units:
        fail_input("no units left to fit" + (" after skipping bad input (listed above)" if skipped else ""))

    opts = FitOptions(fix={k: v for k, v in fix.items()}, floor=floor, robust=not plain)
    show_bar = sys.stdout.isatty() and not as_json and len(units) > 1
    try:
        with _progress(len(units), show_bar) as bar:
            results = fit_many(units, models, opts, processes=jobs,
                               progress=bar.update)
    except FitInputError as e:
        fail_input(str(e))

    flat = [r for rs in results for r in rs]
    written: list[str] = []
    not_saved: list[str] = []
    if save_dir or plot_dir:
        from ..outfiles import OutputError, prepare_folder, unit_stems

        # one stem per unit of this run, never shared (fitter.outfiles.unit_stems)
        stems = unit_stems((rs[0].tube, rs[0].section) for rs in results)
        try:
            if save_dir:
                prepare_folder(save_dir)
                for rs, stem in zip(results, stems):
                    best = rs[0]
                    if best.converged:
                        path = save_dir / card_filename(best.triode, stem)
                        save_card(path, best.triode, best.figures(), [best.unit.source])
                        written.append(str(path))
                    else:
                        not_saved.append(best.label)
            if plot_dir:
                from ..plotting import save_fit_plots

                prepare_folder(plot_dir)
                best = [rs[0] for rs in results]
                paths = [plot_dir / f"{stem}.{b.model.name}.png" for b, stem in zip(best, stems)]
                # progress on stderr when it is a terminal (never with --json, whose terminal shows one object)
                show = sys.stderr.isatty() and not as_json and len(best) > 1
                bar = (click.progressbar(length=len(best), label="plotting", file=sys.stderr, show_pos=True)
                       if show else _progress(0, False))
                with bar:
                    written.extend(str(p) for p in save_fit_plots(best, paths, processes=jobs, progress=bar.update))
        except OutputError as e:
            done = f" ({len(written)} file(s) written before it)" if written else ""
            fail_input(f"{e}{done}")

    n_failed = sum(not rs[0].converged for rs in results)
    if as_json:
        out = {
            "platebook": _version(),
            "fits": [r.to_dict(residuals=residuals) for r in flat],
            "best": [{"tube": rs[0].tube, "section": rs[0].section, "model": rs[0].model.name,
                      "converged": rs[0].converged} for rs in results] if len(models) > 1 else None,
            "skipped": [str(s) for s in skipped],
            "notes": list(read.notes),
            "written": written,
            "caution": CAUTION,
        }
        click.echo(json.dumps(out, allow_nan=False))
    else:
        click.echo(_table(results, len(models) > 1))
        notes = _notes(results, read.notes)
        if notes:
            click.echo("\n" + notes)
        if len(models) > 1:
            click.echo("\n* best model for the unit (lowest BIC among converged fits)")
        if any(r.converged and r.rel_rms > LOOSE_FIT_REL_RMS for r in flat):
            click.echo(f"\n! loose fit: relative rms above {100 * LOOSE_FIT_REL_RMS:g} %, well above the ~1 % "
                       "scatter of tracer data; the model misses the tube's shape somewhere")
        n_out = sum(r.n_outliers for r in flat if r.converged)
        click.echo(f"\n{len(units)} unit(s), {len(flat)} fit(s), {n_failed} unit(s) without a good fit, "
                   f"{n_out} outlier point(s) down-weighted")
        if save_dir or plot_dir:
            from ..text import shown

            click.echo(f"\n{len(written)} file(s) written:")
            for w in written:
                click.echo(f"  {shown(w)}")
            if not_saved:
                click.echo("no model card for (fit failed): " + ", ".join(shown(n) for n in not_saved))
        click.echo(CAUTION)
    dropped = [s for s in skipped if _drops_whole_unit(s)]
    if dropped:
        click.echo(f"error: --skip-bad left out {len(dropped)} whole unit(s) or file(s) (listed above as "
                   "skipped); the results cover only the rest", err=True)
    if n_failed or dropped:
        raise SystemExit(2)


def _notes(rows_by_unit, file_notes) -> str:
    """The notes of reading, cleaning and fitting, under the table: the files' first,
    then each unit's (once per unit, whichever of its models' fits carried them)."""
    lines = [f"note: {_lines(n)}" for n in file_notes]
    for results in rows_by_unit:
        seen = dict.fromkeys(n for r in results for n in r.notes)
        lines.extend(f"note: {results[0].label}: {_lines(n)}" for n in seen)
    return "\n".join(lines)


def _drops_whole_unit(issue: ReadIssue) -> bool:
    """Whether a skipped issue dropped a whole unit (too few points or curves) or a whole
    file (no usable rows), not just a row: the reader and ``check_for_model`` word those
    as ``unit '...' has ...`` and ``no (usable) data rows``."""
    return issue.message.startswith("unit ") or issue.message in ("no data rows", "no usable data rows")


def _read_inputs(files, skip_bad, max_rows=None):
    """Read the curve files; ``-`` is standard input.  A file given twice, or the same unit
    (tube and section) in two files, is an input error: both would be fitted and the second
    model card would overwrite the first."""
    from ..reader import ReadResult, read_text

    seen = {}
    for f in files:
        key = "-" if str(f) == "-" else str(Path(f).resolve())
        if key in seen:
            fail_input(f"{f}: given twice (as argument {seen[key]} and {len(seen) + 1})"
                       if key != "-" else "-: standard input given twice")
        seen[key] = len(seen) + 1
    paths = [f for f in files if str(f) != "-"]
    read = read_curves(paths, skip_bad=skip_bad, max_rows=max_rows) if paths else ReadResult()
    if "-" in seen:
        raw = sys.stdin.buffer.read() if hasattr(sys.stdin, "buffer") else sys.stdin.read().encode()
        try:
            text = raw.decode("utf-8-sig")
        except UnicodeDecodeError as e:
            line = raw[: e.start].count(b"\n") + 1
            raise CurveReadError([ReadIssue("<stdin>", line, None, "not UTF-8 text (is this a CSV file?)")]) from None
        read.extend(read_text(text, "<stdin>", default_tube="stdin", skip_bad=skip_bad, max_rows=max_rows))
    where = {}
    for u in read.units:
        key = (u.tube, u.section)
        if key in where and where[key] != u.source:
            fail_input(f"unit {u.label!r} is in both {where[key]} and {u.source}; give each unit once "
                       "(or name the tube apart with a '# tube:' line)")
        where.setdefault(key, u.source)
    return read



def _version():
    from .. import __version__

    return __version__


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
    for option, v in (("--va", va), ("--vg", vg)):
        if not math.isfinite(v):
            fail_input(f"{option}: must be a finite voltage, got {v!r}")
    try:
        triode = load_card(card)
    except CardError as e:
        fail_input(str(e))
    import numpy as np

    with warnings.catch_warnings(record=True) as caught, np.errstate(all="ignore"):
        # numpy's overflow far outside any tube is caught on the figures below, not printed
        warnings.simplefilter("always", OutsideDataWarning)
        ss = triode.small_signal(va, vg)
    notes = [str(w.message) for w in caught if issubclass(w.category, OutsideDataWarning)]
    d = ss.to_dict()
    if d["ia_ma"] is None or d["gm_ms"] is None:
        # no finite current (e.g. --va 1e308): not a result, so not exit 0 with dashes
        fail(f"{triode.label}: the model gives no finite plate current at va {va:g} V, vg {vg:g} V; "
             "no figures there", 2)
    if as_json:
        d.update({"tube": triode.tube, "section": triode.section, "model": triode.model.name,
                  "warnings": notes})
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
