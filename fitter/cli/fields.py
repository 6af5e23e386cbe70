"""The one table from the engine's and the service's field names to the command line's options.

Errors from the engine and the service are :class:`fitter.errors.InputError` carrying the
field they are about (``"ra"``, ``"grid_resistance"``, ``"vin_peak"``); they never name a
command-line flag.  Every command turns a field into the option the user typed with
:func:`option` and an error into one line with :func:`message`; the web front end keeps its
own table of form fields.
"""

from __future__ import annotations

__all__ = ["OPTIONS", "option", "message", "run_service"]

#: field name -> command-line option
OPTIONS: dict[str, str] = {
    # stages (fitter.stage.circuits), every kind
    "b_plus": "--bplus", "ra": "--ra", "rk": "--rk", "ck": "--ck", "vbias": "--vbias", "rg": "--rg",
    "c_in": "--cin", "rs": "--rs", "rl": "--rl", "c_out": "--cout", "c_load": "--cload",
    "cgk": "--cgk", "cga": "--cga", "cak": "--cak", "pa_max": "--pa-max", "heater": "--heater",
    "vhk_max": "--vhk-max", "vneg": "--vneg", "r_upper": "--r-upper", "r_lower": "--r-lower",
    "r_top": "--r-top", "r_mid": "--r-mid", "top_grid": "--top-grid", "rg_top": "--rg-top",
    "c_top": "--c-top", "output": "--output",
    # the tubes of a stage and the analyses (fitter.service.stages, fitter.stage)
    "tube": "--tube", "bottom": "--bottom", "top": "--top", "spread": "--spread", "plot": "--plot",
    "slew_vpeak": "--swing", "vin_peak": "--vin", "vout_peak": "--vout", "levels": "--levels",
    "thd_limit": "--thd-limit", "n_samples": "--samples", "grid_onset": "--grid-onset", "sweep": "--sweep",
    # design (fitter.service.design)
    "vary": "--vary", "start": "--vary", "stop": "--vary", "points": "--vary", "level": "--level",
    "points_per_decade": "--per-decade", "freq": "--per-decade", "cards": "--spread", "thd_level": "--thd-at",
    # fitting and points (fitter.service.fitting)
    "files": "FILE", "model": "--model", "fix": "--fix", "floor": "--floor", "jobs": "--jobs",
    "max_rows": "--max-rows", "skip_bad": "--skip-bad", "save": "--save", "residuals": "--residuals",
    "card": "CARD", "va": "--va", "vg": "--vg", "units": "--spread",
    # export (fitter.export, fitter.service.export)
    "format": "--format", "name": "--name", "grid_resistance": "--grid-r", "destination": "-o",
    # matching (fitter.service.matching.SPEC_FIELDS; FITS, the source, is named by its path)
    "only": "--only", "exclude": "--exclude", "bplus": "--bplus", "bypassed": "--unbypassed",
    "stack": "--stack", "slot": "--slot", "partner": "--partner", "stages": "--stages",
    "target_ma": "--target-ma", "target_split": "--target-split", "same_bottle": "--same-bottle",
    "group": "--group", "quad": "--quad", "tolerance": "--tolerance", "figures": "--figures",
    "figure_tolerance": "--figure-tolerance", "weights": "--weights", "distance": "--distance",
    "grades": "--grades", "bottle_balance": "--bottle-balance", "extrapolate": "--extrapolate",
    "errors": "--errors", "time_limit": "--time-limit",
    # output stages (fitter.stage.output, fitter.service.output)
    "load": "--load", "turns_ratio": "--turns", "speaker": "--speaker", "r_primary": "--rdc",
    "grid_bias": "--bias", "thd": "--thd", "loads": "--load-sweep",
    "tube_a": "--tube-a", "tube_b": "--tube-b", "push_pull": "--push-pull", "reference": "--reference",
    "l_primary": "--l-primary", "l_leak": "--l-leak", "c_winding": "--c-winding",
}


def option(field: str | None) -> str | None:
    """The option that sets ``field`` (``"ra"`` -> ``"--ra"``); a field of a parameter
    (``"fix.n"``) maps through its head; None for a field no option sets."""
    if field is None:
        return None
    if field in OPTIONS:
        return OPTIONS[field]
    head = field.split(".", 1)[0]
    return OPTIONS.get(head)


def message(err) -> str:
    """One line for an input error: ``--option: message`` when an option sets its field,
    else the error's own text."""
    opt = option(getattr(err, "field", None))
    if opt is None or getattr(err, "file", None) is not None or getattr(err, "line", None) is not None:
        return str(err)
    return f"{opt}: {err.message}"


def run_service(ctx, fn, as_json: bool, options: dict, **fields) -> None:
    """Call a ledger use case (``fn(db=..., **fields)``) with the group's ``--db`` (and ``--user``
    where ``fn`` takes one), print its text or JSON, exit 2 when it reports a failure.  An input
    error names its field by ``options`` (the command group's own names: the ledger's ``name`` is
    an account's NAME, not export's ``--name``)."""
    import json

    import click

    from ..errors import InputError
    from . import fail

    obj = ctx.find_object(dict) or {}
    if "user" in fn.__code__.co_varnames[:fn.__code__.co_argcount]:
        fields.setdefault("user", obj.get("user", ""))
    try:
        res = fn(db=obj.get("db"), **fields)
    except InputError as e:
        if e.field and not e.file:
            fail(f"{options.get(e.field, e.field)}: {e.message}")
        fail(str(e))
    click.echo(json.dumps(res.to_dict(), allow_nan=False, default=str) if as_json else res.text())
    if res.failed:
        raise SystemExit(2)
