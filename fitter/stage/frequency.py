"""Frequency response of a stage: gain and phase from the linearised circuit.

Each tube is replaced by its small-signal model at the operating point the stage solver
finds (a voltage-controlled current source ``gm * vgk`` in parallel with ``rp`` from plate
to cathode) with its interelectrode capacitances ``cgk``, ``cga``, ``cak``; the supplies
are AC ground; coupling, bypass and load capacitors are what the stage description says.
The circuit is written as a list of two-terminal admittances and current sources between
named nodes (:func:`linear_circuit`) and solved by complex nodal analysis, all frequencies
at once (one batched ``numpy.linalg.solve``).  The Miller effect is not put in by hand: it
is the grid-plate capacitance in the nodal equations.

The source is an ideal 1 V generator behind ``rs``; the gain is the voltage at the output
node (the far side of the output coupling capacitor when a load ``rl`` is given) over the
source voltage.  A capacitor left out (None) is, for ``c_in``, ``c_out`` and ``c_top``, a
short at every signal frequency (direct coupling, or the solver's "battery" view) and, for
``ck``, absent (the cathode resistor unbypassed).
"""

from __future__ import annotations

from dataclasses import asdict, dataclass, field

import numpy as np

from ..triode import FittedTriode
from .circuits import CathodeFollower, CommonCathode, Stack, StageInputError, output_node, stage_kind, stage_title, tube_positions
from .solver import _check_triodes

__all__ = ["FrequencyResponse", "linear_circuit", "output_stage_circuit", "response", "F_START", "F_STOP"]

F_START = 1.0  # [Hz]
F_STOP = 1e6  # [Hz]
#: the -3 dB points are searched this far beyond the plotted range
_F_SEARCH = (1e-3, 1e9)


@dataclass
class FrequencyResponse:
    """Gain and phase of a stage against frequency.

    Attributes
    ----------
    freq : ndarray
        Frequencies [Hz].
    gain : ndarray (complex)
        Output voltage over source voltage at each frequency.
    midband : float
        The mid-band gain (capacitors short or open as the band's middle sees them:
        coupling and bypass capacitors short, tube and load capacitances open), signed.
    f_low, f_high : float or None
        The -3 dB points [Hz] below and above the band; None where the gain does not
        fall by 3 dB within 1 mHz .. 1 GHz (a direct-coupled stage has no low corner).
    small_signal : dict
        gm [S] and rp [ohm] of each tube position at the operating point.
    """

    stage: object
    labels: tuple
    freq: np.ndarray
    gain: np.ndarray
    midband: float
    f_low: float | None
    f_high: float | None
    small_signal: dict
    output: str
    notes: list = field(default_factory=list)

    @property
    def title(self) -> str:
        """The stage's name: "Common-cathode stage", "Push-pull output stage", ..."""
        if _is_output_stage(self.stage):
            return f"{self.stage.kind.capitalize()} output stage"
        return stage_title(self.stage)

    @property
    def gain_db(self) -> np.ndarray:
        return 20 * np.log10(np.abs(self.gain))

    @property
    def phase_deg(self) -> np.ndarray:
        """Phase [deg] of the output against the source, unwrapped along the band and placed
        so that at mid-band (the largest gain) it reads within -180..180 (0 for a follower,
        -180 or 180 for an inverting stage): several high-pass corners below the band would
        otherwise carry a whole turn into it."""
        g = np.asarray(self.gain)
        ph = np.unwrap(np.angle(g))
        if ph.size:
            k = int(np.argmax(np.abs(g)))
            ph = ph + (np.angle(g[k]) - ph[k])
        return np.degrees(ph)

    def to_dict(self) -> dict:
        from .. import CAUTION

        out_stage = _is_output_stage(self.stage)
        return {
            "kind": self.stage.kind if out_stage else stage_kind(self.stage),
            "title": self.title,
            "tubes": list(self.labels),
            "output": self.output,
            "midband_gain": self.midband,
            "midband_gain_db": float(20 * np.log10(abs(self.midband))) if self.midband else None,
            "f_low_hz": self.f_low,
            "f_high_hz": self.f_high,
            "small_signal": {p: {"gm_ma_per_v": 1e3 * v["gm"], "rp_ohm": v["rp"]} for p, v in self.small_signal.items()},
            "points": [{"f_hz": float(f), "gain_db": float(g), "phase_deg": float(p)}
                       for f, g, p in zip(self.freq, self.gain_db, self.phase_deg)],
            "circuit": asdict(self.stage) if out_stage else self.stage.to_dict(),
            "notes": list(self.notes),
            "caution": CAUTION,
        }


