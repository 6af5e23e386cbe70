"""Digitising a datasheet plot, step by step, for every front end (the web page and the API).

The steps: upload an image (:func:`upload_plot`); mark points of known value on the axes
(:func:`set_axes` -> the axis map and each mark's residual, the worst named); optionally the
plot area (``box``); click each curve once (:func:`trace` -> its points in image pixels and in
volts and milliamperes); correct points and give each curve its grid voltage
(:func:`set_curves`); save the curves as a measurement of a tube and fit it (:func:`save`:
the engine's wide-layout CSV through the ordinary upload import, the instrument marked
:data:`INSTRUMENT`), with the fitted curves mapped back to pixels to draw over the image.

The work in progress lives in the ledger (:mod:`fitter.ledger.plots`) after every step, so a
reload or another device resumes it.  Points are kept in image pixels (what the user placed);
volts and milliamperes are derived from the current axis marks whenever they are needed.

Plain fields in, JSON-ready dicts out; every error is an :class:`~fitter.errors.InputError`
naming the field (``marks[2].value``, ``curves[1].points[4]``, ``seed``).  No Flask here.
The numerics are the engine's (:mod:`fitter.digitise`); decoded images are kept in a small
in-process cache keyed by the image's SHA-256, so tracing does not decode the file each time.
"""

from __future__ import annotations

import hashlib
import math
import threading
from collections import OrderedDict

from ..errors import InputError, NotFound
from ..text import plain_text, shown
from .stock import _ledger, _user

__all__ = ["upload_plot", "plot_info", "plot_image", "list_plots", "set_axes", "trace", "set_curves", "save",
           "INSTRUMENT", "MAX_MARKS", "MAX_CURVES", "MAX_POINTS", "image_cache"]

#: the instrument recorded with a measurement saved from a plot
INSTRUMENT = "datasheet plot (digitised)"
MAX_MARKS = 40
MAX_CURVES = 40
MAX_POINTS = 2000  # per curve
#: points per traced curve by default (spread along the curve), and the range one may ask for
TRACE_POINTS, TRACE_POINTS_RANGE = 40, (3, 400)
#: samples of each fitted curve drawn back over the image
OVERLAY_SAMPLES = 80
_MAX_ID = 2**63 - 1
_MIME = {"png": "image/png", "jpeg": "image/jpeg"}


# -- the decoded-image cache ---------------------------------------------------------------


class ImageCache:
    """Decoded images (:class:`fitter.digitise.PlotImage`) by SHA-256 of their bytes, the least
    recently used dropped first once more than ``max_bytes`` of ink arrays are held (the most
    recent one is always kept)."""

    def __init__(self, max_bytes: int = 400 * 1024 * 1024):
        self.max_bytes = max_bytes
        self._items: OrderedDict = OrderedDict()
        self._lock = threading.Lock()
        self.hits = self.misses = 0

    def get(self, sha: str, load):
        with self._lock:
            if sha in self._items:
                self._items.move_to_end(sha)
                self.hits += 1
                return self._items[sha]
        image = load()
        with self._lock:
            self.misses += 1
            self._items[sha] = image
            while len(self._items) > 1 and sum(i.ink.nbytes for i in self._items.values()) > self.max_bytes:
                self._items.popitem(last=False)
        return image

    def put(self, sha: str, image):
        self.get(sha, lambda: image)

    def __len__(self):
        return len(self._items)


image_cache = ImageCache()


# -- checking what was sent -------------------------------------------------------------------


def _plot_id(value) -> int:
    if isinstance(value, bool):
        raise InputError("a plot id is a whole number", field="id")
    try:
        i = int(value)
    except (TypeError, ValueError, OverflowError):
        raise InputError(f"a plot id is a whole number, got {shown(str(value))[:40]!r}", field="id") from None
    if i < 1 or i > _MAX_ID:
        raise NotFound(f"no plot {i} in the ledger", field="id")
    return i


