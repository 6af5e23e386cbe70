"""Fuzz the command line with broken files: no traceback, no hang, no bad input accepted.

Starts from small valid inputs made here (INVENTED plate curves of the Koren model, a model
card and the JSON written by ``platebook fit``), mutates them (byte flips, truncation,
deleted/duplicated/swapped lines, random bytes, non-UTF-8, BOM, CR line ends, huge and
non-finite numbers, negative zero, deep JSON nesting, wrong JSON types in every card field,
extra fields, very long strings, control characters in names, swapped columns, empty files)
and runs the commands that read them, in-process (click's test runner), on a pool of worker
processes.  About one case in seven instead gives valid inputs and one numeric option an odd
value (nan, 1e400, a unicode minus, 1e308, 1e-320, -0, an empty string, 2V, 5%, ...).

Each case is classified; these are failures:

traceback
    any exception other than the ``SystemExit`` of a normal exit reached the top;
hang
    the case ran past the wall-clock limit (``--limit``, default 20 s);
accepted
    bad input accepted: exit 0 although the fuzzer knows the mutation made the input
    invalid (a non-finite or out-of-bounds parameter, a wrong-type card field, a name with
    control characters, a broken covariance, a non-finite or unreadable number in a data
    row of a CSV file read without --skip-bad, a row dropped by --skip-bad without a word,
    an option value that is not a finite number);
nan
    ``nan`` or ``inf`` printed as a figure (a token the input did not contain);
control
    control characters (terminal escapes, NUL, CR, ...) reached the output;
warning
    a Python warning escaped to the user.

It prints the totals (cases, by command, exit codes, failures by class and by mutation) and,
for each failure, the case id, the mutation and the first lines of the output, and saves the
failing inputs under ``--save`` for reproduction (``--case N`` reruns one case).  Exit status
1 if any case failed.

    .venv/bin/python bench/fuzz.py --count 10000 --seed 1           # all cores
    .venv/bin/python bench/fuzz.py --seed 1 --case 4711 --show       # one case, full output
"""

from __future__ import annotations

import argparse
import collections
import json
import math
import multiprocessing
import os
import random
import re
import shutil
import signal
import sys
import tempfile
import time
import traceback
import warnings
from dataclasses import dataclass, field
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
if str(ROOT) not in sys.path:
    sys.path.insert(0, str(ROOT))

import numpy as np  # noqa: E402
from click.testing import CliRunner  # noqa: E402

from fitter.cli import main as cli_main  # noqa: E402
from fitter.models import get_model  # noqa: E402

# ---------------------------------------------------------------------------
# the valid inputs every case starts from (INVENTED data, made here)
# ---------------------------------------------------------------------------

#: Koren's published 12AX7 set, from memory (N. Koren, "Improved vacuum tube models for SPICE
#: simulations", Glass Audio 1996); the two sections differ a little, as a real bottle would.
_KOREN = dict(mu=100.0, ex=1.4, kg1=1060.0, kp=600.0, kvb=300.0)
_GRID = (0.0, -1.0, -2.0, -3.0)
_PLATE = tuple(range(25, 301, 25))


def _currents(params, va, vg, rng):
    ia = get_model("koren").current(np.asarray(va, float), np.asarray(vg, float), **params)
    return ia * (1.0 + 0.01 * rng.standard_normal(ia.size))


def long_csv() -> bytes:
    """Two sections of one invented bottle, long layout (tube, section, va, vg, ia_ma)."""
    rng = np.random.default_rng(1)
    out = ["# INVENTED plate curves for the fuzzer (bench/fuzz.py)", "tube,section,va,vg,ia_ma"]
    for section, scale in (("A", 1.0), ("B", 1.04)):
        p = dict(_KOREN, kg1=_KOREN["kg1"] * scale)
        va, vg = np.meshgrid(_PLATE, _GRID)
        ia = _currents(p, va.ravel(), vg.ravel(), rng)
        for a, g, i in zip(va.ravel(), vg.ravel(), ia):
            if i > 0:
                out.append(f"F1,{section},{a:g},{g:g},{1e3 * i:.5f}")
    return ("\n".join(out) + "\n").encode()


def wide_csv() -> bytes:
    """One invented unit, wide layout (va, then ia_ma@vg=<V> columns)."""
    rng = np.random.default_rng(2)
    out = ["# INVENTED plate curves for the fuzzer (bench/fuzz.py)", "# tube: W1",
           "va," + ",".join(f"ia_ma@vg={g:g}" for g in _GRID)]
    for a in _PLATE:
        ia = _currents(_KOREN, np.full(len(_GRID), a), np.array(_GRID), rng)
        out.append(f"{a:g}," + ",".join(f"{1e3 * i:.5f}" for i in ia))
    return ("\n".join(out) + "\n").encode()


def _invoke(args, stdin=None):
    runner = CliRunner()
    return runner.invoke(cli_main, [str(a) for a in args], input=stdin, catch_exceptions=True)


