"""Plots of fits: measured points, fitted curves and residuals.  The only engine module
for fit plots that imports matplotlib (Agg backend, so it runs on a server).

Speed: a plot of a unit is drawn on one figure per process that is kept and reused
(only the data artists are removed and made again; axis labels, grid and caution stay),
with a fixed layout instead of a layout pass per plot, and PNGs written at a low zlib
level.  :func:`save_fit_plots` spreads many plots over processes.
"""

from __future__ import annotations

import os
import threading
from pathlib import Path
from typing import Callable, Sequence

import numpy as np
from matplotlib import colormaps
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure
from matplotlib.lines import Line2D
from matplotlib.ticker import MaxNLocator
from matplotlib.transforms import ScaledTranslation

from . import CAUTION
from .fit import FitResult

from .outfiles import plot_path, write_atomic

__all__ = ["plot_fit", "save_fit_plot", "save_fit_plots", "plot_bytes", "CAUTION"]

FIGSIZE = (8.0, 8.0)  # [in]
DPI = 110
#: fixed margins (figure fractions) that leave room for two-line titles, tick labels of
#: up to five characters, the axis labels, the caution line at the foot and, on the right,
#: the grid-voltage labels at the curves' ends (up to "-122.5 V")
MARGINS = dict(left=0.095, right=0.925, top=0.925, bottom=0.085, hspace=0.09)
#: zlib level of the PNGs: 1 writes about 15 % larger files several times faster than 6
PNG_COMPRESS_LEVEL = 1
#: largest number of major ticks an axis gets (matplotlib's MaxNLocator ``nbins``)
TICKS = 6
#: the tick spacings it may use, times a power of ten (no 8s or 4s)
TICK_STEPS = (1, 2, 2.5, 5, 10)


def _new_axes():
    """A figure (Agg canvas, no pyplot state) with the curves and residual axes."""
    fig = Figure(figsize=FIGSIZE, dpi=DPI)
    FigureCanvasAgg(fig)
    ax, axr = fig.subplots(2, 1, sharex=True, gridspec_kw={"height_ratios": [3, 1.3]})
    fig.subplots_adjust(**MARGINS)
    # speed (measured, bench/web.py): the axes' ticks cost more than the unit's data. At most
    # TICKS ticks an axis; no tick marks under the upper axes (the residuals' axis shows the
    # plate voltages; its labels are hidden anyway); axis labels at fixed places instead of
    # placed after the tick labels' extents are measured on every save
    for a in (ax, axr):
        a.xaxis.set_major_locator(MaxNLocator(nbins=TICKS, steps=TICK_STEPS))
        a.yaxis.set_major_locator(MaxNLocator(nbins=TICKS, steps=TICK_STEPS))
        a.yaxis.set_label_coords(-0.075, 0.5)
    ax.tick_params(axis="x", bottom=False, labelbottom=False)
    axr.xaxis.set_label_coords(0.5, -0.175)
    return ax, axr


def _decorate(ax, axr):
    """What every fit plot shows whatever the unit: axis labels, grids, the caution.

    Returns the caution's Text.
    """
    ax.set_ylabel("plate current Ia [mA]")
    ax.grid(alpha=0.3)
    axr.set_xlabel("plate voltage Va [V]")
    axr.set_ylabel("model − data [mA]")
    axr.grid(alpha=0.3)
    return ax.figure.text(0.01, 0.005, CAUTION, fontsize=6.5, color="0.35")


def _bake(text) -> None:
    """Replace a figure text that never changes by its pixels (rendered once by Agg).

    A long text costs milliseconds to lay out and render on every save; the pixels are
    the same each time, so they are kept as an image at the same place.
    """
    fig = text.figure
    fig.canvas.draw()
    box = text.get_window_extent()
    height = int(round(fig.bbox.height))
    x0, y0 = int(np.floor(box.x0)) - 1, int(np.floor(box.y0)) - 1
    x1, y1 = int(np.ceil(box.x1)) + 1, int(np.ceil(box.y1)) + 1
    pixels = np.array(fig.canvas.buffer_rgba())[height - y1:height - y0, x0:x1]
    text.remove()
    fig.figimage(pixels, xo=x0, yo=y0, origin="upper", zorder=text.get_zorder())


