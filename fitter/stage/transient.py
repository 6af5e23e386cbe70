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

__all__ = ["SimulatorMissing", "SimulatorError", "FrequencyDistortion", "thd_against_frequency", "stage_netlist",
           "output_netlist", "output_thd_against_frequency"]

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


#: magnetising inductance of the output transformer's whole primary when the stage gives
#: none [H]: 60 Mohm at 1 kHz against reflected loads of kilohms, and over a few periods its
#: current stays at the idle current (the ideal transformer of the quasi-static figures)
L_MAGNETISING = 1e4


def _is_output(stage) -> bool:
    from .output import PushPullOutput, SingleEndedOutput

    return isinstance(stage, (SingleEndedOutput, PushPullOutput))


def output_netlist(stage, triodes, *, amplitude: float, freq: float, hold: dict | None = None) -> str:
    """A single-ended or push-pull output stage around its tubes' exported subcircuits, the
    loudspeaker at ``v(out)``; the source(s) a sine of ``amplitude`` [V peak] at ``freq`` [Hz]
    (push-pull: grid B's in antiphase).

    The output transformer is an ideal transformer made of controlled sources: the secondary
    voltage is the primary's over n (an E source) and the primary carries the secondary's
    current over n (an F source); the magnetising inductance (``l_primary``, else
    :data:`L_MAGNETISING`) lies across the primary and carries the DC, so no DC reaches the
    secondary.  Why controlled sources rather than coupled inductors: the ratio is exact at
    every frequency and nothing but the stage's own ``l_primary``, ``l_leak`` and
    ``c_winding`` shapes the response (coupled inductors need k < 1, which is itself a
    leakage, and k = 1 makes their inductance matrix singular).  The push-pull's centre tap:
    half B's voltage equals half A's (an E source), half A carries half B's current plus
    2/n of the secondary's (F sources), so the ampere-turns balance and only the DC imbalance
    flows in the magnetising inductance.  The primary's DC resistance is ``r_primary`` (half in
    each side, push-pull), the leakage inductance ``l_leak`` lies between the plate and the
    ideal transformer (push-pull: half in each side; behind the controlled sources, on the
    secondary, ngspice's first time steps failed), the winding capacitance lies across the primary
    (single-ended plate to AC ground, push-pull plate to plate).  Bias: a fixed grid bias at
    each grid (through ``rg`` with a coupling capacitor), or the cathode resistor (shared,
    push-pull).  ``hold`` maps the coupling/bypass capacitors (``CinA``, ``CinB`` or ``Cin``,
    ``Ck``) to their DC voltage; an ideal bypass (``ck`` None) is held like a real one, and
    None writes them as 1 F capacitors (the operating point).
    """
    from ..export import spice_subcircuit

    caps = dict(cgk=stage.cgk or None, cga=stage.cga or None, cak=stage.cak or None)
    pp = stage.kind == "push-pull"
    names = ["PBTUBE1", "PBTUBE2"][:len(triodes)]
    L = [spice_subcircuit(t, name=n, **caps).rstrip() for t, n in zip(triodes, names)]
    n = float(stage.ratio)
    lm = float(stage.l_primary) if stage.l_primary is not None else L_MAGNETISING
    vg = float(stage._vg)
    amp, f = float(amplitude), float(freq)

    def cap(name, a, b):
        L.append(f"{name} {a} {b} 1.0" if hold is None else f"V{name} {a} {b} DC {float(hold[name])!r}")

    def grid(tag, sign):
        # the source carries the bias as its DC value when there is no coupling capacitor
        dc = 0.0 if stage.c_in is not None else vg
        L.append(f"Vin{tag} src{tag} 0 DC {dc!r} SIN({dc!r} {sign * amp!r} {f!r})")
        L.append(f"Rs{tag} src{tag} in{tag} {float(stage.rs)!r}" if stage.rs > 0 else f"Vrs{tag} src{tag} in{tag} DC 0")
        if stage.c_in is not None:
            cap(f"Cin{tag}" if pp else "Cin", f"in{tag}", f"g{tag}")
        else:
            L.append(f"Vcin{tag} in{tag} g{tag} DC 0")
        if stage.rg is not None:
            L.append(f"Rg{tag} g{tag} nbias {float(stage.rg)!r}")

    L.append(f"Vbias nbias 0 DC {vg!r}")
    if stage.rk is None:
        L.append("Vk k 0 DC 0")
    else:
        L.append(f"Rk k 0 {float(stage.rk)!r}")
        if stage.bypassed:
            cap("Ck", "k", "0")
    # secondary: E source, a 0 V probe for its current, the loudspeaker (the second 0 V
    # source is not idle: without it ngspice's step control stalled at 20 kHz in a push-pull
    # with Miller capacitances, measured; with it the run took 1 s)
    sec = ["VsS s2 s3 DC 0", "Vsec s3 out DC 0"]
    sec.append(f"Rspk out 0 {float(stage.speaker)!r}")
    if not pp:
        grid("", 1.0)
        L.append(f"VB bplus 0 DC {float(stage.b_plus)!r}")
        L.append(f"Rdc bplus ct {float(stage.r_primary)!r}" if stage.r_primary > 0 else "Vdc bplus ct DC 0")
        # (a zero-volt source between plate and transformer in place of no leakage upset
        # ngspice's first time steps as the leakage on the secondary did: the plate is then
        # the transformer's node itself)
        xp = "xp" if stage.l_leak > 0 else "plate"
        L += [f"LM ct {xp} {lm!r}", f"ES s2 0 ct {xp} {1.0 / n!r}", f"FS ct {xp} VsS {1.0 / n!r}"]
        if stage.l_leak > 0:
            L.append(f"Lleak xp plate {float(stage.l_leak)!r}")
        L += sec
        if stage.c_winding > 0:
            L.append(f"Cw plate 0 {float(stage.c_winding)!r}")
        L.append(f"X1 plate g k {names[0]}")
    else:
        grid("A", 1.0)
        grid("B", -1.0)
        r = float(stage.r_primary) / 2.0
        L.append(f"VB ct 0 DC {float(stage.b_plus)!r}")
        L += [f"LM ct xa {lm / 4.0!r}", "FA ct xa VsB 1", f"FS ct xa VsS {2.0 / n!r}",
              "EB xb2 ct ct xa 1", "VsB xb2 xb DC 0", f"ES s2 0 ct xa {2.0 / n!r}"]
        for side in ("A", "B"):
            x, pl = f"x{side.lower()}", f"p{side.lower()}"
            if stage.l_leak > 0:
                L.append(f"R{side} {x} r{side} {max(r, 1e-3)!r}")  # (a wire: 1 mOhm)
                L.append(f"Ll{side} r{side} {pl} {float(stage.l_leak) / 2.0!r}")
            else:
                L.append(f"R{side} {x} {pl} {max(r, 1e-3)!r}")
        L += sec
        if stage.c_winding > 0:
            L.append(f"Cw pa pb {float(stage.c_winding)!r}")
        L += [f"XA pa gA k {names[0]}", f"XB pb gB k {names[1]}"]
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


