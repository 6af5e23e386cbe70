"""Benchmark of fit plots: prints figures, asserts nothing.

Goal (issue 8, section 8): <= 80 ms per unit for ``platebook fit --plot DIR``.  The demo
stock (curves/stock_*.csv: invented data, 44 units) is fitted once; then every unit's PNG
is written (``fitter.plotting.save_fit_plots``, as the CLI does) with 1 and with
``--processes`` processes, and the wall time per unit is printed.

``--compare-with REV`` also times another git revision (exported with ``git archive`` into
a temporary folder) in a separate process in the same run, writing the PNGs one after
another with its ``save_fit_plot`` (the only way before ``save_fit_plots``).  The load
average is printed at the start and the end: the machine is shared.

Run:  python bench/plot.py [--processes 2] [--repeat 3] [--compare-with REV] [--keep DIR]
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
STOCK = [ROOT / "curves" / f"stock_{name}.csv" for name in ("high_mu", "medium_mu", "power")]


def worker(out_dir: Path, processes: list[int], repeat: int) -> dict:
    """Fit the demo stock and time its plots (runs inside the tree under test)."""
    import fitter.plotting as P
    from fitter.fit import fit_many
    from fitter.reader import read_curves

    units = read_curves(STOCK).units
    best = [rs[0] for rs in fit_many(units, ("koren",), processes=2)]
    paths = [out_dir / f"{r.unit.label.replace(':', '_')}.png" for r in best]
    P.save_fit_plot(best[0], out_dir / "warm-up.png")  # first figure: font cache, imports
    out = {"units": len(best)}
    for n in processes:
        times, cpus = [], []
        for _ in range(repeat):
            c0 = resource.getrusage(resource.RUSAGE_CHILDREN)
            s0 = time.process_time()
            t0 = time.perf_counter()
            if hasattr(P, "save_fit_plots"):
                P.save_fit_plots(best, paths, processes=n)
            else:
                for r, p in zip(best, paths):
                    P.save_fit_plot(r, p)
            times.append(time.perf_counter() - t0)
            c1 = resource.getrusage(resource.RUSAGE_CHILDREN)
            cpus.append(c1.ru_utime + c1.ru_stime - c0.ru_utime - c0.ru_stime + time.process_time() - s0)
        out[str(n)] = statistics.median(times) / len(best)
        out["cpu" + str(n)] = statistics.median(cpus) / len(best)
        if not hasattr(P, "save_fit_plots"):
            break
    return out


def _run_worker(tree: Path, out_dir: Path, processes, repeat) -> dict:
    env = dict(os.environ, PYTHONPATH=str(tree))
    code = (f"import sys, json; sys.path.insert(0, {str(ROOT / 'bench')!r}); import plot; "
            f"print(json.dumps(plot.worker(__import__('pathlib').Path({str(out_dir)!r}), "
            f"{list(processes)!r}, {repeat})))")
    p = subprocess.run([sys.executable, "-c", code], env=env, capture_output=True, text=True, cwd=tree)
    if p.returncode:
        raise SystemExit(f"worker in {tree} failed: {p.stderr[-500:]}")
    return json.loads(p.stdout.strip().splitlines()[-1])


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--processes", type=int, default=2, help="processes for the parallel run")
    ap.add_argument("--repeat", type=int, default=3, help="repeats (median reported)")
    ap.add_argument("--compare-with", metavar="REV", help="also time this git revision")
    ap.add_argument("--keep", type=Path, help="write the PNGs here (to look at them)")
    args = ap.parse_args(argv)
    print("Platebook fit-plot benchmark: ms per unit (wall; CPU of all processes in brackets), "
          f"median of {args.repeat} runs over the demo stock")
    print("load average at start: " + " ".join(f"{x:.2f}" for x in os.getloadavg()))
    with tempfile.TemporaryDirectory(prefix="platebook-plot-") as tmp:
        tmp = Path(tmp)
        trees = {"this tree": ROOT}
        if args.compare_with:
            ref = tmp / "ref"
            ref.mkdir()
            archive = subprocess.run(["git", "-C", str(ROOT), "archive", args.compare_with, "fitter"],
                                     check=True, capture_output=True).stdout
            subprocess.run(["tar", "-x", "-C", str(ref)], input=archive, check=True)
            trees[f"rev {args.compare_with}"] = ref
        for name, tree in trees.items():
            out_dir = (args.keep / name.replace(" ", "_")) if args.keep else tmp / name.replace(" ", "_")
            out_dir.mkdir(parents=True, exist_ok=True)
            r = _run_worker(tree, out_dir, sorted({1, args.processes}), args.repeat)
            figs = ", ".join(f"{1e3 * v:.1f} ms with {k} process{'es' if k != '1' else ''} "
                             f"(CPU {1e3 * r['cpu' + k]:.1f} ms)"
                             for k, v in r.items() if k != "units" and not k.startswith("cpu"))
            print(f"  {name:<22} {r['units']} units: {figs}")
    print("goal: <= 80 ms per unit")
    print("load average at end: " + " ".join(f"{x:.2f}" for x in os.getloadavg()))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
