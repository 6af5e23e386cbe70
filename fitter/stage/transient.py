"""Large-signal limits that depend on frequency: THD against frequency at one level, by
running the stage in ngspice (transient analysis and its Fourier analysis).

The quasi-static distortion of :mod:`fitter.stage.distortion` assumes the signal is slow
enough for no capacitance to matter.  At high frequency the tube and load capacitances take
current, and a stage driving a capacitive load runs out of current on one slope (slew
limiting); that is a time-domain effect, so rather than writing a transient simulator this
module writes the same stage description as a netlist around the exported subcircuits
(:func:`fitter.export.spice_subcircuit`, with the tube capacitances) and lets ngspice solve it.
ngspice is optional: without it :class:`SimulatorMissing` says so in one line.

The coupling and bypass capacitors hold their DC charge (they become batteries at the voltage
ngspice's own operating point puts across them: the mid-band assumption, so that what changes
with frequency is only what the tube and load capacitances do); the source drives the input
through ``rs``.  The level is set at low frequency: the input amplitude that gives
``vout_peak`` quasi-statically (:func:`fitter.stage.distortion.analyse`) is held at every
frequency, so the output's fall at high frequency shows beside its distortion.
"""

from __future__ import annotations

import math
import re
import shutil
import subprocess
import tempfile
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from .. import CAUTION
from .circuits import CathodeFollower, CommonCathode, Stack, StageInputError, output_node, stage_kind, stage_title
from .solver import _check_triodes

__all__ = ["SimulatorMissing", "SimulatorError", "FrequencyDistortion", "thd_against_frequency", "stage_netlist"]

#: ngspice options of the transient runs: each time point's Newton solve well below the
#: harmonics reported (-80 dB)
_TRAN_OPTIONS = ["option reltol=1e-6", "option abstol=1e-13", "option vntol=1e-8"]
#: periods simulated (the last one is analysed) and time steps per period
_PERIODS = 4
_STEPS = 400
_NHARM = 10


class SimulatorMissing(RuntimeError):
    """ngspice is not installed; the message is one line saying what needs it."""


class SimulatorError(RuntimeError):
    """ngspice ran but gave no usable answer; the message is one line."""


def _ngspice():
    return shutil.which("ngspice")


