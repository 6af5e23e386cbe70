"""Benchmark of the stock ledger against working from files (prints figures, asserts nothing).

Run from the repository root::

    python bench/ledger.py            # everything (a few minutes on a shared 2-core machine)
    python bench/ledger.py --quick    # 200 units for the import, 2,000 tubes for list and match

Side by side, in one run (the goals are issue 9, section 7):

1. **Import**: 1,000 invented medium-mu units (500 dual-triode bottles, about 265 points per unit,
   2 % tracer glitches, made by ``curves/make_demo.py``'s generator with its own seed, as
   ``bench/fit.py`` does) written to one CSV file; wall time of ``platebook fit FILE --json``
   against ``platebook stock import FILE`` into a new SQLite ledger (goal <= 1.3 x) and into a new
   PostgreSQL database (goal <= 1.5 x).  Each is a fresh process, start-up included; the best of
   ``--repeat`` runs is shown.
2. **List**: a ledger of 10,000 single-triode tubes (one measurement and fit each, graded), and
   ``fitter.service.stock.list_tubes`` of all of them with their latest figures and grades, in
   this process (goal <= 0.2 s), on SQLite and PostgreSQL.
3. **Match**: the in-stock tubes of that type matched into pairs straight from the ledger
   (``fitter.service.stock.match``) against the same units read from a ``platebook fit --json``
   file and matched (``fitter.card.load_fits`` + ``fitter.match.match_units``, what
   ``platebook match`` does), in this process (goal <= 1.5 x).
4. **Concurrency**: 20 ``platebook stock import`` processes started at once into one ledger
   (20 small files of 2 bottles each), wall time and the retries they needed, per database.

PostgreSQL: a throwaway cluster is started as in the tests (``tests/ledger/conftest.py``)
unless ``--pg URL`` names a server database to use (it must be empty: the bench creates its
own databases there only when it started the cluster).  The load average and the sha1 of the
ledger's code are printed so runs can be compared.
"""

from __future__ import annotations

import argparse
import hashlib
import importlib.util
import json
import math
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from fitter.card import card_dict, load_fits  # noqa: E402
from fitter.match import Criterion, FixedBias, match_units  # noqa: E402
from fitter.triode import FittedTriode  # noqa: E402

SEED = 90210
OUTLIER_FRACTION = 0.02


def _load(path, name):
    spec = importlib.util.spec_from_file_location(name, path)
    mod = importlib.util.module_from_spec(spec)
    sys.modules[name] = mod
    spec.loader.exec_module(mod)
    return mod


def _sha1_of_code():
    h = hashlib.sha1()
    for p in sorted((ROOT / "fitter" / "ledger").rglob("*.py")) + [ROOT / "fitter" / "service" / "stock.py",
                                                                    ROOT / "fitter" / "bottles.py"]:
        h.update(p.read_bytes())
    return h.hexdigest()[:12]


# -- data ------------------------------------------------------------------------


def write_stock(path, n_units, seed=SEED, prefix="MB"):
    """n_units medium-mu sections (dual bottles) from the demo generator, as a long CSV."""
    gen = _load(ROOT / "curves" / "make_demo.py", "platebook_make_demo")
    rng = np.random.default_rng(seed)
    tt = gen.TUBE_TYPES["medium_mu"]
    rows = ["# INVENTED bench data (bench/ledger.py, curves/make_demo.py generator)", "tube,section,va,vg,ia_ma"]
    n = 0
    number = 0
    while n < n_units:
        number += 1
        for section, params in zip(tt.sections, gen.draw_params(rng, tt)):
            t = gen.trace(rng, tt, params, n_bad=0)
            ia, _ = gen.add_glitches(rng, t["ia"], t["ia_true"], int(round(OUTLIER_FRACTION * t["ia"].size)))
            ia = np.maximum(np.round(ia / tt.resolution) * tt.resolution, 0.0)
            tube = f"{prefix}{number:05d}"
            rows.extend(f"{tube},{section},{a:.4g},{g:.4g},{1e3 * i:.6g}" for a, g, i in zip(t["va"], t["vg"], ia))
            n += 1
    Path(path).write_text("\n".join(rows) + "\n")
    return n, len(rows) - 2


