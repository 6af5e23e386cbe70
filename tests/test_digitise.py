"""Tests of the datasheet-plot digitiser (fitter.digitise, issue 12).

Unit tests on small images drawn here (bad images, axis marks, tracing across crossings,
stop reasons, the wide CSV), then the issue's checks on the synthetic datasheet pages of
``tests/digitise_pages.py``: each page digitised with simulated clicks, fitted with the truth's
own model, and compared with the truth.

Every image and tube here is INVENTED.
"""

from __future__ import annotations

import functools
import io
import json
import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from PIL import Image, ImageDraw

import fitter.digitise as dg
from fitter.digitise import (
    AxisMap, AxisMark, DigitiseInputError, PlotImage, Trace, curve_points, curves_to_wide_csv, fit_axes,
    load_image, trace_curve,
)
from fitter.errors import InputError
from fitter.fit import fit_curves
from fitter.reader import CurveReadError, read_curves, read_text

from digitise_pages import PAGES, digitise_page, make_page, page_errors


# ---------------------------------------------------------------------------
# helpers: small pages drawn here
# ---------------------------------------------------------------------------

_SS = 4  # supersampling of the drawings (anti-aliased lines, as a renderer makes them)


def _draw(size, lines, paper=(255, 255, 255), fmt="PNG", quality=90, mode="RGB") -> bytes:
    """An image of ``size`` (w, h) with polylines ``(points, width_px, colour)`` drawn
    anti-aliased; points in pixel-centre coordinates."""
    w, h = size
    img = Image.new("RGB", (w * _SS, h * _SS), paper)
    d = ImageDraw.Draw(img)
    for pts, width, colour in lines:
        hi = [(_SS * x + (_SS - 1) / 2, _SS * y + (_SS - 1) / 2) for x, y in pts]
        d.line(hi, fill=colour, width=max(1, round(width * _SS)), joint="curve")
    img = img.resize((w, h), Image.BOX)
    if mode != "RGB":
        img = img.convert(mode)
    buf = io.BytesIO()
    img.save(buf, format=fmt, **({"quality": quality} if fmt == "JPEG" else {}))
    return buf.getvalue()


def _curve(x):
    """The test curve: a plate-curve-like rise (row decreasing as x grows)."""
    return 280.0 - 200.0 * ((np.asarray(x, float) - 20.0) / 360.0) ** 1.5


def _curve_page(extra=(), grid=True, fmt="PNG"):
    xs = np.linspace(20.0, 380.0, 400)
    lines = [(list(zip(xs, _curve(xs))), 2.5, (0, 0, 0))]
    if grid:
        for gx in range(5, 400, 37):   # vertical grid lines
            lines.append(([(gx, 0), (gx, 299)], 1.0, (90, 90, 90)))
        for gy in range(13, 300, 41):  # horizontal grid lines
            lines.append(([(0, gy), (399, gy)], 1.0, (90, 90, 90)))
    lines.extend(extra)
    return load_image(_draw((400, 300), lines, fmt=fmt), "test page")


# ---------------------------------------------------------------------------
# load_image
# ---------------------------------------------------------------------------


def _field(excinfo) -> str:
    return excinfo.value.field


@pytest.mark.parametrize("data, words", [
    (b"", "empty"),
    (b"GIF89a" + b"\0" * 100, "not a PNG or JPEG"),
    (b"%PDF-1.4 ...", "not a PNG or JPEG"),
    (b"\x89PNG\r\n\x1a\n" + b"garbage" * 20, "corrupt"),
    (b"\xff\xd8\xff\xe0" + b"\0" * 50, "corrupt"),
])
def test_load_image_refuses_what_is_not_an_image(data, words):
    with pytest.raises(DigitiseInputError) as e:
        load_image(data, "page.png")
    assert _field(e) == "image", e.value
    assert words in str(e.value) and "page.png" in str(e.value), str(e.value)
    assert isinstance(e.value, InputError)