def _number(value, field, *, allow_none=False):
    """A finite float from a JSON number or numeric text ("-2.5"); None when allowed and empty."""
    if allow_none and (value is None or (isinstance(value, str) and not value.strip())):
        return None
    if isinstance(value, bool):
        raise InputError("must be a number", field=field)
    if isinstance(value, str):
        from ..units import parse_value

        try:
            value = parse_value(value.strip())
        except ValueError:
            raise InputError(f"must be a number, got {shown(value)[:40]!r}", field=field) from None
    if not isinstance(value, (int, float)):
        raise InputError(f"must be a number, got {type(value).__name__}", field=field)
    try:
        v = float(value)
    except OverflowError:
        v = math.inf
    if not math.isfinite(v):
        raise InputError("must be a finite number", field=field)
    return v


def _pixel(value, field, info) -> tuple[float, float]:
    """(px, py) from ``[px, py]`` or ``{"px", "py"}``, inside the image (its edges included)."""
    if isinstance(value, dict):
        pair = (value.get("px"), value.get("py"))
    elif isinstance(value, (list, tuple)) and len(value) == 2:
        pair = tuple(value)
    else:
        raise InputError("must be a pixel position [px, py]", field=field)
    px, py = _number(pair[0], field), _number(pair[1], field)
    if not (0.0 <= px <= info["width"] and 0.0 <= py <= info["height"]):
        raise InputError(f"({px:g}, {py:g}) is outside the image ({info['width']} x {info['height']} pixels)",
                         field=field)
    return px, py


def _box(value, info):
    if value is None:
        return None
    if not (isinstance(value, (list, tuple)) and len(value) == 4):
        raise InputError("must be [x0, y0, x1, y1] in image pixels, or null for the whole image", field="box")
    x0, y0 = _pixel(value[:2], "box", info)
    x1, y1 = _pixel(value[2:], "box", info)
    x0, x1 = sorted((x0, x1))
    y0, y1 = sorted((y0, y1))
    if x1 - x0 < 4 or y1 - y0 < 4:
        raise InputError("the plot area must be at least 4 pixels wide and high", field="box")
    return [x0, y0, x1, y1]


def _marks(value, info) -> list:
    if not isinstance(value, (list, tuple)):
        raise InputError("must be a list of marks {px, py, axis, value}", field="marks")
    if len(value) > MAX_MARKS:
        raise InputError(f"at most {MAX_MARKS} marks, got {len(value)}", field="marks")
    out = []
    for i, m in enumerate(value):
        f = f"marks[{i}]"
        if not isinstance(m, dict):
            raise InputError("must be an object {px, py, axis, value}", field=f)
        unknown = sorted(set(m) - {"px", "py", "axis", "value"})
        if unknown:
            raise InputError("not a field of a mark (px, py, axis, value)", field=f"{f}.{unknown[0]}")
        if m.get("axis") not in ("va", "ia"):
            raise InputError("must be 'va' (plate voltage axis, V) or 'ia' (plate current axis, mA)",
                             field=f"{f}.axis")
        px, py = _pixel([m.get("px"), m.get("py")], f"{f}.px", info)
        out.append({"px": px, "py": py, "axis": m["axis"], "value": _number(m.get("value"), f"{f}.value")})
    return out


def _curves(value, info) -> list:
    if not isinstance(value, (list, tuple)):
        raise InputError("must be a list of curves {grid_v, points}", field="curves")
    if len(value) > MAX_CURVES:
        raise InputError(f"at most {MAX_CURVES} curves, got {len(value)}", field="curves")
    out = []
    for i, c in enumerate(value):
        f = f"curves[{i}]"
        if not isinstance(c, dict):
            raise InputError("must be an object {grid_v, points}", field=f)
        unknown = sorted(set(c) - {"grid_v", "points", "seed"})
        if unknown:
            raise InputError("not a field of a curve (grid_v, points, seed)", field=f"{f}.{unknown[0]}")
        pts = c.get("points", [])
        if not isinstance(pts, (list, tuple)):
            raise InputError("must be a list of pixel positions [px, py]", field=f"{f}.points")
        if len(pts) > MAX_POINTS:
            raise InputError(f"at most {MAX_POINTS} points per curve, got {len(pts)}", field=f"{f}.points")
        curve = {"grid_v": _number(c.get("grid_v"), f"{f}.grid_v", allow_none=True),
                 "points": [list(_pixel(p, f"{f}.points[{j}]", info)) for j, p in enumerate(pts)]}
        if c.get("seed") is not None:
            curve["seed"] = list(_pixel(c["seed"], f"{f}.seed", info))
        out.append(curve)
    return out


