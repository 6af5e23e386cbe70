"""``platebook stage ...`` and ``platebook distortion ...``: a stage analysed with fitted tubes.

Thin layer: parse the options (engineering notation) into a specification with the circuit's
field names, call :mod:`fitter.service.stages`, print the report or one JSON object, save the
PNG.  Errors name the option from the one table :mod:`fitter.cli.fields`.  Exit status 0 ok,
1 input error, 2 the circuit could not be solved.
"""

from __future__ import annotations

import json

import click

from ..errors import InputError
from ..service.stages import KINDS, DistortionSpec, SpreadSpec, StageSolveError, StageSpec
from . import fail, main, value
from .fields import OPTIONS, message, option
from .options import Count, OptionError, number


def _fail(text: str, code: int = 1):
    fail(text, code)


#: capacitor options; a value of 0.1 F or more is a missing prefix, not a capacitor
_CAPACITORS = {"--ck", "--cin", "--cout", "--cload", "--cgk", "--cga", "--cak", "--c-top"}


def _val(text, option, optional=True):
    v = value(text, option, optional, on_error=_fail)
    if option in _CAPACITORS and v is not None and abs(v) >= 0.1:
        _fail(f"{option}: {text!r} is {v:g} F, not a plausible capacitor; give the prefix, "
              f"e.g. {text}u for microfarads or {text}n for nanofarads")
    return v


def _pct(text, option):
    try:
        v = number(text, option, percent=True)
    except OptionError:
        _fail(f"{option}: cannot read {text!r}; give a percentage such as 1 or 1%")
    if not (0 < v < 100):
        _fail(f"{option}: must lie between 0 and 100 %, got {text!r}")
    return v / 100.0


#: circuit fields that are words, not numbers
_WORDS = {"top_grid", "output"}


def _circuit(kind, o) -> dict:
    """The circuit's fields (SI) from the options of this kind of stage."""
    out = {}
    for name in KINDS[kind].__dataclass_fields__:
        opt = OPTIONS[name]
        key = opt[2:].replace("-", "_")
        if key not in o:
            continue
        out[name] = o[key] if name in _WORDS else _val(o[key], opt)
    return out


# -- shared options ---------------------------------------------------------

_COMMON = [
    click.option("--rg", default="1M", show_default=True, help="Grid leak of the input tube [ohm]."),
    click.option("--cin", default=None, help="Input coupling capacitor [F] (low corner)."),
    click.option("--rs", default="0", show_default=True, help="Source resistance [ohm] (input high corner)."),
    click.option("--rl", default=None, help="AC load through the output coupling capacitor [ohm]."),
    click.option("--cout", default=None, help="Output coupling capacitor [F] (low corner)."),
    click.option("--cload", default="0", show_default=True, help="Capacitance loading the output [F]."),
    click.option("--cgk", default="0", show_default=True, help="Grid-cathode capacitance of each tube [F]."),
    click.option("--cga", default="0", show_default=True, help="Grid-plate capacitance of each tube [F]."),
    click.option("--cak", default="0", show_default=True, help="Plate-cathode capacitance of each tube [F]."),
    click.option("--pa-max", default=None, help="Plate dissipation limit of each tube [W]."),
    click.option("--heater", default="0", show_default=True,
                 help="Heater reference to ground [V] (0: grounded; else the elevation)."),
    click.option("--vhk-max", default="100", show_default=True, help="Heater-cathode voltage limit [V]."),
]


