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
        bad = [ln for ln in log.splitlines()
               if re.search(r"\berror\b|singular|timestep too small|no convergence", ln, re.I)]
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
            gridsize: int = 4096, timeout: float = 120.0) -> dict:
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
               "option numdgt=15", tran, f"fourier {freq!r} {node}", "quit 0"]
        deck = "* platebook fourier check\n" + circuit.rstrip() + "\n.control\n" + "\n".join(ctl) + "\n.endc\n.end\n"
        (tmp / "deck.cir").write_text(deck)
        proc = subprocess.run([NGSPICE, "-b", "deck.cir"], cwd=tmp, capture_output=True,
                              text=True, timeout=timeout)
    log = proc.stdout + proc.stderr
    m = re.search(r"THD:\s*([0-9.eE+-]+)\s*%", log)
    if proc.returncode != 0 or m is None:
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
