"""The design plots of the web pages (output stage panels, frequency response, design
sweep, a stock's spread) laid out with fixed margins: nothing overlaps (tick labels,
axis labels, titles, legends, the caution), nothing leaves the figure, and log axes carry
plain labels that do not collide.

Data are INVENTED: the demo lots curves/stock_medium_mu.csv (12AU7-like, type MM) and
curves/stock_power.csv (300B-like, type PT), made by curves/make_demo.py, fitted on import
into a temporary ledger.
"""

from __future__ import annotations

from pathlib import Path

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402
import pytest  # noqa: E402

from fitter import plotting_web  # noqa: E402
from fitter.plotting_design import log_ticks, plot_response, plot_sweep  # noqa: E402

CURVES = Path(__file__).resolve().parents[1] / "curves"
SMALL = {"b_plus": "300", "rk": "1.5k", "ck": "22u"}


def _boxes(fig):
    """(name, bbox) of every text outside the axes' insides that a reader must read: the
    visible tick labels, axis labels, titles, legends and the figure's own texts."""
    fig.canvas.draw()
    r = fig.canvas.get_renderer()
    out = []
    for i, ax in enumerate(fig.axes):
        if not ax.get_visible():
            continue
        for which, axis in (("x", ax.xaxis), ("y", ax.yaxis)):
            if not axis.get_visible():  # (a twin's shared x axis)
                continue
            for t in axis.get_ticklabels(which="both"):
                if t.get_visible() and t.get_text() and _shown(t, axis, ax, which):
                    out.append((f"ax{i} {which} tick {t.get_text()}", t.get_window_extent(r)))
            lab = axis.label
            if lab.get_visible() and lab.get_text():
                out.append((f"ax{i} {which} label", lab.get_window_extent(r)))
        for t in (ax.title, ax._left_title, ax._right_title):
            if t.get_text():
                out.append((f"ax{i} title", t.get_window_extent(r)))
        leg = ax.get_legend()
        if leg is not None:
            out.append((f"ax{i} legend", leg.get_window_extent(r)))
    for k, t in enumerate(fig.texts):  # the caution, a suptitle
        if t.get_text():
            out.append((f"figure text {k} ({t.get_text()[:20]})", t.get_window_extent(r)))
    return out


def _shown(t, axis, ax, which):
    """A tick label inside the axis' span (matplotlib keeps labels of ticks off the view)."""
    lo, hi = sorted(ax.get_xlim() if which == "x" else ax.get_ylim())
    x, y = t.get_position()
    v = x if which == "x" else y
    return lo - 1e-9 * abs(lo) <= v <= hi + 1e-9 * abs(hi)


def _overlaps(a, b, pad=0.5):
    return a.x0 < b.x1 - pad and b.x0 < a.x1 - pad and a.y0 < b.y1 - pad and b.y0 < a.y1 - pad


def assert_no_overlap(fig, what, legend_inside=False):
    """Nothing overlaps; with ``legend_inside`` the legends sit inside their panels and
    no point of a drawn line falls under them."""
    boxes = _boxes(fig)
    fb = fig.bbox
    for name, b in boxes:
        assert b.x0 >= fb.x0 - 1 and b.x1 <= fb.x1 + 1 and b.y0 >= fb.y0 - 1 and b.y1 <= fb.y1 + 1, \
            f"{what}: {name} leaves the figure ({b} in {fb})"
    for i, (na, a) in enumerate(boxes):
        for nb, b in boxes[i + 1:]:
            assert not _overlaps(a, b), f"{what}: {na} overlaps {nb}"
    r = fig.canvas.get_renderer()
    # every one of them lies outside every panel: a legend covers no curve, a title or a
    # tick label runs into no neighbouring panel
    frames = [ax.get_window_extent(r) for ax in fig.axes if ax.get_visible()]
    if legend_inside:
        for ax in fig.axes:
            leg = ax.get_legend()
            if leg is None:
                continue
            lb = leg.get_window_extent(r)
            for line in ax.get_lines():
                if line.get_transform() != ax.transData:  # axhline, axvline: across the panel
                    continue
                xy = ax.transData.transform(np.column_stack(line.get_data()).astype(float))
                xy = xy[np.isfinite(xy).all(axis=1)]
                under = (xy[:, 0] > lb.x0) & (xy[:, 0] < lb.x1) & (xy[:, 1] > lb.y0) & (xy[:, 1] < lb.y1)
                assert not under.any(), f"{what}: the legend covers {line.get_label()}"
        boxes = [(n, b) for n, b in boxes if not n.endswith("legend")]
    for name, b in boxes:
        assert not any(_overlaps(b, f) for f in frames), f"{what}: {name} runs into a panel"


