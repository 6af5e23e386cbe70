"""Plots of stage analyses: load lines on the plate curves, THD against level, and the
distortion waveform.  The only stage module importing matplotlib (Agg backend)."""

from __future__ import annotations

from pathlib import Path

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402

from .distortion import Distortion, DistortionSweep, drive_limit  # noqa: E402
from .stage import (CAUTION, CathodeFollower, CommonCathode, StageResult, Stack,  # noqa: E402
                    operating_point, quasi_static, stage_title, tube_positions)
from .stage import _eng as _eng_unit  # noqa: E402
from .units import format_value  # noqa: E402

__all__ = ["plot_load_lines", "save_load_line_plot", "plot_thd_sweep", "save_thd_plot",
           "plot_waveform", "save_waveform_plot"]


def _nice_step(span: float, most: int = 12) -> float:
    for s in (0.1, 0.2, 0.25, 0.5, 1.0, 2.0, 2.5, 5.0, 10.0, 20.0, 25.0, 50.0, 100.0):
        if span / s <= most:
            return s
    return 200.0


def _plate_curves(ax, triode, va_max, ia_top, vgk_q, mu):
    """Draw the plate-curve family; returns the grid step."""
    vg_cut = -va_max / max(mu, 0.5)
    step = _nice_step(abs(vg_cut), 11)
    va = np.linspace(0.0, va_max, 400)
    grids = np.arange(0.0, vg_cut - step, -step)
    cmap = plt.get_cmap("viridis")
    for i, vg in enumerate(grids):
        ia = 1e3 * triode.current(va, np.full_like(va, vg))
        c = cmap(0.15 + 0.7 * i / max(len(grids) - 1, 1))
        ax.plot(va, ia, "-", lw=0.9, color=c, alpha=0.9)
        inside = np.flatnonzero(ia <= ia_top * 0.97)
        if inside.size and inside[-1] < va.size - 1:
            j = inside[-1]
            ax.annotate(f"{vg:g}", (va[j], ia[j]), fontsize=7, color=c, xytext=(-2, 2),
                        textcoords="offset points", ha="right")
        elif inside.size:
            ax.annotate(f"{vg:g} V", (va[-1], ia[-1]), fontsize=7, color=c, xytext=(2, 0),
                        textcoords="offset points", va="center")
    # the curve through the operating point, highlighted
    ia_q = 1e3 * triode.current(va, np.full_like(va, vgk_q))
    ax.plot(va, ia_q, ":", lw=1.2, color="0.35")
    return step


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
    if axes is None:
        fig, axes = plt.subplots(1, len(positions), figsize=(7.5 * len(positions), 7.0), squeeze=False)
        axes = list(axes[0])
    fig = axes[0].figure
    op = operating_point(st, *triodes)
    lim = drive_limit(st, *triodes, op=op)
    A = lim.vin_peak
    swing = quasi_static(st, *triodes, vin=np.linspace(-A, A, 201), op=op)
    wide = quasi_static(st, *triodes, vin=np.linspace(-3 * A, 3 * A, 301), op=op)
    for ax, pos, t in zip(axes, positions, triodes):
        va_q, ia_q, vgk_q = f[pos + ".va"], 1e3 * f[pos + ".ia"], f[pos + ".vgk"]
        if isinstance(st, CathodeFollower):
            va_max = st.b_plus - st.vneg
        else:
            va_max = st.b_plus
        va_max *= 1.05
        if isinstance(st, (CommonCathode, CathodeFollower)):
            r_dc = st.ra + st.rk
            supply = st.b_plus - (st.vneg if isinstance(st, CathodeFollower) else 0.0)
            ia_top = min(1e3 * supply / r_dc * 1.15, 4.0 * ia_q) if r_dc > 0 else 4.0 * ia_q
        else:
            ia_top = 2.6 * ia_q
        ia_top = max(ia_top, 1.8 * ia_q)
        step = _plate_curves(ax, t, va_max, ia_top, vgk_q, f[pos + ".mu"])
        if isinstance(st, (CommonCathode, CathodeFollower)):
            supply = st.b_plus - (st.vneg if isinstance(st, CathodeFollower) else 0.0)
            r_dc = st.ra + st.rk
            ax.plot([supply, 0.0], [0.0, 1e3 * supply / r_dc], "-", color="tab:blue", lw=1.8,
                    label=f"DC load line ({_eng(r_dc)} = Ra + Rk)" if isinstance(st, CommonCathode)
                    else f"DC load line ({_eng(r_dc)})")
            # AC line through Q with the mid-band resistance seen by the tube
            va_w, ia_w = wide[pos + ".va"], 1e3 * wide[pos + ".ia"]
            slope = np.polyfit(ia_w[wide[pos + '.ia'] > 0], va_w[wide[pos + '.ia'] > 0], 1)[0] \
                if np.sum(wide[pos + ".ia"] > 0) > 3 else -1.0
            r_ac = -slope * 1e3
            i_line = np.linspace(0.0, ia_top, 50)
            ax.plot(va_q + (i_line - ia_q) * slope, i_line, "--", color="tab:orange", lw=1.3,
                    label=f"AC load line ({_eng(r_ac)})")
        else:
            dcl = quasi_static(st, *triodes, vin=np.linspace(-40.0 * abs(vgk_q) - 5, 3.0 * abs(f['bottom.vgk']) + 2, 300),
                               dc_grid=True)
            ax.plot(dcl[pos + ".va"], 1e3 * dcl[pos + ".ia"], "-", color="tab:blue", lw=1.8,
                    label="DC load (bias moved)")
            ax.plot(wide[pos + ".va"], 1e3 * wide[pos + ".ia"], "--", color="tab:orange", lw=1.3,
                    label="AC load (mid-band signal)")
        ax.plot(swing[pos + ".va"], 1e3 * swing[pos + ".ia"], "-", color="tab:red", lw=3.2, alpha=0.75,
                label=f"swing to {lim.reason} (±{A:.3g} V in)")
        if st.pa_max:
            v = np.linspace(max(st.pa_max / (ia_top * 1e-3), 1.0), va_max, 200)
            ax.plot(v, 1e3 * st.pa_max / v, "-.", color="crimson", lw=1.0, label=f"Pa max {st.pa_max:g} W")
        ax.plot([va_q], [ia_q], "o", ms=9, color="black", zorder=5,
                label=f"Q: Va {va_q:.4g} V, Ia {ia_q:.3g} mA, Vgk {vgk_q:.3g} V")
        ax.set_xlim(0.0, va_max)
        ax.set_ylim(0.0, ia_top)
        ax.set_xlabel("plate-cathode voltage Va [V]")
        ax.set_ylabel("plate current Ia [mA]")
        who = "" if pos == "tube" else f"{pos} tube "
        ax.set_title(f"{who}{t.label} ({t.model.name}); curves every {step:g} V of Vgk", fontsize=10)
        ax.grid(True, alpha=0.3)
        ax.legend(fontsize=7.5, loc="upper center", bbox_to_anchor=(0.5, -0.11), ncol=2, frameon=False)
    fig.suptitle(f"{stage_title(st)}: gain {f['gain']:.4g} at {result.to_dict()['output'].replace('_', ' ')}, "
                 f"zout {_eng_unit(f['zout'], 'ohm')}", fontsize=11)
    fig.text(0.01, 0.005, CAUTION, fontsize=7, color="0.3")
    fig.tight_layout(rect=(0, 0.03, 1, 0.96))
    return axes


