"""Plots of fits: measured points, fitted curves and residuals.  The only engine module
for fit plots that imports matplotlib (Agg backend, so it runs on a server)."""

from __future__ import annotations

from pathlib import Path

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402

from . import CAUTION  # noqa: E402
from .fit import FitResult  # noqa: E402
from .outfiles import plot_path, write_atomic  # noqa: E402

__all__ = ["plot_fit", "save_fit_plot", "CAUTION"]



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
    if axes is None:
        fig, axes = plt.subplots(2, 1, figsize=(8.0, 8.0), sharex=True,
                                 gridspec_kw={"height_ratios": [3, 1.3]})
    ax, axr = axes
    u = result.unit
    grids = np.unique(u.vg)
    cmap = plt.get_cmap("viridis")
    colours = {v: cmap(i / max(len(grids) - 1, 1)) for i, v in enumerate(sorted(grids, reverse=True))}
    # a failed fit has no meaningful outliers: its points are all shown as measured
    out = result.outliers if (result.outliers is not None and result.converged) else np.zeros(u.n_points, bool)
    # the fitted curves are drawn over the plate voltages the data cover, not beyond
    va_line = np.linspace(float(u.va.min()), float(u.va.max()), 300)
    for v in grids:
        sel = u.vg == v
        c = colours[v]
        ax.plot(u.va[sel & ~out], 1e3 * u.ia[sel & ~out], "o", ms=3.2, color=c, alpha=0.85)
        if result.converged:
            ia = result.model.current(va_line, np.full_like(va_line, v), **result.params)
            ax.plot(va_line, 1e3 * ia, "-", lw=1.3, color=c)
            # label each curve with its grid voltage at its upper end
            top = np.flatnonzero(1e3 * ia <= 1e3 * u.ia.max() * 1.05)
            if top.size:
                j = top[-1]
                ax.annotate(f"{v:g} V", (va_line[j], 1e3 * ia[j]), fontsize=7, color=c,
                            xytext=(2, 0), textcoords="offset points", va="center")
    if out.any():
        ax.plot(u.va[out], 1e3 * u.ia[out], "x", ms=7, mew=1.6, color="crimson",
                label=f"outliers ({int(out.sum())}, down-weighted)")
        ax.legend(loc="upper left", fontsize=8)
    title = f"{u.label} — {result.model.title}"
    if result.converged:
        sub = (f"rms {result.rms_ma:.3g} mA, relative rms {100 * result.rel_rms:.2f} %, "
               f"{u.n_points} points, {len(grids)} grid curves")
    else:
        sub = f"FIT FAILED: {result.failure}"
    ax.set_title(f"{title}\n{sub}", fontsize=10)
    ax.set_ylabel("plate current Ia [mA]")
    ax.set_ylim(bottom=0, top=1e3 * float(u.ia.max()) * 1.12 if u.ia.max() > 0 else 1)
    ax.set_xlim(left=0)
    ax.grid(alpha=0.3)
    if result.converged and result.residuals is not None:
        for v in grids:
            sel = (u.vg == v) & ~out
            axr.plot(u.va[sel], 1e3 * result.residuals[sel], "o", ms=2.8, color=colours[v])
        if out.any():
            axr.plot(u.va[out], 1e3 * result.residuals[out], "x", ms=6, color="crimson")
            lim = 1e3 * np.max(np.abs(result.residuals[~out])) * 1.6 if (~out).any() else None
            if lim:
                axr.set_ylim(-lim, lim)
        axr.axhline(0, color="k", lw=0.8)
    axr.set_xlabel("plate voltage Va [V]")
    axr.set_ylabel("model − data [mA]")
    axr.grid(alpha=0.3)
    fig = ax.figure
    fig.text(0.01, 0.005, CAUTION, fontsize=6.5, color="0.35")
    return ax, axr


def save_fit_plot(result: FitResult, path) -> Path:
    """Save :func:`plot_fit` to ``path`` (PNG, or PDF/SVG by suffix; no suffix adds .png),
    atomically (:func:`fitter.outfiles.write_atomic`); returns the path written."""
    path, fmt = plot_path(path)
    ax, _ = plot_fit(result)
    ax.figure.tight_layout(rect=(0, 0.015, 1, 1))
    try:
        write_atomic(path, lambda fh: ax.figure.savefig(fh, format=fmt, dpi=110))
    finally:
        plt.close(ax.figure)
    return path
