"""Stage analysis (fitter.stage) against textbook formulas, trade facts and independent
solutions of the same circuits with scipy / numpy.

The tubes are invented units made directly from published parameter sets (no fit):
Koren's 12AX7 and 12AU7 sets, quoted from memory of Koren's table (N. Koren,
"Improved vacuum tube models for SPICE simulations", Glass Audio 8(5), 1996, rev.
2003), and power-law units with a chosen mu.
"""

import numpy as np
import pytest
from scipy.optimize import fsolve

from fitter import stage as S
from fitter.triode import FittedTriode

KOREN = ("mu", "ex", "kg1", "kp", "kvb")


def high_mu(tube="HX", section=None, kg1=1060.0, cov=None):
    # 12AX7-like set, from memory of Koren's published table
    return FittedTriode("koren", dict(mu=100, ex=1.4, kg1=kg1, kp=600, kvb=300), tube=tube, section=section,
                        free=KOREN if cov is not None else (), covariance=cov)


def medium_mu(tube="MU", section=None, kg1=1180.0):
    # 12AU7-like set, from memory of Koren's published table
    return FittedTriode("koren", dict(mu=21.5, ex=1.3, kg1=kg1, kp=84, kvb=300), tube=tube, section=section)


def power_law(mu=20.0, K=3.0e-4, tube="PL"):
    # Child-Langmuir law with constant mu (its small-signal mu equals the parameter exactly)
    return FittedTriode("power", dict(K=K, mu=mu, n=1.5, vc=0.0), tube=tube)


def ss(t, r, pos="tube"):
    s = t.small_signal(r[pos + ".va"], r[pos + ".vgk"], check=False)
    return s.mu, s.rp, s.gm


def par(*rs):
    return 1.0 / sum(1.0 / r for r in rs)


# ---------------------------------------------------------------------------
# textbook small-signal formulas (from memory)
# ---------------------------------------------------------------------------


def test_common_cathode_bypassed_gain_matches_textbook():
    t = high_mu()
    st = S.CommonCathode(b_plus=300, ra=100e3, rk=1.5e3, ck=22e-6, rl=470e3)
    r = S.solve(st, t, errors=False)
    mu, rp, _ = ss(t, r)
    ral = par(100e3, 470e3)
    # Radiotron Designer's Handbook (Langford-Smith, 4th ed., ch. 12), from memory:
    # A = -mu RL' / (RL' + rp) with the cathode bypassed, RL' = Ra || RL
    assert r["gain"] == pytest.approx(-mu * ral / (ral + rp), rel=1e-6)
    # output impedance rp || Ra (same source)
    assert r["zout"] == pytest.approx(par(rp, 100e3), rel=1e-5)


def test_common_cathode_unbypassed_gain_matches_textbook():
    t = high_mu()
    st = S.CommonCathode(b_plus=250, ra=220e3, rk=2.7e3)
    r = S.solve(st, t, errors=False)
    mu, rp, _ = ss(t, r)
    # RCA Receiving Tube Manual, resistance-coupled amplifier notes, from memory:
    # A = mu Ra / (Ra + rp + (mu + 1) Rk) with Rk unbypassed
    assert r["gain"] == pytest.approx(-mu * 220e3 / (220e3 + rp + (mu + 1) * 2.7e3), rel=1e-6)
    # zout = Ra || (rp + (mu + 1) Rk) (same source)
    assert r["zout"] == pytest.approx(par(220e3, rp + (mu + 1) * 2.7e3), rel=1e-5)


def test_cathode_follower_gain_and_zout_match_textbook():
    t = medium_mu()
    for vneg, rk in ((0.0, 10e3), (-150.0, 22e3)):
        st = S.CathodeFollower(b_plus=250, rk=rk, vneg=vneg)
        r = S.solve(st, t, errors=False)
        mu, rp, _ = ss(t, r)
        # Radiotron Designer's Handbook (cathode follower), from memory:
        # A = mu Rk / (rp + (mu + 1) Rk);  zout = Rk || rp / (mu + 1)
        assert r["gain"] == pytest.approx(mu * rk / (rp + (mu + 1) * rk), rel=1e-6)
        assert r["zout"] == pytest.approx(par(rk, rp / (mu + 1)), rel=1e-5)


