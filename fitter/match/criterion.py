"""The compatibility rule, the mismatch, the criterion that sets them, and the grades.

With a tolerance of P %, two units are *compatible* when each compared figure differs by
at most P % of the pair's mean, ``|a - b| <= P/100 (a + b)/2``.  The relative difference
``2 |a - b| / (a + b)`` equals ``2 tanh(|ln a - ln b| / 2)``, so a group of units (or a
box of them in ln-figure space) is compared by the span of its ln-figures
(:func:`span_difference`).  The rule itself is written once, in :func:`within_tolerance`;
every part of the matcher (window search, candidate edges, pricing, quads, the reasons
given for units left over, the sides of a quad) asks it.  The *mismatch* of a pair or a
group is the largest (or the sum) of its weighted relative differences
(:func:`mismatch_of`).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Mapping

import numpy as np

from ..errors import InputError

class MatchError(InputError):
    """Matching could not be done as asked.

    ``str(e)`` reads as before the service layer existed: ``subject: message`` (the
    subject in the engine's words, e.g. ``position va``).  ``e.field`` names the field of
    the specification it is about (``va``, ``tolerance``, ``stack``...), so a front end can
    name it its own way with :meth:`text`.  A message may refer to other fields as
    ``{name}`` (listed in ``refs``); such a message holds no user text.
    """

    def __init__(self, message: str, *, field: str | None = None, subject: str | None = None,
                 refs: tuple = ()):
        self.subject = subject
        self.refs = tuple(refs)
        super().__init__(message, field=field)

    def text(self, names: Mapping[str, str] | None = None) -> str:
        """The message, with each field named by ``names`` (default: the engine's words)."""
        names = names or {}
        say = {r: names.get(r, r) for r in self.refs}
        body = self.message.format(**say) if self.refs else self.message
        if self.subject and self.refs and "{" in self.subject:
            head = self.subject.format(**say)
        elif self.subject is not None and self.field in names:
            head = names[self.field]
        else:
            head = self.subject
        return f"{head}: {body}" if head else body

    def __str__(self) -> str:
        return self.text()

    def to_dict(self) -> dict:
        return dict(super().to_dict(), message=self.text())


def relative_difference(a, b):
    """``2 |a - b| / (a + b)``: the difference as a fraction of the pair's mean [-]."""
    a = np.asarray(a, float)
    b = np.asarray(b, float)
    return 2.0 * np.abs(a - b) / (a + b)

def span_difference(span):
    """``2 tanh(span / 2)``: the relative difference of two figures whose logarithms lie
    ``span`` apart (the same as :func:`relative_difference` of the figures) [-]."""
    return 2.0 * np.tanh(span / 2.0)


def within_tolerance(d, tol, each: bool = False):
    """THE compatibility rule: relative differences ``d`` (last axis: the figures) within
    their tolerances ``tol`` [-].

    Returns, per row, whether every figure is within (``each``: per figure).  A relative
    slack of 1e-12 (and 1e-15 absolute) keeps a pair exactly at the tolerance compatible
    whichever way its difference was rounded.  Every decision of the matcher on whether
    units or groups agree goes through here.
    """
    ok = d <= tol * (1 + 1e-12) + 1e-15
    return ok if each else np.all(ok, axis=-1)


def mismatch_of(d, weights, norm: str = "max"):
    """The mismatch: the largest (``norm="max"``) or the sum of the weighted relative
    differences ``d`` over the last axis (the figures) [-]."""
    wd = d * weights
    return wd.max(axis=-1) if norm == "max" else wd.sum(axis=-1)



def _positive(name, v, allow_zero=False, field=None):
    if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v):
        raise MatchError(f"must be a finite number, got {v!r}", subject=name, field=field)
    if v < 0 or (v == 0 and not allow_zero):
        raise MatchError(f"must be {'non-negative' if allow_zero else 'positive'}, got {v!r}",
                         subject=name, field=field)


#: figures every position gives; stages also give "gain", the push-pull slot "h2" (the
#: second-harmonic plate current, see fitter.match.positions.PushPullSlot)
FIGURES = {
    "ia": ("Ia", "mA", 1e3),
    "gm": ("gm", "mA/V", 1e3),
    "rp": ("rp", "kohm", 1e-3),
    "mu": ("mu", "", 1.0),
    "gain": ("gain", "", 1.0),
    "h2": ("Ia(H2)", "mA", 1e3),
}


@dataclass(frozen=True)
class Criterion:
    """When two units are compatible, and how their mismatch is measured.

    Parameters
    ----------
    tolerance_pct : float
        Default tolerance P [%]: figures may differ by at most P % of the pair's mean.
    figures : tuple of str
        Figures compared (of ``ia``, ``gm``, ``rp``, ``mu``, ``gain``).
    tolerances : mapping, optional
        Per-figure tolerance [%] overriding ``tolerance_pct``.
    weights : mapping, optional
        Per-figure weight of the relative difference in the mismatch (default 1).
    norm : {"max", "sum"}
        Mismatch = the largest weighted relative difference, or their sum.
    """

    tolerance_pct: float = 5.0
    figures: tuple = ("ia", "gm")
    tolerances: Mapping[str, float] | None = None
    weights: Mapping[str, float] | None = None
    norm: str = "max"

    def __post_init__(self):
        _positive("tolerance", self.tolerance_pct, field="tolerance")
        if not self.figures:
            raise MatchError("no figures to compare", subject="criterion", field="figures")
        for f in self.figures:
            if f not in FIGURES:
                raise MatchError(f"unknown figure {f!r}; figures are {', '.join(FIGURES)}",
                                 subject="criterion", field="figures")
        for name, fld, d in (("tolerances", "figure_tolerance", self.tolerances),
                             ("weights", "weights", self.weights)):
            for f, v in (d or {}).items():
                if f not in self.figures:
                    raise MatchError(f"figure {f!r} is not among the compared figures "
                                     f"({', '.join(self.figures)})", subject=f"criterion {name}", field=fld)
                try:
                    _positive(f"criterion {name}[{f}]", v, field=fld)
                except MatchError as e:
                    # the figure stays in the message when a front end names the field its own way
                    raise MatchError(f"{f}: {e.message}", subject=f"criterion {name}", field=fld) from None
        if self.norm not in ("max", "sum"):
            raise MatchError(f"must be 'max' or 'sum', got {self.norm!r}", subject="criterion norm",
                             field="distance")

    def tol(self) -> np.ndarray:
        t = dict(self.tolerances or {})
        return np.array([t.get(f, self.tolerance_pct) / 100.0 for f in self.figures])

    def w(self) -> np.ndarray:
        w = dict(self.weights or {})
        return np.array([float(w.get(f, 1.0)) for f in self.figures])

    def within(self, d):
        """Whether relative differences ``d`` [-] (last axis: this criterion's figures) are
        compatible (:func:`within_tolerance`)."""
        return within_tolerance(d, self.tol())

    def mismatch(self, d):
        """The mismatch of relative differences ``d`` [-] (:func:`mismatch_of`)."""
        return mismatch_of(d, self.w(), self.norm)

    def describe(self) -> str:
        parts = [f"{FIGURES[f][0]} within {t * 100:g} %" for f, t in zip(self.figures, self.tol())]
        s = " and ".join(parts) + " of the pair's mean"
        if self.weights:
            s += "; weights " + ", ".join(f"{f} {v:g}" for f, v in self.weights.items())
        return s + f"; mismatch = {'largest' if self.norm == 'max' else 'sum of the'} relative difference(s)"

    def to_dict(self) -> dict:
        return {"figures": list(self.figures),
                "tolerance_pct": {f: float(t * 100) for f, t in zip(self.figures, self.tol())},
                "weights": {f: float(w) for f, w in zip(self.figures, self.w())},
                "norm": self.norm}


#: grade bands: (name, largest mismatch [%]); a group gets the first band it fits
DEFAULT_GRADES = (("tight", 1.0), ("close", 2.5), ("matched", 5.0), ("loose", 10.0))


def grade_of(mismatch_pct: float, grades=DEFAULT_GRADES) -> str:
    """The name of the first band whose limit [%] the mismatch does not exceed."""
    for name, limit in grades:
        if mismatch_pct <= limit + 1e-9:
            return name
    return "wide"
