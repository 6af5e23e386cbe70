"""Plots of the design tools: frequency response (gain and phase against log frequency,
-3 dB points marked) and component sweeps (each figure against the swept value, with the
spread over a stock as a band).  matplotlib, Agg backend; they draw results, computing
no circuit figures of their own."""

from __future__ import annotations

from pathlib import Path

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402

from . import CAUTION  # noqa: E402
from .plotting_layout import log_ticks, margins  # noqa: E402,F401  (also this module's names)
from .plotting_layout import save_figure as _save  # noqa: E402

__all__ = ["plot_response", "save_response_plot", "plot_sweep", "save_sweep_plot", "log_ticks", "margins"]


def _hz(f):
    for scale, unit in ((1e6, "MHz"), (1e3, "kHz")):
        if f >= scale:
            return f"{f / scale:.3g} {unit}"
    return f"{f:.3g} Hz"


def plot_response(fr, axes=None):
    """Gain [dB] and phase [deg] against frequency (log), the -3 dB points marked."""
    own = axes is None
    if own:
        fig, axes = plt.subplots(2, 1, figsize=(9.0, 6.6), sharex=True)
        # fixed margins (a layout engine would draw the figure once more): the two-line
        # title above, the legend in the right margin, the caution under the x label
        margins(fig, left=0.85, right=2.3, top=0.7, bottom=0.75, hspace=0.15)
    ag, ap = axes
    ag.semilogx(fr.freq, fr.gain_db, color="tab:blue", lw=1.6, label="gain")
    mid_db = 20 * np.log10(abs(fr.midband)) if fr.midband else None
    if mid_db is not None:
        ag.axhline(mid_db - 3.0103, color="0.5", ls=":", lw=1.0, label=f"mid-band {mid_db:.2f} dB - 3 dB")
    for f, name in ((fr.f_low, "low"), (fr.f_high, "high")):
        if f is not None and fr.freq[0] <= f <= fr.freq[-1]:
            ag.axvline(f, color="crimson", ls="--", lw=1.0)
            ag.plot([f], [mid_db - 3.0103], "o", color="crimson", ms=5,
                    label=f"-3 dB {name}: {_hz(f)}")
            ap.axvline(f, color="crimson", ls="--", lw=1.0)
    ap.semilogx(fr.freq, fr.phase_deg, color="tab:orange", lw=1.6)
    ag.set_ylabel("gain [dB]")
    ap.set_ylabel("phase [deg]")
    ap.set_xlabel("frequency [Hz]")
    tubes = " / ".join(fr.labels)
    ag.set_title(f"{fr.title} with {tubes}: frequency response\n"
                 "(linearised at the operating point; source 1 V behind Rs)", fontsize=10, y=1.0)
    for ax in axes:
        ax.grid(True, which="both", alpha=0.3)
    # beside the gain panel, outside it: inside, some response would always run under it
    ag.legend(fontsize=8, loc="upper left", bbox_to_anchor=(1.01, 1.0), frameon=False)
    if fr.notes:
        # e.g. why the response is flat: said on the figure, not only in the report
        import textwrap

        ap.text(1.02, 1.0, "\n".join(textwrap.fill(n, 34) for n in fr.notes), transform=ap.transAxes,
                fontsize=7, color="0.3", va="top", ha="left")
    fig = ag.figure
    fig.text(0.01, 0.005, CAUTION, fontsize=7, color="0.3")
    if not own:
        fig.tight_layout(rect=(0, 0.03, 1, 1))
    log_ticks(ap, "x", eng=True)
    return axes


def save_response_plot(fr, path) -> Path:
    """Save :func:`plot_response`; returns the path written."""
    axes = plot_response(fr)
    return _save(axes[0].figure, path)


