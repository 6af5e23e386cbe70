"""``platebook response ...`` and ``platebook sweep ...``: a stage's frequency response, and
one of its components or supplies swept over a range (one tube or a stock of cards).

Thin layer like :mod:`fitter.cli.stage`, whose circuit options it reuses: parse the options
into a :mod:`fitter.service.design` specification, call the service, print the report or one
JSON object, save the PNG.  Exit status 0 ok, 1 input error, 2 the circuit could not be solved.
"""

from __future__ import annotations

import json

import click

from ..service.design import ResponseSpec, SweepSpec
from . import main
from .fields import OPTIONS
from .options import Count
from .stage import _COMMON, _KIND, _apply, _cards, _circuit, _fail, _pct, _run, _val, _write_plot

def _vary(text: str, kind: str):
    """``NAME=START:STOP[:POINTS][:log]`` -> (field, start, stop, points, log)."""
    from ..service.output import OUTPUT_KINDS
    from ..service.stages import KINDS

    if not isinstance(text, str) or "=" not in text:
        _fail(f"--vary: give NAME=START:STOP[:POINTS][:log], e.g. ra=47k:220k:20, got {text!r}")
    name, rng = text.split("=", 1)
    name = name.strip().lstrip("-")
    fields = {**KINDS, **OUTPUT_KINDS}[kind].__dataclass_fields__
    not_numeric = ("top_grid", "output", "bypassed")
    # the name as typed after --vary: the option without dashes (bplus, r-mid) or the field
    by_option = {OPTIONS[f][2:]: f for f in fields}
    fieldname = name if name in fields else by_option.get(name)
    if fieldname not in fields or fieldname in not_numeric:
        numeric = sorted(OPTIONS[f][2:] for f in fields if f not in not_numeric)
        _fail(f"--vary: a {kind} stage has no component or supply {name!r}; choose one of {', '.join(numeric)}")
    parts = rng.split(":")
    log = False
    if parts and parts[-1].strip().lower() in ("log", "lin"):
        log = parts.pop().strip().lower() == "log"
    if len(parts) not in (2, 3):
        _fail(f"--vary: give START:STOP[:POINTS][:log] after {name}=, got {rng!r}")
    start = _val(parts[0], "--vary", optional=False)
    stop = _val(parts[1], "--vary", optional=False)
    points = 20
    if len(parts) == 3:
        try:
            points = int(parts[2])
        except ValueError:
            _fail(f"--vary: the number of points must be a whole number, got {parts[2]!r}")
    return fieldname, start, stop, points, log


# -- platebook response -----------------------------------------------------


@main.group("response")
def response_group():
    """Frequency response of a stage: gain and phase from 1 Hz to 1 MHz, the -3 dB points.

    Same circuit options as ``platebook stage``; give the tube capacitances (--cgk, --cga,
    --cak), the coupling capacitors, the source resistance and the load capacitance.
    CAUTION: tube circuits work at lethal voltages; follow local codes and licensed practice.
    """