def stage_netlist(stage, triodes, *, source: str, hold: dict | None = None) -> str:
    """The stage around its tubes' exported subcircuits (tube capacitances inside them).

    ``source`` is the input source's specification (``"DC 0 SIN(0 0.1 1000)"``); the output
    is ``v(out)``.  ``hold`` maps the coupling/bypass capacitors' names (``Cin``, ``Cout``,
    ``Ck``, ``Ctop``) to the DC voltage each holds; None writes them as 1 F capacitors (for
    the operating point, where they are open).  A coupling capacitor the stage leaves out
    (None) is a short for the signal but keeps the DC apart, so it is held like the others;
    ``ck`` None is no bypass.
    """
    from ..export import spice_subcircuit

    caps = dict(cgk=stage.cgk or None, cga=stage.cga or None, cak=stage.cak or None)
    names = ["PBTUBE1", "PBTUBE2"][:len(triodes)]
    L = [spice_subcircuit(t, name=n, **caps).rstrip() for t, n in zip(triodes, names)]

    def cap(name, a, b):
        if hold is None:
            L.append(f"{name} {a} {b} 1.0")
        else:
            L.append(f"V{name} {a} {b} DC {float(hold[name])!r}")

    L.append(f"Vin src 0 {source}")
    L.append(f"Rs src in {float(stage.rs)!r}" if stage.rs > 0 else "Vrs src in DC 0")
    cap("Cin", "in", "grid")
    bias = getattr(stage, "vbias", None)
    if isinstance(stage, CathodeFollower) and stage.r_upper is not None:
        L += [f"Rg grid ndiv {float(stage.rg)!r}", f"Rup bplus ndiv {float(stage.r_upper)!r}",
              f"Rlo ndiv 0 {float(stage.r_lower)!r}"]
    elif bias is not None:
        L += [f"Rg grid nbias {float(stage.rg)!r}", f"Vbias nbias 0 DC {float(bias)!r}"]
    else:
        L.append(f"Rg grid 0 {float(stage.rg)!r}")

    def cathode(node):
        if stage.rk > 0:
            L.append(f"Rk {node} 0 {float(stage.rk)!r}")
            if stage.ck is not None:
                cap("Ck", node, "0")
        else:
            L.append(f"Vk {node} 0 DC 0")

    if isinstance(stage, CommonCathode):
        L += [f"VB bplus 0 DC {float(stage.b_plus)!r}", f"Ra bplus plate {float(stage.ra)!r}",
              f"X1 plate grid cathode {names[0]}"]
        cathode("cathode")
    elif isinstance(stage, CathodeFollower):
        L.append(f"VB bplus 0 DC {float(stage.b_plus)!r}")
        L.append(f"Ra bplus plate {float(stage.ra)!r}" if stage.ra > 0 else "Vra bplus plate DC 0")
        L.append(f"X1 plate grid cathode {names[0]}")
        if stage.vneg != 0:
            L += [f"Rk cathode nneg {float(stage.rk)!r}", f"Vneg nneg 0 DC {float(stage.vneg)!r}"]
        else:
            L.append(f"Rk cathode 0 {float(stage.rk)!r}")
    elif isinstance(stage, Stack):
        L += [f"VB bplus 0 DC {float(stage.b_plus)!r}", f"X1 plate_bottom grid cathode_bottom {names[0]}",
              f"X2 bplus grid_top cathode_top {names[1]}"]
        cathode("cathode_bottom")
        L.append(f"Rmid plate_bottom mid {float(stage.r_mid)!r}" if stage.r_mid > 0 else "Vmid plate_bottom mid DC 0")
        L.append(f"Rtop mid cathode_top {float(stage.r_top)!r}")
        if stage.top_grid == "coupled":
            cap("Ctop", "plate_bottom", "grid_top")
            L.append(f"Rgtop grid_top mid {float(stage.rg_top)!r}")
        else:
            L.append("Vtie plate_bottom grid_top DC 0")
    else:
        stage_kind(stage)
    node = output_node(stage)
    if stage.rl is not None:
        cap("Cout", node, "out")
        L.append(f"RL out 0 {float(stage.rl)!r}")
    else:
        L.append(f"Vout {node} out DC 0")
    if stage.c_load > 0:
        L.append(f"Cload out 0 {float(stage.c_load)!r}")
    return "\n".join(L) + "\n"


def _run(deck: str, timeout: float) -> str:
    exe = _ngspice()
    if exe is None:
        raise SimulatorMissing("THD against frequency needs ngspice, which is not installed (Debian package "
                               "'ngspice'); everything else works without it")
    with tempfile.TemporaryDirectory(prefix="pb-tran-") as tmp:
        (Path(tmp) / "deck.cir").write_text(deck)
        try:
            proc = subprocess.run([exe, "-b", "deck.cir"], cwd=tmp, capture_output=True, text=True, timeout=timeout)
        except subprocess.TimeoutExpired:
            raise SimulatorError(f"ngspice took longer than {timeout:g} s") from None
        out = proc.stdout + proc.stderr
        files = {p.name: p.read_text() for p in Path(tmp).glob("*.txt")}
    bad = [ln for ln in out.splitlines() if re.search(r"\berror\b|aborted|timestep too small|no convergence", ln, re.I)]
    if proc.returncode != 0 or bad:
        raise SimulatorError("ngspice failed: " + (bad[0].strip() if bad else f"exit status {proc.returncode}"))
    return out, files