def test_miller_input_capacitance_matches_textbook():
    t = high_mu()
    cgk, cga = 1.6e-12, 1.7e-12
    st = S.CommonCathode(b_plus=300, ra=100e3, rk=1.5e3, ck=22e-6, cgk=cgk, cga=cga, cak=0.46e-12)
    r = S.solve(st, t, errors=False)
    mu, rp, _ = ss(t, r)
    a = mu * 100e3 / (100e3 + rp)  # textbook gain magnitude (above)
    # Miller effect, Radiotron Designer's Handbook, from memory: Cin = Cgk + (1 + |A|) Cga
    assert r["cin"] == pytest.approx(cgk + (1 + a) * cga, rel=1e-5)


# ---------------------------------------------------------------------------
# DC operating point against scipy.optimize.fsolve on the full nodal equations
# ---------------------------------------------------------------------------


def test_common_cathode_dc_matches_fsolve():
    t = high_mu()
    st = S.CommonCathode(b_plus=300, ra=100e3, rk=1.5e3)
    r = S.solve(st, t, errors=False)

    def kcl(v):  # unknowns: plate, cathode (scipy.optimize.fsolve, independent route)
        p, k = v
        ia = t.current(p - k, 0.0 - k)
        return [(300 - p) / 100e3 - ia, ia - k / 1.5e3]

    p, k = fsolve(kcl, [150.0, 1.0], xtol=1e-13)
    assert r["node.plate"] == pytest.approx(p, rel=1e-9)
    assert r["node.cathode"] == pytest.approx(k, rel=1e-9)


def test_cathode_follower_divider_dc_matches_fsolve():
    t = medium_mu()
    st = S.CathodeFollower(b_plus=300, rk=15e3, vneg=-100, ra=1e3, r_upper=1e6, r_lower=470e3)
    r = S.solve(st, t, errors=False)
    vg = 300 * 470e3 / 1.47e6

    def kcl(v):
        p, k = v
        ia = t.current(p - k, vg - k)
        return [(300 - p) / 1e3 - ia, ia - (k + 100) / 15e3]

    p, k = fsolve(kcl, [290.0, 100.0], xtol=1e-13)
    assert r["node.cathode"] == pytest.approx(k, rel=1e-9)
    assert r["node.plate"] == pytest.approx(p, rel=1e-9)
    assert r["node.grid"] == pytest.approx(vg)


def test_mu_follower_dc_matches_fsolve():
    bot, top = medium_mu("MU", "A"), medium_mu("MU", "B", kg1=1300.0)
    B, rk, rt, rm = 300.0, 1e3, 820.0, 68e3
    st = S.Stack.mu_follower(b_plus=B, rk=rk, r_top=rt, r_mid=rm)
    r = S.solve(st, bot, top, errors=False)

    def kcl(v):  # unknowns K1, P1, M, K2; the top grid sits at M (its resistor carries no DC)
        k1, p1, m, k2 = v
        i1 = bot.current(p1 - k1, -k1)
        i2 = top.current(B - k2, m - k2)
        return [i1 - k1 / rk, (m - p1) / rm - i1, (k2 - m) / rt - (m - p1) / rm, i2 - (k2 - m) / rt]

    sol = fsolve(kcl, [1.0, 100.0, 200.0, 201.0], xtol=1e-13)
    got = [r[f"node.{n}"] for n in ("cathode_bottom", "plate_bottom", "mid", "cathode_top")]
    assert got == pytest.approx(sol, rel=1e-8)
    assert r["node.grid_top"] == pytest.approx(sol[2], rel=1e-8)


def test_srpp_dc_matches_fsolve():
    bot, top = medium_mu("MU", "A"), medium_mu("MU", "B", kg1=1300.0)
    B, rk = 300.0, 820.0
    st = S.Stack.srpp(b_plus=B, rk=rk)
    r = S.solve(st, bot, top, errors=False)

    def kcl(v):  # unknowns K1, P1, K2; top grid on P1
        k1, p1, k2 = v
        i1 = bot.current(p1 - k1, -k1)
        i2 = top.current(B - k2, p1 - k2)
        return [i1 - k1 / rk, (k2 - p1) / rk - i1, i2 - (k2 - p1) / rk]

    sol = fsolve(kcl, [3.0, 150.0, 155.0], xtol=1e-13)
    got = [r[f"node.{n}"] for n in ("cathode_bottom", "plate_bottom", "cathode_top")]
    assert got == pytest.approx(sol, rel=1e-8)


