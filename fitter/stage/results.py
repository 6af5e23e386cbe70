"""Results of stage analyses: :class:`StageResult` (one set of tubes) and
:class:`SpreadResult` (min / median / max over many units), with ``to_dict()`` and the
readable report.

Reports name circuit fields through ``name`` (a function field -> words, default the
field itself), so each front end shows its own words for them (``--cgk`` on the command line).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from .. import CAUTION
from .circuits import CathodeFollower, CommonCathode, _output_nodes, output_node, stage_kind, stage_title, tube_positions

__all__ = ["StageResult", "SpreadResult"]


# ---------------------------------------------------------------------------
# Results
# ---------------------------------------------------------------------------

# flat figure name -> (json name, display scale, display unit, label)
def _describe(key: str):
    if key.startswith("node."):
        n = key[5:]
        return f"v{n}_v", 1.0, "V", f"{n.replace('_', ' ')} voltage"
    if key.startswith("gain."):
        n = key[5:]
        return f"gain_{n}", 1.0, "", f"gain to {n.replace('_', ' ')}"
    if key.startswith("zout."):
        n = key[5:]
        return f"zout_{n}_ohm", 1.0, "ohm", f"output impedance at {n.replace('_', ' ')}"
    if key.startswith("f_low.") or key.startswith("f_high."):
        a, b = key.split(".")
        return f"{a}_{b}_hz", 1.0, "Hz", f"{'low' if a == 'f_low' else 'high'} corner ({b.replace('_', ' ')})"
    if "." in key:
        pos, q = key.split(".")
        scale, unit, name = {
            "va": (1.0, "V", "va_v"), "vgk": (1.0, "V", "vgk_v"), "ia": (1e3, "mA", "ia_ma"),
            "pa": (1.0, "W", "pa_w"), "gm": (1e3, "mA/V", "gm_ms"), "rp": (1.0, "ohm", "rp_ohm"),
            "mu": (1.0, "", "mu"), "vhk": (1.0, "V", "vhk_v"),
        }[q]
        return f"{pos}.{name}", scale, unit, f"{pos} {q}"
    return {
        "ia": ("ia_ma", 1e3, "mA", "standing current"),
        "gain": ("gain", 1.0, "", "mid-band gain"),
        "gain_db": ("gain_db", 1.0, "dB", "mid-band gain"),
        "zout": ("zout_ohm", 1.0, "ohm", "output impedance"),
        "zin": ("zin_ohm", 1.0, "ohm", "input resistance"),
        "cin": ("cin_pf", 1e12, "pF", "input capacitance"),
        "c_out_node": ("c_out_node_pf", 1e12, "pF", "capacitance at the output"),
        "slew_current": ("slew_current_ma", 1e3, "mA", "slew current"),
        "slew_vpeak": ("slew_vpeak_v", 1.0, "V", "slew check amplitude"),
        "slew_fmax": ("slew_fmax_hz", 1.0, "Hz", "slew-limited frequency"),
    }[key]


def _num(x):
    x = float(x)
    return x if math.isfinite(x) else None


_ASSUMPTIONS = [
    "DC: capacitors open, no grid current; small signal: mid-band (coupling and bypass "
    "capacitors short, interelectrode capacitances ignored except for the input capacitance "
    "and the corners)",
    "output impedance is seen at the output node with the load removed",
    "corner frequencies are single-pole estimates, one capacitor at a time",
    "slew limit: the standing current is what the passive side can put into the output "
    "capacitance (class-A limit of the weaker direction), f = I / (2 pi C Vpeak)",
]


@dataclass
class StageResult:
    """Figures of one stage with one set of tubes (SI inside; display units in to_dict).

    Attributes
    ----------
    stage : the stage description
    labels : tuple of str
        Unit label of each tube position.
    models : tuple of str
    figures : dict
        Flat figure name -> value, SI units (see :meth:`to_dict` for the names).
    errors : dict
        Flat figure name -> one-sigma error from the fit covariance (NaN: unknown).
    warnings : list of str
    assumptions : list of str
    """

    stage: object
    triodes: tuple
    figures: dict
    errors: dict
    warnings: list
    assumptions: list
    error_note: str = ""

    @property
    def labels(self):
        return tuple(t.label for t in self.triodes)

    @property
    def positions(self):
        return tube_positions(self.stage)

    def __getitem__(self, key):
        return self.figures[key]

    def to_dict(self) -> dict:
        """JSON-ready figures in the trade's display units.

        Top level: ``ia_ma``, ``gain`` (mid-band, signed, to the output), ``gain_db``,
        ``zout_ohm``, ``v<node>_v`` for every node (to ground), ``gain_<node>``,
        ``zout_<node>_ohm``, ``zin_ohm``, ``cin_pf``, ``f_low_<cap>_hz``,
        ``f_high_output_hz`` / ``f_high_input_hz``, ``slew_current_ma``,
        ``slew_vpeak_v``, ``slew_fmax_hz``; ``nodes_v``; ``tubes`` (per position:
        label, model, va_v, vgk_v, ia_ma, pa_w, pa_max_w, gm_ms, rp_ohm, mu, vhk_v,
        vhk_max_v); ``errors`` (same names, one sigma, null where unknown);
        ``warnings``, ``assumptions``, ``caution`` and ``circuit``.
        """
        d = {"stage": stage_kind(self.stage), "output": output_node(self.stage)}
        tubes = {}
        for pos, t in zip(self.positions, self.triodes):
            tubes[pos] = {"label": t.label, "model": t.model.name,
                          "pa_max_w": self.stage.pa_max, "vhk_max_v": self.stage.vhk_max}
        nodes = {}
        errors = {}
        for key, v in self.figures.items():
            name, scale, _, _ = _describe(key)
            val = _num(v * scale)
            err = self.errors.get(key, np.nan)
            if "." in name:
                pos, q = name.split(".")
                tubes[pos][q] = val
            else:
                d[name] = val
            if key.startswith("node."):
                nodes[key[5:]] = val
            errors[name if "." not in name else f"tubes.{name}"] = _num(err * scale)
        d["nodes_v"] = nodes
        d["tubes"] = tubes
        d["errors"] = errors
        d["warnings"] = list(self.warnings)
        d["assumptions"] = list(self.assumptions)
        d["caution"] = CAUTION
        d["circuit"] = self.stage.to_dict()
        return d

    def report(self, name=None) -> str:
        """The readable bench report (what the CLI prints).

        ``name`` turns a circuit field (``"pa_max"``, ``"cgk"``) into the words of the front
        end that shows the report (``"--pa-max"``); default: the field's own name.
        """
        return _report(self, name or _field_name)


def _fmt(v, err=None, unit="", digits=4):
    if v is None or not np.isfinite(v):
        return "n/a" if v is None or np.isnan(v) else ("inf" if v > 0 else "-inf")
    s = f"{v:.{digits}g}"
    if err is not None and np.isfinite(err) and err > 0:
        s += f" ± {err:.2g}"
    return s + (f" {unit}" if unit else "")


def _eng(v, unit=""):
    from ..units import format_value

    if v is None or not np.isfinite(v):
        return "inf" if v is not None and v > 0 else "n/a"
    import re

    if not unit:
        return format_value(float(v))
    if unit == "ohm" and abs(v) < 1.0:
        # "917 mohm" would read as megohms
        return f"{float(v):.3g} ohm"
    # "46.19 kHz", "57.07 kohm", "22 uF": a space between the number and prefix + unit
    return re.sub(r"^([-+]?[\d.]+(?:e[-+]?\d+)?)", r"\1 ", format_value(float(v), unit)).rstrip()


def _circuit_line(st) -> str:
    parts = [f"B+ {st.b_plus:g} V"]
    if isinstance(st, CommonCathode):
        parts.append(f"Ra {_eng(st.ra)}")
        if st.rk > 0:
            parts.append(f"Rk {_eng(st.rk)}" + (f" bypassed by {_eng(st.ck, 'F')}" if st.ck else " unbypassed"))
        if st.vbias is not None:
            parts.append(f"fixed bias {st.vbias:g} V")
    elif isinstance(st, CathodeFollower):
        parts.append(f"Rk {_eng(st.rk)} to {st.vneg:g} V")
        if st.ra:
            parts.append(f"Ra {_eng(st.ra)}")
        if st.r_upper is not None:
            parts.append(f"grid divider {_eng(st.r_upper)}/{_eng(st.r_lower)} ({st.grid_dc:.4g} V)")
    else:
        parts.append(f"bottom Rk {_eng(st.rk)}" + (f" bypassed by {_eng(st.ck, 'F')}" if st.ck else " unbypassed"))
        if st.vbias is not None:
            parts.append(f"fixed bias {st.vbias:g} V")
        parts.append(f"r_top {_eng(st.r_top)}")
        parts.append(f"r_mid {_eng(st.r_mid)}")
        parts.append("top grid tied to bottom plate (SRPP)" if st.top_grid == "tied"
                     else f"top grid coupled, biased from mid via {_eng(st.rg_top)} (mu follower)")
    parts.append(f"grid leak {_eng(st.rg)}")
    if st.rl is not None:
        parts.append(f"load {_eng(st.rl)}" + (f" via {_eng(st.c_out, 'F')}" if st.c_out else ""))
    if st.c_load:
        parts.append(f"load C {_eng(st.c_load, 'F')}")
    return ", ".join(parts)


def _field_name(field: str) -> str:
    return field


def _report(r: StageResult, name=_field_name) -> str:
    st = r.stage
    f, e = r.figures, r.errors
    tubes = ", ".join(f"{p} {t.label} ({t.model.name})" for p, t in zip(r.positions, r.triodes))
    lines = [f"{stage_title(st)}: {tubes}", CAUTION, "",
             "Circuit: " + _circuit_line(st), "", "DC operating point (node voltages to ground)"]
    for key in f:
        if key.startswith("node."):
            lines.append(f"  {key[5:]:<15}{_fmt(f[key], e.get(key), 'V')}")
    lines.append(f"  {'current':<15}{_fmt(f['ia'] * 1e3, e.get('ia', np.nan) * 1e3, 'mA')}")
    lines.append("")
    lines.append("Tubes")
    for pos, t in zip(r.positions, r.triodes):
        g = lambda q: f[f"{pos}.{q}"]  # noqa: E731
        ge = lambda q: e.get(f"{pos}.{q}", np.nan)  # noqa: E731
        lines.append(f"  {pos} ({t.label}): Va {_fmt(g('va'), ge('va'), 'V')}, "
                     f"Vgk {_fmt(g('vgk'), ge('vgk'), 'V')}, Ia {_fmt(g('ia') * 1e3, ge('ia') * 1e3, 'mA')}")
        pa = g("pa")
        if st.pa_max:
            pct = 100 * pa / st.pa_max
            verdict = "OVER THE LIMIT" if pa > st.pa_max else "ok"
            lines.append(f"      dissipation {_fmt(pa, ge('pa'), 'W', 3)} of {st.pa_max:g} W ({pct:.0f} %) {verdict}")
        else:
            lines.append(f"      dissipation {_fmt(pa, ge('pa'), 'W', 3)} (no limit given: {name('pa_max')})")
        lines.append(f"      gm {_fmt(g('gm') * 1e3, ge('gm') * 1e3, 'mA/V', 3)}, rp {_eng(g('rp'), 'ohm')}"
                     + (f" ± {_eng(ge('rp'), 'ohm')}" if np.isfinite(ge('rp')) else "") + ", "
                     f"mu {_fmt(g('mu'), ge('mu'), '', 3)}")
        vhk = g("vhk")
        verdict = "EXCEEDS THE LIMIT" if abs(vhk) > st.vhk_max else "ok"
        lines.append(f"      heater-cathode {vhk:+.4g} V (heater at {st.heater:g} V, limit {st.vhk_max:g} V) {verdict}")
    lines.append("")
    lines.append("Small signal (mid-band)")
    out = output_node(st)
    for node in _output_nodes(st):
        mark = " (output)" if node == out else ""
        lines.append(f"  gain to {node.replace('_', ' ')}{mark}: {_fmt(f['gain.' + node], e.get('gain.' + node), '', 4)}"
                     + (f"  ({20 * np.log10(abs(f['gain.' + node])):.1f} dB)" if f['gain.' + node] != 0 else "  (no gain)"))
        z = f["zout." + node]
        ze = e.get("zout." + node, np.nan)
        lines.append(f"  output impedance at {node.replace('_', ' ')}: {_eng(z, 'ohm')}"
                     + (f" ± {_eng(ze, 'ohm')}" if np.isfinite(ze) else ""))
    lines.append(f"  input resistance {_eng(f['zin'], 'ohm')}, input capacitance {_fmt(f['cin'] * 1e12, e.get('cin', np.nan) * 1e12, 'pF', 3)}"
                 + (" (Miller: Cgk (1 - A_k) + Cga (1 - A_p))" if st.cga or st.cgk else f" (give {name('cgk')}/{name('cga')})"))
    lows = [(k[6:], v) for k, v in f.items() if k.startswith("f_low.")]
    if lows:
        lines.append("  low corners: " + ", ".join(f"{n.replace('_', ' ')} {_fmt(v, None, 'Hz', 3)}" for n, v in lows))
    highs = [(k[7:], v) for k, v in f.items() if k.startswith("f_high.") and np.isfinite(v)]
    if highs:
        lines.append("  high corners: " + ", ".join(f"{n} {_eng(v, 'Hz')}" for n, v in highs)
                     + f" (output C {_fmt(f['c_out_node'] * 1e12, None, 'pF', 3)})")
    else:
        lines.append(f"  high corners: none (give {name('c_load')} and the interelectrode capacitances, "
                     f"{name('rs')} for the input)")
    if np.isfinite(f["slew_fmax"]):
        lines.append(f"  slew: {_fmt(f['slew_current'] * 1e3, None, 'mA', 3)} into {_fmt(f['c_out_node'] * 1e12, None, 'pF', 3)}"
                     f" allows {f['slew_vpeak']:g} V peak up to {_eng(f['slew_fmax'], 'Hz')}")
    if r.warnings:
        lines.append("")
        lines.append("Warnings")
        lines.extend("  ! " + w for w in r.warnings)
    lines.append("")
    lines.append("Notes: " + (r.error_note or "error bars: one sigma from the fit covariance"))
    lines.extend("  - " + a for a in r.assumptions)
    return "\n".join(lines)



# ---------------------------------------------------------------------------
# Spread over many units
# ---------------------------------------------------------------------------


@dataclass
class SpreadResult:
    """min / median / max of every figure of a stage over many units.

    Attributes
    ----------
    stage : the stage description
    labels : list of str
        One label per case (``"bottom/top"`` for stacks).
    values : dict
        Flat figure name -> array of the value for each case (SI).
    """

    stage: object
    labels: list
    values: dict
    pairing: str = ""
    #: summary lines: how many units carry each kind of warning, and mixed types
    warnings: list = field(default_factory=list)

    def stats(self, key):
        v = np.asarray(self.values[key], float)
        return float(np.min(v)), float(np.median(v)), float(np.max(v))

    def to_dict(self) -> dict:
        figs = {}
        for key, v in self.values.items():
            name, scale, unit, label = _describe(key)
            lo, med, hi = self.stats(key)
            figs[name] = {"min": _num(lo * scale), "median": _num(med * scale), "max": _num(hi * scale),
                          "unit": unit}
        out = {"stage": stage_kind(self.stage), "n_units": len(self.labels), "units": list(self.labels),
               "figures": figs, "caution": CAUTION, "circuit": self.stage.to_dict()}
        if self.pairing:
            out["pairing"] = self.pairing
        out["warnings"] = list(self.warnings)
        g = np.abs(self.values["gain"])
        i_lo = int(np.nanargmin(g))
        i_hi = int(np.nanargmax(g))
        out["lowest_gain_unit"] = self.labels[i_lo]
        out["highest_gain_unit"] = self.labels[i_hi]
        return out

    def report(self) -> str:
        lines = [f"{stage_title(self.stage)} over {len(self.labels)} units" +
                 (f" ({self.pairing})" if self.pairing else ""), CAUTION, "",
                 "Circuit: " + _circuit_line(self.stage), "",
                 f"  {'figure':<34}{'min':>12}{'median':>12}{'max':>12}"]
        out = output_node(self.stage)
        for key in self.values:
            if key in ("slew_vpeak", "zin", "c_out_node", "gain.grid", "gain." + out, "zout." + out):
                continue
            if not np.any(np.isfinite(self.values[key])):
                continue
            if key == "cin" and not np.any(np.asarray(self.values[key], float)):
                continue  # no tube capacitances given: not a figure of these tubes
            name, scale, unit, label = _describe(key)
            lo, med, hi = self.stats(key)
            lab = f"{label} [{unit}]" if unit else label
            lines.append(f"  {lab:<34}{lo * scale:>12.4g}{med * scale:>12.4g}{hi * scale:>12.4g}")
        d = self.to_dict()
        lines.append("")
        lines.append(f"lowest |gain|: {d['lowest_gain_unit']}, highest |gain|: {d['highest_gain_unit']}")
        if self.warnings:
            lines.append("")
            lines.append("Warnings")
            lines.extend("  ! " + w for w in self.warnings)
        return "\n".join(lines)

