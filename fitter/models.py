"""Published triode models and the one registry that lists them.

Every model is a pure, vectorised function of plate voltage and grid voltage that
returns plate current in amperes, together with its analytic partial derivatives
with respect to both voltages and with respect to its own parameters.  Nothing in
this module does I/O or keeps state.

The registry :data:`MODELS` maps a model name to a :class:`TriodeModel`.  The fitter,
the exporters, the CLI and the tests all loop over it; adding a model means adding
one entry at the bottom of this file.

Numerical guards (the reason for most of the ``np.where`` calls below):

* ``exp`` is only ever taken through :func:`softplus` / :func:`sigmoid`, which are
  written so that they cannot overflow for any finite argument;
* fractional powers are only ever taken of non-negative numbers (the bracket is
  clipped at zero first), so no NaN can appear for negative arguments;
* a power with exponent below one is never differentiated at zero (the lower
  bounds of the exponents are 1).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Callable, Mapping

import numpy as np

__all__ = [
    "ParamSpec",
    "TriodeModel",
    "MODELS",
    "DEFAULT_MODEL",
    "get_model",
    "model_names",
    "softplus",
    "sigmoid",
]


# ---------------------------------------------------------------------------
# Numerically safe helpers
# ---------------------------------------------------------------------------


def softplus(z):
    """ln(1 + exp(z)) without overflow for any finite z."""
    z = np.asarray(z, dtype=float)
    return np.logaddexp(0.0, z)


def sigmoid(z):
    """1 / (1 + exp(-z)) without overflow for any finite z (derivative of softplus).

    Written with numpy alone (the same as ``scipy.special.expit`` to rounding; a test checks
    it) so that loading the models does not load scipy.special, a third of a second at start-up.
    """
    z = np.asarray(z, dtype=float)
    e = np.exp(-np.abs(z))
    out = np.where(z >= 0.0, 1.0 / (1.0 + e), e / (1.0 + e))
    return out[()] if out.ndim == 0 else out


def _safe_pow(x, n):
    """x**n with x clipped at 0 first, so no fractional power of a negative number.

    Every exponent used here is >= 0 (the fitted exponents are bounded below by 1),
    for which 0**n is 0 (or 1 for n == 0), so no NaN can arise.
    """
    return np.power(np.maximum(x, 0.0), n)


def _median(x):
    """Median by partition: the same value as np.median, at a fraction of its overhead on
    the small arrays of one fit (it is called tens of times per fit)."""
    n = x.size
    k = n // 2
    if n % 2:
        return float(np.partition(x, k)[k])
    p = np.partition(x, (k - 1, k))
    return 0.5 * float(p[k - 1] + p[k])


def _safe_log(x):
    """ln(x) for x > 0; a large negative finite number at x <= 0, where it is only ever
    multiplied by a current that is exactly zero."""
    return np.log(np.maximum(x, 1e-300))


# ---------------------------------------------------------------------------
# Registry types
# ---------------------------------------------------------------------------


@dataclass(frozen=True)
class ParamSpec:
    """One model parameter: its published symbol, unit, fit bounds and meaning."""

    name: str
    unit: str
    lower: float
    upper: float
    description: str
    #: parameters of the optional grid-current part of a model are only fitted when
    #: the data carry grid current; otherwise they are held at ``default``.
    grid: bool = False
    default: float | None = None
    #: what to check when a fit drives this parameter to a bound (None: the fitter's
    #: general advice for plate or grid parameters)
    hint: str | None = None


#: Hints shared by the registry's parameters (common practice: mu is set by the grid voltages
#: against the plate voltages, so a wrong sign or scale of vg, or two sections' curves mixed
#: into one unit, drive it to a bound; the current-scale parameters by the current's unit;
#: the exponents and knee parameters by the shape of the curves).
HINT_MU = "check the grid voltages' sign and scale, and that the file holds one tube section"
HINT_SCALE = "check the plate current's unit (ia_ma, ia_a or ia_ua) and that the voltages are in V"
HINT_EXPONENT = "check that the currents rise with plate voltage as a triode's do, and the current's unit"
HINT_OFFSET = "check the grid voltages' sign and offset (a constant added to vg?)"


@dataclass(frozen=True)
class TriodeModel:
    """A registered triode model.

    Attributes
    ----------
    name : str
        Registry key, as used on the command line (``power``, ``koren`` ...).
    title : str
        Human-readable name.
    reference : str
        The published source of the equations.
    params : tuple of ParamSpec
        Parameters in the order of the published paper.
    current : callable
        ``current(va, vg, **params) -> ia`` [A].
    voltage_gradient : callable
        ``voltage_gradient(va, vg, **params) -> (dia/dva [S], dia/dvg [S])``.
    param_gradient : callable
        ``param_gradient(va, vg, **params) -> dict name -> dia/dparam``.
    guess : callable
        ``guess(va, vg, ia) -> dict`` data-driven starting values.
    grid_current : callable or None
        ``grid_current(vg, **params) -> ig`` [A] for models with a grid-current part.
    """

    name: str
    title: str
    reference: str
    params: tuple[ParamSpec, ...]
    current: Callable
    voltage_gradient: Callable
    param_gradient: Callable
    guess: Callable
    grid_current: Callable | None = None
    #: extra starting points tried by the fitter (functions of the first guess)
    alternative_starts: Callable | None = None
    #: optional speed-up for fitting: ``evaluate(va, vg, **p) -> (ia, ctx)`` and
    #: ``param_gradient_from(ctx, **p) -> dict``, sharing intermediate terms between the
    #: residual and the Jacobian at the same parameters
    evaluate: Callable | None = None
    param_gradient_from: Callable | None = None
    #: optional ``current_and_gradient(va, vg, **p) -> (ia, dia/dva, dia/dvg)`` for the
    #: stage solvers, which need all three at every Newton step
    current_and_gradient: Callable | None = None
    #: ``grid_guess(vg, ig) -> dict`` starting values of the grid-current parameters from the
    #: positive-grid readings (models with a grid-current part)
    grid_guess: Callable | None = None
    #: grid parameters that, all zero, switch the grid-current part off (a card fitted
    #: without grid-current data carries them at zero)
    grid_switches: tuple[str, ...] = ()

    def carries_grid_current(self, params: Mapping) -> bool:
        """Whether a unit with ``params`` draws grid current in this model (a grid-current
        part that is not switched off; parameters may be arrays, one value per unit)."""
        if self.grid_current is None:
            return False
        return bool(any(np.any(np.asarray(params.get(n, 0.0)) != 0) for n in self.grid_switches))

    def current_with_gradient(self, va, vg, **p):
        """(Ia, dIa/dva, dIa/dvg), in one pass where the model offers it."""
        if self.current_and_gradient is not None:
            return self.current_and_gradient(va, vg, **p)
        dva, dvg = self.voltage_gradient(va, vg, **p)
        return self.current(va, vg, **p), dva, dvg

    @property
    def param_names(self) -> tuple[str, ...]:
        return tuple(p.name for p in self.params)

    @property
    def plate_param_names(self) -> tuple[str, ...]:
        return tuple(p.name for p in self.params if not p.grid)

    @property
    def grid_param_names(self) -> tuple[str, ...]:
        return tuple(p.name for p in self.params if p.grid)

    def spec(self, name: str) -> ParamSpec:
        for p in self.params:
            if p.name == name:
                return p
        raise ValueError(
            f"model {self.name!r} has no parameter {name!r}; "
            f"its parameters are {', '.join(self.param_names)}"
        )

    def full_params(self, params: Mapping[str, float]) -> dict[str, float]:
        """Complete a parameter mapping with the defaults of unfitted grid parameters."""
        out = {}
        for p in self.params:
            if p.name in params and params[p.name] is not None:
                out[p.name] = float(params[p.name])
            elif p.default is not None:
                out[p.name] = float(p.default)
            else:
                raise ValueError(f"model {self.name!r} needs parameter {p.name!r}")
        return out

    @property
    def n_plate_params(self) -> int:
        return len(self.plate_param_names)


# ---------------------------------------------------------------------------
# Shared data-driven guess: the Child-Langmuir form, linearised
# ---------------------------------------------------------------------------


def _linearised_power_guess(va, vg, ia):
    """Starting values for the 3/2-power family from the measured points.

    For Ia = K (vg + va/mu + vc)^n the n-th root of the current is linear in va and
    vg: Ia^(1/n) = a*va + b*vg + c with b = K^(1/n), mu = b/a and vc = c/b.  A few
    exponents are tried and the best linear fit (in the upper part of each curve,
    where the law holds best) is kept.  Closed form, no iteration.
    """
    va = np.asarray(va, float)
    vg = np.asarray(vg, float)
    ia = np.asarray(ia, float)
    imax = float(np.max(ia)) if ia.size else 0.0
    if imax <= 0:
        return dict(K=1e-3, mu=20.0, n=1.5, vc=0.0)
    sel = ia > 0.05 * imax
    if sel.sum() < 4:
        sel = ia > 0
    A = np.column_stack([va[sel], vg[sel], np.ones(sel.sum())])

    def solve(n, w):
        # weighted normal equations of the 3-column problem: a 3x3 solve, much cheaper
        # than an SVD-based lstsq and as accurate at this size
        y = ia[sel] ** (1.0 / n)
        Aw = A * (w * w)[:, None]
        try:
            coef = np.linalg.solve(A.T @ Aw, Aw.T @ y)
        except np.linalg.LinAlgError:
            coef, *_ = np.linalg.lstsq(A * w[:, None], y * w, rcond=None)
        rel = (A @ coef - y) / np.maximum(y, 1e-12)
        return coef, rel, y

    best = None
    for n in (1.2, 1.35, 1.5, 1.65, 1.8, 2.0):
        y = ia[sel] ** (1.0 / n)
        coef, rel, _ = solve(n, 1.0 / np.maximum(y, 1e-12))
        # scored by the median squared relative residual, which a few bad points
        # (a digitising slip, a tracer glitch) cannot spoil
        score = _median(rel**2)
        if coef[0] > 0 and coef[1] > 0 and (best is None or score < best[0]):
            best = (score, n)
    if best is not None:
        n = best[1]
        y = ia[sel] ** (1.0 / n)
        w = 1.0 / np.maximum(y, 1e-12)
        for _ in range(3):
            # Huber-type reweighting so that bad points do not pull the start
            coef, rel, _ = solve(n, w)
            s = 1.4826 * _median(np.abs(rel)) + 1e-9
            w = np.minimum(1.0, 2.0 * s / np.maximum(np.abs(rel), 1e-12)) / np.maximum(y, 1e-12)
        a, b, c = coef
        best = (0.0, n, a, b, c) if (a > 0 and b > 0) else None
    if best is None:
        # fall back on a textbook-ish triode
        return dict(K=imax / max(np.max(va) / 20.0, 1.0) ** 1.5, mu=20.0, n=1.5, vc=0.0)
    _, n, a, b, c = best
    mu = float(np.clip(b / a, 1.0, 400.0))
    K = float(b**n)
    vc = float(np.clip(c / b, -5.0, 5.0))
    return dict(K=K, mu=mu, n=float(n), vc=vc)


# ---------------------------------------------------------------------------
# power: Child-Langmuir law in general form
# ---------------------------------------------------------------------------


def power_current(va, vg, K, mu, n, vc):
    """Plate current of the general Child-Langmuir (3/2-power) law.

    Ia = K (vg + va/mu + vc)^n where the bracket is positive, else 0.

    Parameters
    ----------
    va : array_like
        Plate-to-cathode voltage [V].
    vg : array_like
        Grid-to-cathode voltage [V].
    K : float
        Perveance [A/V^n].
    mu : float
        Amplification factor [-].
    n : float
        Exponent [-]; 3/2 for the ideal law.
    vc : float
        Contact potential [V].

    Returns
    -------
    ndarray
        Plate current [A].

    References
    ----------
    C. D. Child, "Discharge from hot CaO", Physical Review (Series I) 32, 492 (1911).
    I. Langmuir, "The effect of space charge and residual gases on thermionic
    currents in high vacuum", Physical Review 2, 450 (1913).
    """
    x = np.asarray(vg, float) + np.asarray(va, float) / mu + vc
    return K * _safe_pow(x, n)


def power_voltage_gradient(va, vg, K, mu, n, vc):
    x = np.asarray(vg, float) + np.asarray(va, float) / mu + vc
    d = K * n * _safe_pow(x, n - 1.0)
    d = np.where(x > 0, d, 0.0)
    return d / mu, d


def power_param_gradient(va, vg, K, mu, n, vc):
    va = np.asarray(va, float)
    x = np.asarray(vg, float) + va / mu + vc
    xn = _safe_pow(x, n)
    dx = np.where(x > 0, K * n * _safe_pow(x, n - 1.0), 0.0)
    return {
        "K": xn,
        "mu": dx * (-va / mu**2),
        "n": K * xn * _safe_log(x),
        "vc": dx,
    }


def power_guess(va, vg, ia):
    return _linearised_power_guess(va, vg, ia)


POWER = TriodeModel(
    name="power",
    title="Child-Langmuir power law",
    reference=(
        "C. D. Child, Phys. Rev. (Series I) 32, 492 (1911); "
        "I. Langmuir, Phys. Rev. 2, 450 (1913)"
    ),
    params=(
        ParamSpec("K", "A/V^n", 1e-9, 1.0, "perveance", hint=HINT_SCALE),
        ParamSpec("mu", "-", 0.5, 500.0, "amplification factor", hint=HINT_MU),
        ParamSpec("n", "-", 1.0, 3.0, "exponent (3/2 for the ideal law)", hint=HINT_EXPONENT),
        ParamSpec("vc", "V", -10.0, 10.0, "contact potential", hint=HINT_OFFSET),
    ),
    current=power_current,
    voltage_gradient=power_voltage_gradient,
    param_gradient=power_param_gradient,
    guess=power_guess,
)


# ---------------------------------------------------------------------------
# koren: N. Koren, improved triode model
# ---------------------------------------------------------------------------


def _koren_parts(va, vg, mu, kp, kvb):
    va = np.asarray(va, float)
    vg = np.asarray(vg, float)
    # floored so that kvb = 0 (its lower bound) at va = 0 gives E1 = 0, not 0/0
    s = np.sqrt(np.maximum(kvb + va * va, 1e-24))
    z = kp * (1.0 / mu + vg / s)
    L = softplus(z)
    e1 = va * L / kp
    return va, vg, s, z, L, e1


def koren_current(va, vg, mu, ex, kg1, kp, kvb):
    """Plate current of Koren's triode model.

    E1 = (va/kp) ln(1 + exp(kp (1/mu + vg / sqrt(kvb + va^2))))
    Ia = 2 E1^ex / kg1 for E1 > 0, else 0.

    Parameters
    ----------
    va : array_like
        Plate-to-cathode voltage [V].
    vg : array_like
        Grid-to-cathode voltage [V].
    mu : float
        Amplification factor [-].
    ex : float
        Exponent [-].
    kg1 : float
        Inverse perveance-like scale [V^ex/A].
    kp : float
        Shape parameter of the cutoff region [-].
    kvb : float
        Low-plate-voltage knee [V^2].

    Returns
    -------
    ndarray
        Plate current [A].

    References
    ----------
    N. Koren, "Improved vacuum tube models for SPICE simulations", Glass Audio
    vol. 8 no. 5 (1996), revised 2003.
    """
    *_, e1 = _koren_parts(va, vg, mu, kp, kvb)
    return 2.0 * _safe_pow(e1, ex) / kg1


def koren_voltage_gradient(va, vg, mu, ex, kg1, kp, kvb):
    va, vg, s, z, L, e1 = _koren_parts(va, vg, mu, kp, kvb)
    sg = sigmoid(z)
    dia_de1 = np.where(e1 > 0, 2.0 * ex * _safe_pow(e1, ex - 1.0) / kg1, 0.0)
    de1_dvg = va * sg / s
    de1_dva = L / kp - sg * vg * va * va / s**3
    return dia_de1 * de1_dva, dia_de1 * de1_dvg


def koren_current_and_gradient(va, vg, mu, ex, kg1, kp, kvb):
    """(Ia [A], dIa/dva [S], dIa/dvg [S]) with the shared terms computed once.

    The stage solvers call this on every step, so it is written out: one exponential serves
    both the softplus and its derivative (the sigmoid), and E1^ex is exp(ex ln E1); the same
    values as :func:`koren_current` and :func:`koren_voltage_gradient` to rounding (a test
    compares them)."""
    va = np.asarray(va, float)
    vg = np.asarray(vg, float)
    s = np.sqrt(np.maximum(kvb + va * va, 1e-24))
    z = kp * (1.0 / mu + vg / s)
    e = np.exp(-np.abs(z))
    L = np.maximum(z, 0.0) + np.log1p(e)  # ln(1 + exp(z))
    sg = np.where(z >= 0.0, 1.0, e) / (1.0 + e)  # 1 / (1 + exp(-z))
    e1 = va * L / kp
    pos = e1 > 0
    e1_ = np.where(pos, e1, 1.0)
    ia = np.where(pos, (2.0 / kg1) * np.exp(ex * np.log(e1_)), 0.0)
    dia_de1 = np.where(pos, ex * ia / e1_, 0.0)
    return ia, dia_de1 * (L / kp - sg * vg * va * va / (s * s * s)), dia_de1 * (va * sg / s)


def koren_evaluate(va, vg, mu, ex, kg1, kp, kvb):
    """Plate current [A] and the intermediate terms the parameter gradient reuses."""
    parts = _koren_parts(va, vg, mu, kp, kvb)
    e1x = _safe_pow(parts[-1], ex)
    return 2.0 * e1x / kg1, (parts, e1x)


def koren_param_gradient_from(ctx, mu, ex, kg1, kp, kvb):
    """dIa/dparam from the terms of :func:`koren_evaluate` at the same parameters."""
    (va, vg, s, z, L, e1), e1x = ctx
    sg = sigmoid(z)
    ia = 2.0 * e1x / kg1
    # E1^(ex-1) = E1^ex / E1 where E1 > 0; the derivative is 0 where E1 = 0 (ex >= 1)
    dia_de1 = np.where(e1 > 0, ex * ia / np.where(e1 > 0, e1, 1.0), 0.0)
    # dE1/dmu = (va/kp) sg * kp * (-1/mu^2)
    de1_dmu = -va * sg / mu**2
    # dE1/dkp = -va L/kp^2 + (va/kp) sg (1/mu + vg/s)
    de1_dkp = -va * L / kp**2 + va * sg * (1.0 / mu + vg / s) / kp
    # dE1/dkvb = (va/kp) sg kp vg * (-1/2) s^-3
    de1_dkvb = -0.5 * va * sg * vg / s**3
    return {
        "mu": dia_de1 * de1_dmu,
        "ex": ia * _safe_log(e1),
        "kg1": -ia / kg1,
        "kp": dia_de1 * de1_dkp,
        "kvb": dia_de1 * de1_dkvb,
    }


def koren_param_gradient(va, vg, mu, ex, kg1, kp, kvb):
    _, ctx = koren_evaluate(va, vg, mu, ex, kg1, kp, kvb)
    return koren_param_gradient_from(ctx, mu, ex, kg1, kp, kvb)


def koren_guess(va, vg, ia):
    g = _linearised_power_guess(va, vg, ia)
    # For large kp, E1 -> va/mu + vg va/s ~ va/mu + vg, so Ia -> (2/kg1) (vg + va/mu)^ex
    # and kg1 ~ 2/K.  A positive contact potential of the power law corresponds to the
    # softplus tail; at the cutoff bracket E1 = va ln2 / kp, so kp ~ ln2 * va / vc.
    va_typ = float(np.median(np.asarray(va, float)))
    vc = g["vc"]
    kp = float(np.clip(np.log(2.0) * va_typ / vc, 20.0, 1500.0)) if vc > 0.05 else 600.0
    ex = float(np.clip(g["n"], 1.05, 2.4))
    return dict(mu=g["mu"], ex=ex, kg1=float(np.clip(2.0 / g["K"], 1.0, 1e6)), kp=kp, kvb=300.0)


def koren_alternative_starts(first):
    out = []
    for kp in (40.0, 150.0, 600.0):
        if abs(np.log(kp / first["kp"])) > 0.5:
            d = dict(first)
            d["kp"] = kp
            out.append(d)
    return out


KOREN = TriodeModel(
    name="koren",
    title="Koren triode model",
    reference=(
        'N. Koren, "Improved vacuum tube models for SPICE simulations", '
        "Glass Audio 8(5), 1996; revised 2003"
    ),
    params=(
        ParamSpec("mu", "-", 0.5, 500.0, "amplification factor", hint=HINT_MU),
        ParamSpec("ex", "-", 1.0, 2.5, "exponent", hint=HINT_EXPONENT),
        ParamSpec("kg1", "V^ex/A", 1.0, 1e6, "inverse perveance scale", hint=HINT_SCALE),
        ParamSpec("kp", "-", 1.0, 5000.0, "cutoff-region shape"),
        ParamSpec("kvb", "V^2", 0.0, 1e5, "low-plate-voltage knee"),
    ),
    current=koren_current,
    voltage_gradient=koren_voltage_gradient,
    param_gradient=koren_param_gradient,
    guess=koren_guess,
    alternative_starts=koren_alternative_starts,
    evaluate=koren_evaluate,
    param_gradient_from=koren_param_gradient_from,
    current_and_gradient=koren_current_and_gradient,
)


# ---------------------------------------------------------------------------
# dempwolf: Dempwolf and Zoelzer, physically motivated triode model
# ---------------------------------------------------------------------------


def dempwolf_cathode_current(va, vg, G, mu, gamma, C):
    """Cathode current Ik = G (ln(1 + exp(C (va/mu + vg))) / C)^gamma [A]."""
    x = np.asarray(vg, float) + np.asarray(va, float) / mu
    return G * _safe_pow(softplus(C * x) / C, gamma)


def dempwolf_grid_current(vg, Gg, xi, Cg, Ig0):
    """Grid current Ig = Gg (ln(1 + exp(Cg vg)) / Cg)^xi + Ig0 [A]."""
    vg = np.asarray(vg, float)
    return Gg * _safe_pow(softplus(Cg * vg) / Cg, xi) + Ig0


def dempwolf_grid_current_of_params(vg, Gg=0.0, xi=1.5, Cg=10.0, Ig0=0.0, **_):
    """Grid current [A] from a full parameter set (the plate parameters are ignored).

    A module-level function, not a lambda, so that models pickle into worker processes.
    """
    return dempwolf_grid_current(vg, Gg, xi, Cg, Ig0)


def dempwolf_grid_guess(vg, ig) -> dict:
    """Starting values of the Dempwolf grid-current part from the positive-grid readings
    ``vg`` [V], ``ig`` [A]: ig ~ Gg vg^xi is a straight line in log-log."""
    vg = np.asarray(vg, float)
    ig = np.asarray(ig, float)
    pos = (vg > 0) & (ig > 0)
    if pos.sum() >= 2:
        x, y = vg[pos], ig[pos]
        A = np.column_stack([np.log(x), np.ones(x.size)])
        (xi, lg), *_ = np.linalg.lstsq(A, np.log(y), rcond=None)
        return dict(Gg=float(np.clip(np.exp(lg), 1e-8, 0.5)), xi=float(np.clip(xi, 1.05, 2.9)), Cg=10.0, Ig0=0.0)
    return dict(Gg=1e-4, xi=1.5, Cg=10.0, Ig0=0.0)


def dempwolf_current(va, vg, G, mu, gamma, C, Gg=0.0, xi=1.5, Cg=10.0, Ig0=0.0):
    """Plate current of the Dempwolf-Zoelzer triode model.

    Ik = G (ln(1 + exp(C (va/mu + vg))) / C)^gamma       (cathode current)
    Ig = Gg (ln(1 + exp(Cg vg)) / Cg)^xi + Ig0             (grid current)
    Ia = Ik - Ig

    With the grid-current parameters at their defaults (Gg = 0, Ig0 = 0) the plate
    current equals the cathode current; that is the form fitted to data without
    grid current.

    Parameters
    ----------
    va, vg : array_like
        Plate-to-cathode and grid-to-cathode voltage [V].
    G : float
        Perveance [A/V^gamma].
    mu : float
        Amplification factor [-].
    gamma : float
        Exponent [-].
    C : float
        Smoothness of the cutoff transition [1/V].
    Gg, xi, Cg, Ig0 : float
        Grid-current perveance [A/V^xi], exponent [-], smoothness [1/V] and
        offset [A].

    Returns
    -------
    ndarray
        Plate current [A].

    References
    ----------
    K. Dempwolf and U. Zoelzer, "A physically-motivated triode model for circuit
    simulations", Proc. 14th Int. Conference on Digital Audio Effects (DAFx-11),
    Paris, 2011.
    """
    ik = dempwolf_cathode_current(va, vg, G, mu, gamma, C)
    if Gg == 0.0 and Ig0 == 0.0:
        return ik
    return ik - dempwolf_grid_current(vg, Gg, xi, Cg, Ig0)


def _dempwolf_parts(va, vg, G, mu, C):
    va = np.asarray(va, float)
    vg = np.asarray(vg, float)
    x = vg + va / mu
    L = softplus(C * x)
    u = L / C
    return va, vg, x, L, u


def dempwolf_voltage_gradient(va, vg, G, mu, gamma, C, Gg=0.0, xi=1.5, Cg=10.0, Ig0=0.0):
    va, vg, x, L, u = _dempwolf_parts(va, vg, G, mu, C)
    dik_du = G * gamma * _safe_pow(u, gamma - 1.0)
    du_dx = sigmoid(C * x)
    d = dik_du * du_dx
    dva, dvg = d / mu, d
    if Gg != 0.0:
        ug = softplus(Cg * vg) / Cg
        dig = Gg * xi * _safe_pow(ug, xi - 1.0) * sigmoid(Cg * vg)
        dvg = dvg - dig
    return dva, dvg


def dempwolf_param_gradient(va, vg, G, mu, gamma, C, Gg=0.0, xi=1.5, Cg=10.0, Ig0=0.0):
    va, vg, x, L, u = _dempwolf_parts(va, vg, G, mu, C)
    ug_gamma = _safe_pow(u, gamma)
    ik = G * ug_gamma
    dik_du = G * gamma * _safe_pow(u, gamma - 1.0)
    sg = sigmoid(C * x)
    # du/dC = (x sg)/C - L/C^2
    du_dC = x * sg / C - L / C**2
    vgz = np.asarray(vg, float)
    ugr = softplus(Cg * vgz) / Cg
    ugr_xi = _safe_pow(ugr, xi)
    dug_dCg = vgz * sigmoid(Cg * vgz) / Cg - softplus(Cg * vgz) / Cg**2
    return {
        "G": ug_gamma,
        "mu": dik_du * sg * (-va / mu**2),
        "gamma": ik * _safe_log(u),
        "C": dik_du * du_dC,
        "Gg": -ugr_xi,
        "xi": -Gg * ugr_xi * _safe_log(ugr),
        "Cg": -Gg * xi * _safe_pow(ugr, xi - 1.0) * dug_dCg,
        "Ig0": -np.ones_like(vgz * 1.0 + np.asarray(va, float) * 0.0),
    }


def dempwolf_guess(va, vg, ia):
    g = _linearised_power_guess(va, vg, ia)
    gamma = float(np.clip(g["n"], 1.05, 2.4))
    # the softplus of C*x gives an effective contact potential of about ln2/C
    C = float(np.clip(np.log(2.0) / g["vc"], 1.0, 20.0)) if g["vc"] > 0.03 else 8.0
    return dict(G=g["K"], mu=g["mu"], gamma=gamma, C=C)


def dempwolf_alternative_starts(first):
    out = []
    for C in (2.0, 5.0, 12.0):
        if abs(np.log(C / first["C"])) > 0.4:
            d = dict(first)
            d["C"] = C
            out.append(d)
    return out


DEMPWOLF = TriodeModel(
    name="dempwolf",
    title="Dempwolf-Zoelzer triode model",
    reference=(
        'K. Dempwolf and U. Zoelzer, "A physically-motivated triode model for '
        'circuit simulations", DAFx-11, Paris, 2011'
    ),
    params=(
        ParamSpec("G", "A/V^gamma", 1e-9, 1.0, "perveance", hint=HINT_SCALE),
        ParamSpec("mu", "-", 0.5, 500.0, "amplification factor", hint=HINT_MU),
        ParamSpec("gamma", "-", 1.0, 2.5, "exponent", hint=HINT_EXPONENT),
        ParamSpec("C", "1/V", 0.05, 50.0, "cutoff smoothness"),
        ParamSpec("Gg", "A/V^xi", 0.0, 1.0, "grid-current perveance", grid=True, default=0.0),
        ParamSpec("xi", "-", 1.0, 3.0, "grid-current exponent", grid=True, default=1.5),
        ParamSpec("Cg", "1/V", 0.5, 50.0, "grid-current smoothness", grid=True, default=10.0),
        ParamSpec("Ig0", "A", -1e-3, 1e-3, "grid-current offset", grid=True, default=0.0),
    ),
    current=dempwolf_current,
    voltage_gradient=dempwolf_voltage_gradient,
    param_gradient=dempwolf_param_gradient,
    guess=dempwolf_guess,
    grid_current=dempwolf_grid_current_of_params,
    alternative_starts=dempwolf_alternative_starts,
    grid_guess=dempwolf_grid_guess,
    grid_switches=("Gg", "Ig0"),
)


#: The registry: model name -> model.  Loop over this; never list models by hand.
MODELS: dict[str, TriodeModel] = {m.name: m for m in (POWER, KOREN, DEMPWOLF)}

#: The model fitted when none is named (the command line's and the fitter's default).
DEFAULT_MODEL = "koren"


def model_names() -> tuple[str, ...]:
    return tuple(MODELS)


def get_model(name: str) -> TriodeModel:
    """Return the registered model called ``name`` (case-insensitive).

    Raises
    ------
    ValueError
        If no model has that name; the message lists the valid names.
    """
    key = str(name).strip().lower()
    if key not in MODELS:
        raise ValueError(f"unknown model {name!r}; valid models are {', '.join(MODELS)}")
    return MODELS[key]