# ---------------------------------------------------------------------------
# stack small signal against an independent linear nodal analysis (numpy)
# ---------------------------------------------------------------------------


def test_mu_follower_small_signal_matches_linear_nodal_analysis():
    bot, top = medium_mu("MU", "A"), medium_mu("MU", "B", kg1=1300.0)
    rt, rm, rg2, rl = 820.0, 68e3, 1e6, 47e3
    st = S.Stack.mu_follower(b_plus=300, rk=1e3, r_top=rt, r_mid=rm, ck=100e-6, rg_top=rg2,
                             rl=rl, output="top-cathode")
    r = S.solve(st, bot, top, errors=False)
    _, rp1, gm1 = ss(bot, r, "bottom")
    _, rp2, gm2 = ss(top, r, "top")
    # mid-band: bottom cathode AC-grounded, top grid = bottom plate, B+ AC ground, grid 1 V.
    # Unknowns P1, M, K2; numpy.linalg.solve of the conductance matrix (independent route).
    G = np.zeros((3, 3))
    b = np.zeros(3)
    # tube 1: i1 = gm1 * 1 + P1 / rp1 leaving P1
    G[0, 0] += 1 / rp1
    b[0] -= gm1
    # rm and rg2 both between P1 and M
    g = 1 / rm + 1 / rg2
    G[0, 0] += g; G[0, 1] -= g; G[1, 1] += g; G[1, 0] -= g
    # rt between M and K2
    G[1, 1] += 1 / rt; G[1, 2] -= 1 / rt; G[2, 2] += 1 / rt; G[2, 1] -= 1 / rt
    # load at K2
    G[2, 2] += 1 / rl
    # tube 2: i2 = gm2 (P1 - K2) - K2 / rp2 entering K2
    G[2, 0] -= gm2; G[2, 2] += gm2 + 1 / rp2
    p1, m, k2 = np.linalg.solve(G, b)
    assert r["gain.cathode_top"] == pytest.approx(k2, rel=1e-5)
    assert r["gain.plate_bottom"] == pytest.approx(p1, rel=1e-5)
    assert r["gain.mid"] == pytest.approx(m, rel=1e-5)


def test_srpp_small_signal_matches_linear_nodal_analysis():
    bot, top = medium_mu("MU", "A"), medium_mu("MU", "B", kg1=1300.0)
    rk, rl = 820.0, 100e3
    st = S.Stack.srpp(b_plus=300, rk=rk, rl=rl)
    r = S.solve(st, bot, top, errors=False)
    _, rp1, gm1 = ss(bot, r, "bottom")
    _, rp2, gm2 = ss(top, r, "top")
    # unknowns K1, P1, K2 (unbypassed bottom Rk); numpy.linalg.solve
    G = np.zeros((3, 3))
    b = np.zeros(3)
    # tube 1 current i1 = gm1 (1 - K1) + (P1 - K1)/rp1 flows P1 -> K1
    # K1: K1/rk - i1 = 0
    G[0, 0] += 1 / rk + gm1 + 1 / rp1; G[0, 1] -= 1 / rp1; b[0] += gm1
    # P1: i1 + (P1 - K2)/rk = 0
    G[1, 0] -= gm1 + 1 / rp1; G[1, 1] += 1 / rp1 + 1 / rk; G[1, 2] -= 1 / rk; b[1] -= gm1
    # K2: (K2 - P1)/rk + K2/rl - i2 = 0, i2 = gm2 (P1 - K2) - K2/rp2
    G[2, 2] += 1 / rk + 1 / rl + gm2 + 1 / rp2; G[2, 1] -= 1 / rk + gm2
    k1, p1, k2 = np.linalg.solve(G, b)
    assert r["gain"] == pytest.approx(k2, rel=1e-5)
    assert r["gain.plate_bottom"] == pytest.approx(p1, rel=1e-5)


# ---------------------------------------------------------------------------
# facts of the trade (common practice)
# ---------------------------------------------------------------------------


