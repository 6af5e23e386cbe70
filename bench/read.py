"""Benchmark of the curve reader: prints figures, asserts nothing.

Goal (issue 8, sections 7 and 8): reading a 1,000,000-row long-layout file takes
<= 1 s and <= 250 MB peak memory, with the validating reader still locating every
error by file, line and column.

The file is INVENTED: 50 units ("T0".."T49", section A) of 20,000 points each, plate
voltages 10..400 V, grid voltages 0..-4.5 V, currents uniform in 0..10 mA; written
once into a temporary folder.  Each measurement runs in its own Python process, so
that its peak resident memory (``ru_maxrss``) belongs to that read alone; the figure
"baseline" is the same process importing the reader without reading anything.  Also
shown: the spreadsheet dialect (';' and decimal commas) of the same rows, and how long the
row-by-row path takes to reject the same file with one bad cell on its last line.

Run:  python bench/read.py [--rows N] [--repeat K]
"""

from __future__ import annotations

import argparse
import hashlib
import json
import os
import statistics
import subprocess
import sys
import tempfile
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]

CHILD = r"""
import json, resource, sys, time
from fitter.reader import CurveReadError, read_curves
path, mode = sys.argv[1], sys.argv[2]
out = {}
if mode != "baseline":
    t0 = time.perf_counter()
    try:
        res = read_curves(path)
        out["units"] = len(res.units)
        out["points"] = sum(u.n_points for u in res.units)
    except CurveReadError as e:
        out["error"] = str(e.issues[0])
    out["seconds"] = time.perf_counter() - t0
out["maxrss_mb"] = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
print(json.dumps(out))
"""


def write_file(path: Path, rows: int, dialect: bool = False, bad_last: bool = False) -> None:
    rng = np.random.default_rng(0)
    units = 50
    per = rows // units
    va = np.tile(np.arange(10.0, 410.0, 10.0), rows // 40 + 1)[:rows]
    vg = np.repeat(np.tile(np.arange(0.0, -5.0, -0.5), rows // 400 + 1), 40)[:rows]
    ia = rng.uniform(0.0, 10.0, rows)
    sep = ";" if dialect else ","
    with path.open("w") as f:
        f.write("# INVENTED benchmark data (bench/read.py)\n")
        f.write(sep.join(["tube", "section", "Va (V)", "Vg (V)", "Ia [mA]"] if dialect
                         else ["tube", "section", "va", "vg", "ia_ma"]) + "\n")
        chunk = 100_000
        for s in range(0, rows, chunk):
            e = min(rows, s + chunk)
            lines = [f"T{min(i // per, units - 1)}{sep}A{sep}{a:g}{sep}{g:g}{sep}{c:.5g}"
                     for i, a, g, c in zip(range(s, e), va[s:e], vg[s:e], ia[s:e])]
            if dialect:
                lines = [ln.replace(".", ",") for ln in lines]
            if bad_last and e == rows:
                lines[-1] = lines[-1].rsplit(sep, 1)[0] + sep + "oops"
            f.write("\n".join(lines) + "\n")


def child(path: Path, mode: str) -> dict:
    r = subprocess.run([sys.executable, "-c", CHILD, str(path), mode], capture_output=True, text=True,
                       cwd=ROOT, check=True)
    return json.loads(r.stdout)


def main():
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--rows", type=int, default=1_000_000)
    ap.add_argument("--repeat", type=int, default=3)
    args = ap.parse_args()
    digest = hashlib.sha1((ROOT / "fitter" / "reader.py").read_bytes()).hexdigest()[:10]
    print(f"Platebook reader benchmark: {args.rows:,} rows, long layout (median and best of {args.repeat} "
          "runs, each in its own process)")
    print(f"engine file (sha1): reader.py {digest}")
    print("load average at start: " + " ".join(f"{x:.2f}" for x in os.getloadavg()) + f" ({os.cpu_count()} cores)")
    with tempfile.TemporaryDirectory() as tmp:
        files = {
            "plain CSV": Path(tmp) / "plain.csv",
            "';' + decimal commas + unit headers": Path(tmp) / "sheet.csv",
            "plain CSV, one bad cell on the last line": Path(tmp) / "bad.csv",
        }
        write_file(files["plain CSV"], args.rows)
        write_file(files["';' + decimal commas + unit headers"], args.rows, dialect=True)
        write_file(files["plain CSV, one bad cell on the last line"], args.rows, bad_last=True)
        base = child(files["plain CSV"], "baseline")["maxrss_mb"]
        print(f"baseline (python + numpy + reader imported, nothing read): {base:.0f} MB resident")
        print()
        print(f"{'file':<42} {'MB':>5} {'read s':>7} {'best s':>7} {'peak MB':>8}  result")
        for name, path in files.items():
            runs = [child(path, "plain") for _ in range(args.repeat)]
            secs = statistics.median(r["seconds"] for r in runs)
            peak = max(r["maxrss_mb"] for r in runs)
            r = runs[0]
            what = (f"{r['units']} units, {r['points']:,} points" if "units" in r
                    else "error: " + r["error"].replace(str(path), path.name))
            best = min(r["seconds"] for r in runs)
            print(f"{name:<42} {path.stat().st_size / 1e6:5.0f} {secs:7.3f} {best:7.3f} {peak:8.0f}  {what}")
    print()
    print("goal: plain CSV read <= 1 s and peak <= 250 MB (resident, whole process)")
    print("load average at end: " + " ".join(f"{x:.2f}" for x in os.getloadavg()))


if __name__ == "__main__":
    main()
