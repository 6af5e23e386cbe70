"""Benchmark of the web front end's pages (prints figures, asserts nothing).

Run from the repository root::

    python bench/web.py                 # a ledger of 10,000 tubes
    python bench/web.py --tubes 2000

A SQLite ledger in a temporary folder is filled with N invented single-triode tubes (one
measurement and fit each, straight into the tables as ``bench/ledger.py`` does, then graded)
and one real re-tested bottle (``curves/retest_medium_mu.csv``, fitted on import).  Through
Flask's test client, signed in (server time only: no network, no browser):

1. the stock page (50 tubes a page, counts and filters over the whole ledger), best of 5;
   the same sorted by Ia (every tube's figures read and sorted), best of 3 (goal of issue 10:
   <= 150 ms for the stock page of a 10,000-tube ledger);
2. a tube page with its two fit plots (SVG), the first view (plots drawn) and a second (plots
   from the cache) (goal <= 300 ms with plots, cached after the first view);
3. uploading N units (default 1,000, a long-layout CSV from ``bench/ledger.py``'s generator)
   through ``POST /api/v1/measurements`` with an editor's Bearer token until all are fitted and
   stored, on a fresh SQLite ledger, beside ``platebook fit --json`` on the same file (a whole
   process) and the ratio (goal of issue 10: <= 1.5 x). The upload goes through Flask's test
   client in this process (no network, no process start; the fit runs as in a served app).

    python bench/web.py --upload-only --upload-units 1000
"""

from __future__ import annotations

import argparse
import os
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--tubes", type=int, default=10_000)
    ap.add_argument("--upload-units", type=int, default=1000)
    ap.add_argument("--upload-only", action="store_true", help="only the upload through the API (3.)")
    a = ap.parse_args(argv)
    import importlib.util

    spec = importlib.util.spec_from_file_location("bench_ledger", ROOT / "bench" / "ledger.py")
    bl = importlib.util.module_from_spec(spec)
    sys.modules["bench_ledger"] = bl
    spec.loader.exec_module(bl)
    print(f"load average {os.getloadavg()[0]:.2f}")
    if not a.upload_only:
        pages(a, bl)
    upload(a.upload_units, bl)


def pages(a, bl):
    import re

    from fitter.ledger.db import open_ledger
    from fitter.service import accounts, stock
    from web import create_app

    with tempfile.TemporaryDirectory(prefix="platebook-bench-web-") as tmp:
        db = str(Path(tmp, "ledger.sqlite"))
        stock.init(db)
        t0 = time.perf_counter()
        led = open_ledger(db)
        bl.fill_ledger(led, bl.synthetic_units(a.tubes))
        led.close()
        stock.grade(db, "bench", "SG")
        stock.add_type(db, "bench", "MM", 250, -8.5)
        stock.import_files(db, "bench", [str(ROOT / "curves" / "retest_medium_mu.csv")], "MM")
        accounts.add_account(db, "bench", "viewer", "bench password")
        print(f"ledger of {a.tubes} tubes (+1 real bottle) made in {time.perf_counter() - t0:.1f} s")
        app = create_app({"LEDGER": db})
        c = app.test_client()
        page = c.get("/signin").get_data(as_text=True)
        tok = re.search(r'name="csrf_token" value="([^"]+)"', page).group(1)
        assert c.post("/signin", data={"name": "bench", "password": "bench password", "csrf_token": tok}).status_code == 302

        def best(path, n):
            ts = []
            for _ in range(n):
                t = time.perf_counter()
                r = c.get(path)
                ts.append(time.perf_counter() - t)
                assert r.status_code == 200, (path, r.status_code)
            return min(ts)

        t = best("/stock", 5)
        print(f"stock page, 50 of {a.tubes + 1} tubes:            {1e3 * t:7.1f} ms "
              f"(goal <= 150 ms: {'met' if t <= 0.150 else 'MISSED'})")
        t = best("/stock?sort=ia&desc=1", 3)
        print(f"stock page sorted by Ia (all figures read):  {1e3 * t:7.1f} ms")
        html = c.get("/tube/MM-03").get_data(as_text=True)
        plots = re.findall(r'src="(/unit/\d+/plot\.svg)"', html)
        t = time.perf_counter()
        c.get("/tube/MM-03")
        for p in plots:
            c.get(p)
        first = time.perf_counter() - t
        t = time.perf_counter()
        c.get("/tube/MM-03")
        for p in plots:
            c.get(p)
        second = time.perf_counter() - t
        print(f"tube page with {len(plots)} fit plots, first view:     {1e3 * first:7.1f} ms")
        print(f"tube page with {len(plots)} fit plots, cached:         {1e3 * second:7.1f} ms "
              f"(goal <= 300 ms: {'met' if second <= 0.300 else 'MISSED'})")


def upload(n_units, bl):
    import io

    from fitter.service import accounts, stock
    from web import create_app

    print(f"\nupload of {n_units} units through POST /api/v1/measurements vs 'platebook fit --json'")
    with tempfile.TemporaryDirectory(prefix="platebook-bench-upload-") as tmp:
        csv = Path(tmp, "stock.csv")
        n, points = bl.write_stock(csv, n_units)
        print(f"  {n} units, {points} points, {csv.stat().st_size / 1e6:.1f} MB")
        fit_t, out = bl.timed(bl.platebook("fit", csv, "--json"))
        fitted = len(__import__("json").loads(out)["fits"])
        db = str(Path(tmp, "ledger.sqlite"))
        stock.init(db)
        stock.add_type(db, "bench", "MM", 250, -8.5)
        accounts.add_account(db, "bench", "editor", "bench password")
        token = accounts.new_token(db, "bench").data["token"]
        c = create_app({"LEDGER": db}).test_client()
        body = csv.read_bytes()
        t = time.perf_counter()
        r = c.post("/api/v1/measurements", data={"type": "MM", "file": [(io.BytesIO(body), "stock.csv")]},
                   headers={"Authorization": f"Bearer {token}"}, content_type="multipart/form-data")
        up_t = time.perf_counter() - t
        assert r.status_code == 201, r.get_data(as_text=True)[:500]
        stored = len(r.get_json()["units"])
        ratio = up_t / fit_t
        print(f"  platebook fit --json ({fitted} fits)      {fit_t:7.2f} s")
        print(f"  upload through the API ({stored} stored)  {up_t:7.2f} s  = {ratio:.2f} x fit "
              f"(goal <= 1.5 x: {'met' if ratio <= 1.5 else 'MISSED'})")


if __name__ == "__main__":
    main()