def save_load_line_plot(result: StageResult, path) -> Path:
    """Save :func:`plot_load_lines` to a PNG file."""
    axes = plot_load_lines(result)
    path = Path(path)
    axes[0].figure.savefig(path, dpi=120)
    plt.close(axes[0].figure)
    return path


def plot_thd_sweep(sw: DistortionSweep, ax=None):
    """THD and the low harmonics [%] against output level [V peak], log-log, with the
    THD threshold, the headroom and the end of the sweep marked."""
    if ax is None:
        _, ax = plt.subplots(figsize=(8.0, 5.6))
    vo = sw.vout_peak
    ax.loglog(vo, 100 * sw.thd, "-o", ms=3, lw=2.0, color="black", label="THD (H2..H10)")
    styles = {2: ("tab:blue", "-"), 3: ("tab:orange", "-"), 4: ("tab:green", "--"), 5: ("tab:purple", "--")}
    for k, (c, ls) in styles.items():
        h = 100 * sw.harmonics[:, k - 1] / sw.harmonics[:, 0]
        ok = h > 1e-6
        if np.any(ok):
            ax.loglog(vo[ok], h[ok], ls, lw=1.1, color=c, label=f"H{k}")
    ax.axhline(100 * sw.thd_limit, color="crimson", ls=":", lw=1.2, label=f"threshold {100 * sw.thd_limit:g} %")
    ax.axvline(sw.headroom_vout_peak, color="crimson", ls="--", lw=1.0,
               label=f"headroom {sw.headroom_vout_peak:.3g} V peak ({sw.headroom_vout_peak / np.sqrt(2):.3g} V rms)")
    ax.annotate(f"sweep ends: {sw.limit.reason}", (vo[-1], 100 * sw.thd[-1]), xytext=(-10, 12),
                textcoords="offset points", ha="right", fontsize=8)
    lo = max(1e-4, 0.3 * float(np.min(100 * sw.thd)))
    ax.set_ylim(lo, max(3.0 * float(np.max(100 * sw.thd)), 2 * 100 * sw.thd_limit))
    ax.set_xlabel("output fundamental [V peak]")
    ax.set_ylabel("distortion [% of fundamental]")
    ax.set_title(f"{stage_title(sw.stage)} ({', '.join(t.label for t in sw.triodes)}): "
                 "THD against output level (quasi-static, mid-band)", fontsize=10)
    ax.grid(True, which="both", alpha=0.3)
    ax.legend(fontsize=8, loc="upper left")
    ax.figure.text(0.01, 0.005, CAUTION, fontsize=7, color="0.3")
    ax.figure.tight_layout(rect=(0, 0.03, 1, 1))
    return ax


def save_thd_plot(sw: DistortionSweep, path) -> Path:
    ax = plot_thd_sweep(sw)
    path = Path(path)
    ax.figure.savefig(path, dpi=120)
    plt.close(ax.figure)
    return path


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
    axh.figure.tight_layout(rect=(0, 0.04, 1, 1))
    return axes


def save_waveform_plot(d: Distortion, path) -> Path:
    axes = plot_waveform(d)
    path = Path(path)
    axes[0].figure.savefig(path, dpi=120)
    plt.close(axes[0].figure)
    return path
