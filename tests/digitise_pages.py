"""Synthetic datasheet pages for the digitiser's checks (issue 12), with their truth.

Each page is a printed-sheet style plot of an INVENTED truth tube's plate curves: black (or,
on one page, coloured) curves on a fine grid, axis labels, a label with each curve's grid
voltage beside it, and a load line drawn across the family.  The curves are computed through
:mod:`fitter.models`' own functions of the published equations:

* N. Koren, "Improved vacuum tube models for SPICE simulations", Glass Audio 8(5), 1996,
  revised 2003 (``koren``);
* K. Dempwolf, U. Zoelzer, "A physically-motivated triode model for circuit simulations",
  DAFx-11, Paris, 2011 (``dempwolf``).

The rendered page (matplotlib, Agg) is then turned like a scan or a photograph: rotated by up
to 2 degrees, blurred, given noise (and on one page a tinted, unevenly lit paper), and saved as
JPEG or PNG (Pillow).  Everything a test needs to simulate a user comes back with the bytes:
the pixel position of every axis tick mark and one pixel on each curve, computed through the
same transforms as the image (matplotlib's data -> display transform, then the rotation), the
plot area, the truth model and parameters and the grid voltages.  Every page has a fixed seed;
the same call gives the same bytes.

Pixel convention: ``(px, py)`` = (column, row) of the image with pixel centres at whole
numbers (row 0 at the top), as :mod:`fitter.digitise` uses.

Used by ``tests/test_digitise.py``, ``bench/digitise.py`` and the web front end's browser test.
Run as a script to write the pages to a folder: ``python tests/digitise_pages.py OUTDIR``.
"""

from __future__ import annotations

import io
import math
import sys
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from fitter.digitise import AxisMark, curve_points, curves_to_wide_csv, fit_axes, load_image, trace_curve
from fitter.models import get_model

__all__ = ["PageSpec", "Page", "PAGES", "SPECS", "make_page", "all_pages", "digitise_page", "page_errors",
           "mid_point"]


@dataclass(frozen=True)
class PageSpec:
    """How one synthetic page is drawn and degraded (all invented)."""

    name: str
    title: str
    model: str
    params: dict
    grid_voltages: tuple[float, ...]
    va_max: float                # plate voltage axis 0 .. va_max [V]
    ia_max_ma: float             # current axis 0 .. ia_max_ma [mA]
    va_step: float               # major grid / tick step [V]
    ia_step_ma: float            # major grid / tick step [mA]
    minor: int                   # minor grid divisions per major
    load_line: tuple[float, float]  # (B+ [V], current at va = 0 [mA]) of the printed load line
    rotate_deg: float = 0.0
    blur_px: float = 0.7
    noise: float = 0.02          # standard deviation of the added noise (0..1 scale)
    fmt: str = "jpeg"
    jpeg_quality: int = 80
    coloured: bool = False
    paper: float = 1.0           # paper brightness (tinted paper < 1)
    shading: float = 0.0         # brightness falling across the page (a photograph's light)
    seed: int = 1


@dataclass(frozen=True)
class Page:
    """A rendered page and its truth."""

    spec: PageSpec
    data: bytes
    width: int
    height: int
    #: tick marks: (px, py, axis, value) with axis "va" (V) or "ia" (mA)
    ticks: tuple[tuple[float, float, str, float], ...]
    #: one pixel on each curve: (grid voltage, px, py), in the order of spec.grid_voltages
    seeds: tuple[tuple[float, float, float], ...]
    #: plot area (x0, y0, x1, y1) in pixels: the axes' frame, rotated, its bounding box shrunk
    #: by the rotation so it stays inside the frame
    box: tuple[float, float, float, float]
    #: plate-voltage span drawn of each curve (va_lo, va_hi) [V]
    spans: tuple[tuple[float, float], ...] = field(default=())

    @property
    def format(self) -> str:
        return self.spec.fmt

    def truth_ma(self, va, vg):
        """The truth tube's plate current [mA]."""
        m = get_model(self.spec.model)
        return m.current(np.asarray(va, float), np.asarray(vg, float), **m.full_params(self.spec.params)) * 1e3