def make_seeds(folder: Path) -> dict:
    """The valid inputs: the two CSV files, a model card and a fit JSON (by ``platebook fit``)."""
    folder.mkdir(parents=True, exist_ok=True)
    seeds = {"long": long_csv(), "wide": wide_csv()}
    (folder / "long.csv").write_bytes(seeds["long"])
    r = _invoke(["fit", folder / "long.csv", "--save", folder / "cards", "--jobs", "1"])
    if r.exit_code != 0:
        raise RuntimeError(f"the fuzzer's seed fit failed (exit {r.exit_code}):\n{r.output}")
    seeds["card"] = (folder / "cards" / "F1_A.koren.json").read_bytes()
    r = _invoke(["fit", folder / "long.csv", "--json", "--jobs", "1"])
    if r.exit_code != 0:
        raise RuntimeError(f"the fuzzer's seed fit --json failed (exit {r.exit_code}):\n{r.output}")
    seeds["fitjson"] = r.stdout.encode()
    # the same bytes on every run, so that a seed and a case id name one input: no temporary
    # folder name, no time of creation
    card = json.loads(seeds["card"])
    card["created"] = "2026-12-01T00:00:00+00:00"
    seeds["card"] = (json.dumps(card, indent=2) + "\n").encode()
    for k in ("card", "fitjson"):
        seeds[k] = seeds[k].replace(str(folder).encode(), b"fuzz")
    return seeds


# ---------------------------------------------------------------------------
# mutations: each returns (new bytes, name, invalid) with invalid True when the input is
# known to be invalid, None when the fuzzer cannot tell
# ---------------------------------------------------------------------------

_CONTROL_NAMES = ["V1\nV2", "\x1b[31mRED\x1b[0m", "A\x00B", "T\rX", "bell\x07", "\x1b]0;title\x07", "tab\tbed",
                  "del\x7f", "c1\x9b2J"]
_HUGE = ["1e308", "-1e308", "1.7976931348623157e308"]
_NONFINITE = ["nan", "NaN", "inf", "-inf", "Infinity", "1e400", "-1e400", "9" * 5000, "1" + "0" * 400]
_FINE = ["-0", "-0.0", "0e0", "1e-400", "+5", " 7 "]
_TEXT = ["abc", "", "1,5", "5 mA", "--", "0x10", "1e", ".", "\u00a0"]


def _lines(data: bytes):
    return data.split(b"\n")


def m_byte_flip(rng, data):
    b = bytearray(data)
    for _ in range(rng.randint(1, 5)):
        if b:
            i = rng.randrange(len(b))
            b[i] ^= 1 << rng.randrange(8)
    return bytes(b), "byte-flip", None


def m_truncate(rng, data):
    return data[: rng.randrange(len(data) + 1)], "truncate", None


def m_delete_line(rng, data):
    ls = _lines(data)
    del ls[rng.randrange(len(ls))]
    return b"\n".join(ls), "delete-line", None


def m_duplicate_line(rng, data):
    ls = _lines(data)
    i = rng.randrange(len(ls))
    ls.insert(i, ls[i])
    return b"\n".join(ls), "duplicate-line", None


def m_swap_lines(rng, data):
    ls = _lines(data)
    i, j = rng.randrange(len(ls)), rng.randrange(len(ls))
    ls[i], ls[j] = ls[j], ls[i]
    return b"\n".join(ls), "swap-lines", None


def m_random_bytes(rng, data):
    i = rng.randrange(len(data) + 1)
    junk = bytes(rng.randrange(256) for _ in range(rng.randint(1, 64)))
    return data[:i] + junk + data[i:], "random-bytes", None


def m_all_random(rng, data):
    return bytes(rng.randrange(256) for _ in range(rng.randint(0, 2000))), "all-random", None


def m_non_utf8(rng, data):
    i = rng.randrange(len(data) + 1)
    return data[:i] + rng.choice([b"\xff\xfe", b"\x80", b"\xc3\x28", b"\xed\xa0\x80"]) + data[i:], "non-utf8", None


def m_latin1(rng, data):
    text = data.decode("utf-8", "replace").replace("F1", "Fü").replace("W1", "Wü")
    return text.encode("latin-1", "replace"), "latin-1", None


def m_bom(rng, data):
    return b"\xef\xbb\xbf" + data, "bom", None


def m_crlf(rng, data):
    return data.replace(b"\n", b"\r\n"), "crlf", None


def m_cr_only(rng, data):
    return data.replace(b"\n", b"\r"), "cr-only", None


def m_control(rng, data):
    i = rng.randrange(len(data) + 1)
    return data[:i] + rng.choice(_CONTROL_NAMES).encode() + data[i:], "control-chars", None


def m_long_string(rng, data):
    i = rng.randrange(len(data) + 1)
    return data[:i] + b"A" * rng.choice([1000, 100_000, 1_000_000]) + data[i:], "long-string", None


def m_empty(rng, data):
    return rng.choice([b"", b"\n", b"   \n\n", b"\xef\xbb\xbf"]), "empty", None


GENERIC = [m_byte_flip, m_truncate, m_delete_line, m_duplicate_line, m_swap_lines, m_random_bytes, m_all_random,
           m_non_utf8, m_latin1, m_bom, m_crlf, m_cr_only, m_control, m_long_string, m_empty]