@pytest.mark.parametrize("fmt", ["PNG", "JPEG"])
def test_load_image_refuses_truncated_files(fmt):
    data = _draw((200, 150), [([(0, 0), (199, 149)], 2, (0, 0, 0))], fmt=fmt)
    with pytest.raises(DigitiseInputError) as e:
        load_image(data[: len(data) // 2], "cut")
    assert _field(e) == "image"
    assert "truncated" in str(e.value) or "corrupt" in str(e.value), str(e.value)


def test_load_image_refuses_wrong_types_and_sizes(monkeypatch):
    with pytest.raises(DigitiseInputError, match="bytes") as e:
        load_image("not bytes")
    assert _field(e) == "image"
    with pytest.raises(DigitiseInputError, match="at least 32 pixels"):
        load_image(_draw((20, 20), []))
    # too many bytes: refused before anything is decoded
    with pytest.raises(DigitiseInputError, match="MB"):
        load_image(b"\x89PNG\r\n\x1a\n" + bytes(dg.MAX_IMAGE_BYTES))


def test_load_image_refuses_a_decompression_bomb_from_its_header():
    # 7000 x 6000 = 42 megapixels of one colour: a PNG of a few tens of kB
    img = Image.new("L", (7000, 6000), 255)
    buf = io.BytesIO()
    img.save(buf, format="PNG")
    assert len(buf.getvalue()) < dg.MAX_IMAGE_BYTES
    with pytest.raises(DigitiseInputError, match="megapixels") as e:
        load_image(buf.getvalue(), "bomb.png")
    assert _field(e) == "image"


def test_load_image_ink_on_grey_paper_with_coloured_lines():
    # grey paper (0.8), a red, a blue and a black line: all three are ink, the paper is not
    data = _draw((300, 200), [([(10, 50), (290, 50)], 3, (220, 20, 20)),
                              ([(10, 100), (290, 100)], 3, (20, 40, 200)),
                              ([(10, 150), (290, 150)], 3, (0, 0, 0))], paper=(204, 204, 204))
    img = load_image(data)
    assert isinstance(img, PlotImage) and img.format == "png"
    assert (img.width, img.height) == (300, 200) and img.ink.shape == (200, 300)
    assert img.ink.dtype == np.float32
    for row in (50, 100, 150):
        assert img.ink[row, 150] > 0.7, (row, img.ink[row, 150])
    assert float(np.abs(img.ink[20:40, :]).max()) < 0.05, "grey paper must read as paper"


def test_load_image_transparency_and_grey_modes():
    lines = [([(10, 60), (190, 60)], 3, (0, 0, 0))]
    for mode in ("L", "RGBA", "P", "LA"):
        img = load_image(_draw((200, 120), lines, mode=mode), mode)
        assert img.ink[60, 100] > 0.7 and img.ink[20, 100] < 0.05, mode
    # a transparent background is paper
    rgba = Image.new("RGBA", (100, 80), (0, 0, 0, 0))
    ImageDraw.Draw(rgba).line([(5, 40), (95, 40)], fill=(0, 0, 0, 255), width=3)
    buf = io.BytesIO()
    rgba.save(buf, format="PNG")
    img = load_image(buf.getvalue())
    assert img.ink[40, 50] > 0.7 and img.ink[10, 50] < 0.05
    # 16-bit grey
    a = np.full((80, 100), 60000, dtype=np.uint16)
    a[40:43, :] = 0
    buf = io.BytesIO()
    Image.fromarray(a).save(buf, format="PNG")
    img = load_image(buf.getvalue())
    assert img.ink[41, 50] > 0.7 and img.ink[10, 50] < 0.05


def test_load_image_applies_the_exif_orientation():
    # a photograph taken with the camera turned: stored 200 x 120 with "rotate 90 clockwise to
    # show" (EXIF orientation 6, the TIFF/EXIF standard's code): shown, and read, 120 x 200
    img = Image.new("RGB", (200, 120), (255, 255, 255))
    ImageDraw.Draw(img).line([(10, 20), (190, 20)], fill=(0, 0, 0), width=3)
    exif = Image.Exif()
    exif[0x0112] = 6
    buf = io.BytesIO()
    img.save(buf, format="JPEG", quality=95, exif=exif)
    got = load_image(buf.getvalue())
    assert (got.width, got.height) == (120, 200)
    # the line along the top of the stored image is a vertical line near the right when shown
    assert got.ink[100, 120 - 1 - 20] > 0.7 and got.ink[100, 20] < 0.1


# ---------------------------------------------------------------------------
# fit_axes
# ---------------------------------------------------------------------------


def _truth_map(rot_deg=1.5, skew_deg=0.8):
    """A rotated and skewed page: data -> pixel, and its marks along the two axes."""
    r, k = math.radians(rot_deg), math.radians(skew_deg)
    sx, sy = 4.0, -60.0  # px per V, px per mA (rows grow downwards)
    # va axis direction rotated by r; ia axis direction rotated by r + skew
    A = np.array([[sx * math.cos(r), -sy * math.sin(r + k)],
                  [sx * math.sin(r), sy * math.cos(r + k)]])
    origin = np.array([120.0, 1300.0])

    def to_px(va, ia):
        p = A @ np.vstack([np.ravel(va), np.ravel(ia)]) + origin[:, None]
        return p[0], p[1]

    return to_px


def _marks(to_px, va_values=(0, 100, 200, 300, 400), ia_values=(0, 5, 10, 15, 20), noise=0.0, rng=None):
    out = []
    for v in va_values:
        x, y = to_px(v, 0.0)
        out.append(AxisMark(float(x[0]), float(y[0]), "va", float(v)))
    for i in ia_values:
        x, y = to_px(0.0, i)
        out.append(AxisMark(float(x[0]), float(y[0]), "ia", float(i)))
    if noise:
        out = [AxisMark(m.px + rng.uniform(-noise, noise), m.py + rng.uniform(-noise, noise), m.axis, m.value)
               for m in out]
    return out


def test_fit_axes_recovers_rotation_and_skew_from_marks_along_the_axes():
    to_px = _truth_map()
    am = fit_axes(_marks(to_px))
    assert isinstance(am, AxisMap)
    # points in the middle of the plot, not on either axis (exact marks: exact map, to rounding)
    va = np.array([37.0, 150.0, 333.0, 390.0])
    ia = np.array([2.0, 17.5, 9.0, 19.0])
    x, y = to_px(va, ia)
    gva, gia = am.to_data(x, y)
    np.testing.assert_allclose(gva, va, atol=1e-6)
    np.testing.assert_allclose(gia, ia, atol=1e-8)
    bx, by = am.to_pixel(va, ia)
    np.testing.assert_allclose(bx, x, atol=1e-6)
    np.testing.assert_allclose(by, y, atol=1e-6)
    assert am.rms_px < 1e-6 and am.worst is None
    json.dumps(am.to_dict())


def test_fit_axes_with_marks_spread_over_the_plot_fits_a_full_affine_map():
    to_px = _truth_map(rot_deg=-2.0, skew_deg=0.0)
    marks = []
    for v, i in ((0, 3), (100, 12), (250, 7), (400, 18)):
        x, y = to_px(v, i)
        marks.append(AxisMark(float(x[0]), float(y[0]), "va", float(v)))
    for v, i in ((30, 0), (200, 10), (380, 20)):
        x, y = to_px(v, i)
        marks.append(AxisMark(float(x[0]), float(y[0]), "ia", float(i)))
    am = fit_axes(marks)
    assert am.kinds == ("affine", "affine")
    x, y = to_px(222.0, 13.0)
    gva, gia = am.to_data(x, y)
    assert abs(float(gva[0]) - 222.0) < 1e-6 and abs(float(gia[0]) - 13.0) < 1e-8


def test_fit_axes_two_marks_per_axis_is_axis_aligned():
    marks = [AxisMark(100, 900, "va", 0), AxisMark(900, 905, "va", 400),
             AxisMark(98, 900, "ia", 0), AxisMark(103, 100, "ia", 20)]
    am = fit_axes(marks)
    assert am.kinds == ("aligned", "aligned")
    # va from the column only, ia from the row only: 2 px per V, -40 px per mA
    assert am.va_coef == pytest.approx((-50.0, 0.5, 0.0))
    assert am.ia_coef == pytest.approx((22.5, 0.0, -0.025))
    assert am.residuals == (0.0, 0.0, 0.0, 0.0)


def test_fit_axes_names_the_bad_click():
    rng = np.random.default_rng(3)
    marks = _marks(_truth_map(), noise=0.5, rng=rng)
    m = marks[2]
    marks[2] = AxisMark(m.px + 8.0, m.py, m.axis, m.value)  # 8 px off along the va axis
    am = fit_axes(marks)
    assert am.worst == 2, am.residuals
    assert am.residuals[2] == max(am.residuals) and am.residuals[2] > 4.0, am.residuals
    # with good clicks nothing stands out
    good = fit_axes(_marks(_truth_map(), noise=0.5, rng=rng))
    assert good.worst is None, good.residuals
    assert good.rms_px < 1.0


@pytest.mark.parametrize("marks, field, words", [
    ([AxisMark(0, 0, "va", 0), AxisMark(10, 0, "ia", 1), AxisMark(0, 10, "ia", 0)], "marks", "two marks"),
    ([AxisMark(0, 0, "va", 0), AxisMark(10, 0, "va", float("nan")), AxisMark(0, 5, "ia", 1),
      AxisMark(0, 10, "ia", 0)], "marks[1].value", "finite"),
    ([AxisMark(0, 0, "va", 0), AxisMark(10, 0, "va", 100), AxisMark(0, 5, "ia", 1),
      AxisMark(0.1, 0.1, "va", 50), AxisMark(0, 10, "ia", 0)], "marks[3]", "same pixel"),
    ([AxisMark(0, 0, "va", 0), AxisMark(10, 0, "va", 0), AxisMark(0, 5, "ia", 1),
      AxisMark(0, 10, "ia", 0)], "marks[1].value", "same value"),
    ([AxisMark(0, 0, "volts", 0)], "marks[0].axis", "'va' or 'ia'"),
    ([(0, 0, "va", 0)], "marks[0]", "axis mark"),
    ([AxisMark(0, 0, "va", 0), AxisMark(float("inf"), 0, "va", 1)], "marks[1].px", "finite"),
    ([AxisMark(0, 0, "va", 0), AxisMark(0, 50, "va", 100), AxisMark(0, 5, "ia", 1),
      AxisMark(0, 10, "ia", 0)], "marks[1]", "same pixel column"),
    ([AxisMark(0, 0, "va", 0), AxisMark(100, 0, "va", 100), AxisMark(0, 50, "ia", 0),
      AxisMark(100, 50, "ia", 1), AxisMark(0, 150, "ia", 0.001), AxisMark(100, 150, "ia", 1.001)], "marks", "parallel"),
    ("va=0", "marks", "list"),
])
def test_fit_axes_errors_name_the_mark(marks, field, words):
    with pytest.raises(DigitiseInputError) as e:
        fit_axes(marks)
    assert e.value.field == field, str(e.value)
    assert words in str(e.value), str(e.value)


# ---------------------------------------------------------------------------
# trace_curve
# ---------------------------------------------------------------------------


def _on_curve(tr: Trace) -> float:
    """Largest distance [rows] of the trace from the drawn curve."""
    err = np.abs(tr.py - _curve(tr.px))
    return float(err.max())


def test_trace_follows_a_curve_across_grid_lines():
    img = _curve_page()
    tr = trace_curve(img, (200.0, float(_curve(200.0))))
    assert isinstance(tr, Trace)
    assert np.all(np.diff(tr.px) > 0), "ordered by px"
    # within a pixel everywhere (grid lines merge with it at crossings), a fraction on average
    assert _on_curve(tr) < 1.0, _on_curve(tr)
    assert float(np.mean(np.abs(tr.py - _curve(tr.px)))) < 0.25
    # the whole curve (it is drawn from x = 20 to 380), crossing every grid line
    assert tr.px.min() <= 24 and tr.px.max() >= 376, (tr.px.min(), tr.px.max())
    assert (tr.stop_left, tr.stop_right) == ("end of line", "end of line")
    d = tr.to_dict()
    json.dumps(d)
    assert d["n"] == tr.px.size


@pytest.mark.parametrize("line, tol", [
    ([(30, 40), (390, 290)], 1.0),     # a load line crossing the other way
    ([(20, 250), (390, 120)], 1.5),    # a line crossing at a shallow angle (slope -0.35 against -0.5 .. -0.8):
                                       # merged with the curve over some 15 columns, no valley between them
    ([(150, 0), (250, 299)], 1.0),     # a near-vertical line
])
def test_trace_crosses_other_lines(line, tol):
    img = _curve_page(extra=[(line, 2.0, (0, 0, 0))])
    for seed_x in (100.0, 300.0):
        tr = trace_curve(img, (seed_x, float(_curve(seed_x))))
        assert _on_curve(tr) < tol, (line, seed_x, _on_curve(tr))
        assert float(np.mean(np.abs(tr.py - _curve(tr.px)))) < 0.3
        assert tr.px.min() <= 24 and tr.px.max() >= 376, (line, seed_x, tr.px.min(), tr.px.max())


def test_trace_passes_a_label_beside_the_curve():
    # a block of "text" touching the curve from above over 12 columns
    x = 240.0
    y = float(_curve(x))
    block = [([(x, y - 14), (x + 12, y - 14)], 12.0, (0, 0, 0))]
    img = _curve_page(extra=block)
    tr = trace_curve(img, (120.0, float(_curve(120.0))))
    assert _on_curve(tr) < 1.0, _on_curve(tr)
    assert tr.px.max() >= 376


def test_trace_stop_reasons_box_and_edge():
    img = _curve_page()
    tr = trace_curve(img, (200.0, float(_curve(200.0))), box=(100, 0, 300, 299))
    assert (tr.stop_left, tr.stop_right) == ("box", "box")
    assert tr.px.min() >= 100 and tr.px.max() <= 300 and tr.px.max() >= 298
    xs = np.array([0.0, 399.0])
    ys = 150.0 + 0.2 * xs
    edge = load_image(_draw((400, 300), [(list(zip(xs, ys)), 2.5, (0, 0, 0))]))
    tr = trace_curve(edge, (200.0, 190.0))
    assert (tr.stop_left, tr.stop_right) == ("edge", "edge"), (tr.stop_left, tr.stop_right)
    assert tr.px.min() <= 1 and tr.px.max() >= 398
    np.testing.assert_allclose(tr.py, 150.0 + 0.2 * tr.px, atol=0.6)  # the line is cut square at the edges


def test_trace_stops_where_the_curve_runs_into_the_axis():
    # a curve that comes down onto a horizontal axis line and lies along it
    xs = np.linspace(0.0, 399.0, 400)
    ys = np.where(xs < 150, 250.0, 250.0 - 0.004 * (xs - 150) ** 2)
    img = load_image(_draw((400, 300), [(list(zip(xs, ys)), 2.5, (0, 0, 0)), ([(0, 250), (399, 250)], 2.0, (0, 0, 0))]))
    tr = trace_curve(img, (300.0, float(250.0 - 0.004 * 150 ** 2)))
    assert tr.stop_left == "end of line", tr.stop_left
    # the level stretch along the axis is left out (at most a few tens of px of it kept)
    assert tr.px.min() > 100, tr.px.min()


@pytest.mark.parametrize("k", [2, 8, 15])
def test_trace_steep_curve_ending_by_a_grid_line(k):
    # rising ever more steeply (slope up to about 1.5, 6 and 11 px per column), ending 3 px above
    # a horizontal grid line: followed to its end, and the grid line is not taken up after it
    xs = np.linspace(10, 390, 2000)

    def f(x):
        return 290 - 280 * ((np.asarray(x, float) - 10) / 380) ** k

    lines = [(list(zip(xs, f(xs))), 2.5, (0, 0, 0))]
    lines += [([(gx, 0), (gx, 299)], 1.0, (90, 90, 90)) for gx in range(5, 400, 37)]
    lines += [([(0, gy), (399, gy)], 1.0, (90, 90, 90)) for gy in range(13, 300, 41)]
    img = load_image(_draw((400, 300), lines))
    x0 = 10 + 380 * 0.5 ** (1 / k)
    tr = trace_curve(img, (x0, float(f(x0))))
    assert 388 <= tr.px.max() <= 391, tr.px.max()
    slope = 280 * k / 380 * ((tr.px - 10) / 380) ** (k - 1)
    # distance across the line (the row error shrunk by the slope) within a pixel
    across = np.abs(tr.py - f(tr.px)) / np.sqrt(1 + slope ** 2)
    assert float(across.max()) < 1.0, float(across.max())


def test_trace_seed_errors():
    img = _curve_page()
    with pytest.raises(DigitiseInputError) as e:
        trace_curve(img, (200.0, float(_curve(200.0)) - 25.0))  # 25 px above the curve, off the grid lines
    assert e.value.field == "seed" and "click on the curve" in str(e.value)
    with pytest.raises(DigitiseInputError) as e:
        trace_curve(img, (500.0, 10.0))
    assert e.value.field == "seed" and "outside" in str(e.value)
    with pytest.raises(DigitiseInputError) as e:
        trace_curve(img, ("a", 3))
    assert e.value.field == "seed"
    with pytest.raises(DigitiseInputError) as e:
        trace_curve(img, (float("nan"), 3))
    assert e.value.field == "seed"
    # on a vertical grid line only: not a curve
    with pytest.raises(DigitiseInputError) as e:
        trace_curve(img, (5.0, 150.0))
    assert e.value.field == "seed"
    with pytest.raises(DigitiseInputError) as e:
        trace_curve(img, (200.0, 150.0), box=(0, 0, 3, 3))
    assert e.value.field == "box"
    with pytest.raises(DigitiseInputError) as e:
        trace_curve(img, (200.0, 150.0), box=(0, 0, float("inf"), 3))
    assert e.value.field == "box"
    with pytest.raises(DigitiseInputError) as e:
        trace_curve(np.zeros((10, 10)), (1, 1))
    assert e.value.field == "image"


def test_trace_on_a_jpeg_with_coloured_line():
    xs = np.linspace(20.0, 380.0, 400)
    lines = [(list(zip(xs, _curve(xs))), 2.5, (200, 30, 30))]
    for gx in range(5, 400, 37):
        lines.append(([(gx, 0), (gx, 299)], 1.0, (120, 120, 200)))
    img = load_image(_draw((400, 300), lines, paper=(235, 230, 215), fmt="JPEG", quality=40))
    assert img.format == "jpeg"
    tr = trace_curve(img, (200.0, float(_curve(200.0))))
    assert _on_curve(tr) < 1.0
    assert tr.px.min() <= 24 and tr.px.max() >= 376


# ---------------------------------------------------------------------------
# curve_points, curves_to_wide_csv
# ---------------------------------------------------------------------------


def _aligned_map():
    # 1 px = 1 V from column 0; 10 px per mA, zero at row 300
    return fit_axes([AxisMark(0, 300, "va", 0), AxisMark(400, 300, "va", 400),
                     AxisMark(0, 300, "ia", 0), AxisMark(0, 0, "ia", 30)])


def test_curve_points_spread_along_the_curve():
    px = np.arange(20.0, 381.0)
    tr = Trace(px=px, py=_curve(px), stop_left="end of line", stop_right="end of line")
    va, ia = curve_points(tr, _aligned_map(), n=40)
    assert 30 <= va.size <= 40
    assert np.all(np.diff(va) > 0)
    # the points lie on the curve (the map: va = px, ia = (300 - py) / 10)
    np.testing.assert_allclose(ia, (300.0 - _curve(va)) / 10.0, atol=0.01)
    assert va[0] == pytest.approx(20.0) and va[-1] == pytest.approx(380.0)
    # spread by length on the page: steps along the curve agree to within a factor of two
    step = np.hypot(np.diff(va), 10 * np.diff(ia))
    assert step.max() < 2 * step.min(), step
    with pytest.raises(DigitiseInputError) as e:
        curve_points(tr, _aligned_map(), n=1)
    assert e.value.field == "n"
    with pytest.raises(DigitiseInputError) as e:
        curve_points(tr, "axes")
    assert e.value.field == "axes"
    for bad in (Trace(px=px, py=px[:-1], stop_left="box", stop_right="box"),
                Trace(px=np.array([1.0, np.nan]), py=np.array([1.0, 2.0]), stop_left="box", stop_right="box"),
                Trace(px=np.array([]), py=np.array([]), stop_left="box", stop_right="box")):
        with pytest.raises(DigitiseInputError) as e:
            curve_points(bad, _aligned_map())
        assert e.value.field == "trace"
    # points beyond the axes' zero lines (va < 0 or ia < 0 by more than a pixel) are dropped
    off = Trace(px=np.array([-5.0, -0.5, 10.0, 20.0, 30.0]), py=np.array([290.0, 290.0, 290.0, 301.5, 300.5]),
                stop_left="edge", stop_right="edge")
    va, ia = curve_points(off, _aligned_map())
    np.testing.assert_allclose(va, [-0.5, 10.0, 30.0])
    np.testing.assert_allclose(ia, [1.0, 1.0, -0.05])
    # a short trace comes back whole
    short = Trace(px=px[:5], py=_curve(px[:5]), stop_left="box", stop_right="box")
    assert curve_points(short, _aligned_map())[0].size == 5


def _curves():
    # (grid voltage, va, ia mA) of three invented curves with different plate voltages
    return [(0.0, [10.0, 50.0, 100.0, 150.0], [0.5, 3.2, 8.1, 14.0]),
            (-2.0, [50.0, 100.0, 150.0, 200.0, 250.0], [0.4, 2.9, 7.0, 12.2, 18.5]),
            (-4.5, [125.5, 200.0, 300.0], [0.3, 3.3, 10.25])]


def test_wide_csv_round_trip_through_the_reader(tmp_path):
    text = curves_to_wide_csv(_curves(), tube="SHEET-1", section="A", note="from page 3\nsecond line")
    assert "digitised from a datasheet plot" in text
    assert "va,ia_ma@vg=0,ia_ma@vg=-2,ia_ma@vg=-4.5" in text
    assert "\n150,14,7,\n" in text  # empty cell: no point of the third curve at 150 V
    res = read_text(text, file="digitised.csv")
    assert len(res.units) == 1 and not res.skipped
    u = res.units[0]
    assert (u.tube, u.section) == ("SHEET-1", "A")
    for vg, va, ia in _curves():
        m = u.vg == vg
        order = np.argsort(u.va[m])
        np.testing.assert_allclose(u.va[m][order], va)
        np.testing.assert_allclose(u.ia[m][order] * 1e3, ia)
    path = tmp_path / "digitised.csv"
    path.write_text(text)
    assert read_curves(path).units[0].n_points == 12


def test_wide_csv_note_cannot_rename_the_tube():
    text = curves_to_wide_csv(_curves(), tube="REAL", note="x\ntube: OTHER\n# section: Z")
    u = read_text(text).units[0]
    assert u.tube == "REAL" and u.section is None


@pytest.mark.parametrize("change, field", [
    (lambda c: c[:1] + [(c[1][0], c[1][1][:2], c[1][2][:2])] + c[2:], "curves[1]"),
    (lambda c: c[:2] + [(0.0, c[2][1], c[2][2])], "curves[2].grid_v"),
    (lambda c: c[:2] + [(-0.0, c[2][1], c[2][2])], "curves[2].grid_v"),
    (lambda c: [(c[0][0], c[0][1], [0.5, 3.2, float("nan"), 14.0])] + c[1:], "curves[0].ia[2]"),
    (lambda c: [(c[0][0], [10.0, 50.0, float("inf"), 150.0], c[0][2])] + c[1:], "curves[0].va[2]"),
    (lambda c: [(c[0][0], c[0][1], c[0][2][:3])] + c[1:], "curves[0]"),
    (lambda c: [(c[0][0], [10.0, 50.0, 50.0, 150.0], c[0][2])] + c[1:], "curves[0].va[2]"),
    (lambda c: [("x", c[0][1], c[0][2])] + c[1:], "curves[0].grid_v"),
    (lambda c: [(float("nan"), c[0][1], c[0][2])] + c[1:], "curves[0].grid_v"),
    (lambda c: [(0.0, "10,20,30", [1, 2, 3])], "curves[0].va"),
    (lambda c: [c[0][:2]], "curves[0]"),
    (lambda c: [], "curves"),
])
def test_wide_csv_errors_name_the_curve(change, field):
    with pytest.raises(DigitiseInputError) as e:
        curves_to_wide_csv(change(_curves()), tube="T")
    assert e.value.field == field, str(e.value)


@pytest.mark.parametrize("kw, field", [
    (dict(tube=""), "tube"), (dict(tube="a\nb"), "tube"), (dict(tube="x" * 65), "tube"),
    (dict(tube="T", section="A\x1b[31m"), "section"), (dict(tube="T,1"), "tube"),
    (dict(tube="T", note="ok\n\x1b[2J"), "note"), (dict(tube="T", note=5), "note"),
])
def test_wide_csv_refuses_bad_names(kw, field):
    with pytest.raises(DigitiseInputError) as e:
        curves_to_wide_csv(_curves(), **kw)
    assert e.value.field == field, str(e.value)


# ---------------------------------------------------------------------------
# Untrusted input: whatever comes in, only the digitiser's own error comes out
# ---------------------------------------------------------------------------

FUZZ = settings(max_examples=60, deadline=None)
_PNG_HEAD = _draw((40, 40), [([(0, 20), (39, 20)], 2, (0, 0, 0))])
_JPEG_HEAD = _draw((40, 40), [([(0, 20), (39, 20)], 2, (0, 0, 0))], fmt="JPEG")


@FUZZ
@given(st.sampled_from([b"", b"\x89PNG\r\n\x1a\n", b"\xff\xd8\xff", _PNG_HEAD[:60], _JPEG_HEAD[:200]]),
       st.binary(max_size=400), st.integers(0, 3))
def test_fuzz_load_image(head, tail, cut):
    # a real file's head, then garbage; or a real file with bytes flipped
    data = head + tail
    if cut == 3:
        data = bytearray(_PNG_HEAD)
        for k, b in enumerate(tail[:20]):
            data[(b * 7 + k * 13) % len(data)] ^= 0xFF
        data = bytes(data)
    try:
        img = load_image(data, "fuzz")
    except DigitiseInputError as e:
        assert e.field == "image"
        return
    assert img.ink.shape == (img.height, img.width) and np.isfinite(img.ink).all()


_num = st.one_of(st.floats(allow_nan=True, allow_infinity=True, width=64), st.integers(-10**6, 10**6))


@FUZZ
@given(st.lists(st.tuples(_num, _num, st.sampled_from(["va", "ia", "x"]), _num), max_size=8))
def test_fuzz_fit_axes(raw):
    marks = [AxisMark(*m) for m in raw]
    try:
        am = fit_axes(marks)
    except DigitiseInputError as e:
        assert e.field == "marks" or e.field.startswith("marks["), e.field
        return
    assert len(am.residuals) == len(marks)
    assert np.isfinite(am.va_coef).all() and np.isfinite(am.ia_coef).all()
    json.dumps(am.to_dict())


@FUZZ
@given(st.integers(0, 2**32 - 1), st.floats(-10, 80), st.floats(-10, 80),
       st.one_of(st.none(), st.tuples(st.floats(-20, 90), st.floats(-20, 90), st.floats(-20, 90), st.floats(-20, 90))))
def test_fuzz_trace_curve(seed, sx, sy, box):
    rng = np.random.default_rng(seed)
    a = (rng.random((64, 64, 3)) > rng.uniform(0.3, 0.99)).astype(np.uint8) * 255
    buf = io.BytesIO()
    Image.fromarray(a).save(buf, format="PNG")
    img = load_image(buf.getvalue())
    try:
        tr = trace_curve(img, (sx, sy), box=box)
    except DigitiseInputError as e:
        assert e.field in ("seed", "box"), e.field
        return
    assert tr.px.size >= 1 and np.all(np.diff(tr.px) > 0)
    assert tr.stop_left in ("edge", "end of line", "box") and tr.stop_right in ("edge", "end of line", "box")
    assert np.isfinite(tr.py).all()


_curve_st = st.tuples(
    st.floats(-200, 10).map(lambda v: round(v, 2)),
    st.lists(st.floats(0, 2000), min_size=3, max_size=12, unique=True),
    st.lists(st.floats(0, 500), min_size=12, max_size=12))


@FUZZ
@given(st.lists(_curve_st, min_size=2, max_size=5))
def test_fuzz_wide_csv_round_trip(raw):
    curves = [(g, va, ia[:len(va)]) for g, va, ia in raw]
    try:
        text = curves_to_wide_csv(curves, tube="FUZZ")
    except DigitiseInputError as e:
        assert e.field.startswith("curves["), e.field
        return
    try:
        unit = read_text(text).units[0]
    except CurveReadError as e:  # whatever the digitiser writes, the reader must take
        raise AssertionError(f"the reader refused the digitiser's CSV: {e}") from None
    for g, va, ia in curves:
        m = unit.vg == float(f"{g:.6g}")
        got = dict(zip(unit.va[m].tolist(), (unit.ia[m] * 1e3).tolist()))
        for a, b in zip(va, ia):
            assert got[float(f"{a:.6g}")] == pytest.approx(float(f"{b:.6g}"), rel=1e-12, abs=1e-12)


# ---------------------------------------------------------------------------
# The checks: synthetic datasheet pages digitised with simulated clicks, then fitted
# ---------------------------------------------------------------------------

#: issue 12, section 3: currents within 1.5 % of full scale of the truth, gm, rp and mu at a
#: mid-range point within 3 % (the goals set by the issue; the truth is the published Koren or
#: Dempwolf-Zoelzer equations at the page's invented parameters, see tests/digitise_pages.py)
CURRENT_TOL_FS = 0.015
SMALL_SIGNAL_TOL = 0.03


@functools.lru_cache(maxsize=None)
def _page(name):
    return make_page(name)


@pytest.mark.parametrize("name", PAGES)
def test_synthetic_page_digitised_and_fitted_matches_the_truth(name):
    page = _page(name)
    rng = np.random.default_rng(sum(map(ord, name)))
    axes, traces, text = digitise_page(page, rng)
    # the axis map: every tick mark's truth position maps to its value within about a pixel
    for x, y, axis, v in page.ticks:
        got = axes.to_data(x, y)[0 if axis == "va" else 1]
        scale = page.spec.va_max if axis == "va" else page.spec.ia_max_ma
        assert abs(float(got) - v) < 0.003 * scale, (name, axis, v, float(got))
    assert axes.worst is None, (name, axes.residuals)
    # each curve followed over most of its drawn length
    for (vg, _, _), tr, (lo, hi) in zip(page.seeds, traces, page.spans):
        va, _ = axes.to_data(tr.px, tr.py)
        covered = (min(float(va.max()), hi) - max(float(va.min()), lo)) / (hi - lo)
        # (the box is the rotated frame's inner rectangle, which cuts a short curve's end off)
        assert covered > 0.6, (name, vg, covered, tr.stop_left, tr.stop_right)
    res = read_text(text, file=f"{name}.csv")  # the reader takes the engine's CSV as it is
    assert len(res.units) == 1 and not res.skipped, res.skipped
    unit = res.units[0]
    assert unit.n_curves == len(page.spec.grid_voltages)
    fit = fit_curves(unit, page.spec.model)
    assert fit.converged, (name, fit.failure)
    worst, ss = page_errors(page, fit)
    assert worst <= CURRENT_TOL_FS, f"{name}: current error {100 * worst:.2f} % of full scale"
    for k, err in ss.items():
        assert abs(err) <= SMALL_SIGNAL_TOL, f"{name}: {k} off by {100 * err:+.2f} %"


@pytest.mark.parametrize("name", ["high_mu", "coloured"])
def test_synthetic_page_without_a_box(name):
    # no plot area given (the whole image): the tracer may run on along an axis into its tick
    # labels at the origin; what is beyond the axes' zero lines is left out of the points
    page = _page(name)
    _, traces, text = digitise_page(page, np.random.default_rng(1 + sum(map(ord, name))), use_box=False)
    res = read_text(text, file=f"{name}.csv")
    assert not res.skipped, res.skipped  # (points within a pixel under zero current: clipped with a note)
    fit = fit_curves(res.units[0], page.spec.model)
    assert fit.converged, fit.failure
    worst, ss = page_errors(page, fit)
    assert worst <= CURRENT_TOL_FS, f"{name}: current error {100 * worst:.2f} % of full scale"
    for k, err in ss.items():
        assert abs(err) <= SMALL_SIGNAL_TOL, f"{name}: {k} off by {100 * err:+.2f} %"


def test_pages_are_fixed_and_carry_their_truth():
    assert make_page("rotated").data == _page("rotated").data, "the generator must be deterministic (fixed seed)"
    a = _page("coloured")
    img = load_image(a.data)
    assert (img.width, img.height) == (2000, 1500) and img.format == "png"
    # every seed lies on ink, every tick mark within the image
    for vg, x, y in a.seeds:
        assert img.ink[int(round(y)) - 2:int(round(y)) + 3, int(round(x))].max() > 0.5, vg
    for x, y, *_ in a.ticks:
        assert 0 <= x < a.width and 0 <= y < a.height
