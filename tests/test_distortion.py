"""Large-signal distortion (fitter.distortion) against numpy's FFT, scipy root finding on
the circuit equations, Taylor-series theory and a fact of the trade.

Tubes: invented units from Koren's 12AX7 / 12AU7 parameter sets, quoted from memory of
Koren's table (N. Koren, Glass Audio 8(5), 1996, rev. 2003).
"""

import numpy as np
import pytest
from scipy.optimize import brentq

from fitter import distortion as D
from fitter import stage as S
from fitter.triode import FittedTriode


def high_mu():
    # 12AX7-like set, from memory of Koren's published table
    return FittedTriode("koren", dict(mu=100, ex=1.4, kg1=1060, kp=600, kvb=300), tube="HX")


def medium_mu(section="A", kg1=1180.0):
    # 12AU7-like set, from memory of Koren's published table
    return FittedTriode("koren", dict(mu=21.5, ex=1.3, kg1=kg1, kp=84, kvb=300), tube="MU", section=section)


CC = S.CommonCathode(b_plus=300, ra=100e3, rk=1.5e3, ck=22e-6, rl=470e3)


def test_projection_matches_numpy_fft():
    rng = np.random.default_rng(3)
    y = rng.normal(size=(4, 256))
    amp = D.harmonic_amplitudes(y)
    # independent route: numpy.fft.rfft; peak amplitude of harmonic k is 2|X_k|/N, DC is X_0/N
    X = np.fft.rfft(y, axis=1)
    assert amp[:, 1:] == pytest.approx(2 * np.abs(X[:, 1:11]) / 256, rel=1e-10, abs=1e-13)
    assert amp[:, 0] == pytest.approx(X[:, 0].real / 256, rel=1e-10, abs=1e-13)


def test_stage_harmonics_match_fft_of_its_waveform():
    # independent reference: numpy.fft of the stage's own output waveform
    d = D.analyse(CC, high_mu(), vin_peak=0.8)
    X = np.fft.rfft(d.vout)
    n = d.vout.size
    h = 2 * np.abs(X[1:11]) / n
    assert d.harmonics == pytest.approx(h, rel=1e-9, abs=1e-12)
    thd = np.sqrt(np.sum(h[1:] ** 2)) / h[0]
    assert d.thd == pytest.approx(thd, rel=1e-9)


def test_waveform_matches_brentq_on_the_circuit_equation():
    t = high_mu()
    st = CC
    d = D.analyse(st, t, vin_peak=1.0, n_samples=64)
    op = S.operating_point(st, t)
    vp0, vk0 = op["plate"], op["cathode"]
    # independent route: at each phase, the plate node's KCL solved with scipy's brentq.
    # Mid-band: cathode held at vk0 by the bypass capacitor, load RL to vp0 via the coupling cap.
    for j in (0, 5, 16, 30, 48):
        vg = 1.0 * np.sin(d.theta[j])

        def kcl(p):
            return (300 - p) / 100e3 - (p - vp0) / 470e3 - t.current(p - vk0, vg - vk0)

        p = brentq(kcl, vk0, 300.0, xtol=1e-12)
        assert d.vout[j] == pytest.approx(p - vp0, abs=1e-7)


def test_second_harmonic_dominates_single_ended_triode():
    # common practice: a single-ended triode stage's distortion is mostly second harmonic
    for st, tubes in ((CC, (high_mu(),)),
                      (S.CommonCathode(b_plus=250, ra=22e3, rk=680.0, ck=100e-6), (medium_mu(),))):
        lim = D.drive_limit(st, *tubes)
        d = D.analyse(st, *tubes, vin_peak=0.3 * lim.vin_peak)
        h = d.harmonics
        assert h[1] > 5 * h[2]
        assert h[1] > 0.9 * np.sqrt(np.sum(h[1:] ** 2))