# Invented truth tubes (not any real type; parameters of the order of common types).
SPECS: dict[str, PageSpec] = {
    "high_mu": PageSpec(
        name="high_mu", title="TYPE HX-1 (invented) - average plate characteristics",
        model="koren", params=dict(mu=98.0, ex=1.42, kg1=1100.0, kp=580.0, kvb=320.0),
        grid_voltages=(0.0, -0.5, -1.0, -1.5, -2.0, -2.5, -3.0, -3.5),
        va_max=500.0, ia_max_ma=5.0, va_step=50.0, ia_step_ma=0.5, minor=5,
        load_line=(400.0, 4.0), rotate_deg=0.6, blur_px=0.7, noise=0.02, fmt="jpeg", jpeg_quality=80,
        seed=11),
    "power": PageSpec(
        name="power", title="TYPE PW-4 (invented) - average plate characteristics",
        model="dempwolf", params=dict(G=6.5e-4, mu=4.3, gamma=1.38, C=1.2),
        grid_voltages=(0.0, -10.0, -20.0, -30.0, -40.0, -50.0, -60.0, -70.0, -80.0),
        va_max=500.0, ia_max_ma=200.0, va_step=50.0, ia_step_ma=20.0, minor=5,
        load_line=(450.0, 180.0), rotate_deg=-1.2, blur_px=0.9, noise=0.03, fmt="jpeg", jpeg_quality=70,
        paper=0.86, shading=0.12, seed=22),
    "coloured": PageSpec(
        name="coloured", title="TYPE MC-7 (invented) - plate characteristics, colour print",
        model="koren", params=dict(mu=19.5, ex=1.33, kg1=1250.0, kp=260.0, kvb=280.0),
        grid_voltages=(0.0, -4.0, -8.0, -12.0, -16.0, -20.0),
        va_max=400.0, ia_max_ma=25.0, va_step=50.0, ia_step_ma=2.5, minor=5,
        load_line=(350.0, 20.0), rotate_deg=0.0, blur_px=0.6, noise=0.01, fmt="png", coloured=True, seed=33),
    "rotated": PageSpec(
        name="rotated", title="TYPE RT-2 (invented) - plate characteristics (scanned)",
        model="koren", params=dict(mu=36.0, ex=1.38, kg1=700.0, kp=420.0, kvb=250.0),
        grid_voltages=(0.0, -2.0, -4.0, -6.0, -8.0, -10.0),
        va_max=400.0, ia_max_ma=20.0, va_step=50.0, ia_step_ma=2.0, minor=5,
        load_line=(300.0, 15.0), rotate_deg=2.0, blur_px=1.1, noise=0.04, fmt="jpeg", jpeg_quality=30, seed=44),
}
PAGES = tuple(SPECS)

_COLOURS = ("#d62728", "#1f5fb4", "#2ca02c", "#9467bd", "#e07b00", "#8c564b", "#17a2b8", "#c2187a", "#556b2f")
#: figure size [in] and resolution: 2000 x 1500 pixels
_FIGSIZE = (10.0, 7.5)
_DPI = 200
#: axes rectangle in figure fractions (left, bottom, width, height)
_AXES_RECT = (0.09, 0.09, 0.86, 0.83)


def _curve_va(spec: PageSpec, vg: float):
    """Plate voltages where the curve is drawn: from where it leaves the axis (0.2 % of full
    scale, as a printed curve meets its axis) to where it leaves the plot (97 % of the current
    axis, or the voltage axis' end)."""
    m = get_model(spec.model)
    p = m.full_params(spec.params)
    va = np.linspace(0.0, spec.va_max, 4001)
    ia = m.current(va, np.full_like(va, vg), **p) * 1e3
    keep = (ia >= 0.002 * spec.ia_max_ma) & (ia <= 0.97 * spec.ia_max_ma)
    return va[keep], ia[keep]