# -- CSV ----------------------------------------------------------------------


def _csv_rows(data: bytes):
    """(lines, index of the header line, indices of data lines) of a seed CSV."""
    ls = data.decode("utf-8").split("\n")
    body = [i for i, s in enumerate(ls) if s.strip() and not s.lstrip().startswith("#")]
    return ls, body[0], body[1:]


def m_csv_cell(rng, data, layout):
    """One numeric cell of a data row replaced: non-finite/unreadable (invalid), huge, or fine."""
    ls, head, rows = _csv_rows(data)
    names = ls[head].split(",")
    numeric = [k for k, n in enumerate(names) if n not in ("tube", "section")]
    i, k = rng.choice(rows), rng.choice(numeric)
    cells = ls[i].split(",")
    kind = rng.choice(["nonfinite", "text", "huge", "fine"])
    new = rng.choice({"nonfinite": _NONFINITE, "text": _TEXT, "huge": _HUGE, "fine": _FINE}[kind])
    if layout == "wide" and k > 0 and new.strip() == "":
        kind = "fine"  # the wide layout leaves a cell empty for a point not measured
    if kind == "text" and new == "1,5":
        kind = "fields"  # a decimal comma makes one field too many
    if kind == "huge" and names[k].startswith("ia") and new.startswith("-"):
        kind = "negative-current"  # far beyond the instrument offset: the reader refuses it
    cells[k] = new
    ls[i] = ",".join(cells)
    invalid = True if kind in ("nonfinite", "text", "fields", "negative-current") else (
        False if kind == "fine" else None)
    return "\n".join(ls).encode(), f"csv-cell-{kind}", invalid


def m_csv_missing_field(rng, data, layout):
    ls, head, rows = _csv_rows(data)
    i = rng.choice(rows)
    cells = ls[i].split(",")
    del cells[rng.randrange(len(cells))]
    ls[i] = ",".join(cells)
    return "\n".join(ls).encode(), "csv-missing-field", True


def m_csv_extra_field(rng, data, layout):
    ls, head, rows = _csv_rows(data)
    i = rng.choice(rows)
    extra = rng.choice(["1", "", "x"])
    ls[i] += "," + extra
    # an empty trailing cell carries nothing (spreadsheets write them); the reader may take it
    return "\n".join(ls).encode(), "csv-extra-field", True if extra else None


def m_csv_swap_columns(rng, data, layout):
    ls, head, rows = _csv_rows(data)
    names = ls[head].split(",")
    a, b = rng.sample(range(len(names)), 2)
    if rng.random() < 0.5:  # the header only: the columns now mean something else
        names[a], names[b] = names[b], names[a]
        ls[head] = ",".join(names)
        return "\n".join(ls).encode(), "csv-swap-header", None
    for i in [head] + rows:  # header and data together: the same file, columns reordered
        c = ls[i].split(",")
        c[a], c[b] = c[b], c[a]
        ls[i] = ",".join(c)
    return "\n".join(ls).encode(), "csv-swap-columns", False


def m_csv_name(rng, data, layout):
    """A tube or section name with control characters, or a very long one."""
    text = data.decode("utf-8")
    old = "F1" if layout == "long" else "W1"
    if rng.random() < 0.7:
        name = rng.choice([n for n in _CONTROL_NAMES if "\n" not in n and "\r" not in n])
        return text.replace(old, name, 1 if rng.random() < 0.5 else -1).encode(), "csv-name-control", None
    return text.replace(old, "N" * rng.choice([300, 100_000])).encode(), "csv-name-long", None


def m_csv_header(rng, data, layout):
    ls, head, rows = _csv_rows(data)
    names = ls[head].split(",")
    k = rng.randrange(len(names))
    names[k] = rng.choice(["", "ia_kA", "ia_ma@vg=nan", "ia_ma@vg=1e400", "IA_MA", " va ", "va", "tube",
                           "ia_ma@vg=-0", "ia_ma@vg=0"])
    ls[head] = ",".join(names)
    return "\n".join(ls).encode(), "csv-header", None


CSV = [m_csv_cell, m_csv_cell, m_csv_cell, m_csv_missing_field, m_csv_extra_field, m_csv_swap_columns,
       m_csv_name, m_csv_header]


# -- model cards and fit JSON -----------------------------------------------------

_TYPES = {"null": None, "list": [1, 2], "dict": {"a": 1}, "string": "zz", "number": 7, "bool": True}
#: which replacement types are still valid for a card field (everything else is a wrong type)
_CARD_OK = {
    "format": set(), "version": set(), "model": set(), "params": set(), "free": set(),
    "tube": {"string"}, "section": {"string", "null"}, "covariance": {"null"},
    "valid_range": {"null"}, "reference": {"string"}, "created": set(), "platebook": {"string"},
    # one source name as text is what a fit entry holds, and cards accept it too
    "source": {"string"}, "fit": set(), "stderr": set(),
}
#: which wrong types the fuzzer cannot judge: an informational field left out may be fine
_CARD_UNSURE = {"created": {"string", "null"}, "fit": {"null", "dict"}, "source": {"null", "list"},
                "stderr": {"null", "dict"}, "reference": {"null"}, "platebook": {"null"}}