@pytest.mark.parametrize("lo, hi, eng, at_least", [
    (47.0, 470.0, False, 3),   # a decade: 1-2-5 labels (the collision seen was 3x10^2 next to 4x10^2)
    (300.0, 450.0, False, 2),  # under a decade, inside one
    (1.0, 1e6, True, 6),       # the frequency response: 1 .. 1M
    (0.006, 5.0, False, 3),    # output power
])
def test_log_ticks_are_plain_numbers_that_do_not_collide(lo, hi, eng, at_least):
    fig, ax = plt.subplots(figsize=(7.0, 3.0))
    try:
        x = np.geomspace(lo, hi, 20)
        ax.semilogx(x, np.log(x))
        ax.set_xlim(lo, hi)
        log_ticks(ax, "x", eng=eng)
        fig.canvas.draw()
        labels = [t for t in ax.xaxis.get_ticklabels() if t.get_text() and _shown(t, ax.xaxis, ax, "x")]
        assert len(labels) >= at_least, [t.get_text() for t in labels]
        assert not any("$" in t.get_text() for t in labels)  # plain text, no mathtext
        assert not any(t.get_text() for t in ax.xaxis.get_ticklabels(minor=True))
        r = fig.canvas.get_renderer()
        boxes = [t.get_window_extent(r) for t in labels]
        for i, a in enumerate(boxes):
            for b in boxes[i + 1:]:
                assert not _overlaps(a, b), [t.get_text() for t in labels]
        if eng:
            assert [t.get_text() for t in labels] == ["1", "10", "100", "1k", "10k", "100k", "1M"]
    finally:
        plt.close(fig)


@pytest.fixture(scope="module")
def ledger(tmp_path_factory):
    from fitter.service import stock

    db = str(tmp_path_factory.mktemp("design-plots") / "ledger.sqlite")
    stock.init(db)
    stock.add_type(db, "test", "MM", 250.0, -8.5)
    stock.import_files(db, "test", [str(CURVES / "stock_medium_mu.csv")], "MM")
    stock.add_type(db, "test", "PT", 300.0, -61.0, dual=False, pa_max=40.0)
    stock.import_files(db, "test", [str(CURVES / "stock_power.csv")], "PT")
    return db


@pytest.fixture
def captured(monkeypatch):
    """The figures the web's plot functions save, checked before they are saved."""
    seen = []
    real = plotting_web.figure_bytes

    def capture(fig, fmt="svg"):
        seen.append(fig)
        assert_no_overlap(fig, f"figure {len(seen)}")
        return real(fig, fmt)

    monkeypatch.setattr(plotting_web, "figure_bytes", capture)
    return seen


@pytest.mark.parametrize("kind, circuit, tubes, loads", [
    ("push-pull", {"b_plus": "300", "load": "5k", "grid_bias": "-61", "pa_max": "40"},
     {"tube_a": "PT-01", "tube_b": "PT-04"}, None),
    ("single-ended", {"b_plus": "300", "load": "3k", "grid_bias": "-61", "pa_max": "40", "rs": "10k",
                      "c_in": "100n", "rg": "100k", "l_primary": "20", "l_leak": "10m"},
     {"tube": "PT-02"}, "1.5k,2k,3k,5k,8k"),
])
def test_output_panels_and_response_overlap_nothing(ledger, captured, kind, circuit, tubes, loads):
    from fitter.service import web_design

    run = web_design.output_run(ledger, kind, circuit, tubes, loads=loads, level=2, response=True)
    panels = plotting_web.output_panels(run, "svg")
    assert len(captured) == len(panels) == 2 + (kind == "push-pull") + (loads is not None)
    svg = plotting_web.response_svg(run.frequency)
    for b in panels + [svg]:
        assert b.startswith(b"<?xml") and b"<text" in b  # text kept as text
        assert b"CAUTION" in b


@pytest.mark.parametrize("vary, start, stop, log, tube_type", [
    ("ra", "47k", "470k", True, None),
    ("ra", "47k", "470k", True, "MM"),
    ("ck", "1u", "1000u", True, None),
    ("rk", "470", "4.7k", False, None),
])
def test_sweep_plots_overlap_nothing(ledger, captured, vary, start, stop, log, tube_type):
    from fitter.service import web_design

    circuit = dict(SMALL, ra="100k")
    circuit.pop(vary, None)
    sw = web_design.sweep_run(ledger, "common-cathode", vary, start, stop, 7, log, circuit,
                              None if tube_type else {"tube": "MM-02:A"}, tube_type)
    svg = plotting_web.sweep_svg(sw)
    assert len(captured) == 1 and b"CAUTION" in svg


def test_spread_plot_overlaps_nothing(ledger, captured):
    from fitter.service import web_design

    out = web_design.spread_report(ledger, "common-cathode", dict(SMALL, ra="100k"), "MM")
    assert len(captured) == 1 and b"CAUTION" in out["plot_svg"]


