"""Amplifier stages analysed with fitted triodes: operating point and small signal.

Three stage descriptions (plain dataclasses, SI units, keyword arguments):

* :class:`CommonCathode`: B+, plate resistor, cathode resistor (bypassed or not) or
  fixed grid bias, an AC load through a coupling capacitor;
* :class:`CathodeFollower`: cathode resistor to ground or to a negative rail, grid
  bias from a divider or a grid leak;
* :class:`Stack`: two triodes in series across B+, the bottom one a common-cathode
  stage and the top one its active load.  One parametrised circuit covers the mu
  follower (a load resistor between the tubes, the top grid AC-coupled from the
  bottom plate and DC-biased from the resistor string at the top cathode) and the
  SRPP (top grid tied to the bottom plate); the output is taken at the top cathode
  or at the bottom plate.

:func:`solve` gives a :class:`StageResult`: every node voltage, each tube's
voltages, current, dissipation and heater-cathode voltage, the mid-band gain to each
output, output impedance, Miller input capacitance, corner frequencies, slew limit,
and error bars propagated from the fit covariance (:func:`fitter.triode.propagate`).
:func:`spread` runs one stage over many units of a type and reports min / median /
max of every figure.  :func:`quasi_static` gives the mid-band large-signal transfer
used by :mod:`fitter.distortion`.

Node names (the keys of ``nodes_v`` in :meth:`StageResult.to_dict`):

* common cathode: ``grid``, ``cathode``, ``plate``;
* cathode follower: ``grid``, ``cathode``, ``plate``;
* stack: ``grid`` (bottom grid), ``cathode_bottom``, ``plate_bottom``, ``mid`` (the
  junction of the top bias resistor and the load resistor), ``cathode_top``,
  ``grid_top``, ``plate_top`` (= B+).

How the circuits are solved
---------------------------
Every tube equation is written as ``I = f(a0 - a1 I, b0 - b1 I)``: plate and grid
voltage fall linearly as the tube's own current rises (a1, b1 >= 0).  The residual
``F(I) = I - f(...)`` then rises with slope ``1 + a1 dIa/dva + b1 dIa/dvg >= 1``, so
its root is unique, lies within ``|F(I0)|`` of any starting point ``I0``, and a
Newton iteration kept inside that bracket (bisecting whenever a step would leave
it) cannot diverge, at cutoff (where ``f`` and its slopes vanish) or anywhere else.
The stack is solved by an outer bracketed Newton iteration on the bottom plate
voltage, whose residual (current arriving from the top network minus current taken
by the bottom tube and the load) is monotone, with the two single-tube solves
nested inside.  Everything is vectorised: one call solves many units, input levels
or waveform samples at once.

Mid-band large-signal ("quasi-static") solutions treat the coupling and bypass
capacitors as batteries holding their DC charge.  Small-signal figures are central
differences of that solution (input step 1 mV, injected current 1e-4 of the
standing current), accurate to about 1e-7.

The package
-----------
* :mod:`~fitter.stage.circuits`: the stage descriptions and their names (kind, title,
  tube positions, output node); :class:`StageInputError` names the field of a bad value;
* :mod:`~fitter.stage.solver`: the tube kernel, the circuits' equations,
  :func:`operating_point`, :func:`quasi_static`;
* :mod:`~fitter.stage.analysis`: every figure of a bank of units, :func:`solve`,
  :func:`spread`, the warnings of an operating point;
* :mod:`~fitter.stage.results`: :class:`StageResult`, :class:`SpreadResult`, reports;
* :mod:`~fitter.stage.loadlines`: load lines and swings as data (plots only draw them);
* :mod:`~fitter.stage.distortion`: harmonics, THD, drive limits, level sweeps
  (``fitter.distortion`` re-exports it for today's imports).

References
----------
The small-signal formulas the tests check against are the classic ones of the
valve handbooks (e.g. F. Langford-Smith, *Radiotron Designer's Handbook*, 4th ed.,
1953, ch. 12; *RCA Receiving Tube Manual*, application notes on resistance-coupled
amplifiers).
"""


from __future__ import annotations

#: The one-line caution every report describing a circuit carries.
from .. import CAUTION  # noqa: F401  (re-exported: one wording, in fitter/__init__.py)
from .analysis import solve, spread
from .circuits import (CathodeFollower, CommonCathode, Stack, StageInputError, output_node, stage_kind,
                       stage_title, tube_positions)
from .loadlines import LoadLines, load_lines
from .results import SpreadResult, StageResult
from .solver import StageSolveError, operating_point, quasi_static

__all__ = [
    "CAUTION",
    "CommonCathode",
    "CathodeFollower",
    "Stack",
    "StageResult",
    "SpreadResult",
    "StageSolveError",
    "StageInputError",
    "solve",
    "spread",
    "quasi_static",
    "operating_point",
    "stage_kind",
    "stage_title",
    "output_node",
    "tube_positions",
    "load_lines",
    "LoadLines",
]
