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

__all__ = ["plot_fit", "save_fit_plot", "save_fit_plots", "plot_bytes", "svg_fit_plot", "nice_ticks", "CAUTION"]

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
    """The plot of one fit as SVG or PNG bytes, in memory, drawn by matplotlib.  An SVG keeps
    its text as text (``svg.fonttype`` "none": the browser sets it in its sans-serif face),
    which makes the file a fifth smaller and the save a fifth faster than text drawn as
    outlines.  (The web's pages use :func:`svg_fit_plot`, written directly.)"""
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


# -- the web's fit plot, written as SVG directly ------------------------------------------
#
# matplotlib spends 150-200 ms on one fit plot (most of it on the axes: ticks, their labels
# and their extents; measured by bench/web.py), which alone would take a tube page with two
# sections past its 300 ms.  The page's plot is therefore written here as SVG text: the
# same content (points, fitted curves labelled with their grid voltage, outliers as red
# crosses, residuals beneath, the caution) in about 10 ms of CPU, the model's curves
# evaluated included.  Text stays text (the browser's sans-serif face); every name is
# XML-escaped.

SVG_W, SVG_H = 880, 800  # [px]; shown at 600-720 px wide, hence the large type
#: the axes' boxes [px]: left, right; the curves' top and bottom; the residuals' top and bottom
SVG_LEFT, SVG_RIGHT = 100, 800
SVG_TOP, SVG_MID, SVG_RTOP, SVG_BOTTOM = 72, 500, 528, 700


def nice_ticks(lo: float, hi: float, most: int = TICKS) -> list[float]:
    """At most ``most + 1`` round tick values covering [lo, hi]: a step of 1, 2, 2.5 or 5 times
    a power of ten (:data:`TICK_STEPS`), the ticks inside the range."""
    import math

    span = hi - lo
    if not (math.isfinite(span) and span > 0):
        return [lo]
    raw = span / max(most, 1)
    mag = 10.0 ** math.floor(math.log10(raw))
    step = next((k * mag for k in TICK_STEPS if k * mag >= raw * (1 - 1e-9)), 10 * mag)
    first = math.ceil(lo / step - 1e-9)
    out = []
    k = first
    while k * step <= hi + 1e-9 * step:
        v = k * step
        out.append(0.0 if abs(v) < 1e-12 * step else v)
        k += 1
    return out


def _tick_text(v: float, step: float) -> str:
    import math

    decimals = max(0, -int(math.floor(math.log10(step) + 1e-9))) if step > 0 else 0
    if step > 0 and abs(step * 10**decimals - round(step * 10**decimals)) > 1e-6:
        decimals += 1  # 2.5 steps
    text = f"{v:.{decimals}f}"
    return text.replace("-", "\u2212")


def _hex(c) -> str:
    return "#%02x%02x%02x" % tuple(int(round(255 * float(x))) for x in c[:3])


class _Axes:
    """Data -> pixel mapping of one axes box."""

    def __init__(self, x0, x1, y0, y1, xlim, ylim):
        self.x0, self.x1, self.y0, self.y1 = x0, x1, y0, y1
        self.xlim, self.ylim = xlim, ylim
        self.sx = (x1 - x0) / ((xlim[1] - xlim[0]) or 1.0)
        self.sy = (y1 - y0) / ((ylim[1] - ylim[0]) or 1.0)

    def x(self, v):
        return self.x0 + (np.asarray(v, float) - self.xlim[0]) * self.sx

    def y(self, v):
        return self.y1 - (np.asarray(v, float) - self.ylim[0]) * self.sy


def _dots(px, py) -> str:
    """A path that draws a round dot at each point (zero-length segments with round caps)."""
    ok = np.isfinite(px) & np.isfinite(py)
    return "".join(map("M{:.1f} {:.1f}h0".format, px[ok].tolist(), py[ok].tolist()))


def _crosses(px, py, r=4.0) -> str:
    ok = np.isfinite(px) & np.isfinite(py)
    return "".join(f"M{a - r:.1f} {b - r:.1f}l{2 * r:g} {2 * r:g}m0 {-2 * r:g}l{-2 * r:g} {2 * r:g}"
                   for a, b in zip(px[ok], py[ok]))


def _polyline(px, py) -> list:
    """The ``points`` texts of a polyline, one per run of finite values."""
    ok = np.isfinite(px) & np.isfinite(py)
    edges = np.flatnonzero(np.diff(np.concatenate([[False], ok, [False]]).astype(np.int8)))
    return [" ".join(map("{:.1f},{:.1f}".format, px[i:j].tolist(), py[i:j].tolist()))
            for i, j in zip(edges[::2], edges[1::2])]