def _render(spec: PageSpec):
    """The page as an RGB uint8 array and a function data -> (col, row) before degradation."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure
    from matplotlib.ticker import MultipleLocator

    fig = Figure(figsize=_FIGSIZE, dpi=_DPI, facecolor="white")
    FigureCanvasAgg(fig)
    ax = fig.add_axes(_AXES_RECT)
    ax.set_xlim(0.0, spec.va_max)
    ax.set_ylim(0.0, spec.ia_max_ma)
    ax.xaxis.set_major_locator(MultipleLocator(spec.va_step))
    ax.yaxis.set_major_locator(MultipleLocator(spec.ia_step_ma))
    ax.xaxis.set_minor_locator(MultipleLocator(spec.va_step / spec.minor))
    ax.yaxis.set_minor_locator(MultipleLocator(spec.ia_step_ma / spec.minor))
    ax.grid(True, which="major", color="0.35", linewidth=0.55)
    ax.grid(True, which="minor", color="0.6", linewidth=0.3)
    ax.tick_params(which="major", direction="in", length=6, width=0.8, labelsize=9)
    ax.tick_params(which="minor", direction="in", length=3, width=0.5)
    for s in ax.spines.values():
        s.set_linewidth(1.0)
    ax.set_xlabel("PLATE VOLTAGE (V)", fontsize=10)
    ax.set_ylabel("PLATE CURRENT (mA)", fontsize=10)
    ax.set_title(spec.title, fontsize=11)
    spans = []
    for k, vg in enumerate(spec.grid_voltages):
        va, ia = _curve_va(spec, vg)
        colour = _COLOURS[k % len(_COLOURS)] if spec.coloured else "black"
        ax.plot(va, ia, color=colour, linewidth=1.25, solid_capstyle="butt")
        spans.append((float(va[0]), float(va[-1])))
        # the grid voltage written beside the curve's upper end, as a printed sheet does
        j = int(0.88 * (va.size - 1))
        ax.annotate(f"Ec={vg:g}", (va[j], ia[j]), xytext=(-30, 6), textcoords="offset points", fontsize=8,
                    color=colour)
    bplus, i0 = spec.load_line
    ax.plot([0.0, bplus], [i0, 0.0], color="black", linewidth=0.9)
    ax.annotate("LOAD LINE (example)", (bplus * 0.75, i0 * 0.25), xytext=(8, 4), textcoords="offset points",
                fontsize=8, rotation=0)
    fig.text(0.5, 0.005, "INVENTED tube for testing - not a real type's data", ha="center", fontsize=8)
    fig.canvas.draw()
    rgba = np.asarray(fig.canvas.buffer_rgba())
    height = rgba.shape[0]
    trans = ax.transData

    def to_pixel(va, ia):
        d = trans.transform(np.column_stack([np.ravel(va), np.ravel(ia)]))
        return d[:, 0] - 0.5, height - d[:, 1] - 0.5

    frame = ax.get_window_extent()
    rect = (frame.x0 - 0.5, height - frame.y1 - 0.5, frame.x1 - 0.5, height - frame.y0 - 0.5)
    return rgba[:, :, :3].copy(), to_pixel, rect, tuple(spans)


def _rotate_points(x, y, deg, w, h):
    """Where Pillow's ``rotate(deg)`` (counter-clockwise about the image centre) puts (x, y)."""
    th = math.radians(deg)
    cx, cy = w / 2.0 - 0.5, h / 2.0 - 0.5
    dx, dy = np.asarray(x) - cx, np.asarray(y) - cy
    return cx + dx * math.cos(th) + dy * math.sin(th), cy - dx * math.sin(th) + dy * math.cos(th)


def make_page(name: str) -> Page:
    """Render page ``name`` (one of :data:`PAGES`) with its truth."""
    from PIL import Image
    from scipy.ndimage import gaussian_filter

    spec = SPECS[name]
    rgb, to_pixel, rect, spans = _render(spec)
    h, w = rgb.shape[:2]
    img = Image.fromarray(rgb)
    if spec.rotate_deg:
        img = img.rotate(spec.rotate_deg, resample=Image.BICUBIC, fillcolor=(255, 255, 255))
    a = np.asarray(img, dtype=np.float32) / 255.0
    if spec.blur_px:
        a = gaussian_filter(a, sigma=(spec.blur_px, spec.blur_px, 0))
    rng = np.random.default_rng(spec.seed)
    # paper tint and uneven light: every value is scaled (paper and ink alike, as lighting does)
    light = spec.paper * (1.0 - spec.shading * np.linspace(0.0, 1.0, w)[None, :] *
                          np.linspace(0.3, 1.0, h)[:, None])
    a = a * light[:, :, None]
    if spec.noise:
        a = a + rng.normal(0.0, spec.noise, size=a.shape).astype(np.float32)
    out = Image.fromarray(np.clip(a * 255.0 + 0.5, 0, 255).astype(np.uint8))
    buf = io.BytesIO()
    if spec.fmt == "jpeg":
        out.save(buf, format="JPEG", quality=spec.jpeg_quality)
    else:
        out.save(buf, format="PNG", compress_level=1)  # fast to write; a noisy page compresses little anyway

    def place(va, ia):
        x, y = to_pixel(va, ia)
        return _rotate_points(x, y, spec.rotate_deg, w, h)

    ticks = []
    va_t = np.arange(0.0, spec.va_max + 1e-9, spec.va_step)
    ia_t = np.arange(0.0, spec.ia_max_ma + 1e-9, spec.ia_step_ma)
    x, y = place(va_t, np.zeros_like(va_t))
    ticks += [(float(a_), float(b_), "va", float(v)) for a_, b_, v in zip(x, y, va_t)]
    x, y = place(np.zeros_like(ia_t), ia_t)
    ticks += [(float(a_), float(b_), "ia", float(v)) for a_, b_, v in zip(x, y, ia_t)]
    seeds = []
    for vg in spec.grid_voltages:
        va, ia = _curve_va(spec, vg)
        # a user clicks the curve somewhere in its middle stretch
        j = int(np.searchsorted(ia, 0.45 * ia.max()))
        x, y = place(va[j:j + 1], ia[j:j + 1])
        seeds.append((float(vg), float(x[0]), float(y[0])))
    # the frame's corners rotated; the box is their bounding box shrunk to lie inside the frame
    cx = np.array([rect[0], rect[2], rect[2], rect[0]])
    cy = np.array([rect[1], rect[1], rect[3], rect[3]])
    rx, ry = _rotate_points(cx, cy, spec.rotate_deg, w, h)
    xs, ys = np.sort(rx), np.sort(ry)
    box = (float(xs[1]), float(ys[1]), float(xs[2]), float(ys[2]))
    return Page(spec=spec, data=buf.getvalue(), width=w, height=h, ticks=tuple(ticks), seeds=tuple(seeds),
                box=box, spans=spans)