def test_mu_follower_gain_approaches_bottom_mu():
    # medium-mu double triode with mu = 20 (power law: small-signal mu is exactly 20)
    t = power_law(mu=20.0, K=3.0e-4)
    st = S.Stack.mu_follower(b_plus=300, rk=1.2e3, r_top=1.2e3, r_mid=100e3, ck=100e-6, rl=1e6,
                             output="bottom-plate")
    r = S.solve(st, t, t, errors=False)
    assert r["bottom.mu"] == pytest.approx(20.0, rel=1e-9)
    # common practice: a mu follower's gain approaches the bottom tube's mu; with mu about 20
    # and a high-impedance active load it is about 19-19.5
    assert 19.0 <= abs(r["gain"]) <= 19.6
    assert r["gain"] < 0
    # while an SRPP with the same tubes gives roughly half of mu (common practice)
    srpp = S.solve(S.Stack.srpp(b_plus=300, rk=1.2e3, rl=1e6), t, t, errors=False)
    assert 0.4 * 20 < abs(srpp["gain"]) < 0.6 * 20


def test_stacked_stage_needs_elevated_heater():
    # an octal medium-mu double triode (6SN7-like, power law mu 20) in an SRPP on 400 V
    t = power_law(mu=20.0, K=3.0e-4)
    st = S.Stack.srpp(b_plus=400, rk=1e3, vhk_max=200)
    r = S.solve(st, t, t, errors=False)
    # common practice: the heater-cathode limit of common octal double triodes is about 200 V,
    # and the top cathode of a stack sits near B+/2: with grounded heaters it is over
    assert r["top.vhk"] > 200
    assert any("heater-cathode" in w and "elevate" in w for w in r.warnings)
    # an elevated heater supply (about a quarter of B+, common practice) cures it
    ok = S.solve(S.Stack.srpp(b_plus=400, rk=1e3, vhk_max=200, heater=100.0), t, t, errors=False)
    assert not any("heater-cathode" in w for w in ok.warnings)
    assert ok["top.vhk"] == pytest.approx(r["top.vhk"] - 100.0)


def test_slew_limit_check_value():
    # a cathode follower with a few mA standing current driving a few hundred pF
    t = medium_mu()
    st = S.CathodeFollower(b_plus=250, rk=47e3, vneg=-150.0, c_load=300e-12)
    r = S.solve(st, t, errors=False, slew_vpeak=20.0)
    i = r["ia"]
    assert 2e-3 < i < 5e-3
    c = 300e-12 + st.cak
    # check value I / (2 pi C Vpeak): common practice for the slew limit of a class-A stage
    assert r["slew_fmax"] == pytest.approx(i / (2 * np.pi * c * 20.0), rel=1e-12)
    # a few hundred pF and a few mA limit full swing at tens of volts to about 100 kHz
    assert 50e3 < r["slew_fmax"] < 150e3


# ---------------------------------------------------------------------------
# error bars and spread
# ---------------------------------------------------------------------------


def test_error_bars_match_monte_carlo_spread():
    cov = np.diag([1.0, 4e-5, 60.0**2, 20.0**2, 30.0**2])
    t = high_mu(cov=cov)
    st = S.CommonCathode(b_plus=300, ra=100e3, rk=1.5e3, ck=22e-6)
    r = S.solve(st, t)
    # independent route: sample the parameters with numpy's multivariate normal and solve
    # every sample (vectorised through spread); the spread's std should match propagate()
    rng = np.random.default_rng(7)
    draws = rng.multivariate_normal([t.params[k] for k in KOREN], cov, size=3000)
    units = [t.with_params(dict(zip(KOREN, d))) for d in draws]
    sp = S.spread(st, units)
    for key in ("gain", "ia", "node.plate", "zout"):
        assert np.std(sp.values[key]) == pytest.approx(r.errors[key], rel=0.08), key


def test_spread_agrees_with_single_solves_and_mixed_models():
    # consistency of the vectorised spread with one solve per unit (the single solves are
    # checked against textbook formulas and fsolve above); Dempwolf-Zoelzer ECC83 set
    # from memory of DAFx-11, Koren 12AX7 set from memory
    units = [high_mu("A", kg1=k) for k in (900.0, 1000.0, 1060.0, 1200.0)]
    units.append(FittedTriode("dempwolf", dict(G=2.242e-3, mu=103.2, gamma=1.26, C=3.40), tube="DZ"))
    st = S.CommonCathode(b_plus=300, ra=100e3, rk=1.5e3, ck=22e-6, rl=470e3)
    sp = S.spread(st, units)
    single = np.array([S.solve(st, u, errors=False)["gain"] for u in units])
    assert sp.values["gain"] == pytest.approx(single, rel=1e-9)
    lo, med, hi = sp.stats("gain")
    assert (lo, med, hi) == pytest.approx((single.min(), np.median(single), single.max()))
    d = sp.to_dict()
    assert d["n_units"] == 5 and d["figures"]["gain"]["median"] == pytest.approx(med)


