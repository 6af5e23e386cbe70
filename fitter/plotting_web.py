"""The spread of a stage over a stock (matplotlib, Agg): for the mid-band gain and the
standing current, every unit as a dot on a strip above a histogram, the median and the
min..max marked.  It draws the values of a :class:`fitter.stage.SpreadResult` and computes
no circuit figures of its own."""

from __future__ import annotations

import threading
from pathlib import Path

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402

from . import CAUTION  # noqa: E402
from .plotting_layout import margins  # noqa: E402
from .plotting_layout import save_figure as _save  # noqa: E402
from .stage.circuits import stage_title  # noqa: E402
from .stage.results import _describe  # noqa: E402

__all__ = ["plot_spread", "save_spread_plot", "SPREAD_FIGURES", "output_panels", "figure_bytes", "response_svg",
           "sweep_svg", "spread_svg"]

_rc_lock = threading.Lock()

#: the figures drawn, in order: mid-band gain and the operating point's current
SPREAD_FIGURES = ("gain", "ia")


def _panel(ax, values, labels, title, unit, colour):
    v = np.asarray(values, float)
    ok = np.isfinite(v)
    v, names = v[ok], [n for n, k in zip(labels, ok) if k]
    ax.set_title(title + (f" [{unit}]" if unit else ""), fontsize=10, y=1.0)
    if not v.size:
        ax.text(0.5, 0.5, "no unit has a value", ha="center", va="center", transform=ax.transAxes, color="0.4")
        ax.set_yticks([])
        return
    lo, med, hi = float(np.min(v)), float(np.median(v)), float(np.max(v))
    span = hi - lo
    bins = max(4, min(20, int(np.ceil(np.sqrt(v.size))) + 2))
    counts, _, _ = ax.hist(v, bins=bins if span > 0 else 1, color=colour, alpha=0.35, edgecolor=colour)
    top = float(np.max(counts)) if counts.size else 1.0
    # the strip: each unit a dot above the histogram (fixed jitter, so a plot is reproducible)
    rng = np.random.default_rng(0)
    y = top * (1.1 + 0.2 * rng.random(v.size))
    ax.plot(v, y, "o", ms=4, color=colour, alpha=0.8, mec="white", mew=0.5)
    ax.axvline(med, color="k", lw=1.4, ls="--")
    ax.annotate(f"median {med:.4g}", (med, top * 1.45), ha="center", va="center", fontsize=8,
                bbox=dict(boxstyle="round,pad=0.2", fc="white", ec="0.5", alpha=0.9))
    for x, name in ((lo, "min"), (hi, "max")):
        who = names[int(np.argmin(np.abs(v - x)))]
        ax.axvline(x, color="0.45", lw=0.9, ls=":")
        ax.annotate(f"{name} {x:.4g}\n{who}", (x, top * 1.8), xytext=(3 if name == "min" else -3, 0),
                    textcoords="offset points", ha="left" if name == "min" else "right", va="top", fontsize=8)
    ax.set_ylim(0, top * 1.85)
    ax.set_yticks([t for t in ax.get_yticks() if 0 <= t <= top and float(t).is_integer()])
    ax.set_ylabel("units")
    ax.set_xlabel(title + (f" [{unit}]" if unit else ""))
    ax.grid(alpha=0.3)


def plot_spread(res, title_type: str | None = None):
    """Draw the spread of ``res`` (:class:`fitter.stage.SpreadResult`); returns the axes."""
    names = [k for k in SPREAD_FIGURES if k in res.values]
    fig, axes = plt.subplots(1, len(names), figsize=(4.5 * len(names), 3.9), squeeze=False)
    colours = ("tab:blue", "tab:orange")
    for ax, key, c in zip(axes[0], names, colours):
        _, scale, unit, label = _describe(key)
        _panel(ax, np.asarray(res.values[key], float) * scale, res.labels, label, unit, c)
    who = f"{len(res.labels)} " + ("pairs" if res.pairing else "units") + (f" of type {title_type}" if title_type else "")
    fig.suptitle(f"{stage_title(res.stage)} over {who}" + (f"\n({res.pairing})" if res.pairing else ""), fontsize=10)
    fig.text(0.01, 0.005, CAUTION, fontsize=6.5, color="0.3")
    # fixed margins (a layout engine would draw the figure once more): the title (two
    # lines with a pairing) above, x labels over the caution below, y labels left of each
    margins(fig, left=0.65, right=0.2, top=0.85 if res.pairing else 0.6, bottom=0.7, wspace=0.75)
    return axes[0]


