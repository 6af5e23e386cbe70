"""Back-up and restore of a whole ledger, and copies between SQLite and PostgreSQL, without loss.

The reference is the ledger itself: every row of every table (``fitter.ledger.backup.dump``)
before and after, compared value by value (floats exactly, bytes exactly).  Data are INVENTED
(``stock_file``, tests/ledger/conftest.py).
"""

from __future__ import annotations

import json

import pytest

from fitter.errors import InputError
from fitter.ledger.backup import dump
from fitter.ledger.db import open_ledger
from fitter.service import stock as svc


@pytest.fixture
def busy_db(db, stock_file):
    """A ledger with a type, two imports (one a re-test), grades, a reservation, a sale."""
    svc.init(db)
    svc.add_type(db, "ann", "DT", 250.0, -8.5)
    first, truth = stock_file("first.csv", n_tubes=4, seed=11)
    second, _ = stock_file("second.csv", n_tubes=2, seed=12)
    svc.import_files(db, "ann", [first], "DT", jobs=1, notes="bench 2, after burn-in")
    svc.import_files(db, "bob", [second], "DT", jobs=1, instrument="tracer #2")
    svc.grade(db, "ann", "DT")
    svc.reserve(db, "ann", ["T003", "T004"], order="Ünïcode order \\N")
    svc.set_status(db, "bob", ["T003", "T004"], "sold", order="Ünïcode order \\N")
    return db


def test_backup_then_restore_gives_back_every_row(busy_db, tmp_path):
    folder = tmp_path / "backup"
    res = svc.backup(busy_db, str(folder))
    assert res.data["tables"]["measurements"] == 12 and res.data["cards"] == 8
    # the source files are there byte for byte, named by their SHA-256
    led = open_ledger(busy_db)
    rows = dump(led)
    led.close()
    for src in rows["source_files"]:
        assert (folder / "sources" / src["sha256"]).read_bytes() == src["content"]
    assert json.loads((folder / "cards" / "T001_A.koren.json").read_text())["format"] == "platebook.model-card"
    target = str(tmp_path / "restored.sqlite")
    svc.restore(target, str(folder))
    back = open_ledger(target)
    assert dump(back) == rows
    # the restored ledger carries on: new ids do not collide
    svc.add_type(target, "ann", "NEW", 100.0, -1.0)
    back.close()


def test_restore_refuses_a_changed_backup_and_a_ledger_that_is_not_empty(busy_db, tmp_path):
    folder = tmp_path / "backup"
    svc.backup(busy_db, str(folder))
    with pytest.raises(InputError, match="is not empty"):
        svc.restore(busy_db, str(folder))
    p = folder / "tables" / "tubes.csv"
    p.write_text(p.read_text().replace("sold", "in-stock", 1))
    target = str(tmp_path / "restored.sqlite")
    with pytest.raises(InputError, match="SHA-256 differs from the manifest's"):
        svc.restore(target, str(folder))
    led = open_ledger(target)
    assert all(not rows for rows in dump(led).values())
    led.close()


@pytest.mark.postgres
@pytest.mark.parametrize("db", ["sqlite"], indirect=True)
def test_sqlite_to_postgresql_and_back_loses_nothing(busy_db, pg_cluster, tmp_path):
    pg = pg_cluster.create_db()
    svc.init(pg)
    svc.copy(busy_db, pg)
    back = str(tmp_path / "back.sqlite")
    svc.init(back)
    svc.copy(pg, back)
    a, b, c = (open_ledger(x) for x in (busy_db, pg, back))
    try:
        rows = dump(a)
        assert dump(b) == rows
        assert dump(c) == rows
        assert len(rows["fits"]) == 12 and len(rows["events"]) > 10
    finally:
        for x in (a, b, c):
            x.close()


def test_a_backup_of_the_schema_before_the_data_hash_restores_with_the_hashes_computed(busy_db, tmp_path):
    """A back-up written before measurements had their data hash (schema 0004) still restores:
    the hashes come from the stored points, the same as an import computes."""
    import csv
    import hashlib
    import io

    folder = tmp_path / "backup"
    svc.backup(busy_db, str(folder))
    led = open_ledger(busy_db)
    rows = dump(led)
    led.close()
    assert all(m["data_sha256"] for m in rows["measurements"])
    # the folder as the earlier schema wrote it: no data_sha256 column, its manifest
    p = folder / "tables" / "measurements.csv"
    table = list(csv.reader(io.StringIO(p.read_text("utf-8"))))
    k = table[0].index("data_sha256")
    buf = io.StringIO()
    csv.writer(buf, lineterminator="\n").writerows([r[:k] + r[k + 1:] for r in table])
    p.write_bytes(buf.getvalue().encode("utf-8"))
    mpath = folder / "manifest.json"
    manifest = json.loads(mpath.read_text())
    manifest["schema"] = "0004_plot_images"
    manifest["tables"]["measurements"]["sha256"] = hashlib.sha256(p.read_bytes()).hexdigest()
    mpath.write_text(json.dumps(manifest))
    target = str(tmp_path / "restored.sqlite")
    svc.restore(target, str(folder))
    back = open_ledger(target)
    assert dump(back) == rows
    back.close()
    # a schema this Platebook does not know is still refused
    manifest["schema"] = "0003_upload_jobs"
    mpath.write_text(json.dumps(manifest))
    with pytest.raises(InputError, match="schema"):
        svc.restore(str(tmp_path / "again.sqlite"), str(folder))
