"""``platebook stage`` and ``platebook distortion`` through click's test runner.

Cards are invented units from Koren's 12AX7 / 12AU7 parameter sets (from memory of
Koren's table, Glass Audio 8(5), 1996, rev. 2003), written with save_card.  The
figures the CLI prints are checked against textbook formulas (from memory, named
beside each check) and against the engine's own result objects.
"""

import json

import numpy as np
import pytest
from click.testing import CliRunner

from fitter import stage as S
from fitter.card import save_card
from fitter.cli import main
from fitter.triode import FittedTriode

KOREN = ("mu", "ex", "kg1", "kp", "kvb")


@pytest.fixture()
def cards(tmp_path):
    hx = FittedTriode("koren", dict(mu=100, ex=1.4, kg1=1060, kp=600, kvb=300), tube="HX", section="A",
                      free=KOREN, covariance=np.diag([1.0, 1e-4, 100.0, 100.0, 100.0]),
                      valid_range={"va": (0.0, 400.0), "vg": (-4.0, 0.0), "ia": (0.0, 8e-3)})
    folder = tmp_path / "lot"
    folder.mkdir()
    out = {"hx": save_card(tmp_path / "HX_A.koren.json", hx)}
    for sec, kg1 in (("A", 1180.0), ("B", 1300.0)):
        t = FittedTriode("koren", dict(mu=21.5, ex=1.3, kg1=kg1, kp=84, kvb=300), tube="MU", section=sec)
        out["mu" + sec] = save_card(tmp_path / f"MU_{sec}.koren.json", t)
        save_card(folder / f"MU_{sec}.koren.json", t)
        t2 = t.with_params({"kg1": kg1 * 1.1})
        t2 = FittedTriode(t2.model, t2.params, tube="MV", section=sec)
        save_card(folder / f"MV_{sec}.koren.json", t2)
    out["lot"] = folder
    return out


def run(args):
    return CliRunner().invoke(main, [str(a) for a in args], catch_exceptions=False)


CC_ARGS = ["--bplus", "300", "--ra", "100k", "--rk", "1.5k", "--ck", "22u", "--rl", "470k"]


def test_common_cathode_json(cards):
    res = run(["stage", "common-cathode", "--tube", cards["hx"], *CC_ARGS, "--json"])
    assert res.exit_code == 0, res.output
    d = json.loads(res.output)
    for key in ("ia_ma", "vplate_v", "vcathode_v", "gain", "zout_ohm"):
        assert isinstance(d[key], float)
    # Radiotron Designer's Handbook (from memory): A = -mu RL'/(RL' + rp), RL' = Ra || RL,
    # with mu and rp of the unit at the printed operating point
    t = FittedTriode("koren", dict(mu=100, ex=1.4, kg1=1060, kp=600, kvb=300))
    s = t.small_signal(d["tubes"]["tube"]["va_v"], d["tubes"]["tube"]["vgk_v"], check=False)
    ral = 1 / (1 / 100e3 + 1 / 470e3)
    assert d["gain"] == pytest.approx(-s.mu * ral / (ral + s.rp), rel=1e-6)
    assert d["vplate_v"] == pytest.approx(300 - 100e3 * d["ia_ma"] / 1e3)
    assert d["errors"]["gain"] > 0
    assert "lethal" in d["caution"]


def test_common_cathode_report_and_plot(cards, tmp_path):
    png = tmp_path / "ll.png"
    res = run(["stage", "common-cathode", "--tube", cards["hx"], *CC_ARGS, "--pa-max", "1",
               "--cgk", "1.6p", "--cga", "1.7p", "--cload", "100p", "--plot", png])
    assert res.exit_code == 0, res.output
    out = res.output
    assert "lethal voltages" in out
    for text in ("plate", "cathode", "dissipation", "of 1 W", "heater-cathode", "gain to plate",
                 "output impedance", "input capacitance", "low corners", "high corners", "slew", "±"):
        assert text in out, text
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