def _bounds(model, name):
    spec = next(p for p in get_model(model).params if p.name == name)
    return spec.lower, spec.upper


def _param_mutation(rng, params, model):
    """One parameter replaced; returns (raw JSON text or value, label, invalid)."""
    k = rng.choice(sorted(params))
    lo, hi = _bounds(model, k)
    kind = rng.choice(["nan", "inf", "-inf", "1e400", "digits", "1e308", "-1e308", "below", "above", "string",
                       "null", "list", "bool", "negzero", "inside"])
    raw = {"nan": "NaN", "inf": "Infinity", "-inf": "-Infinity", "1e400": "1e400", "digits": "9" * 5000,
           "1e308": "1e308", "-1e308": "-1e308", "string": '"5"', "null": "null", "list": "[1]",
           "bool": "true", "negzero": "-0.0"}.get(kind)
    if kind == "below":
        v = lo - max(1.0, abs(lo)) if math.isfinite(lo) else None
        raw, invalid = (repr(v), True) if v is not None else ("NaN", True)
    elif kind == "above":
        v = hi + max(1.0, abs(hi)) if math.isfinite(hi) else None
        raw, invalid = (repr(v), True) if v is not None else ("NaN", True)
    elif kind == "inside":
        v = lo + (hi - lo) * rng.random() if math.isfinite(hi) else lo + 10.0 * rng.random()
        raw, invalid = repr(v), False
    elif kind in ("1e308", "-1e308", "negzero"):
        v = float(raw)
        invalid = not (lo <= v <= hi)
    elif kind == "null":
        # null for a parameter with a default is "use the default"; without one it is missing
        invalid = get_model(model).spec(k).default is None
    else:
        invalid = True
    return k, raw, f"param-{kind}", invalid


def _dumps_with_raw(d, path, raw):
    """JSON of ``d`` with the value at ``path`` replaced by the raw text ``raw``."""
    mark = "\u0000RAW\u0000"
    node = d
    for p in path[:-1]:
        node = node[p]
    node[path[-1]] = mark
    return json.dumps(d, indent=1, allow_nan=True).replace(json.dumps(mark), raw)


def m_card_structured(rng, data, kind):
    """A structured change of a model card (``kind='card'``) or of one entry of a fit JSON
    (``kind='fitjson'``), with the fuzzer's verdict on validity."""
    doc = json.loads(data)
    if kind == "fitjson":
        fits = doc["fits"]
        k = rng.randrange(len(fits))
        d, prefix = fits[k], ["fits", k]
    else:
        d, prefix = doc, []
    model = d["model"]
    op = rng.choice(["field-type", "field-type", "param", "param", "param", "drop-field", "extra-field",
                     "name", "covariance", "valid-range", "deep", "free"])
    if op == "field-type":
        fields = [f for f in d if f in _CARD_OK] if kind == "card" else \
            [f for f in ("tube", "section", "model", "params", "free", "covariance", "valid_range") if f in d]
        f = rng.choice(fields)
        t = rng.choice(sorted(_TYPES))
        d[f] = _TYPES[t]
        if t in _CARD_OK[f]:
            invalid = False
        elif t in _CARD_UNSURE.get(f, ()):
            invalid = None
        else:
            invalid = True
        if f == "covariance" and t == "null":
            invalid = False
        return json.dumps(doc, indent=1).encode(), f"field-type-{f}-{t}", invalid
    if op == "param":
        k, raw, label, invalid = _param_mutation(rng, d["params"], model)
        return _dumps_with_raw(doc, prefix + ["params", k], raw).encode(), label, invalid
    if op == "drop-field":
        f = rng.choice(sorted(d))
        del d[f]
        # a fit entry without 'converged' is listed as not converged, which is honest
        required = {"format", "version", "model", "params", "tube"} if kind == "card" else \
            {"model", "params", "tube"}
        optional_ok = {"section", "covariance", "valid_range"}
        invalid = True if f in required else (False if f in optional_ok else None)
        if f == "free" and d.get("covariance") is not None:
            invalid = True  # the covariance is ordered by 'free'
        return json.dumps(doc, indent=1).encode(), f"drop-{f}", invalid
    if op == "extra-field":
        d[rng.choice(["comment", "x" * 1000, "params2", ""])] = rng.choice([1, "note", None, [1, {"a": []}]])
        return json.dumps(doc, indent=1).encode(), "extra-field", None
    if op == "name":
        f = rng.choice(["tube", "section"])
        if rng.random() < 0.75:
            d[f] = rng.choice(_CONTROL_NAMES)
            return json.dumps(doc, indent=1).encode(), f"name-control-{f}", True
        d[f] = "N" * rng.choice([300, 100_000])
        return json.dumps(doc, indent=1).encode(), f"name-long-{f}", None
    if op == "covariance":
        cov = d.get("covariance")
        if not cov:
            return json.dumps(doc, indent=1).encode(), "covariance-absent", None
        n = len(cov)
        how = rng.choice(["shape", "asymmetric", "negative-diagonal", "string", "nan", "ragged", "huge"])
        if how == "shape":
            cov = [row + [0.0] for row in cov]
        elif how == "asymmetric":
            i, j = rng.sample(range(n), 2)
            cov[i][j] = cov[i][j] * 3.0 + 1.0
        elif how == "negative-diagonal":
            i = rng.randrange(n)
            cov[i][i] = -abs(cov[i][i]) - 1.0
        elif how == "string":
            cov[rng.randrange(n)][rng.randrange(n)] = "x"
        elif how == "nan":
            cov[rng.randrange(n)][rng.randrange(n)] = float("nan")
        elif how == "ragged":
            cov[rng.randrange(n)] = [1.0]
        else:
            i = rng.randrange(n)
            cov[i][i] = 1e308
            cov = cov  # a variance of 1e308 overflows every propagated error
        d["covariance"] = cov
        invalid = True if how != "huge" else None
        return json.dumps(doc, indent=1, allow_nan=True).encode(), f"covariance-{how}", invalid
    if op == "valid-range":
        vr = d.get("valid_range") or {}
        key = rng.choice(["va_v", "vg_v", "ia_ma"])
        how = rng.choice(["reversed", "nan", "string", "short", "huge"])
        lo_hi = vr.get(key) or [0.0, 1.0]
        vr[key] = {"reversed": [lo_hi[1] + 1.0, lo_hi[0]], "nan": [float("nan"), 1.0], "string": ["0", "1"],
                   "short": [1.0], "huge": [-1e308, 1e308]}[how]
        d["valid_range"] = vr
        invalid = True if how != "huge" else None
        return json.dumps(doc, indent=1, allow_nan=True).encode(), f"valid-range-{how}", invalid
    if op == "deep":
        f = rng.choice(["params", "fit", "source", "valid_range", "covariance"])
        depth = rng.choice([100, 5000, 200_000])
        raw = "[" * depth + "]" * depth
        target = prefix + [f]
        if kind == "fitjson":
            target = prefix + [rng.choice(["params", "covariance", "valid_range"])]
        return _dumps_with_raw(doc, target, raw).encode(), f"deep-{depth}", True
    # op == "free": names that are not the model's, or repeated
    free = list(d.get("free") or [])
    if not free:
        return json.dumps(doc, indent=1).encode(), "free-absent", None
    if rng.random() < 0.5:
        free[rng.randrange(len(free))] = "bogus"
        label = "free-unknown"
    else:
        free[1 % len(free)] = free[0]
        label = "free-repeated"
    d["free"] = free
    return json.dumps(doc, indent=1).encode(), label, True