_CC_OPTS = [
    click.option("--tube", "tube", default=None, help="Model card (JSON) of the tube."),
    click.option("--bplus", default=None, help="Supply voltage B+ [V]."),
    click.option("--ra", default=None, help="Plate resistor [ohm]."),
    click.option("--rk", default="0", show_default=True, help="Cathode resistor [ohm] (0 with --vbias)."),
    click.option("--ck", default=None, help="Cathode bypass capacitor [F]; omit for unbypassed Rk."),
    click.option("--vbias", default=None, help="Fixed grid bias to ground [V], e.g. -2."),
]
_CF_OPTS = [
    click.option("--tube", "tube", default=None, help="Model card (JSON) of the tube."),
    click.option("--bplus", default=None, help="Supply voltage at the plate [V]."),
    click.option("--rk", default=None, help="Cathode resistor [ohm]."),
    click.option("--vneg", default="0", show_default=True, help="Rail the cathode resistor returns to [V]."),
    click.option("--ra", default="0", show_default=True, help="Plate resistor [ohm] (usually 0)."),
    click.option("--r-upper", default=None, help="Grid bias divider, B+ side [ohm]."),
    click.option("--r-lower", default=None, help="Grid bias divider, ground side [ohm]."),
]
_STACK_OPTS = [
    click.option("--bottom", default=None, help="Model card of the bottom tube."),
    click.option("--top", default=None, help="Model card of the top tube."),
    click.option("--bplus", default=None, help="Supply voltage B+ [V]."),
    click.option("--rk", default=None, help="Bottom cathode resistor [ohm] (0 with --vbias)."),
    click.option("--ck", default=None, help="Bottom cathode bypass capacitor [F]; omit for unbypassed."),
    click.option("--vbias", default=None, help="Fixed bias of the bottom grid [V]."),
    click.option("--r-top", default=None, help="Resistor from the top cathode to the mid node [ohm]."),
    click.option("--r-mid", default="0", show_default=True,
                 help="Load resistor from the mid node to the bottom plate [ohm] (0 for SRPP)."),
    click.option("--top-grid", type=click.Choice(["tied", "coupled"]), default="tied", show_default=True,
                 help="tied: top grid on the bottom plate (SRPP); coupled: AC-coupled from the bottom "
                      "plate, biased from the mid node (mu follower)."),
    click.option("--rg-top", default="1M", show_default=True, help="Top grid bias resistor [ohm] (coupled)."),
    click.option("--c-top", default=None, help="Top grid coupling capacitor [F] (coupled)."),
    click.option("--output", type=click.Choice(["top-cathode", "bottom-plate"]), default="top-cathode",
                 show_default=True, help="Where the output and the load are taken."),
]

_KIND = {
    "common-cathode": (_CC_OPTS, "A common-cathode stage: B+, Ra, Rk (bypassed or not) or fixed bias."),
    "cathode-follower": (_CF_OPTS, "A cathode follower: Rk to ground or a negative rail."),
    "stack": (_STACK_OPTS, "Two triodes in series: SRPP (--top-grid tied) or mu follower (--top-grid coupled)."),
}


def _apply(opts, fn):
    for opt in reversed(opts):
        fn = opt(fn)
    return fn


def _cards(kind, o) -> dict:
    """The model cards named on the command line, by field (tube, or bottom and top)."""
    if kind == "stack":
        if o["bottom"] is None or o["top"] is None:
            _fail("--bottom and --top: give the model cards of both tubes")
        return {"bottom": o["bottom"], "top": o["top"]}
    if o["tube"] is None:
        _fail("--tube: give the model card of the tube")
    return {"tube": o["tube"]}


def _run(call, spec):
    """Call the service; its errors become one line naming the option (exit 1), or the
    failed solve (exit 2)."""
    try:
        return call(spec)
    except StageSolveError as e:
        _fail(f"the stage could not be solved: {e}", 2)
    except InputError as e:
        _fail(message(e))
    except ValueError as e:
        _fail(str(e))


def _write_plot(fn, obj, path):
    """Save a plot; returns the name of the file really written (``.png`` is added to a
    bare name), escaped for the terminal."""
    from ..outfiles import OutputError
    from ..text import shown

    try:
        return shown(str(fn(obj, path)))
    except OutputError as e:
        _fail(f"--plot: {e}")
    except OSError as e:
        _fail(f"--plot: cannot write {shown(str(path))}: {e.strerror or e}")


# -- platebook stage --------------------------------------------------------


@main.group("stage")
def stage_group():
    """Operating point, gain, output impedance and limits of a stage with fitted tubes.

    Component values take engineering notation (100k, 1.5k, 4.7M, 470n, 22u, 100p).
    CAUTION: tube circuits work at lethal voltages; follow local codes and licensed practice.
    """