def save_spread_plot(res, path, title_type: str | None = None) -> Path:
    """Save :func:`plot_spread` (PNG, SVG or PDF by the suffix); returns the path written."""
    axes = plot_spread(res, title_type)
    return _save(axes[0].figure, path)


def figure_bytes(fig, fmt: str = "svg") -> bytes:
    """``fig`` as SVG or PNG bytes (dpi 120), then closed.  An SVG keeps its text as text
    (``svg.fonttype`` "none": the browser sets it in its sans-serif face): a third of the
    size, and no glyph outlines to write."""
    import io

    if fmt not in ("svg", "png"):
        raise ValueError(f"figure_bytes: svg or png, got {fmt!r}")
    buf = io.BytesIO()
    try:
        # rcParams are global: one save at a time changes them (a server has threads)
        with _rc_lock, matplotlib.rc_context({"svg.fonttype": "none"}):
            fig.savefig(buf, format=fmt, dpi=120)
    finally:
        plt.close(fig)
    return buf.getvalue()


def response_svg(fr) -> bytes:
    """:func:`fitter.plotting_design.plot_response` as SVG bytes (:func:`figure_bytes`)."""
    from .plotting_design import plot_response

    return figure_bytes(plot_response(fr)[0].figure)


def sweep_svg(sw, figures=None) -> bytes:
    """:func:`fitter.plotting_design.plot_sweep` as SVG bytes (:func:`figure_bytes`)."""
    from .plotting_design import plot_sweep

    return figure_bytes(plot_sweep(sw, figures)[0, 0].figure)


def spread_svg(res, title_type: str | None = None) -> bytes:
    """:func:`plot_spread` as SVG bytes (:func:`figure_bytes`)."""
    return figure_bytes(plot_spread(res, title_type)[0].figure)


def output_panels(run, fmt: str = "svg") -> list:
    """The panels of :func:`fitter.plotting_output.plot_output` for ``run`` (an
    :class:`fitter.service.output.OutputRun`), each drawn into a figure of its own: a list
    of the figures' bytes (``svg`` or ``png``, :func:`figure_bytes`), each with the caution.
    Each figure is laid out with fixed margins (its legend's height counted from its
    entries) and drawn once, by the save."""
    from .plotting_layout import LEGEND_GAP, legend_height, log_ticks
    from .plotting_output import plot_output

    push_pull = run.result.stage.kind != "single-ended"
    n = 2 + (run.sweep is not None) + push_pull
    figs = [plt.figure(figsize=(6.4, 5.4)) for _ in range(n)]
    try:
        axes = plot_output(run, axes=[f.add_subplot(1, 1, 1) for f in figs])
        for i, (f, ax) in enumerate(zip(figs, axes)):
            if f is not figs[0]:  # plot_output captions the first figure itself
                f.text(0.01, 0.005, CAUTION, fontsize=6, color="0.3")
            # right: the composite's drive labels beside its curves, the sweep's THD axis
            right = 0.8 if (run.sweep is not None and i == n - 1) else 0.6 if (push_pull and i == 2) else 0.3
            margins(f, left=0.8, right=right, top=0.4, bottom=LEGEND_GAP + legend_height(ax) + 0.2)
        log_ticks(axes[1], "x")
        log_ticks(axes[1], "y")
        return [figure_bytes(f, fmt) for f in figs]
    finally:
        for f in figs:
            plt.close(f)