def _axes_frame(out, ax: _Axes, xlabels: bool, ylabel: str, xlabel: str | None):
    """Grid, ticks and tick labels, the box and the axis labels of one axes."""
    xt = nice_ticks(*ax.xlim)
    yt = nice_ticks(*ax.ylim)
    xs = (xt[1] - xt[0]) if len(xt) > 1 else 1.0
    ys = (yt[1] - yt[0]) if len(yt) > 1 else 1.0
    g = []
    for v in xt:
        x = float(ax.x(v))
        g.append(f"M{x:.1f} {ax.y0}V{ax.y1}")
    for v in yt:
        y = float(ax.y(v))
        g.append(f"M{ax.x0} {y:.1f}H{ax.x1}")
    out.append(f'<path d="{"".join(g)}" stroke="#b3b3b3" stroke-opacity="0.6" stroke-width="0.8" fill="none"/>')
    ticks = []
    for v in yt:
        y = float(ax.y(v))
        ticks.append(f"M{ax.x0} {y:.1f}h-4")
    if xlabels:
        for v in xt:
            ticks.append(f"M{float(ax.x(v)):.1f} {ax.y1}v4")
    out.append(f'<path d="{"".join(ticks)}" stroke="#000" stroke-width="1" fill="none"/>')
    out.append(f'<rect x="{ax.x0}" y="{ax.y0}" width="{ax.x1 - ax.x0}" height="{ax.y1 - ax.y0}" '
               'fill="none" stroke="#000" stroke-width="1"/>')
    out.append('<g font-size="17" text-anchor="end">')
    for v in yt:
        out.append(f'<text x="{ax.x0 - 8}" y="{float(ax.y(v)) + 6:.1f}">{_tick_text(v, ys)}</text>')
    out.append("</g>")
    if xlabels:
        out.append('<g font-size="17" text-anchor="middle">')
        for v in xt:
            out.append(f'<text x="{float(ax.x(v)):.1f}" y="{ax.y1 + 24}">{_tick_text(v, xs)}</text>')
        out.append("</g>")
    cy = (ax.y0 + ax.y1) / 2
    out.append(f'<text x="30" y="{cy:.0f}" font-size="17" text-anchor="middle" '
               f'transform="rotate(-90 30 {cy:.0f})">{_esc(ylabel)}</text>')
    if xlabel:
        out.append(f'<text x="{(ax.x0 + ax.x1) / 2:.0f}" y="{ax.y1 + 54}" font-size="17" '
                   f'text-anchor="middle">{_esc(xlabel)}</text>')


def _esc(text) -> str:
    from xml.sax.saxutils import escape

    return escape(str(text))


