"""Plots of stage analyses: load lines on the plate curves, THD against level, and the
distortion waveform.  The only stage module importing matplotlib (Agg backend)."""

from __future__ import annotations

from pathlib import Path

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402

from .stage import (CAUTION, CommonCathode, StageResult, Stack,  # noqa: E402
                    output_node, stage_title, tube_positions)
from .stage.distortion import Distortion, DistortionSweep  # noqa: E402
from .stage.loadlines import load_lines  # noqa: E402
from .stage.results import _eng as _eng_unit  # noqa: E402
from .plotting_layout import LEGEND_GAP, legend_height, log_ticks, margins  # noqa: E402
from .plotting_layout import save_figure as _save  # noqa: E402
from .units import format_value  # noqa: E402
from matplotlib.transforms import ScaledTranslation  # noqa: E402

__all__ = ["plot_load_lines", "save_load_line_plot", "plot_thd_sweep", "save_thd_plot",
           "plot_waveform", "save_waveform_plot"]


_NODE_TEXT = {"plate": "the plate", "cathode": "the cathode", "cathode_top": "the top cathode",
              "plate_bottom": "the bottom plate"}


def _node_text(stage) -> str:
    """The output node in words ("the plate", "the top cathode", ...)."""
    node = output_node(stage)
    return _NODE_TEXT.get(node, node.replace("_", " "))


def _tubes_text(stage, triodes) -> str:
    """The tube(s) of a stage: "HM-01:A" or "bottom MM-01:A, top MM-01:B"."""
    positions = tube_positions(stage)
    if len(positions) == 1:
        return triodes[0].label
    return " and ".join(f"{p} {t.label}" for p, t in zip(positions, triodes))


def _plate_curves(ax, pc, ia_top, pa_max=None):
    """Draw the plate-curve family ``pc`` (:class:`fitter.stage.loadlines.PlateCurves`) and
    the curve through the operating point.

    Curves outside the card's fitted grid range are dashed and lighter, with one
    legend note.  Each curve is labelled in volts where it leaves the plot (top or
    right edge); a label that would sit on the Pa-max hyperbola moves down the curve
    to just below it.

    Returns the grid step [V].
    """
    va = pc.va
    cmap = plt.get_cmap("viridis")
    top = np.full_like(va, 0.97 * ia_top)
    pa_ma = 1e3 * pa_max / np.maximum(va, 1e-9) if pa_max else None
    box = dict(boxstyle="round,pad=0.1", fc="white", ec="none", alpha=0.75)
    n = len(pc.vg)
    for i, (vg, row, out) in enumerate(zip(pc.vg, pc.ia, pc.extrapolated)):
        ia = 1e3 * row
        c = cmap(0.15 + 0.7 * i / max(n - 1, 1))
        ax.plot(va, ia, "--" if out else "-", lw=0.9, color=c, alpha=0.5 if out else 0.9)
        inside = np.flatnonzero(ia <= top)
        if pa_ma is not None and inside.size:
            j = inside[-1]
            if abs(ia[j] - pa_ma[j]) < 0.08 * ia_top:  # the label would sit on the Pa-max line
                inside = np.flatnonzero(ia <= np.minimum(top, 0.85 * pa_ma))
        text = f"{vg:g} V"
        kw = dict(fontsize=7, color=c, alpha=0.7 if out else 1.0, textcoords="offset points", bbox=box)
        if inside.size and inside[-1] < va.size - 1:
            j = inside[-1]
            ax.annotate(text, (va[j], ia[j]), xytext=(-2, 1), ha="right", va="bottom", **kw)
        elif inside.size:
            ax.annotate(text, (va[-1], ia[-1]), xytext=(2, 0), va="center", annotation_clip=False, **kw)
    # the curve through the operating point, highlighted
    note = ", extrapolated" if pc.q_extrapolated else ""
    ax.plot(va, 1e3 * pc.ia_q_curve, ":", lw=1.4, color="0.3", label=f"Vgk = {pc.vg_q:.3g} V (operating point{note})")
    if np.any(pc.extrapolated):
        lo, hi = pc.fitted_vg
        ax.plot([], [], "--", lw=0.9, color="0.55",
                label=f"dashed curves: extrapolated\n(fitted data cover Vgk {lo:g}..{hi:g} V)")
    return pc.step


def _eng(x):
    return format_value(float(x))


