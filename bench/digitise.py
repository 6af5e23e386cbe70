"""Benchmark of the datasheet-plot digitiser (issue 12): prints figures, asserts nothing.

Goal (issue 12, section 4): following one curve on a 2,000 x 1,500 image takes <= 0.2 s.
Also shown: decoding a page (load_image), the axis fit, a whole page digitised and fitted
(decode, axes, one trace per curve, points, CSV, read, fit), and the check errors of every
synthetic page of ``tests/digitise_pages.py`` against its truth (largest current error in %
of full scale; gm, rp and mu at the mid-range point in %), the figures the tests hold to
1.5 % and 3 %.  The pages are INVENTED tubes.

Run:  python bench/digitise.py [--repeat K]
"""

from __future__ import annotations

import argparse
import os
import statistics
import sys
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT / "tests"))

from digitise_pages import PAGES, digitise_page, make_page, page_errors  # noqa: E402

from fitter.digitise import AxisMark, fit_axes, load_image, trace_curve  # noqa: E402
from fitter.fit import fit_curves  # noqa: E402
from fitter.reader import read_text  # noqa: E402


def timed(fn, repeat):
    out = []
    for _ in range(repeat):
        t = time.perf_counter()
        fn()
        out.append(time.perf_counter() - t)
    return min(out), statistics.median(out)


def _loop():
    s = 0
    for i in range(1_000_000):
        s += i
    return s


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--repeat", type=int, default=5)
    args = ap.parse_args(argv)
    r = max(1, args.repeat)
    print(f"digitiser benchmark: {len(PAGES)} synthetic 2000 x 1500 pages (invented tubes), {r} repeats; "
          "times in ms as min / median")
    print(f"machine load (1-minute average, {os.cpu_count()} cores): {os.getloadavg()[0]:.1f}; a pure-Python loop of "
          f"1e6 steps: {min(timed(_loop, 3)) * 1e3:.0f} ms (a reference for how busy the machine is)")
    print(f"{'page':<10} {'decode':>14} {'axes':>12} {'trace/curve (slowest curve)':>30} {'page+fit':>16} "
          f"{'max |dI| %FS':>13} {'gm %':>7} {'rp %':>7} {'mu %':>7}")
    for name in PAGES:
        page = make_page(name)
        dec = timed(lambda: load_image(page.data, name), r)
        img = load_image(page.data, name)
        marks = [AxisMark(x, y, a, v) for x, y, a, v in page.ticks]
        ax = timed(lambda: fit_axes(marks), max(r, 20))
        traces = []
        for _, sx, sy in page.seeds:
            traces.append(timed(lambda: trace_curve(img, (sx, sy), box=page.box), r))
        slow = max(traces, key=lambda t: t[1])
        state = {}

        def whole():
            _, _, text = digitise_page(page, np.random.default_rng(sum(map(ord, name))))
            state["fit"] = fit_curves(read_text(text, file=f"{name}.csv").units[0], page.spec.model)

        tot = timed(whole, max(1, r // 2))
        fit = state["fit"]
        if not fit.converged:
            print(f"{name:<10} fit failed: {fit.failure}")
            continue
        worst, ss = page_errors(page, fit)
        print(f"{name:<10} {dec[0] * 1e3:6.0f} / {dec[1] * 1e3:5.0f} {ax[0] * 1e3:5.2f} / {ax[1] * 1e3:4.2f} "
              f"{slow[0] * 1e3:12.1f} / {slow[1] * 1e3:5.1f} ms {tot[0] * 1e3:7.0f} / {tot[1] * 1e3:5.0f} "
              f"{100 * worst:13.3f} {100 * ss['gm']:+7.2f} {100 * ss['rp']:+7.2f} {100 * ss['mu']:+7.2f}")
        med = [t[1] * 1e3 for t in traces]
        print(f"{'':<10} trace medians per curve [ms]: " + ", ".join(f"{m:.0f}" for m in med))


if __name__ == "__main__":
    main()
