"""Model cards: one JSON file per fitted unit.

Format ``platebook.model-card``, version 1::

    {
      "format": "platebook.model-card", "version": 1,
      "tube": "V7", "section": "A",
      "model": "koren", "reference": "...",
      "params": {"mu": 98.1, ...},             # every parameter of the model, SI
      "stderr": {"mu": 0.4, ..., "kvb": null},  # null: fixed or not determined
      "free": ["mu", "ex", ...],                # order of "covariance"
      "covariance": [[...], ...],               # or null
      "fit": {"rms_ma": ..., "max_abs_ma": ..., "rel_rms": ..., "r2": ...,
              "aic": ..., "bic": ..., "n_points": ..., "n_outliers": ...},
      "valid_range": {"va_v": [lo, hi], "vg_v": [lo, hi], "ia_ma": [lo, hi]},
      "envelope": {"curves": [[vg, va_lo, va_hi], ...],   # optional: where the unit was
                   "ia_max_ma": ..., "pa_max_w": ...},   # measured (older cards lack it)
      "source": ["curves/lot.csv"],
      "created": "2026-12-01T19:00:00+00:00",
      "platebook": "0.1.0"
    }

:func:`load_card` gives back a :class:`~fitter.triode.FittedTriode`, a callable
model that warns when asked about points outside the data it was fitted to (the
``envelope`` when the card has one, else the ``valid_range`` rectangle).

Cards and the entries of ``platebook fit --json`` are untrusted input: both go through
one strict validator (:func:`unit_from_fields`) that checks every field's type, size and
value, and reports a :class:`CardError` naming the file and the field.
"""

from __future__ import annotations

import datetime as _dt
import json
import math
from pathlib import Path
from typing import Any, Mapping

import numpy as np

from .errors import InputError
from .models import get_model
from .outfiles import unit_stem, write_atomic
from .text import MAX_NAME, plain_text, shown
from .triode import DataEnvelope, FittedTriode

__all__ = ["CardError", "CARD_FORMAT", "CARD_VERSION", "card_dict", "save_card", "load_card",
           "load_cards", "load_fits", "card_to_triode", "unit_from_fields", "read_json",
           "card_filename"]

CARD_FORMAT = "platebook.model-card"
CARD_VERSION = 1


class CardError(InputError):
    """A model card (or a fit file) could not be read; ``str(e)`` names the file and the
    field, which are also kept apart in ``e.file`` and ``e.field``."""


def _num(x):
    if x is None:
        return None
    x = float(x)
    return x if math.isfinite(x) else None


def card_dict(
    triode: FittedTriode,
    fit: Mapping[str, Any] | None = None,
    source: list[str] | None = None,
) -> dict:
    """The card of ``triode`` as a JSON-ready dict."""
    from . import __version__

    r = triode.valid_range or {}
    cov = triode.covariance
    return {
        "format": CARD_FORMAT,
        "version": CARD_VERSION,
        # names are written as shown (control characters escaped): a card holds plain text only
        "tube": shown(triode.tube),
        "section": None if triode.section is None else shown(triode.section),
        "model": triode.model.name,
        "reference": triode.model.reference,
        "params": {k: float(v) for k, v in triode.params.items()},
        "stderr": triode.stderr(),
        "free": list(triode.free),
        "covariance": None if cov is None else [[_num(x) for x in row] for row in np.asarray(cov)],
        "fit": dict(fit or {}),
        "valid_range": {
            "va_v": list(map(float, r["va"])) if "va" in r else None,
            "vg_v": list(map(float, r["vg"])) if "vg" in r else None,
            "ia_ma": [1e3 * float(x) for x in r["ia"]] if "ia" in r else None,
        },
        "envelope": None if triode.envelope is None else triode.envelope.to_dict(),
        "source": [shown(x) for x in (source or [])],
        "created": _dt.datetime.now(_dt.timezone.utc).replace(microsecond=0).isoformat(),
        "platebook": __version__,
    }