# ---------------------------------------------------------------------------
# The linear circuit
# ---------------------------------------------------------------------------
#
# Elements are tuples:
#   ("R", a, b, ohms)     ("C", a, b, farads)
#   ("G", a, b, c, d, S)  current S * (v(c) - v(d)) flowing from a to b through the element
# Node "0" is ground (every supply), "src" the 1 V generator.


class _Nodes:
    """Node names with aliases: a zero resistor or a short capacitor joins two nodes."""

    def __init__(self):
        self.alias = {}

    def join(self, a, b):
        self.alias[self.find(a)] = self.find(b)

    def find(self, a):
        while a in self.alias:
            a = self.alias[a]
        return a


def _tube(el, plate, grid, cathode, st, gm, rp):
    el.append(("G", plate, cathode, grid, cathode, gm))
    if np.isfinite(rp):
        el.append(("R", plate, cathode, rp))
    for a, b, c in ((grid, cathode, st.cgk), (grid, plate, st.cga), (plate, cathode, st.cak)):
        if c > 0:
            el.append(("C", a, b, c))


def linear_circuit(stage, small_signal: dict) -> tuple[list, str]:
    """The stage's small-signal circuit: (elements, output node), nodes already joined.

    ``small_signal`` maps each tube position (``"tube"``, or ``"bottom"`` and ``"top"``)
    to ``{"gm": S, "rp": ohm}``.
    """
    el = []
    nodes = _Nodes()
    st = stage
    # source, coupling and grid leak
    if st.rs > 0:
        el.append(("R", "src", "in", st.rs))
    else:
        nodes.join("in", "src")
    if st.c_in is not None:
        el.append(("C", "in", "grid", st.c_in))
    else:
        nodes.join("grid", "in")
    if isinstance(st, CathodeFollower) and st.r_upper is not None:
        el.append(("R", "grid", "div", st.rg))
        el += [("R", "div", "0", st.r_upper), ("R", "div", "0", st.r_lower)]
    else:
        el.append(("R", "grid", "0", st.rg))

    if isinstance(st, CommonCathode):
        el.append(("R", "plate", "0", st.ra))
        _cathode_to_ground(el, nodes, "cathode", st.rk, st.ck)
        _tube(el, "plate", "grid", "cathode", st, **small_signal["tube"])
    elif isinstance(st, CathodeFollower):
        if st.ra > 0:
            el.append(("R", "plate", "0", st.ra))
        else:
            nodes.join("plate", "0")
        el.append(("R", "cathode", "0", st.rk))
        _tube(el, "plate", "grid", "cathode", st, **small_signal["tube"])
    elif isinstance(st, Stack):
        _cathode_to_ground(el, nodes, "cathode_bottom", st.rk, st.ck)
        if st.r_mid > 0:
            el.append(("R", "plate_bottom", "mid", st.r_mid))
        else:
            nodes.join("mid", "plate_bottom")
        el.append(("R", "mid", "cathode_top", st.r_top))
        if st.top_grid == "coupled":
            if st.c_top is not None:
                el.append(("C", "plate_bottom", "grid_top", st.c_top))
            else:
                nodes.join("grid_top", "plate_bottom")
            el.append(("R", "grid_top", "mid", st.rg_top))
        else:
            nodes.join("grid_top", "plate_bottom")
        _tube(el, "plate_bottom", "grid", "cathode_bottom", st, **small_signal["bottom"])
        _tube(el, "0", "grid_top", "cathode_top", st, **small_signal["top"])
    else:
        stage_kind(st)  # raises for anything else
    node = output_node(st)
    out = node
    if st.rl is not None:
        if st.c_out is not None:
            el.append(("C", node, "out", st.c_out))
            out = "out"
        el.append(("R", out, "0", st.rl))
    if st.c_load > 0:
        el.append(("C", out, "0", st.c_load))
    # resolve aliases
    res = []
    for e in el:
        if e[0] == "G":
            res.append((e[0], *(nodes.find(x) for x in e[1:5]), e[5]))
        else:
            a, b = nodes.find(e[1]), nodes.find(e[2])
            if a != b:
                res.append((e[0], a, b, e[3]))
    return res, nodes.find(out)


def _is_output_stage(stage) -> bool:
    from .output import PushPullOutput, SingleEndedOutput

    return isinstance(stage, (SingleEndedOutput, PushPullOutput))


