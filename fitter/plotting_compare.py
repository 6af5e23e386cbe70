"""Several units' fitted plate curves on one plot (the web's Compare page), matplotlib Agg."""

from __future__ import annotations

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402

from . import CAUTION  # noqa: E402

#: at most this many grid curves are drawn (every k-th of the first unit's grid voltages)
MAX_GRIDS = 7
STYLES = ("-", "--", "-.", ":")


def _range_of(t):
    """(highest plate voltage [V], grid voltages [V]) a unit was measured at, or None."""
    if t.envelope is not None:
        return max(t.envelope.va_hi), sorted(set(t.envelope.vg), reverse=True)
    r = t.valid_range
    if r:
        va = r.get("va_v", r.get("va"))
        vg = r.get("vg_v", r.get("vg"))
        if va is not None and vg is not None:
            return float(va[1]), list(np.linspace(vg[1], vg[0], MAX_GRIDS))
    return None


def grid_choice(triodes) -> dict:
    """Which grid voltages the plot draws: ``{"drawn": [...], "measured": [...] or None,
    "left_out": [...], "step": k, "unit": label}``.  The first unit with a measured range
    gives them: all its measured grid voltages when there are at most :data:`MAX_GRIDS`, else
    every k-th from the highest (evenly spaced, k as small as keeps at most MAX_GRIDS), the
    others left out for legibility.  A unit without an envelope has no list of measured grid
    voltages (``measured`` None): MAX_GRIDS spread over its fitted range are drawn."""
    for t in triodes:
        r = _range_of(t)
        if r is None:
            continue
        g = [float(x) for x in r[1]]
        if t.envelope is None:
            return {"drawn": g, "measured": None, "left_out": [], "step": 1, "unit": t.label}
        step = max(1, -(-len(g) // MAX_GRIDS))
        drawn = g[::step]
        return {"drawn": drawn, "measured": g, "left_out": [x for x in g if x not in drawn], "step": step,
                "unit": t.label}
    return {"drawn": [0.0, -2.0, -4.0], "measured": None, "left_out": [], "step": 1, "unit": None}


def grid_note(choice) -> str:
    """One sentence on the grid voltages drawn, and those left out (for a page or the plot)."""
    drawn = ", ".join(f"{g:g}" for g in choice["drawn"]) + " V"
    if choice["measured"] is None:
        return f"Drawn at grid voltages {drawn}" + (
            f", spread over {choice['unit']}'s fitted range." if choice["unit"] else ".")
    n = len(choice["measured"])
    if not choice["left_out"]:
        return f"Drawn at every grid voltage {choice['unit']} was measured at: {drawn}."
    nth = {2: "second", 3: "third", 4: "fourth"}.get(choice["step"], f"{choice['step']}th")
    return (f"Drawn at every {nth} of the {n} grid voltages {choice['unit']} was measured at: {drawn}; "
            f"{', '.join(f'{g:g}' for g in choice['left_out'])} V left out for legibility.")


def compare_grid(triodes) -> tuple[np.ndarray, list]:
    """(plate voltages [V], grid voltages [V]) to draw: 0 to the highest plate voltage any unit
    was measured at, and the grid voltages of :func:`grid_choice`.  A unit with no range (a
    nominal model) takes the others' range."""
    known = [r for r in (_range_of(t) for t in triodes) if r is not None]
    va_max = max(r[0] for r in known) if known else 400.0
    return np.linspace(0.0, va_max, 300), grid_choice(triodes)["drawn"]


def plot_compare(triodes, ax=None, labels=None, dashed=(), title=None):
    """Each unit's model curves (one colour per unit, one line per grid voltage, each curve
    labelled with its grid voltage at its end) over a common plate-voltage range; returns the
    axes.

    ``labels``: the legend's name of each unit (default its label); ``dashed``: the indices of
    reference units (a type's nominal), drawn dashed in dark grey while the others are solid;
    ``title``: the plot's title (default: how many units, at which grid voltages)."""
    if ax is None:
        fig, ax = plt.subplots(figsize=(10.5, 6))
        fig.subplots_adjust(left=0.07, right=0.76, top=0.9, bottom=0.13)
    va, grids = compare_grid(triodes)
    colours = plt.get_cmap("tab10")
    labels = list(labels) if labels is not None else [t.label for t in triodes]
    dashed = set(dashed)
    top = 0.0
    first = []
    k_colour = 0
    extrapolated = False
    for k, t in enumerate(triodes):
        if k in dashed:
            c, ls, lw = "0.15", (0, (6, 3)), 1.6
        else:
            c = colours(k_colour % 10)
            ls = "-" if dashed else STYLES[k_colour % len(STYLES)]
            lw = 1.4
            k_colour += 1
        for j, g in enumerate(grids):
            with np.errstate(all="ignore"):
                ia = 1e3 * np.asarray(t.current(va, np.full_like(va, g)), float)
            ia = np.where(np.isfinite(ia), ia, np.nan)
            if t.envelope is None:
                ax.plot(va, ia, color=c, ls=ls, lw=lw, label=labels[k] if j == 0 else None)
            else:
                # solid (or the unit's style) where the unit was measured; beyond, a faint dotted
                # line: there the model extrapolates
                ok = t.envelope.covers(va, g, ia / 1e3)
                near = ok | np.r_[ok[1:], False] | np.r_[False, ok[:-1]]  # joined at the ends
                ax.plot(va, np.where(near, ia, np.nan), color=c, ls=ls, lw=lw, label=labels[k] if j == 0 else None)
                if not ok.all():
                    extrapolated = True
                    ax.plot(va, np.where(ok, np.nan, ia), color=c, ls=":", lw=0.9, alpha=0.6)
            if k == 0:
                first.append((g, ia))
        if t.envelope is not None:
            top = max(top, 1e3 * t.envelope.ia_max)
    ax.set_xlim(0, va[-1] * 1.06)
    top = (top or max(float(np.nanmax(ia)) for _, ia in first)) * 1.15
    ax.set_ylim(0, top)
    for g, ia in first:  # each grid curve of the first unit named where it leaves the frame or ends
        inside = np.flatnonzero(ia <= 0.97 * top)
        if inside.size:
            i = int(inside[-1])
            ax.annotate(f"{g:g} V", (va[i], ia[i]), fontsize=9, color="0.3", xytext=(3, 0), textcoords="offset points")
    ax.set_xlabel("plate voltage Va [V]", fontsize=11)
    ax.set_ylabel("plate current Ia [mA]", fontsize=11)
    ax.tick_params(labelsize=10)
    ax.grid(True, alpha=0.3)
    # beside the axes: inside, it covered the steep curves near 0 V and their labels
    if extrapolated:
        ax.plot([], [], color="0.4", ls=":", lw=0.9, label="beyond the unit's\nmeasured data\n(extrapolated)")
    ax.legend(loc="upper left", bbox_to_anchor=(1.01, 1.0), fontsize=9, title="unit (model curves)",
              title_fontsize=9, frameon=False)
    grid_text = "grid voltages " + ", ".join(f"{g:g}" for g in grids) + " V"
    choice = grid_choice(triodes)
    if choice["left_out"]:  # under the legend, beside the plot: which were left out
        import textwrap

        left = ", ".join(f"{g:g}" for g in choice["left_out"])
        ax.figure.text(0.775, 0.13, textwrap.fill(f"Not drawn, for legibility: {left} V "
                                                  f"(of the {len(choice['measured'])} measured)", 30),
                       fontsize=8.5, color="0.3", va="bottom", ha="left")
    if title is None:
        title = f"{len(triodes)} units compared at {grid_text}"
    else:
        title = f"{title}\nat {grid_text}"
    ax.set_title(title, fontsize=11)
    ax.figure.text(0.01, 0.01, CAUTION, fontsize=8, color="0.35")
    return ax


def save_compare_plot(triodes, path, **kw):
    """Write :func:`plot_compare` (keyword arguments passed on) to ``path`` (SVG or PNG by
    suffix), atomically; returns the path."""
    from .plotting_layout import save_figure as _save

    return _save(plot_compare(triodes, **kw).figure, path)