def test_stack_and_spread(cards, tmp_path):
    # the CLI passes the same circuit to the engine: its JSON equals a direct solve
    # (the engine's stack solves are checked against fsolve and ngspice elsewhere)
    args = ["--bplus", "300", "--rk", "820", "--r-top", "820", "--rl", "100k"]
    res = run(["stage", "stack", "--bottom", cards["muA"], "--top", cards["muB"], *args, "--json"])
    assert res.exit_code == 0, res.output
    d = json.loads(res.output)
    r = S.solve(S.Stack.srpp(b_plus=300, rk=820.0, rl=100e3),
                *(FittedTriode("koren", dict(mu=21.5, ex=1.3, kg1=k, kp=84, kvb=300)) for k in (1180.0, 1300.0)),
                errors=False)
    assert d["vcathode_top_v"] == pytest.approx(r["node.cathode_top"], rel=1e-9)
    assert d["gain"] == pytest.approx(r["gain"], rel=1e-9)
    png = tmp_path / "stack.png"
    res = run(["stage", "stack", "--bottom", cards["muA"], "--top", cards["muB"], *args,
               "--top-grid", "coupled", "--r-mid", "47k", "--plot", png])
    assert res.exit_code == 0 and "mu follower" in res.output and png.exists()
    res = run(["stage", "stack", *args, "--spread", cards["lot"], "--json"])
    assert res.exit_code == 0, res.output
    sp = json.loads(res.output)
    assert sp["n_units"] == 2 and "sections" in sp["pairing"]
    g = sp["figures"]["gain"]
    assert g["min"] <= g["median"] <= g["max"]


def test_cathode_follower_text(cards):
    res = run(["stage", "cathode-follower", "--tube", cards["muA"], "--bplus", "250", "--rk", "22k",
               "--vneg", "-150", "--cload", "300p"])
    assert res.exit_code == 0, res.output
    assert "Cathode follower" in res.output and "slew" in res.output


@pytest.mark.parametrize("args, match", [
    (["--ra", "-100k"], "--ra"),
    (["--ra", "100q"], "--ra: cannot read"),
    (["--ra", "100k", "--rk", "1.5k", "--ck", "0"], "--ck"),
])
def test_bad_values_name_the_option(cards, args, match):
    res = CliRunner().invoke(main, ["stage", "common-cathode", "--tube", str(cards["hx"]), "--bplus", "300", *args])
    assert res.exit_code == 1
    assert match in res.output


def test_missing_and_broken_cards(cards, tmp_path):
    res = CliRunner().invoke(main, ["stage", "common-cathode", "--bplus", "300", "--ra", "100k"])
    assert res.exit_code == 1 and "--tube" in res.output
    bad = tmp_path / "bad.json"
    bad.write_text("{not json")
    res = CliRunner().invoke(main, ["stage", "common-cathode", "--tube", str(bad), "--bplus", "300", "--ra", "100k"])
    assert res.exit_code == 1 and "bad.json" in res.output and "line 1" in res.output


def test_distortion_sweep_and_level(cards, tmp_path):
    png = tmp_path / "thd.png"
    res = run(["distortion", "common-cathode", "--tube", cards["hx"], *CC_ARGS, "--sweep", "--levels", "10",
               "--thd-limit", "1%", "--plot", png, "--json"])
    assert res.exit_code == 0, res.output
    d = json.loads(res.output)
    assert len(d["levels"]) == 10 and d["limit"]["reason"] == "grid-current onset"
    assert d["thd_limit_pct"] == pytest.approx(1.0)
    # common practice: single-ended triode distortion is mostly second harmonic
    assert all(lv["h_db"]["h2"] > lv["h_db"]["h3"] + 10 for lv in d["levels"])
    assert png.read_bytes()[:4] == b"\x89PNG"
    res = run(["distortion", "common-cathode", "--tube", cards["hx"], *CC_ARGS, "--vout", "20"])
    assert res.exit_code == 0, res.output
    assert "THD" in res.output and "H10" in res.output and "lethal" in res.output
    assert "quasi-static" in res.output


def test_distortion_needs_one_level(cards):
    res = CliRunner().invoke(main, ["distortion", "common-cathode", "--tube", str(cards["hx"]), *CC_ARGS])
    assert res.exit_code == 1 and "--vin" in res.output
    res = CliRunner().invoke(main, ["distortion", "common-cathode", "--tube", str(cards["hx"]), *CC_ARGS,
                                    "--sweep", "--thd-limit", "150%"])
    assert res.exit_code == 1 and "--thd-limit" in res.output


