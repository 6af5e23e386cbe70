"""Export a model card to SPICE, run ngspice on it, print how far its plate curves are
from Platebook's model.

    python bench/ngspice_check.py CARD [--va 0:400:5] [--vg -4:0:0.25] [--stages]
        [--bplus 250] [--ra 22k] [--rk 1k] [--rl 220k]

The grid defaults to the card's fitted range (about 80 plate voltages by 17 grid
voltages).  With ``--stages`` it also builds a common-cathode stage (Rk bypassed)
and an SRPP (the card's unit top and bottom) around the exported subcircuit and
prints ngspice's DC node voltages, mid-band gain and output impedance beside
Platebook's solver.  Prints figures only; asserts nothing.
"""

from __future__ import annotations

import argparse
import subprocess
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))

import ngspice_util as ng  # noqa: E402

from fitter.card import CardError, load_card  # noqa: E402
from fitter.export import HIGH_VOLTAGE_CAUTION, ExportError, parse_sweep, spice_name, spice_subcircuit  # noqa: E402
from fitter.stage import CommonCathode, Stack, solve  # noqa: E402
from fitter.units import parse_value  # noqa: E402


def _range(spec, lo, hi, n, what):
    if spec is not None:
        v = parse_sweep(spec, what)
        if v.size < 2 or not np.allclose(np.diff(v), v[1] - v[0]):
            raise ExportError(f"{what}: give an evenly spaced start:stop:step range")
        return float(v[0]), float(v[-1]), float(v[1] - v[0])
    step = float(f"{(hi - lo) / n:.2g}") or 1.0
    return float(lo), float(hi), step


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("card")
    ap.add_argument("--va", default=None, help="plate voltages start:stop:step [V]")
    ap.add_argument("--vg", default=None, help="grid voltages start:stop:step [V]")
    ap.add_argument("--show", action="store_true", help="print the exported netlist too")
    ap.add_argument("--stages", action="store_true", help="also compare two stages with the solver")
    ap.add_argument("--bplus", default="250", help="stages: B+ [V] (default 250)")
    ap.add_argument("--ra", default="22k", help="common cathode: plate resistor (default 22k)")
    ap.add_argument("--rk", default="1k", help="cathode resistor of both stages (default 1k)")
    ap.add_argument("--rl", default="220k", help="AC load of both stages (default 220k)")
    a = ap.parse_args(argv)
    if not ng.available():
        print(ng.SKIP_REASON, file=sys.stderr)
        return 1
    try:
        unit = load_card(a.card)
        r = unit.valid_range or {"va": (0.0, 400.0), "vg": (-4.0, 0.0)}
        va0, va1, dva = _range(a.va, *r["va"], 80, "--va")
        vg0, vg1, dvg = _range(a.vg, *r["vg"], 16, "--vg")
        text = spice_subcircuit(unit, card=a.card)
    except (CardError, ExportError) as e:
        print(f"ngspice_check: {e}", file=sys.stderr)
        return 1
    name = spice_name(unit)
    t0 = time.perf_counter()
    va, vg, ia_spice = ng.plate_curves(text, name, va0, va1, dva, vg0, vg1, dvg)
    dt = time.perf_counter() - t0
    ia_py = unit.current(va, vg)
    err = np.abs(ia_spice - ia_py)
    on = np.abs(ia_py) > 1e-6
    version = subprocess.run([ng.NGSPICE, "-v"], capture_output=True, text=True).stdout
    version = next((ln.strip("* ").split(" : ")[0] for ln in version.splitlines() if "ngspice-" in ln), "ngspice")
    if a.show:
        print(text)
    print(f"card:        {a.card}")
    print(f"unit:        {unit.label}   model: {unit.model.name}   subcircuit: {name} (plate grid cathode)")
    print(f"simulator:   {version}")
    print(f"grid:        va {va0:g}..{va1:g} V step {dva:g}, vg {vg0:g}..{vg1:g} V step {dvg:g}: {va.size} points")
    print(f"ia range:    {1e3 * ia_py.min():.4g} .. {1e3 * ia_py.max():.4g} mA")
    print(f"max |rel diff| where ia > 1 uA ({int(on.sum())} points): "
          f"{np.max(err[on] / np.abs(ia_py[on])) if on.any() else float('nan'):.3g}")
    print(f"max |abs diff| anywhere: {np.max(err):.3g} A")
    print(f"ngspice run: {dt:.2f} s")
    if a.stages:
        try:
            bp, ra, rk, rl = (parse_value(v, f"--{k}") for k, v in
                              (("bplus", a.bplus), ("ra", a.ra), ("rk", a.rk), ("rl", a.rl)))
            stages = {
                "common cathode (Rk bypassed)": CommonCathode(b_plus=bp, ra=ra, rk=rk, ck=100e-6, rl=rl),
                "SRPP (same unit top and bottom)": Stack.srpp(b_plus=bp, rk=rk, rl=rl),
            }
        except ValueError as e:
            print(f"ngspice_check: {e}", file=sys.stderr)
            return 1
        print()
        print(HIGH_VOLTAGE_CAUTION)
        for title, st in stages.items():
            r = solve(st, *([unit] * (2 if isinstance(st, Stack) else 1)), errors=False).to_dict()
            sub = [text] * (2 if isinstance(st, Stack) else 1)
            build = ng.stack_circuit if isinstance(st, Stack) else ng.common_cathode_circuit
            nodes = list(r["nodes_v"])
            out = r["output"]
            dc, g = ng.dc_and_midband(build(st, *sub), nodes, [out])
            _, z = ng.dc_and_midband(build(st, *sub, probe="zout"), nodes, [out])
            ra_txt = f", Ra {ra:g} ohm" if isinstance(st, CommonCathode) else ""
            print(f"{title}: B+ {bp:g} V{ra_txt}, Rk {rk:g} ohm, RL {rl:g} ohm (invented values)")
            print(f"  {'figure':<22}{'Platebook':>14}{'ngspice':>14}{'rel diff':>11}")
            rows = [(f"v({n}) [V]", r["nodes_v"][n], dc[n]) for n in nodes]
            rows += [(f"gain at {out}", r["gain"], g[out].real), ("zout [ohm]", r["zout_ohm"], z[out].real)]
            for label, pb, sp in rows:
                rel = abs(sp - pb) / max(abs(pb), 1e-9) if abs(pb) > 1e-9 else abs(sp - pb)
                print(f"  {label:<22}{pb:>14.6g}{sp:>14.6g}{rel:>11.1e}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
