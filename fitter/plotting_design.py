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
from .plotting_stage import _save  # noqa: E402

__all__ = ["plot_response", "save_response_plot", "plot_sweep", "save_sweep_plot", "log_ticks", "margins"]


def _tick_text(v: float, eng: bool) -> str:
    if eng:
        for scale, suffix in ((1e6, "M"), (1e3, "k")):
            if v >= scale:
                return f"{v / scale:g}{suffix}"
    return f"{v:g}"


def log_ticks(ax, which: str = "x", eng: bool = False, max_labels: int | None = None) -> None:
    """Ticks of a log axis as plain numbers ("0.1", "1", "10", or with ``eng`` "1k",
    "10k", "1M"), no mathtext: over several decades the decades labelled and 2 and 5 of
    each as unlabelled minor ticks; over a decade or two 1, 2, 5 of each labelled (and over
    a decade or less the other digits as minor ticks), so a narrow range still has three labels or more, short enough not to
    collide.  ``max_labels`` (default: one per 0.55 inch of the axes) caps the labels.
    Call it after the data are drawn: the ticks are fixed for the axis' current limits."""
    from matplotlib.ticker import FixedFormatter, FixedLocator, NullFormatter

    axis = ax.xaxis if which == "x" else ax.yaxis
    lo, hi = sorted(ax.get_xlim() if which == "x" else ax.get_ylim())
    if not (lo > 0 and np.isfinite(hi) and hi > lo):
        return
    if max_labels is None:
        bbox = ax.get_position()
        w, h = ax.figure.get_size_inches()
        length = bbox.width * w if which == "x" else bbox.height * h
        max_labels = max(3, int(length / (0.55 if which == "x" else 0.3)))
    k0, k1 = int(np.floor(np.log10(lo))), int(np.ceil(np.log10(hi)))

    def at(subs):
        v = [m * 10.0 ** k for k in range(k0, k1 + 1) for m in subs]
        return [x for x in v if lo * (1 - 1e-9) <= x <= hi * (1 + 1e-9)]

    major = at((1,))
    for subs in ((1,), (1, 2, 5), (1, 2, 3, 5), (1, 2, 3, 4, 5, 6, 8)):
        ticks = at(subs)
        if len(ticks) > max_labels:
            break
        major = ticks
        if len(ticks) >= 3:
            break
    if len(major) > max_labels:  # many decades: every second (or third...) one
        step = int(np.ceil(len(major) / max_labels))
        major = major[::step]
    # minor ticks (each a tick object to make and draw): 2 and 5 of each decade, and over
    # a decade or less every digit
    minor = [x for x in at(range(1, 10) if hi / lo <= 12 else (1, 2, 5)) if x not in major]
    axis.set_major_locator(FixedLocator(major))
    axis.set_major_formatter(FixedFormatter([_tick_text(x, eng) for x in major]))
    axis.set_minor_locator(FixedLocator(minor))
    axis.set_minor_formatter(NullFormatter())


def margins(fig, left, right, top, bottom, wspace=None, hspace=None) -> None:
    """Fixed margins in inches (instead of a layout engine, which draws the figure once
    more to measure it; the plots' titles have ``y=1.0`` too: at the default height
    matplotlib measures every tick label on each draw to lift a title over any on top): ``left``, ``right``, ``top``, ``bottom`` from the figure's edges and
    the gaps ``wspace``, ``hspace`` between panels, in inches too."""
    w, h = fig.get_size_inches()
    kw = dict(left=left / w, right=1 - right / w, top=1 - top / h, bottom=bottom / h)
    gs = fig.axes[0].get_subplotspec().get_gridspec() if fig.axes and fig.axes[0].get_subplotspec() else None
    if gs is not None:
        rows, cols = gs.get_geometry()
        aw = (w - left - right - (cols - 1) * (wspace or 0)) / cols
        ah = (h - top - bottom - (rows - 1) * (hspace or 0)) / rows
        if wspace is not None:
            kw["wspace"] = wspace / aw
        if hspace is not None:
            kw["hspace"] = hspace / ah
    fig.subplots_adjust(**kw)


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
                 + (" (line: median, band: min..max)" if sw.n_units > 1 else ""), fontsize=10)
    fig.text(0.01, 0.005, CAUTION, fontsize=7, color="0.3")
    # fixed margins (a layout engine would draw the figure once more): room for the y tick
    # labels left of each column, the panel titles between the rows (the upper rows share
    # the x axis and carry no labels) and the x labels over the caution at the bottom
    margins(fig, left=0.8, right=0.2, top=0.65, bottom=0.75, wspace=0.85, hspace=0.45)
    if sw.log:
        for ax in axes.ravel()[:n]:
            log_ticks(ax, "x")
    return axes


def save_sweep_plot(sw, path, figures=None) -> Path:
    axes = plot_sweep(sw, figures)
    return _save(axes[0, 0].figure, path)
