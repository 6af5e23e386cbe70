"""Matching: group tubes by what they do in the position they will work in.

A *position* is where a tube will work: a fixed-bias point (:class:`FixedBias`), a
cathode-biased common-cathode stage (:class:`CathodeBias`), or a slot of a stacked
stage (:class:`StackedSlot`, solved with :mod:`fitter.stage`).  Every unit's
figures in the position (Ia, gm, rp, mu, and for stages the gain) come from its
fitted model (:func:`unit_figures`); units whose fitted data do not cover the
position are flagged (``FittedTriode.outside_range``) and, unless asked otherwise,
kept out of the groups.

Criterion (the default, so that results can be checked by hand): with a tolerance
of P %, two units are *compatible* when their Ia and their gm at the position each
differ by at most P % of the pair's mean, ``|a - b| <= P/100 (a + b)/2``.  The
*mismatch* of a pair is its larger relative difference ``2 |a - b| / (a + b)``.
Other figures, per-figure tolerances and weights are options
(:class:`Criterion`): the mismatch is then the largest (or the sum) of the weighted
relative differences.

Pairs (:func:`match_pairs`) maximise the number of compatible pairs, then minimise
the sum of the pairs' mismatches: a maximum-cardinality, minimum-weight matching on
the compatibility graph, solved to the global optimum (the method: :mod:`fitter.match.graph`).  Quads
(:func:`match_quads`) are either four units all within tolerance of each other, or
two matched pairs whose summed figures match each other (the two sides of a
parallel push-pull output); each group says which.  Stacked stages and channels
(:func:`assign_stacks`) put units in the bottom and top slots of N identical stacks
so that every stack is near the design target and the stacks match each other.

The package, by concern:

* :mod:`~fitter.match.criterion`: :class:`Criterion`, grades, and the compatibility rule
  written once (:func:`~fitter.match.criterion.within_tolerance`);
* :mod:`~fitter.match.positions`: :class:`FixedBias`, :class:`CathodeBias`,
  :class:`StackedSlot`, :func:`unit_figures`;
* :mod:`~fitter.match.graph`: candidate edges, components, stand-ins, pricing and the
  optimality certificate around the blossom engine (:mod:`~fitter.match._blossom`);
* :mod:`~fitter.match.groups`: pairs, quads, section balance, reasons for units left over;
* :mod:`~fitter.match.stacks`: stacked and channel assignment;
* :mod:`~fitter.match.results`: :class:`Optimality`, :class:`Group`, :class:`MatchResult`,
  :class:`StackAssignment`.

The use case behind the front ends (a specification with field names in, a result out)
is :func:`fitter.service.matching.match`.
"""

from __future__ import annotations

from .. import CAUTION  # one wording, in fitter/__init__.py
from .criterion import (  # noqa: F401  (re-exported)
                        DEFAULT_GRADES, FIGURES, Criterion, MatchError, grade_of, mismatch_of,
                        relative_difference, span_difference, within_tolerance)
# private names the engine's tests use; the starting-edge settings (ALL_EDGES_UP_TO, NEAREST)
# are left in fitter.match.graph, where setting them has an effect
from .graph import _solve_matching, _Space  # noqa: F401
from .groups import match_pairs, match_quads, match_units, section_balance, select_units
from .positions import (POSITION_RANGE, CathodeBias, FixedBias, PushPullSlot, StackedSlot, UnitFigures, pair_prediction,
                        unit_figures)
from .results import Group, MatchResult, Optimality, StackAssignment
from .stacks import assign_stacks, stack_cases  # noqa: F401

__all__ = [
    "CAUTION",
    "MatchError",
    "FixedBias",
    "POSITION_RANGE",
    "CathodeBias",
    "StackedSlot",
    "PushPullSlot",
    "pair_prediction",
    "Criterion",
    "UnitFigures",
    "Optimality",
    "Group",
    "MatchResult",
    "StackAssignment",
    "DEFAULT_GRADES",
    "unit_figures",
    "section_balance",
    "match_pairs",
    "match_quads",
    "match_units",
    "assign_stacks",
    "select_units",
    "grade_of",
    "relative_difference",
]
