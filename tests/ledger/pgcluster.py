"""A throwaway PostgreSQL cluster for the ledger's tests and benchmark (no pytest needed).

``initdb`` and ``pg_ctl`` from the Debian package, run as an unprivileged user (``nobody``
when running as root, since the server refuses to run as root; else the current user), in a
temporary folder, listening only on a unix socket in that folder.  A detached watchdog stops
the server and removes the folder if the process that started it dies without cleaning up.
"""

from __future__ import annotations

import glob
import itertools
import os
import shutil
import subprocess
import tempfile
from pathlib import Path

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
