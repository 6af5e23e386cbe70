"""``platebook fit`` and ``platebook point``."""

from __future__ import annotations

import json
import sys
import warnings
from pathlib import Path

import click

from . import fail, main
from .. import CAUTION
from ..card import CardError, load_card, save_card, card_filename
from ..models import MODELS, get_model
from ..reader import CurveReadError, ReadIssue, check_for_model, read_curves
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
            fix[name] = float(value)
        except ValueError:
            fail_input(f"--fix {item!r}: {value!r} is not a number")
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


def _fmt(x, spec=".4g"):
    return "-" if x is None else format(x, spec)


def _table(rows_by_unit, multi: bool) -> str:
    """The readable fit table."""
    from ..fit import LOOSE_FIT_REL_RMS

    head = f"{'unit':<16} {'model':<9} {'pts':>4} {'out':>3} {'rms mA':>8} {'rel %':>6} {'mu':>9}  parameters"
    lines = [head, "-" * len(head)]
    for results in rows_by_unit:
        for rank, r in enumerate(results):
            name = r.label if rank == 0 else ""
            if not r.converged:
                lines.append(f"{name:<16} {r.model.name:<9} {r.n_points:>4} {'':>3} {'FAILED':>8}  {r.failure}")
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
@click.option("--save", "save_dir", type=click.Path(file_okay=False, path_type=Path),
              help="Write one model card (JSON) per unit into this folder.")
@click.option("--plot", "plot_dir", type=click.Path(file_okay=False, path_type=Path),
              help="Write one PNG per unit (curves with the fit, and residuals) into this folder.")
@click.option("--skip-bad", is_flag=True,
              help="Skip bad rows and units (each one reported) instead of rejecting the file.")
@click.option("--fix", "fix_items", multiple=True, metavar="NAME=VALUE",
              help="Hold a parameter at a value, e.g. --fix n=1.5 or --fix mu=100. Repeatable.")
@click.option("--floor", default=0.02, show_default=True, type=click.FloatRange(1e-6, 1.0),
              help="Floor of the relative weighting, as a fraction of each unit's largest current.")
@click.option("--plain", is_flag=True, help="Plain weighted least squares (no robust loss, no outliers).")
@click.option("--jobs", type=click.IntRange(1, 256), default=None,
              help="Worker processes (default: all cores).")
