"""Start-up benchmark of the command line: prints figures, asserts nothing.

Goal (issue 8, section 8): any command starts in <= 0.5 s.  Each figure is the median
(and the minimum) of several runs of a whole process, ``python -m fitter ARGS`` with
output thrown away, so it includes the interpreter, the imports and the command itself.

``--compare-with REV`` also times the same commands on another git revision (exported
with ``git archive`` into a temporary folder and put first on PYTHONPATH), run
alternately with this tree in the same session, so both columns see the same machine
load.  The load average is printed at the start and the end.

Run:  python bench/startup.py [--runs 7] [--compare-with REV]
"""

from __future__ import annotations

import argparse
import os
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def _card(folder: Path) -> Path:
    # Koren's published 12AX7 set (from memory of Koren's model table); invented unit name
    sys.path.insert(0, str(ROOT))
    from fitter.card import save_card
    from fitter.triode import FittedTriode

    return save_card(folder / "bench.koren.json",
                     FittedTriode("koren", dict(mu=100.0, ex=1.4, kg1=1060.0, kp=600.0, kvb=300.0),
                                  tube="BENCH"))


def _run_once(args, pythonpath):
    env = dict(os.environ, PYTHONPATH=str(pythonpath))
    t0 = time.perf_counter()
    p = subprocess.run([sys.executable, "-m", "fitter", *args], env=env, stdout=subprocess.DEVNULL,
                       stderr=subprocess.PIPE, cwd=pythonpath)
    dt = time.perf_counter() - t0
    if p.returncode != 0:
        raise SystemExit(f"{' '.join(args)} failed ({p.returncode}): {p.stderr.decode()[-300:]}")
    return dt


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--runs", type=int, default=7, help="runs per command (median reported)")
    ap.add_argument("--compare-with", metavar="REV", help="also time this git revision, side by side")
    args = ap.parse_args(argv)

    with tempfile.TemporaryDirectory(prefix="platebook-startup-") as tmp:
        tmp = Path(tmp)
        card = _card(tmp)
        commands = {
            "platebook --help": ["--help"],
            "platebook fit --help": ["fit", "--help"],
            "platebook point CARD --va 250 --vg -2": ["point", str(card), "--va", "250", "--vg", "-2"],
            "platebook stage --help": ["stage", "--help"],
            "platebook match --help": ["match", "--help"],
            "platebook export --help": ["export", "--help"],
        }
        trees = {"this tree": ROOT}
        if args.compare_with:
            ref = tmp / "ref"
            ref.mkdir()
            archive = subprocess.run(["git", "-C", str(ROOT), "archive", args.compare_with, "fitter"],
                                     check=True, capture_output=True).stdout
            subprocess.run(["tar", "-x", "-C", str(ref)], input=archive, check=True)
            rev = subprocess.run(["git", "-C", str(ROOT), "rev-parse", "--short", args.compare_with],
                                 check=True, capture_output=True, text=True).stdout.strip()
            trees[f"rev {rev}"] = ref

        print("Platebook start-up benchmark: whole processes (python -m fitter ...), "
              f"median of {args.runs} runs [min]")
        print("load average at start: " + " ".join(f"{x:.2f}" for x in os.getloadavg()))
        head = f"{'command':<42}" + "".join(f"{name:>20}" for name in trees)
        print(head)
        print("-" * len(head))
        for label, cmd in commands.items():
            times = {name: [] for name in trees}
            for _ in range(args.runs):
                for name, path in trees.items():  # alternate, so both see the same load
                    times[name].append(_run_once(cmd, path))
            print(f"{label:<42}" + "".join(
                f"{statistics.median(t):>12.3f} s [{min(t):.2f}]" for t in times.values()))
        print("goal: <= 0.5 s for every command")
        print("load average at end: " + " ".join(f"{x:.2f}" for x in os.getloadavg()))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