def all_pages() -> list[Page]:
    return [make_page(n) for n in PAGES]


# ---------------------------------------------------------------------------
# A simulated user, and the comparison with the truth (tests/test_digitise.py, bench/digitise.py)
# ---------------------------------------------------------------------------


def digitise_page(page, rng, use_box: bool = True):
    """What a user does: click every tick mark (+/- 1 px), click each curve once (+/- 1 px),
    name its grid voltage; then the engine's steps (with the page's plot area as the box, or
    none).  Returns (axis map, traces, CSV text)."""
    img = load_image(page.data, page.spec.name)
    marks = [AxisMark(x + rng.uniform(-1, 1), y + rng.uniform(-1, 1), axis, v) for x, y, axis, v in page.ticks]
    axes = fit_axes(marks)
    curves, traces = [], []
    for vg, sx, sy in page.seeds:
        tr = trace_curve(img, (sx + rng.uniform(-1, 1), sy + rng.uniform(-1, 1)), box=page.box if use_box else None)
        traces.append(tr)
        va, ia = curve_points(tr, axes, n=40)
        curves.append((vg, va, ia))
    text = curves_to_wide_csv(curves, tube=f"SHEET-{page.spec.name}", note="synthetic page (invented tube)")
    return axes, traces, text


def page_errors(page, fit):
    """(largest current error as a fraction of full scale over every drawn curve, and the
    relative errors of gm, rp, mu at the mid-range point) of a fit against the page's truth."""
    m = get_model(page.spec.model)
    fs = page.spec.ia_max_ma  # full scale: the current axis' top
    worst = 0.0
    for vg, (lo, hi) in zip(page.spec.grid_voltages, page.spans):
        va = np.linspace(lo, hi, 300)
        diff = m.current(va, np.full_like(va, vg), **fit.triode.params) * 1e3 - page.truth_ma(va, vg)
        worst = max(worst, float(np.abs(diff).max()) / fs)
    va0, vg0 = mid_point(page)
    ss = fit.triode.small_signal(va0, vg0, check=False)
    dva, dvg = m.voltage_gradient(va0, vg0, **m.full_params(page.spec.params))
    gm, rp = float(dvg), 1.0 / float(dva)
    return worst, {"gm": ss.gm / gm - 1.0, "rp": ss.rp / rp - 1.0, "mu": ss.mu / (gm * rp) - 1.0}


def mid_point(page):
    """The middle grid curve, where its truth current is 40 % of full scale (common practice:
    an operating point in the middle of the plotted family)."""
    gv = page.spec.grid_voltages
    k = len(gv) // 2
    lo, hi = page.spans[k]
    va = np.linspace(lo, hi, 4001)
    ia = page.truth_ma(va, gv[k])
    return float(va[np.searchsorted(ia, 0.4 * page.spec.ia_max_ma)]), float(gv[k])


if __name__ == "__main__":
    out = Path(sys.argv[1] if len(sys.argv) > 1 else ".")
    out.mkdir(parents=True, exist_ok=True)
    for p in all_pages():
        path = out / f"digitise_{p.spec.name}.{'jpg' if p.spec.fmt == 'jpeg' else 'png'}"
        path.write_bytes(p.data)
        print(path, p.width, "x", p.height, len(p.data), "bytes")
