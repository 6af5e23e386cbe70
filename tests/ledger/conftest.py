"""Fixtures of the ledger tests: a ledger on SQLite (a temporary file) and on PostgreSQL (a
throwaway cluster started for the test session).

The PostgreSQL cluster: ``initdb`` and ``pg_ctl`` from the Debian package (``make test``
installs it when missing), run as an unprivileged user (``nobody`` when the tests run as root,
since the server refuses to run as root; else the current user), in a temporary folder, with
the server listening only on a unix socket in that folder (no TCP port).  It is stopped at the
end of the session; a watchdog process stops it and removes the folder if the test process
dies without cleaning up.  Each test gets its own database.

Without PostgreSQL binaries the PostgreSQL tests are skipped, except on CI (``CI=true``),
where they fail: CI must run both databases.
"""

from __future__ import annotations

import glob
import itertools
import os
import shutil
import subprocess
import sys
import tempfile
from pathlib import Path

import pytest

# the engine tests' generator (tests/conftest.py) is shared through its fixtures
PG_BIN_ENV = "PLATEBOOK_PG_BIN"
_counter = itertools.count(1)


def pg_bindir() -> str | None:
    cands = [os.environ.get(PG_BIN_ENV)] if os.environ.get(PG_BIN_ENV) else []
    cands += sorted(glob.glob("/usr/lib/postgresql/*/bin"), key=lambda p: int(p.split("/")[-2])
                    if p.split("/")[-2].isdigit() else 0, reverse=True)
    which = shutil.which("initdb")
    if which:
        cands.append(str(Path(which).parent))
    for c in cands:
        if c and Path(c, "initdb").exists() and Path(c, "pg_ctl").exists():
            return c
    return None


class PgCluster:
    def __init__(self, bindir: str):
        self.bindir = bindir
        self.root = Path(tempfile.mkdtemp(prefix="platebook-pg-"))
        self.data = self.root / "data"
        self.as_user: list[str] = []
        if os.geteuid() == 0:
            import pwd

            nobody = pwd.getpwnam("nobody")
            os.chown(self.root, nobody.pw_uid, nobody.pw_gid)
            self.as_user = ["runuser", "-u", "nobody", "--"]
        self.watchdog = None

    def _run(self, *args):
        cmd = self.as_user + [str(Path(self.bindir, args[0])), *args[1:]]
        r = subprocess.run(cmd, capture_output=True, text=True, cwd=self.root, timeout=120)
        if r.returncode:
            raise RuntimeError(f"{' '.join(cmd)} failed: {r.stderr.strip() or r.stdout.strip()}")
        return r

    def start(self):
        self._run("initdb", "-D", str(self.data), "-A", "trust", "-U", "platebook", "-E", "UTF8", "--no-sync")
        opts = f"-k {self.root} -c listen_addresses='' -F -c max_connections=60"
        self._run("pg_ctl", "-D", str(self.data), "-o", opts, "-l", str(self.root / "log"), "-w", "start")
        stop = " ".join(self.as_user + [str(Path(self.bindir, "pg_ctl")), "-D", str(self.data),
                                        "-m", "immediate", "stop"])
        # stops the server and removes the folder if this process dies before the finaliser runs
        self.watchdog = subprocess.Popen(
            ["sh", "-c", f"while kill -0 {os.getpid()} 2>/dev/null; do sleep 1; done; {stop} >/dev/null 2>&1; "
                         f"rm -rf '{self.root}'"],
            start_new_session=True, stdin=subprocess.DEVNULL, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)

    def url(self, dbname="postgres") -> str:
        return f"postgresql+psycopg://platebook@/{dbname}?host={self.root}"

    def create_db(self) -> str:
        import psycopg

        name = f"t{os.getpid()}_{next(_counter)}"
        with psycopg.connect(f"host={self.root} user=platebook dbname=postgres", autocommit=True) as c:
            c.execute(f'CREATE DATABASE "{name}"')
        return self.url(name)

    def stop(self):
        try:
            self._run("pg_ctl", "-D", str(self.data), "-m", "fast", "stop")
        finally:
            if self.watchdog is not None:
                self.watchdog.kill()
                self.watchdog.wait()
            shutil.rmtree(self.root, ignore_errors=True)


@pytest.fixture(scope="session")
def pg_cluster(request):
    bindir = pg_bindir()
    if bindir is None:
        msg = "PostgreSQL binaries (initdb, pg_ctl) not found; 'make test' installs Debian's postgresql"
        if os.environ.get("CI", "").lower() == "true":
            pytest.fail(msg + " (CI must run the PostgreSQL tests)")
        pytest.skip(msg)
    cluster = PgCluster(bindir)
    request.addfinalizer(cluster.stop)
    cluster.start()
    return cluster


def _sqlite_url(tmp_path) -> str:
    return str(tmp_path / "ledger.sqlite")


@pytest.fixture(params=["sqlite", pytest.param("postgres", marks=pytest.mark.postgres)])
def db(request, tmp_path):
    """The URL of a new, empty ledger (schema not yet created) on each database."""
    if request.param == "sqlite":
        return _sqlite_url(tmp_path)
    return request.getfixturevalue("pg_cluster").create_db()


@pytest.fixture
def ledger(db):
    """An open, migrated ledger on each database (closed after the test)."""
    from fitter.ledger.db import open_ledger

    led = open_ledger(db)
    yield led
    led.close()


@pytest.fixture
def platebook():
    """Run ``platebook`` in a subprocess: (returncode, stdout, stderr)."""

    def run(*args, env=None, timeout=300):
        e = dict(os.environ)
        e.update(env or {})
        r = subprocess.run([sys.executable, "-m", "fitter", *map(str, args)], capture_output=True, text=True,
                           env=e, timeout=timeout)
        return r.returncode, r.stdout, r.stderr

    return run


@pytest.fixture
def stock_file(synth, tube_types, write_long, tmp_path):
    """Write an invented stock of dual triodes (12AU7-like Koren sets from tests/conftest.py,
    with a per-tube spread of kg1 and a small one between sections) to a CSV file.
    ``stock_file(name, n_tubes, seed, prefix, kg1_scale)`` returns (path, {label: params})."""
    import numpy as np

    def make(name="stock.csv", n_tubes=4, seed=0, prefix="T", kg1_scale=None, va_step=20.0, grid_step=4.0,
             sections=("A", "B")):
        rng = np.random.default_rng(seed)
        tt = tube_types["12AU7"]
        units, truth = [], {}
        for k in range(n_tubes):
            label = f"{prefix}{k + 1:03d}"
            tube_kg1 = tt.params["kg1"] * float(np.exp(0.08 * rng.standard_normal()))
            for s in sections:
                p = dict(tt.params)
                p["kg1"] = tube_kg1 * float(np.exp(0.01 * rng.standard_normal()))
                if kg1_scale is not None:
                    p["kg1"] = tt.params["kg1"] * kg1_scale.get((label, s), kg1_scale.get(label, 1.0))
                truth[(label, s)] = p
                units.append(synth(tt, params=p, noise=0.01, seed=int(rng.integers(1 << 30)), tube=label, section=s,
                                   va_step=va_step, grid_voltages=tuple(np.arange(0.0, -24.01, -grid_step))))
        path = write_long(tmp_path / name, units)
        return path, truth

    return make