def test_stack_spread_pairs_bottom_and_top():
    # consistency: the paired spread equals one stack solve per (bottom, top) pair
    bots = [medium_mu("M", "A", kg1=k) for k in (1100.0, 1180.0, 1250.0)]
    tops = [medium_mu("M", "B", kg1=k) for k in (1300.0, 1200.0, 1150.0)]
    st = S.Stack.srpp(b_plus=300, rk=820.0, rl=100e3)
    sp = S.spread(st, bots, tops)
    single = [S.solve(st, b, t, errors=False)["node.cathode_top"] for b, t in zip(bots, tops)]
    assert sp.values["node.cathode_top"] == pytest.approx(single, rel=1e-9)


# ---------------------------------------------------------------------------
# robustness and failure paths
# ---------------------------------------------------------------------------


def test_solve_is_robust_at_cutoff_and_positive_grid():
    # Koren (1996): at vg = -20 V a mu-100 triode's E1 is 0 for va <= 300 V, so no
    # current and the plate sits at B+ (Ohm's law); at vg = +0.5 V grid current flows
    # (common practice) and the solve must still converge
    t = high_mu()
    cut = S.solve(S.CommonCathode(b_plus=300, ra=100e3, vbias=-20.0), t, errors=False)
    assert cut["ia"] == pytest.approx(0.0, abs=1e-12)
    assert cut["node.plate"] == pytest.approx(300.0)
    assert any("cut off" in w for w in cut.warnings)
    pos = S.solve(S.CommonCathode(b_plus=300, ra=100e3, vbias=0.5), t, errors=False)
    assert pos["ia"] > 1e-3 and any("grid current" in w for w in pos.warnings)
    # a unit whose model has grid current (Dempwolf-Zoelzer ECC83 set, from memory of DAFx-11)
    dz = FittedTriode("dempwolf", dict(G=2.242e-3, mu=103.2, gamma=1.26, C=3.40, Gg=6.177e-4, xi=1.314,
                                       Cg=9.901, Ig0=8.025e-8), tube="DZ")
    r = S.solve(S.CommonCathode(b_plus=300, ra=100e3, vbias=1.0), dz, errors=False)
    assert np.isfinite(r["gain"]) and 0 < r["node.plate"] < 300


def test_stack_with_bottom_cut_off():
    # Koren 12AU7 set (from memory): at vg = -60 V the bottom tube conducts nothing,
    # so neither can the top tube in series with it (Kirchhoff's current law)
    t = medium_mu()
    r = S.solve(S.Stack.srpp(b_plus=300, rk=820.0, vbias=-60.0), t, t, errors=False)
    assert r["ia"] == pytest.approx(0.0, abs=1e-9)
    assert any("cut off" in w for w in r.warnings)


def test_quasi_static_at_zero_signal_is_the_operating_point():
    bot, top = medium_mu("MU", "A"), medium_mu("MU", "B", kg1=1300.0)
    st = S.Stack.mu_follower(b_plus=300, rk=1e3, r_top=820.0, r_mid=68e3, ck=1e-4, rl=47e3)
    op = S.operating_point(st, bot, top)
    q = S.quasi_static(st, bot, top, vin=np.zeros(3), op=op)
    for k, v in op.items():
        assert q[k] == pytest.approx(np.full(3, v), rel=1e-9, abs=1e-12), k


