"""A fitted triode: a registered model with one unit's parameters and their covariance.

This is the object the rest of Platebook works with (stage analysis, matching,
export).  It is what a fit produces and what a model card loads back into.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass, field
from typing import Callable, Mapping

import numpy as np

from .models import TriodeModel, get_model

__all__ = ["FittedTriode", "SmallSignal", "OutsideDataWarning", "propagate", "perturbed", "error_from_differences"]


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
        sets += [triode.with_params({name: p0 + h}), triode.with_params({name: p0 - h})]
        steps.append(h)
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
    """

    model: TriodeModel
    params: Mapping[str, float]
    free: tuple[str, ...] = ()
    covariance: np.ndarray | None = None
    tube: str = ""
    section: str | None = None
    valid_range: Mapping[str, tuple[float, float]] | None = None
    _warned: list = field(default_factory=list, compare=False, repr=False)

    def __post_init__(self):
        if isinstance(self.model, str):
            object.__setattr__(self, "model", get_model(self.model))
        object.__setattr__(self, "params", self.model.full_params(self.params))

    # -- identity -----------------------------------------------------------
    @property
    def label(self) -> str:
        """``tube`` or ``tube:section``: how fit results and matching name a unit."""
        return f"{self.tube}:{self.section}" if self.section else str(self.tube)

    def with_params(self, changes: Mapping[str, float]) -> "FittedTriode":
        p = dict(self.params)
        p.update(changes)
        return FittedTriode(
            self.model, p, self.free, self.covariance, self.tube, self.section, self.valid_range
        )

    # -- evaluation ---------------------------------------------------------
    def current(self, va, vg):
        """Plate current [A] at plate voltage ``va`` [V] and grid voltage ``vg`` [V]."""
        return self.model.current(va, vg, **self.params)

    __call__ = current

    def gradient(self, va, vg):
        """(dIa/dva [S], dIa/dvg [S]) from the model's analytic derivatives."""
        return self.model.voltage_gradient(va, vg, **self.params)

    def outside_range(self, va, vg, margin: float = 0.1) -> bool:
        """True when any (va, vg) lies more than ``margin`` of the span outside the data."""
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

    def check_range(self, va, vg, margin: float = 0.1) -> None:
        """Warn (:class:`OutsideDataWarning`) when asked far outside the fitted data."""
        if self.outside_range(va, vg, margin):
            r = self.valid_range
            warnings.warn(
                f"{self.label}: point(s) outside the fitted data "
                f"(va {r['va'][0]:.4g}..{r['va'][1]:.4g} V, "
                f"vg {r['vg'][0]:.4g}..{r['vg'][1]:.4g} V); the model is extrapolating",
                OutsideDataWarning,
                stacklevel=3,
            )

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
