"""Benchmark of the fitting engine: robustness against a plain fit, and speed.

Prints figures; asserts nothing.  Run from the repository root::

    python bench/fit.py            # full run (a few minutes on a shared 2-core machine)
    python bench/fit.py --quick    # smaller run (well under a minute)
    python bench/fit.py --profile  # also print where the time of one Koren fit goes

What it does
------------
Stock is generated in memory with the demo stock's generator (``curves/make_demo.py``:
Koren type centres from memory of Koren's published table, manufacturing spread, the
tracer's limits, 1 % relative noise plus an absolute floor) but with another seed.
Three tube types: high-mu dual (12AX7-like), medium-mu dual (12AU7-like) and power
triode (300B-like), about 250-300 points per unit.  Every unit is fitted twice:

* **clean**: noise only;
* **2 % outliers**: the same readings with 2 % of them replaced by tracer glitches
  (the true current times 1.4..2.5 or 0.05..0.5).

Each of those is fitted by the engine (``fitter.fit.fit_curves``, Koren model,
defaults) and, side by side, by a plain ``scipy.optimize.curve_fit`` of the same Koren
function (``fitter.models.koren_current``) from a generic start (mu 50, ex 1.5,
kg1 1000, kp 300, kvb 300), unweighted, unbounded, default Levenberg-Marquardt.

Noise floor (the criterion)
---------------------------
The generator knows the true noiseless current I_true and the one-sigma noise of each
reading, sigma = sqrt((0.01 I_true)^2 + floor^2) (floor: 2 uA high-mu, 5 uA medium-mu,
50 uA power).  For a fit with currents I_fit we take, over the inlier points (every
point that is not a glitch),

    D = rms( (I_fit - I_true) / sigma ).

D is the model's error against the truth in units of the noise of one reading.  A
least-squares fit that found the right minimum has D of about sqrt(p/n) (0.15 for
5 parameters and 270 points) whatever the weighting; a fit dragged by an outlier or
stuck in a wrong minimum has D of several.  **A fit reaches the noise floor when
D <= 1**: its curves are at least as close to the truth as a single reading is.
Fits that fail (the engine reports ``converged=False``, or ``curve_fit`` raises) do
not reach it.  The distribution of D (median, 90th percentile) is printed too, so
the margin can be seen.

Speed
-----
* ms per fit: each engine fit timed alone around ``fit_curves`` (which includes
  cleaning, the guess, the robust fit, outlier listing and the final least-squares
  step that gives the covariance, i.e. the uncertainties), in this one process, with
  BLAS threads pinned to 1 (single core).  Median and 90th percentile, both as wall
  clock (``time.perf_counter``) and as this process's CPU time
  (``time.process_time``), which a busy machine disturbs less.
* wall time for 1,000 units: ``fitter.fit.fit_many`` on 1,000 generated units
  (2 % outliers) with 2 processes; includes starting the pool and returning results.
  The CPU time of all processes is printed beside it: wall / CPU shows how much of
  the two cores the run actually got.  ``--quick`` times 200 units and also shows the
  figure scaled to 1,000.

Whole processes (``--process``)
-------------------------------
Goal (issue 8, section 8): a whole ``platebook fit FILE --model koren --json`` process on
1,000 units takes <= 0.8 x the wall time of a whole-process plain script doing the same
job without robustness (pandas ``read_csv``, ``scipy.optimize.curve_fit`` of the Koren
equation per unit from the generic start, JSON on stdout; written out by this bench).
The bench writes the 1,000 generated units (2 % outliers) to one long-layout CSV, runs
the two processes alternately ``--repeat`` times, and prints each wall time, the
medians and their ratio, then how many units each reached the noise floor on (from the
parameters in their JSON), and where the platebook process spends its time (start-up,
reading, fitting, JSON), timed in this process.

The machine is shared: the load average is printed at the start and at the end,
and the sha1 of ``fitter/fit.py`` and ``fitter/models.py`` ties the figures to a
version of the engine.
"""

