"""Fitting registered triode models to one unit's plate curves, robustly and honestly.

The procedure for one unit and one model (``fit_curves``):

1. **Clean** the points (:func:`fitter.reader.clean_curves`): sort, average repeats,
   drop points outside the model's domain.  Each change is a note.
2. **Weight.** Residuals are relative with a floor: r = (Ia_model - Ia) / (|Ia| + f),
   f = ``floor`` x the unit's largest current (default 2 %), where "largest" ignores
   absurd readings (:func:`fitter.reader.robust_full_scale`), so that one 1e38 mA
   reading cannot flatten the weights of all the others.  Currents span three
   decades on a plate-curve plot; a plain absolute residual lets the top of the
   family dominate and ignores the bias region where the tube works.
3. **Start** from the model's data-driven guess (:mod:`fitter.models`: a closed-form
   linearisation of the Child-Langmuir form), plus the model's alternative starts
   when the first run does not reach a sane minimum.
4. **Robust fit.** lmfit's ``least_squares`` (trust-region reflective, bounded, with
   the model's analytic parameter Jacobian) with a soft-L1 loss whose scale is set
   from the robust scatter (1.4826 MAD) of the residuals, so that a few bad points
   (a digitising slip, a tracer glitch) do not drag the fit.
5. **Outliers.** Points whose residual exceeds ``outlier_sigma`` robust standard
   deviations are listed as outliers.
6. **Polish and uncertainties.** A plain (linear-loss) least-squares run on the
   inliers from the robust solution gives the parameter covariance (scaled by the
   reduced chi-square), standard errors, correlations, AIC and BIC.
7. **Sanity.** The fit is declared failed, with the reason, when: the optimiser did
   not converge; a free parameter ran to its bound; the model is flat (near zero)
   where the data carry current; the robust scatter is too large for the model to
   describe the data; or too many points were rejected; or the parameter covariance
   is singular, or a parameter never moved from its start and has no error bar (the
   data do not determine it).  Each reason says what the user can check.  A failed
   fit is never reported as a result.
"""

from __future__ import annotations

import functools
import math
import os
import time
import warnings
from dataclasses import dataclass, field, replace
from typing import Callable, Iterable, Mapping

import numpy as np
from scipy.optimize import leastsq
from scipy.special import expit

from .errors import InputError
from .models import DEFAULT_MODEL, TriodeModel, _median, get_model, model_names
from .reader import CurveSet, check_data, check_for_model, clean_curves, robust_full_scale
from .triode import DataEnvelope, FittedTriode

__all__ = [
    "FitResult",
    "FitFailed",
    "FitInputError",
    "fit_curves",
    "fit_all_models",
    "fit_many",
    "rank_results",
    "FitOptions",
]

#: A fit whose robust scatter of relative residuals exceeds this did not find a model
#: that describes the data (fitted tubes sit at 0.5-3 %).
MAX_ROBUST_SCATTER = 0.15
#: ...nor one that had to reject more than this fraction of the points.
MAX_OUTLIER_FRACTION = 0.2
#: A converged fit whose relative rms exceeds this gets a note: tracer data scatter by
#: about 1 % (common practice), so several percent means the model misses the tube's
#: shape somewhere (positive grid, the knee), even though it is not a failure.
LOOSE_FIT_REL_RMS = 0.05


#: What to check when a parameter runs to a bound and its registry entry gives no hint
_BOUND_HINT_OTHER = "check the data's units and that the file holds one tube section; or hold the parameter at a value"
_GRID_HINT = "check the grid-current column's unit and sign"


def _hint(model: TriodeModel, name: str) -> str:
    spec = model.spec(name)
    if spec.hint is not None:
        return spec.hint
    return _GRID_HINT if spec.grid else _BOUND_HINT_OTHER


class FitFailed(RuntimeError):
    """Raised by :meth:`FitResult.raise_for_failure`; ``.reason`` says why."""

    def __init__(self, label: str, model: str, reason: str):
        self.label, self.model, self.reason = label, model, reason
        super().__init__(f"{label}: {model} fit failed: {reason}")


class FitInputError(InputError):
    """The unit cannot be fitted with the chosen model (too few points, bad option).

    ``field`` is the option at fault where there is one (``"fix"``); the text is the message
    alone (a data problem already names its file and line in it)."""

    def __str__(self) -> str:
        return self.message


@dataclass(frozen=True)
class FitOptions:
    """Options of a fit.

    Attributes
    ----------
    fix : mapping
        Parameters held at a given value, e.g. ``{"n": 1.5}`` or ``{"mu": 100}``.
    expr : mapping
        lmfit constraint expressions, e.g. ``{"kvb": "kp/2"}``.
    bounds : mapping
        Replacement bounds ``{name: (lower, upper)}``.
    floor : float
        Absolute floor of the relative weighting, as a fraction of the unit's
        largest current.
    robust : bool
        Use the robust loss (default).  ``False`` gives a plain weighted fit.
    outlier_sigma : float
        Robust z-score beyond which a point is listed as an outlier.
    """

    fix: Mapping[str, float] = field(default_factory=dict)
    expr: Mapping[str, str] = field(default_factory=dict)
    bounds: Mapping[str, tuple[float, float]] = field(default_factory=dict)
    floor: float = 0.02
    robust: bool = True
    outlier_sigma: float = 4.0
    #: "fast": covariance from the analytic Jacobian at the polished solution;
    #: "lmfit": the reported fit is an lmfit Minimizer run (used anyway with ``expr``).
    final: str = "fast"