def plot_sweep(sw, figures=None):
    """Each figure of a sweep against the swept value: one panel per figure, the median
    as a line and min..max over the units as a band (one tube: just the line)."""
    names = list(figures or sw.figure_names)
    n = len(names)
    cols = 2
    rows = (n + 1) // 2
    fig, axes = plt.subplots(rows, cols, figsize=(9.0, 2.3 * rows + 0.8), sharex=True, squeeze=False)
    x = sw.values * sw.display_scale
    gaps = False
    for ax, name in zip(axes.ravel(), names):
        lo, med, hi = sw.stats(name)
        unit, scale = sw.figure_unit(name)
        a = np.asarray(sw.figures[name], float)
        every = np.isfinite(a).all(axis=1)
        if sw.n_units > 1 and not every.all() and every.any() or sw.n_units > 1 and not every.any():
            # where only some units have the figure (e.g. THD reaches the limit for some), the
            # median of those few would jump: the line is drawn only where every unit has
            # it, the band shows the rest, and the panel says so
            ax.plot(x, np.where(every, med, np.nan) * scale, "-o", ms=3, color="tab:blue")
            some = np.isfinite(a).any(axis=1) & ~every
            ax.plot(x[some], med[some] * scale, "o", ms=3, mfc="none", color="tab:blue")
            if some.any():
                ax.text(0.99, 0.97, "open marks: median of the units that have it", ha="right", va="top",
                        transform=ax.transAxes, fontsize=7, color="0.35")
        else:
            ax.plot(x, med * scale, "-o", ms=3, color="tab:blue")
        if sw.n_units > 1:
            ax.fill_between(x, lo * scale, hi * scale, color="tab:blue", alpha=0.2, lw=0)
        missing = ~np.isfinite(a).any(axis=1)
        if missing.any() and not missing.all():
            # values where no unit has the figure (the stage not solved there, or the figure
            # not reached): a grey x on the axis, not a silent gap
            ax.plot(x[missing], np.full(missing.sum(), 0.03), "x", ms=4, color="0.45",
                    transform=ax.get_xaxis_transform(), clip_on=False)
            gaps = True
        if name == "pa_ratio" and np.any(np.isfinite(a)):
            ax.axhline(100.0, color="crimson", ls=":", lw=1.0)
            ax.text(0.01, 100.0, " the limit", color="crimson", fontsize=7, va="bottom",
                    transform=ax.get_yaxis_transform())
        ax.set_title(sw.figure_label(name) + (f" [{unit}]" if unit else ""), fontsize=9, y=1.0)
        ax.grid(True, which="both", alpha=0.3)
        if not np.any(np.isfinite(np.asarray(med, float))):
            # nothing to draw: say so rather than leave an empty frame (e.g. the slew limit
            # needs a load capacitance, headroom a stage that reaches a limit)
            ax.text(0.5, 0.5, "no value at any point" + ("\n(the slew limit needs a load capacitance)"
                                                    if "slew" in name else ""), ha="center",
                    va="center", transform=ax.transAxes, fontsize=8, color="0.4")
            ax.set_yticks([])
        if sw.log:
            ax.set_xscale("log")
    for ax in axes.ravel()[n:]:
        ax.set_visible(False)
    # the lowest panel of each column carries the swept value's ticks and label (a hidden
    # panel under one would otherwise leave that column without them)
    for c in range(cols):
        shown = [r for r in range(rows) if r * cols + c < n]
        if shown:
            ax = axes[shown[-1], c]
            ax.tick_params(labelbottom=True)
            ax.set_xlabel(f"{sw.field} [{sw.display_unit}]")
    who = sw.units_text
    fig.suptitle(f"{sw.title}: sweep of {sw.field} with {who}"
                 + (" (line: median, band: min..max)" if sw.n_units > 1 else "")
                 + ("\nx on an axis: no unit has that figure at that value" if gaps else ""), fontsize=10)
    fig.text(0.01, 0.005, CAUTION, fontsize=7, color="0.3")
    # fixed margins (a layout engine would draw the figure once more): room for the y tick
    # labels left of each column, the panel titles between the rows (the upper rows share
    # the x axis and carry no labels) and the x labels over the caution at the bottom
    margins(fig, left=0.8, right=0.2, top=0.85 if gaps else 0.65, bottom=0.75, wspace=0.85, hspace=0.45)
    if sw.log:
        for ax in axes.ravel()[:n]:
            log_ticks(ax, "x")
    return axes


def save_sweep_plot(sw, path, figures=None) -> Path:
    axes = plot_sweep(sw, figures)
    return _save(axes[0, 0].figure, path)