from __future__ import annotations

import os

# single-threaded numerics: "one core" must mean one core (set before numpy loads)
for _var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")

import argparse  # noqa: E402
import cProfile  # noqa: E402
import importlib.util  # noqa: E402
import hashlib  # noqa: E402
import io  # noqa: E402
import platform  # noqa: E402
import pstats  # noqa: E402
import resource  # noqa: E402
import sys  # noqa: E402
import time  # noqa: E402
import warnings  # noqa: E402
from pathlib import Path  # noqa: E402

import numpy as np  # noqa: E402
import scipy  # noqa: E402
from scipy.optimize import OptimizeWarning, curve_fit  # noqa: E402

import fitter  # noqa: E402
from fitter.fit import fit_curves, fit_many  # noqa: E402
from fitter.models import koren_current  # noqa: E402
from fitter.reader import CurveSet  # noqa: E402

ROOT = Path(__file__).resolve().parents[1]
SEED = 4242  # not the demo stock's seed
TYPES = ("high_mu", "medium_mu", "power")
GENERIC_START = dict(mu=50.0, ex=1.5, kg1=1000.0, kp=300.0, kvb=300.0)
OUTLIER_FRACTION = 0.02
NOISE_FLOOR_D = 1.0


def _load_generator():
    """The demo stock's generator, ``curves/make_demo.py`` (not a package module)."""
    path = ROOT / "curves" / "make_demo.py"
    spec = importlib.util.spec_from_file_location("platebook_make_demo", path)
    mod = importlib.util.module_from_spec(spec)
    sys.modules[spec.name] = mod
    spec.loader.exec_module(mod)
    return mod


gen = _load_generator()


# ---------------------------------------------------------------------------
# Stock
# ---------------------------------------------------------------------------


