"""Benchmark of the design pages' plots (prints figures, asserts nothing).

A SQLite ledger in a temporary folder gets two invented demo lots (curves/stock_medium_mu.csv,
a 12AU7-like dual triode, type MM; curves/stock_power.csv, a 300B-like power triode, type
PT: made by curves/make_demo.py, not measurements of real tubes), fitted on import.  Then:

1. per plot: each design plot drawn to SVG as the pages draw it (the output stage's panels,
   its frequency response, a sweep on a log axis, a stock's spread), from results solved
   once beforehand, best and median of ``--repeat``;
2. per page: the first view of /output (single-ended and push-pull), /sweep and /stage with
   a type's stock, through Flask's test client signed in (a new app each time, so nothing is
   cached; server time only, no browser), the median of ``--repeat``.

The process draws one figure first (matplotlib's import and font cache are not counted).
The machine may be shared: the load average is printed at the start and at the end.

Run:  python bench/design_pages.py [--repeat 3] [--keep DIR] [--plots-only | --pages-only] [--tree DIR]

``--tree DIR`` times another revision's code on the same data (``mkdir DIR; git archive REV |
tar -x -C DIR``); run the two one after the other, more than once, on a shared machine.   (DIR: the SVGs, to look at)
"""

from __future__ import annotations

import argparse
import os
import re
import statistics
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
if "--tree" in sys.argv:  # another tree's code (e.g. ``git archive REV | tar -x -C DIR``), this tree's data
    sys.path.insert(0, str(Path(sys.argv[sys.argv.index("--tree") + 1]).resolve()))
else:
    sys.path.insert(0, str(ROOT))

PASSWORD = "bench-password-1"
PP = {"b_plus": "300", "load": "5k", "grid_bias": "-61", "pa_max": "40"}
SE = {"b_plus": "300", "load": "3k", "grid_bias": "-61", "pa_max": "40"}
SMALL = {"b_plus": "300", "rk": "1.5k", "ck": "22u"}


def _ledger(folder: Path) -> str:
    from fitter.service import accounts, stock

    db = str(folder / "ledger.sqlite")
    stock.init(db)
    stock.add_type(db, "bench", "MM", 250.0, -8.5)
    stock.import_files(db, "bench", [str(ROOT / "curves" / "stock_medium_mu.csv")], "MM")
    stock.add_type(db, "bench", "PT", 300.0, -61.0, dual=False, pa_max=40.0)
    stock.import_files(db, "bench", [str(ROOT / "curves" / "stock_power.csv")], "PT")
    accounts.add_account(db, "viewer1", "viewer", PASSWORD)
    return db


def _times(fn, repeat):
    t = []
    for _ in range(repeat):
        t0 = time.perf_counter()
        out = fn()
        t.append(time.perf_counter() - t0)
    return t, out


def _row(name, t, extra=""):
    print(f"  {name:<34} best {1e3 * min(t):7.0f} ms   median {1e3 * statistics.median(t):7.0f} ms  {extra}")


def _plot(name, make, repeat, path):
    t, svg = _times(make, repeat)
    path.write_bytes(svg)
    _row(name, t, f"{len(svg) / 1024:.0f} KiB")


def _through_files():
    from fitter.plotting_design import save_response_plot, save_sweep_plot
    from fitter.plotting_web import save_spread_plot

    def via(save):
        def make(*args):
            with tempfile.TemporaryDirectory() as tmp:
                return save(*args[:1], Path(tmp, "plot.svg"), *args[1:]).read_bytes()
        return make

    def spread(res, title_type):
        with tempfile.TemporaryDirectory() as tmp:
            return save_spread_plot(res, Path(tmp, "plot.svg"), title_type=title_type).read_bytes()

    return via(save_response_plot), spread, via(save_sweep_plot)