def test_small_signal_limit_and_taylor_second_harmonic():
    t = high_mu()
    r = S.solve(CC, t, errors=False)
    a = 0.01
    d = D.analyse(CC, t, vin_peak=a)
    assert d.gain == pytest.approx(r["gain"], rel=1e-4)
    # Taylor series: y = y1 x + y2 x^2 / 2 + ..., x = a sin -> H2 = |y2| a^2 / 4 (independent of
    # the projection); y1, y2 by central differences of the transfer with numpy
    op = S.operating_point(CC, t)
    h = 2e-3
    q = S.quasi_static(CC, t, vin=np.array([-h, 0.0, h]), op=op)["plate"]
    y2 = (q[2] - 2 * q[1] + q[0]) / h**2
    assert d.harmonics[1] == pytest.approx(abs(y2) * a**2 / 4, rel=2e-3)


def test_drive_limit_is_grid_current_onset_for_bypassed_cc():
    t = high_mu()
    op = S.operating_point(CC, t)
    lim = D.drive_limit(CC, t, op=op)
    assert lim.reason == "grid-current onset" and lim.position == "tube"
    # the grid reaches the cathode at the positive crest: bypassed, so at vin = -Vgk (exact)
    assert lim.vin_peak == pytest.approx(-op["tube.vgk"], rel=1e-4)


def test_drive_limit_cutoff_for_cathode_follower_into_low_load():
    # definition (common practice for a quasi-static sweep): "cutoff" is where the tube's
    # current falls to 1 % of its standing current; checked on the waveform solver itself
    t = medium_mu()
    st = S.CathodeFollower(b_plus=250, rk=22e3, vneg=-150, rl=4.7e3)
    op = S.operating_point(st, t)
    lim = D.drive_limit(st, t, op=op)
    assert lim.reason == "cutoff"
    q = S.quasi_static(st, t, vin=np.array([-lim.vin_peak]), op=op)
    assert q["tube.ia"][0] == pytest.approx(0.01 * op["tube.ia"], rel=1e-3)


def test_sweep_and_headroom():
    t = high_mu()
    sw = D.sweep(CC, t, levels=12, thd_limit=0.01)
    assert len(sw.vout_peak) == 12 and np.all(np.diff(sw.vout_peak) > 0)
    assert np.all(np.diff(sw.thd) > 0)
    assert sw.vin_peak[-1] == pytest.approx(sw.limit.vin_peak)
    # at the headroom the THD is the threshold (checked by an independent analyse call)
    d = D.analyse(CC, t, vin_peak=sw.headroom_vin_peak)
    assert d.thd == pytest.approx(0.01, rel=2e-3)
    assert d.vout_peak == pytest.approx(sw.headroom_vout_peak, rel=2e-3)
    dd = sw.to_dict()
    assert dd["headroom"]["limited_by"].startswith("THD reaches") and "lethal" in dd["caution"]


def test_sweep_when_thd_stays_low():
    t = medium_mu()
    st = S.CathodeFollower(b_plus=250, rk=22e3, vneg=-150)
    sw = D.sweep(st, t, levels=6, thd_limit=0.2)
    assert "stays below" in sw.headroom_reason
    assert sw.headroom_vout_peak == pytest.approx(sw.vout_peak[-1])


def test_level_by_output_amplitude_and_stack():
    bot, top = medium_mu("A"), medium_mu("B", kg1=1300.0)
    st = S.Stack.srpp(b_plus=300, rk=820.0, rl=100e3)
    d = D.analyse(st, bot, top, vout_peak=10.0)
    assert d.vout_peak == pytest.approx(10.0, rel=1e-7)
    assert set(d.tubes) == {"bottom", "top"}
    text = d.report()
    assert "H2" in text and "lethal" in text and "quasi-static" in text


def test_assumptions_name_grid_current():
    dz = FittedTriode("dempwolf", dict(G=2.242e-3, mu=103.2, gamma=1.26, C=3.40, Gg=6.177e-4, xi=1.314,
                                       Cg=9.901, Ig0=8.025e-8), tube="DZ")
    assert any("includes it" in a for a in D.assumptions([dz]))
    assert any("no grid current" in a for a in D.assumptions([high_mu()]))