def _margin(lo: float, hi: float, frac: float = 0.05) -> tuple[float, float]:
    span = hi - lo
    if span <= 0:
        span = abs(hi) or 1.0
    return lo - frac * span, hi + frac * span


def _line(ax, x, y, made, **style):
    """``ax.plot`` without its argument parsing (a third of the time of making a plot)."""
    line = Line2D(x, y, **style)
    ax.add_artist(line)  # not add_line: the limits are set by hand, so no data-limit update
    made.append(line)
    return line


def _draw_unit(result: FitResult, ax, axr, made: list | None = None) -> list:
    """Draw one unit's data, fit and residuals; set the limits and title.

    Returns the artists made (appended to ``made`` as they are made, so that a reused
    figure can remove them again even if drawing stopped half-way).
    """
    made = [] if made is None else made
    dot = dict(ls="none", marker="o")
    # curve labels 2 points right of the curve's end (a Text with an offset: cheaper than an Annotation)
    beside = ax.transData + ScaledTranslation(2 / 72, 0, ax.figure.dpi_scale_trans)
    u = result.unit
    grids = np.unique(u.vg)
    cmap = colormaps["viridis"]
    colours = {v: cmap(i / max(len(grids) - 1, 1)) for i, v in enumerate(sorted(grids, reverse=True))}
    # a failed fit has no meaningful outliers: its points are all shown as measured
    out = result.outliers if (result.outliers is not None and result.converged) else np.zeros(u.n_points, bool)
    ia_max_ma = 1e3 * float(u.ia.max())
    # the fitted curves are drawn over the plate voltages the data cover, not beyond
    va_line = np.linspace(float(u.va.min()), float(u.va.max()), 300)
    for v in grids:
        sel = u.vg == v
        c = colours[v]
        _line(ax, u.va[sel & ~out], 1e3 * u.ia[sel & ~out], made, ms=3.2, color=c, alpha=0.85, **dot)
        if result.converged:
            ia = 1e3 * result.model.current(va_line, np.full_like(va_line, v), **result.params)
            _line(ax, va_line, ia, made, lw=1.3, color=c)
            # label each curve with its grid voltage at its upper end
            top = np.flatnonzero(ia <= ia_max_ma * 1.05)
            if top.size:
                j = top[-1]
                made.append(ax.text(va_line[j], ia[j], f"{v:g} V", fontsize=7, color=c, va="center",
                                    transform=beside, clip_on=False))
    if out.any():
        _line(ax, u.va[out], 1e3 * u.ia[out], made, ls="none", marker="x", ms=7, mew=1.6, color="crimson",
              label=f"outliers ({int(out.sum())}, down-weighted)")
        made.append(ax.legend(loc="upper left", fontsize=8))
    title = f"{u.label} — {result.model.title}"
    if result.converged:
        sub = (f"rms {result.rms_ma:.3g} mA, relative rms {100 * result.rel_rms:.2f} %, "
               f"{u.n_points} points, {len(grids)} grid curves")
    else:
        sub = f"FIT FAILED: {result.failure}"
    ax.set_title(f"{title}\n{sub}", fontsize=10)
    # limits set here rather than autoscaled, so that a reused figure does not keep old data's
    # limits: x from 0 to the data with a 5 % margin, current from 0 to 12 % over the largest
    ax.set_xlim(0.0, _margin(float(u.va.min()), float(u.va.max()))[1])
    ax.set_ylim(0.0, ia_max_ma * 1.12 if ia_max_ma > 0 else 1.0)
    if result.converged and result.residuals is not None:
        res_ma = 1e3 * result.residuals
        for v in grids:
            sel = (u.vg == v) & ~out
            _line(axr, u.va[sel], res_ma[sel], made, ms=2.8, color=colours[v], **dot)
        made.append(axr.axhline(0, color="k", lw=0.8))
        lim = None
        if out.any():
            _line(axr, u.va[out], res_ma[out], made, ls="none", marker="x", ms=6, color="crimson")
            lim = np.max(np.abs(res_ma[~out])) * 1.6 if (~out).any() else None
        if lim:
            axr.set_ylim(-lim, lim)
        else:
            shown = np.concatenate([res_ma[np.isfinite(res_ma)], [0.0]])
            axr.set_ylim(*_margin(float(shown.min()), float(shown.max())))
    else:
        axr.set_ylim(0.0, 1.0)
    return made


