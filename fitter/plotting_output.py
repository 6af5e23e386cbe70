"""Plots of an output stage (matplotlib, Agg): the load lines and full-output swing on the
tube's plate curves, and H2, H3, THD against output power (and the reflected-load sweep).

They draw the figures of :mod:`fitter.stage.output` and compute no circuit figures of their
own (the swing comes from :func:`fitter.stage.output.waveforms`).
"""

from __future__ import annotations

from pathlib import Path

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402

from . import CAUTION  # noqa: E402
from .plotting_layout import LEGEND_GAP, legend_height, log_ticks, margins  # noqa: E402,F401
from .plotting_layout import save_figure as _save  # noqa: E402
from .stage.output import composite_characteristic, waveforms  # noqa: E402

__all__ = ["plot_output", "save_output_plot"]


def _nice_step(x):
    """A 1-2-5 step near x."""
    e = 10 ** np.floor(np.log10(x))
    for m in (1, 2, 5, 10):
        if m * e >= x:
            return m * e
    return 10 * e


def _curves(ax, tube, vgk0, va_max, ia_top) -> bool:
    """The tube's model curves; solid where it was measured, dotted beyond (the model
    extrapolates there).  True when some part is dotted."""
    step = _nice_step(abs(vgk0) / 6 if vgk0 < 0 else 5.0)
    vgs = np.arange(0.0, 2.0 * min(vgk0, -step) - 1e-9, -step)
    va = np.linspace(0.0, va_max, 300)
    cmap = plt.get_cmap("viridis")
    env = getattr(tube, "envelope", None)
    dotted = False
    for i, vg in enumerate(vgs):
        ia = 1e3 * tube.current(va, vg)
        c = cmap(0.1 + 0.75 * i / max(len(vgs) - 1, 1))
        ok = env.covers(va, vg, ia / 1e3) if env is not None else np.ones(va.shape, bool)
        if ok.all():
            ax.plot(va, ia, "-", lw=0.9, color=c, alpha=0.85)
        else:
            dotted = True
            # (each run of measured points drawn solid; the points around a change join both)
            edge = ok | np.r_[ok[1:], False] | np.r_[False, ok[:-1]]
            ax.plot(va, np.where(edge, ia, np.nan), "-", lw=0.9, color=c, alpha=0.85)
            ax.plot(va, np.where(ok, np.nan, ia), ":", lw=0.9, color=c, alpha=0.7)
        j = np.flatnonzero(ia <= 0.97 * ia_top)
        if j.size and ia[j[-1]] > 0.02 * ia_top:
            k = j[-1]
            ax.annotate(f"{vg:g} V", (va[k], ia[k]), xytext=(-2, 1), textcoords="offset points",
                        ha="right", va="bottom", fontsize=7, color=c,
                        bbox=dict(boxstyle="round,pad=0.1", fc="white", ec="none", alpha=0.7))
    return dotted


