"""Model registry: published equations, analytic derivatives, numerical safety.

Every check loops over :data:`fitter.models.MODELS`, so a model added to the registry
is checked without touching this file (apart from giving it a typical parameter set
in TYPICAL, which a test insists on).
"""

from __future__ import annotations

import itertools
import math

import numpy as np
import pytest

from fitter.models import MODELS, get_model

# Typical parameter sets, one per registered model.
#   koren: 12AX7 set, from memory of Koren's published table (Glass Audio 8(5), 1996,
#          rev. 2003);
#   dempwolf: ECC83 set incl. grid current, from memory of Dempwolf & Zoelzer, DAFx-11;
#   power: invented values of 12AX7 size.
TYPICAL = {
    "power": dict(K=1.73e-6, mu=97.0, n=1.46, vc=0.62),
    "koren": dict(mu=100.0, ex=1.4, kg1=1060.0, kp=600.0, kvb=300.0),
    "dempwolf": dict(G=2.242e-3, mu=103.2, gamma=1.26, C=3.40,
                     Gg=6.177e-4, xi=1.314, Cg=9.901, Ig0=8.025e-8),
}

# The domain of the brief: plate voltage 0..1000 V, grid voltage -200..+5 V.
WIDE_VA = np.linspace(0.0, 1000.0, 51)
WIDE_VG = np.linspace(-200.0, 5.0, 42)
WIDE = tuple(a.ravel() for a in np.meshgrid(WIDE_VA, WIDE_VG))


def random_params(model, rng):
    """Parameters drawn inside the registry bounds (log-uniform where the span is wide)."""
    out = {}
    for p in model.params:
        lo, hi = p.lower, p.upper
        if lo > 0 and hi / lo > 20:
            out[p.name] = float(np.exp(rng.uniform(np.log(lo), np.log(hi))))
        else:
            out[p.name] = float(rng.uniform(lo, hi))
    return out


def param_sets(name, n_random=4, seed=11):
    rng = np.random.default_rng(seed)
    m = MODELS[name]
    return [TYPICAL[name]] + [random_params(m, rng) for _ in range(n_random)]


def central(f, x, h):
    return (f(x + h) - f(x - h)) / (2.0 * h)


def check_close(analytic, numeric_h, numeric_h2, f0, h, what):
    """analytic vs central differences.

    The numerical reference is good to about eps |f| / h (round-off of the current
    itself, which matters where a large grid current dominates the plate current) plus
    its truncation error; points where the two step sizes disagree beyond that are at a
    kink of the model (the power law's bracket = 0) and are left out, but only a few
    may be.
    """
    analytic = np.broadcast_to(np.asarray(analytic, float), numeric_h.shape)
    scale = max(float(np.max(np.abs(numeric_h))), 1e-30)
    roundoff = 100 * np.finfo(float).eps * np.abs(f0) / h
    slack = 1e-8 * scale + roundoff
    smooth = np.abs(numeric_h - numeric_h2) <= 1e-6 * np.abs(numeric_h) + slack
    assert smooth.mean() > 0.97, f"{what}: central differences unstable at {np.sum(~smooth)} points"
    err = np.abs(analytic - numeric_h)[smooth]
    tol = (1e-5 * np.abs(numeric_h) + slack)[smooth]
    worst = int(np.argmax(err - tol))
    assert np.all(err <= tol), f"{what}: analytic {analytic[smooth][worst]:.6g} vs numeric {numeric_h[smooth][worst]:.6g}"


# derivative grid: inside the domain, away from va = 0 where a one-sided limit applies
DVA, DVG = (a.ravel() for a in np.meshgrid(np.linspace(5.0, 1000.0, 24), np.linspace(-60.0, 5.0, 27)))


def test_typical_sets_cover_the_registry():
    # a model added to the registry must get a typical set here, so the checks below run on it
    assert set(TYPICAL) == set(MODELS)
    for name, m in MODELS.items():
        assert set(TYPICAL[name]) == set(m.param_names), name