def _make_stage_command(kind):
    opts, doc = _KIND[kind]

    def command(**o):
        from ..service.stages import solve_stage, spread_stage

        if o["spread"]:
            ignored = [opt for key, opt in (("tube", "--tube"), ("bottom", "--bottom"), ("top", "--top"),
                                            ("plot", "--plot")) if o.get(key) is not None]
            if ignored:
                _fail(f"--spread takes its tubes from {o['spread']} and draws no plot; "
                      f"leave out {', '.join(ignored)}")
        circuit = _circuit(kind, o)
        swing = _val(o["swing"], "--swing")
        if o["spread"]:
            res = _run(spread_stage, SpreadSpec(kind, circuit, o["spread"], slew_vpeak=swing))
            click.echo(json.dumps(res.to_dict(), allow_nan=False) if o["json"] else res.report())
            return
        spec = StageSpec(kind, circuit, **_cards(kind, o), errors=not o["no_errors"], slew_vpeak=swing)
        r = _run(solve_stage, spec)
        if o["plot"]:
            from ..plotting_stage import save_load_line_plot

            plot_written = _write_plot(save_load_line_plot, r, o["plot"])
        if o["json"]:
            click.echo(json.dumps(r.to_dict(), allow_nan=False))
        else:
            click.echo(r.report(option))
            if o["plot"]:
                click.echo(f"\nload-line plot: {plot_written}")

    command.__doc__ = doc + "\n\nPrints a bench report, or one JSON object with --json."
    extra = [
        click.option("--swing", default="10", show_default=True,
                     help="Output peak amplitude for the slew-rate check [V]."),
        click.option("--spread", default=None,
                     help="Folder of model cards, or a quoted glob such as 'cards/HM-*.json': "
                          "min/median/max of every figure over those units."),
        click.option("--no-errors", is_flag=True, help="Skip the error bars from the fit covariance."),
        click.option("--plot", default=None, help="Save the load-line plot to this PNG."),
        click.option("--json", "json", is_flag=True, help="Print one JSON object."),
    ]
    return stage_group.command(kind)(_apply(opts + _COMMON + extra, command))


for _k in _KIND:
    _make_stage_command(_k)


# -- platebook distortion ---------------------------------------------------


@main.group("distortion")
def distortion_group():
    """Harmonics and THD of a stage (quasi-static, mid-band), at a level or swept.

    Same circuit options as ``platebook stage``.  CAUTION: tube circuits work at
    lethal voltages; follow local codes and licensed practice.
    """


def _make_distortion_command(kind):
    opts, doc = _KIND[kind]

    def command(**o):
        from ..service.stages import stage_distortion

        circuit = _circuit(kind, o)
        cards = _cards(kind, o)
        if o["sweep"]:
            if o["vin"] is not None or o["vout"] is not None:
                _fail("--sweep: give either --sweep or a level (--vin / --vout), not both")
            spec = DistortionSpec(kind, circuit, **cards, sweep=True, levels=o["levels"],
                                  thd_limit=_pct(o["thd_limit"], "--thd-limit"), n_samples=o["samples"],
                                  grid_onset=_val(o["grid_onset"], "--grid-onset"))
        else:
            vin = _val(o["vin"], "--vin")
            vout = _val(o["vout"], "--vout")
            if (vin is None) == (vout is None):
                _fail("give one level: --vin (input peak) or --vout (output peak), or --sweep")
            spec = DistortionSpec(kind, circuit, **cards, vin_peak=vin, vout_peak=vout, n_samples=o["samples"],
                                  grid_onset=_val(o["grid_onset"], "--grid-onset"))
        res = _run(stage_distortion, spec)
        if o["plot"]:
            from ..plotting_stage import save_thd_plot, save_waveform_plot

            plot_written = _write_plot(save_thd_plot if o["sweep"] else save_waveform_plot, res, o["plot"])
        if o["json"]:
            click.echo(json.dumps(res.to_dict(), allow_nan=False))
        else:
            click.echo(res.report())
            if o["plot"]:
                click.echo(f"\nplot: {plot_written}")

    command.__doc__ = (doc + "\n\nHarmonics H2..H10 and THD at --vin or --vout (peak volts), or a THD "
                       "sweep up to grid-current onset or cutoff with --sweep.")
    extra = [
        click.option("--vin", default=None, help="Input grid amplitude [V peak]."),
        click.option("--vout", default=None, help="Output fundamental amplitude [V peak]."),
        click.option("--sweep", is_flag=True, help="Sweep THD against output level."),
        click.option("--levels", default=30, show_default=True, type=Count(2, 400),
                     help="Levels in the sweep."),
        click.option("--thd-limit", default="1%", show_default=True, help="THD threshold for the headroom."),
        click.option("--grid-onset", default="0", show_default=True,
                     help="Grid-cathode voltage taken as grid-current onset [V]."),
        click.option("--samples", default=256, show_default=True, type=Count(32, 8192),
                     help="Samples per period."),
        click.option("--plot", default=None,
                     help="Save a PNG: THD against level (--sweep) or the waveform and spectrum."),
        click.option("--json", "json", is_flag=True, help="Print one JSON object."),
    ]
    return distortion_group.command(kind)(_apply(opts + _COMMON + extra, command))


for _k in _KIND:
    _make_distortion_command(_k)