def card_filename(triode: FittedTriode, stem: str | None = None) -> str:
    """The file name of a unit's card: ``<stem>.<model>.json``.

    ``stem`` defaults to :func:`fitter.outfiles.unit_stem` of the unit: ``tube`` or
    ``tube_section`` for plain names, else a sanitised stem with a hash of the exact name,
    so two different units never share a file.  A run writing several units takes its
    stems from :func:`fitter.outfiles.unit_stems`, which also separates names that differ
    only in letter case.
    """
    if stem is None:
        stem = unit_stem(triode.tube, triode.section)
    return f"{stem}.{triode.model.name}.json"


def save_card(path, triode: FittedTriode, fit=None, source=None) -> Path:
    """Write the card of ``triode`` to ``path`` atomically (:func:`fitter.outfiles.write_atomic`).

    Raises
    ------
    fitter.outfiles.OutputError
        Naming the path, when it cannot be written.
    """
    return write_atomic(path, json.dumps(card_dict(triode, fit, source), indent=2) + "\n")


# -- reading: one strict validator for cards and fit entries ------------------------

#: Largest model card file read [bytes]; a card of the largest model is about 3 kB.
MAX_CARD_BYTES = 1_000_000
#: Largest ``platebook fit --json`` file read [bytes] (about 3 kB per unit and model; with
#: ``--residuals`` a few kB more).
MAX_FITS_BYTES = 256_000_000
#: Deepest nesting of JSON objects and arrays accepted (a card needs 4, a fit file 6).
MAX_DEPTH = 12
#: Longest list of sources, and longest source entry / free-text field [characters].
MAX_SOURCES = 64
MAX_SOURCE_LEN = 1024
MAX_NOTE_LEN = 2000
#: Most entries in a card's "fit" figures.
MAX_FIGURES = 64
#: Relative tolerance of the covariance checks (symmetry, positive semi-definite): a
#: covariance written to JSON with 17 significant digits keeps symmetry to ~1e-16; 1e-8
#: leaves room for the rounding of an eigen-decomposition (common practice for PSD tests).
COV_TOL = 1e-8


def _err(message, file, field=None):
    return CardError(message, file=None if file is None else str(file), field=field)


def _kind(v) -> str:
    return {dict: "an object", list: "a list", str: "text", bool: "true/false",
            type(None): "null"}.get(type(v), "a number" if isinstance(v, (int, float)) else type(v).__name__)


def _number(v, file, field, *, null=False, lo=None):
    """A finite JSON number as float (bool refused); None when ``null`` allows it."""
    if v is None and null:
        return None
    if isinstance(v, bool) or not isinstance(v, (int, float)):
        raise _err(f"must be a finite number, got {_kind(v)}", file, field)
    try:
        x = float(v)
    except OverflowError:
        raise _err("must be a finite number, got an integer too large for one", file, field) from None
    if not math.isfinite(x):
        raise _err(f"must be a finite number, got {x!r}", file, field)
    if lo is not None and x < lo:
        raise _err(f"must be at least {lo:g}, got {x!r}", file, field)
    return x


def _text(v, file, field, *, null=False, empty=False, max_len=MAX_NAME):
    if v is None and null:
        return None
    try:
        return plain_text(v, field, max_len=max_len, empty=empty, file=None if file is None else str(file))
    except InputError as e:
        raise _err(e.message, file, field) from None


def _object(v, file, field, *, null=False, max_items=64):
    if v is None and null:
        return None
    if not isinstance(v, dict):
        raise _err(f"must be an object, got {_kind(v)}", file, field)
    if len(v) > max_items:
        raise _err(f"has {len(v)} entries; at most {max_items} are allowed", file, field)
    return v


def _list(v, file, field, *, null=False, max_len=1024, length=None):
    if v is None and null:
        return None
    if not isinstance(v, list):
        raise _err(f"must be a list, got {_kind(v)}", file, field)
    if length is not None and len(v) != length:
        raise _err(f"must be a list of {length}, got {len(v)} item(s)", file, field)
    if len(v) > max_len:
        raise _err(f"has {len(v)} items; at most {max_len} are allowed", file, field)
    return v