def plots(db, repeat, keep):
    import fitter.plotting_web as W
    from fitter.plotting_web import output_panels

    if hasattr(W, "response_svg"):
        response_svg, spread_svg, sweep_svg = W.response_svg, W.spread_svg, W.sweep_svg
    else:  # a tree from before them: the files the pages wrote then
        response_svg, spread_svg, sweep_svg = _through_files()
    print(f"   (fitter from {Path(W.__file__).parents[1]})")
    from fitter.service import web_design
    from fitter.service.stages import SpreadSpec, spread_stage
    from fitter.service.web_design import parse_circuit

    print("1. plots (SVG, drawn from results solved beforehand)")
    runs = {
        "single-ended": web_design.output_run(db, "single-ended", SE, {"tube": "PT-01"}, response=True),
        "push-pull": web_design.output_run(db, "push-pull", PP, {"tube_a": "PT-01", "tube_b": "PT-04"},
                                           response=True),
    }
    for kind, run in runs.items():
        t, panels = _times(lambda: output_panels(run, "svg"), repeat)
        _row(f"output_panels {kind} ({len(panels)})", t, f"{sum(map(len, panels)) / 1024:.0f} KiB")
        _plot(f"response {kind}", lambda: response_svg(run.frequency), repeat, keep / f"response-{kind}.svg")
        for i, svg in enumerate(panels):
            (keep / f"panel-{kind}-{i}.svg").write_bytes(svg)
    sw = web_design.sweep_run(db, "common-cathode", "ra", "47k", "470k", 8, True, SMALL, {"tube": "MM-02:A"})
    _plot("sweep ra 47k..470k (log)", lambda: sweep_svg(sw), repeat, keep / "sweep-log.svg")
    sws = web_design.sweep_run(db, "common-cathode", "ra", "47k", "470k", 8, True, SMALL, None, "MM")
    _plot("sweep over the MM stock (log)", lambda: sweep_svg(sws), repeat, keep / "sweep-stock.svg")
    with web_design.stock_cards(db, "MM") as (folder, _, _):
        res = spread_stage(SpreadSpec(kind="common-cathode", circuit=parse_circuit(dict(SMALL, ra="100k")),
                                      cards=folder))
    _plot("spread over the MM stock", lambda: spread_svg(res, "MM"), repeat, keep / "spread.svg")


def pages(db, repeat):
    from web import create_app

    print("2. pages, first view (new app: nothing cached; solve + plots + template)")
    urls = {
        "/output single-ended": ("/output", dict(SE, kind="single-ended", tube="PT-01")),
        "/output push-pull": ("/output", dict(PP, kind="push-pull", tube_a="PT-01", tube_b="PT-04")),
        "/sweep ra, one tube (log)": ("/sweep", dict(SMALL, kind="common-cathode", vary="ra", start="47k",
                                                     stop="470k", points="8", log="1", tube="MM-02:A")),
        "/sweep ra, the MM stock (log)": ("/sweep", dict(SMALL, kind="common-cathode", vary="ra", start="47k",
                                                         stop="470k", points="8", log="1", type="MM")),
        "/stage spread over MM": ("/stage", dict(SMALL, kind="common-cathode", ra="100k", type="MM")),
        "/stage one tube, with THD": ("/stage", dict(SMALL, kind="common-cathode", ra="100k", tube="MM-02:A",
                                                     thd="1")),
    }
    for name, (path, args) in urls.items():
        t = []
        size = 0
        for _ in range(repeat):
            app = create_app({"LEDGER": db, "SECRET_KEY": "bench-key"})
            c = app.test_client()
            page = c.get("/signin").get_data(as_text=True)
            token = re.search(r'name="csrf_token" value="([^"]+)"', page).group(1)
            r = c.post("/signin", data={"name": "viewer1", "password": PASSWORD, "csrf_token": token})
            assert r.status_code == 302, r.status_code
            t0 = time.perf_counter()
            r = c.get(path, query_string=args)
            t.append(time.perf_counter() - t0)
            body = r.get_data(as_text=True)
            if r.status_code != 200 or "data:image/svg" not in body:
                print(f"  {name}: status {r.status_code}, no plot in the page")
                break
            size = len(body)
        _row(name, t, f"page {size / 1024:.0f} KiB")


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--keep", type=Path, help="write the plots' SVGs to this folder")
    ap.add_argument("--tree", type=Path, help="time the fitter and web of this folder (an exported revision)")
    ap.add_argument("--plots-only", action="store_true", help="only the plots (1.)")
    ap.add_argument("--pages-only", action="store_true", help="only the pages (2.)")
    a = ap.parse_args(argv)
    print(f"load average at the start: {os.getloadavg()}")
    with tempfile.TemporaryDirectory(prefix="platebook-bench-design-") as tmp:
        tmp = Path(tmp)
        keep = a.keep or tmp
        keep.mkdir(parents=True, exist_ok=True)
        t0 = time.perf_counter()
        db = _ledger(tmp)
        print(f"ledger with the demo lots MM and PT: {time.perf_counter() - t0:.1f} s")
        import matplotlib.pyplot as plt

        fig = plt.figure()  # matplotlib's first figure: imports, font cache
        fig.savefig(tmp / "warm.svg")
        plt.close(fig)
        if not a.pages_only:
            plots(db, a.repeat, keep)
        if not a.plots_only:
            pages(db, a.repeat)
    print(f"load average at the end: {os.getloadavg()}")


if __name__ == "__main__":
    main()