def output_stage_circuit(stage, small_signal: dict) -> tuple[list, str]:
    """The small-signal circuit of an output stage (:mod:`fitter.stage.output`): (elements,
    output node ``"sec"``), nodes already joined.

    Each tube is gm, rp (``small_signal[position]``) with its capacitances; the grid is fed
    from the generator (push-pull: grid A in phase, grid B from the antiphase generator
    ``"nsrc"``) through ``rs`` and ``c_in``, with ``rg`` to AC ground.  The transformer is
    ideal: the primary's DC resistance in series, the reflected load across the primary
    (single-ended) or plate to plate with the centre tap held at AC ground (push-pull, a
    ``"T"`` element), the magnetising inductance ``l_primary`` across the whole primary, the
    leakage inductance ``l_leak`` in series (half in each side, push-pull) and the winding
    capacitance ``c_winding`` across the primary at the plates.
    The output is the secondary voltage (the primary's over the turns ratio), positive when
    the plate (A) swings down, as :func:`fitter.stage.output.waveforms` counts ``v_load``;
    it is read off by a probe (a unit transconductance into 1 ohm) that loads nothing.
    """
    el = []
    nodes = _Nodes()
    st = stage
    n = st.ratio
    se = st.kind == "single-ended"
    sides = (("", "src"),) if se else (("_a", "src"), ("_b", "nsrc"))
    for tag, gen in sides:
        if st.rs > 0:
            el.append(("R", gen, "in" + tag, st.rs))
        else:
            nodes.join("in" + tag, gen)
        if st.c_in is not None:
            el.append(("C", "in" + tag, "grid" + tag, st.c_in))
        else:
            nodes.join("grid" + tag, "in" + tag)
        if st.rg is not None:
            el.append(("R", "grid" + tag, "0", st.rg))
    if st.rk is None or (st.bypassed and st.ck is None):
        nodes.join("cathode", "0")
    else:
        el.append(("R", "cathode", "0", st.rk))
        if st.ck is not None:
            el.append(("C", "cathode", "0", st.ck))
    if se:
        _tube(el, "plate", "grid", "cathode", st, **small_signal["tube"])
        if st.c_winding > 0:
            el.append(("C", "plate", "0", st.c_winding))
        if st.r_primary > 0:
            el.append(("R", "plate", "w", st.r_primary))
        else:
            nodes.join("w", "plate")
        if st.l_leak > 0:
            el.append(("L", "w", "x", st.l_leak))
        else:
            nodes.join("x", "w")
        el.append(("R", "x", "0", st.reflected_load))
        if st.l_primary is not None:
            el.append(("L", "x", "0", st.l_primary))
        el.append(("G", "0", "sec", "0", "x", 1.0 / n))
    else:
        for tag, pos in (("_a", "A"), ("_b", "B")):
            _tube(el, "plate" + tag, "grid" + tag, "cathode", st, **small_signal[pos])
            if st.r_primary > 0:
                el.append(("R", "plate" + tag, "w" + tag, st.r_primary / 2.0))
            else:
                nodes.join("w" + tag, "plate" + tag)
            if st.l_leak > 0:
                el.append(("L", "w" + tag, "x" + tag, st.l_leak / 2.0))
            else:
                nodes.join("x" + tag, "w" + tag)
        if st.c_winding > 0:
            el.append(("C", "plate_a", "plate_b", st.c_winding))
        el.append(("R", "x_a", "x_b", st.reflected_load))
        if st.l_primary is not None:
            el.append(("L", "x_a", "x_b", st.l_primary))
        el.append(("T", "x_a", "x_b"))
        el.append(("G", "0", "sec", "x_b", "x_a", 1.0 / n))
    el.append(("R", "sec", "0", 1.0))
    res = []
    for e in el:
        if e[0] == "G":
            res.append((e[0], *(nodes.find(x) for x in e[1:5]), e[5]))
        elif e[0] == "T":
            res.append((e[0], nodes.find(e[1]), nodes.find(e[2])))
        else:
            a, b = nodes.find(e[1]), nodes.find(e[2])
            if a != b:
                res.append((e[0], a, b, e[3]))
    return res, "sec"


def _output_small_signal(stage, triodes):
    from .output import _banks, _idle

    banks = _banks(stage, triodes)
    op = _idle(stage, banks)
    ss = {}
    for b, p in zip(banks, stage.positions):
        gva, gvg = b.gradient(np.array(op[f"{p}.va"]), np.array(op[f"{p}.vgk"]))
        ss[p] = {"gm": float(gvg), "rp": 1.0 / float(gva) if float(gva) > 0 else float("inf")}
    return ss