def _axis_map(marks):
    """The engine's axis map of complete marks (at least two on each axis), else None."""
    from ..digitise import AxisMark, fit_axes

    counts = {a: sum(1 for m in marks if m["axis"] == a) for a in ("va", "ia")}
    if min(counts.values()) < 2:
        return None
    return fit_axes([AxisMark(px=m["px"], py=m["py"], axis=m["axis"], value=m["value"]) for m in marks])


def _need_axes(marks):
    axes = _axis_map(marks)
    if axes is None:
        raise InputError("mark at least two points of known value on each axis first (step 1)", field="marks")
    return axes


def _floats(a) -> list:
    return [float(x) for x in a]


def _with_data(curves, axes) -> list:
    """The curves with each point's plate voltage [V] and current [mA] (when the axes are set)."""
    import numpy as np

    out = []
    for c in curves:
        d = dict(c)
        if axes is not None and c["points"]:
            p = np.asarray(c["points"], float)
            va, ia = axes.to_data(p[:, 0], p[:, 1])
            d["va"], d["ia_ma"] = _floats(np.asarray(va, float)), _floats(np.asarray(ia, float))
        out.append(d)
    return out


def _axes_dict(axes, marks) -> dict | None:
    if axes is None:
        return None
    d = axes.to_dict()
    d["residuals"] = _floats(axes.residuals)
    d["rms_px"] = float(axes.rms_px)
    d["worst"] = None if axes.worst is None else int(axes.worst)
    # two marks on an axis fix its scale exactly: their residuals are zero by construction and
    # check nothing; only a third mark can disagree with the others
    counts = _counts(marks)
    d["checked"] = {a: counts[a] > 2 for a in ("va", "ia")}
    d["exact"] = [not d["checked"][m["axis"]] for m in marks]
    d["rms_px_axis"] = {a: (float(math.sqrt(sum(r * r for r, m in zip(axes.residuals, marks) if m["axis"] == a)
                                           / counts[a])) if d["checked"][a] else None) for a in ("va", "ia")}
    d["summary"] = _axes_summary(d, counts)
    if axes.worst is not None:
        m = marks[axes.worst]
        d["worst_message"] = (f"mark {axes.worst + 1} ({'plate voltage' if m['axis'] == 'va' else 'current'} "
                              f"{m['value']:g}) is {axes.residuals[axes.worst]:.1f} px from where the other marks "
                              "put that value: check its position and value")
    return d


_AXIS_NAMES = {"va": "plate voltage", "ia": "current"}


def _axes_summary(d, counts) -> str:
    """One sentence on how far the marks can be trusted: the rms distance of the marks from
    the fitted axes where an axis has three or more marks; where it has two, that they fix
    the scale exactly and a third mark gives a check (a 0 px residual there checks nothing)."""
    exact = [a for a in ("va", "ia") if not d["checked"][a]]
    checked = [a for a in ("va", "ia") if d["checked"][a]]
    if not checked:
        return ("Axes set. Two marks on each axis fix the scale exactly, so nothing checks them yet: "
                "a third mark on an axis gives a check.")
    if not exact:
        return f"Axes set. The marks lie {d['rms_px']:.2f} px (rms) off the fitted axes."
    a, e = checked[0], exact[0]
    return (f"Axes set. The {counts[a]} {_AXIS_NAMES[a]} marks lie {d['rms_px_axis'][a]:.2f} px (rms) off their "
            f"fitted scale; the two {_AXIS_NAMES[e]} marks fix theirs exactly: a third mark on that axis gives a check.")


def _counts(marks) -> dict:
    return {a: sum(1 for m in marks if m["axis"] == a) for a in ("va", "ia")}


# -- the use cases ----------------------------------------------------------------------------