def _deck(circuit: str, control: list) -> str:
    return "* platebook stage (transient)\n" + circuit + ".control\n" + "\n".join(control) + "\nquit 0\n.endc\n.end\n"


def _held_voltages(stage, triodes, timeout) -> dict:
    """DC voltage across each coupling/bypass capacitor at ngspice's own operating point."""
    circuit = stage_netlist(stage, triodes, source="DC 0")
    caps = [ln.split() for ln in circuit.splitlines() if ln[:1] == "C" and ln.split()[0] in ("Cin", "Cout", "Ck", "Ctop")]
    nodes = sorted({n for c in caps for n in c[1:3] if n != "0"})
    if not nodes:
        return {}
    _, files = _run(_deck(circuit, ["set wr_vecnames", "option numdgt=15", "op",
                                    "wrdata op.txt " + " ".join(f"v({n})" for n in nodes)]), timeout)
    rows = [ln.split() for ln in files["op.txt"].splitlines() if ln.strip()]
    vals = [float(x) for x in rows[1]]
    # wrdata: the scale column, then one column per vector
    v = dict(zip(nodes, vals[1:] if len(vals) == len(nodes) + 1 else vals[1::2]))
    v["0"] = 0.0
    return {c[0]: v[c[1]] - v[c[2]] for c in caps}


@dataclass
class FrequencyDistortion:
    """THD and the output fundamental against frequency at one input level (ngspice).

    Attributes
    ----------
    freq : ndarray
        Frequencies [Hz].
    vout_peak : ndarray
        Output fundamental [V peak] at each frequency.
    thd : ndarray
        THD (H2..H10 over H1, a fraction) at each frequency.
    harmonics_db : ndarray (F, 9)
        H2..H10 in dB re the fundamental.
    vin_peak : float
        Source amplitude [V peak], the one that gives ``level`` at low frequency
        (quasi-statically).
    quasi_static_thd : float
        THD of the quasi-static analysis at that level (the low-frequency limit).
    """

    stage: object
    labels: tuple
    level: float
    vin_peak: float
    freq: np.ndarray
    vout_peak: np.ndarray
    thd: np.ndarray
    harmonics_db: np.ndarray
    quasi_static_thd: float
    slew_fmax: float
    notes: list = field(default_factory=list)

    def to_dict(self) -> dict:
        return {
            "kind": stage_kind(self.stage),
            "title": stage_title(self.stage),
            "tubes": list(self.labels),
            "level_vout_peak_v": self.level,
            "source_peak_v": self.vin_peak,
            "quasi_static_thd_pct": 100 * self.quasi_static_thd,
            "slew_fmax_hz": self.slew_fmax if math.isfinite(self.slew_fmax) else None,
            "points": [{"f_hz": float(f), "vout_peak_v": float(v), "thd_pct": float(100 * t),
                        "h_db": {f"h{k + 2}": float(self.harmonics_db[i, k]) for k in range(self.harmonics_db.shape[1])}}
                       for i, (f, v, t) in enumerate(zip(self.freq, self.vout_peak, self.thd))],
            "simulator": "ngspice (transient, Fourier of the last of 4 periods)",
            "notes": list(self.notes),
            "caution": CAUTION,
        }

    def report(self) -> str:
        lines = [f"THD against frequency at {self.level:g} V peak out (source {self.vin_peak:.4g} V peak), "
                 "ngspice transient", f"  quasi-static THD at this level: {100 * self.quasi_static_thd:.4g} %"
                 + (f"; slew-limited above about {self.slew_fmax / 1e3:.4g} kHz (standing current into the "
                    "output capacitance)" if math.isfinite(self.slew_fmax) else ""), "",
                 f"  {'f':>10} {'Vout pk':>9} {'THD %':>9} {'H2 dB':>7} {'H3 dB':>7}"]
        for i, f in enumerate(self.freq):
            lines.append(f"  {f:10.4g} {self.vout_peak[i]:9.4g} {100 * self.thd[i]:9.4g} "
                         f"{self.harmonics_db[i, 0]:7.1f} {self.harmonics_db[i, 1]:7.1f}")
        lines.extend("  ! " + n for n in self.notes)
        return "\n".join(lines)