def _cathode_to_ground(el, nodes, cathode, rk, ck):
    if rk > 0:
        el.append(("R", cathode, "0", rk))
        if ck is not None:
            el.append(("C", cathode, "0", ck))
    else:
        nodes.join(cathode, "0")


def _solve_nodal(elements, out, s):
    """Voltage at ``out`` for the 1 V source at the complex frequencies ``s`` (an array):
    nodal analysis, one admittance matrix per frequency, solved in one batch.

    Besides R, C and G elements: ``("L", a, b, henry)``; ``("T", a, b)``, a centre-tapped
    ideal winding with its tap at AC ground (it holds v(a) = -v(b) and sinks any equal
    currents from a and b into the tap: one extra unknown, modified nodal analysis); node
    ``"nsrc"`` is the generator in antiphase (-1 V)."""
    known = {"0": 0.0, "src": 1.0, "nsrc": -1.0}
    names = sorted({x for e in elements for x in (e[1:5] if e[0] == "G" else e[1:3])} - set(known))
    if out in known:
        return np.full(np.shape(s), known[out], complex)
    idx = {n: i for i, n in enumerate(names)}
    taps = [e for e in elements if e[0] == "T"]
    n = len(names) + len(taps)
    s = np.asarray(s, complex)
    Y = np.zeros(s.shape + (n, n), complex)
    rhs = np.zeros(s.shape + (n,), complex)

    def stamp(r, c, y):
        # current leaving node r for a voltage at node c
        if r in idx:
            if c in idx:
                Y[..., idx[r], idx[c]] += y
            else:
                rhs[..., idx[r]] -= y * known[c]

    k = len(names)
    for e in elements:
        if e[0] == "T":
            # extra unknown j: the current from each end into the tap; row: v(a) + v(b) = 0
            for x in e[1:3]:
                Y[..., idx[x], k] += 1.0
                Y[..., k, idx[x]] += 1.0
            k += 1
            continue
        if e[0] == "G":
            _, a, b, c, d, g = e
            # current g (v(c) - v(d)) leaves a, enters b
            stamp(a, c, g)
            stamp(a, d, -g)
            stamp(b, c, -g)
            stamp(b, d, g)
            continue
        kind, a, b, v = e
        if kind == "L":
            with np.errstate(divide="ignore"):
                y = np.where(s == 0, 1e30, 1.0 / np.where(s == 0, 1.0, s * v))
        else:
            y = (1.0 / v) if kind == "R" else s * v
        stamp(a, a, y)
        stamp(a, b, -y)
        stamp(b, b, y)
        stamp(b, a, -y)
    v = np.linalg.solve(Y, rhs[..., None])[..., 0]
    return v[..., idx[out]]


def _small_signal(stage, triodes):
    from .analysis import solve

    r = solve(stage, *triodes, errors=False)
    return {p: {"gm": r.figures[p + ".gm"], "rp": r.figures[p + ".rp"]} for p in tube_positions(stage)}


def response(stage, *triodes: FittedTriode, freq=None, points_per_decade: int = 40) -> FrequencyResponse:
    """Gain and phase of ``stage`` with the given tubes from 1 Hz to 1 MHz.

    Parameters
    ----------
    stage : CommonCathode, CathodeFollower, Stack, SingleEndedOutput or PushPullOutput
    *triodes : FittedTriode
        One tube, bottom then top for a stack, A then B for a push-pull.
    freq : array_like or None
        Frequencies [Hz]; default ``points_per_decade`` per decade from 1 Hz to 1 MHz.

    Returns
    -------
    FrequencyResponse
    """
    out_stage = _is_output_stage(stage)
    if not out_stage:
        stage_kind(stage)
        _check_triodes(stage, triodes)
    if freq is None:
        if not (isinstance(points_per_decade, int) and 1 <= points_per_decade <= 1000):
            raise StageInputError(f"must be a whole number from 1 to 1000, got {points_per_decade!r}",
                                  field="points_per_decade")
        freq = np.logspace(0, 6, 6 * points_per_decade + 1)
    freq = np.asarray(freq, float)
    if freq.ndim != 1 or freq.size == 0 or not np.all(np.isfinite(freq)) or np.any(freq <= 0):
        raise StageInputError("frequencies must be positive finite numbers", field="freq")
    if out_stage:
        ss = _output_small_signal(stage, triodes)
        elements, out = output_stage_circuit(stage, ss)
    else:
        ss = _small_signal(stage, triodes)
        elements, out = linear_circuit(stage, ss)
    gain = _solve_nodal(elements, out, 2j * np.pi * freq)
    mid_el, mid_nodes = _midband(stage, ss)
    midband = float(np.real(_solve_nodal(mid_el, mid_nodes, np.array([0.0]))[0]))
    f_low, f_high = _corners(elements, out, abs(midband))
    notes = []
    if not any(e[0] in ("C", "L") for e in elements):
        notes.append("no capacitance or inductance given: the response is flat (give the tube capacitances, "
                     "the load capacitance, the coupling capacitors" + (", the primary and leakage inductances"
                                                                        if out_stage else "") + ")")
    if out_stage:
        where = "secondary"
    else:
        where = output_node(stage) if stage.rl is None else "load"
    return FrequencyResponse(stage, tuple(t.label for t in triodes), freq, gain, midband, f_low, f_high, ss,
                             where, notes)


