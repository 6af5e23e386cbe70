"""A fitted triode: a registered model with one unit's parameters and their covariance.

This is the object the rest of Platebook works with (stage analysis, matching,
export).  It is what a fit produces and what a model card loads back into.
"""

from __future__ import annotations

import bisect
import math
import warnings
from dataclasses import dataclass, field
from typing import Callable, ClassVar, Mapping

import numpy as np

from .errors import InputError
from .models import TriodeModel, get_model
from .text import shown

__all__ = ["FittedTriode", "SmallSignal", "OutsideDataWarning", "DataEnvelope", "propagate", "perturbed",
           "error_from_differences"]


class OutsideDataWarning(UserWarning):
    """A model was asked about a point far outside the data it was fitted to."""


@dataclass(frozen=True)
class SmallSignal:
    """Small-signal figures at one operating point, with standard errors.

    Units: ia [A], gm [S], rp [ohm], mu [-].  ``*_err`` are one-sigma standard
    errors propagated from the fit covariance (NaN where no covariance is known).
    """

    va: float
    vg: float
    ia: float
    gm: float
    rp: float
    mu: float
    ia_err: float
    gm_err: float
    rp_err: float
    mu_err: float

    def to_dict(self) -> dict:
        """Figures in the trade's display units: mA, mA/V (mS), ohm."""

        def num(x):
            return None if not np.isfinite(x) else float(x)

        return {
            "va": self.va,
            "vg": self.vg,
            "ia_ma": num(self.ia * 1e3),
            "ia_ma_err": num(self.ia_err * 1e3),
            "gm_ms": num(self.gm * 1e3),
            "gm_ms_err": num(self.gm_err * 1e3),
            "rp_ohm": num(self.rp),
            "rp_ohm_err": num(self.rp_err),
            "mu": num(self.mu),
            "mu_err": num(self.mu_err),
        }


#: relative step of the central differences in :func:`propagate`
PROPAGATE_STEP = 1e-5


def perturbed(triode: "FittedTriode") -> tuple[list["FittedTriode"], np.ndarray]:
    """The parameter sets of the central differences of :func:`propagate`.

    Returns the triodes ``[+h_1, -h_1, +h_2, -h_2, ...]`` (one pair per free parameter,
    in the order of ``triode.free``) and the steps ``h`` [parameter units].
    """
    sets, steps = [], []
    for name in triode.free:
        p0 = triode.params[name]
        h = PROPAGATE_STEP * max(abs(p0), 1e-12)
        # a parameter fitted onto its bound is stepped one-sidedly: the triode refuses values
        # outside the model's bounds; the step returned is half the span, as for a central one
        spec = triode.model.spec(name)
        a, b = max(p0 - h, spec.lower), min(p0 + h, spec.upper)
        sets += [triode.with_params({name: b}), triode.with_params({name: a})]
        steps.append(0.5 * (b - a))
    return sets, np.array(steps, dtype=float)


def error_from_differences(values, steps, covariance) -> np.ndarray:
    """One-sigma errors sqrt(diag(J C J^T)) from the figures at the :func:`perturbed` sets.

    ``values`` has one row per perturbed set (``+h_1, -h_1, ...``), one column per figure.
    """
    v = np.asarray(values, dtype=float).reshape(len(steps), 2, -1)
    J = ((v[:, 0] - v[:, 1]) / (2 * np.asarray(steps)[:, None])).T
    var = np.einsum("ij,jk,ik->i", J, covariance, J)
    return np.sqrt(np.maximum(var, 0.0))


def propagate(
    fn: Callable, triode: "FittedTriode", *, batch: bool = False
) -> tuple[np.ndarray, np.ndarray]:
    """Value and one-sigma error of ``fn(triode)`` from the fit covariance.

    ``fn`` maps a triode to an array of figures.  Its Jacobian with respect to the
    free parameters is taken by central differences (relative step 1e-5) and the
    error is sqrt(diag(J C J^T)).  Errors are NaN when the triode has no covariance.

    With ``batch=True``, ``fn`` takes a list of triodes and returns one row of figures
    per triode; it is called once with the triode and every perturbed set, so a
    vectorised ``fn`` evaluates all of them together.
    """
    if batch:
        cov = triode.covariance
        if cov is None or not triode.free:
            value = np.atleast_1d(np.asarray(fn([triode]), dtype=float)[0])
            return value, np.full_like(value, np.nan)
        sets, steps = perturbed(triode)
        rows = np.asarray(fn([triode] + sets), dtype=float).reshape(len(sets) + 1, -1)
        return rows[0], error_from_differences(rows[1:], steps, cov)
    value = np.atleast_1d(np.asarray(fn(triode), dtype=float))
    cov = triode.covariance
    if cov is None or not triode.free:
        return value, np.full_like(value, np.nan)
    sets, steps = perturbed(triode)
    rows = [np.atleast_1d(np.asarray(fn(t), float)) for t in sets]
    return value, error_from_differences(rows, steps, cov)


