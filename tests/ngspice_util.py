"""Run ngspice in batch mode on netlists built around exported subcircuits.

ngspice is the independent reference of the export and stage tests: it knows
nothing of Platebook except the exported ``.subckt`` text.  Everything here is
plain netlist text plus a ``.control`` block that writes the wanted vectors with
``wrdata`` at full precision; :func:`run` parses them back into numpy arrays.

Netlist builders (:func:`plate_curve_deck`, :func:`common_cathode_circuit`,
:func:`stack_circuit` ...) are shared by tests/test_ngspice.py and
bench/ngspice_check.py.
"""

from __future__ import annotations

import re
import shutil
import subprocess
import tempfile
from pathlib import Path

import numpy as np

NGSPICE = shutil.which("ngspice")
SKIP_REASON = "ngspice is not installed (make test installs the Debian package 'ngspice')"


#: Tight Newton tolerances.  With the defaults (reltol 1e-3) ngspice stops a .dc
#: sweep point once the change is below 0.1 %, so the plate current it reports is
#: the linearised value from the previous iterate, up to ~1e-3 off; the model
#: comparison wants 1e-6 relative.
OPTIONS = ["option reltol=1e-10", "option abstol=1e-16", "option vntol=1e-12"]

#: Transient runs: tight enough that each time point's Newton solve is accurate to
#: well below the harmonics compared (-80 dB), loose enough to run in a fraction of
#: a second on a circuit with no reactive elements (see :func:`hold_capacitors`).
TRAN_OPTIONS = ["option reltol=1e-7", "option abstol=1e-14", "option vntol=1e-9"]


class NgspiceError(RuntimeError):
    """ngspice failed or printed an error; the message carries its log."""


def available() -> bool:
    return NGSPICE is not None


def run(circuit: str, analyses: list[str], vectors: list[str], title: str = "platebook check",
        timeout: float = 60.0, extra_control: list[str] | None = None) -> list[dict[str, np.ndarray]]:
    """Run ``circuit`` in ``ngspice -b`` and return the vectors of each analysis.

    Parameters
    ----------
    circuit : str
        Netlist body: subcircuits, elements, no title line, no ``.end``.
    analyses : list of str
        Control-block analysis commands, e.g. ``["op"]``, ``["dc Va 0 400 5"]``,
        ``["ac lin 1 1k 1k"]``; each one's vectors are written to its own file.
    vectors : list of str
        Vectors to write after each analysis (``v(out)``, ``i(Va)`` ...).  No
        leading minus: ``wrdata`` reads ``v(a) -i(Va)`` as one difference.

    Returns
    -------
    list of dict
        One dict per analysis: vector expression -> ndarray (complex vectors give
        complex arrays; the sweep scale is under ``"scale"``).
    """
    if NGSPICE is None:
        raise NgspiceError(SKIP_REASON)
    with tempfile.TemporaryDirectory(prefix="pb-ngspice-") as tmp:
        tmp = Path(tmp)
        ctl = ["set wr_singlescale", "set wr_vecnames", "option numdgt=15"] + OPTIONS
        ctl += list(extra_control or [])
        for k, a in enumerate(analyses):
            ctl.append(a)
            ctl.append(f"wrdata out{k}.txt " + " ".join(vectors))
        ctl.append("quit 0")  # without it ngspice -b exits 1 when the netlist has no .print
        deck = f"* {title}\n{circuit.rstrip()}\n.control\n" + "\n".join(ctl) + "\n.endc\n.end\n"
        (tmp / "deck.cir").write_text(deck)
        proc = subprocess.run([NGSPICE, "-b", "deck.cir"], cwd=tmp, capture_output=True,
                              text=True, timeout=timeout)
        log = proc.stdout + proc.stderr
        bad = _problems(log)
        if proc.returncode != 0 or bad:
            raise NgspiceError(f"ngspice failed (rc {proc.returncode}): {' | '.join(bad[:5])}\n"
                               f"--- deck ---\n{deck}\n--- log ---\n{log[-3000:]}")
        out = []
        for k in range(len(analyses)):
            f = tmp / f"out{k}.txt"
            if not f.exists():
                raise NgspiceError(f"ngspice wrote no output for {analyses[k]!r}\n{log[-3000:]}")
            out.append(_parse_wrdata(f.read_text(), vectors))
    return out


