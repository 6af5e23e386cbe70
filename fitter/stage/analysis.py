"""Analysis of a stage: every figure for a bank of units at once (:func:`_analyse`),
:func:`solve` with error bars from the fit covariance, :func:`spread` over many units, and
the warnings of an operating point.
"""

from __future__ import annotations

from typing import Sequence

import numpy as np

from ..triode import FittedTriode, error_from_differences, perturbed
from .circuits import CathodeFollower, CommonCathode, Stack, StageInputError, _output_nodes, output_node, stage_kind, tube_positions
from .results import _ASSUMPTIONS, SpreadResult, StageResult
from .solver import _DC, _MID, _Bank, _bc, _check_triodes, _group_key, _repeat_op

__all__ = ["solve", "spread"]


# ---------------------------------------------------------------------------
# Analysis of one stage over a bank of units (vectorised)
# ---------------------------------------------------------------------------

_H_VIN = 1e-3  # [V] input step for the small-signal differences


def _analyse(stage, banks, n, slew_vpeak):
    """Every figure of ``stage`` for ``n`` units at once: dict name -> array (n,), SI."""
    kind = type(stage)
    op = _DC[kind](stage, banks, n)
    op = {k: _bc(v, (n,)) for k, v in op.items()}
    outs = _output_nodes(stage)
    # small-signal batch: +-h at the input, then +-i injected at each output (load off)
    cases = 2 + 2 * len(outs)
    iq = np.maximum(np.abs(op[tube_positions(stage)[0] + ".ia"]), 1e-9)
    vin = np.zeros((n, cases))
    vin[:, 0], vin[:, 1] = _H_VIN, -_H_VIN
    gl = np.full((n, cases), 0.0 if stage.rl is None else 1.0 / stage.rl)
    inj = {}
    hi = 1e-4 * iq
    for j, node in enumerate(outs):
        a = np.zeros((n, cases))
        a[:, 2 + 2 * j] = hi
        a[:, 3 + 2 * j] = -hi
        gl[:, 2 + 2 * j: 4 + 2 * j] = 0.0
        inj[node] = a.ravel()
    bank_k = tuple(b.repeat(cases) for b in banks)
    mid = _MID[kind](stage, bank_k, _repeat_op(op, cases), vin.ravel(), inj, gl.ravel())
    mid = {k: np.asarray(v, float).reshape(n, cases) for k, v in mid.items()}

    fig = {}
    nodes = [k for k in op if "." not in k]
    for node in nodes:
        fig["node." + node] = op[node]
    for node in nodes:
        fig["gain." + node] = (mid[node][:, 0] - mid[node][:, 1]) / (2 * _H_VIN)
    for j, node in enumerate(outs):
        fig["zout." + node] = (mid[node][:, 2 + 2 * j] - mid[node][:, 3 + 2 * j]) / (2 * hi)
    out = output_node(stage)
    fig["gain"] = fig["gain." + out]
    fig["zout"] = fig["zout." + out]
    with np.errstate(divide="ignore"):
        fig["gain_db"] = 20 * np.log10(np.abs(fig["gain"]))

    positions = tube_positions(stage)
    for pos, bank in zip(positions, banks):
        va, vgk, ia = op[pos + ".va"], op[pos + ".vgk"], op[pos + ".ia"]
        gva, gvg = bank.gradient(va, vg=vgk)
        gva = np.broadcast_to(gva, (n,))
        gvg = np.broadcast_to(gvg, (n,))
        with np.errstate(divide="ignore", invalid="ignore"):
            rp = np.where(gva > 0, 1.0 / gva, np.inf)
        fig[pos + ".va"] = va
        fig[pos + ".vgk"] = vgk
        fig[pos + ".ia"] = ia
        fig[pos + ".pa"] = va * ia
        fig[pos + ".gm"] = gvg
        fig[pos + ".rp"] = rp
        with np.errstate(divide="ignore", invalid="ignore"):
            fig[pos + ".mu"] = np.where(gva > 0, gvg / np.where(gva > 0, gva, 1.0), np.nan)
        cath = "cathode" if pos == "tube" else "cathode_" + pos
        fig[pos + ".vhk"] = op[cath] - stage.heater
    fig["ia"] = op[positions[0] + ".ia"]

    # input: resistance, Miller capacitance Cgk (1 - A_k) + Cga (1 - A_p)
    first = positions[0]
    cath = "cathode" if first == "tube" else "cathode_bottom"
    plate = "plate" if first == "tube" else "plate_bottom"
    if isinstance(stage, CathodeFollower) and stage.r_upper is not None:
        zin = stage.rg + stage.r_upper * stage.r_lower / (stage.r_upper + stage.r_lower)
    else:
        zin = stage.rg
    fig["zin"] = np.full(n, float(zin))
    fig["cin"] = stage.cgk * (1 - fig["gain." + cath]) + stage.cga * (1 - fig["gain." + plate])

    # corners (single-pole estimates)
    two_pi = 2 * np.pi
    if stage.c_in is not None:
        fig["f_low.input"] = np.full(n, 1.0 / (two_pi * stage.c_in * (stage.rs + zin)))
    rl = np.inf if stage.rl is None else stage.rl
    if stage.c_out is not None and stage.rl is not None:
        fig["f_low.output"] = 1.0 / (two_pi * stage.c_out * (fig["zout"] + rl))
    if getattr(stage, "ck", None) is not None and stage.rk > 0:
        mu, rp = fig[first + ".mu"], fig[first + ".rp"]
        if isinstance(stage, CommonCathode):
            rload = 1.0 / (1.0 / stage.ra + (0.0 if stage.rl is None else 1.0 / stage.rl))
        else:
            # impedance of the top network seen from the bottom plate (bottom rp removed)
            with np.errstate(divide="ignore"):
                gz = 1.0 / fig["zout.plate_bottom"] - 1.0 / rp
                rload = np.where(gz > 0, 1.0 / np.maximum(gz, 1e-300), np.inf)
        rseen = 1.0 / (1.0 / stage.rk + (mu + 1) / (rp + rload))
        fig["f_low.bypass"] = 1.0 / (two_pi * stage.ck * rseen)
    if isinstance(stage, Stack) and stage.top_grid == "coupled" and stage.c_top is not None:
        ap, am = fig["gain.plate_bottom"], fig["gain.mid"]
        with np.errstate(divide="ignore", invalid="ignore"):
            reff = stage.rg_top / np.abs(1.0 - am / ap)
        fig["f_low.top_coupling"] = 1.0 / (two_pi * stage.c_top * (reff + fig["zout.plate_bottom"]))
    c_node = stage.c_load + stage.cak + (stage.cga if out.startswith("plate") else 0.0)
    zl = 1.0 / (1.0 / fig["zout"] + (0.0 if stage.rl is None else 1.0 / stage.rl))
    fig["c_out_node"] = np.full(n, c_node)
    with np.errstate(divide="ignore"):
        fig["f_high.output"] = np.where(c_node > 0, 1.0 / (two_pi * zl * max(c_node, 1e-300)), np.inf)
        if stage.rs > 0:
            rsrc = 1.0 / (1.0 / stage.rs + 1.0 / zin)
            fig["f_high.input"] = np.where(fig["cin"] > 0, 1.0 / (two_pi * rsrc * np.maximum(fig["cin"], 1e-300)), np.inf)
    # slew: the standing current is what the passive side can put into C at the zero crossing
    fig["slew_current"] = fig["ia"]
    fig["slew_vpeak"] = np.full(n, float(slew_vpeak))
    with np.errstate(divide="ignore"):
        fig["slew_fmax"] = np.where(
            c_node > 0, fig["ia"] / (two_pi * max(c_node, 1e-300) * slew_vpeak), np.inf)
    return fig