def svg_fit_plot(result: FitResult) -> bytes:
    """The plot of one fit as an SVG document written directly (the web's tube page):
    measured points by grid voltage, the fitted curves over the plate voltages measured, each
    labelled with its grid voltage, outliers as red crosses, the residuals beneath, the caution
    at the foot.  A failed fit shows its points and the failure, no curves."""
    u = result.unit
    out = [f'<?xml version="1.0" encoding="utf-8"?>\n<svg xmlns="http://www.w3.org/2000/svg" '
           f'width="{SVG_W}" height="{SVG_H}" viewBox="0 0 {SVG_W} {SVG_H}" '
           'font-family="DejaVu Sans, Verdana, Arial, sans-serif">',
           f'<rect width="{SVG_W}" height="{SVG_H}" fill="#fff"/>']
    grids = np.unique(u.vg)
    cmap = colormaps["viridis"]
    colours = {v: _hex(cmap(i / max(len(grids) - 1, 1))) for i, v in enumerate(sorted(grids, reverse=True))}
    out_mask = (result.outliers if (result.outliers is not None and result.converged)
                else np.zeros(u.n_points, bool))
    has = u.n_points > 0
    ia_max_ma = 1e3 * float(u.ia.max()) if has else 1.0
    va_lo, va_hi = (float(u.va.min()), float(u.va.max())) if has else (0.0, 1.0)
    top = SVG_TOP
    ax = _Axes(SVG_LEFT, SVG_RIGHT, top, SVG_MID, (0.0, _margin(va_lo, va_hi)[1]),
               (0.0, ia_max_ma * 1.12 if ia_max_ma > 0 else 1.0))
    # residual limits as the matplotlib plot sets them
    res_ma = 1e3 * result.residuals if (result.converged and result.residuals is not None) else None
    if res_ma is not None:
        lim = None
        if out_mask.any() and (~out_mask).any():
            lim = float(np.max(np.abs(res_ma[~out_mask]))) * 1.6
        if lim:
            rlim = (-lim, lim)
        else:
            shown = np.concatenate([res_ma[np.isfinite(res_ma)], [0.0]])
            rlim = _margin(float(shown.min()), float(shown.max()))
    else:
        rlim = (0.0, 1.0)
    axr = _Axes(SVG_LEFT, SVG_RIGHT, SVG_RTOP, SVG_BOTTOM, ax.xlim, rlim)
    out.append("<defs>"
               f'<clipPath id="c1"><rect x="{ax.x0}" y="{ax.y0}" width="{ax.x1 - ax.x0}" height="{ax.y1 - ax.y0}"/>'
               "</clipPath>"
               f'<clipPath id="c2"><rect x="{axr.x0}" y="{axr.y0}" width="{axr.x1 - axr.x0}" '
               f'height="{axr.y1 - axr.y0}"/></clipPath></defs>')
    _axes_frame(out, ax, False, "plate current Ia [mA]", None)
    _axes_frame(out, axr, True, "model \u2212 data [mA]", "plate voltage Va [V]")
    # the curves: points, fitted lines
    va_line = np.linspace(va_lo, va_hi, 300)
    out.append('<g clip-path="url(#c1)" fill="none">')
    labels = []
    for v in grids:
        sel = u.vg == v
        c = colours[v]
        keep = sel & ~out_mask
        out.append(f'<path d="{_dots(ax.x(u.va[keep]), ax.y(1e3 * u.ia[keep]))}" stroke="{c}" '
                   'stroke-opacity="0.85" stroke-width="6" stroke-linecap="round"/>')
        if result.converged:
            with np.errstate(all="ignore"):
                ia = 1e3 * np.asarray(result.model.current(va_line, np.full_like(va_line, v), **result.params), float)
            for pts in _polyline(ax.x(va_line), ax.y(np.clip(ia, -1e9, 1e9))):
                out.append(f'<polyline points="{pts}" stroke="{c}" stroke-width="1.6"/>')
            inside = np.flatnonzero(ia <= ia_max_ma * 1.05)
            if inside.size:
                j = inside[-1]
                labels.append((float(ax.x(va_line[j])) + 4, float(ax.y(ia[j])) + 5, c, f"{v:g} V"))
    if out_mask.any():
        out.append(f'<path d="{_crosses(ax.x(u.va[out_mask]), ax.y(1e3 * u.ia[out_mask]))}" stroke="#dc143c" '
                   'stroke-width="2"/>')
    out.append("</g>")
    out.append('<g font-size="13">')
    for x, y, c, text in labels:  # the curve's colour, darkened so the light ones read on white
        c = "#" + "".join(f"{int(int(c[i:i + 2], 16) * 0.72):02x}" for i in (1, 3, 5))
        out.append(f'<text x="{x:.1f}" y="{y:.1f}" fill="{c}">{_esc(text.replace("-", chr(0x2212)))}</text>')
    out.append("</g>")
    if out_mask.any():
        n = int(out_mask.sum())
        # the key under the plot, left of the axis label: inside the axes it would cover curves
        lx, ly = SVG_LEFT - 60, SVG_BOTTOM + 44
        out.append(f'<path d="M{lx} {ly}l10 10m0 -10l-10 10" stroke="#dc143c" stroke-width="2.2"/>')
        out.append(f'<text x="{lx + 16}" y="{ly + 10}" font-size="15">outliers ({n}, down-weighted)</text>')
    # the residuals
    if res_ma is not None:
        out.append('<g clip-path="url(#c2)" fill="none">')
        for v in grids:
            sel = (u.vg == v) & ~out_mask
            out.append(f'<path d="{_dots(axr.x(u.va[sel]), axr.y(res_ma[sel]))}" stroke="{colours[v]}" '
                       'stroke-width="5.2" stroke-linecap="round"/>')
        y0 = float(axr.y(0.0))
        out.append(f'<path d="M{axr.x0} {y0:.1f}H{axr.x1}" stroke="#000" stroke-width="1"/>')
        if out_mask.any():
            out.append(f'<path d="{_crosses(axr.x(u.va[out_mask]), axr.y(res_ma[out_mask]), 3.5)}" '
                       'stroke="#dc143c" stroke-width="1.6"/>')
        out.append("</g>")
    title = f"{u.label} \u2014 {result.model.title}"
    if result.converged:
        sub = (f"rms {result.rms_ma:.3g} mA, relative rms {100 * result.rel_rms:.2f} %, "
               f"{u.n_points} points, {len(grids)} grid curves")
    else:
        sub = f"FIT FAILED: {result.failure}"
    mid = (SVG_LEFT + SVG_RIGHT) / 2
    out.append(f'<text x="{mid:.0f}" y="26" font-size="18" text-anchor="middle">{_esc(title)}</text>')
    fill = "" if result.converged else ' fill="#b00020"'
    out.append(f'<text x="{mid:.0f}" y="52" font-size="16" text-anchor="middle"{fill}>{_esc(sub[:150])}</text>')
    out.append(f'<text x="9" y="{SVG_H - 9}" font-size="12" fill="#595959">{_esc(CAUTION)}</text>')
    out.append("</svg>\n")
    return "\n".join(out).encode("utf-8")