def _depth_ok(root, limit: int = MAX_DEPTH) -> bool:
    """True when no object or array in ``root`` is nested deeper than ``limit``."""
    stack = [(root, 1)]
    while stack:
        v, d = stack.pop()
        if isinstance(v, (dict, list)):
            if d > limit:
                return False
            stack.extend((c, d + 1) for c in (v.values() if isinstance(v, dict) else v))
    return True


def _parse_int(text: str):
    # Integers of any length: Python's int() refuses more than 4300 digits (ValueError) and
    # float() of a huge int overflows, so long ones are read as float (inf when too large,
    # which the field checks then refuse as not finite)
    return int(text) if len(text) <= 18 else float(text)


def read_json(path, max_bytes: int = MAX_CARD_BYTES, what: str = "model card"):
    """Parse a JSON file that a user gave, safely: size, encoding, syntax and nesting are
    checked and reported as a :class:`CardError` naming the file (and line, column)."""
    path = Path(path)
    name = shown(path)
    try:
        size = path.stat().st_size
        if size > max_bytes:
            raise _err(f"is {size} bytes; a {what} is at most {max_bytes} bytes", name)
        with open(path, "rb") as fh:  # never more than the limit (a device or pipe has no size)
            raw = fh.read(max_bytes + 1)
    except OSError as e:
        raise _err(f"cannot read: {e.strerror or e}", name) from None
    if len(raw) > max_bytes:
        raise _err(f"is over {max_bytes} bytes; a {what} is at most that", name)
    try:
        text = raw.decode("utf-8-sig")
    except UnicodeDecodeError as e:
        raise _err(f"not UTF-8 text (byte 0x{raw[e.start]:02x} at offset {e.start}); a {what} is "
                   "UTF-8 JSON", name) from None
    try:
        d = json.loads(text, parse_int=_parse_int)
    except json.JSONDecodeError as e:
        first = text.lstrip().split("\n", 1)[0]
        hint = ""
        if (str(name).lower().endswith((".csv", ".tsv", ".txt")) or first.count(",") + first.count(";")
                + first.count("\t") >= 2) and not first.startswith(("{", "[")):
            hint = ("; this looks like measured curves (a table), not a model card: fit it first "
                    "and give the card the fit saves")
        raise CardError(f"not valid JSON: {e.msg}{hint}", file=name, line=e.lineno, column=e.colno) from None
    except RecursionError:
        raise _err(f"not valid JSON: nested too deep (a {what} nests at most {MAX_DEPTH} levels)",
                   name) from None
    except ValueError as e:  # e.g. a number the decoder cannot represent
        raise _err(f"not valid JSON: {shown(e)}", name) from None
    if not _depth_ok(d):
        raise _err(f"nested too deep: a {what} nests objects and lists at most {MAX_DEPTH} levels", name)
    return d


def _free(v, model, file, field):
    v = _list(v, file, field, null=True, max_len=len(model.param_names))
    if v is None:
        return ()
    out = []
    for k, name in enumerate(v):
        if not isinstance(name, str):
            raise _err(f"must list parameter names, item {k} is {_kind(name)}", file, field)
        if name not in model.param_names:
            raise _err(f"names unknown parameter {shown(name)!r} (the {model.name} model has "
                       f"{', '.join(model.param_names)})", file, field)
        if name in out:
            raise _err(f"names parameter {name!r} twice", file, field)
        out.append(name)
    return tuple(out)