# ---------------------------------------------------------------------------
# the commands and one case
# ---------------------------------------------------------------------------

#: (name, input kind, extra arguments after the input file); {f} is the input file
COMMANDS = [
    ("fit", "csv", ["fit", "{f}", "--jobs", "1"]),
    ("fit --json", "csv", ["fit", "{f}", "--json", "--jobs", "1"]),
    ("fit --skip-bad", "csv", ["fit", "{f}", "--skip-bad", "--jobs", "1"]),
    ("point", "card", ["point", "{f}", "--va", "200", "--vg", "-1.5"]),
    ("export spice", "card", ["export", "{f}", "--format", "spice"]),
    ("export json", "card", ["export", "{f}", "--format", "json"]),
    ("export csv", "card", ["export", "{f}", "--format", "csv"]),
    ("stage common-cathode", "card", ["stage", "common-cathode", "--tube", "{f}", "--bplus", "300",
                                      "--ra", "100k", "--rk", "1.5k"]),
    ("match", "fitjson", ["match", "{f}", "--va", "200", "--vg", "-1.5"]),
]

_STAGE = ["--tube", "{f}", "--bplus", "300", "--ra", "100k", "--rk", "1.5k"]
#: valid inputs, one numeric option given an odd value X: (name, input, arguments)
OPTION_COMMANDS = [
    ("point --va X", "card", ["point", "{f}", "--va", "{x}", "--vg", "-1.5"]),
    ("point --vg X", "card", ["point", "{f}", "--va", "200", "--vg", "{x}"]),
    ("fit --floor X", "long", ["fit", "{f}", "--jobs", "1", "--floor", "{x}"]),
    ("fit --fix kvb=X", "long", ["fit", "{f}", "--jobs", "1", "--fix", "kvb={x}"]),
    ("stage --bplus X", "card", ["stage", "common-cathode", *_STAGE[:3], "{x}", *_STAGE[4:]]),
    ("stage --rk X", "card", ["stage", "common-cathode", *_STAGE[:7], "{x}"]),
    ("export csv --va X", "card", ["export", "{f}", "--format", "csv", "--va", "0:{x}:50", "--vg", "-2,0"]),
    ("export csv --vg X", "card", ["export", "{f}", "--format", "csv", "--va", "0:400:50", "--vg", "{x},0"]),
    ("export spice --cgk X", "card", ["export", "{f}", "--format", "spice", "--cgk", "{x}"]),
    ("match --vg X", "fitjson", ["match", "{f}", "--va", "200", "--vg", "{x}"]),
    ("match --tolerance X", "fitjson", ["match", "{f}", "--va", "200", "--vg", "-1.5", "--tolerance", "{x}"]),
    ("distortion --vout X", "card", ["distortion", "common-cathode", *_STAGE, "--vout", "{x}"]),
]
#: option values every command must refuse (not finite, or not a number at all)
_OPTION_BAD = ["nan", "NaN", "inf", "-inf", "Infinity", "1e400", "-1e400", "9" * 400, "abc", "0x10", "1e",
               "\u22122", "2 V V"]