def test_plots_label_operating_curve_extrapolation_and_visible_harmonics():
    import matplotlib.pyplot as plt

    from fitter import distortion as D
    from fitter import plotting_stage as PS

    # invented unit on Koren's 12AX7 set (from memory, as above) whose data are said to
    # stop at Vgk = -2 V, so the curves drawn below that are extrapolated
    t = FittedTriode("koren", dict(mu=100, ex=1.4, kg1=1060, kp=600, kvb=300), tube="HX", section="A",
                     valid_range={"va": (0.0, 400.0), "vg": (-2.0, 0.0), "ia": (0.0, 8e-3)})
    st = S.CommonCathode(b_plus=300, ra=100e3, rk=1.5e3, ck=22e-6, rl=470e3, pa_max=1.0)
    r = S.solve(st, t, errors=False)
    (ax,) = PS.plot_load_lines(r)
    labels = [x.get_text() for x in ax.get_legend().get_texts()]
    assert f"Vgk = {r.figures['tube.vgk']:.3g} V (operating point)" in labels
    assert any("extrapolated" in x and "-2..0 V" in x for x in labels)
    grid_labels = [a.get_text() for a in ax.texts]
    assert grid_labels and all(x.endswith(" V") for x in grid_labels)
    n_out = sum(float(x[:-2]) < -2.04 for x in grid_labels)
    dashed = [ln for ln in ax.lines if ln.get_label().startswith("_") and ln.get_linestyle() == "--"]
    assert n_out > 0 and len(dashed) == n_out
    plt.close(ax.figure)

    sw = D.sweep(S.CommonCathode(b_plus=300, ra=100e3, rk=1.5e3, ck=22e-6, rl=470e3), t, levels=8)
    ax = PS.plot_thd_sweep(sw)
    shown = {x.get_text() for x in ax.get_legend().get_texts()}
    lo = ax.get_ylim()[0]
    for k in range(2, 6):
        reaches = np.max(100 * sw.harmonics[:, k - 1] / sw.harmonics[:, 0]) > lo
        assert (f"H{k}" in shown) == reaches, k
    # common practice: a single-ended triode stage is mostly H2, so H2 is shown and H5 is not
    assert "H2" in shown and "H5" not in shown
    plt.close(ax.figure)

    d = D.analyse(S.CommonCathode(b_plus=300, ra=100e3, rk=1.5e3, ck=22e-6, rl=470e3), t, vout_peak=10.0)
    axes = PS.plot_waveform(d)
    title = axes[0].figure.get_suptitle()
    assert "Common-cathode stage" in title and "HX:A" in title and "plate" in title
    plt.close(axes[0].figure)


def test_a_capacitor_without_its_prefix_is_an_input_error(cards):
    # rules: bad input gets a clear error naming what was wrong; 22 F behind a cathode
    # resistor is a forgotten "u" (common practice: bypass capacitors are tens of uF)
    res = run(["stage", "common-cathode", "--tube", cards["hx"], "--bplus", "300", "--ra", "100k",
               "--rk", "1.5k", "--ck", "22"])
    assert res.exit_code == 1
    assert "--ck: '22' is 22 F, not a plausible capacitor" in res.output


def test_spread_report_leaves_out_an_input_capacitance_nobody_gave(cards):
    # without the tubes' capacitances the Miller input capacitance is 0 for every unit: no
    # figure of these tubes, so the text leaves the row out; given them, it is there
    args = ["--bplus", "300", "--rk", "820", "--r-top", "820", "--rl", "100k", "--spread", cards["lot"]]
    res = run(["stage", "stack", *args])
    assert res.exit_code == 0, res.output
    assert "input capacitance" not in res.output and "mid-band gain" in res.output
    res = run(["stage", "stack", *args, "--cgk", "1.6p", "--cga", "1.7p"])
    assert res.exit_code == 0, res.output
    assert "input capacitance [pF]" in res.output