def test_unknown_model_is_refused_with_the_valid_names():
    # STYLE.md: an unknown name raises ValueError listing the valid names
    with pytest.raises(ValueError, match=r"unknown model 'triode9'.*koren"):
        get_model("triode9")
    assert get_model("KOREN") is MODELS["koren"]


@pytest.mark.parametrize("name", list(MODELS))
def test_models_cite_their_published_reference(name):
    # issue section 2: each model has its published reference in its docstring
    m = MODELS[name]
    assert m.reference.strip()
    assert "References" in (m.current.__doc__ or ""), f"{name}: no References section"


@pytest.mark.parametrize("name", list(MODELS))
def test_voltage_gradient_matches_central_differences(name):
    # independent reference: central finite differences of the model's own current
    m = MODELS[name]
    for p in param_sets(name):
        dva, dvg = m.voltage_gradient(DVA, DVG, **p)
        for which, analytic in (("va", dva), ("vg", dvg)):
            def f(x, which=which):
                return m.current(x, DVG, **p) if which == "va" else m.current(DVA, x, **p)
            x0 = DVA if which == "va" else DVG
            h = 1e-4 * np.maximum(1.0, np.abs(x0)) if which == "va" else 1e-4
            check_close(analytic, central(f, x0, h), central(f, x0, h / 2), f(x0), h / 2,
                        f"{name} d/d{which} at {p}")


@pytest.mark.parametrize("name", list(MODELS))
def test_param_gradient_matches_central_differences(name):
    # independent reference: central finite differences in each parameter
    m = MODELS[name]
    for p in param_sets(name):
        grads = m.param_gradient(DVA, DVG, **p)
        assert set(grads) == set(m.param_names), name
        for k in m.param_names:
            def f(x, k=k):
                return m.current(DVA, DVG, **{**p, k: x})
            h = 1e-5 * max(abs(p[k]), 1e-3)
            check_close(grads[k], central(f, p[k], h), central(f, p[k], h / 2), f(p[k]), h / 2,
                        f"{name} d/d{k} at {p}")


def corner_sets(model):
    """Every combination of the parameters' bounds (the extreme parameter sets)."""
    names = model.param_names
    for corner in itertools.product(*[(p.lower, p.upper) for p in model.params]):
        yield dict(zip(names, corner))


@pytest.mark.parametrize("name", list(MODELS))
def test_no_nan_or_overflow_on_the_whole_domain(name):
    # issue section 2: "no overflow or NaN anywhere in its domain" -- va in [0, 1000] V,
    # vg in [-200, +5] V, at typical, random and extreme (bound-corner) parameters.
    m = MODELS[name]
    sets = param_sets(name, n_random=6) + list(corner_sets(m))
    for p in sets:
        va, vg = WIDE
        with np.errstate(over="raise", invalid="raise", divide="raise"):
            ia = m.current(va, vg, **p)
            dva, dvg = m.voltage_gradient(va, vg, **p)
            pg = m.param_gradient(va, vg, **p)
        assert np.all(np.isfinite(ia)), f"{name}: non-finite current at {p}"
        assert np.all(np.isfinite(dva)) and np.all(np.isfinite(dvg)), f"{name}: non-finite gradient at {p}"
        for k, g in pg.items():
            assert np.all(np.isfinite(g)), f"{name}: non-finite d/d{k} at {p}"
        if not m.grid_param_names or p.get("Gg", 0.0) == 0.0 and p.get("Ig0", 0.0) == 0.0:
            # a plate (= cathode) current without a grid-current part is never negative
            assert np.all(ia >= 0.0), f"{name}: negative current at {p}"