def _warnings(stage, triodes, fig) -> list[str]:
    out = []
    for pos, t in zip(tube_positions(stage), triodes):
        name = f"{pos} tube {t.label}" if pos != "tube" else f"tube {t.label}"
        va, vgk, ia = fig[f"{pos}.va"], fig[f"{pos}.vgk"], fig[f"{pos}.ia"]
        if ia < 1e-6:
            out.append(f"{name} is practically cut off at the operating point (Ia {ia * 1e3:.3g} mA)")
        if vgk >= 0:
            out.append(f"{name}: grid at {vgk:+.3g} V to its cathode: grid current will flow"
                       + ("" if t.model.grid_current else " (not in this model)"))
        if t.envelope is not None:
            why = t.envelope.outside(va, vgk, ia)
            if why is not None:
                out.append(f"{name}: operating point (Va {va:.4g} V, Vgk {vgk:.4g} V) is outside the measured "
                           f"data: {why} ({t.envelope.describe()}); the model is extrapolating")
        elif t.outside_range(va, vgk):
            rg = t.valid_range
            out.append(f"{name}: operating point (Va {va:.4g} V, Vgk {vgk:.4g} V) is outside the fitted "
                       f"data (va {rg['va'][0]:.4g}..{rg['va'][1]:.4g} V, vg {rg['vg'][0]:.4g}..{rg['vg'][1]:.4g} V): "
                       "the model is extrapolating")
        if stage.pa_max is not None and fig[f"{pos}.pa"] > stage.pa_max:
            out.append(f"{name} dissipates {fig[f'{pos}.pa']:.3g} W, over the {stage.pa_max:g} W limit")
        elif t.envelope is not None and fig[f"{pos}.pa"] > t.envelope.pa_max * (1 + t.envelope.HEADROOM):
            # no limit given, but the tube was never measured this hot: its data say nothing
            # about it there (and it may be past the tube's rating)
            out.append(f"{name} dissipates {fig[f'{pos}.pa']:.3g} W, more than the {t.envelope.pa_max:.3g} W "
                       "reached anywhere in its measured data; check the tube's rated dissipation")
    vk = [fig[f"{p}.vhk"] + stage.heater for p in tube_positions(stage)]
    over = [p for p in tube_positions(stage) if abs(fig[f"{p}.vhk"]) > stage.vhk_max]
    if over:
        best = 0.5 * (max(vk) + min(vk))
        worst = 0.5 * (max(vk) - min(vk))
        single = list(tube_positions(stage)) == ["tube"]
        who = "the tube" if single else f"the {' and '.join(over)} tube"
        msg = (f"heater-cathode voltage of {who} exceeds the {stage.vhk_max:g} V limit "
               f"(heater at {stage.heater:g} V)")
        if single:
            msg += f"; elevate the heater supply to about {best:.0f} V, near the cathode's DC voltage"
        elif worst <= stage.vhk_max:
            msg += f"; elevate the heater supply to about {best:.0f} V (then at most {worst:.0f} V)"
        else:
            msg += "; no single heater elevation brings every cathode within the limit"
        out.append(msg)
    return out