def plot_output(run, axes=None):
    """Draw the output stage of ``run`` (:class:`fitter.service.output.OutputRun`, or an
    :class:`~fitter.stage.output.OutputResult` with its tubes in ``run.tubes_fitted``)."""
    res = run.result
    sweep = run.sweep
    st = res.stage
    tubes = res.fitted
    f = res.figures
    se0 = res.stage.kind == "single-ended"
    n = 2 + (sweep is not None) + (not se0)
    own = axes is None
    if own:
        # four panels in two rows (each stays wide enough to read); legends sit under their
        # panel, where they cover no curve and no label
        rows, cols = (2, 2) if n == 4 else (1, n)
        fig, axes = plt.subplots(rows, cols, figsize=(6.6 * cols, 6.0 * rows), squeeze=False)
        axes = list(axes.ravel())
    fig = axes[0].figure
    ax = axes[0]
    se = st.kind == "single-ended"
    vin = f["vin_max"] * np.sin(2 * np.pi * np.arange(257) / 256)
    w = waveforms(st, *tubes, vin=vin)
    va_max = 1.15 * max(float(np.max(w[f"{p}.va"])) for p in st.positions)
    ia_top = 1.15e3 * max(float(np.max(w[f"{p}.ia"])) for p in st.positions)
    pos0 = st.positions[0]
    dotted = _curves(ax, tubes[0], res.op[f"{pos0}.vgk"], va_max, ia_top)
    va = np.linspace(0.0, va_max, 300)
    if st.pa_max:
        ax.plot(va[1:], 1e3 * st.pa_max / va[1:], color="crimson", lw=1.0, ls="-.",
                label=f"Pa max {st.pa_max:g} W")
    rk = 0.0 if st.rk is None else st.rk
    r_dc = (st.r_primary if se else st.r_primary / 2) + rk * (1 if se else 2)
    # DC load line: B+ through the primary (and the cathode resistor, both tubes' current
    # for push-pull: drawn for equal currents)
    if r_dc > 0:
        i_dc = np.linspace(0, ia_top / 1e3, 50)
        ax.plot(st.b_plus - r_dc * i_dc, 1e3 * i_dc, color="0.35", lw=1.2, ls="--", label=dc_load_label(st))
    else:
        ax.axvline(st.b_plus, color="0.35", lw=1.2, ls="--", label="DC load line (no resistance)")
    if se:
        # plate-cathode voltage against current: an unbypassed cathode resistor adds its slope
        r_ac = _ac_parts(st)[0]
        i = np.linspace(0, ia_top / 1e3, 50)
        i0, v0 = res.op["tube.ia"], res.op["tube.va"]
        ax.plot(v0 - r_ac * (i - i0), 1e3 * i, color="tab:red", lw=1.2, label=ac_load_label(st))
        ax.plot(w["tube.va"], 1e3 * w["tube.ia"], color="tab:red", lw=4.5, alpha=0.35,
                label=f"swing at {f['p_max']:.3g} W")
    else:
        colours = {"A": "tab:red", "B": "tab:blue"}
        for p, t in zip(st.positions, res.tubes):
            ax.plot(w[f"{p}.va"], 1e3 * w[f"{p}.ia"], color=colours[p], lw=3.0, alpha=0.55,
                    label=f"tube {p} ({t}) at {f['p_max']:.3g} W")
        ax.plot([], [], " ", label=f"curves: tube A; load {st.reflected_load:.4g} ohm plate to plate")
    for p in st.positions:
        ax.plot(res.op[f"{p}.va"], 1e3 * res.op[f"{p}.ia"], "o", color="k", ms=5, zorder=5)
    ax.plot([], [], "o", color="k", ms=5, label="operating point")
    if dotted:
        ax.plot([], [], ":", color="0.4", lw=0.9, label="curves beyond the measured\ndata (extrapolated)")
    ax.set_xlim(0, va_max)
    ax.set_ylim(0, ia_top)
    ax.set_xlabel("plate-cathode voltage Va [V]")
    ax.set_ylabel("plate current Ia [mA]")
    ax.set_title(f"{st.kind} output stage: B+ {st.b_plus:g} V, {res.tubes[0]}"
                 + ("" if se else f" / {res.tubes[1]}"), fontsize=10, y=1.0)
    _legend_below(ax)
    ax.grid(alpha=0.3)

    ax = axes[1]
    s = res.sweep
    p = s.power
    ax.loglog(p, 100 * s.thd, "-o", ms=3, lw=5.0, color="0.25", alpha=0.35, label="THD (H2..H10)")
    for k, (c, name) in {1: ("tab:blue", "H2"), 2: ("tab:orange", "H3")}.items():
        h = 100 * s.h[:, k] / s.h[:, 0]
        ok = h > 1e-5
        if np.any(ok):
            ax.loglog(p[ok], h[ok], "-", lw=1.4, color=c, label=name)
    lo = max(1e-3, 0.3 * float(np.min(100 * s.thd[s.thd > 0]))) if np.any(s.thd > 0) else 1e-3
    ax.axhline(100 * f["thd_target"], color="crimson", ls=":", lw=1.0, label=f"{100 * f['thd_target']:g} % THD")
    if f["p_thd"] is not None:
        ax.axvline(f["p_thd"], color="crimson", ls="--", lw=1.0, label=f"{f['p_thd']:.3g} W at {100 * f['thd_target']:g} %")
    if not se and f.get("class") == "AB":
        ax.axvline(f["p_class_a"], color="tab:green", ls="--", lw=1.0, label=f"end of class A {f['p_class_a']:.3g} W")
    ax.annotate(f"ends at {f['p_max']:.3g} W: {f['limit']}", (p[-1], 100 * s.thd[-1]), xytext=(-8, 10),
                textcoords="offset points", ha="right", fontsize=8)
    ax.set_ylim(lo, max(3.0 * float(np.max(100 * s.thd)), 2 * 100 * f["thd_target"]))
    ax.set_xlabel("output power [W]")
    ax.set_ylabel("distortion [% of fundamental]")
    ax.set_title("harmonics against output power (quasi-static, mid-band)", fontsize=10, y=1.0)
    _legend_below(ax)
    ax.grid(alpha=0.3, which="both")

    if not se:
        ax = axes[2]
        q = st.reflected_load / 4.0
        vmax = 1.1 * float(np.max(np.abs(w["v_load"]))) / 2.0
        v = np.linspace(-vmax, vmax, 201)
        drives = np.linspace(-f["vin_max"], f["vin_max"], 9)
        ic = composite_characteristic(st, *tubes, drives=drives, v=v)
        # (a dark-ended map: the middle curves of a diverging one are too pale to read)
        cmap = plt.get_cmap("viridis")
        for i, (e, row) in enumerate(zip(drives, ic)):
            c = cmap(0.9 * i / (len(drives) - 1))
            ax.plot(v, 1e3 * row, color=c, lw=1.0)
            ax.annotate(f"{e:+.0f} V", (v[-1], 1e3 * row[-1]), xytext=(2, 0), textcoords="offset points",
                        fontsize=7, va="center", color=c, annotation_clip=False)
        imb = f["imbalance"]
        ax.plot(v, 1e3 * (v / q + imb), color="k", lw=1.6, label=f"load line Raa/4 = {q:.4g} ohm")
        ax.plot(w["v_load"] / 2.0, 1e3 * (w["A.ia"] - w["B.ia"]), color="tab:red", lw=4.0, alpha=0.35,
                label=f"swing at {f['p_max']:.3g} W")
        ax.set_xlabel("half-primary voltage v [V] (plate A at B+ - v)")
        ax.set_ylabel("composite current IA - IB [mA]")
        ax.set_title("composite characteristic (grid drive per curve)", fontsize=10, y=1.0)
        _legend_below(ax)
        ax.grid(alpha=0.3)
    if sweep is not None:
        ax = axes[-1]
        ax.plot(sweep.load, sweep.p_max, "-o", color="tab:red", ms=4, label="largest output [W]")
        ok = np.isfinite(sweep.p_thd)
        if np.any(ok):
            ax.plot(sweep.load[ok], sweep.p_thd[ok], "-s", color="tab:purple", ms=4,
                    label=f"output at {100 * sweep.thd_target:g} % THD [W]"
                    + ("" if ok.all() else " (missing: THD stays below it)"))
        ax.set_xlabel("reflected load [ohm]")
        ax.set_ylabel("output power [W]")
        ax2 = ax.twinx()
        ok = np.isfinite(sweep.thd_at)
        ax2.plot(sweep.load[ok], 100 * sweep.thd_at[ok], "--^", color="0.3", ms=4,
                 label=f"THD at {sweep.level:g} W [%]")
        ax2.set_ylabel("THD [%]")
        lines = ax.get_legend_handles_labels()
        l2 = ax2.get_legend_handles_labels()
        _legend_below(ax, lines[0] + l2[0], lines[1] + l2[1])
        ax.set_title("reflected-load sweep", fontsize=10, y=1.0)
        ax.grid(alpha=0.3)
    fig.text(0.01, 0.005, CAUTION, fontsize=7, color="0.3")
    if own:
        # fixed margins (a layout engine would draw the figure once more): under each row
        # its tallest legend; between the columns the twin THD axis, the drive labels
        legends = [legend_height(a) for a in axes]
        per_row = [max(legends[r * cols:(r + 1) * cols]) for r in range(rows)]
        margins(fig, left=0.8, right=0.8, top=0.4, bottom=LEGEND_GAP + per_row[-1] + 0.25, wspace=1.6,
                hspace=LEGEND_GAP + per_row[0] + 0.45)
        log_ticks(axes[1], "x")
        log_ticks(axes[1], "y")
    return axes  # given axes: their figures' layout is the caller's (plotting_web.output_panels)