def _problems(log: str) -> list[str]:
    """Lines of an ngspice log that mean the results cannot be trusted.

    A "singular matrix" warning followed by successful gmin stepping is not one:
    stacked stages start the operating-point search with every tube at va = 0, where
    they conduct nothing, and ngspice recovers by itself.
    """
    lines = log.splitlines()
    bad = [ln for ln in lines if re.search(
        r"\berror\b|failed|aborted|timestep too small|no convergence|iteration limit", ln, re.I)]
    if any("singular matrix" in ln for ln in lines) and not any(
            "stepping completed" in ln for ln in lines):
        bad += [ln for ln in lines if "singular matrix" in ln]
    return bad


def _parse_wrdata(text: str, vectors: list[str]) -> dict[str, np.ndarray]:
    lines = [ln for ln in text.splitlines() if ln.strip()]
    rows = np.array([[float(x) for x in ln.split()] for ln in lines[1:]], dtype=float)
    if rows.ndim != 2 or rows.shape[0] == 0:
        raise NgspiceError("empty ngspice output")
    ncol = rows.shape[1]
    res: dict[str, np.ndarray] = {"scale": rows[:, 0]}
    if ncol == 1 + len(vectors):
        for j, v in enumerate(vectors):
            res[v] = rows[:, 1 + j]
    elif ncol == 1 + 2 * len(vectors):
        # complex analysis (ac): the scale, then (re, im) per vector
        for j, v in enumerate(vectors):
            res[v] = rows[:, 1 + 2 * j] + 1j * rows[:, 2 + 2 * j]
    else:
        raise NgspiceError(f"unexpected wrdata layout: {ncol} columns for {len(vectors)} vectors")
    return res


def fourier(circuit: str, tran: str, freq: float, node: str, nharm: int = 10,
            gridsize: int = 4096, timeout: float = 60.0) -> dict:
    """Transient run then ngspice's ``fourier`` analysis (the ``.four`` of the control language).

    Returns
    -------
    dict
        ``thd_pct`` and ``harmonics``: list of (n, frequency [Hz], magnitude, normalised
        magnitude) for n = 0 .. nharm-1, as printed by ngspice.
    """
    if NGSPICE is None:
        raise NgspiceError(SKIP_REASON)
    with tempfile.TemporaryDirectory(prefix="pb-ngspice-") as tmp:
        tmp = Path(tmp)
        ctl = [f"set nfreqs={nharm}", f"set fourgridsize={gridsize}", "set polydegree=1",
               "option numdgt=15", *TRAN_OPTIONS, tran, f"fourier {freq!r} {node}", "quit 0"]
        deck = "* platebook fourier check\n" + circuit.rstrip() + "\n.control\n" + "\n".join(ctl) + "\n.endc\n.end\n"
        (tmp / "deck.cir").write_text(deck)
        proc = subprocess.run([NGSPICE, "-b", "deck.cir"], cwd=tmp, capture_output=True,
                              text=True, timeout=timeout)
    log = proc.stdout + proc.stderr
    m = re.search(r"THD:\s*([0-9.eE+-]+)\s*%", log)
    if proc.returncode != 0 or m is None or _problems(log):
        raise NgspiceError(f"ngspice fourier failed (rc {proc.returncode})\n--- deck ---\n{deck}\n--- log ---\n{log[-3000:]}")
    harm = []
    for ln in log.splitlines():
        f = ln.split()
        if len(f) == 6 and f[0].isdigit():
            try:
                harm.append((int(f[0]), float(f[1]), float(f[2]), float(f[4])))
            except ValueError:
                continue
    return {"thd_pct": float(m.group(1)), "harmonics": harm[:nharm], "log": log}