def test_power_law_gives_zero_not_nan_where_the_bracket_is_negative():
    # issue section 2 (Child-Langmuir in general form): Ia = K (vg + va/mu + vc)^n where
    # the bracket is positive, else 0 -- a fractional power of a negative number is 0 here
    m = MODELS["power"]
    p = dict(K=2e-5, mu=20.0, n=1.5, vc=0.25)
    va = np.array([10.0, 100.0, 0.0, 400.0])
    vg = np.array([-50.0, -5.25, -0.25, -200.0])  # brackets -49.25, 0 (exactly), 0, -179.75
    with np.errstate(invalid="raise"):
        ia = m.current(va, vg, **p)
        dva, dvg = m.voltage_gradient(va, vg, **p)
        pg = m.param_gradient(va, vg, **p)
    assert np.array_equal(ia, np.zeros(4))
    assert np.array_equal(dva, np.zeros(4)) and np.array_equal(dvg, np.zeros(4))
    for k, g in pg.items():
        assert np.all(np.isfinite(g)) and np.all(g == 0.0), k


def test_koren_gives_zero_not_nan_where_e1_is_not_positive():
    # Koren (1996): Ia = 2 E1^ex / kg1 for E1 > 0, else 0.  E1 < 0 only for va < 0
    # (outside the domain, but it must still not give NaN), E1 = 0 at va = 0.
    m = MODELS["koren"]
    p = TYPICAL["koren"]
    va = np.array([-10.0, -1.0, 0.0, 0.0])
    vg = np.array([0.0, -2.0, 0.0, -3.0])
    with np.errstate(invalid="raise"):
        ia = m.current(va, vg, **p)
    assert np.array_equal(ia, np.zeros(4))


def test_koren_with_kvb_at_its_lower_bound_is_finite_at_zero_plate_voltage():
    # kvb's registry lower bound is 0, and at va = 0 the term vg / sqrt(kvb + va^2) is
    # 0/0 (vg = 0) or +-inf unless guarded; Koren's E1 is 0 at va = 0 for any vg.
    m = MODELS["koren"]
    p = dict(TYPICAL["koren"], kvb=0.0)
    va = np.array([0.0, 0.0, 0.0])
    vg = np.array([0.0, 1.0, -1.0])
    with np.errstate(divide="raise", invalid="raise", over="raise"):
        ia = m.current(va, vg, **p)
        dva, dvg = m.voltage_gradient(va, vg, **p)
        pg = m.param_gradient(va, vg, **p)
    assert np.array_equal(ia, np.zeros(3)), ia
    assert np.all(np.isfinite(dva)) and np.all(np.isfinite(dvg))
    assert all(np.all(np.isfinite(g)) for g in pg.values())


def koren_by_hand(va, vg, mu, ex, kg1, kp, kvb):
    """Koren's equations typed again from the paper with the math module (scalar)."""
    e1 = (va / kp) * math.log1p(math.exp(kp * (1.0 / mu + vg / math.sqrt(kvb + va * va))))
    return 2.0 * e1**ex / kg1 if e1 > 0 else 0.0


@pytest.mark.parametrize("va,vg", [(250.0, -2.0), (100.0, -0.5), (400.0, -4.0), (30.0, 0.0)])
def test_koren_current_is_the_published_equation(va, vg):
    # Koren (1996, rev. 2003): E1 = (va/kp) ln(1 + exp(kp (1/mu + vg/sqrt(kvb + va^2)))),
    # Ia = 2 E1^ex / kg1 -- evaluated independently with the math module
    p = TYPICAL["koren"]
    assert MODELS["koren"].current(va, vg, **p) == pytest.approx(koren_by_hand(va, vg, **p), rel=1e-12)


def test_koren_reduces_to_the_three_halves_law_for_large_kp():
    # Koren (1996): for kp -> infinity and kvb = 0 the softplus becomes max(0, .) and
    # E1 -> vg + va/mu, so Ia -> (2/kg1) (vg + va/mu)^ex: the Child-Langmuir form with
    # perveance 2/kg1 (Child 1911, Langmuir 1913).
    va = np.linspace(150.0, 400.0, 8)  # bracket vg + va/mu >= 0.5 V: well above cutoff
    vg = np.full_like(va, -1.0)
    k = MODELS["koren"].current(va, vg, mu=100.0, ex=1.5, kg1=1060.0, kp=5000.0, kvb=0.0)
    pw = MODELS["power"].current(va, vg, K=2.0 / 1060.0, mu=100.0, n=1.5, vc=0.0)
    np.testing.assert_allclose(k, pw, rtol=1e-6)