BASE = dict(mu=21.5, ex=1.3, kg1=1180.0, kp=84.0, kvb=300.0)  # Koren's 12AU7 set, from memory
RANGE = {"va": (0.0, 400.0), "vg": (-20.0, 0.0), "ia": (0.0, 30e-3)}
POSITION = (250.0, -8.5)


def synthetic_units(n, seed=1):
    """n single-triode Koren units with a spread (as bench/match.py), with a covariance."""
    r = np.random.default_rng(seed)
    sd = dict(mu=0.04, ex=0.02, kg1=0.10, kp=0.05)
    out = []
    for k in range(n):
        p = dict(BASE)
        for name, s in sd.items():
            p[name] = BASE[name] * math.exp(r.normal(0, s))
        cov = np.diag([(0.002 * p[x]) ** 2 for x in ("mu", "ex", "kg1", "kp", "kvb")])
        out.append(FittedTriode("koren", p, ("mu", "ex", "kg1", "kp", "kvb"), cov, tube=f"S{k:05d}",
                                valid_range=RANGE))
    return out


def fill_ledger(ledger, units, who="bench"):
    """Store units as tubes of type SG (one measurement, one fit each), directly, in one go."""
    from fitter.ledger.schema import Fit, Measurement, Section, SourceFile, Tube, TubeType, now, pack_points

    va, vg = POSITION

    def run(s):
        t = TubeType(designation="SG", dual=False, test_va=va, test_vg=vg, nominal_ia=None, nominal_gm=None,
                     nominal_basis=None, pa_max=None, vhk_max=None, notes="", created_at=now(), created_by=who)
        src = SourceFile(name="bench", sha256=hashlib.sha256(b"bench%d" % len(units)).hexdigest(), size=0,
                         content=b"", imported_at=now(), imported_by=who)
        s.add_all([t, src])
        s.flush()
        tubes = [Tube(label=u.tube, type_id=t.id, status="in-stock", location="", notes="", created_at=now())
                 for u in units]
        s.add_all(tubes)
        s.flush()
        secs = [Section(tube_id=x.id, name="") for x in tubes]
        s.add_all(secs)
        s.flush()
        blob = pack_points(np.array([va]), np.array([vg]), np.array([1e-3]), None, np.array([2]))
        meas = [Measurement(section_id=x.id, source_id=src.id, n_points=1, points=blob, has_grid_current=False,
                            retest=False, measured_at=now(), measured_by=who, instrument="", notes="",
                            superseded=False) for x in secs]
        s.add_all(meas)
        s.flush()
        fits = []
        for u, m in zip(units, meas):
            c = card_dict(u)
            fits.append(Fit(measurement_id=m.id, model="koren", converged=True, failure=None, params=c["params"],
                            stderr=c["stderr"], free=c["free"], covariance=c["covariance"], figures={},
                            valid_range=c["valid_range"], envelope=None, ia_test=float(u.current(va, vg)),
                            gm_test=float(u.gradient(va, vg)[1]), engine_version="bench", fitted_at=now(),
                            fitted_by=who))
        s.add_all(fits)

    ledger.work(run)


def fit_file(path, units):
    """The units as 'platebook fit --json' would print them."""
    fits = []
    for u in units:
        c = card_dict(u)
        fits.append({k: c[k] for k in ("tube", "section", "model", "params", "stderr", "free", "covariance",
                                       "valid_range", "envelope")} | {"converged": True})
    Path(path).write_text(json.dumps({"fits": fits}))


# -- runs ------------------------------------------------------------------------


LAST_CPU = [0.0]


