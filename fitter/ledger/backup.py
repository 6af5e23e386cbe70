"""Back up and restore a whole ledger to a folder, and copy a ledger between databases.

A back-up folder holds::

    manifest.json          format, schema revision, Platebook version, per table its row count
                           and the SHA-256 of its CSV file
    tables/<table>.csv     every row of every table (header: the column names); a text cell is
                           the text itself (\\N for null, a leading backslash doubled), any
                           other cell the value as JSON (null, true, 1.5, {...}); binary
                           columns are {"base64": "..."}, except a source file's bytes, which
                           are the file sources/<sha256> (see below).  These files are for a
                           restore, not for a spreadsheet (cells are not formula-guarded)
    sources/<sha256>       each imported file, byte for byte as it was read
    plots/<sha256>         each uploaded datasheet plot image, byte for byte (table plot_images)
    cards/<tube>[_<section>].<model>.json   each section's current model card (for people and
                           other tools; a restore does not need them)

Floats are written with Python's ``repr`` (through JSON), which reads back to the same
double, so a restore gives back exactly the rows backed up: a test compares every row.
A restore goes into an empty ledger, all in one transaction, and checks the manifest's
hashes and each source file's SHA-256 first; a back-up is untrusted input.
"""

from __future__ import annotations

import base64
import csv
import hashlib
import io
import json
from pathlib import Path

from sqlalchemy import LargeBinary, String, func, select, text

from .. import __version__
from ..errors import InputError
from ..outfiles import OutputError, prepare_folder, unit_stems, write_atomic
from ..text import shown
from .db import Ledger
from .schema import HEAD, TABLES, Base, data_hash

BACKUP_FORMAT = "platebook.ledger-backup"
BACKUP_VERSION = 1
#: largest CSV cell read back [characters] (a measurement of 100,000 points is ~5 MB of base64)
csv.field_size_limit(64 * 1024 * 1024)


#: back-ups of an earlier schema that a restore still reads: per table, the columns that
#: schema lacks, which the restore computes (a measurement's data hash from its points)
_OLDER = {"0004_plot_images": {"measurements": ("data_sha256",)}}

#: tables whose ``content`` is written as a file named by its ``sha256``, in this sub-folder
_FILES = {"source_files": "sources", "plot_images": "plots"}


def _table(name):
    return Base.metadata.tables[name]


def dump(ledger: Ledger) -> dict:
    """Every row of every table, ordered by id: ``{table: [dict, ...]}`` (what the tests
    compare before and after an interrupted import, a restore, or a copy)."""
    out = {}
    with ledger.read_engine.connect() as c:
        for name in TABLES:
            t = _table(name)
            out[name] = [dict(r._mapping) for r in c.execute(select(t).order_by(t.c.id))]
    return out


def _cell(v, col) -> str:
    if isinstance(col.type, String):  # text as it is; \N is null, a leading backslash doubled
        return "\\N" if v is None else ("\\" + v if v.startswith("\\") else v)
    if isinstance(v, (bytes, bytearray, memoryview)):
        return json.dumps({"base64": base64.b64encode(bytes(v)).decode("ascii")})
    return json.dumps(v, allow_nan=False, ensure_ascii=False)


def _uncell(s: str, col, where):
    if isinstance(col.type, String):
        return None if s == "\\N" else (s[1:] if s.startswith("\\") else s)
    try:
        v = json.loads(s)
    except ValueError:
        raise InputError(f"cannot read the cell as JSON: {shown(s[:40])!r}", **where) from None
    if isinstance(col.type, LargeBinary) and v is not None:
        if not (isinstance(v, dict) and isinstance(v.get("base64"), str)):
            raise InputError("expected {\"base64\": ...} for binary data", **where)
        try:
            return base64.b64decode(v["base64"], validate=True)
        except ValueError:
            raise InputError("invalid base64", **where) from None
    return v


def backup(ledger: Ledger, folder) -> dict:
    """Write the whole ledger to ``folder`` (created; must be empty or absent)."""
    from .store import card_of

    folder = Path(folder)
    if folder.exists() and any(folder.iterdir()):
        raise InputError(f"{shown(folder)} is not empty; back up into a new folder", field="folder")
    try:
        for sub in ("tables", "sources", "plots", "cards"):
            prepare_folder(folder / sub)
    except OutputError as e:
        raise InputError(str(e), field="folder") from None
    manifest = {"format": BACKUP_FORMAT, "version": BACKUP_VERSION, "schema": HEAD, "platebook": __version__,
                "tables": {}}
    with ledger.read_engine.connect() as c:
        for name in TABLES:
            t = _table(name)
            cols = [col.name for col in t.columns]
            buf = io.StringIO()
            w = csv.writer(buf, lineterminator="\n")
            w.writerow(cols)
            n = 0
            for r in c.execute(select(t).order_by(t.c.id)).mappings():
                row = dict(r)
                if name in _FILES:
                    write_atomic(folder / _FILES[name] / row["sha256"], bytes(row["content"]))
                    row["content"] = None
                w.writerow([_cell(row[k], t.c[k]) for k in cols])
                n += 1
            data = buf.getvalue().encode("utf-8")
            write_atomic(folder / "tables" / f"{name}.csv", data)
            manifest["tables"][name] = {"rows": n, "sha256": hashlib.sha256(data).hexdigest()}
        labels = [r for r in c.execute(text("SELECT label FROM tubes ORDER BY id")).scalars()]
    cards = 0
    for label in labels:
        found = card_of(ledger, label)
        stems = unit_stems((d["tube"], d["section"]) for d in found)
        for d, stem in zip(found, stems):
            write_atomic(folder / "cards" / f"{stem}.{d['model']}.json", json.dumps(d, indent=2) + "\n")
            cards += 1
    manifest["cards"] = cards
    write_atomic(folder / "manifest.json", json.dumps(manifest, indent=2) + "\n")
    return {"folder": str(folder), "tables": {k: v["rows"] for k, v in manifest["tables"].items()}, "cards": cards}