def _figure_names(stage, fig) -> list:
    return list(fig.keys())


def _analyse_cases(stage, cases, keys, slew_vpeak) -> np.ndarray:
    """Figures ``keys`` for every case (a tuple of triodes per position), one row per case.

    Cases are solved together, one vectorised :func:`_analyse` per group of cases that
    share their models and grid-current parameters (which the banks keep scalar).
    """
    rows = np.full((len(cases), len(keys)), np.nan)
    groups: dict = {}
    for i, c in enumerate(cases):
        groups.setdefault(tuple(_group_key(t) for t in c), []).append(i)
    for idx in groups.values():
        banks = tuple(_Bank.of([cases[i][j] for i in idx]) for j in range(len(cases[0])))
        fig = _analyse(stage, banks, len(idx), slew_vpeak)
        for col, k in enumerate(keys):
            rows[idx, col] = np.broadcast_to(fig[k], (len(idx),))
    return rows


def solve(stage, *triodes: FittedTriode, errors: bool = True, slew_vpeak: float = 10.0) -> StageResult:
    """Operating point and small-signal figures of ``stage`` with the given tubes.

    Parameters
    ----------
    stage : CommonCathode, CathodeFollower or Stack
        The circuit (SI units).
    *triodes : FittedTriode
        One tube; for a :class:`Stack`, the bottom tube then the top tube.
    errors : bool
        Propagate the fit covariance of every tube to every figure
        (central differences as in :func:`fitter.triode.propagate`, every perturbed
        parameter set of every tube solved together in one vectorised pass; the tubes'
        contributions are added in quadrature, the units being independent).
    slew_vpeak : float
        Output peak amplitude for the slew-rate check [V].

    Returns
    -------
    StageResult

    Raises
    ------
    ValueError
        Wrong number or kind of tubes, or an impossible circuit value.
    StageSolveError
        The circuit equations could not be solved.
    """
    stage_kind(stage)
    _check_triodes(stage, triodes)
    if not (isinstance(slew_vpeak, (int, float)) and slew_vpeak > 0):
        raise StageInputError(f"must be a positive number of volts, got {slew_vpeak!r}", field="slew_vpeak")
    banks = tuple(_Bank.of([t]) for t in triodes)
    raw = _analyse(stage, banks, 1, slew_vpeak)
    keys = list(raw)
    figures = {k: float(raw[k][0]) for k in keys}
    errs = {k: np.nan for k in keys}
    note = "no error bars: not requested"
    if errors:
        note = "no error bars: the model card(s) carry no covariance"
        var = np.zeros(len(keys))
        known = False
        # every perturbed parameter set of every tube (the others at their fitted values)
        # stacked along one axis and solved together, instead of one solve per set
        cases, parts = [], []
        for i, t in enumerate(triodes):
            if t.covariance is None or not t.free:
                continue
            sets, steps = perturbed(t)
            parts.append((t, len(cases), len(sets), steps))
            cases += [tuple(tt if j == i else x for j, x in enumerate(triodes)) for tt in sets]
        if cases:
            rows = _analyse_cases(stage, cases, keys, slew_vpeak)
            # infinite figures (no capacitance given) carry no error: NaN, not inf - inf
            rows = np.where(np.isfinite(rows), rows, np.nan)
            for t, start, count, steps in parts:
                var += error_from_differences(rows[start:start + count], steps, t.covariance) ** 2
            known = True
        if known:
            errs = {k: float(np.sqrt(v)) for k, v in zip(keys, var)}
            with_cov = [t.label for t in triodes if t.covariance is not None and t.free]
            note = ("error bars: one sigma from the fit covariance of " + ", ".join(with_cov)
                    + ("" if len(with_cov) == len(triodes) else " (the other card carries none)"))
    warns = _warnings(stage, triodes, figures)
    return StageResult(stage, tuple(triodes), figures, errs, warns, list(_ASSUMPTIONS), note)