def test_distortion_input_errors():
    t = high_mu()
    with pytest.raises(ValueError, match="exactly one of vin_peak and vout_peak"):
        D.analyse(CC, t)
    with pytest.raises(ValueError, match="vin_peak: must be a positive"):
        D.analyse(CC, t, vin_peak=-1.0)
    with pytest.raises(ValueError, match="thd_limit"):
        D.sweep(CC, t, thd_limit=5.0)
    with pytest.raises(ValueError, match="n_samples"):
        D.analyse(CC, t, vin_peak=0.1, n_samples=8)
    with pytest.raises(ValueError, match="more than the stage can deliver"):
        D.analyse(CC, t, vout_peak=5000.0)


def test_a_cut_off_stage_is_a_failure_not_a_distortion_figure():
    # Koren (1996): with vg = -100 V and va <= 300 V, a mu-100 triode's E1 is zero, so
    # no plate current flows; there is no signal, and a THD figure (noise / noise)
    # would be a failed analysis reported as a result
    st = S.CommonCathode(b_plus=300.0, ra=100e3, rk=0.0, vbias=-100.0)
    with pytest.raises(S.StageSolveError, match=r"cut off at the operating point .*no signal"):
        D.analyse(st, high_mu(), vin_peak=1.0)
    with pytest.raises(S.StageSolveError, match="cut off"):
        D.sweep(st, high_mu(), levels=5)


def test_distortion_reports_carry_the_stages_dc_warnings():
    # common practice: octal double triodes allow about 200 V heater-cathode; an SRPP's
    # top cathode sits near B+/2, so at 400 V with grounded heaters the stage report warns,
    # and the distortion report of the same stage must not hide it
    t = medium_mu()
    st = S.Stack.srpp(b_plus=400.0, rk=1e3, r_top=1e3, rl=47e3, vhk_max=150.0)
    dc = S.solve(st, t, t, errors=False).warnings
    assert any("heater-cathode" in w for w in dc)
    assert any("heater-cathode" in w for w in D.analyse(st, t, t, vout_peak=5.0).warnings)
    assert any("heater-cathode" in w for w in D.sweep(st, t, t, levels=4).warnings)


@pytest.mark.parametrize("kw", [dict(b_plus=300.0, rk=1.5e3, r_top=1.5e3, r_mid=68e3, c_top=100e-9, ck=100e-6),
                                dict(b_plus=300.0, rk=1e3, r_top=1e3, r_mid=68e3)])
def test_drive_limit_of_a_mixed_mu_follower_is_found_without_solving_absurd_drives(kw):
    # a mu follower of a Dempwolf high-mu bottom and a Koren medium-mu top (invented sets): the
    # search used to solve drives up to twice B+ at once, where the stack has no solution, and
    # failed; it now climbs from small drives and stops at the first limit.  The limit found
    # must agree with a fine scan of the quasi-static top grid voltage (an independent check
    # of the same circuit equations)
    from fitter.stage import Stack, operating_point, quasi_static
    from fitter.stage.distortion import drive_limit
    ko = FittedTriode("koren", dict(mu=22.37, ex=1.317, kg1=1143.2, kp=91.6, kvb=271.0), tube="XU7", section="B")
    dw = FittedTriode("dempwolf", dict(G=2.31e-3, mu=98.7, gamma=1.284, C=3.17), tube="XA7")
    st = Stack.mu_follower(**kw)
    lim = drive_limit(st, dw, ko)
    assert lim.reason == "grid-current onset" and 0.05 < lim.vin_peak < 5
    op = operating_point(st, dw, ko)
    a = np.linspace(0.5 * lim.vin_peak, 1.5 * lim.vin_peak, 2001)
    res = quasi_static(st, dw, ko, vin=np.concatenate([a, -a]), op=op)
    crest = np.maximum(res[f"{lim.position}.vgk"][:a.size], res[f"{lim.position}.vgk"][a.size:])
    onset = a[np.argmax(crest >= 0.0)]
    assert abs(onset - lim.vin_peak) <= 1e-3 * lim.vin_peak