def _empty(conn) -> bool:
    return all(conn.scalar(select(func.count()).select_from(_table(n))) == 0 for n in TABLES)


def _fix_sequences(conn):
    if conn.dialect.name == "postgresql":
        for name in TABLES:
            conn.execute(text(f"SELECT setval(pg_get_serial_sequence('{name}', 'id'), "
                              f"COALESCE((SELECT MAX(id) FROM {name}), 0) + 1, false)"))


def restore(ledger: Ledger, folder) -> dict:
    """Load a back-up folder into an empty ledger, in one transaction."""
    folder = Path(folder)
    mpath = folder / "manifest.json"
    try:
        manifest = json.loads(mpath.read_text("utf-8"))
    except OSError as e:
        raise InputError(f"cannot read: {e.strerror or e}", file=shown(mpath)) from None
    except ValueError as e:
        raise InputError(f"not JSON: {e}", file=shown(mpath)) from None
    if not isinstance(manifest, dict) or manifest.get("format") != BACKUP_FORMAT:
        raise InputError(f"not a Platebook ledger back-up (format {BACKUP_FORMAT!r} expected)", file=shown(mpath),
                         field="format")
    schema = manifest.get("schema")
    if manifest.get("version") != BACKUP_VERSION or (schema != HEAD and schema not in _OLDER):
        raise InputError(f"back-up version {manifest.get('version')!r}, schema {shown(schema)!r}; "
                         f"this Platebook restores version {BACKUP_VERSION}, schema {HEAD} "
                         f"(or {', '.join(_OLDER)})", file=shown(mpath))
    missing = _OLDER.get(schema, {})
    tables = manifest.get("tables")
    if not isinstance(tables, dict) or set(tables) != set(TABLES):
        raise InputError("must list exactly the ledger's tables", file=shown(mpath), field="tables")
    rows_by_table = {}
    for name in TABLES:
        p = folder / "tables" / f"{name}.csv"
        try:
            data = p.read_bytes()
        except OSError as e:
            raise InputError(f"cannot read: {e.strerror or e}", file=shown(p)) from None
        if hashlib.sha256(data).hexdigest() != tables[name].get("sha256"):
            raise InputError("its SHA-256 differs from the manifest's: the back-up was changed or damaged",
                             file=shown(p))
        t = _table(name)
        reader = csv.reader(io.StringIO(data.decode("utf-8")))
        header = next(reader, None)
        cols = {c.name: c for c in t.columns if c.name not in missing.get(name, ())}
        if header is None or set(header) != set(cols):
            raise InputError(f"header must name the columns {', '.join(cols)}", file=shown(p), line=1)
        rows = []
        for lineno, cells in enumerate(reader, 2):
            if len(cells) != len(header):
                raise InputError(f"{len(cells)} cells, expected {len(header)}", file=shown(p), line=lineno)
            row = {}
            for k, (h, s) in enumerate(zip(header, cells), 1):
                row[h] = _uncell(s, cols[h], {"file": shown(p), "line": lineno, "column": k})
            if name in _FILES:
                src = folder / _FILES[name] / str(row["sha256"])
                try:
                    content = src.read_bytes()
                except OSError as e:
                    raise InputError(f"cannot read the stored file: {e.strerror or e}", file=shown(src)) from None
                if hashlib.sha256(content).hexdigest() != row["sha256"]:
                    raise InputError("the stored file's SHA-256 differs from its name", file=shown(src))
                row["content"] = content
            if "data_sha256" in missing.get(name, ()):
                pts, n = row.get("points"), row.get("n_points")
                ok = isinstance(pts, (bytes, bytearray)) and isinstance(n, int) and not isinstance(n, bool)
                row["data_sha256"] = data_hash(bytes(pts), n) if ok else None
            rows.append(row)
        if len(rows) != tables[name].get("rows"):
            raise InputError(f"{len(rows)} rows, the manifest says {tables[name].get('rows')}", file=shown(p))
        rows_by_table[name] = rows
    return _load(ledger, rows_by_table)


def _load(ledger: Ledger, rows_by_table: dict) -> dict:
    def run(s):
        conn = s.connection()
        if not _empty(conn):
            raise InputError(f"the ledger {ledger.describe()} is not empty; restore or copy into a new one",
                             field="db")
        for name in TABLES:
            if rows_by_table[name]:
                conn.execute(_table(name).insert(), rows_by_table[name])
        _fix_sequences(conn)
        return {name: len(rows) for name, rows in rows_by_table.items()}

    try:
        done = ledger.work(run)
        ledger.analyze()
        return done
    except InputError:
        raise
    except Exception as e:  # a constraint the rows break: a damaged back-up
        from .db import scrub

        raise InputError(f"the rows do not fit the ledger: {scrub(e, ledger.url)}") from None


def copy(source: Ledger, target: Ledger) -> dict:
    """Copy every row of ``source`` into the empty ledger ``target`` (SQLite to PostgreSQL
    or back), in one transaction on the target."""
    return _load(target, dump(source))