def test_dempwolf_reduces_to_the_power_law_for_sharp_cutoff():
    # Dempwolf & Zoelzer (DAFx-11): ln(1 + exp(C x))/C -> max(x, 0) for large C, so the
    # cathode current becomes G (vg + va/mu)^gamma (Child-Langmuir form)
    va = np.linspace(150.0, 400.0, 8)  # bracket vg + va/mu >= 0.45 V: well above cutoff
    vg = np.full_like(va, -1.0)
    d = MODELS["dempwolf"].current(va, vg, G=2.242e-3, mu=103.2, gamma=1.26, C=50.0)
    pw = MODELS["power"].current(va, vg, K=2.242e-3, mu=103.2, n=1.26, vc=0.0)
    np.testing.assert_allclose(d, pw, rtol=1e-6)


def test_dempwolf_plate_current_is_cathode_minus_grid_current():
    # Dempwolf & Zoelzer (DAFx-11): Ia = Ik - Ig with Ig = Gg (ln(1+exp(Cg vg))/Cg)^xi + Ig0
    m = MODELS["dempwolf"]
    p = TYPICAL["dempwolf"]
    va = np.array([100.0, 200.0, 50.0])
    vg = np.array([1.0, 0.5, 2.0])
    plate = {k: p[k] for k in m.plate_param_names}
    ik = m.current(va, vg, **plate)
    ig = p["Gg"] * (np.log1p(np.exp(p["Cg"] * vg)) / p["Cg"]) ** p["xi"] + p["Ig0"]
    np.testing.assert_allclose(m.current(va, vg, **p), ik - ig, rtol=1e-12)
    np.testing.assert_allclose(m.grid_current(vg, **p), ig, rtol=1e-12)


def test_sigmoid_equals_scipy_expit_to_rounding():
    # reference: scipy.special.expit (the logistic function), over the whole finite range
    from scipy.special import expit
    from fitter.models import sigmoid
    z = np.concatenate([np.linspace(-800, 800, 20001), [-1e308, -1e-300, 0.0, 1e-300, 1e308]])
    np.testing.assert_allclose(sigmoid(z), expit(z), rtol=4e-16, atol=1e-300)  # subnormals aside
    assert isinstance(sigmoid(0.5), float) and sigmoid(0.5) == expit(0.5)


@pytest.mark.parametrize("name", list(MODELS))
def test_current_with_gradient_equals_current_and_voltage_gradient(name):
    # The stage solvers' combined call (written out for speed where a model has one) gives
    # the model's own current and voltage gradient to rounding over the whole domain, with
    # kvb-like parameters at their bounds and no floating-point warning.
    m = MODELS[name]
    va, vg = WIDE
    for p in param_sets(name):
        with np.errstate(divide="raise", invalid="raise", over="raise"):
            ia, dva, dvg = m.current_with_gradient(va, vg, **p)
        for got, want in ((ia, m.current(va, vg, **p)), *zip((dva, dvg), m.voltage_gradient(va, vg, **p))):
            np.testing.assert_allclose(got, want, rtol=1e-12, atol=1e-300, err_msg=f"{name} at {p}")


def test_koren_combined_call_is_finite_at_zero_plate_voltage_with_kvb_zero():
    m = MODELS["koren"]
    p = dict(TYPICAL["koren"], kvb=0.0)
    with np.errstate(divide="raise", invalid="raise", over="raise"):
        ia, dva, dvg = m.current_with_gradient(np.zeros(3), np.array([0.0, 1.0, -1.0]), **p)
    assert np.array_equal(ia, np.zeros(3))
    assert np.all(np.isfinite(dva)) and np.all(np.isfinite(dvg))