def plot_load_lines(result: StageResult, axes=None):
    """Plate curves of each tube with its DC and AC load lines and the operating point.

    For a common-cathode stage or cathode follower the DC line is ``Ra + Rk`` and the
    AC line ``Ra || RL`` (plus the unbypassed Rk) through the operating point; for a
    stack each tube is drawn with the locus its load (the other tube and the
    resistors) imposes, for DC bias changes and for the mid-band signal.  The thick
    part of the AC line is the swing up to grid-current onset or cutoff.

    Parameters
    ----------
    result : StageResult
    axes : sequence of Axes, optional
        One per tube position.

    Returns
    -------
    list of Axes
    """

    st = result.stage
    triodes = result.triodes
    positions = tube_positions(st)
    f = result.figures
    own = axes is None
    if own:
        fig, axes = plt.subplots(1, len(positions), figsize=(7.5 * len(positions), 7.0), squeeze=False)
        axes = list(axes[0])
    fig = axes[0].figure
    data = load_lines(result)
    A = data.swing_vin_peak
    for ax, ln, t in zip(axes, data.lines, triodes):
        pos = ln.position
        va_q, ia_q = ln.va_q, 1e3 * ln.ia_q
        va_max, ia_top = ln.va_max, 1e3 * ln.ia_max
        step = _plate_curves(ax, ln.curves, ia_top, st.pa_max)
        if ln.dc_resistance is not None:
            ax.plot(ln.dc_va, 1e3 * ln.dc_ia, "-", color="tab:blue", lw=1.8,
                    label=f"DC load line ({_eng(ln.dc_resistance)} = Ra + Rk)" if isinstance(st, CommonCathode)
                    else f"DC load line ({_eng(ln.dc_resistance)})")
            ax.plot(ln.ac_va, 1e3 * ln.ac_ia, "--", color="tab:orange", lw=1.3,
                    label=f"AC load line ({_eng(ln.ac_resistance)})")
        else:
            ax.plot(ln.dc_va, 1e3 * ln.dc_ia, "-", color="tab:blue", lw=1.8,
                    label=_stack_dc_label(st, pos))
            ax.plot(ln.ac_va, 1e3 * ln.ac_ia, "--", color="tab:orange", lw=1.3,
                    label="AC load: path of the mid-band signal")
        ax.plot(ln.swing_va, 1e3 * ln.swing_ia, "-", color="tab:red", lw=3.2, alpha=0.75,
                label=f"swing to {data.swing_limit} (±{A:.3g} V in)")
        if st.pa_max:
            v = np.linspace(max(st.pa_max / (ia_top * 1e-3), 1.0), va_max, 200)
            ax.plot(v, 1e3 * st.pa_max / v, "-.", color="crimson", lw=1.0, label=f"Pa max {st.pa_max:g} W")
        ax.plot([va_q], [ia_q], "o", ms=9, color="black", zorder=5,
                label=f"Q: Va {va_q:.4g} V, Ia {ia_q:.3g} mA")
        ax.set_xlim(0.0, va_max)
        ax.set_ylim(0.0, ia_top)
        ax.set_xlabel("plate-cathode voltage Va [V]")
        ax.set_ylabel("plate current Ia [mA]")
        who = "" if pos == "tube" else f"{pos} tube "
        ax.set_title(f"{who}{t.label} ({t.model.name}); curves every {step:g} V of Vgk", fontsize=10, y=1.0)
        ax.grid(True, alpha=0.3)
        handles, labels = ax.get_legend_handles_labels()
        # load lines and the operating point first, the curve notes last
        order = sorted(range(len(labels)), key=lambda k: (labels[k].startswith("Q:") + 2 * labels[k].startswith("Vgk =")
                                                     + 3 * labels[k].startswith("dashed")))
        # under the axes, a fixed distance below them (see plotting_output._legend_below)
        ax.legend([handles[k] for k in order], [labels[k] for k in order], fontsize=7.5,
                  loc="upper center", bbox_to_anchor=(0.5, 0.0), ncol=2, frameon=False, borderaxespad=0.0,
                  bbox_transform=ax.transAxes + ScaledTranslation(0, -LEGEND_GAP, fig.dpi_scale_trans))
    fig.suptitle(f"{stage_title(st)}: gain {f['gain']:.4g} at {_node_text(st)}, "
                 f"zout {_eng_unit(f['zout'], 'ohm')}", fontsize=11)
    fig.text(0.01, 0.005, CAUTION, fontsize=7, color="0.3")
    if own:
        # fixed margins (a layout engine would draw the figure once more): the legends'
        # height counted from their entries, the curve labels at the right edge beside it
        legend = max(legend_height(ax) for ax in axes)
        margins(fig, left=0.8, right=0.5, top=0.75, bottom=LEGEND_GAP + legend + 0.2, wspace=1.0)
    else:
        fig.tight_layout(rect=(0, 0.03, 1, 0.96))
    return axes


def _stack_dc_label(st: Stack, pos: str) -> str:
    """Legend text of a stack tube's DC locus, in plain words."""
    rest = "R-top + R-mid" if st.r_mid else "R-top"
    load = f"top tube + {rest}" if pos == "bottom" else f"{rest} + bottom tube"
    return f"DC load: Q as the bottom grid bias varies\n(load = {load})"


def save_load_line_plot(result: StageResult, path) -> Path:
    """Save :func:`plot_load_lines` to a PNG file."""
    axes = plot_load_lines(result)
    return _save(axes[0].figure, path)