def _covariance(v, n, file, field):
    """A validated n x n covariance, or None (absent, or marked not determined by nulls)."""
    rows = _list(v, file, field, null=True, max_len=n)
    if rows is None:
        return None
    shape = (len(rows), len(rows[0]) if rows and isinstance(rows[0], list) else 0)
    if len(rows) != n or any(not isinstance(r, list) or len(r) != n for r in rows):
        raise _err(f"is {shape[0]}x{shape[1]}, expected {n}x{n} (one row and column per 'free' parameter)",
                   file, field)
    undetermined = False
    m = np.empty((n, n))
    for i, r in enumerate(rows):
        for j, x in enumerate(r):
            if x is None:  # card_dict writes null for an entry that was not determined
                undetermined = True
                m[i, j] = np.nan
            else:
                m[i, j] = _number(x, file, f"{field}[{i}][{j}]")
    if undetermined:
        return None
    scale = float(np.max(np.abs(m))) if n else 0.0
    if n and np.any(np.diag(m) < 0):
        k = int(np.argmin(np.diag(m)))
        raise _err(f"has a negative variance on its diagonal (entry [{k}][{k}] = {m[k, k]!r})", file, field)
    if n and np.max(np.abs(m - m.T)) > COV_TOL * scale:
        raise _err("is not symmetric", file, field)
    if n and scale > 0:
        # scale to unit diagonal first: the parameters' variances span many decades
        d = np.sqrt(np.where(np.diag(m) > 0, np.diag(m), 1.0))
        eig = np.linalg.eigvalsh(m / np.outer(d, d))
        if eig.min() < -COV_TOL * max(1.0, float(eig.max())) * n:
            raise _err("is not positive semi-definite (a covariance matrix must be)", file, field)
    return m


def _pair(v, file, field, scale=1.0):
    v = _list(v, file, field, null=True, length=2)
    if v is None:
        return None
    lo, hi = (_number(x, file, f"{field}[{k}]") for k, x in enumerate(v))
    if hi < lo:
        raise _err(f"must be [low, high] with low <= high, got [{lo!r}, {hi!r}]", file, field)
    return lo * scale, hi * scale


def _valid_range(v, file, field="valid_range"):
    v = _object(v, file, field, null=True, max_items=3)
    if not v:
        return None
    keys = {"va_v": "va", "vg_v": "vg", "ia_ma": "ia"}
    extra = [k for k in v if k not in keys]
    if extra:
        raise _err(f"has an unknown entry {shown(extra[0])!r} (known: {', '.join(keys)})", file, field)
    out = {}
    for key, name in keys.items():
        r = _pair(v.get(key), file, f"{field}.{key}", 1e-3 if key == "ia_ma" else 1.0)
        if r is not None:
            out[name] = r
    return out if {"va", "vg"} <= set(out) else None


def _envelope(v, file, field="envelope"):
    v = _object(v, file, field, null=True, max_items=3)
    if v is None:
        return None
    keys = ("curves", "ia_max_ma", "pa_max_w")
    for k in v:
        if k not in keys:
            raise _err(f"has an unknown entry {shown(k)!r} (known: {', '.join(keys)})", file, field)
    for k in keys:
        if k not in v:
            raise _err(f"misses its entry {k!r}", file, field)
    curves = _list(v["curves"], file, f"{field}.curves", max_len=DataEnvelope.MAX_CURVES)
    if not curves:
        raise _err("must list at least one traced curve", file, f"{field}.curves")
    vg, lo, hi = [], [], []
    for k, c in enumerate(curves):
        f = f"{field}.curves[{k}]"
        g, a, b = (_number(x, file, f"{f}[{j}]") for j, x in enumerate(_list(c, file, f, length=3)))
        if b < a:
            raise _err(f"must be [vg, va_low, va_high] with va_low <= va_high, got [{g!r}, {a!r}, {b!r}]", file, f)
        if vg and g < vg[-1]:
            raise _err("must be in ascending order of grid voltage", file, f"{field}.curves")
        vg.append(g), lo.append(a), hi.append(b)
    ia = _number(v["ia_max_ma"], file, f"{field}.ia_max_ma", lo=0.0)
    pa = _number(v["pa_max_w"], file, f"{field}.pa_max_w", lo=0.0)
    return DataEnvelope(tuple(vg), tuple(lo), tuple(hi), 1e-3 * ia, pa)


def _sources(v, file, field="source"):
    """A list of source names: a card stores a list, a fit entry one text."""
    if v is None:
        return []
    if isinstance(v, str):
        v = [v]
    v = _list(v, file, field, max_len=MAX_SOURCES)
    return [_text(x, file, f"{field}[{k}]", max_len=MAX_SOURCE_LEN) for k, x in enumerate(v)]


