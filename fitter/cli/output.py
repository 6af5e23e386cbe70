"""``platebook output single-ended ...`` and ``platebook output push-pull ...``: power stages.

Thin layer: options (engineering notation) -> :class:`fitter.service.output.OutputSpec` with
the stage's field names -> :func:`fitter.service.output.run_output` -> the report, one JSON
object, a PNG.  Errors name the option from :mod:`fitter.cli.fields`.  Exit status 0 ok, 1
input error, 2 the stage could not be solved.
"""

from __future__ import annotations

import json

import click

from ..errors import InputError
from ..service.output import OutputSpec, StageSolveError
from . import fail, main, value
from .fields import message
from .options import OptionError, number


def _pct(text, option):
    try:
        v = number(text, option, percent=True)
    except OptionError:
        fail(f"{option}: cannot read {text!r}; give a percentage such as 5 or 5%")
    if not (0 < v < 100):
        fail(f"{option}: must lie between 0 and 100 %, got {text!r}")
    return v / 100.0


def _loads(text):
    if text is None:
        return None
    parts = [p for p in text.split(",")]
    if not parts or any(not p.strip() for p in parts):
        fail(f"--load-sweep: give resistances separated by commas, e.g. 2k,3k,5k; got {text!r}")
    return tuple(value(p.strip(), "--load-sweep", optional=False) for p in parts)


_CORE_OPTS = [
    click.option("--bplus", default=None, help="Supply at the primary (centre tap for push-pull) [V]."),
    click.option("--load", default=None,
                 help="Reflected load [ohm] (push-pull: plate to plate); or give --turns."),
    click.option("--turns", default=None, help="Primary:secondary turns ratio n (the reflected load is n^2 x --speaker)."),
    click.option("--speaker", default="8", show_default=True, help="Loudspeaker impedance [ohm]."),
    click.option("--rdc", default="0", show_default=True,
                 help="DC resistance of the primary [ohm] (push-pull: plate to plate)."),
    click.option("--bias", default=None, help="Fixed grid bias [V], e.g. -61; or give --rk."),
    click.option("--rk", default=None, help="Cathode resistor [ohm] (push-pull: shared by both cathodes)."),
    click.option("--unbypassed", is_flag=True, help="The cathode resistor has no bypass capacitor."),
    click.option("--pa-max", default=None, help="Plate dissipation limit of each tube [W]."),
    click.option("--grid-onset", default="0", show_default=True, help="Grid-cathode voltage where grid current starts [V]."),
]
_FREQ_OPTS = [
    click.option("--cgk", default="0", show_default=True, help="Grid-cathode capacitance of each tube [F], e.g. 9p."),
    click.option("--cga", default="0", show_default=True, help="Grid-plate capacitance of each tube [F]."),
    click.option("--cak", default="0", show_default=True, help="Plate-cathode capacitance of each tube [F]."),
    click.option("--rs", default="0", show_default=True, help="Resistance of the driving source [ohm]."),
    click.option("--cin", default=None, help="Coupling capacitor to each grid [F] (needs --rg)."),
    click.option("--rg", default=None, help="Grid resistor to AC ground [ohm]."),
    click.option("--ck", default=None, help="Cathode bypass capacitor [F] (default: an ideal bypass)."),
    click.option("--l-primary", default=None, help="Magnetising inductance of the whole primary [H]."),
    click.option("--l-leak", default="0", show_default=True,
                 help="Leakage inductance referred to the whole primary [H], e.g. 10m."),
    click.option("--c-winding", default="0", show_default=True, help="Capacitance across the primary [F]."),
]
#: the circuit's options (shared with ``platebook sweep single-ended|push-pull``)
CIRCUIT_OPTS = _CORE_OPTS + _FREQ_OPTS
_STAGE_OPTS = CIRCUIT_OPTS + [
    click.option("--thd", default="5%", show_default=True, help="THD at which the output power is reported."),
    click.option("--load-sweep", default=None,
                 help="Also sweep the reflected load over these values, e.g. 1.5k,2k,3k,5k,8k."),
    click.option("--level", default="1", show_default=True, help="Output power for the sweep's THD column [W]."),
    click.option("--errors", is_flag=True, help="Error bars of the main figures from the cards' covariance."),
    click.option("--plot", default=None, help="Save load lines and power/THD to this PNG."),
    click.option("--response", is_flag=True,
                 help="Also the frequency response at the secondary (1 Hz to 1 MHz, -3 dB points)."),
    click.option("--response-plot", default=None, help="Save the frequency response (gain, phase) to this PNG."),
    click.option("--thd-at", default=None,
                 help="Also THD against frequency at this output power [W] (runs ngspice, if installed)."),
    click.option("--json", "json", is_flag=True, help="Print one JSON object."),
]


def _apply(opts, fn):
    for opt in reversed(opts):
        fn = opt(fn)
    return fn