def make_stock(rng, n_per_type):
    """Generated units: dicts with the truth, the noise sigma and two variants of readings."""
    units = []
    for key in TYPES:
        tt = gen.TUBE_TYPES[key]
        names = tt.sections or (None,)
        n_tubes = -(-n_per_type // len(names))
        made = []
        for number in range(1, n_tubes + 1):
            for section, params in zip(names, gen.draw_params(rng, tt)):
                t = gen.trace(rng, tt, params, n_bad=0)
                n_bad = int(round(OUTLIER_FRACTION * t["ia"].size))
                ia_out, bad = gen.add_glitches(rng, t["ia"], t["ia_true"], n_bad)
                ia_out = np.maximum(np.round(ia_out / tt.resolution) * tt.resolution, 0.0)
                made.append(dict(
                    type=key, tube=f"{tt.prefix}-B{number:04d}", section=section, params=params,
                    va=t["va"], vg=t["vg"], ia_true=t["ia_true"],
                    sigma=gen.noise_sigma(tt, t["ia_true"]),
                    variants={"clean": (t["ia"], np.zeros(t["ia"].size, bool)),
                              "2% outliers": (ia_out, bad)},
                ))
        units.extend(made[:n_per_type])
    return units


def curve_set(u, variant):
    ia, _ = u["variants"][variant]
    return CurveSet(tube=u["tube"], section=u["section"], va=u["va"], vg=u["vg"], ia=ia,
                    source="<bench>")


def deviation(u, variant, params):
    """D = rms((I_fit - I_true) / sigma) over the inlier points (see module docstring)."""
    _, bad = u["variants"][variant]
    good = ~bad
    i_fit = koren_current(u["va"][good], u["vg"][good], **params)
    d = (i_fit - u["ia_true"][good]) / u["sigma"][good]
    return float(np.sqrt(np.mean(d * d)))


# ---------------------------------------------------------------------------
# The two fitters
# ---------------------------------------------------------------------------


def engine_fit(u, variant):
    cs = curve_set(u, variant)
    t0, c0 = time.perf_counter(), time.process_time()
    res = fit_curves(cs, "koren")
    ms, cpu = 1e3 * (time.perf_counter() - t0), 1e3 * (time.process_time() - c0)
    if not res.converged:
        return dict(ok=False, D=np.inf, ms=ms, cpu=cpu, why=f"reported failed: {res.failure}")
    return dict(ok=True, D=deviation(u, variant, res.params), ms=ms, cpu=cpu, why=None)


def _koren_xy(x, mu, ex, kg1, kp, kvb):
    return koren_current(x[0], x[1], mu, ex, kg1, kp, kvb)


def plain_fit(u, variant):
    ia, _ = u["variants"][variant]
    x = np.vstack([u["va"], u["vg"]])
    p0 = [GENERIC_START[k] for k in ("mu", "ex", "kg1", "kp", "kvb")]
    t0, c0 = time.perf_counter(), time.process_time()
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", OptimizeWarning)
            warnings.simplefilter("ignore", RuntimeWarning)
            popt, _ = curve_fit(_koren_xy, x, ia, p0=p0)
    except (RuntimeError, ValueError) as e:
        return dict(ok=False, D=np.inf, ms=1e3 * (time.perf_counter() - t0),
                    cpu=1e3 * (time.process_time() - c0),
                    why=f"raised: {str(e).splitlines()[0][:60]}")
    ms, cpu = 1e3 * (time.perf_counter() - t0), 1e3 * (time.process_time() - c0)
    params = dict(zip(("mu", "ex", "kg1", "kp", "kvb"), map(float, popt)))
    if not all(np.isfinite(v) for v in params.values()):
        return dict(ok=False, D=np.inf, ms=ms, cpu=cpu, why="non-finite parameters")
    D = deviation(u, variant, params)
    why = None
    negative = [k for k, v in params.items() if v < 0]
    if negative and D > NOISE_FLOOR_D:
        # curve_fit reports these as converged; a physical Koren set has all of them > 0
        why = "returned negative " + "/".join(negative)
    return dict(ok=True, D=D, ms=ms, cpu=cpu, why=why, params=params)


# ---------------------------------------------------------------------------
# Report
# ---------------------------------------------------------------------------


def _pct(x, q):
    x = np.asarray(x, float)
    return float(np.percentile(x, q)) if x.size else float("nan")


def _fmt_d(x):
    return "inf" if not np.isfinite(x) else f"{x:.2f}"


VARIANTS = ("clean", "2% outliers")
FITTERS = (("engine (fit_curves)", engine_fit), ("plain curve_fit", plain_fit))


def robustness(units):
    """Fit every unit and variant with both fitters; print the noise-floor table."""
    rows = {}
    for variant in VARIANTS:
        for name, fn in FITTERS:
            for u in units:
                r = fn(u, variant)
                r["type"] = u["type"]
                r["label"] = f"{u['tube']}:{u['section']}" if u["section"] else u["tube"]
                rows.setdefault((variant, name), []).append(r)
    print("\n== Noise floor: fraction of fits with D <= 1 "
          "(D = rms((I_fit - I_true)/sigma) on inlier points)")
    print(f"{'type':<10} {'data':<12} {'fitter':<20} {'at floor':>9} {'D median':>9} "
          f"{'D p90':>7} {'failed':>7}")
    for key in TYPES + ("ALL",):
        for variant in VARIANTS:
            for name, _ in FITTERS:
                res = [r for r in rows[(variant, name)] if key == "ALL" or r["type"] == key]
                D = np.array([r["D"] for r in res])
                failed = sum(not r["ok"] for r in res)
                at = 100 * np.mean(D <= NOISE_FLOOR_D)
                print(f"{key:<10} {variant:<12} {name:<20} {at:8.1f}% "
                      f"{_fmt_d(np.median(D)):>9} {_fmt_d(_pct(D, 90)):>7} {failed:>7}")
    return rows


def misses(rows, limit=8):
    """Why fits missed the floor."""
    print("\n== Fits that missed the floor")
    for variant in VARIANTS:
        for name, _ in FITTERS:
            res = rows[(variant, name)]
            bad = [r for r in res if r["D"] > NOISE_FLOOR_D]
            kinds = {}
            for r in bad:
                kind = r["why"].split(":")[0] if r["why"] else "converged away from the truth"
                kind = "returned negative parameters" if kind.startswith("returned neg") else kind
                kinds[kind] = kinds.get(kind, 0) + 1
            summary = "; ".join(f"{n} {k}" for k, n in sorted(kinds.items(), key=lambda x: -x[1]))
            print(f"  {name}, {variant}: {len(bad)} of {len(res)} missed"
                  + (f" ({summary})" if summary else ""))
            if name.startswith("engine"):
                for r in bad[:limit]:
                    print(f"      {r['label']} ({r['type']}): D {_fmt_d(r['D'])} {r['why'] or ''}")


def speed(units, rows):
    """Per-fit timings of the engine (one core) and of the plain fit."""
    n_pts = np.array([u["va"].size for u in units])
    print("\n== Speed, one core (BLAS threads 1): engine fit_curves, Koren, with uncertainties")
    print(f"  points per unit: median {np.median(n_pts):.0f} (range {n_pts.min()}..{n_pts.max()})")
    eng = [r for v in VARIANTS for r in rows[(v, FITTERS[0][0])]]
    t = np.array([r["ms"] for r in eng])
    c = np.array([r["cpu"] for r in eng])
    print(f"  all {t.size} fits: median {np.median(t):.2f} ms, "
          f"90th percentile {_pct(t, 90):.2f} ms, "
          f"mean {t.mean():.2f} ms (wall clock)")
    print(f"  {'':{len(str(t.size)) + 10}} median {np.median(c):.2f} ms, 90th percentile "
          f"{_pct(c, 90):.2f} ms (CPU time of this process: less sensitive to a busy machine)")
    for variant in VARIANTS:
        tv = np.array([r["ms"] for r in rows[(variant, FITTERS[0][0])]])
        print(f"    {variant:<12} median {np.median(tv):.2f} ms, p90 {_pct(tv, 90):.2f} ms")
    for key in TYPES:
        tk = np.array([r["ms"] for r in eng if r["type"] == key])
        print(f"    {key:<12} median {np.median(tk):.2f} ms, p90 {_pct(tk, 90):.2f} ms")
    pt = np.array([r["ms"] for v in VARIANTS for r in rows[(v, FITTERS[1][0])]])
    pc = np.array([r["cpu"] for v in VARIANTS for r in rows[(v, FITTERS[1][0])]])
    print(f"  plain curve_fit, for comparison: median {np.median(pt):.2f} ms, "
          f"p90 {_pct(pt, 90):.2f} ms (CPU median {np.median(pc):.2f} ms)")
    lean = []
    for u in units[: min(len(units), 60)]:
        cs = curve_set(u, "clean")
        t0 = time.perf_counter()
        fit_curves(cs, "koren", robust=False)
        lean.append(1e3 * (time.perf_counter() - t0))
    print(f"  engine with robust=False ({len(lean)} clean units): median {np.median(lean):.2f} ms")


def batch(rng, n_units, processes):
    """Wall time of fit_many over n_units generated units."""
    print(f"\n== Batch: fit_many, {n_units} units (2 % outliers), {processes} processes")
    per_type = -(-n_units // len(TYPES))
    units = make_stock(rng, per_type)[:n_units]
    sets = [curve_set(u, "2% outliers") for u in units]
    children0 = resource.getrusage(resource.RUSAGE_CHILDREN)
    self0 = time.process_time()
    t0 = time.perf_counter()
    out = fit_many(sets, models=("koren",), processes=processes)
    wall = time.perf_counter() - t0
    children1 = resource.getrusage(resource.RUSAGE_CHILDREN)
    cpu = (children1.ru_utime + children1.ru_stime - children0.ru_utime - children0.ru_stime
           + time.process_time() - self0)
    ok = sum(r[0].converged for r in out)
    print(f"  wall time {wall:.2f} s for {n_units} units ({ok} converged), "
          f"{1e3 * wall / n_units:.2f} ms per unit")
    print(f"  CPU time of all processes {cpu:.2f} s ({1e3 * cpu / n_units:.2f} ms per unit); "
          f"cores kept busy on average: {cpu / wall:.2f}")
    if n_units != 1000:
        print(f"  scaled to 1,000 units: {wall * 1000 / n_units:.2f} s")
    return wall


def profile(units, n=40):
    print(f"\n== Profile: {n} engine fits (cProfile, cumulative time, top 25)")
    sets = [curve_set(u, "2% outliers") for u in units[:n]]
    pr = cProfile.Profile()
    pr.enable()
    for cs in sets:
        fit_curves(cs, "koren")
    pr.disable()
    s = io.StringIO()
    st = pstats.Stats(pr, stream=s)
    st.sort_stats("cumulative").print_stats(25)
    print(s.getvalue())
    s = io.StringIO()
    st = pstats.Stats(pr, stream=s)
    st.sort_stats("tottime").print_stats(20)
    print(s.getvalue())


PLAIN_SCRIPT = r'''"""Plain reference: read the CSV, curve_fit Koren per unit, print JSON."""
import json
import sys
import warnings

import numpy as np
import pandas as pd
from scipy.optimize import OptimizeWarning, curve_fit


def koren(x, mu, ex, kg1, kp, kvb):
    # N. Koren, Glass Audio 8(5), 1996: E1 = va/kp ln(1 + exp(kp (1/mu + vg/sqrt(kvb + va^2))))
    va, vg = x
    e1 = va / kp * np.logaddexp(0.0, kp * (1.0 / mu + vg / np.sqrt(kvb + va * va)))
    return np.where(e1 > 0, 2.0 * np.abs(e1) ** ex / kg1, 0.0)


df = pd.read_csv(sys.argv[1], comment="#", dtype={"section": str})
df["section"] = df["section"].fillna("")
fits = []
with warnings.catch_warnings():
    warnings.simplefilter("ignore")
    for (tube, section), g in df.groupby(["tube", "section"], sort=False):
        x = np.vstack([g["va"].to_numpy(float), g["vg"].to_numpy(float)])
        y = g["ia_ma"].to_numpy(float) * 1e-3
        try:
            p, cov = curve_fit(koren, x, y, p0=[50.0, 1.5, 1000.0, 300.0, 300.0])
            fits.append({"tube": tube, "section": section or None, "converged": True,
                         "params": dict(zip(("mu", "ex", "kg1", "kp", "kvb"), map(float, p))),
                         "stderr": [float(v) for v in np.sqrt(np.abs(np.diag(cov)))]})
        except (RuntimeError, ValueError) as e:
            fits.append({"tube": tube, "section": section or None, "converged": False,
                         "failure": str(e)})
print(json.dumps({"fits": fits}))
'''


def write_long_csv(path, units, variant="2% outliers"):
    """One long-layout CSV of generated units (currents at the tracer's resolution)."""
    with open(path, "w") as f:
        f.write("# INVENTED data generated by bench/fit.py (curves/make_demo.py's generator)\n")
        f.write("tube,section,va,vg,ia_ma\n")
        for u in units:
            ia, _ = u["variants"][variant]
            sec = u["section"] or ""
            f.write("".join(f"{u['tube']},{sec},{a!r},{g!r},{1e3 * i:.6g}\n"
                            for a, g, i in zip(u["va"].tolist(), u["vg"].tolist(), ia.tolist())))


def _floor_count(units, doc, variant="2% outliers"):
    by = {(u["tube"], u["section"]): u for u in units}
    at, failed = 0, 0
    for f in doc["fits"]:
        u = by[(f["tube"], f["section"])]
        if not f["converged"]:
            failed += 1
            continue
        at += deviation(u, variant, f["params"]) <= NOISE_FLOOR_D
    return at, failed


def whole_process(rng, n_units, repeat, jobs, compare_with=None):
    """platebook fit --json against the plain script, whole processes, side by side."""
    import json
    import statistics
    import subprocess
    import tempfile

    print(f"\n== Whole processes: platebook fit --model koren --json vs a plain curve_fit script, "
          f"{n_units} units (2 % outliers)")
    per_type = -(-n_units // len(TYPES))
    units = make_stock(rng, per_type)[:n_units]
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    with tempfile.TemporaryDirectory(prefix="platebook-process-") as tmp:
        tmp = Path(tmp)
        csv_path = tmp / "stock.csv"
        write_long_csv(csv_path, units)
        plain = tmp / "plain_fit.py"
        plain.write_text(PLAIN_SCRIPT)
        n_points = sum(u["va"].size for u in units)
        print(f"  file: {n_points} points, {csv_path.stat().st_size / 1e6:.1f} MB; "
              f"platebook with {jobs or 'all'} job(s); {repeat} alternating runs each")
        fit_args = ["-m", "fitter", "fit", str(csv_path), "--model", "koren", "--json"] + (
            [f"--jobs={jobs}"] if jobs else [])
        cmds = {
            "platebook fit": ([sys.executable, *fit_args], env),
            "plain curve_fit": ([sys.executable, str(plain), str(csv_path)], env),
        }
        if compare_with:
            ref = tmp / "ref"
            ref.mkdir()
            archive = subprocess.run(["git", "-C", str(ROOT), "archive", compare_with, "fitter"],
                                     check=True, capture_output=True).stdout
            subprocess.run(["tar", "-x", "-C", str(ref)], input=archive, check=True)
            cmds[f"rev {compare_with}"] = ([sys.executable, *fit_args], dict(env, PYTHONPATH=str(ref)))
        times = {k: [] for k in cmds}
        cpus = {k: [] for k in cmds}
        docs = {}
        for _ in range(repeat):
            for name, (cmd, cmd_env) in cmds.items():
                c0 = resource.getrusage(resource.RUSAGE_CHILDREN)
                t0 = time.perf_counter()
                p = subprocess.run(cmd, env=cmd_env, capture_output=True, text=True, cwd=tmp)
                times[name].append(time.perf_counter() - t0)
                c1 = resource.getrusage(resource.RUSAGE_CHILDREN)
                cpus[name].append(c1.ru_utime + c1.ru_stime - c0.ru_utime - c0.ru_stime)
                if p.returncode not in (0, 2):
                    raise SystemExit(f"{name} failed ({p.returncode}): {p.stderr[-500:]}")
                docs[name] = json.loads(p.stdout)
        for name, t in times.items():
            at, failed = _floor_count(units, docs[name])
            print(f"  {name:<16} wall " + " ".join(f"{x:.2f}" for x in t)
                  + f" s; median {statistics.median(t):.2f} s (CPU of its processes "
                  f"{statistics.median(cpus[name]):.2f} s);  noise floor reached on {at} of "
                  f"{n_units} units ({failed} reported failed)")
        for name in times:
            if name != "plain curve_fit":
                ratio = statistics.median(times[name]) / statistics.median(times["plain curve_fit"])
                print(f"  ratio {name} / plain: {ratio:.2f} (goal <= 0.8)")

        # where the platebook process's time goes, timed here (this process already has numpy)
        code = ("import time; t0 = time.perf_counter(); import fitter.cli, fitter.cli.fitcmd, fitter.fit, "
                "fitter.reader; print(time.perf_counter() - t0)")
        imp = statistics.median(float(subprocess.run([sys.executable, "-c", code], env=env, capture_output=True,
                                                     text=True, check=True).stdout) for _ in range(3))
        bare = statistics.median(_wall([sys.executable, "-c", "pass"], env) for _ in range(3))
        from fitter.reader import read_curves

        t0 = time.perf_counter()
        read = read_curves([csv_path])
        t_read = time.perf_counter() - t0
        t0 = time.perf_counter()
        res = fit_many(read.units, models=("koren",), processes=jobs)
        t_fit = time.perf_counter() - t0
        t0 = time.perf_counter()
        json.dumps({"fits": [r.to_dict() for rs in res for r in rs]}, allow_nan=False)
        t_json = time.perf_counter() - t0
        total = bare + imp + t_read + t_fit + t_json
        print(f"  platebook's parts (timed apart): interpreter {bare:.2f} s, imports {imp:.2f} s, "
              f"reading {t_read:.2f} s ({100 * t_read / total:.0f} %), fitting {t_fit:.2f} s, "
              f"JSON {t_json:.2f} s; sum {total:.2f} s")


def _wall(cmd, env):
    import subprocess

    t0 = time.perf_counter()
    subprocess.run(cmd, env=env, check=True)
    return time.perf_counter() - t0


def main(argv=None):
    ap = argparse.ArgumentParser(
        description="Benchmark Platebook's fitting engine (prints figures, asserts nothing).")
    ap.add_argument("--quick", action="store_true",
                    help="a smaller run (30 units per type, 200 in the batch)")
    ap.add_argument("--per-type", type=int, default=None, help="units per tube type (default 100)")
    ap.add_argument("--batch", type=int, default=None, help="units in the batch run (default 1000)")
    ap.add_argument("--processes", type=int, default=2, help="processes for the batch run")
    ap.add_argument("--profile", action="store_true", help="print a cProfile of engine fits")
    ap.add_argument("--process", action="store_true",
                    help="only the whole-process comparison: platebook fit --json vs a plain curve_fit script")
    ap.add_argument("--units", type=int, default=1000, help="units in the whole-process comparison")
    ap.add_argument("--repeat", type=int, default=3, help="alternating runs in the whole-process comparison")
    ap.add_argument("--jobs", type=int, default=None, help="platebook fit --jobs (default: all cores)")
    ap.add_argument("--compare-with", metavar="REV",
                    help="with --process, also time platebook fit of this git revision in the same run")
    args = ap.parse_args(argv)
    per_type = args.per_type or (30 if args.quick else 100)
    n_batch = args.batch or (200 if args.quick else 1000)

    print(f"Platebook {fitter.__version__} fit benchmark; python {platform.python_version()}, "
          f"numpy {np.__version__}, scipy {scipy.__version__}, {os.cpu_count()} cpu(s)")
    print(f"seed {SEED}; {per_type} units per type x {len(TYPES)} types "
          f"({', '.join(TYPES)}); each clean and with {100 * OUTLIER_FRACTION:.0f} % outliers")
    print("plain fit: scipy.optimize.curve_fit, unweighted, unbounded, from "
          + ", ".join(f"{k} {v:g}" for k, v in GENERIC_START.items()))
    digests = ", ".join(
        f"{name} {hashlib.sha1((ROOT / 'fitter' / name).read_bytes()).hexdigest()[:10]}"
        for name in ("fit.py", "models.py"))
    print(f"engine files (sha1): {digests}")
    print("load average at start: " + " ".join(f"{x:.2f}" for x in os.getloadavg())
          + " (the machine is shared; other work slows the timings)")
    rng = np.random.default_rng(SEED)
    if args.process:
        whole_process(rng, args.units, args.repeat, args.jobs, args.compare_with)
        print("\nload average at end: " + " ".join(f"{x:.2f}" for x in os.getloadavg()))
        return 0
    t0 = time.perf_counter()
    units = make_stock(rng, per_type)
    print(f"generated {len(units)} units in {time.perf_counter() - t0:.2f} s")

    rows = robustness(units)
    misses(rows)
    speed(units, rows)
    batch(rng, n_batch, args.processes)
    if args.profile:
        profile(units)
    print("\nload average at end: " + " ".join(f"{x:.2f}" for x in os.getloadavg()))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