def plot_fit(result: FitResult, axes=None):
    """Plate curves (points) with the fitted model (lines), and residuals below.

    Parameters
    ----------
    result : FitResult
    axes : pair of matplotlib Axes, optional
        (curves, residuals).  New ones are made when omitted.

    Returns
    -------
    tuple of Axes
    """
    ax, axr = axes if axes is not None else _new_axes()
    _decorate(ax, axr)
    _draw_unit(result, ax, axr)
    return ax, axr


class _Sheet:
    """One figure kept for every plot of this process: the unit's artists are made
    for each plot and removed after it is saved."""

    def __init__(self):
        self.ax, self.axr = _new_axes()
        _bake(_decorate(self.ax, self.axr))
        self.made: list = []

    def draw(self, result: FitResult):
        for artist in self.made:
            artist.remove()
        self.made = []
        _draw_unit(result, self.ax, self.axr, self.made)
        return self.ax.figure


_sheet: _Sheet | None = None
#: one plot at a time on the shared figure (a server may call from several threads)
_sheet_lock = threading.Lock()


def _the_sheet() -> _Sheet:
    """This process's figure (a forked worker starts with a copy of its parent's)."""
    global _sheet
    if _sheet is None:
        _sheet = _Sheet()
    return _sheet


def save_fit_plot(result: FitResult, path) -> Path:
    """Write the plot of one fit to ``path`` (PNG, or PDF/SVG by suffix; no suffix adds .png),
    atomically (:func:`fitter.outfiles.write_atomic`); returns the path written."""
    path, fmt = plot_path(path)
    extra = {"pil_kwargs": {"compress_level": PNG_COMPRESS_LEVEL}} if fmt == "png" else {}
    with _sheet_lock:
        fig = _the_sheet().draw(result)
        write_atomic(path, lambda fh: fig.savefig(fh, format=fmt, dpi=DPI, **extra))
    return path


def plot_bytes(result: FitResult, fmt: str = "svg") -> bytes:
    """The plot of one fit as SVG or PNG bytes, in memory (the web's plots).  An SVG keeps its
    text as text (``svg.fonttype`` "none": the browser sets it in its sans-serif face), which
    makes the file a fifth smaller and the save a fifth faster than text drawn as outlines."""
    import io

    import matplotlib

    if fmt not in ("svg", "png"):
        raise ValueError(f"plot_bytes: svg or png, got {fmt!r}")
    buf = io.BytesIO()
    extra = {"pil_kwargs": {"compress_level": PNG_COMPRESS_LEVEL}} if fmt == "png" else {}
    with _sheet_lock, matplotlib.rc_context({"svg.fonttype": "none"}):
        fig = _the_sheet().draw(result)
        fig.savefig(buf, format=fmt, dpi=DPI, **extra)
    return buf.getvalue()


# -- many plots over processes ----------------------------------------------------

_jobs: list = []


def _plot_job(i: int) -> int:
    result, path = _jobs[i]
    save_fit_plot(result, path)
    return i


def save_fit_plots(results: Sequence[FitResult], paths: Sequence, processes: int | None = None,
                   progress: Callable[[int], None] | None = None) -> list[Path]:
    """Write the plot of each fit to its path, spread over ``processes`` (default: all cores).

    ``progress(n)`` is called as plots are written.  The results reach the workers by
    fork (nothing pickled); where fork is not available the plots are made here.
    """
    global _jobs
    import multiprocessing as mp

    paths = [plot_path(p)[0] for p in paths]
    if len(paths) != len(results):
        raise ValueError(f"save_fit_plots: {len(results)} results but {len(paths)} paths")
    nproc = min(processes or os.cpu_count() or 1, len(results))
    if nproc <= 1 or len(results) < 4 or "fork" not in mp.get_all_start_methods():
        for r, p in zip(results, paths):
            save_fit_plot(r, p)
            if progress:
                progress(1)
        return paths
    _jobs = list(zip(results, paths))
    _the_sheet()  # made once here, inherited by the workers
    try:
        with mp.get_context("fork").Pool(nproc) as pool:
            for _ in pool.imap_unordered(_plot_job, range(len(_jobs)), chunksize=2):
                if progress:
                    progress(1)
    finally:
        _jobs = []
    return paths