@dataclass(frozen=True)
class DataEnvelope:
    """Where one unit was measured: the plate-voltage span of each traced grid curve, and the
    highest current and dissipation reached.

    A model is trusted only inside it (:meth:`outside`).  A tracer stops each curve at its
    current or dissipation limit, so the measured region is not a va x vg rectangle: the
    curves near 0 V grid end at low plate voltage.

    Parameters
    ----------
    vg : tuple of float
        Grid voltages of the traced curves, ascending [V].
    va_lo, va_hi : tuple of float
        Lowest and highest plate voltage traced on each of those curves [V].
    ia_max : float
        Highest plate current measured [A].
    pa_max : float
        Highest plate dissipation va * ia measured [W].
    """

    vg: tuple[float, ...]
    va_lo: tuple[float, ...]
    va_hi: tuple[float, ...]
    ia_max: float
    pa_max: float

    #: Allowance over the highest measured current and dissipation.  A traced curve stops at
    #: the last point under the tracer's limit, one plate-voltage step short of it, and a
    #: figure a few percent past the last measured point is routine interpolation; 10 % is the
    #: usual allowance for reading between the curves of a measured family (common practice).
    HEADROOM: ClassVar[float] = 0.10
    #: Most curves kept; a unit with more distinct grid voltages is merged into this many bands.
    MAX_CURVES: ClassVar[int] = 256

    def __post_init__(self):
        n = len(self.vg)
        if n == 0 or len(self.va_lo) != n or len(self.va_hi) != n:
            raise ValueError("an envelope needs one (va_lo, va_hi) per grid curve, and at least one curve")
        vals = (*self.vg, *self.va_lo, *self.va_hi, self.ia_max, self.pa_max)
        if not all(math.isfinite(x) for x in vals):
            raise ValueError("an envelope holds finite numbers only")
        if any(b < a for a, b in zip(self.vg, self.vg[1:])):
            raise ValueError("the envelope's grid voltages must be in ascending order")
        if any(hi < lo for lo, hi in zip(self.va_lo, self.va_hi)):
            raise ValueError("each curve's highest plate voltage must be at least its lowest")
        if self.ia_max < 0 or self.pa_max < 0:
            raise ValueError("the highest current and dissipation cannot be negative")
        object.__setattr__(self, "_va_span", max(max(self.va_hi) - min(self.va_lo), 1e-9))
        object.__setattr__(self, "_vg_span", max(self.vg[-1] - self.vg[0], 1e-9))

    @classmethod
    def from_points(cls, va, vg, ia) -> "DataEnvelope":
        """The envelope of measured points (va [V], vg [V], ia [A]); one curve per distinct vg."""
        va, vg, ia = (np.asarray(x, float).ravel() for x in (va, vg, ia))
        if va.size == 0:
            raise ValueError("an envelope needs at least one point")
        levels, inv = np.unique(vg, return_inverse=True)
        if levels.size > cls.MAX_CURVES:  # scattered grid voltages: merge neighbours into bands
            band = np.minimum((np.arange(levels.size) * cls.MAX_CURVES) // levels.size, cls.MAX_CURVES - 1)
            inv = band[inv]
            levels = np.bincount(inv, weights=vg) / np.bincount(inv)
        # each curve's lowest and highest plate voltage in one pass: minimum / maximum over
        # the runs of the points sorted by curve
        order = np.argsort(inv, kind="stable")
        starts = np.flatnonzero(np.r_[True, np.diff(inv[order]) != 0])
        lo = np.minimum.reduceat(va[order], starts)
        hi = np.maximum.reduceat(va[order], starts)
        return cls(tuple(map(float, levels)), tuple(map(float, lo)), tuple(map(float, hi)),
                   float(max(ia.max(), 0.0)), float(max((va * ia).max(), 0.0)))

    def _va_range(self, vg: float) -> tuple[float, float]:
        """Traced plate-voltage range at ``vg``, linear between the neighbouring curves."""
        g = self.vg
        k = bisect.bisect_left(g, vg)
        if k == 0:
            return self.va_lo[0], self.va_hi[0]
        if k >= len(g):
            return self.va_lo[-1], self.va_hi[-1]
        t = (vg - g[k - 1]) / (g[k] - g[k - 1]) if g[k] > g[k - 1] else 1.0
        return (self.va_lo[k - 1] + t * (self.va_lo[k] - self.va_lo[k - 1]),
                self.va_hi[k - 1] + t * (self.va_hi[k] - self.va_hi[k - 1]))

    def outside(self, va, vg, ia, margin: float = 0.1) -> str | None:
        """Why the point(s) lie outside the data, or None when all are inside.

        ``va``, ``vg`` [V] and the model's current ``ia`` [A] there (``ia`` may be a callable
        ``ia(va, vg)``, evaluated only for points that pass the voltage checks).  ``margin`` is
        the fraction of the traced grid-voltage and plate-voltage spans a point may lie beyond
        the curves, as the rectangle check allowed.
        """
        gm = margin * self._vg_span
        vm = margin * self._va_span
        ia_lim = self.ia_max * (1.0 + self.HEADROOM)
        pa_lim = self.pa_max * (1.0 + self.HEADROOM)
        if np.ndim(va) == 0 and np.ndim(vg) == 0:  # one point, plain floats: matching calls this per unit
            # every reason, not only the first: a point far out is often out in several ways
            va, vg = float(va), float(vg)
            why = []
            if not (self.vg[0] - gm <= vg <= self.vg[-1] + gm):
                why.append(f"vg {vg:.4g} V is outside the traced grid voltages "
                           f"{self.vg[0]:.4g}..{self.vg[-1]:.4g} V")
            lo, hi = self._va_range(vg)
            if not (lo - vm <= va <= hi + vm):
                near = "near" if not why else "at the nearest traced grid voltage,"
                why.append(f"va {va:.4g} V is outside the plate voltages traced {near} vg "
                           f"{min(max(vg, self.vg[0]), self.vg[-1]):.4g} V ({lo:.4g}..{hi:.4g} V)")
            with np.errstate(all="ignore"):
                i = float(ia(va, vg) if callable(ia) else ia)
            if np.isfinite(i):
                why += self._limits(i, va * i, ia_lim, pa_lim, every=True)
            return "; ".join(why) or None
        va, vg = np.broadcast_arrays(np.asarray(va, float), np.asarray(vg, float))
        va, vg = va.ravel(), vg.ravel()
        # every way the points are out (a swing far out is usually out in several: grid,
        # plate, current and dissipation), each named once
        why = []
        bad = (vg < self.vg[0] - gm) | (vg > self.vg[-1] + gm)
        if bad.any():
            # (rounded to a microvolt: a crest solved to the onset reads 0 V, not 3e-13 V)
            why.append(f"grid voltages down to {round(float(vg.min()), 6) + 0.0:.4g} V and up to "
                       f"{round(float(vg.max()), 6) + 0.0:.4g} V reach outside the traced "
                       f"{self.vg[0]:.4g}..{self.vg[-1]:.4g} V")
        lo = np.interp(vg, self.vg, self.va_lo)
        hi = np.interp(vg, self.vg, self.va_hi)
        bad = (va < lo - vm) | (va > hi + vm)
        if bad.any():
            k = int(np.argmax(np.where(bad, np.maximum(lo - va, va - hi), -np.inf)))
            where = "there" if self.vg[0] - gm <= vg[k] <= self.vg[-1] + gm else "at the nearest traced grid voltage"
            why.append(f"va {va[k]:.4g} V at vg {vg[k]:.4g} V is outside the plate voltages traced {where} "
                       f"({lo[k]:.4g}..{hi[k]:.4g} V)")
        with np.errstate(all="ignore"):
            i = np.broadcast_to(np.asarray(ia(va, vg) if callable(ia) else ia, float), va.shape)
        if np.isfinite(i).any():
            k = int(np.argmax(np.where(np.isfinite(i), i, -np.inf)))
            kp = int(np.argmax(np.where(np.isfinite(i), va * i, -np.inf)))
            why += self._limits(float(i[k]), 0.0, ia_lim, pa_lim, current_only=True, every=True)
            why += [w for w in self._limits(float(i[kp]), float(va[kp] * i[kp]), ia_lim, pa_lim, every=True)
                    if "dissipation" in w]
        return "; ".join(why) or None

    def covers(self, va, vg, ia, margin: float = 0.1) -> np.ndarray:
        """Per point: True where (va, vg) and the model's current ``ia`` [A] there lie within
        the measured data, by the rules of :meth:`outside` (plots draw the rest as
        extrapolation)."""
        va, vg, ia = np.broadcast_arrays(np.asarray(va, float), np.asarray(vg, float), np.asarray(ia, float))
        gm, vm = margin * self._vg_span, margin * self._va_span
        ok = (vg >= self.vg[0] - gm) & (vg <= self.vg[-1] + gm)
        lo = np.interp(vg, self.vg, self.va_lo)
        hi = np.interp(vg, self.vg, self.va_hi)
        ok &= (va >= lo - vm) & (va <= hi + vm)
        with np.errstate(invalid="ignore"):
            ok &= ~(ia > self.ia_max * (1.0 + self.HEADROOM)) & ~(va * ia > self.pa_max * (1.0 + self.HEADROOM))
        return ok

    def _limits(self, ia, pa, ia_lim, pa_lim, current_only=False, every=False):
        """The first reason (or with ``every`` the list of all) the model's current ``ia`` and
        dissipation ``pa`` lie beyond the highest measured."""
        why = []
        if ia > ia_lim:
            why.append(f"the model's {ia * 1e3:.3g} mA is above the highest measured current "
                       f"{self.ia_max * 1e3:.3g} mA")
        if not current_only and pa > pa_lim:
            why.append(f"the model's {pa:.3g} W dissipation is above the highest measured "
                       f"{self.pa_max:.3g} W")
        return why if every else (why[0] if why else None)

    def describe(self) -> str:
        """``measured vg lo..hi V, va lo..hi V, up to X mA and Y W``: a summary for messages."""
        return (f"measured vg {self.vg[0]:.4g}..{self.vg[-1]:.4g} V, va {min(self.va_lo):.4g}.."
                f"{max(self.va_hi):.4g} V, up to {self.ia_max * 1e3:.3g} mA and {self.pa_max:.3g} W")

    def to_dict(self) -> dict:
        """The card's ``envelope`` field: curves [[vg, va_lo, va_hi] V], ia_max_ma, pa_max_w."""
        return {"curves": [[g, a, b] for g, a, b in zip(self.vg, self.va_lo, self.va_hi)],
                "ia_max_ma": 1e3 * self.ia_max, "pa_max_w": self.pa_max}


@dataclass(frozen=True)
class FittedTriode:
    """One unit's model: registered model + parameters (+ covariance of the free ones).

    Parameters
    ----------
    model : TriodeModel or str
        The registered model.
    params : mapping
        Values of every parameter of the model (SI units of the model).
    free : tuple of str
        The parameters that were fitted (the order of ``covariance``).
    covariance : ndarray or None
        Covariance of the free parameters.
    tube, section : str
        Identity of the unit.
    valid_range : dict or None
        ``{"va": [lo, hi], "vg": [lo, hi], "ia": [lo, hi]}`` of the fitted data,
        SI units (V, A).
    envelope : DataEnvelope or None
        Where the unit was measured; when known, it (not the rectangle ``valid_range``)
        decides which points are outside the data.

    Raises
    ------
    InputError
        A parameter that is not finite or lies outside the model's bounds (the field names
        it): no figure is ever computed from such a model.
    """

    model: TriodeModel
    params: Mapping[str, float]
    free: tuple[str, ...] = ()
    covariance: np.ndarray | None = None
    tube: str = ""
    section: str | None = None
    valid_range: Mapping[str, tuple[float, float]] | None = None
    envelope: DataEnvelope | None = None
    _warned: list = field(default_factory=list, compare=False, repr=False)

    def __post_init__(self):
        if isinstance(self.model, str):
            object.__setattr__(self, "model", get_model(self.model))
        params = self.model.full_params(self.params)
        for spec in self.model.params:
            v = params[spec.name]
            if not (math.isfinite(v) and spec.lower <= v <= spec.upper):
                raise InputError(f"{v!r} is outside the {self.model.name} model's bounds "
                                 f"{spec.lower:g}..{spec.upper:g}", field=f"params.{spec.name}")
        object.__setattr__(self, "params", params)

    # -- identity -----------------------------------------------------------
    @property
    def label(self) -> str:
        """``tube`` or ``tube:section``: how fit results and matching name a unit.

        Control and escape characters are shown escaped (:func:`fitter.text.shown`): names
        come from files, and tables and messages print this label to a terminal.
        """
        return shown(f"{self.tube}:{self.section}" if self.section else str(self.tube))

    def with_params(self, changes: Mapping[str, float]) -> "FittedTriode":
        p = dict(self.params)
        p.update(changes)
        return FittedTriode(
            self.model, p, self.free, self.covariance, self.tube, self.section, self.valid_range,
            self.envelope,
        )

    # -- evaluation ---------------------------------------------------------
    def current(self, va, vg):
        """Plate current [A] at plate voltage ``va`` [V] and grid voltage ``vg`` [V]."""
        return self.model.current(va, vg, **self.params)

    __call__ = current

    def gradient(self, va, vg):
        """(dIa/dva [S], dIa/dvg [S]) from the model's analytic derivatives."""
        return self.model.voltage_gradient(va, vg, **self.params)

    def outside_range(self, va, vg, margin: float = 0.1, ia=None) -> bool:
        """True when any (va, vg) lies outside the data.

        With an :attr:`envelope`: outside the traced curves (by more than ``margin`` of the
        traced spans), or where the model's current or dissipation exceeds the highest
        measured (see :meth:`DataEnvelope.outside`); ``ia`` [A], when the caller already has
        the model's current there, saves evaluating it again.  Without one (older cards):
        more than ``margin`` of the span outside the va x vg rectangle ``valid_range``.
        """
        if self.envelope is not None:
            return self.envelope.outside(va, vg, self.current if ia is None else ia, margin) is not None
        if not self.valid_range:
            return False
        if np.ndim(va) == 0 and np.ndim(vg) == 0:  # one point: plain floats (matching calls this per unit)
            for key, v in (("va", float(va)), ("vg", float(vg))):
                lo, hi = self.valid_range[key]
                span = max(hi - lo, 1e-9)
                if v < lo - margin * span or v > hi + margin * span:
                    return True
            return False
        va = np.atleast_1d(np.asarray(va, float))
        vg = np.atleast_1d(np.asarray(vg, float))
        for key, v in (("va", va), ("vg", vg)):
            lo, hi = self.valid_range[key]
            span = max(hi - lo, 1e-9)
            if np.any(v < lo - margin * span) or np.any(v > hi + margin * span):
                return True
        return False

    def outside_reason(self, va, vg, margin: float = 0.1, ia=None) -> str | None:
        """Why (va, vg) lies outside the data (a sentence naming the unit), or None."""
        if self.envelope is not None:
            why = self.envelope.outside(va, vg, self.current if ia is None else ia, margin)
            if why is None:
                return None
            return (f"{self.label}: {why}; {self.envelope.describe()}; the model is extrapolating "
                    "(its error bars there cover the fit's uncertainty only, not the extrapolation)")
        if not self.outside_range(va, vg, margin):
            return None
        r = self.valid_range
        return (f"{self.label}: point(s) outside the fitted data "
                f"(va {r['va'][0]:.4g}..{r['va'][1]:.4g} V, "
                f"vg {r['vg'][0]:.4g}..{r['vg'][1]:.4g} V); the model is extrapolating "
                "(its error bars there cover the fit's uncertainty only, not the extrapolation)")

    def check_range(self, va, vg, margin: float = 0.1) -> None:
        """Warn (:class:`OutsideDataWarning`) when asked far outside the fitted data."""
        why = self.outside_reason(va, vg, margin)
        if why is not None:
            warnings.warn(why, OutsideDataWarning, stacklevel=3)

    def small_signal(self, va: float, vg: float, check: bool = True) -> SmallSignal:
        """ia, gm, rp and mu = gm rp at (va, vg), with propagated standard errors."""
        if check:
            self.check_range(va, vg)

        def figures(t: FittedTriode):
            ia = float(t.current(va, vg))
            dva, dvg = t.gradient(va, vg)
            dva, dvg = float(dva), float(dvg)
            rp = 1.0 / dva if dva > 0 else np.inf
            return np.array([ia, dvg, rp, dvg * rp])

        val, err = propagate(figures, self)
        return SmallSignal(float(va), float(vg), *map(float, val), *map(float, err))

    # -- description --------------------------------------------------------
    def stderr(self) -> dict[str, float | None]:
        out: dict[str, float | None] = {name: None for name in self.model.param_names}
        if self.covariance is not None:
            d = np.sqrt(np.maximum(np.diag(self.covariance), 0.0))
            for name, s in zip(self.free, d):
                out[name] = float(s) if np.isfinite(s) else None
        return out