#: odd values the fuzzer cannot judge in general (huge, tiny, signed zero, suffixes, blanks)
_OPTION_ODD = ["1e308", "-1e308", "1e-320", "-0", "0", "", " 5 ", "+3", "2V", "1K5", "4.7m", "1e6", "-1e6",
               "5%", "1,5"]


class CaseTimeout(BaseException):
    """Raised by the alarm in a case that ran past the wall-clock limit."""


def _on_alarm(signum, frame):
    raise CaseTimeout()


@dataclass
class Case:
    case: int
    command: str
    layout: str
    mutation: str
    invalid: bool | None
    args: list
    data: bytes = b""
    exit_code: int | None = None
    output: str = ""
    failures: list = field(default_factory=list)
    seconds: float = 0.0


def build_case(seed: int, i: int, seeds: dict) -> Case:
    """Case ``i`` of run ``seed``: the command, the mutated input and the verdict on it."""
    rng = random.Random(f"platebook-fuzz:{seed}:{i}")
    if rng.random() < 0.15:
        name, layout, args = OPTION_COMMANDS[rng.randrange(len(OPTION_COMMANDS))]
        bad = rng.random() < 0.5
        x = rng.choice(_OPTION_BAD if bad else _OPTION_ODD)
        args = [a.replace("{x}", x) for a in args]
        return Case(i, name, layout, f"option-{'bad' if bad else 'odd'}", True if bad else None, args,
                    seeds[layout])
    name, kind, args = COMMANDS[rng.randrange(len(COMMANDS))]
    if kind == "csv":
        layout = rng.choice(["long", "wide"])
        base = seeds[layout]
        if rng.random() < 0.55:
            data, label, invalid = rng.choice(CSV)(rng, base, layout)
        else:
            data, label, invalid = rng.choice(GENERIC)(rng, base)
    else:
        layout = kind
        base = seeds[kind]
        if rng.random() < 0.6:
            data, label, invalid = m_card_structured(rng, base, kind)
        else:
            data, label, invalid = rng.choice(GENERIC)(rng, base)
    if rng.random() < 0.12:  # two mutations stacked; the verdict stays only if both agree it is bad
        data, label2, invalid2 = rng.choice(GENERIC)(rng, data)
        label = f"{label}+{label2}"
        invalid = None if not (invalid and invalid2) else True
    if data == base:
        invalid = False
    if invalid is False and name == "export csv" and "valid_range" in label:
        invalid = None  # without a fitted range, export csv asks for --va/--vg by design
    if invalid is False and label == "csv-swap-columns" and layout == "wide":
        invalid = None  # the wide layout's first column must be va
    return Case(i, name, layout, label, invalid, args, data)


_NONFINITE_TOKEN = re.compile(r"(?<![A-Za-z_])(nan|inf|infinity)(?![A-Za-z_])", re.IGNORECASE)
_CONTROL = re.compile(r"[\x00-\x08\x0b-\x1f\x7f\x80-\x9f]")


def judge(case: Case, result_exc, stdout: str, text: str, input_text: str, caught) -> list[str]:
    """The failure classes of one finished case (``text``: stdout and stderr together)."""
    out = []
    if result_exc is not None or "Traceback (most recent call last)" in text:
        out.append("traceback")
    if case.invalid is True and case.exit_code == 0:
        # --skip-bad may fit the rest of a file after skipping a bad row, but must say so
        if case.command != "fit --skip-bad" or "skipped" not in text:
            out.append("accepted")
    if case.exit_code in (0, 2):
        # figures are printed on stdout by a run that did not stop at an input error (exit 1
        # messages quote the offending text, which may well read 'inf')
        found = {m.lower() for m in _NONFINITE_TOKEN.findall(stdout)}
        if found - {m.lower() for m in _NONFINITE_TOKEN.findall(input_text)}:
            out.append("nan")
    if _CONTROL.search(text):
        out.append("control")
    if caught:
        out.append("warning")
    return sorted(set(out))