def upload_plot(db, user, name, data) -> dict:
    """Store an uploaded datasheet plot (PNG or JPEG, checked by the engine's ``load_image``);
    ``{"id", "name", "width", "height", "format"}``."""
    from ..digitise import MAX_IMAGE_BYTES, load_image
    from ..ledger import plots

    who = _user(user)
    name = shown(str(name or "plot"))[:200] or "plot"
    if not isinstance(data, (bytes, bytearray)) or not data:
        raise InputError("choose an image file (PNG or JPEG)", field="file")
    if len(data) > MAX_IMAGE_BYTES:
        raise InputError(f"{name} is {len(data):,} bytes; at most {MAX_IMAGE_BYTES:,} bytes per image", field="file")
    try:
        image = load_image(bytes(data), name)
    except InputError as e:
        raise InputError(e.message, field="file") from None
    sha = hashlib.sha256(data).hexdigest()
    with _ledger(db) as ledger:
        pid = plots.add_plot(ledger, name, sha, image.format, image.width, image.height, bytes(data), who)
    image_cache.put(sha, image)
    return {"id": pid, "name": name, "width": int(image.width), "height": int(image.height), "format": image.format}


def plot_info(db, plot_id) -> dict:
    """A plot's facts and its work: ``{"id", "name", "width", "height", "format", ..., "marks",
    "box", "curves" (with va and ia_ma once the axes are set), "axes" (the axis map with
    residuals, or None), "saved", "measurement_ids"}``."""
    from ..ledger import plots

    pid = _plot_id(plot_id)
    with _ledger(db) as ledger:
        info = plots.plot_row(ledger, pid)
    state = info.pop("state")
    marks = state.get("marks") or []
    try:
        axes = _axis_map(marks)
    except InputError:  # marks stored by an older engine that it now refuses: shown, not fatal
        axes = None
    info.update({"marks": marks, "box": state.get("box"), "curves": _with_data(state.get("curves") or [], axes),
                 "axes": _axes_dict(axes, marks), "counts": _counts(marks), "saved": state.get("saved")})
    return info


def plot_image(db, plot_id) -> tuple[bytes, str]:
    """(the image's bytes as uploaded, its MIME type)."""
    from ..ledger import plots

    pid = _plot_id(plot_id)
    with _ledger(db) as ledger:
        data, fmt = plots.plot_content(ledger, pid)
    return data, _MIME.get(fmt, "application/octet-stream")


def list_plots(db, limit=50) -> list:
    from ..ledger import plots

    with _ledger(db) as ledger:
        return plots.list_plots(ledger, limit)


def _state_of(ledger, pid):
    from ..ledger import plots

    info = plots.plot_row(ledger, pid)
    return info, dict(info["state"])


def set_axes(db, plot_id, marks, box=None) -> dict:
    """Store the axis marks (and the plot area ``box`` = [x0, y0, x1, y1] pixels, or None) and
    fit the axis map once each axis has two marks: ``{"marks", "box", "axes" (coefficients,
    ``residuals`` per mark [px], ``rms_px``, ``worst`` and ``worst_message``; ``checked`` per
    axis (more than two marks: two fix an axis exactly and check nothing), ``exact`` per mark,
    ``rms_px_axis`` (None for an exact axis) and ``summary``, the sentence a page shows; or
    None), "counts"}``.  Marks the engine refuses (two at one pixel, equal values) are an error
    naming the mark, and nothing is stored."""
    from ..ledger import plots

    pid = _plot_id(plot_id)
    with _ledger(db) as ledger:
        info, state = _state_of(ledger, pid)
        marks = _marks(marks, info)
        box = _box(box, info)
        axes = _axis_map(marks)
        state = plots.save_state(ledger, pid, marks=marks, box=box)
    return {"id": pid, "marks": marks, "box": box, "axes": _axes_dict(axes, marks), "counts": _counts(marks),
            "curves": _with_data(state.get("curves") or [], axes)}


def _decoded(ledger, info):
    from ..digitise import load_image
    from ..ledger import plots

    def load():
        data, _ = plots.plot_content(ledger, info["id"])
        return load_image(data, info["name"])

    return image_cache.get(info["sha256"], load)