def _midband(stage, ss):
    """The mid-band circuit: the same stage with every coupling capacitor a short
    (None), the bypass capacitor a short (``ck`` then rk → 0 for AC) and the tube and
    load capacitances open; returns (elements, output node)."""
    from dataclasses import replace

    if _is_output_stage(stage):
        # coupling and bypass capacitors short (ck None with bypassed: an ideal bypass), tube
        # capacitances open, the magnetising inductance open
        return output_stage_circuit(replace(stage, c_in=None, ck=None, cgk=0.0, cga=0.0, cak=0.0,
                                            l_primary=None, l_leak=0.0, c_winding=0.0), ss)
    kw = dict(c_in=None, c_out=None, cgk=0.0, cga=0.0, cak=0.0, c_load=0.0)
    if isinstance(stage, Stack):
        kw["c_top"] = None
    st = replace(stage, **kw)
    el, out = linear_circuit(st, ss)
    if getattr(stage, "ck", None) is not None:
        # a bypassed cathode is AC ground in mid-band: the capacitor as a short
        cath = "cathode" if isinstance(stage, CommonCathode) else "cathode_bottom"
        el = _short(el, cath, "0")
        out = "0" if out == cath else out
    return el, out


def _short(elements, a, b):
    res = []
    for e in elements:
        if e[0] == "G":
            res.append((e[0], *(b if x == a else x for x in e[1:5]), e[5]))
        else:
            x, y = (b if e[1] == a else e[1]), (b if e[2] == a else e[2])
            if x != y:
                res.append((e[0], x, y, e[3]))
    return res


def _corners(elements, out, mid):
    """-3 dB points below and above the band: first crossings of |A| = mid/sqrt(2)
    walking out from the frequency of the largest gain, refined by bisection on log f."""
    if mid == 0:
        return None, None
    target = mid / np.sqrt(2.0)
    f = np.logspace(np.log10(_F_SEARCH[0]), np.log10(_F_SEARCH[1]), 12 * 40 + 1)
    a = np.abs(_solve_nodal(elements, out, 2j * np.pi * f))
    k = int(np.argmax(a))
    below = np.nonzero(a[:k + 1] < target)[0]
    above = np.nonzero(a[k:] < target)[0]
    lo = hi = None
    if below.size:
        j = below[-1]
        lo = _bisect(elements, out, target, f[j], f[j + 1])
    if above.size:
        j = k + above[0]
        hi = _bisect(elements, out, target, f[j - 1], f[j])
    return lo, hi


def _bisect(elements, out, target, fa, fb):
    """The crossing of |A| = target between fa and fb, to 1e-9 in log f (|A| - target
    changes sign once there); a grid of 33 points per pass, three passes."""
    la, lb = np.log10(fa), np.log10(fb)
    for _ in range(4):
        g = np.linspace(la, lb, 33)
        d = np.abs(_solve_nodal(elements, out, 2j * np.pi * 10 ** g)) - target
        s = np.nonzero(np.sign(d[:-1]) != np.sign(d[1:]))[0]
        if not s.size:
            break
        i = s[0]
        la, lb = g[i], g[i + 1]
    # linear interpolation in the last bracket
    da = abs(_solve_nodal(elements, out, np.array([2j * np.pi * 10 ** la]))[0]) - target
    db = abs(_solve_nodal(elements, out, np.array([2j * np.pi * 10 ** lb]))[0]) - target
    x = la if db == da else la + (lb - la) * da / (da - db)
    return float(10 ** x)