def circuit_fields(o) -> dict:
    """The stage's fields (SI) from the options of :data:`CIRCUIT_OPTS`."""
    c = {"b_plus": value(o["bplus"], "--bplus", optional=False), "load": value(o["load"], "--load"),
         "turns_ratio": value(o["turns"], "--turns"), "speaker": value(o["speaker"], "--speaker"),
         "r_primary": value(o["rdc"], "--rdc"), "grid_bias": value(o["bias"], "--bias"),
         "rk": value(o["rk"], "--rk"), "bypassed": not o["unbypassed"],
         "pa_max": value(o["pa_max"], "--pa-max"), "grid_onset": value(o["grid_onset"], "--grid-onset"),
         "cgk": value(o["cgk"], "--cgk"), "cga": value(o["cga"], "--cga"), "cak": value(o["cak"], "--cak"),
         "rs": value(o["rs"], "--rs"), "c_in": value(o["cin"], "--cin"), "rg": value(o["rg"], "--rg"),
         "ck": value(o["ck"], "--ck"), "l_primary": value(o["l_primary"], "--l-primary"),
         "l_leak": value(o["l_leak"], "--l-leak"), "c_winding": value(o["c_winding"], "--c-winding")}
    return c


def _run(kind, o, tubes):
    from ..service.output import run_output

    spec = OutputSpec(kind, circuit_fields(o), **tubes, thd=_pct(o["thd"], "--thd"), loads=_loads(o["load_sweep"]),
                      level=value(o["level"], "--level", optional=False), errors=o["errors"],
                      response=o["response"] or o["response_plot"] is not None,
                      thd_level=value(o["thd_at"], "--thd-at"))
    from ..stage.transient import SimulatorError

    try:
        run = run_output(spec)
    except StageSolveError as e:
        fail(f"the stage could not be solved: {e}", 2)
    except SimulatorError as e:
        fail(f"THD against frequency: {e}", 2)
    except InputError as e:
        fail(message(e))
    plot_written = None
    if o["plot"]:
        from ..outfiles import OutputError
        from ..plotting_output import save_output_plot
        from ..text import shown

        try:
            plot_written = shown(str(save_output_plot(run, o["plot"])))
        except OutputError as e:
            fail(f"--plot: {e}")
        except OSError as e:
            fail(f"--plot: cannot write {shown(str(o['plot']))}: {e.strerror or e}")
    response_written = None
    if o["response_plot"]:
        from ..outfiles import OutputError
        from ..plotting_design import save_response_plot
        from ..text import shown

        try:
            response_written = shown(str(save_response_plot(run.frequency, o["response_plot"])))
        except OutputError as e:
            fail(f"--response-plot: {e}")
        except OSError as e:
            fail(f"--response-plot: cannot write {shown(str(o['response_plot']))}: {e.strerror or e}")
    if o["json"]:
        click.echo(json.dumps(run.to_dict(), allow_nan=False))
    else:
        click.echo(run.report())
        if plot_written:
            click.echo(f"\nplot: {plot_written}")
        if response_written:
            click.echo(f"response plot: {response_written}")


@main.group("output")
def output_group():
    """Output stages: a power triode into a transformer, single-ended or push-pull.

    Component values take engineering notation (3k, 1.5k, 470, 36).  CAUTION: tube circuits
    work at lethal voltages; follow local codes and licensed practice.
    """


def _se(**o):
    """A single-ended output stage: one tube, transformer (or choke) load, fixed or cathode bias.

    Prints the operating point, dissipation, largest output and output at --thd, H2/H3/THD
    against output power, grid drive, output impedance and damping factor."""
    if o["tube"] is None:
        fail("--tube: give the model card of the tube")
    _run("single-ended", o, {"tube": o["tube"]})


def _pp(**o):
    """A push-pull output stage: two tubes (A and B), plate-to-plate load, fixed bias or a
    shared cathode resistor; class A or AB as the bias makes it.

    Prints both operating points, the DC imbalance in the primary, output power and THD with
    its harmonics, the class-A limit and crossover, output impedance and damping factor."""
    for key, opt in (("tube_a", "--tube-a"), ("tube_b", "--tube-b")):
        if o[key] is None:
            fail(f"{opt}: give the model cards of both tubes (--tube-a and --tube-b)")
    _run("push-pull", o, {"tube_a": o["tube_a"], "tube_b": o["tube_b"]})


output_group.command("single-ended")(_apply(
    [click.option("--tube", default=None, help="Model card (JSON) of the tube.")] + _STAGE_OPTS, _se))
output_group.command("push-pull")(_apply(
    [click.option("--tube-a", default=None, help="Model card (JSON) of tube A."),
     click.option("--tube-b", default=None, help="Model card (JSON) of tube B.")] + _STAGE_OPTS, _pp))