def timed(cmd, env=None):
    """Wall time of a command (its CPU time, children included, goes to LAST_CPU)."""
    import resource

    c0 = resource.getrusage(resource.RUSAGE_CHILDREN)
    t0 = time.perf_counter()
    r = subprocess.run(cmd, capture_output=True, text=True, env=env)
    wall = time.perf_counter() - t0
    c1 = resource.getrusage(resource.RUSAGE_CHILDREN)
    LAST_CPU[0] = c1.ru_utime + c1.ru_stime - c0.ru_utime - c0.ru_stime
    if r.returncode not in (0, 2):
        raise SystemExit(f"{' '.join(map(str, cmd))} failed ({r.returncode}): {r.stderr[-2000:]}")
    return wall, r.stdout


def platebook(*args):
    return [sys.executable, "-m", "fitter", *map(str, args)]


def bench_import(tmp, n_units, repeat, pg_url_factory):
    print(f"\n== 1. Import and fit {n_units} units vs 'platebook fit' on the same file")
    csv = tmp / "stock.csv"
    n, points = write_stock(csv, n_units)
    print(f"  {n} units, {points} points, {csv.stat().st_size / 1e6:.1f} MB")
    fit_t = fit_cpu = math.inf
    for _ in range(repeat):
        fit_t = min(fit_t, timed(platebook("fit", csv, "--json"))[0])
        fit_cpu = min(fit_cpu, LAST_CPU[0])
    print(f"  platebook fit --json           {fit_t:7.2f} s  (CPU {fit_cpu:.2f} s)")
    targets = [("SQLite", lambda k: str(tmp / f"imp{k}.sqlite"), 1.3)]
    if pg_url_factory:
        targets.append(("PostgreSQL", lambda k: pg_url_factory(), 1.5))
    out = {"fit": fit_t}
    for name, make, goal in targets:
        best = cpu = math.inf
        for k in range(repeat):
            db = make(k)
            timed(platebook("stock", "--db", db, "type", "MM", "--va", 250, "--vg", -8.5))
            wall, _ = timed(platebook("stock", "--db", db, "--user", "bench", "import", csv, "--type", "MM"))
            best, cpu = min(best, wall), min(cpu, LAST_CPU[0])
        ratio = best / fit_t
        print(f"  platebook stock import, {name:<10}{best:7.2f} s  = {ratio:.2f} x fit  (goal <= {goal} x: "
              f"{'met' if ratio <= goal else 'MISSED'}); CPU {cpu:.2f} s = {cpu / fit_cpu:.2f} x")
        out[name] = best
    return out


def bench_list_and_match(tmp, n_tubes, dbs):
    from fitter.ledger.db import open_ledger
    from fitter.service import stock as svc

    print(f"\n== 2./3. A ledger of {n_tubes} tubes: list all, and match the type's in-stock tubes")
    units = synthetic_units(n_tubes)
    fits_path = tmp / "fits.json"
    fit_file(fits_path, units)
    crit = Criterion(5.0)
    file_t = file_cpu = math.inf
    for _ in range(2):
        t0, c0 = time.perf_counter(), time.process_time()
        loaded, _ = load_fits(fits_path)
        res_file = match_units(loaded, FixedBias(*POSITION), criterion=crit)
        file_t, file_cpu = min(file_t, time.perf_counter() - t0), min(file_cpu, time.process_time() - c0)
    print(f"  from a fit file: load_fits + match_units      {file_t:7.3f} s, CPU {file_cpu:.3f} s "
          f"({len(res_file.groups)} pairs)")
    for name, db in dbs:
        led = open_ledger(db)
        t0 = time.perf_counter()
        fill_ledger(led, units)
        fill_t = time.perf_counter() - t0
        led.close()
        svc.grade(db, "bench", "SG")
        best = cpu = math.inf
        for _ in range(5):
            t0, c0 = time.perf_counter(), time.process_time()
            listed = svc.list_tubes(db, limit=n_tubes)
            best, cpu = min(best, time.perf_counter() - t0), min(cpu, time.process_time() - c0)
        assert listed.data["total"] == n_tubes and listed.data["tubes"][0]["grade"]
        print(f"  {name}: filled in {fill_t:.1f} s; list {n_tubes} tubes with figures and grades "
              f"{best:7.3f} s, CPU {cpu:.3f} s (goal <= 0.2 s: {'met' if best <= 0.2 else 'MISSED'})")
        best_m = cpu_m = math.inf
        for _ in range(2):
            t0, c0 = time.perf_counter(), time.process_time()
            res = svc.match(db, "bench", "SG", group="pairs", tolerance_pct=5.0, include_weak=True)
            best_m, cpu_m = min(best_m, time.perf_counter() - t0), min(cpu_m, time.process_time() - c0)
        ratio = best_m / file_t
        same = len(res.data["groups"]) == len(res_file.groups)
        print(f"  {name}: match from the ledger {best_m:7.3f} s = {ratio:.2f} x the fit file (goal <= 1.5 x: "
              f"{'met' if ratio <= 1.5 else 'MISSED'}); CPU {cpu_m:.3f} s = {cpu_m / file_cpu:.2f} x; "
              f"{len(res.data['groups'])} pairs"
              f"{'' if same else ' (DIFFERENT from the file)'}")