def _sum_label(what: str, parts: list) -> str:
    """``what`` with its resistance and the parts it adds up (one line per two parts)."""
    total = sum(v for _, v in parts)
    if len(parts) == 1:
        return f"{what}: {parts[0][0]}, {total:.4g} ohm"
    terms = [f"{name} {v:.4g}" for name, v in parts]
    rows = [" + ".join(terms[k:k + 2]) for k in range(0, len(terms), 2)]
    return f"{what} {total:.4g} ohm =\n" + "\n+ ".join(rows)


def _ac_parts(st):
    """The single-ended AC load line's slope [ohm] and its parts: the plate sees the
    reflected load, the primary's DC resistance in series and an unbypassed cathode resistor
    (:mod:`fitter.stage.output`)."""
    parts = [("reflected load", st.reflected_load)]
    if st.r_primary:
        parts.append(("primary DC resistance", st.r_primary))
    if st.rk and not st.bypassed:
        parts.append(("unbypassed Rk", st.rk))
    return sum(v for _, v in parts), parts


def ac_load_label(st) -> str:
    """The legend of a single-ended stage's AC load line: its slope and what it adds up."""
    return _sum_label("AC load line", _ac_parts(st)[1])


def dc_load_label(st) -> str:
    """The legend of the DC load line: its resistance and what it adds up (a push-pull's per
    side, drawn for equal currents: half the primary and the shared cathode resistor
    carrying both tubes' current)."""
    se = st.kind == "single-ended"
    parts = []
    if st.r_primary:
        parts.append(("primary DC resistance" if se else "half primary DC resistance",
                      st.r_primary if se else st.r_primary / 2))
    if st.rk:
        parts.append(("Rk" if se else "2 x shared Rk", st.rk if se else 2 * st.rk))
    return _sum_label("DC load line" + ("" if se else " per side"), parts)


def _legend_below(ax, handles=None, labels=None):
    """The legend under the axes (outside them): it covers no curve, label or grid value."""
    if handles is None:
        handles, labels = ax.get_legend_handles_labels()
    from matplotlib.transforms import ScaledTranslation

    # anchored a fixed distance under the axes (not a fraction of their height), so a
    # fixed bottom margin of LEGEND_GAP + legend_height() holds it
    below = ax.transAxes + ScaledTranslation(0, -LEGEND_GAP, ax.figure.dpi_scale_trans)
    ax.legend(handles, labels, fontsize=8, loc="upper center", bbox_to_anchor=(0.5, 0.0),
              bbox_transform=below, ncol=2, frameon=False, borderaxespad=0.0)


def save_output_plot(run, path) -> Path:
    """Save :func:`plot_output` to a PNG file; returns the path written."""
    axes = plot_output(run)
    return _save(axes[0].figure, path)