def spread(stage, units: Sequence[FittedTriode], tops=None, slew_vpeak: float = 10.0) -> SpreadResult:
    """Solve ``stage`` for many units at once and collect every figure.

    Parameters
    ----------
    stage : CommonCathode, CathodeFollower or Stack
    units : sequence of FittedTriode
        The units (for a stack: the bottom tubes).
    tops : FittedTriode, sequence of FittedTriode, or None
        Stacks only: one top tube for every case, a sequence paired with ``units``
        element by element, or None to put each unit in both positions.

    Returns
    -------
    SpreadResult
    """
    stage_kind(stage)
    units = list(units)
    if not units:
        raise StageInputError("no units given", field="units")
    for t in units:
        if not isinstance(t, FittedTriode):
            raise ValueError(f"spread: units must be FittedTriode objects, got {type(t).__name__}")
    if isinstance(stage, Stack):
        if tops is None:
            tops = list(units)
            pairing = "each unit in both positions"
        elif isinstance(tops, FittedTriode):
            tops = [tops] * len(units)
            pairing = f"top fixed: {tops[0].label}"
        else:
            tops = list(tops)
            if len(tops) != len(units):
                raise ValueError(f"spread: {len(units)} bottom units but {len(tops)} top units")
            pairing = "paired bottom/top"
        cases = list(zip(units, tops))
        labels = [f"{b.label}/{t.label}" for b, t in cases]
    else:
        if tops is not None:
            raise ValueError("spread: 'tops' is for stacks only")
        cases = [(u,) for u in units]
        labels = [u.label for u in units]
        pairing = ""
    groups: dict = {}
    for i, c in enumerate(cases):
        groups.setdefault(tuple(_group_key(t) for t in c), []).append(i)
    values: dict = {}
    n = len(cases)
    for idx in groups.values():
        banks = tuple(_Bank.of([cases[i][j] for i in idx]) for j in range(len(cases[0])))
        fig = _analyse(stage, banks, len(idx), slew_vpeak)
        for k, v in fig.items():
            values.setdefault(k, np.full(n, np.nan))[idx] = np.broadcast_to(v, (len(idx),))
    return SpreadResult(stage, labels, values, pairing, _spread_warnings(stage, cases, labels, values))


#: kinds of per-unit warning, as (marker in the message, summary wording)
_WARNING_KINDS = (
    ("extrapolating", "operating point outside their fitted data (the model is extrapolating)"),
    ("cut off", "practically cut off at the operating point"),
    ("over the", "over the plate dissipation limit"),
    ("grid current", "grid at or above its cathode: grid current"),
    ("heater-cathode", "over the heater-cathode limit"),
)


def _spread_warnings(stage, cases, labels, values) -> list[str]:
    """Per-unit warnings of a spread, summarised: 'k of N units: ...' with the labels."""
    n = len(cases)
    hits: dict = {}
    for i, c in enumerate(cases):
        fig = {k: float(v[i]) for k, v in values.items()}
        for w in _warnings(stage, c, fig):
            for marker, text in _WARNING_KINDS:
                if marker in w:
                    hits.setdefault(text, []).append(labels[i])
                    break
    out = []
    for _, text in _WARNING_KINDS:
        if text in hits:
            who = hits[text]
            shown = ", ".join(who[:8]) + (f" and {len(who) - 8} more" if len(who) > 8 else "")
            out.append(f"{len(who)} of {n} units: {text} ({shown})")
    first = tube_positions(stage)[0]
    mu = np.asarray(values.get(first + ".mu", []), float)
    mu = mu[np.isfinite(mu)]
    if mu.size and np.min(mu) > 0 and np.max(mu) / np.min(mu) > 1.5:
        out.append(f"the units look like different tube types (mu at the operating point from "
                   f"{np.min(mu):.3g} to {np.max(mu):.3g}); a spread is meant for units of one type")
    return out