#: the capacitors held at their DC voltage in a transient run (coupling and bypass)
_HELD = ("Cin", "Cout", "Ck", "Ctop", "CinA", "CinB")


def _held_voltages(stage, triodes, timeout) -> dict:
    """DC voltage across each coupling/bypass capacitor at ngspice's own operating point."""
    circuit = (output_netlist(stage, triodes, amplitude=0.0, freq=1.0) if _is_output(stage)
               else stage_netlist(stage, triodes, source="DC 0"))
    caps = [ln.split() for ln in circuit.splitlines() if ln[:1] == "C" and ln.split()[0] in _HELD]
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

    @property
    def output_stage(self) -> bool:
        """An output stage: ``level`` is an output power [W], ``vout_peak`` the
        loudspeaker's voltage [V peak]."""
        return _is_output(self.stage)

    def to_dict(self) -> dict:
        out = self.output_stage
        return {
            "kind": self.stage.kind if out else stage_kind(self.stage),
            "title": f"{self.stage.kind.capitalize()} output stage" if out else stage_title(self.stage),
            "tubes": list(self.labels),
            **({"level_w": self.level} if out else {"level_vout_peak_v": self.level}),
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
        where = (f"{self.level:g} W into the loudspeaker (source {self.vin_peak:.4g} V peak"
                 f"{' per grid' if self.stage.kind == 'push-pull' else ''})" if self.output_stage else
                 f"{self.level:g} V peak out (source {self.vin_peak:.4g} V peak)")
        lines = [f"THD against frequency at {where}, "
                 "ngspice transient", f"  quasi-static THD at this level: {100 * self.quasi_static_thd:.4g} %"
                 + (f"; slew-limited above about {self.slew_fmax / 1e3:.4g} kHz (standing current into the "
                    "output capacitance)" if math.isfinite(self.slew_fmax) else ""), "",
                 f"  {'f':>10} {'Vspk pk' if self.output_stage else 'Vout pk':>9} {'THD %':>9} {'H2 dB':>7} "
                 f"{'H3 dB':>7}"]
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


def _check_freq(freq, default):
    freq = np.asarray(default if freq is None else freq, float)
    if freq.ndim != 1 or freq.size == 0 or not np.all(np.isfinite(freq)) or np.any(freq <= 0) or np.any(freq > 1e8):
        raise StageInputError("frequencies must be positive numbers up to 100 MHz", field="freq")
    return freq


def _transient(circuit_at, freq, timeout):
    """(fundamental [V peak], THD, H2..H10 [dB]) of v(out) at each frequency."""
    vo, thd, hdb = [], [], []
    for f in freq:
        period = 1.0 / float(f)
        ctl = [f"set nfreqs={_NHARM}", "set fourgridsize=2048", "set polydegree=1", *_TRAN_OPTIONS,
               f"tran {period / _STEPS!r} {_PERIODS * period!r} 0 {period / _STEPS!r}", f"fourier {float(f)!r} v(out)"]
        log, _ = _run(_deck(circuit_at(float(f)), ctl), timeout)
        t, harm = _fourier(log)
        vo.append(harm[1][0])
        thd.append(t)
        hdb.append([20 * math.log10(max(harm.get(k, (0, 0))[1], 1e-15)) for k in range(2, _NHARM + 1)])
    return np.array(vo), np.array(thd), np.array(hdb)


def output_thd_against_frequency(stage, *triodes, power: float, freq=None, timeout: float = 60.0) -> FrequencyDistortion:
    """THD against frequency of a single-ended or push-pull output stage (ngspice transient
    of :func:`output_netlist`) at the grid drive that gives ``power`` [W] into the
    loudspeaker quasi-statically (:func:`fitter.stage.output.solve_output`'s power sweep,
    refined by a secant step); that drive is held at every frequency, so the fall of the
    output at the ends of the band shows beside its distortion.  With ``rs`` and ``rg`` the
    source is raised by their divider (the grid takes no current below the onset).

    Parameters
    ----------
    power : float
        Output power [W] at mid-band (at most the stage's largest output).
    freq : array_like or None
        Frequencies [Hz]; default 20 Hz, 100 Hz, 1, 10, 20, 50 and 100 kHz.

    Raises
    ------
    StageInputError
        ``power`` not positive or above the largest output (field ``power``), bad ``freq``.
    SimulatorMissing, SimulatorError
        As :func:`thd_against_frequency`.
    """
    from .output import _banks, _idle, _spectra, _sweep_from, solve_output

    if isinstance(power, bool) or not isinstance(power, (int, float)) or not (math.isfinite(power) and power > 0):
        raise StageInputError(f"must be a positive output power in watts, got {power!r}", field="power")
    freq = _check_freq(freq, [20.0, 100.0, 1e3, 1e4, 2e4, 5e4, 1e5])
    if _ngspice() is None:
        _run("", timeout)  # raises SimulatorMissing
    res = solve_output(stage, *triodes)
    sw = res.sweep
    if power > sw.power[-1]:
        raise StageInputError(f"{power:g} W is above the largest output before {res.figures['limit']} "
                              f"({sw.power[-1]:.3g} W)", field="power")
    banks = _banks(stage, triodes)
    op = _idle(stage, banks)
    # the drive for that power: interpolated in the sweep (power grows with the drive), then
    # secant steps on sqrt(power), which is nearly linear in the drive
    x = float(np.interp(math.sqrt(power), np.sqrt(np.concatenate([[0.0], sw.power])), np.concatenate([[0.0], sw.vin])))
    for _ in range(3):
        s = _sweep_from(stage, [x], _spectra(stage, banks, op, [x])[1])
        px = float(s.power[0])
        if abs(px - power) <= 1e-9 * power:
            break
        x *= math.sqrt(power / px)
    qs_thd = float(s.thd[0])
    vsrc = x * ((stage.rs + stage.rg) / stage.rg if stage.rg is not None else 1.0)
    hold = _held_voltages(stage, triodes, timeout)
    from .output import _cathode_at, _shifts

    if _shifts(stage):
        # the push-pull's shared bypass capacitor settles at Rk times the mean current at this
        # level, not at the idle voltage: held there (the settling itself is checked against
        # ngspice's long transient in tests/test_transient_output.py)
        hold["Ck"] = float(_cathode_at(stage, banks, op, [x])[0][0])
    vo, thd, hdb = _transient(lambda f: output_netlist(stage, triodes, amplitude=vsrc, freq=f, hold=hold), freq, timeout)
    notes = []
    if stage.l_primary is None:
        notes.append(f"no primary inductance given: the transformer's magnetising inductance is taken as "
                     f"{L_MAGNETISING:g} H (no low-frequency fall)")
    return FrequencyDistortion(stage, tuple(t.label for t in triodes), float(power), float(vsrc), freq,
                               vo, thd, hdb, qs_thd, math.nan, notes)