def run_case(case: Case, workdir: Path, limit: float) -> Case:
    """Run one case in this process and classify it."""
    suffix = ".csv" if case.layout in ("long", "wide") else ".json"
    path = workdir / f"case{case.case}{suffix}"
    path.write_bytes(case.data)
    args = [a.replace("{f}", str(path)) for a in case.args]
    result_exc = None
    stdout = ""
    old = signal.signal(signal.SIGALRM, _on_alarm)
    signal.setitimer(signal.ITIMER_REAL, limit)
    t0 = time.perf_counter()
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            r = CliRunner().invoke(cli_main, args, catch_exceptions=True)
            case.exit_code = r.exit_code
            stdout = r.stdout
            text = r.stdout + r.stderr
            if r.exception is not None and not isinstance(r.exception, SystemExit):
                result_exc = r.exception
                text += "\n" + "".join(traceback.format_exception(*r.exc_info))
        except CaseTimeout:
            case.exit_code = None
            text = f"(no answer within {limit:g} s)"
        finally:
            signal.setitimer(signal.ITIMER_REAL, 0)
            signal.signal(signal.SIGALRM, old)
    case.seconds = time.perf_counter() - t0
    case.output = text
    path.unlink(missing_ok=True)
    if case.exit_code is None:
        case.failures = ["hang"]
    else:
        caught = [w for w in caught if not issubclass(w.category, (ResourceWarning,))]
        input_text = case.data.decode("utf-8", "replace")
        case.failures = judge(case, result_exc, stdout, text, input_text, caught)
        if "warning" in case.failures:
            case.output += "\n" + "\n".join(f"warning: {w.category.__name__}: {w.message}" for w in caught[:3])
    if not case.failures:
        case.data = b""  # keep only what a failure report needs
        case.output = case.output[:2000]
    return case


# -- the pool -------------------------------------------------------------------

_W: dict = {}


def _worker_init(seeds, limit, seed):
    _W.update(seeds=seeds, limit=limit, seed=seed, dir=Path(tempfile.mkdtemp(prefix="platebook-fuzz-")))
    os.environ.setdefault("COLUMNS", "100")


def _worker_run(i):
    case = build_case(_W["seed"], i, _W["seeds"])
    return run_case(case, _W["dir"], _W["limit"])


@dataclass
class Summary:
    cases: list

    @property
    def failures(self):
        return [c for c in self.cases if c.failures]

    def counts(self):
        by_class = collections.Counter(f for c in self.cases for f in c.failures)
        return by_class

    def report(self, seed: int, shown: int = 40) -> str:
        lines = []
        n = len(self.cases)
        lines.append(f"platebook fuzz: seed {seed}, {n} cases, {sum(c.seconds for c in self.cases):.1f} s of case time")
        by_cmd = collections.defaultdict(collections.Counter)
        for c in self.cases:
            by_cmd[c.command]["hang" if c.exit_code is None else f"exit {c.exit_code}"] += 1
        lines.append("")
        lines.append(f"{'command':<22} {'cases':>6}  exit codes")
        for cmd in [c for c, _, _ in COMMANDS + OPTION_COMMANDS if c in by_cmd]:
            cnt = by_cmd[cmd]
            lines.append(f"{cmd:<22} {sum(cnt.values()):>6}  " + ", ".join(f"{k}: {v}" for k, v in sorted(cnt.items())))
        cls = self.counts()
        lines.append("")
        lines.append("failures by class: " + (", ".join(f"{k} {cls[k]}" for k in
                     ("traceback", "hang", "accepted", "nan", "control", "warning") if cls[k]) or "none"))
        for k in ("traceback", "hang", "accepted", "nan", "control", "warning"):
            lines.append(f"  {k:<10} {cls[k]:>5}")
        fails = self.failures
        lines.append(f"cases with a failure: {len(fails)} of {n}")
        known = collections.Counter(c.invalid for c in self.cases)
        refused = collections.Counter(c.mutation for c in self.cases if c.invalid is False and c.exit_code == 1)
        lines.append(f"inputs the fuzzer knows are invalid: {known[True]}, valid: {known[False]}, "
                     f"cannot tell: {known[None]}")
        lines.append(f"valid inputs refused with exit 1 (not a failure; watch for over-strict readers): "
                     f"{sum(refused.values())}" + (" (" + ", ".join(f"{k} {v}" for k, v in refused.most_common(8)) + ")"
                                                   if refused else ""))
        if fails:
            lines.append("")
            lines.append("failures by class, command and mutation:")
            grouped = collections.Counter((f, c.command, c.mutation) for c in fails for f in c.failures)
            for (f, cmd, mut), k in sorted(grouped.items(), key=lambda x: (x[0][0], -x[1], x[0][1:])):
                lines.append(f"  {f:<10} {cmd:<22} {mut:<34} {k:>5}")
            exc = collections.Counter(_traceback_place(c.output) for c in fails if "traceback" in c.failures)
            if exc:
                lines.append("")
                lines.append("tracebacks by exception and the last Platebook line it passed:")
                for k, v in exc.most_common():
                    lines.append(f"  {v:>5}  {k}")
            lines.append("")
            lines.append(f"first {min(shown, len(fails))} failures (rerun one with --seed {seed} --case N --show):")
            for c in fails[:shown]:
                head = [s for s in c.output.splitlines() if s.strip()]
                if "traceback" in c.failures:
                    exc = [s for s in head if re.match(r"^\w+(Error|Exception)\w*(:|$)", s)]
                    head = [_traceback_place(c.output)] + exc[-1:]
                lines.append(f"  case {c.case}: {','.join(c.failures)}; {c.command}; {c.layout} {c.mutation}; "
                             f"exit {c.exit_code}")
                for s in head[:3]:
                    lines.append("      " + _printable(s)[:160])
        return "\n".join(lines)


