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
      "source": ["curves/lot.csv"],
      "created": "2026-12-01T19:00:00+00:00",
      "platebook": "0.1.0"
    }

:func:`load_card` gives back a :class:`~fitter.triode.FittedTriode`, a callable
model that warns when asked about points far outside ``valid_range``.
"""

from __future__ import annotations

import datetime as _dt
import json
import math
import re
from pathlib import Path
from typing import Any, Mapping

import numpy as np

from .models import get_model
from .outfiles import unit_stem, write_atomic
from .triode import FittedTriode

__all__ = ["CardError", "CARD_FORMAT", "CARD_VERSION", "card_dict", "save_card", "load_card",
           "load_cards", "card_filename"]

CARD_FORMAT = "platebook.model-card"
CARD_VERSION = 1


class CardError(ValueError):
    """A model card could not be read; the message names the file and the field."""


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
        "tube": triode.tube,
        "section": triode.section,
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
        "source": list(source or []),
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


def _need(d, key, where, kind=None):
    if key not in d:
        raise CardError(f"{where}: missing field {key!r}")
    v = d[key]
    if kind is not None and not isinstance(v, kind):
        raise CardError(f"{where}: field {key!r} should be {kind.__name__ if isinstance(kind, type) else kind}")
    return v


def card_to_triode(d: Mapping[str, Any], where: str = "card") -> FittedTriode:
    """Build a :class:`FittedTriode` from a parsed card, validating every field."""
    if not isinstance(d, dict):
        raise CardError(f"{where}: a model card is a JSON object")
    if "format" not in d:
        raise CardError(f"{where}: missing field 'format' (expected {CARD_FORMAT!r}); is this a model card?")
    fmt = d.get("format")
    if fmt != CARD_FORMAT:
        raise CardError(f"{where}: field 'format' is {fmt!r}, expected {CARD_FORMAT!r}")
    ver = d.get("version")
    if ver != CARD_VERSION:
        raise CardError(f"{where}: field 'version' is {ver!r}; this Platebook reads version {CARD_VERSION}")
    name = _need(d, "model", where, str)
    try:
        model = get_model(name)
    except ValueError as e:
        raise CardError(f"{where}: field 'model': {e}") from None
    params = _need(d, "params", where, dict)
    clean = {}
    for k, v in params.items():
        try:
            model.spec(k)
        except ValueError as e:
            raise CardError(f"{where}: field 'params.{k}': {e}") from None
        if not isinstance(v, (int, float)) or isinstance(v, bool) or not math.isfinite(v):
            raise CardError(f"{where}: field 'params.{k}' must be a finite number, got {v!r}")
        clean[k] = float(v)
    try:
        model.full_params(clean)
    except ValueError as e:
        raise CardError(f"{where}: field 'params': {e}") from None
    free = tuple(d.get("free") or ())
    for k in free:
        if k not in model.param_names:
            raise CardError(f"{where}: field 'free' names unknown parameter {k!r}")
    cov = d.get("covariance")
    if cov is not None:
        try:
            cov = np.array([[np.nan if x is None else float(x) for x in row] for row in cov])
        except (TypeError, ValueError):
            raise CardError(f"{where}: field 'covariance' must be a matrix of numbers") from None
        if cov.shape != (len(free), len(free)):
            raise CardError(
                f"{where}: field 'covariance' is {cov.shape}, expected {len(free)}x{len(free)} for 'free'"
            )
        if not np.all(np.isfinite(cov)):
            cov = None
    vr = d.get("valid_range") or {}
    rng = {}
    for key, out, scale in (("va_v", "va", 1.0), ("vg_v", "vg", 1.0), ("ia_ma", "ia", 1e-3)):
        v = vr.get(key)
        if v is None:
            continue
        if not (isinstance(v, list) and len(v) == 2 and all(isinstance(x, (int, float)) for x in v)):
            raise CardError(f"{where}: field 'valid_range.{key}' must be [low, high]")
        rng[out] = (float(v[0]) * scale, float(v[1]) * scale)
    tube = d.get("tube")
    if not isinstance(tube, str) or not tube:
        raise CardError(f"{where}: field 'tube' must be a non-empty string")
    section = d.get("section")
    if section is not None and not isinstance(section, str):
        raise CardError(f"{where}: field 'section' must be a string or null")
    return FittedTriode(model, clean, free, cov, tube, section or None,
                        rng if {"va", "vg"} <= set(rng) else None)


def load_card(path) -> FittedTriode:
    """Read a model card file and return the fitted, callable model."""
    path = Path(path)
    try:
        text = path.read_text()
    except OSError as e:
        raise CardError(f"{path}: cannot read: {e.strerror or e}") from None
    try:
        d = json.loads(text)
    except json.JSONDecodeError as e:
        raise CardError(f"{path}: line {e.lineno}, column {e.colno}: not valid JSON: {e.msg}") from None
    return card_to_triode(d, str(path))


def load_cards(folder) -> list[FittedTriode]:
    """Every ``*.json`` card in a folder, sorted by file name."""
    folder = Path(folder)
    files = sorted(folder.glob("*.json"))
    if not files:
        raise CardError(f"{folder}: no model cards (*.json) in this folder")
    return [load_card(f) for f in files]