def plot_thd_sweep(sw: DistortionSweep, ax=None):
    """THD and the low harmonics [%] against output level [V peak], log-log, with the
    THD threshold, the headroom and the end of the sweep marked."""

    own = ax is None
    if own:
        _, ax = plt.subplots(figsize=(8.0, 5.6))
        # fixed margins (a layout engine would draw the figure once more): a two-line title
        margins(ax.figure, left=0.85, right=0.3, top=0.65, bottom=0.7)
    vo = sw.vout_peak
    lo = max(1e-4, 0.3 * float(np.min(100 * sw.thd)))
    # THD wide and translucent underneath, so a harmonic that carries nearly all of it
    # (H2 of a single-ended triode) stays visible on top
    ax.loglog(vo, 100 * sw.thd, "-o", ms=4, lw=6.0, color="0.25", alpha=0.35, zorder=2,
              solid_capstyle="round", label="THD (H2..H10)")
    styles = {2: ("tab:blue", "-"), 3: ("tab:orange", "-"), 4: ("tab:green", "--"), 5: ("tab:purple", "--")}
    for k, (c, ls) in styles.items():
        h = 100 * sw.harmonics[:, k - 1] / sw.harmonics[:, 0]
        ok = h > 1e-6
        if np.any(h > lo):  # harmonics that never reach the plotted range are left out
            ax.loglog(vo[ok], h[ok], ls, lw=1.3, color=c, zorder=3, label=f"H{k}")
    ax.axhline(100 * sw.thd_limit, color="crimson", ls=":", lw=1.2, label=f"threshold {100 * sw.thd_limit:g} %")
    ax.axvline(sw.headroom_vout_peak, color="crimson", ls="--", lw=1.0,
               label=f"headroom {sw.headroom_vout_peak:.3g} V peak ({sw.headroom_vout_peak / np.sqrt(2):.3g} V rms)")
    ax.annotate(f"sweep ends: {sw.limit.reason}", (vo[-1], 100 * sw.thd[-1]), xytext=(-10, 12),
                textcoords="offset points", ha="right", fontsize=8)
    ax.set_ylim(lo, max(3.0 * float(np.max(100 * sw.thd)), 2 * 100 * sw.thd_limit))
    ax.set_xlabel("output fundamental [V peak]")
    ax.set_ylabel("distortion [% of fundamental]")
    ax.set_title(f"{stage_title(sw.stage)} with {_tubes_text(sw.stage, sw.triodes)}, output at {_node_text(sw.stage)}:\n"
                 "THD against output level (quasi-static, mid-band)", fontsize=10, y=1.0)
    ax.grid(True, which="both", alpha=0.3)
    ax.legend(fontsize=8, loc="upper left")
    ax.figure.text(0.01, 0.005, CAUTION, fontsize=7, color="0.3")
    if own:
        log_ticks(ax, "x")
        log_ticks(ax, "y")
    else:
        ax.figure.tight_layout(rect=(0, 0.03, 1, 1))
    return ax


def save_thd_plot(sw: DistortionSweep, path) -> Path:
    """Save :func:`plot_thd_sweep` (see :func:`_save`); returns the path written."""
    ax = plot_thd_sweep(sw)
    return _save(ax.figure, path)


def plot_waveform(d: Distortion, axes=None):
    """One period of the output against an undistorted sine of the same fundamental,
    and the harmonics H2..H10 in dB re the fundamental."""
    if axes is None:
        _, axes = plt.subplots(1, 2, figsize=(11.0, 4.6), gridspec_kw={"width_ratios": [1.6, 1]})
    ax, axh = axes
    deg = np.degrees(d.theta)
    ax.plot(deg, d.vout, "-", lw=2.0, color="black", label="output (AC)")
    ref = d.vout_peak * np.sign(d.gain) * np.sin(d.theta) + d.dc_shift
    ax.plot(deg, ref, "--", lw=1.0, color="tab:blue", label="pure fundamental")
    ax.set_xlabel("phase of the input sine [deg]")
    ax.set_ylabel("output [V]")
    ax.set_xlim(0, 360)
    ax.grid(True, alpha=0.3)
    ax.legend(fontsize=8)
    ax.set_title(f"{d.vin_peak:.3g} V peak in, {d.vout_peak:.3g} V peak out, THD {100 * d.thd:.3g} %", fontsize=10)
    ax.figure.suptitle(f"{stage_title(d.stage)} with {_tubes_text(d.stage, d.triodes)}, "
                       f"output at {_node_text(d.stage)}", fontsize=11)
    db = d.harmonics_db()
    n = np.arange(2, 2 + db.size)
    floor = -140.0
    axh.bar(n, np.maximum(db, floor) - floor, bottom=floor, color="tab:orange")
    axh.set_xticks(n)
    axh.set_xlabel("harmonic")
    axh.set_ylabel("dB re fundamental")
    axh.set_ylim(floor, 0)
    axh.grid(True, axis="y", alpha=0.3)
    axh.figure.text(0.01, 0.005, CAUTION, fontsize=7, color="0.3")
    axh.set_title("harmonics of the output", fontsize=10)
    axh.figure.tight_layout(rect=(0, 0.04, 1, 0.97))
    return axes


def save_waveform_plot(d: Distortion, path) -> Path:
    """Save :func:`plot_waveform` (see :func:`_save`); returns the path written."""
    axes = plot_waveform(d)
    return _save(axes[0].figure, path)