def _figures(v, file, field="fit"):
    v = _object(v, file, field, null=True, max_items=MAX_FIGURES)
    if v is None:
        return {}
    for k, x in v.items():
        _text(k, file, f"{field} key")
        _number(x, file, f"{field}.{k}", null=True)
    return dict(v)


def unit_from_fields(d: Mapping[str, Any], file=None, prefix: str = "") -> tuple[FittedTriode, dict]:
    """Validate the unit fields shared by a model card and a ``platebook fit --json`` entry
    and build the :class:`FittedTriode`.

    Checks every field's type, finiteness and size: tube, section and source as plain short
    printable text; model; params (all finite and within the model's bounds); stderr; free;
    the covariance's shape, symmetry and sign; valid_range; envelope.

    Returns
    -------
    (FittedTriode, dict)
        The unit, and ``{"source": [...], "stderr": {...}}`` as validated.

    Raises
    ------
    CardError
        Naming ``file`` and the field (``prefix`` + field name).
    """
    f = lambda name: prefix + name  # noqa: E731
    if "model" not in d:
        raise _err("missing", file, f("model"))
    name = d["model"]
    if not isinstance(name, str):
        raise _err(f"must be a model name, got {_kind(name)}", file, f("model"))
    try:
        model = get_model(name)
    except ValueError as e:
        raise _err(shown(e), file, f("model")) from None
    tube = _text(d.get("tube"), file, f("tube"))
    section = _text(d.get("section"), file, f("section"), null=True, empty=True) or None
    if "params" not in d:
        raise _err("missing", file, f("params"))
    params = _object(d["params"], file, f("params"), max_items=64)
    clean = {}
    for k, v in params.items():
        if not isinstance(k, str) or k not in model.param_names:
            raise _err(f"model {model.name!r} has no parameter {shown(k)!r}; its parameters are "
                       f"{', '.join(model.param_names)}", file, f(f"params.{shown(k)}"))
        clean[k] = _number(v, file, f(f"params.{k}"))
        spec = model.spec(k)
        if not spec.lower <= clean[k] <= spec.upper:
            raise _err(f"{clean[k]!r} is outside the {model.name} model's bounds {spec.lower:g}..{spec.upper:g}"
                       + ("" if spec.unit == "-" else f" {spec.unit}"), file, f(f"params.{k}"))
    for spec in model.params:
        if spec.name not in clean and spec.default is None:
            raise _err(f"model {model.name!r} needs parameter {spec.name!r}", file, f("params"))
    stderr = _object(d.get("stderr"), file, f("stderr"), null=True, max_items=len(model.param_names)) or {}
    for k, v in stderr.items():
        if k not in model.param_names:
            raise _err(f"names unknown parameter {shown(k)!r}", file, f("stderr"))
        _number(v, file, f(f"stderr.{k}"), null=True, lo=0.0)
    free = _free(d.get("free"), model, file, f("free"))
    cov = _covariance(d.get("covariance"), len(free), file, f("covariance"))
    rng = _valid_range(d.get("valid_range"), file, f("valid_range"))
    env = _envelope(d.get("envelope"), file, f("envelope"))
    sources = _sources(d.get("source"), file, f("source"))
    try:
        unit = FittedTriode(model, clean, free, cov, tube, section, rng, env)
    except InputError as e:  # defence in depth: the checks above should have caught it
        raise _err(e.message, file, f(e.field or "params")) from None
    return unit, {"source": sources, "stderr": dict(stderr)}


