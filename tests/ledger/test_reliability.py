"""Reliability of the ledger under a killed import and under 20 imports at once, on SQLite and
PostgreSQL.

The killed import is a real ``python -m fitter stock import`` subprocess.  The 20 imports are
20 separate processes forked from the test process, each running the ``platebook stock
import`` command (``fitter.cli.main``) with its own database connections; forking spares
each of them the second or two of start-up imports, which would otherwise dominate the run.

The reference is the ledger's own rows (``fitter.ledger.backup.dump``): after an import killed
with SIGKILL while it writes, every table must be exactly as before; after 20 concurrent
imports, every file must be stored once and every tube, measurement and fit exactly once.
Data are INVENTED (``stock_file``, tests/ledger/conftest.py).
"""

from __future__ import annotations

import json
import multiprocessing
import os
import signal
import sqlite3
import subprocess
import sys
import time

import pytest

from fitter.ledger.backup import dump
from fitter.ledger.db import open_ledger, resolve_url
from fitter.service import stock as svc


def _writing(db) -> bool:
    """Is some other process inside a write transaction on this ledger right now?"""
    url = resolve_url(db)
    if url.drivername == "sqlite":
        c = sqlite3.connect(url.database, timeout=0, isolation_level=None)
        try:
            c.execute("BEGIN IMMEDIATE")  # fails at once while a writer holds the lock
            c.execute("ROLLBACK")
            return False
        except sqlite3.OperationalError as e:
            assert "locked" in str(e) or "busy" in str(e)
            return True
        finally:
            c.close()
    import psycopg

    q = url.query
    with psycopg.connect(host=q["host"], user=url.username, dbname=url.database, autocommit=True) as c:
        # a transaction gets an xid at its first write
        return c.execute("SELECT count(*) FROM pg_stat_activity WHERE application_name = 'platebook' "
                         "AND backend_xid IS NOT NULL").fetchone()[0] > 0


def _start_import(db, path, user="kim", extra=()):
    return subprocess.Popen([sys.executable, "-m", "fitter", "stock", "--db", db, "--user", user, "import",
                             str(path), "--type", "DT", *extra],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)


def test_an_import_killed_while_writing_leaves_the_ledger_as_it_was(db, stock_file):
    svc.init(db)
    svc.add_type(db, "ann", "DT", 250.0, -8.5)
    small, _ = stock_file("small.csv", n_tubes=3, seed=21)
    svc.import_files(db, "ann", [small], "DT", jobs=1)
    big, _ = stock_file("big.csv", n_tubes=150, seed=22, prefix="K")  # 300 units; T001..T003 are others
    led = open_ledger(db)
    before = dump(led)
    proc = _start_import(db, big)
    try:
        deadline = time.monotonic() + 120
        while not _writing(db):
            assert proc.poll() is None, "the import ended before it was caught writing"
            assert time.monotonic() < deadline, "the import never started writing"
            time.sleep(0.002)
        proc.send_signal(signal.SIGKILL)
    finally:
        if proc.poll() is None:
            proc.kill()
        out, err = proc.communicate()
    assert proc.returncode == -signal.SIGKILL, err
    after = dump(led)
    assert after == before
    # and the ledger carries on: the same file imports completely afterwards
    res = svc.import_files(db, "ann", [big], "DT", jobs=1)
    assert len(res.data["files"][0]["new_tubes"]) == 150
    assert len(dump(led)["measurements"]) == len(before["measurements"]) + 300
    led.close()


def _cli_child(args, out, err):
    """A forked process: run the command with its stdout and stderr in files."""
    for fd, path in ((1, out), (2, err)):
        f = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o600)
        os.dup2(f, fd)
        os.close(f)
    sys.stdout = open(1, "w", closefd=False)
    sys.stderr = open(2, "w", closefd=False)
    from fitter.cli import main

    code = 0
    try:
        main(args, prog_name="platebook")
    except SystemExit as e:
        code = e.code if isinstance(e.code, int) else 1
    sys.stdout.flush()
    sys.stderr.flush()
    os._exit(code)


def test_twenty_imports_at_once_lose_and_duplicate_nothing(db, stock_file, tmp_path):
    svc.init(db)
    svc.add_type(db, "ann", "DT", 250.0, -8.5)
    files = [stock_file(f"f{k:02d}.csv", n_tubes=2, seed=100 + k, prefix=f"C{k:02d}-")[0] for k in range(17)]
    # two processes import the same bytes; and two different files hold the same new tube
    # label (whichever commits second is a re-test of it)
    files.append(files[0])
    files.append(stock_file("same_label_1.csv", n_tubes=1, seed=201, prefix="SHARED-")[0])
    files.append(stock_file("same_label_2.csv", n_tubes=1, seed=202, prefix="SHARED-")[0])
    assert len(files) == 20
    import fitter.cli  # noqa: F401  (loaded once, before the fork)

    ctx = multiprocessing.get_context("fork")
    procs = []
    for k, f in enumerate(files):
        args = ["stock", "--db", db, "--user", f"clerk{k}", "import", str(f), "--type", "DT", "--json", "--jobs", "1"]
        out, err = tmp_path / f"out{k}", tmp_path / f"err{k}"
        p = ctx.Process(target=_cli_child, args=(args, str(out), str(err)))
        procs.append((p, out, err))
    for p, _, _ in procs:
        p.start()
    outs = []
    for p, out, err in procs:
        p.join(300)
        outs.append((p.exitcode, out.read_text(), err.read_text()))
    for code, out, err in outs:
        assert code == 0, err
        low = (out + err).lower()
        assert "locked" not in low and "serializ" not in low and "traceback" not in low
    results = [json.loads(out)["files"][0] for _, out, _ in outs]
    assert sum(r["duplicate"] for r in results) == 1  # the same bytes, stored once
    shared = [r for r in results if any(t.startswith("SHARED-") for t in r["new_tubes"] + r["retested"])]
    assert sorted(len(r["new_tubes"]) for r in shared) == [0, 1]  # one made it, the other re-tested it
    led = open_ledger(db)
    rows = dump(led)
    led.close()
    assert len(rows["source_files"]) == 19
    labels = [t["label"] for t in rows["tubes"]]
    assert len(labels) == len(set(labels)) == 17 * 2 + 1
    assert len(rows["measurements"]) == 17 * 4 + 2 * 2
    assert len(rows["fits"]) == len(rows["measurements"])
    assert len({(m["section_id"], m["source_id"]) for m in rows["measurements"]}) == len(rows["measurements"])