def _traceback_place(output: str) -> str:
    """``ExceptionName at fitter/card.py:123 (load_card)`` for a traceback in ``output``."""
    names = re.findall(r"^(\w+(?:Error|Exception|Exit|Interrupt)\w*)(?::|$)", output, re.MULTILINE)
    frames = re.findall(r'File "[^"]*?/(fitter/[^"]+)", line (\d+), in (\w+)', output)
    where = f" at {frames[-1][0]}:{frames[-1][1]} ({frames[-1][2]})" if frames else ""
    return (names[-1] if names else "?") + where


def _printable(s: str) -> str:
    return _CONTROL.sub(lambda m: f"\\x{ord(m.group()):02x}", s)


def run_fuzz(count: int, seed: int = 1, processes: int | None = None, limit: float = 20.0,
             start: int = 0, progress=None) -> Summary:
    """Run cases ``start .. start+count-1`` of run ``seed`` and return the summary."""
    tmp = Path(tempfile.mkdtemp(prefix="platebook-fuzz-seeds-"))
    try:
        seeds = make_seeds(tmp)
    finally:
        shutil.rmtree(tmp, ignore_errors=True)
    ids = range(start, start + count)
    nproc = processes or os.cpu_count() or 1
    cases = []
    if nproc <= 1:
        _worker_init(seeds, limit, seed)
        try:
            for i in ids:
                cases.append(_worker_run(i))
                if progress:
                    progress(len(cases))
        finally:
            shutil.rmtree(_W["dir"], ignore_errors=True)
        return Summary(cases)
    ctx = multiprocessing.get_context("fork")
    with ctx.Pool(nproc, initializer=_worker_init, initargs=(seeds, limit, seed), maxtasksperchild=500) as pool:
        it = pool.imap_unordered(_worker_run, ids)  # chunksize 1: only its iterator has next(timeout)
        try:
            for _ in ids:
                # the alarm inside a case cannot stop a loop in C code; this guard can
                cases.append(it.next(timeout=4 * limit + 60))
                if progress:
                    progress(len(cases))
        except multiprocessing.TimeoutError:
            pool.terminate()
            done = {c.case for c in cases}
            for i in ids:
                if i not in done:
                    c = build_case(seed, i, seeds)
                    c.failures, c.output = ["hang"], "(a worker stopped answering; this case was not finished)"
                    cases.append(c)
    cases.sort(key=lambda c: c.case)
    return Summary(cases)


def save_failures(summary: Summary, folder: Path, seed: int) -> None:
    folder.mkdir(parents=True, exist_ok=True)
    for c in summary.failures:
        suffix = ".csv" if c.layout in ("long", "wide") else ".json"
        (folder / f"case{c.case}{suffix}").write_bytes(c.data)
        command = " ".join(a.replace("{f}", f"case{c.case}{suffix}") for a in c.args)
        (folder / f"case{c.case}.txt").write_text(
            f"seed {seed} case {c.case}\ncommand: platebook {command}\n"
            f"mutation: {c.mutation} (input known invalid: {c.invalid})\nexit: {c.exit_code}\n"
            f"failures: {', '.join(c.failures)}\n\n{c.output}\n", errors="replace")


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--count", type=int, default=500, help="number of cases (default 500)")
    ap.add_argument("--seed", type=int, default=1, help="run seed: the same seed gives the same cases")
    ap.add_argument("--start", type=int, default=0, help="first case id")
    ap.add_argument("--case", type=int, default=None, help="run this one case only")
    ap.add_argument("--show", action="store_true", help="print the full output of every failing case")
    ap.add_argument("--jobs", type=int, default=None, help="worker processes (default: all cores)")
    ap.add_argument("--limit", type=float, default=20.0, help="wall-clock limit per case [s] (a hang past it)")
    ap.add_argument("--save", type=Path, default=Path("fuzz-failures"),
                    help="folder for the failing inputs (default ./fuzz-failures)")
    a = ap.parse_args(argv)
    if a.case is not None:
        a.start, a.count, a.jobs = a.case, 1, 1
    t0 = time.perf_counter()
    tick = max(1, a.count // 20)

    def progress(n):
        if n % tick == 0 or n == a.count:
            print(f"  {n}/{a.count} cases, {time.perf_counter() - t0:.0f} s", file=sys.stderr, flush=True)

    summary = run_fuzz(a.count, a.seed, a.jobs, a.limit, a.start, progress)
    wall = time.perf_counter() - t0
    print(summary.report(a.seed))
    print(f"\nwall time {wall:.1f} s on {a.jobs or os.cpu_count()} process(es); load average "
          + " ".join(f"{x:.2f}" for x in os.getloadavg()))
    if a.show:
        for c in summary.failures:
            print(f"\n===== case {c.case}: {c.command}; {c.mutation}; exit {c.exit_code}\n{_printable(c.output)}")
    if summary.failures:
        save_failures(summary, a.save, a.seed)
        print(f"failing inputs saved in {a.save}/ (caseN.csv/.json with caseN.txt)")
        return 1
    return 0


if __name__ == "__main__":
    sys.exit(main())