def bench_concurrency(tmp, dbs):
    print("\n== 4. 20 'platebook stock import' processes at once into one ledger")
    files = []
    for k in range(20):
        p = tmp / f"c{k:02d}.csv"
        write_stock(p, 4, seed=1000 + k, prefix=f"C{k:02d}-")
        files.append(p)
    for name, db in dbs:
        timed(platebook("stock", "--db", db, "type", "CC", "--va", 250, "--vg", -8.5))
        t0 = time.perf_counter()
        procs = [subprocess.Popen(platebook("stock", "--db", db, "--user", f"c{k}", "import", f, "--type", "CC",
                                            "--json", "--jobs", 1), stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                                  text=True) for k, f in enumerate(files)]
        outs = [p.communicate() + (p.returncode,) for p in procs]
        wall = time.perf_counter() - t0
        bad = [o for o in outs if o[2] != 0]
        retries = sum(json.loads(o[0])["retries"] for o in outs if o[2] == 0)
        locked = sum("locked" in (o[0] + o[1]).lower() or "serializ" in (o[0] + o[1]).lower() for o in outs)
        print(f"  {name}: {wall:.1f} s for 20 processes (start-up included), {retries} retries in all, "
              f"{len(bad)} failed, {locked} with a lock or serialisation message")


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--quick", action="store_true")
    ap.add_argument("--repeat", type=int, default=1, help="runs of each import (best shown)")
    ap.add_argument("--pg", default=None, help="PostgreSQL URL of an empty database (default: a throwaway cluster)")
    ap.add_argument("--no-pg", action="store_true", help="SQLite only")
    args = ap.parse_args(argv)
    print(f"load average {os.getloadavg()}; ledger code sha1 {_sha1_of_code()}; {os.cpu_count()} cores")
    cluster = None
    pg_factory = None
    if args.pg:
        pg_factory = lambda: args.pg  # noqa: E731
    elif not args.no_pg:
        conf = _load(ROOT / "tests" / "ledger" / "conftest.py", "platebook_ledger_conftest")
        bindir = conf.pg_bindir()
        if bindir:
            cluster = conf.PgCluster(bindir)
            cluster.start()
            pg_factory = cluster.create_db
        else:
            print("PostgreSQL binaries not found: SQLite only")
    try:
        with tempfile.TemporaryDirectory(prefix="platebook-bench-") as d:
            tmp = Path(d)
            bench_import(tmp, 200 if args.quick else 1000, args.repeat, pg_factory)
            dbs = [("SQLite", str(tmp / "big.sqlite"))] + ([("PostgreSQL", pg_factory())] if pg_factory else [])
            for _, db in dbs:
                from fitter.service import stock as svc

                svc.init(db)
            bench_list_and_match(tmp, 2000 if args.quick else 10_000, dbs)
            cdbs = [("SQLite", str(tmp / "conc.sqlite"))] + ([("PostgreSQL", pg_factory())] if pg_factory else [])
            bench_concurrency(tmp, cdbs)
    finally:
        if cluster is not None:
            cluster.stop()
    print(f"\nload average at the end {os.getloadavg()}")


if __name__ == "__main__":
    main()