@dataclass
class FitResult:
    """The outcome of fitting one model to one unit.

    ``converged`` is False for a failed fit, ``failure`` then says why, and the
    parameter figures are not to be used (``to_dict`` leaves them out).
    """

    unit: CurveSet
    model: TriodeModel
    converged: bool
    failure: str | None = None
    params: dict[str, float] = field(default_factory=dict)
    stderr: dict[str, float | None] = field(default_factory=dict)
    correlations: dict[str, dict[str, float]] = field(default_factory=dict)
    free: tuple[str, ...] = ()
    covariance: np.ndarray | None = None
    residuals: np.ndarray | None = None  # model - data [A], every point of the cleaned unit
    outliers: np.ndarray | None = None  # bool mask over the cleaned unit's points
    rms_ma: float | None = None
    max_abs_ma: float | None = None
    rel_rms: float | None = None
    robust_scatter: float | None = None
    r2: float | None = None
    aic: float | None = None
    bic: float | None = None
    nfev: int = 0
    starts_tried: int = 0
    message: str = ""
    elapsed_ms: float = 0.0
    optimizer: object | None = field(default=None, repr=False)

    # -- identity ------------------------------------------------------------
    @property
    def tube(self) -> str:
        return self.unit.tube

    @property
    def section(self) -> str | None:
        return self.unit.section

    @property
    def label(self) -> str:
        return self.unit.label

    @property
    def n_points(self) -> int:
        return self.unit.n_points

    @property
    def n_outliers(self) -> int:
        return int(self.outliers.sum()) if self.outliers is not None else 0

    @property
    def notes(self) -> tuple[str, ...]:
        return self.unit.notes

    @property
    def triode(self) -> FittedTriode | None:
        """The fitted model as a :class:`FittedTriode`; None for a failed fit."""
        if not self.converged:
            return None
        return FittedTriode(self.model, self.params, self.free, self.covariance,
                            self.unit.tube, self.unit.section, self.valid_range, self.envelope)

    @functools.cached_property
    def envelope(self) -> DataEnvelope | None:
        """Where the unit was measured (its points less the outliers, which are glitches and
        would otherwise stretch the highest current); None for a unit without points."""
        u = self.unit
        if u.va.size == 0:
            return None
        keep = np.ones(u.va.size, bool) if self.outliers is None or self.outliers.all() else ~self.outliers
        return DataEnvelope.from_points(u.va[keep], u.vg[keep], u.ia[keep])

    @property
    def valid_range(self) -> dict:
        u = self.unit
        return {"va": (float(u.va.min()), float(u.va.max())),
                "vg": (float(u.vg.min()), float(u.vg.max())),
                "ia": (float(u.ia.min()), float(u.ia.max()))}

    def raise_for_failure(self) -> "FitResult":
        if not self.converged:
            raise FitFailed(self.label, self.model.name, self.failure or "unknown reason")
        return self

    def outlier_points(self) -> list[dict]:
        """The down-weighted points: va, vg, measured and model current [mA], line."""
        if self.outliers is None or not self.outliers.any():
            return []
        u = self.unit
        out = []
        for i in np.flatnonzero(self.outliers):
            out.append({
                "va": float(u.va[i]), "vg": float(u.vg[i]), "ia_ma": float(u.ia[i] * 1e3),
                "model_ma": float((u.ia[i] + self.residuals[i]) * 1e3),
                "line": int(u.lines[i]) if u.lines is not None else None,
            })
        return out

    def figures(self) -> dict:
        """Goodness-of-fit figures (what a model card stores under "fit")."""
        return {
            "rms_ma": self.rms_ma, "max_abs_ma": self.max_abs_ma, "rel_rms": self.rel_rms,
            "robust_scatter": self.robust_scatter, "r2": self.r2, "aic": self.aic, "bic": self.bic,
            "n_points": self.n_points, "n_outliers": self.n_outliers, "nfev": self.nfev,
        }

    def to_dict(self, residuals: bool = False) -> dict:
        def num(x):
            return None if x is None or not math.isfinite(x) else float(x)

        d = {
            "tube": self.unit.tube,
            "section": self.unit.section,
            "model": self.model.name,
            "converged": bool(self.converged),
            "failure": self.failure,
            "params": {k: float(v) for k, v in self.params.items()} if self.converged else {},
            "stderr": {k: num(v) for k, v in self.stderr.items()} if self.converged else {},
            "correlations": self.correlations if self.converged else {},
            "rms_ma": num(self.rms_ma) if self.converged else None,
            "max_abs_ma": num(self.max_abs_ma) if self.converged else None,
            "rel_rms": num(self.rel_rms) if self.converged else None,
            "r2": num(self.r2) if self.converged else None,
            "aic": num(self.aic) if self.converged else None,
            "bic": num(self.bic) if self.converged else None,
            "n_points": self.n_points,
            "n_outliers": self.n_outliers,
            "outliers": self.outlier_points(),
            "nfev": self.nfev,
            "message": self.message,
            "notes": list(self.unit.notes),
            "source": self.unit.source,
            "valid_range": {
                "va_v": list(self.valid_range["va"]), "vg_v": list(self.valid_range["vg"]),
                "ia_ma": [1e3 * x for x in self.valid_range["ia"]],
            },
            "envelope": None if self.envelope is None else self.envelope.to_dict(),
        }
        if self.converged:
            d["free"] = list(self.free)
            d["covariance"] = None if self.covariance is None else [
                [num(x) for x in row] for row in self.covariance]
        if residuals and self.residuals is not None:
            d["residuals_ma"] = [float(x) for x in self.residuals * 1e3]
        return d

    def report(self) -> str:
        """A readable text report of this fit."""
        head = f"{self.label}  model {self.model.name}  ({self.n_points} points)"
        if not self.converged:
            return f"{head}\n  FAILED: {self.failure}"
        lines = [head]
        for name in self.model.param_names:
            if name not in self.params:
                continue
            err = self.stderr.get(name)
            tag = "" if name in self.free else "  (fixed)"
            es = f" ± {err:.3g}" if err is not None else ""
            lines.append(f"  {name:>6} = {self.params[name]:.6g}{es}{tag}")
        lines.append(f"  rms {self.rms_ma:.4g} mA, max {self.max_abs_ma:.4g} mA, "
                     f"relative rms {100 * self.rel_rms:.2f} %, R² {self.r2:.5f}")
        lines.append(f"  AIC {self.aic:.1f}, BIC {self.bic:.1f}; {self.n_outliers} outlier(s)")
        for p in self.outlier_points():
            where = f"line {p['line']}: " if p["line"] else ""
            lines.append(f"    outlier {where}va {p['va']:g} V, vg {p['vg']:g} V: "
                         f"{p['ia_ma']:.4g} mA measured, model {p['model_ma']:.4g} mA")
        for n in self.unit.notes:
            lines.append(f"  note: {n}")
        return "\n".join(lines)