# ---------------------------------------------------------------------------
# Netlist builders
# ---------------------------------------------------------------------------


def plate_curve_deck(subckt: str, name: str) -> str:
    """Circuit measuring the plate current of subcircuit ``name`` with ideal sources.

    ``Va`` drives the plate and ``Vg`` the grid, the cathode is ground; the plate
    current is ``-i(Va)``.  Sweep with ``dc Va ... Vg ...``.
    """
    return f"{subckt.rstrip()}\nX1 p g 0 {name}\nVa p 0 0\nVg g 0 0\n"


def plate_curves(subckt: str, name: str, va_start: float, va_stop: float, va_step: float,
                 vg_start: float, vg_stop: float, vg_step: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """ngspice plate curves: (va [V], vg [V], ia [A]) from a nested ``.dc`` sweep."""
    res = run(plate_curve_deck(subckt, name),
              [f"dc Va {va_start!r} {va_stop!r} {va_step!r} Vg {vg_start!r} {vg_stop!r} {vg_step!r}"],
              ["v(p)", "v(g)", "i(Va)"])[0]
    # i(Va) is the current into the source's + terminal, i.e. minus the plate current
    return res["v(p)"], res["v(g)"], -res["i(Va)"]


# Mid-band in the .ac runs: every coupling and bypass capacitor of the stage is
# written as this value, so at MIDBAND_HZ it is a short (1 F at 1 kHz: 0.16 mOhm)
# while .op still sees it open -- the same idealisation as the solver's mid-band.
BIG_C = 1.0
MIDBAND_HZ = 1000.0


def _sub_name(subckt: str) -> str:
    return subckt.split(".subckt ", 1)[1].split()[0]


def _grid_input(lines, grid, bias_node, bias_v, rg, coupled=True):
    """Signal source ``Vin`` (DC 0, AC 1) into ``grid`` through a coupling capacitor,
    grid leak ``rg`` to ``bias_node`` held at ``bias_v`` [V]."""
    lines.append("Vin in 0 DC 0 AC 1 SIN(0 0 1k)")
    lines.append(f"Cin in {grid} {BIG_C!r}")
    lines.append(f"Rg {grid} {bias_node} {float(rg)!r}")
    if bias_v is not None:
        lines.append(f"Vbias {bias_node} 0 DC {float(bias_v)!r}")


def _output(lines, node, rl, probe):
    """Load ``rl`` through a coupling capacitor (``probe="gain"``), or, for
    ``probe="zout"``, no load and a 1 A AC test current into ``node``."""
    if probe == "zout":
        lines.append(f"Iprobe 0 {node} DC 0 AC 1")
        return
    if rl is not None:
        lines.append(f"Cout {node} out {BIG_C!r}")
        lines.append(f"RL out 0 {float(rl)!r}")


def common_cathode_circuit(stage, subckt: str, probe: str = "gain", signal: str | None = None) -> str:
    """Netlist of a :class:`fitter.stage.CommonCathode` around an exported subcircuit.

    Nodes are named as the solver's ``nodes_v`` keys: ``grid``, ``cathode``, ``plate``
    (plus ``in`` and ``out``).  ``probe="zout"`` silences the input and drives the
    plate with an AC test current (load removed).  ``signal`` replaces the input
    source's transient spec, e.g. ``"SIN(0 0.5 1k)"``.
    """
    name = _sub_name(subckt)
    L = [subckt.rstrip(), f"VB bplus 0 DC {float(stage.b_plus)!r}",
         f"Ra bplus plate {float(stage.ra)!r}", f"X1 plate grid cathode {name}"]
    if stage.rk > 0:
        L.append(f"Rk cathode 0 {float(stage.rk)!r}")
        if stage.ck is not None:
            L.append(f"Ck cathode 0 {BIG_C!r}")
    else:
        L.append("Vk cathode 0 DC 0")
    bias = stage.vbias
    _grid_input(L, "grid", "nbias" if bias is not None else "0", bias, stage.rg)
    _output(L, "plate", stage.rl, probe)
    return _finish(L, probe, signal)


def cathode_follower_circuit(stage, subckt: str, probe: str = "gain", signal: str | None = None) -> str:
    """Netlist of a :class:`fitter.stage.CathodeFollower` (nodes grid, cathode, plate)."""
    name = _sub_name(subckt)
    L = [subckt.rstrip(), f"VB bplus 0 DC {float(stage.b_plus)!r}"]
    if stage.ra > 0:
        L.append(f"Ra bplus plate {float(stage.ra)!r}")
    else:
        L.append("Vra bplus plate DC 0")
    L.append(f"X1 plate grid cathode {name}")
    if stage.vneg != 0:
        L += [f"Rk cathode nneg {float(stage.rk)!r}", f"Vneg nneg 0 DC {float(stage.vneg)!r}"]
    else:
        L.append(f"Rk cathode 0 {float(stage.rk)!r}")
    if stage.r_upper is not None:
        L += [f"Rup bplus ndiv {float(stage.r_upper)!r}", f"Rlo ndiv 0 {float(stage.r_lower)!r}"]
        _grid_input(L, "grid", "ndiv", None, stage.rg)
    else:
        _grid_input(L, "grid", "0", None, stage.rg)
    _output(L, "cathode", stage.rl, probe)
    return _finish(L, probe, signal)


def stack_circuit(stage, bottom_subckt: str, top_subckt: str, probe: str = "gain",
                  signal: str | None = None) -> str:
    """Netlist of a :class:`fitter.stage.Stack` (mu follower or SRPP).

    Nodes as the solver's: ``grid``, ``cathode_bottom``, ``plate_bottom``, ``mid``,
    ``cathode_top``, ``grid_top``, ``plate_top`` (= B+).  ``r_mid = 0`` is a 0 V
    source (an ammeter) between ``plate_bottom`` and ``mid``; a tied top grid is a
    0 V source from ``plate_bottom`` to ``grid_top``.
    """
    b, t = _sub_name(bottom_subckt), _sub_name(top_subckt)
    subs = bottom_subckt.rstrip() if b == t else bottom_subckt.rstrip() + "\n" + top_subckt.rstrip()
    L = [subs, f"VB plate_top 0 DC {float(stage.b_plus)!r}",
         f"X1 plate_bottom grid cathode_bottom {b}", f"X2 plate_top grid_top cathode_top {t}"]
    if stage.rk > 0:
        L.append(f"Rk cathode_bottom 0 {float(stage.rk)!r}")
        if stage.ck is not None:
            L.append(f"Ck cathode_bottom 0 {BIG_C!r}")
    else:
        L.append("Vk cathode_bottom 0 DC 0")
    if stage.r_mid > 0:
        L.append(f"Rmid plate_bottom mid {float(stage.r_mid)!r}")
    else:
        L.append("Vmid plate_bottom mid DC 0")
    L.append(f"Rtop mid cathode_top {float(stage.r_top)!r}")
    if stage.top_grid == "coupled":
        L += [f"Ctop plate_bottom grid_top {BIG_C!r}", f"Rgtop grid_top mid {float(stage.rg_top)!r}"]
    else:
        L.append("Vtie plate_bottom grid_top DC 0")
    bias = stage.vbias
    _grid_input(L, "grid", "nbias" if bias is not None else "0", bias, stage.rg)
    out = "cathode_top" if stage.output == "top-cathode" else "plate_bottom"
    _output(L, out, stage.rl, probe)
    return _finish(L, probe, signal)


def _finish(lines, probe, signal):
    if probe == "zout":
        lines = [ln.replace("Vin in 0 DC 0 AC 1", "Vin in 0 DC 0 AC 0") for ln in lines]
    if signal is not None:
        lines = [ln.replace("SIN(0 0 1k)", signal) for ln in lines]
    return "\n".join(lines) + "\n"


def dc_and_midband(circuit: str, nodes: list[str], gain_nodes: list[str]) -> tuple[dict, dict]:
    """``op`` node voltages [V] and ``.ac`` gains v(node)/v(in) at MIDBAND_HZ (complex)."""
    op, ac = run(circuit, ["op", f"ac lin 1 {MIDBAND_HZ!r} {MIDBAND_HZ!r}"],
                 [f"v({n})" for n in nodes])
    dc = {n: float(op[f"v({n})"][0]) for n in nodes}
    gain = {n: complex(ac[f"v({n})"][0]) for n in gain_nodes}
    return dc, gain


def hold_capacitors(circuit: str) -> str:
    """Replace every coupling/bypass capacitor (value BIG_C) by a battery holding the
    voltage ngspice's own ``op`` puts across it.

    That is the quasi-static, mid-band circuit: capacitors keep their DC charge while
    the signal passes.  (Transient runs with 1 F capacitors are no good: the
    simulator's charge-based error control lets their voltage wander.)
    """
    caps = []
    for ln in circuit.splitlines():
        f = ln.split()
        if len(f) == 4 and f[0][:1].upper() == "C" and f[3] == repr(BIG_C):
            caps.append(f)
    nodes = sorted({n for f in caps for n in f[1:3] if n != "0"})
    (op,) = run(circuit, ["op"], [f"v({n})" for n in nodes])
    v = {n: float(op[f"v({n})"][0]) for n in nodes}
    v["0"] = 0.0
    out = []
    for ln in circuit.splitlines():
        f = ln.split()
        if len(f) == 4 and f[0][:1].upper() == "C" and f[3] == repr(BIG_C):
            ln = f"V{f[0]} {f[1]} {f[2]} DC {v[f[1]] - v[f[2]]!r}"
        out.append(ln)
    return "\n".join(out) + "\n"


# ---------------------------------------------------------------------------
# Frequency response (.ac with the stage's real capacitors)
# ---------------------------------------------------------------------------


def ac_circuit(stage, *subckts: str) -> str:
    """Netlist of any stage for an ``.ac`` sweep with its real capacitors.

    Unlike the mid-band builders above, the coupling and bypass capacitors are the
    stage's own values; the source has its resistance ``rs`` (node ``src`` -> ``in``);
    the tube capacitances ``cgk``, ``cga``, ``cak`` sit outside each exported
    subcircuit; ``c_load`` loads the output (``out``: the far side of ``c_out`` when a
    load is given, else the stage's output node).  A coupling capacitor the stage leaves
    out (None) is written as BIG_C (a short at 1 Hz and above; the DC grid stays where
    the grid leak holds it); ``ck`` None is no bypass.  Read the output as ``v(out)``.
    """
    from fitter.stage import CathodeFollower, CommonCathode

    names = [_sub_name(s) for s in subckts]
    subs = "\n".join(dict.fromkeys(s.rstrip() for s in subckts))
    L = [subs]

    def cap(name, a, b, value):
        L.append(f"{name} {a} {b} {float(BIG_C if value is None else value)!r}")

    def tube_caps(tag, p, g, k):
        for nm, a, b, v in (("Cgk", g, k, stage.cgk), ("Cga", g, p, stage.cga), ("Cak", p, k, stage.cak)):
            if v > 0:
                L.append(f"{nm}{tag} {a} {b} {float(v)!r}")

    def cathode(node, rk, ck):
        if rk > 0:
            L.append(f"Rk {node} 0 {float(rk)!r}")
            if ck is not None:
                L.append(f"Ck {node} 0 {float(ck)!r}")
        else:
            L.append(f"Vk {node} 0 DC 0")

    L.append("Vin src 0 DC 0 AC 1")
    L.append(f"Rs src in {float(stage.rs)!r}" if stage.rs > 0 else "Vrs src in DC 0")
    cap("Cin", "in", "grid", stage.c_in)
    bias = getattr(stage, "vbias", None)
    if isinstance(stage, CathodeFollower) and stage.r_upper is not None:
        L += [f"Rg grid ndiv {float(stage.rg)!r}", f"Rup bplus ndiv {float(stage.r_upper)!r}",
              f"Rlo ndiv 0 {float(stage.r_lower)!r}"]
    elif bias is not None:
        L += [f"Rg grid nbias {float(stage.rg)!r}", f"Vbias nbias 0 DC {float(bias)!r}"]
    else:
        L.append(f"Rg grid 0 {float(stage.rg)!r}")
    if isinstance(stage, CommonCathode):
        L += [f"VB bplus 0 DC {float(stage.b_plus)!r}", f"Ra bplus plate {float(stage.ra)!r}",
              f"X1 plate grid cathode {names[0]}"]
        cathode("cathode", stage.rk, stage.ck)
        tube_caps("1", "plate", "grid", "cathode")
        node = "plate"
    elif isinstance(stage, CathodeFollower):
        L.append(f"VB bplus 0 DC {float(stage.b_plus)!r}")
        L.append(f"Ra bplus plate {float(stage.ra)!r}" if stage.ra > 0 else "Vra bplus plate DC 0")
        L.append(f"X1 plate grid cathode {names[0]}")
        if stage.vneg != 0:
            L += [f"Rk cathode nneg {float(stage.rk)!r}", f"Vneg nneg 0 DC {float(stage.vneg)!r}"]
        else:
            L.append(f"Rk cathode 0 {float(stage.rk)!r}")
        tube_caps("1", "plate", "grid", "cathode")
        node = "cathode"
    else:
        L += [f"VB plate_top 0 DC {float(stage.b_plus)!r}",
              f"X1 plate_bottom grid cathode_bottom {names[0]}", f"X2 plate_top grid_top cathode_top {names[1]}"]
        cathode("cathode_bottom", stage.rk, stage.ck)
        L.append(f"Rmid plate_bottom mid {float(stage.r_mid)!r}" if stage.r_mid > 0 else "Vmid plate_bottom mid DC 0")
        L.append(f"Rtop mid cathode_top {float(stage.r_top)!r}")
        if stage.top_grid == "coupled":
            cap("Ctop", "plate_bottom", "grid_top", stage.c_top)
            L.append(f"Rgtop grid_top mid {float(stage.rg_top)!r}")
        else:
            L.append("Vtie plate_bottom grid_top DC 0")
        tube_caps("1", "plate_bottom", "grid", "cathode_bottom")
        tube_caps("2", "plate_top", "grid_top", "cathode_top")
        node = "cathode_top" if stage.output == "top-cathode" else "plate_bottom"
    if stage.rl is not None:
        cap("Cout", node, "out", stage.c_out)
        L.append(f"RL out 0 {float(stage.rl)!r}")
    else:
        L.append(f"Vout {node} out DC 0")
    if stage.c_load > 0:
        L.append(f"Cload out 0 {float(stage.c_load)!r}")
    return "\n".join(L) + "\n"


def ac_response(stage, *subckts: str, points_per_decade: int = 10,
                f_start: float = 1.0, f_stop: float = 1e6) -> tuple[np.ndarray, np.ndarray]:
    """ngspice ``.ac dec`` of :func:`ac_circuit`: (frequencies [Hz], complex v(out)/v(src))."""
    (r,) = run(ac_circuit(stage, *subckts), [f"ac dec {points_per_decade} {f_start!r} {f_stop!r}"], ["v(out)"])
    return r["scale"], r["v(out)"]
