"""Layout helpers the plot modules share: fixed margins in inches, plain tick labels on log
axes, the height of a legend placed under a panel, and the atomic save.  matplotlib, Agg
backend; nothing here draws data."""

from __future__ import annotations

from pathlib import Path

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402

from .outfiles import plot_path, write_atomic  # noqa: E402

__all__ = ["log_ticks", "margins", "LEGEND_GAP", "legend_height", "save_figure"]


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


#: the legend's top under the axes [inch]: below the tick labels and the x label
LEGEND_GAP = 0.5


def legend_height(ax) -> float:
    """The height [inch] of the legend put under ``ax`` (two columns, :func:`fitter.plotting_output._legend_below`), from its
    entries' lines (two columns, filled column by column), without drawing it."""
    leg = ax.get_legend()
    if leg is None:
        return 0.0
    lines = [t.get_text().count("\n") + 1 for t in leg.get_texts()]
    rows = (len(lines) + 1) // 2
    tall = [max(lines[r], lines[r + rows] if r + rows < len(lines) else 1) for r in range(rows)]
    return 0.165 * rows + 0.135 * (sum(tall) - rows) + 0.1


def save_figure(fig, path) -> Path:
    """Write ``fig`` atomically (:func:`fitter.outfiles.write_atomic`) to the file
    :func:`fitter.outfiles.plot_path` gives for ``path`` (``.png`` added when there is no
    suffix) and return that file's path."""
    try:
        path, fmt = plot_path(path)
        write_atomic(path, lambda fh: fig.savefig(fh, format=fmt, dpi=120))
    finally:
        plt.close(fig)
    return path