# ---------------------------------------------------------------------------
# The fit
# ---------------------------------------------------------------------------


def _make_params(model: TriodeModel, start: Mapping[str, float], free: list[str], opts: FitOptions):
    import lmfit  # lazily: only constraint expressions and final="lmfit" need it (0.8 s to import)

    params = lmfit.Parameters()
    for spec in model.params:
        lo, hi = opts.bounds.get(spec.name, (spec.lower, spec.upper))
        if spec.name in opts.fix:
            params.add(spec.name, value=float(opts.fix[spec.name]), vary=False)
        elif spec.name in opts.expr:
            params.add(spec.name, expr=opts.expr[spec.name])
        elif spec.name in free:
            v = float(np.clip(start.get(spec.name, spec.default if spec.default is not None else lo),
                              lo + 1e-9 * (hi - lo), hi - 1e-9 * (hi - lo)))
            params.add(spec.name, value=v, min=lo, max=hi)
        else:
            params.add(spec.name, value=float(spec.default), vary=False)
    return params


class _Problem:
    """Residuals and their analytic Jacobian for one unit and one model."""

    def __init__(self, model: TriodeModel, unit: CurveSet, floor: float, with_grid: bool):
        self.model = model
        self.va, self.vg, self.ia = unit.va, unit.vg, unit.ia
        scale = max(robust_full_scale(self.ia), 1e-9)
        self.full_scale = scale
        self.w = 1.0 / (np.abs(self.ia) + floor * scale)
        self.with_grid = with_grid
        if with_grid:
            self.ig = unit.ig
            gscale = max(robust_full_scale(self.ig), 1e-9)
            self.wg = 1.0 / (np.abs(self.ig) + floor * gscale)
        self.mask = None  # inlier mask for the polish
        # The noise scale is judged on the points well above the floor, where the
        # weighted residual is the relative deviation; points at cutoff (often exactly
        # zero current) would otherwise pull the scale to nothing.
        sel = np.abs(self.ia) >= 5 * floor * scale
        if with_grid:
            sel = np.concatenate([sel, np.zeros(self.ia.size, dtype=bool)])
        self.scale_points = sel
        order = np.argsort(np.abs(self.ia), kind="stable")
        self.current_bands = np.array_split(order, max(1, min(5, self.ia.size // 20)))

    @staticmethod
    def values(params):
        return {k: params[k].value for k in params}

    def residual_values(self, p):
        if self.model.evaluate is not None:
            ia, ctx = self.model.evaluate(self.va, self.vg, **p)
            self._ctx = (tuple(p.values()), ctx)
        else:
            ia = self.model.current(self.va, self.vg, **p)
        r = (ia - self.ia) * self.w
        if self.with_grid:
            rg = (self.model.grid_current(self.vg, **p) - self.ig) * self.wg
            r = np.concatenate([r, rg])
        if self.mask is not None:
            r = r[self.mask]
        return r

    def jacobian_values(self, p, names):
        # MINPACK asks for the Jacobian where it last evaluated the residuals; the
        # model's intermediate terms from that evaluation are reused when it has them
        cached = getattr(self, "_ctx", None)
        if cached is not None and cached[0] == tuple(p.values()):
            g = self.model.param_gradient_from(cached[1], **p)
        else:
            g = self.model.param_gradient(self.va, self.vg, **p)
        J = np.empty((self.va.size, len(names)))
        for j, k in enumerate(names):
            J[:, j] = g[k] * self.w
        if self.with_grid:
            # Ia = Ik - Ig, so dIg/dp = -dIa/dp for the grid parameters; the plate
            # parameters do not enter Ig.
            Jg = np.zeros((self.va.size, len(names)))
            for j, k in enumerate(names):
                if self.model.spec(k).grid:
                    Jg[:, j] = -g[k] * self.wg
            J = np.vstack([J, Jg])
        if self.mask is not None:
            J = J[self.mask]
        return J

    def residual(self, params):
        return self.residual_values(self.values(params))

    def jacobian(self, params):
        return self.jacobian_values(self.values(params), [k for k in params if params[k].vary])


class _FastSearch:
    """Robust minimisation of one problem in logit coordinates with MINPACK's LM.

    lmfit's Minimizer costs about a millisecond per call in bookkeeping (parameter
    copies, statistics); the robust search needs several warm-started runs, so it
    works on plain arrays here, and lmfit does the final, reported fit (covariance,
    standard errors, correlations, AIC/BIC) exactly once.  The bounds are enforced by
    the transform p = lo + (hi - lo) expit(x), so the search never leaves them.
    """

    def __init__(self, prob: _Problem, model: TriodeModel, free, fixed: dict, bounds: dict):
        self.prob, self.model, self.free = prob, model, list(free)
        self.fixed = dict(fixed)
        self.lo = np.array([bounds[k][0] for k in free], float)
        self.hi = np.array([bounds[k][1] for k in free], float)
        self.sw = None  # sqrt of the IRLS weights
        self.nfev = 0
        self._cache = (None, None)

    def to_internal(self, values):
        v = np.array([values[k] for k in self.free], float)
        span = self.hi - self.lo
        f = np.clip((v - self.lo) / span, 1e-9, 1 - 1e-9)
        return np.log(f / (1 - f))

    def to_values(self, x):
        p = dict(self.fixed)
        p.update(zip(self.free, (self.lo + (self.hi - self.lo) * expit(x)).tolist()))
        return p

    def _fun(self, x):
        p = self.to_values(x)
        r = self.prob.residual_values(p)
        self.nfev += 1
        return r if self.sw is None else r * self.sw

    def _jac(self, x):
        p = self.to_values(x)
        e = expit(x)
        J = self.prob.jacobian_values(p, self.free) * ((self.hi - self.lo) * e * (1 - e))
        return J if self.sw is None else J * self.sw[:, None]

    def solve(self, x0, tol=1e-8):
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)
            x, cov, info, msg, ier = leastsq(self._fun, x0, Dfun=self._jac, full_output=True,
                                             ftol=tol, xtol=tol, maxfev=100 * (len(x0) + 1))
        return x, ier in (1, 2, 3, 4), msg

    def robust(self, values, robust: bool, f_scale_sigmas: float = 2.5, rounds: int = 6,
               first_scale: float = 0.05):
        """IRLS rounds of LM with soft-L1 weights from ``values``.

        The first round uses a fixed soft-L1 scale of ``first_scale`` (5 % relative), so
        that a bad point cannot drag the very first solution into a wrong basin (a plain
        first pass can, and cannot always get back); later rounds use the robust
        scatter of the residuals.  ``robust=False`` is one plain weighted LM run.

        Returns (values, robust scale, success, message).
        """
        x = self.to_internal(values)
        scale = None
        if not robust:
            x, ok, msg = self.solve(x)
        else:
            ok, msg = False, ""
            for i in range(rounds):
                self.sw = None
                raw = self._fun(x)
                if i == 0:
                    f = first_scale
                else:
                    scale = max(_robust_scale(raw, self.prob.scale_points), 1e-5)
                    f = f_scale_sigmas * scale
                self.sw = (1.0 + (raw / f) ** 2) ** -0.25  # sqrt of the soft-L1 weight (1 + z)^(-1/2)
                # loose: the robust rounds only find the basin and the outliers; the
                # polish on the inliers gives the reported solution to full precision
                x_new, ok, msg = self.solve(x, tol=1e-5)
                step = np.max(np.abs(x_new - x))
                x = x_new
                if i > 0 and step < 1e-2:
                    break
            self.sw = None
            scale = max(_robust_scale(self._fun(x), self.prob.scale_points), 1e-5)
        values = self.to_values(x)
        return values, scale, ok and bool(np.all(np.isfinite(x))), msg

    def polish(self, values, mask):
        """Plain least squares on the inliers (``mask``) from ``values``.

        Returns (values, covariance of the free parameters or None, chi-square,
        number of residuals, success, message).  The covariance is
        inv(J^T J) chi2 / (N - k) with J the analytic Jacobian in the parameters'
        own units, which is what lmfit reports for the same problem (a test checks
        the two against each other).
        """
        self.sw = mask.astype(float)
        x, ok, msg = self.solve(self.to_internal(values), tol=1e-10)
        self.sw = None
        values = self.to_values(x)
        self.prob.mask = mask
        try:
            r = self.prob.residual_values(values)
            J = self.prob.jacobian_values(values, self.free)
        finally:
            self.prob.mask = None
        chisqr = float(r @ r)
        nres = r.size
        dof = max(nres - len(self.free), 1)
        try:
            cov = np.linalg.inv(J.T @ J) * (chisqr / dof)
            if not np.all(np.isfinite(cov)) or np.any(np.diag(cov) < 0):
                cov = None
        except np.linalg.LinAlgError:
            cov = None
        return values, cov, chisqr, nres, ok, msg


def _point_scales(r, prob: "_Problem", base: float):
    """Robust scale of each residual, allowing for noise that is not a fixed fraction of
    the current (an absolute noise floor makes small currents relatively noisier).

    The plate-current points are split into up to five groups of similar current;
    each point gets the larger of its group's robust scale and ``base`` (the scale of
    the points well above the floor).  Grid-current residuals get ``base``.
    """
    out = np.full(r.size, base)
    for chunk in prob.current_bands:
        out[chunk] = max(_mad_scale(r[chunk]), base)
    return out


def _mad_scale(r):
    return 1.4826 * _median(np.abs(r - _median(r)))


def _robust_scale(r, sel=None):
    """1.4826 x the median absolute deviation of ``r[sel]``: a standard deviation that
    a few bad points do not inflate."""
    if sel is not None and sel.sum() >= 10:
        r = r[sel]
    if r.size == 0:
        return float("nan")
    return _mad_scale(r)


def _run(mini_problem: _Problem, params, loss: str, f_scale: float, max_nfev: int):
    """One lmfit least_squares run (used with constraint expressions, whose chain rule
    lmfit handles; the Jacobian is then numerical)."""
    import lmfit

    kws = dict(loss=loss, f_scale=f_scale, x_scale="jac", max_nfev=max_nfev)
    mini = lmfit.Minimizer(lambda p: mini_problem.residual(p), params, nan_policy="raise")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        return mini.minimize(method="least_squares", **kws)


def fit_curves(unit: CurveSet, model: str | TriodeModel = DEFAULT_MODEL, options: FitOptions | None = None,
               **kw) -> FitResult:
    """Fit ``model`` to one unit's curves.

    Parameters
    ----------
    unit : CurveSet
        The measured points (SI units).
    model : str or TriodeModel
        A registered model name (see :data:`fitter.models.MODELS`).
    options : FitOptions, optional
        Fixed parameters, constraints, weighting and robustness options; keyword
        arguments (``fix=``, ``expr=``, ``floor=``, ...) build one.

    Returns
    -------
    FitResult
        ``converged`` is False, with ``failure`` set, when no sane minimum was found.

    Raises
    ------
    FitInputError
        When the unit has too few points or curves for the model, or an option names
        an unknown parameter.
    """
    t0 = time.perf_counter()
    m = get_model(model) if isinstance(model, str) else model
    opts = options or FitOptions(**kw)
    for name in list(opts.fix) + list(opts.expr) + list(opts.bounds):
        try:
            m.spec(name)
        except ValueError as e:
            raise FitInputError(str(e), field="fix" if name in opts.fix else None) from None
    u = clean_curves(unit, m)
    # the data checks see the points as given (cleaning drops negative plate voltages,
    # which would hide "no plate voltage above 0 V") and as cleaned
    issue = check_data(unit) or check_for_model(u, m)
    if issue is not None:
        raise FitInputError(str(issue))

    with_grid = bool(m.grid_param_names) and u.ig is not None and np.any(u.ig != 0)
    if u.ig is not None and not with_grid and m.grid_param_names:
        u = u.with_notes("grid current column is all zero; grid-current parameters not fitted")
    elif u.ig is not None and not m.grid_param_names:
        u = u.with_notes(f"grid current in the data is not used by the {m.name} model")
    free = [p.name for p in m.params if (not p.grid or with_grid)
            and p.name not in opts.fix and p.name not in opts.expr]
    if not free:
        raise FitInputError("every parameter is fixed: nothing to fit", field="fix")
    prob = _Problem(m, u, opts.floor, with_grid)

    # the data-driven start from the readings that are not absurd (an overflow reading
    # would otherwise set the scale of the linearised guess)
    sane = np.abs(u.ia) <= prob.full_scale
    first = m.guess(u.va[sane], u.vg[sane], u.ia[sane]) if sane.sum() >= 4 else m.guess(u.va, u.vg, u.ia)
    if with_grid and m.grid_guess is not None:
        first.update(m.grid_guess(u.vg, u.ig))
    bounds = {sp.name: tuple(opts.bounds.get(sp.name, (sp.lower, sp.upper))) for sp in m.params}
    fixed = {sp.name: float(opts.fix.get(sp.name, sp.default if sp.default is not None else np.nan))
             for sp in m.params if sp.name not in free and sp.name not in opts.expr}
    # starting values of fixed parameters are the fixed values
    first = {**first, **fixed}

    def bound_hit(values):
        for k in free:
            lo, hi = bounds[k]
            span = hi - lo
            if lo != 0.0 and values[k] - lo <= 1e-6 * span:
                return f"parameter {k} ran to its lower bound {lo:g}: {_hint(m, k)}"
            if hi - values[k] <= 1e-6 * span:
                return f"parameter {k} ran to its upper bound {hi:g}: {_hint(m, k)}"
        return None

    if not opts.expr:
        search = _FastSearch(prob, m, free, fixed, bounds)

        def attempt(start):
            values, scale, ok, _ = search.robust(start, opts.robust)
            return values, scale, ok
    else:
        # constraint expressions: lmfit evaluates them, so the search runs through it
        loss = "soft_l1" if opts.robust else "linear"

        def attempt(start):
            params = _make_params(m, start, free, opts)
            r1 = _run(prob, params, loss, 0.05, 200 * (len(free) + 1))
            scale = None
            r = r1
            if opts.robust:
                scale = max(_robust_scale(r1.residual, prob.scale_points), 1e-5)
                r = _run(prob, r1.params, loss, 2.5 * scale, 200 * (len(free) + 1))
                scale = max(_robust_scale(r.residual, prob.scale_points), 1e-5)
            return prob.values(r.params), scale, bool(r.success)

    best = None
    best_start: dict = {}
    tried = 0
    candidates = [first]
    alt_added = False
    while candidates:
        start = candidates.pop(0)
        tried += 1
        try:
            values, scale, ok = attempt(start)
        except (ValueError, FloatingPointError, np.linalg.LinAlgError):
            continue
        r_try = prob.residual_values(values)
        if not np.all(np.isfinite(r_try)):
            continue
        if scale is None:
            scale = float(np.sqrt(np.mean(r_try**2)))
        ok = ok and bound_hit(values) is None
        if best is None or (ok and not best[2]) or (ok == best[2] and scale < best[1]):
            best = (values, scale, ok)
            best_start = start
        # alternative starts only when the first did not reach a sane minimum
        if not alt_added and (not ok or scale > 0.05) and m.alternative_starts is not None:
            alt_added = True
            candidates.extend({**d, **fixed} for d in m.alternative_starts(first))
    nfev = search.nfev if not opts.expr else 0
    elapsed = lambda: 1e3 * (time.perf_counter() - t0)  # noqa: E731
    if best is None:
        return FitResult(u, m, False, "optimiser raised an error at every start", starts_tried=tried,
                         elapsed_ms=elapsed())
    values, scale, ok = best
    # outliers on the robust solution
    r_all = prob.residual_values(values)[: u.n_points]
    if opts.robust:
        outliers = np.abs(r_all - _median(r_all)) > opts.outlier_sigma * _point_scales(r_all, prob, scale)
    else:
        outliers = np.zeros(u.n_points, dtype=bool)

    # the reported fit: plain least squares on the inliers from the robust solution,
    # giving the covariance, standard errors, correlations and AIC/BIC
    mask = ~outliers
    if with_grid:
        mask = np.concatenate([mask, np.ones(u.n_points, dtype=bool)])
    fin = None
    cov = None
    if opts.expr or opts.final == "lmfit":
        import lmfit

        prob.mask = mask
        try:
            params = _make_params(m, values, free, opts)
            kws = {} if opts.expr else {"Dfun": prob.jacobian}
            with warnings.catch_warnings():
                warnings.simplefilter("ignore", RuntimeWarning)
                fin = lmfit.Minimizer(prob.residual, params, nan_policy="raise").minimize(method="leastsq", **kws)
            nfev += fin.nfev
        except (ValueError, FloatingPointError, np.linalg.LinAlgError) as e:
            return FitResult(u, m, False, f"final least-squares step failed: {e}", nfev=nfev,
                             starts_tried=tried, elapsed_ms=elapsed())
        finally:
            prob.mask = None
        values = {k: float(fin.params[k].value) for k in fin.params}
        free_fitted = tuple(fin.var_names)
        success, message = bool(fin.success), str(fin.message)
        chisqr, nres = float(fin.chisqr), int(fin.ndata)
        if fin.covar is not None and np.all(np.isfinite(fin.covar)):
            cov = np.array(fin.covar)
    else:
        for _ in range(3):
            values, cov, chisqr, nres, success, message = search.polish(values, mask)
            if not opts.robust:
                break
            # the polish may move to a better minimum than the robust search found; the
            # outliers are then judged again at the new solution
            r_new = prob.residual_values(values)[: u.n_points]
            scale = max(_robust_scale(r_new, prob.scale_points[: u.n_points]), 1e-5)
            new_out = np.abs(r_new - _median(r_new)) > opts.outlier_sigma * _point_scales(r_new, prob, scale)
            if np.array_equal(new_out, outliers):
                break
            outliers = new_out
            mask = ~outliers
            if with_grid:
                mask = np.concatenate([mask, np.ones(u.n_points, dtype=bool)])
        nfev = search.nfev
        free_fitted = tuple(free)
    model_ia = m.current(u.va, u.vg, **values)
    resid = model_ia - u.ia
    inl = ~outliers
    rms = float(np.sqrt(np.mean(resid[inl] ** 2)))
    wres = resid[inl] * prob.w[inl]
    ss_tot = float(np.sum((u.ia[inl] - u.ia[inl].mean()) ** 2))
    r2 = 1.0 - float(np.sum(resid[inl] ** 2)) / ss_tot if ss_tot > 0 else float("nan")
    k = len(free_fitted)
    # lmfit's definitions (Minimizer.result.aic / .bic)
    n_ln = nres * np.log(max(chisqr, 1e-300) / nres)
    aic, bic = float(n_ln + 2 * k), float(n_ln + np.log(nres) * k)

    stderr: dict[str, float | None] = {name: None for name in m.param_names}
    corr: dict[str, dict[str, float]] = {}
    if cov is not None:
        d = np.sqrt(np.diag(cov))
        for i, name in enumerate(free_fitted):
            stderr[name] = float(d[i]) if np.isfinite(d[i]) else None
            corr[name] = {free_fitted[j]: float(cov[i, j] / (d[i] * d[j]))
                          for j in range(k) if j != i and d[i] > 0 and d[j] > 0}

    failure = None
    if not success:
        failure = f"optimiser did not converge: {message}"
    if failure is None:
        failure = bound_hit(values)
    if failure is None and not np.all(np.isfinite(model_ia)):
        failure = "model currents are not finite at the solution"
    if failure is None:
        big = inl & (u.ia > 0.05 * prob.full_scale)
        flat = big & (model_ia < 0.01 * u.ia)
        if big.any() and flat.sum() > 0.05 * big.sum():
            failure = (f"the model is flat at zero current at {int(flat.sum())} point(s) where the "
                       "data carry current (a spurious flat minimum): check that va and vg are the plate and "
                       "grid voltages in V, and the plate current's unit")
    robust_scatter = _robust_scale(wres, prob.scale_points[: u.n_points][inl])
    if failure is None and robust_scatter > MAX_ROBUST_SCATTER:
        failure = (f"residuals too large (robust scatter {100 * robust_scatter:.1f} % of the current): "
                   f"the {m.name} model does not describe these data; check that the file holds one tube "
                   "section, and the columns' units")
    if failure is None and outliers.mean() > MAX_OUTLIER_FRACTION:
        failure = (f"{int(outliers.sum())} of {u.n_points} points rejected as outliers: "
                   "too many for a trustworthy fit; check for a second tube or section mixed into the unit, "
                   "and for a column in the wrong unit")
    if failure is None and cov is not None and k > 1 and all(stderr[name] for name in free_fitted):
        # Numerically singular: the correlation matrix's condition number beyond 1e10
        # leaves fewer than 6 of double precision's 16 digits (LAPACK eps 2.2e-16) in
        # the covariance; converged fits of plate curves sit at 1e2..1e4.  The
        # eigenvector of the smallest eigenvalue names the parameters that trade off.
        d = np.sqrt(np.diag(cov))
        w, vecs = np.linalg.eigh(cov / np.outer(d, d))
        if w[0] < 1e-10 * w[-1]:
            v = np.abs(vecs[:, 0])
            which = [free_fitted[i] for i in np.argsort(-v) if v[i] > 0.3][:3]
            failure = ("the parameter covariance is singular: the data do not determine "
                       + " and ".join(which) + " separately; check that the data cover several plate voltages "
                       "on each of several grid curves, and that va and vg are the right columns")
    if failure is None and k and (cov is None or any(stderr[name] is None for name in free_fitted)):
        # A singular (or non-finite) covariance means some combination of the free
        # parameters is not determined by the data: a fit whose error bars are unknown
        # is not a good fit.
        unmoved = [name for name in free_fitted if stderr[name] is None and name in best_start
                   and _unmoved(values[name], best_start[name], bounds[name])]
        if unmoved:
            name = unmoved[0]
            failure = (f"parameter {name} did not move from its starting value {values[name]:.4g} and has no "
                       f"error bar: the data do not determine it; {_hint(m, name)}")
        else:
            which = [name for name in free_fitted if stderr[name] is None]
            failure = ("the parameter covariance is singular: the data do not determine "
                       + (", ".join(which) if which and cov is not None else "the parameters")
                       + " (too few distinct grid or plate voltages?); check that va and vg are the right columns")
    rel_rms = float(np.sqrt(np.mean(wres**2))) if wres.size else float("nan")
    if failure is None and rel_rms > LOOSE_FIT_REL_RMS:
        u = u.with_notes(f"loose fit: relative rms {100 * rel_rms:.1f} % is well above the ~1 % scatter of "
                         f"tracer data; the {m.name} model misses this tube's shape somewhere "
                         "(compare it with the other registered models)")

    return FitResult(
        unit=u, model=m, converged=failure is None, failure=failure,
        params=values, stderr=stderr, correlations=corr, free=free_fitted, covariance=cov,
        residuals=resid, outliers=outliers, rms_ma=1e3 * rms,
        max_abs_ma=1e3 * float(np.max(np.abs(resid[inl]))) if inl.any() else float("nan"),
        rel_rms=rel_rms,
        robust_scatter=robust_scatter, r2=r2, aic=aic, bic=bic,
        nfev=nfev, starts_tried=tried, message=message, elapsed_ms=elapsed(), optimizer=fin,
    )


def _unmoved(value: float, start: float, bounds) -> bool:
    """True when a parameter ended where it started (to 1e-6 of its range or value)."""
    lo, hi = bounds
    span = hi - lo if np.isfinite(hi - lo) else abs(start) + 1.0
    return abs(value - start) <= 1e-6 * max(min(span, abs(start) + 1e-12), 1e-300)


# ---------------------------------------------------------------------------
# Several models, several units
# ---------------------------------------------------------------------------


def rank_results(results: Iterable[FitResult]) -> list[FitResult]:
    """Converged fits first, by BIC (lower is better); failed fits last."""
    return sorted(results, key=lambda r: (not r.converged, r.bic if r.converged else 0.0))


def fit_all_models(unit: CurveSet, options: FitOptions | None = None, models=None) -> list[FitResult]:
    """Fit every registered model to ``unit``; ranked by BIC."""
    out = []
    for name in models or model_names():
        try:
            out.append(fit_curves(unit, name, options))
        except FitInputError as e:
            out.append(FitResult(clean_curves(unit), get_model(name), False, str(e)))
    return rank_results(out)


def options_for_model(options: FitOptions | None, model: TriodeModel) -> FitOptions | None:
    """Keep only the fixed values, constraints and bounds that ``model`` has a parameter for
    (so that ``--model all --fix n=1.5`` fixes n of the power law and leaves the others)."""
    if options is None:
        return None
    names = set(model.param_names)
    return replace(options, fix={k: v for k, v in options.fix.items() if k in names},
                   expr={k: v for k, v in options.expr.items() if k in names},
                   bounds={k: v for k, v in options.bounds.items() if k in names})


def _fit_job(args):
    unit, models, options = args
    res = []
    for name in models:
        try:
            r = fit_curves(unit, name, options_for_model(options, get_model(name)) if len(models) > 1 else options)
        except FitInputError as e:
            r = FitResult(unit, get_model(name), False, str(e))
        r.optimizer = None  # not picklable cheaply; not needed across processes
        _ = r.envelope  # computed (and cached) here, in the worker, rather than in the parent
        res.append(r)
    return rank_results(res) if len(models) > 1 else res


#: start method of the pools when other threads run ("forkserver", else "spawn" where there is
#: no forkserver): see :func:`pool_context`
THREADED_START = "forkserver"
#: modules the fork server imports once, so that each worker it forks starts with them
FORKSERVER_PRELOAD = ("fitter.fit",)


def pool_context(preload=()):
    """The :mod:`multiprocessing` context of a pool of fit workers.

    "fork" when this process runs one thread (the command line: a worker starts at once with
    the parent's modules and data).  When other threads run (a threaded web server such as
    waitress, a background job thread), forking is unsafe: the child gets a copy of every
    lock another thread held at that moment, and those threads do not exist in it to release
    them (logging, the allocator, SQLite or BLAS locks: a hang).  Then the workers come from a
    fork server (:data:`THREADED_START`), a single-threaded process started once that has
    imported :data:`FORKSERVER_PRELOAD` and ``preload`` and forks each worker from itself;
    "spawn" where there is none.  The cost is measured by ``bench/web.py --pool``.
    """
    import multiprocessing as mp
    import threading

    methods = mp.get_all_start_methods()
    if threading.active_count() <= 1 and "fork" in methods:
        return mp.get_context("fork")
    method = THREADED_START if THREADED_START in methods else "spawn"
    ctx = mp.get_context(method)
    if method == "forkserver":
        # taken only when the server starts (it runs for the life of this process)
        ctx.set_forkserver_preload(sorted(set(FORKSERVER_PRELOAD) | set(preload)))
    return ctx


def fit_many(units: list[CurveSet], models=(DEFAULT_MODEL,), options: FitOptions | None = None,
             processes: int | None = None, progress: Callable[[int], None] | None = None) -> list[list[FitResult]]:
    """Fit ``models`` to every unit, on all cores.

    Returns one list of results per unit (ranked by BIC when several models are
    fitted), in the order of ``units``.  ``progress(n)`` is called as units finish.  The
    workers are forked, or come from a fork server when other threads run
    (:func:`pool_context`).
    """
    models = tuple(models)
    jobs = [(u, models, options) for u in units]
    nproc = processes or os.cpu_count() or 1
    if nproc <= 1 or len(units) < 8:
        out = []
        for j in jobs:
            out.append(_fit_job(j))
            if progress:
                progress(1)
        return out
    ctx = pool_context()
    chunk = max(1, min(32, len(units) // (4 * nproc)))
    out = []
    with ctx.Pool(nproc) as pool:
        for r in pool.imap(_fit_job, jobs, chunksize=chunk):
            out.append(r)
            if progress:
                progress(1)
    return out