def test_plots_with_their_own_figures_keep_fixed_margins(ledger):
    """The command line's plots (saved by the same functions, without the web's SVG
    settings) overlap nothing either."""
    from fitter.service import web_design

    run = web_design.output_run(ledger, "single-ended", {"b_plus": "300", "load": "3k", "grid_bias": "-61"},
                                {"tube": "PT-03"}, response=True)
    axes = plot_response(run.frequency)
    try:
        assert_no_overlap(axes[0].figure, "response")
    finally:
        plt.close(axes[0].figure)
    from fitter.plotting_output import plot_output

    for kind, circuit, tubes in (("single-ended", {"b_plus": "300", "load": "3k", "grid_bias": "-61"}, {"tube": "PT-03"}),
                                 ("push-pull", {"b_plus": "300", "load": "5k", "grid_bias": "-61"},
                                  {"tube_a": "PT-02", "tube_b": "PT-03"})):
        run = web_design.output_run(ledger, kind, circuit, tubes, loads="3k,5k,8k")
        axes = plot_output(run)
        try:
            assert len(axes) == 3 + (kind == "push-pull")
            assert_no_overlap(axes[0].figure, f"{kind} output stage")
        finally:
            plt.close(axes[0].figure)
    sw = web_design.sweep_run(ledger, "common-cathode", "ra", "47k", "470k", 5, True, SMALL, {"tube": "MM-03:B"})
    axes = plot_sweep(sw, ["gain", "ia", "zout"])
    try:
        assert_no_overlap(axes[0, 0].figure, "sweep of three figures")
    finally:
        plt.close(axes[0, 0].figure)


@pytest.mark.parametrize("kind, circuit, tubes", [
    ("common-cathode", dict(SMALL, ra="100k"), {"tube": "MM-02:A"}),
    ("stack", {"b_plus": "300", "r_top": "1.5k", "rk": "1.5k"}, {"bottom": "MM-03:A", "top": "MM-03:B"}),
])
def test_stage_page_plots_overlap_nothing(ledger, monkeypatch, kind, circuit, tubes):
    """The stage page's load lines (one panel a tube, legends under them) and THD sweep."""
    import fitter.plotting_stage as PS
    from fitter.service import web_support

    real, seen = PS._save, []

    def save(fig, path):
        seen.append(fig)
        assert_no_overlap(fig, f"stage figure {len(seen)}", legend_inside=len(seen) == 2)  # THD: inside
        return real(fig, path)

    monkeypatch.setattr(PS, "_save", save)
    out = web_support.stage_report(ledger, kind, circuit, thd=True, **tubes)
    assert len(seen) == 2 and out["plot_svg"] and out["thd_svg"]


def test_output_load_line_legends_say_what_their_slopes_add_up(ledger):
    """The single-ended AC load line's slope is the reflected load plus the primary's DC
    resistance (plus an unbypassed cathode resistor): the legend says so, with the total the
    line is drawn with (Ohm's law on an ideal transformer's primary, common practice)."""
    from fitter.plotting_output import plot_output
    from fitter.service import web_design

    run = web_design.output_run(ledger, "single-ended", {"b_plus": "380", "load": "3200", "r_primary": "150",
                                                         "rk": "700", "bypassed": "no"}, {"tube": "PT-03"})
    axes = plot_output(run)
    try:
        assert_no_overlap(axes[0].figure, "single-ended, unbypassed")
        lines = {ln.get_label(): ln for ln in axes[0].get_lines()}
        ac = [k for k in lines if k.startswith("AC load line")]
        assert ac == ["AC load line 4050 ohm =\nreflected load 3200 + primary DC resistance 150\n+ unbypassed Rk 700"]
        x, y = lines[ac[0]].get_data()
        assert np.allclose(np.diff(x) / np.diff(y / 1e3), -(3200 + 150 + 700), rtol=1e-9)  # the slope drawn
        assert "DC load line 850 ohm =\nprimary DC resistance 150 + Rk 700" in lines
    finally:
        plt.close(axes[0].figure)
    run = web_design.output_run(ledger, "single-ended", {"b_plus": "300", "load": "3k", "grid_bias": "-61"},
                                {"tube": "PT-03"})
    axes = plot_output(run)
    try:
        labels = [ln.get_label() for ln in axes[0].get_lines()]
        assert "AC load line: reflected load, 3000 ohm" in labels  # no primary resistance given
    finally:
        plt.close(axes[0].figure)
    run = web_design.output_run(ledger, "push-pull", {"b_plus": "400", "load": "5k", "r_primary": "200",
                                                      "rk": "500"}, {"tube_a": "PT-02", "tube_b": "PT-03"})
    axes = plot_output(run)
    try:
        assert_no_overlap(axes[0].figure, "push-pull, shared cathode")
        labels = [ln.get_label() for ln in axes[0].get_lines()]
        # per side, for equal currents: half the primary and the shared resistor carrying both
        assert "DC load line per side 1100 ohm =\nhalf primary DC resistance 100 + 2 x shared Rk 1000" in labels
    finally:
        plt.close(axes[0].figure)