def trace(db, plot_id, seed, box=None, n=TRACE_POINTS) -> dict:
    """Follow the curve through ``seed`` ([px, py]) within ``box`` (else the stored plot area,
    else the whole image): ``{"px", "py", "va", "ia_ma", "points", "stop_left",
    "stop_right"}`` with about ``n`` points spread along the curve.  Nothing is stored (the
    front end adds the curve with :func:`set_curves`)."""
    import numpy as np

    from ..digitise import curve_points, trace_curve

    pid = _plot_id(plot_id)
    if isinstance(n, bool) or not isinstance(n, int) or not TRACE_POINTS_RANGE[0] <= n <= TRACE_POINTS_RANGE[1]:
        raise InputError(f"must be a whole number from {TRACE_POINTS_RANGE[0]} to {TRACE_POINTS_RANGE[1]}",
                         field="n")
    with _ledger(db) as ledger:
        info, state = _state_of(ledger, pid)
        sx, sy = _pixel(seed, "seed", info)
        box = _box(box, info) if box is not None else state.get("box")
        if box is not None and not (box[0] <= sx <= box[2] and box[1] <= sy <= box[3]):
            raise InputError("the click is outside the plot area (step 2); click on a curve inside it", field="seed")
        axes = _need_axes(state.get("marks") or [])
        image = _decoded(ledger, info)
    tr = trace_curve(image, (sx, sy), box=tuple(box) if box is not None else None)
    va, ia = curve_points(tr, axes, n=n)
    va, ia = np.asarray(va, float), np.asarray(ia, float)
    inside = (va >= 0) & (ia >= 0)  # a trace may run on along an axis line: that is not the curve
    va, ia = va[inside], ia[inside]
    if len(va) < 3:
        raise InputError("no curve of plate voltage against current found there; click on a curve inside the plot",
                         field="seed")
    px, py = axes.to_pixel(va, ia)
    px, py = np.clip(np.asarray(px, float), 0, info["width"]), np.clip(np.asarray(py, float), 0, info["height"])
    return {"id": pid, "seed": [sx, sy], "px": _floats(px), "py": _floats(py), "va": _floats(va),
            "ia_ma": _floats(ia), "points": [[float(x), float(y)] for x, y in zip(px, py)],
            "stop_left": tr.stop_left, "stop_right": tr.stop_right, "followed": int(len(tr.px)),
            "left_out": int((~inside).sum())}


def set_curves(db, plot_id, curves) -> dict:
    """Store the curves (``[{"grid_v": V or None, "points": [[px, py], ...]}]``, hand-added,
    moved or deleted points included); ``{"curves"}`` with each point in volts and
    milliamperes when the axes are set."""
    from ..ledger import plots

    pid = _plot_id(plot_id)
    with _ledger(db) as ledger:
        info, state = _state_of(ledger, pid)
        curves = _curves(curves, info)
        state = plots.save_state(ledger, pid, curves=curves)
    try:
        axes = _axis_map(state.get("marks") or [])
    except InputError:
        axes = None
    return {"id": pid, "curves": _with_data(curves, axes)}


def _model_names():
    from ..models import MODELS

    return list(MODELS)


def _units_of_source(db, sha) -> list:
    """The unit dicts of every fit of the measurements imported from a file (by SHA-256)."""
    from sqlalchemy import select

    from ..ledger.schema import Fit, Measurement, SourceFile
    from .web_support import _load, _unit_dict

    with _ledger(db) as ledger, ledger.read() as s:
        fits = s.scalars(select(Fit).join(Measurement, Measurement.id == Fit.measurement_id)
                         .join(SourceFile, SourceFile.id == Measurement.source_id)
                         .where(SourceFile.sha256 == sha).order_by(Fit.id)).all()
        out = []
        for f in fits:
            _, _, sec, tube, _ = _load(s, f.id)
            out.append((_unit_dict(f, sec, tube), f.measurement_id))
        return out


def _overlay(units, curves, axes, info) -> list:
    """Each converged unit's model curves at the grid voltages digitised, over each curve's
    plate-voltage span, in image pixels: ``[{"unit", "grid_v", "px", "py"}]``."""
    import numpy as np

    from ..models import get_model

    out = []
    for u in units:
        fit = u["fit"]
        if not fit["converged"]:
            continue
        model = get_model(fit["model"])
        for vg, va_pts in curves:
            va = np.linspace(min(va_pts), max(va_pts), OVERLAY_SAMPLES)
            with np.errstate(all="ignore"):
                ia_ma = 1000.0 * np.asarray(model.current(va, np.full_like(va, vg), **fit["params"]), float)
            px, py = axes.to_pixel(va, ia_ma)
            px, py = np.asarray(px, float), np.asarray(py, float)
            ok = np.isfinite(px) & np.isfinite(py) & (py >= -0.05 * info["height"]) & (py <= 1.05 * info["height"])
            out.append({"unit": u["id"], "grid_v": float(vg), "px": _floats(px[ok]), "py": _floats(py[ok])})
    return out