@pytest.mark.parametrize("make, match", [
    (lambda: S.CommonCathode(b_plus=300, ra=-100e3), r"CommonCathode\.ra: must be positive"),
    (lambda: S.CommonCathode(b_plus=-5, ra=100e3), r"CommonCathode\.b_plus"),
    (lambda: S.CommonCathode(b_plus=300, ra=100e3, rk=-1.0), r"CommonCathode\.rk: must not be negative"),
    (lambda: S.CommonCathode(b_plus=300, ra=100e3, vbias=400.0), r"CommonCathode\.vbias: .*below B\+"),
    (lambda: S.CommonCathode(b_plus=300, ra=100e3, ck=0.0), r"CommonCathode\.ck"),
    (lambda: S.CathodeFollower(b_plus=300, rk=10e3, vneg=20.0), r"CathodeFollower\.vneg"),
    (lambda: S.CathodeFollower(b_plus=300, rk=10e3, r_upper=1e6), r"r_upper/r_lower"),
    (lambda: S.Stack(b_plus=300, rk=1e3, r_top=0.0), r"Stack\.r_top: must be positive"),
    (lambda: S.Stack(b_plus=300, rk=1e3, r_top=1e3, top_grid="floating"), r"Stack\.top_grid"),
    (lambda: S.Stack(b_plus=300, rk=1e3, r_top=1e3, output="grid"), r"Stack\.output"),
    (lambda: S.CommonCathode(b_plus=300, ra=100e3, rl=float("nan")), r"CommonCathode\.rl: must be finite"),
])
def test_impossible_values_are_named(make, match):
    with pytest.raises(ValueError, match=match):
        make()


def test_wrong_number_of_tubes():
    t = high_mu()
    with pytest.raises(ValueError, match="needs two triodes"):
        S.solve(S.Stack.srpp(b_plus=300, rk=1e3), t)
    with pytest.raises(ValueError, match="needs one triode"):
        S.solve(S.CommonCathode(b_plus=300, ra=1e5), t, t)
    with pytest.raises(ValueError, match="not a stage description"):
        S.solve(object(), t)


def test_to_dict_keys_for_common_cathode():
    t = high_mu(cov=np.diag([1.0, 1e-4, 100.0, 100.0, 100.0]))
    d = S.solve(S.CommonCathode(b_plus=300, ra=100e3, rk=1.5e3, ck=22e-6), t).to_dict()
    for key in ("ia_ma", "vplate_v", "vcathode_v", "gain", "zout_ohm", "nodes_v", "tubes", "errors",
                "caution"):
        assert key in d
    assert d["vplate_v"] == pytest.approx(300 - 100e3 * d["ia_ma"] * 1e-3)
    assert d["vcathode_v"] == pytest.approx(1.5e3 * d["ia_ma"] * 1e-3)
    assert d["errors"]["gain"] > 0 and d["tubes"]["tube"]["label"] == "HX"
    assert "lethal" in d["caution"]


def test_joint_newton_and_nested_bracketed_solve_agree(monkeypatch):
    # the stack is solved by a joint Newton iteration with the nested bracketed iteration as
    # fallback; both routes must give the same circuit (cross-check of the two solvers)
    bot, top = medium_mu("MU", "A"), medium_mu("MU", "B", kg1=1300.0)
    st = S.Stack.mu_follower(b_plus=300, rk=1e3, r_top=820.0, r_mid=68e3, ck=1e-4, rl=47e3)
    fast = S.solve(st, bot, top, errors=False)
    monkeypatch.setattr(S.solver, "_JOINT", False)
    slow = S.solve(st, bot, top, errors=False)
    for key in ("node.plate_bottom", "node.cathode_top", "gain", "zout", "gain.plate_bottom"):
        assert fast[key] == pytest.approx(slow[key], rel=1e-7), key


def test_spread_summarises_the_units_warnings_and_mixed_types():
    # rules: a figure the model extrapolates to is flagged, never silent; Koren's 12AX7
    # and 12AU7 sets (from memory) have mu 100 and 21.5 -- two types, not one
    ranged = dict(valid_range={"va": (0.0, 300.0), "vg": (-4.0, 0.0), "ia": (0.0, 5e-3)})
    units = [FittedTriode("koren", dict(mu=100, ex=1.4, kg1=k, kp=600, kvb=300), tube=f"H{i}", **ranged)
             for i, k in enumerate((1000.0, 1060.0, 1120.0))]
    # B+ 3 kV drives every unit far beyond the 300 V it was fitted to
    far = S.spread(S.CommonCathode(b_plus=3000.0, ra=1e3, rk=100.0), units)
    assert any(w.startswith("3 of 3 units: operating point outside their fitted data") for w in far.warnings)
    assert far.to_dict()["warnings"] == far.warnings
    near = S.spread(S.CommonCathode(b_plus=250.0, ra=100e3, rk=1.5e3), units)
    assert near.warnings == []
    mixed = S.spread(S.CommonCathode(b_plus=250.0, ra=100e3, rk=1.5e3), units + [medium_mu()])
    assert any("different tube types" in w for w in mixed.warnings)