def _response_report(fr) -> str:
    from .. import CAUTION
    from ..stage.results import _eng
    from ..stage.circuits import stage_title

    d = fr.to_dict()
    lines = [f"Frequency response of the {stage_title(fr.stage).lower()} with {' / '.join(fr.labels)}",
             CAUTION, "",
             "  linearised at the operating point (gm, rp of each tube), tube capacitances, coupling and bypass",
             "  capacitors, source resistance and load capacitance; output over the source voltage", "",
             f"  mid-band gain   {d['midband_gain']:.4g} ({d['midband_gain_db']:.2f} dB)" if d["midband_gain"]
             else "  mid-band gain   0",
             f"  -3 dB low       {_eng(fr.f_low, 'Hz') if fr.f_low else 'none (direct coupled or below 1 mHz)'}",
             f"  -3 dB high      {_eng(fr.f_high, 'Hz') if fr.f_high else 'none (no capacitance, or above 1 GHz)'}", "",
             f"  {'f':>10} {'gain dB':>9} {'phase deg':>10}"]
    for p in d["points"][:: max(1, len(d["points"]) // 24)]:
        lines.append(f"  {_eng(p['f_hz'], 'Hz').replace(' ', ''):>10} {p['gain_db']:9.2f} {p['phase_deg']:10.1f}")
    for n in fr.notes:
        lines.append("  ! " + n)
    return "\n".join(lines)


def _make_response_command(kind):
    opts, doc = _KIND[kind]

    def command(**o):
        from ..service.design import stage_response

        spec = ResponseSpec(kind, _circuit(kind, o), **_cards(kind, o), points_per_decade=o["per_decade"],
                            thd_level=_val(o["thd_at"], "--thd-at"))
        fr = _run(stage_response, spec)
        tf, note = None, None
        if spec.thd_level is not None:
            from ..service.design import stage_thd_against_frequency
            from ..stage.transient import SimulatorError, SimulatorMissing

            try:
                tf = _run(stage_thd_against_frequency, spec)
            except SimulatorMissing as e:
                note = f"note: {e}"
            except SimulatorError as e:
                _fail(f"THD against frequency: {e}", 2)
        if o["plot"]:
            from ..plotting_design import save_response_plot

            written = _write_plot(save_response_plot, fr, o["plot"])
        if o["json"]:
            d = fr.to_dict()
            if spec.thd_level is not None:
                d["thd_against_frequency"] = None if tf is None else tf.to_dict()
                if note:
                    d["notes"].append(note[6:])
            click.echo(json.dumps(d, allow_nan=False))
        else:
            click.echo(_response_report(fr))
            if tf is not None:
                click.echo("\n" + tf.report())
            if note:
                click.echo("\n" + note)
            if o["plot"]:
                click.echo(f"\nresponse plot: {written}")

    command.__doc__ = doc + "\n\nGain and phase from 1 Hz to 1 MHz and the -3 dB points; one JSON object with --json."
    extra = [
        click.option("--per-decade", default=40, show_default=True, type=Count(1, 1000),
                     help="Frequencies per decade."),
        click.option("--thd-at", default=None,
                     help="Also THD against frequency at this output level [V peak] (runs ngspice, if installed)."),
        click.option("--plot", default=None, help="Save the gain and phase plot to this PNG."),
        click.option("--json", "json", is_flag=True, help="Print one JSON object."),
    ]
    return response_group.command(kind)(_apply(opts + _COMMON + extra, command))


# -- platebook sweep --------------------------------------------------------


@main.group("sweep")
def sweep_group():
    """Sweep one component or supply of a stage and tabulate what a designer weighs.

    Current, voltage across and dissipation of each tube, gain, output impedance, headroom
    (where THD reaches --thd-limit, or grid current / cut-off), THD at --level,
    heater-cathode margin and the slew limit into --cload, for one tube or over a stock
    (--spread: min / median / max).  Same circuit options as ``platebook stage``; the
    single-ended and push-pull output stages take those of ``platebook output`` and report
    output power, THD, damping and dissipation instead.
    CAUTION: tube circuits work at lethal voltages; follow local codes and licensed practice.
    """


def _make_sweep_command(kind):
    opts, doc = _KIND[kind]

    def command(**o):
        from ..service.design import stage_sweep

        if o["vary"] is None:
            _fail("--vary: name what to sweep, e.g. --vary ra=47k:220k:20")
        fieldname, start, stop, points, log = _vary(o["vary"], kind)
        o = dict(o)
        # the swept field's own option is replaced by the range
        o[OPTIONS[fieldname][2:].replace("-", "_")] = None
        circuit = {k: v for k, v in _circuit(kind, o).items() if k != fieldname}
        if o["spread"]:
            ignored = [opt for key, opt in (("tube", "--tube"), ("bottom", "--bottom"), ("top", "--top"))
                       if o.get(key) is not None]
            if ignored:
                _fail(f"--spread takes its tubes from {o['spread']}; leave out {', '.join(ignored)}")
            cards = {}
        else:
            cards = _cards(kind, o)
        spec = SweepSpec(kind, fieldname, start, stop, points, log, circuit, **cards, cards=o["spread"],
                         thd_limit=_pct(o["thd_limit"], "--thd-limit"), level=_val(o["level"], "--level"),
                         slew_vpeak=_val(o["swing"], "--swing"))
        sw = _run(stage_sweep, spec)
        if o["plot"]:
            from ..plotting_design import save_sweep_plot

            written = _write_plot(save_sweep_plot, sw, o["plot"])
        if o["json"]:
            click.echo(json.dumps(sw.to_dict(), allow_nan=False))
        else:
            click.echo(sw.report(lambda f: OPTIONS.get(f, f)))
            if o["plot"]:
                click.echo(f"\nsweep plot: {written}")

    command.__doc__ = (doc + "\n\n--vary NAME=START:STOP[:POINTS][:log] (NAME as the option, e.g. ra, bplus, "
                       "r-mid); one JSON object with --json.")
    extra = [
        click.option("--vary", default=None, help="What to sweep: NAME=START:STOP[:POINTS][:log], e.g. ra=47k:220k:20."),
        click.option("--spread", default=None,
                     help="Folder of model cards, or a quoted glob: min/median/max over those units."),
        click.option("--thd-limit", default="1%", show_default=True, help="THD threshold of the headroom."),
        click.option("--level", default=None, help="Output level [V peak] for the THD column."),
        click.option("--swing", default="10", show_default=True, help="Output peak amplitude of the slew figure [V]."),
        click.option("--plot", default=None, help="Save the figures against the swept value to this PNG."),
        click.option("--json", "json", is_flag=True, help="Print one JSON object."),
    ]
    return sweep_group.command(kind)(_apply(opts + _COMMON + extra, command))


for _k in _KIND:
    _make_response_command(_k)
    _make_sweep_command(_k)


def _make_output_sweep_command(kind):
    from .output import CIRCUIT_OPTS, circuit_fields

    se = kind == "single-ended"

    def command(**o):
        from ..service.design import stage_sweep

        if o["vary"] is None:
            _fail("--vary: name what to sweep, e.g. --vary load=2k:6k:9")
        fieldname, start, stop, points, log = _vary(o["vary"], kind)
        o = dict(o)
        # the swept field's own option is replaced by the range (its first value builds the stage)
        o[OPTIONS[fieldname][2:].replace("-", "_")] = repr(start)
        circuit = {k: v for k, v in circuit_fields(o).items() if k != fieldname}
        keys = (("tube", "--tube"),) if se else (("tube_a", "--tube-a"), ("tube_b", "--tube-b"))
        if o["spread"]:
            ignored = [opt for key, opt in keys if o.get(key) is not None]
            if ignored:
                _fail(f"--spread takes its tubes from {o['spread']}; leave out {', '.join(ignored)}")
            cards = {}
        else:
            for key, opt in keys:
                if o[key] is None:
                    _fail(f"{opt}: give the model card" + ("" if se else "s of both tubes (--tube-a and --tube-b)")
                          + " or a stock with --spread")
            cards = {key: o[key] for key, _ in keys}
        spec = SweepSpec(kind, fieldname, start, stop, points, log, circuit, **cards, cards=o["spread"],
                         thd_limit=_pct(o["thd_limit"], "--thd-limit"), level=_val(o["level"], "--level"))
        sw = _run(stage_sweep, spec)
        if o["plot"]:
            from ..plotting_design import save_sweep_plot

            written = _write_plot(save_sweep_plot, sw, o["plot"])
        if o["json"]:
            click.echo(json.dumps(sw.to_dict(), allow_nan=False))
        else:
            click.echo(sw.report(lambda f: OPTIONS.get(f, f)))
            if o["plot"]:
                click.echo(f"\nsweep plot: {written}")

    command.__doc__ = (f"A {kind} output stage (the options of ``platebook output {kind}``) with one field swept: "
                       "idle current, voltage and dissipation of each tube, the largest output, the output at "
                       "--thd-limit, THD at --level [W], output impedance, damping factor, dissipation against "
                       "--pa-max" + ("" if se else ", the DC imbalance") + ".\n\n--vary NAME=START:STOP[:POINTS][:log] "
                       "(NAME as the option, e.g. load, bplus, bias, rk, rdc); one JSON object with --json.")
    tubes = ([click.option("--tube", default=None, help="Model card (JSON) of the tube.")] if se else
             [click.option("--tube-a", default=None, help="Model card (JSON) of tube A."),
              click.option("--tube-b", default=None, help="Model card (JSON) of tube B.")])
    extra = [
        click.option("--vary", default=None, help="What to sweep: NAME=START:STOP[:POINTS][:log], e.g. load=2k:6k:9."),
        click.option("--spread", default=None,
                     help="Folder of model cards, or a quoted glob: min/median/max over those units"
                     + ("." if se else " (paired in their order: 1+2, 3+4 ...)")),
        click.option("--thd-limit", default="5%", show_default=True, help="THD at which the output power is reported."),
        click.option("--level", default=None, help="Output power [W] for the THD column."),
        click.option("--plot", default=None, help="Save the figures against the swept value to this PNG."),
        click.option("--json", "json", is_flag=True, help="Print one JSON object."),
    ]
    return sweep_group.command(kind)(_apply(tubes + CIRCUIT_OPTS + extra, command))


for _k in ("single-ended", "push-pull"):
    _make_output_sweep_command(_k)