def save(db, user, plot_id, tube, tube_type, section="", model="koren") -> dict:
    """Save the digitised curves as a measurement of ``tube`` (type ``tube_type``, section
    ``section``) and fit it with ``model``: the engine's wide-layout CSV goes through the
    ordinary upload import (:func:`fitter.service.web_support.import_uploads`) with the
    instrument :data:`INSTRUMENT`.  Returns ``{"units" (as POST /api/v1/measurements),
    "measurement_ids", "failed", "overlay" (the fitted curves in image pixels), "csv"}``; a
    failed fit is stored and reported with ``failed`` True."""
    import numpy as np

    from ..digitise import curves_to_wide_csv
    from ..ledger import plots
    from .web_support import UploadError, import_uploads

    pid = _plot_id(plot_id)
    who = _user(user)
    tube = plain_text(tube.strip() if isinstance(tube, str) else tube, "tube", max_len=64)
    section = plain_text(section.strip() if isinstance(section, str) else (section or ""), "section", max_len=16,
                         empty=True)
    from ..ledger.store import _type
    from ..models import get_model

    try:
        model = get_model(model).name
    except (ValueError, TypeError, AttributeError):
        raise InputError(f"unknown model {shown(str(model))[:40]!r}; one of {', '.join(_model_names())}",
                         field="model") from None
    if not isinstance(tube_type, str) or not tube_type.strip():
        raise InputError("choose the tube type", field="type")
    with _ledger(db) as ledger:
        info, state = _state_of(ledger, pid)
        with ledger.read() as s:
            _type(s, tube_type)
    axes = _need_axes(state.get("marks") or [])
    curves = state.get("curves") or []
    if not curves:
        raise InputError("trace at least one curve first (step 3)", field="curves")
    given, spans, left_out = [], [], 0
    for i, c in enumerate(curves):
        if c.get("grid_v") is None:
            raise InputError("type this curve's grid voltage", field=f"curves[{i}].grid_v")
        p = np.asarray(c["points"], float).reshape(-1, 2)
        va, ia = axes.to_data(p[:, 0], p[:, 1])
        va, ia = np.asarray(va, float), np.asarray(ia, float)
        inside = (va >= 0) & (ia >= 0)  # a point placed below or left of the axes is not on the plot
        left_out += int((~inside).sum())
        va, ia = va[inside], ia[inside]
        order = np.argsort(va, kind="stable")
        given.append((float(c["grid_v"]), _floats(va[order]), _floats(ia[order])))
        if len(va):
            spans.append((float(c["grid_v"]), _floats(va)))
    note = f"plot image {pid} ({info['name']}), uploaded {info['uploaded_at'][:10]} by {info['uploaded_by']}"
    text = curves_to_wide_csv(given, tube=tube, section=section, note=note)
    data = text.encode("utf-8")
    try:
        res = import_uploads(db, who, [(f"datasheet-plot-{pid}.csv", data)], tube_type, model, instrument=INSTRUMENT,
                             notes=note)
    except UploadError as e:
        msgs = "; ".join(f"{'line ' + str(x['line']) + ': ' if x.get('line') else ''}{x['message']}"
                         for x in e.errors[:5])
        raise InputError(f"the digitised curves cannot be imported: {msgs}", field="curves") from None
    found = _units_of_source(db, hashlib.sha256(data).hexdigest())
    units = [u for u, _ in found]
    mids = sorted({m for _, m in found})
    failed = any(not u["fit"]["converged"] for u in units)
    overlay = _overlay(units, spans, axes, info)
    saved = {"at": None, "tube": tube, "section": section or None, "type": tube_type, "model": model,
             "units": [u["id"] for u in units], "failed": failed, "overlay": overlay,
             "again": bool(res["files"] and res["files"][0].get("duplicate"))}
    with _ledger(db) as ledger:
        from ..ledger.schema import now

        saved["at"] = now()
        plots.add_measurements(ledger, pid, mids, saved=saved)
    return {"id": pid, "units": units, "measurement_ids": mids, "failed": failed, "overlay": overlay,
            "again": saved["again"], "csv": text, "tube": tube, "section": section or None, "left_out": left_out}