@click.option("--residuals", is_flag=True, help="With --json, include every point's residual.")
def fit_command(files, model_name, as_json, save_dir, plot_dir, skip_bad, fix_items, floor, plain, jobs,
                residuals):
    """Fit triode models to the plate curves in FILE(s).

    FILE is CSV in the long layout (tube, section, va, vg, ia_ma / ia_a / ia_ua, optional
    ig_*) or the wide layout (va, then ia_ma@vg=<V> columns). Each (tube, section) is
    one unit. Exit status: 0 all fits good, 1 input error, 2 one or more fits failed.
    """
    # the engine (scipy.optimize) only when fitting: `fit --help` and `point` stay quick
    from ..fit import LOOSE_FIT_REL_RMS, FitInputError, FitOptions, fit_many

    if residuals and not as_json:
        fail_input("--residuals goes with --json (the residuals are listed in the JSON output)")
    models = list(MODELS) if model_name.lower() == "all" else [model_name.lower()]
    fix = _parse_fix(fix_items, models)
    try:
        read = read_curves(files, skip_bad=skip_bad)
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
        click.echo(f"skipped: {s}", err=True)
    for n in read.notes:
        click.echo(f"note: {n}", err=True)
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
    if save_dir:
        save_dir.mkdir(parents=True, exist_ok=True)
        for rs in results:
            best = rs[0]
            if best.converged:
                save_card(save_dir / card_filename(best.triode), best.triode, best.figures(),
                          [best.unit.source])
    if plot_dir:
        from ..plotting import save_fit_plots

        plot_dir.mkdir(parents=True, exist_ok=True)
        best = [rs[0] for rs in results]
        paths = [plot_dir / (card_filename(b.triode or _dummy(b)).removesuffix(".json") + ".png") for b in best]
        # progress on stderr when it is a terminal (never with --json, whose terminal shows one object)
        show = sys.stderr.isatty() and not as_json and len(best) > 1
        bar = (click.progressbar(length=len(best), label="plotting", file=sys.stderr, show_pos=True)
               if show else _progress(0, False))
        with bar:
            save_fit_plots(best, paths, processes=jobs, progress=bar.update)

    n_failed = sum(not rs[0].converged for rs in results)
    if as_json:
        out = {
            "platebook": _version(),
            "fits": [r.to_dict(residuals=residuals) for r in flat],
            "best": [{"tube": rs[0].tube, "section": rs[0].section, "model": rs[0].model.name,
                      "converged": rs[0].converged} for rs in results] if len(models) > 1 else None,
            "skipped": [str(s) for s in skipped],
            "notes": list(read.notes),
            "caution": CAUTION,
        }
        click.echo(json.dumps(out, allow_nan=False))
    else:
        click.echo(_table(results, len(models) > 1))
        if len(models) > 1:
            click.echo("\n* best model for the unit (lowest BIC among converged fits)")
        if any(r.converged and r.rel_rms > LOOSE_FIT_REL_RMS for r in flat):
            click.echo(f"\n! loose fit: relative rms above {100 * LOOSE_FIT_REL_RMS:g} %, well above the ~1 % "
                       "scatter of tracer data; the model misses the tube's shape somewhere")
        n_out = sum(r.n_outliers for r in flat if r.converged)
        click.echo(f"\n{len(units)} unit(s), {len(flat)} fit(s), {n_failed} unit(s) without a good fit, "
                   f"{n_out} outlier point(s) down-weighted")
        if save_dir:
            click.echo(f"model cards written to {save_dir}/")
        if plot_dir:
            click.echo(f"plots written to {plot_dir}/")
        click.echo(CAUTION)
    if n_failed:
        raise SystemExit(2)


def _dummy(result):
    from ..triode import FittedTriode

    return FittedTriode(result.model, {p.name: (p.default if p.default is not None else p.lower)
                                       for p in result.model.params}, tube=result.tube, section=result.section)


def _version():
    from .. import __version__

    return __version__


@main.command("point")
@click.argument("card", type=click.Path(dir_okay=False, path_type=Path))
@click.option("--va", type=float, required=True, help="Plate-to-cathode voltage [V].")
@click.option("--vg", type=float, required=True, help="Grid-to-cathode voltage [V].")
@click.option("--json", "as_json", is_flag=True, help="Print one JSON object.")
def point_command(card, va, vg, as_json):
    """Small-signal figures of a fitted unit (model CARD) at one operating point.

    Gives plate current, transconductance gm, plate resistance rp and mu = gm·rp,
    each with its standard error propagated from the fit covariance.
    """
    try:
        triode = load_card(card)
    except CardError as e:
        fail_input(str(e))
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", OutsideDataWarning)
        ss = triode.small_signal(va, vg)
    notes = [str(w.message) for w in caught if issubclass(w.category, OutsideDataWarning)]
    d = ss.to_dict()
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
        return (f"{v:{spec}} ± {e:.2g} {unit}" if e is not None else f"{v:{spec}} {unit}").rstrip()

    click.echo(f"{triode.label} ({triode.model.name}) at va {va:g} V, vg {vg:g} V")
    click.echo(f"  plate current  ia = {pm(d['ia_ma'], d['ia_ma_err'], 'mA')}")
    click.echo(f"  transconductance gm = {pm(d['gm_ms'], d['gm_ms_err'], 'mA/V')}")
    rp = d["rp_ohm"]
    click.echo(f"  plate resistance rp = {pm(rp / 1e3 if rp else None, (d['rp_ohm_err'] or 0) / 1e3 if d['rp_ohm_err'] is not None else None, 'kΩ')}")
    click.echo(f"  amplification factor mu = {pm(d['mu'], d['mu_err'], '')}")