def card_to_triode(d: Mapping[str, Any], where=None) -> FittedTriode:
    """Build a :class:`FittedTriode` from a parsed card, validating every field."""
    if not isinstance(d, dict):
        raise _err("a model card is a JSON object", where)
    if "format" not in d:
        raise _err(f"missing (expected {CARD_FORMAT!r}); is this a model card?", where, "format")
    fmt = d.get("format")
    if fmt != CARD_FORMAT:
        raise _err(f"is {shown(fmt)[:80]!r}, expected {CARD_FORMAT!r}", where, "format")
    ver = d.get("version")
    if isinstance(ver, bool) or ver != CARD_VERSION:
        raise _err(f"is {shown(ver)[:40]}; this Platebook reads version {CARD_VERSION}", where, "version")
    for key in ("reference", "created", "platebook"):
        _text(d.get(key), where, key, null=True, empty=True, max_len=MAX_NOTE_LEN)
    _figures(d.get("fit"), where)
    unit, _ = unit_from_fields(d, where)
    return unit


def load_card(path) -> FittedTriode:
    """Read a model card file and return the fitted, callable model."""
    return card_to_triode(read_json(path), shown(path))


def load_cards(folder) -> list[FittedTriode]:
    """Every ``*.json`` card in a folder, sorted by file name."""
    folder = Path(folder)
    files = sorted(folder.glob("*.json"))
    if not files:
        raise _err("no model cards (*.json) in this folder", shown(folder))
    return [load_card(f) for f in files]


def load_fits(path) -> tuple[list[FittedTriode], list[dict]]:
    """The fitted units of a ``platebook fit --json`` file (or of a folder of model cards).

    Each converged entry goes through the same field checks as a model card
    (:func:`unit_from_fields`); with several models per unit (``--model all``), each unit
    is taken with its best model (the entries named in ``best``).

    Returns
    -------
    (units, failed)
        The units, and ``{"unit": label, "reason": ...}`` for each entry whose fit failed.

    Raises
    ------
    CardError
        Naming the file and the field (``fits[3].params.mu``).
    """
    p = Path(path)
    if p.is_dir():
        return load_cards(p), []
    name = shown(p)
    d = read_json(p, MAX_FITS_BYTES, "fit file")
    if not isinstance(d, dict) or not isinstance(d.get("fits"), list):
        raise _err("expected the JSON of 'platebook fit --json', an object with a list 'fits'", name)
    fits = list(enumerate(d["fits"]))
    best = d.get("best")
    if best is not None:
        best = _list(best, name, "best", max_len=len(fits))
        keep = set()
        for k, b in enumerate(best):
            b = _object(b, name, f"best[{k}]")
            keep.add((_text(b.get("tube"), name, f"best[{k}].tube"),
                      _text(b.get("section"), name, f"best[{k}].section", null=True, empty=True) or None,
                      _text(b.get("model"), name, f"best[{k}].model")))
        if keep:
            # 'platebook fit --model all --json': several models per unit, ranked; match
            # each unit by its best model (the first of its ranking)
            def key(f):  # only text is compared (a wrong type is reported by the checks below)
                return tuple(v if isinstance(v, str) else repr(v)
                             for v in (f.get("tube"), f.get("section") or None, f.get("model")))

            keep = {tuple(v if isinstance(v, str) else repr(v) for v in b) for b in keep}
            fits = [(k, f) for k, f in fits if not isinstance(f, dict) or key(f) in keep]
    units, failed = [], []
    for k, f in fits:
        where = f"fits[{k}]."
        f = _object(f, name, f"fits[{k}]")
        converged = f.get("converged")
        if not isinstance(converged, bool):
            raise _err(f"must be true or false, got {_kind(converged)}", name, where + "converged")
        if not converged:
            tube = _text(f.get("tube"), name, where + "tube")
            section = _text(f.get("section"), name, where + "section", null=True, empty=True)
            why = (_text(f.get("failure"), name, where + "failure", null=True, empty=True, max_len=MAX_NOTE_LEN)
                   or _text(f.get("message"), name, where + "message", null=True, empty=True, max_len=MAX_NOTE_LEN)
                   or "no reason given")
            failed.append({"unit": f"{tube}:{section}" if section else tube,
                           "reason": f"fit did not converge ({why})"})
            continue
        unit, _ = unit_from_fields(f, name, where)
        units.append(unit)
    if not units and not failed:
        raise _err("'fits' is empty: no units to match", name)
    return units, failed