def _fourier(log: str):
    m = re.search(r"THD:\s*([0-9.eE+-]+)\s*%", log)
    harm = {}
    for ln in log.splitlines():
        f = ln.split()
        if len(f) == 6 and f[0].isdigit():
            try:
                harm[int(f[0])] = (float(f[2]), float(f[4]))
            except ValueError:
                continue
    if m is None or 1 not in harm:
        raise SimulatorError("ngspice printed no Fourier analysis")
    return float(m.group(1)) / 100.0, harm


def thd_against_frequency(stage, *triodes, vout_peak: float, freq=None, timeout: float = 60.0) -> FrequencyDistortion:
    """THD against frequency at the input level that gives ``vout_peak`` at low frequency.

    Parameters
    ----------
    vout_peak : float
        Output level [V peak] at low frequency (quasi-static) that sets the source amplitude.
    freq : array_like or None
        Frequencies [Hz]; default 100 Hz, 1, 10, 30, 100, 300 kHz and 1 MHz.

    Raises
    ------
    SimulatorMissing
        ngspice is not installed (one line).
    SimulatorError
        ngspice failed on the circuit.
    """
    from .analysis import solve
    from .distortion import analyse

    stage_kind(stage)
    _check_triodes(stage, triodes)
    if isinstance(vout_peak, bool) or not isinstance(vout_peak, (int, float)) or not (math.isfinite(vout_peak) and vout_peak > 0):
        raise StageInputError(f"must be a positive amplitude in volts, got {vout_peak!r}", field="vout_peak")
    freq = np.asarray([100.0, 1e3, 1e4, 3e4, 1e5, 3e5, 1e6] if freq is None else freq, float)
    if freq.ndim != 1 or freq.size == 0 or not np.all(np.isfinite(freq)) or np.any(freq <= 0) or np.any(freq > 1e8):
        raise StageInputError("frequencies must be positive numbers up to 100 MHz", field="freq")
    if _ngspice() is None:
        _run("", timeout)  # raises SimulatorMissing
    d = analyse(stage, *triodes, vout_peak=float(vout_peak))
    fig = solve(stage, *triodes, errors=False, slew_vpeak=float(vout_peak)).figures
    zin = fig["zin"]
    vsrc = d.vin_peak * (stage.rs + zin) / zin
    hold = _held_voltages(stage, triodes, timeout)
    vo, thd, hdb = [], [], []
    for f in freq:
        circuit = stage_netlist(stage, triodes, source=f"DC 0 SIN(0 {vsrc!r} {float(f)!r})", hold=hold)
        period = 1.0 / float(f)
        ctl = [f"set nfreqs={_NHARM}", "set fourgridsize=2048", "set polydegree=1", *_TRAN_OPTIONS,
               f"tran {period / _STEPS!r} {_PERIODS * period!r} 0 {period / _STEPS!r}", f"fourier {float(f)!r} v(out)"]
        log, _ = _run(_deck(circuit, ctl), timeout)
        t, harm = _fourier(log)
        vo.append(harm[1][0])
        thd.append(t)
        hdb.append([20 * math.log10(max(harm.get(k, (0, 0))[1], 1e-15)) for k in range(2, _NHARM + 1)])
    notes = []
    if any(w for w in d.warnings if "grid" in w or "cuts off" in w):
        notes.append("at this level the quasi-static analysis warns: " + "; ".join(d.warnings))
    return FrequencyDistortion(stage, tuple(t.label for t in triodes), float(vout_peak), float(vsrc), freq,
                               np.array(vo), np.array(thd), np.array(hdb), float(d.thd), float(fig["slew_fmax"]), notes)
