"""Design sweeps: one numeric field of a stage varied over a range, over one tube or a stock.

:func:`component_sweep` builds the stage for each value with :func:`dataclasses.replace`
(so the stage checks every value itself and names the field) and, for every case (a tuple
of tubes, one per position), gives the figures a designer weighs against each other:

* standing current, plate-cathode voltage and dissipation of each tube, mid-band gain, output
  impedance, heater-cathode margin (the limit minus the largest |Vhk| of the tubes), the
  slew-limited frequency into the load capacitance (from the stage solver);
* headroom: the output fundamental [V peak] where THD first reaches ``thd_limit``, or,
  if THD stays below it, where a tube reaches grid-current onset or cut-off (the same
  definition as :func:`fitter.stage.distortion.sweep`);
* THD at a chosen output level ``level`` [V peak].

How it stays fast (vectorised over the units of a stock, as :func:`fitter.stage.spread`):
the small-signal figures come from the spread's own :func:`_analyse`; the drive limit is
searched on the crests (the quasi-static transfer is monotone) for all units at once; and
the quasi-static transfer of each unit is sampled once, at Chebyshev nodes across the
drive range, so its waveform at any level is a Chebyshev series in ``r cos(theta)``.  The
harmonics of ``T_k(r cos theta)`` do not depend on the tube, so they are tabulated once for
a fixed grid of relative levels ``r`` and the harmonics of every unit at every level are
one matrix product.  The THD threshold and the chosen level are interpolated log-log
between grid levels (about 9 % apart).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field, fields, replace
from functools import lru_cache

import numpy as np

from .. import CAUTION
from .analysis import _analyse
from .circuits import StageInputError, output_node, stage_kind, stage_title, tube_positions
from .distortion import N_HARMONICS
from .solver import _DC, _MID, _Bank, _group_key, _repeat_op

__all__ = ["ComponentSweep", "component_sweep", "sweep_values", "sweepable_fields", "FIGURES"]

#: Chebyshev nodes across the drive range (degree of the transfer's interpolant + 1)
_NODES = 48
#: relative levels r = amplitude / drive limit tabulated for the harmonics
_R = np.geomspace(1e-3, 1.0, 81)
#: samples per period for tabulating the harmonics of T_k(r cos theta) (exact: > K + 10)
_TAB_SAMPLES = 128


def sweepable_fields(stage) -> list[str]:
    """The numeric fields of ``stage`` (resistors, capacitors, supplies, bias, limits)."""
    return [f.name for f in fields(stage)
            if isinstance(getattr(stage, f.name), (int, float)) and not isinstance(getattr(stage, f.name), bool)
            or (getattr(stage, f.name) is None and f.type in ("float | None",))]


def sweep_values(start: float, stop: float, points: int, log: bool = False) -> np.ndarray:
    """``points`` values from ``start`` to ``stop``, evenly (``log``: geometrically) spaced."""
    if not (isinstance(points, int) and not isinstance(points, bool) and 2 <= points <= 1000):
        raise StageInputError(f"need a whole number of points from 2 to 1000, got {points!r}", field="points")
    for name, v in (("start", start), ("stop", stop)):
        if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v):
            raise StageInputError(f"must be a finite number, got {v!r}", field=name)
    if start == stop:
        raise StageInputError("the range is empty (start equals stop)", field="stop")
    if log:
        if start <= 0 or stop <= 0:
            raise StageInputError("a logarithmic range needs positive ends", field="start" if start <= 0 else "stop")
        return np.geomspace(float(start), float(stop), points)
    return np.linspace(float(start), float(stop), points)


#: figure key -> (label, unit, scale from SI)
FIGURES = {
    "ia": ("standing current", "mA", 1e3),
    "gain": ("mid-band gain", "", 1.0),
    "zout": ("output impedance", "ohm", 1.0),
    "headroom": ("headroom (output)", "V peak", 1.0),
    "thd": ("THD at the level", "%", 100.0),
    "vhk_margin": ("heater-cathode margin", "V", 1.0),
    "slew_fmax": ("slew-limited frequency", "kHz", 1e-3),
    # output stages (fitter.stage.output)
    "p_max": ("largest output", "W", 1.0),
    "p_thd": ("output at the THD limit", "W", 1.0),
    "pa_ratio": ("largest dissipation / limit", "%", 100.0),
    "damping": ("damping factor", "", 1.0),
    "imbalance": ("DC imbalance (A - B)", "mA", 1e3),
}
_PER_TUBE = {"va": ("plate-cathode voltage", "V", 1.0), "pa": ("dissipation", "W", 1.0),
             "ia": ("idle current", "mA", 1e3)}


def _is_output(stage) -> bool:
    from .output import PushPullOutput, SingleEndedOutput

    return isinstance(stage, (SingleEndedOutput, PushPullOutput))


def _kind(stage) -> str:
    return stage.kind if _is_output(stage) else stage_kind(stage)


def _title(stage) -> str:
    return f"{stage.kind.capitalize()} output stage" if _is_output(stage) else stage_title(stage)


def _circuit_dict(stage) -> dict:
    from dataclasses import asdict

    return {"kind": stage.kind, **asdict(stage)} if _is_output(stage) else stage.to_dict()


def _unit_of(field_name: str) -> str:
    if field_name in ("b_plus", "vbias", "vneg", "heater", "vhk_max", "grid_bias", "grid_onset"):
        return "V"
    if field_name == "pa_max":
        return "W"
    if field_name == "turns_ratio":
        return ""
    if field_name == "l_primary":
        return "H"
    if field_name.startswith("c"):  # c_in, c_out, c_load, c_top, ck, cgk, cga, cak
        return "F"
    return "ohm"


@dataclass
class ComponentSweep:
    """Figures of a stage against one field's value, for one or many cases (units).

    Attributes
    ----------
    field : str
        The swept field (``"ra"``, ``"b_plus"`` ...).
    values : ndarray (P,)
        Its values, SI.
    figures : dict name -> ndarray (P, U)
        Each figure (SI) for every value and case; NaN where it does not exist (a unit
        cut off at that value, a level beyond the drive limit).
    labels : list of str
        The cases (unit labels, ``bottom/top`` for a stack).
    """

    stage: object
    field: str
    values: np.ndarray
    log: bool
    labels: list
    figures: dict
    thd_limit: float
    level: float | None
    slew_vpeak: float
    pairing: str = ""
    notes: list = field(default_factory=list)

    @property
    def title(self) -> str:
        """The stage's name ("Common-cathode stage", "Push-pull output stage" ...)."""
        return _title(self.stage)

    @property
    def n_units(self) -> int:
        return len(self.labels)

    @property
    def figure_names(self) -> list:
        return list(self.figures)

    @property
    def units_text(self) -> str:
        if self.n_units == 1:
            return self.labels[0]
        noun = "pairs" if _kind(self.stage) == "push-pull" else "units"
        return f"{self.n_units} {noun}" + (f" ({self.pairing})" if self.pairing else "")

    @property
    def display_unit(self) -> str:
        return _display(self.field, self.values)[1]

    @property
    def display_scale(self) -> float:
        return _display(self.field, self.values)[0]

    def figure_label(self, name: str) -> str:
        if "." in name:
            pos, q = name.split(".")
            return f"{pos} {_PER_TUBE[q][0]}"
        return FIGURES[name][0]

    def figure_unit(self, name: str):
        """(unit, scale from SI) of a figure."""
        spec = _PER_TUBE[name.split(".")[1]] if "." in name else FIGURES[name]
        return spec[1], spec[2]

    def stats(self, name: str):
        """(min, median, max) over the cases at each value (NaN-aware), SI."""
        a = self.figures[name]
        with np.errstate(all="ignore"):
            ok = np.isfinite(a).any(axis=1)
            lo = np.full(a.shape[0], np.nan)
            med, hi = lo.copy(), lo.copy()
            if ok.any():
                import warnings

                with warnings.catch_warnings():
                    warnings.simplefilter("ignore", RuntimeWarning)
                    lo[ok] = np.nanmin(a[ok], axis=1)
                    med[ok] = np.nanmedian(a[ok], axis=1)
                    hi[ok] = np.nanmax(a[ok], axis=1)
        return lo, med, hi

    def to_dict(self) -> dict:
        def num(x):
            x = float(x)
            return x if math.isfinite(x) else None

        points = []
        stats = {k: self.stats(k) for k in self.figures}
        for i, v in enumerate(self.values):
            row = {"value": float(v)}
            for k in self.figures:
                unit, scale = self.figure_unit(k)
                key = f"{k}_{_slug(unit)}" if unit else k
                if self.n_units == 1:
                    row[key] = num(self.figures[k][i, 0] * scale)
                else:
                    lo, med, hi = stats[k]
                    row[key] = {"min": num(lo[i] * scale), "median": num(med[i] * scale), "max": num(hi[i] * scale)}
            points.append(row)
        return {
            "kind": _kind(self.stage),
            "title": _title(self.stage),
            "field": self.field,
            "unit": _unit_of(self.field),
            "scale": "log" if self.log else "linear",
            "units": list(self.labels),
            "pairing": self.pairing,
            "thd_limit_pct": 100 * self.thd_limit,
            **({"level_w": self.level} if _is_output(self.stage) else
               {"level_vout_peak_v": self.level, "slew_vpeak_v": self.slew_vpeak}),
            "points": points,
            "circuit": _circuit_dict(self.stage),
            "notes": list(self.notes),
            "caution": CAUTION,
        }

    def report(self, name=lambda f: f) -> str:
        """Text table: one row per value; with many units each cell is the median and
        the min..max range."""
        from .results import _eng

        many = self.n_units > 1
        cols = list(self.figures)
        head = [f"{name(self.field):>10}"]
        for k in cols:
            unit, _ = self.figure_unit(k)
            lab = _short(k) + (f" {unit}" if unit else "")
            head.append(f"{lab:>{24 if many else 12}}")
        lines = [f"Sweep of {name(self.field)} in the {_title(self.stage).lower()} with {self.units_text}",
                 CAUTION, ""]
        if _is_output(self.stage):
            lines.append("  Pmax: the largest output before grid current (or cut-off, single-ended); "
                         f"P@THD: the output where THD reaches {100 * self.thd_limit:g} % (- : not before Pmax)")
            if self.level is not None:
                lines.append(f"  THD at {self.level:g} W out")
        else:
            lines.append(f"  headroom: output where THD reaches {100 * self.thd_limit:g} %, or grid-current onset / "
                         "cut-off first")
            if self.level is not None:
                lines.append(f"  THD at {self.level:g} V peak out; slew limit for {self.slew_vpeak:g} V peak")
        if many:
            lines.append("  each cell: median [min..max] over the units")
        lines.append("")
        lines.append("  " + " ".join(head))
        st = {k: self.stats(k) for k in cols}
        for i, v in enumerate(self.values):
            cells = [f"{_eng(v, _unit_of(self.field)).replace(' ', ''):>10}"]
            for k in cols:
                _, scale = self.figure_unit(k)
                lo, med, hi = (x[i] * scale for x in st[k])
                if many:
                    cells.append(f"{_fmt(med)} [{_fmt(lo)}..{_fmt(hi)}]".rjust(24))
                else:
                    cells.append(f"{_fmt(med):>12}")
            lines.append("  " + " ".join(cells))
        if self.notes:
            lines.append("")
            lines.extend("  ! " + n for n in self.notes)
        return "\n".join(lines)


def _short(k):
    if "." in k:
        pos, q = k.split(".")
        return f"{pos[:3]}.{q}" if pos != "tube" else q
    return {"ia": "Ia", "gain": "gain", "zout": "Zout", "headroom": "headroom", "thd": "THD",
            "vhk_margin": "Vhk margin", "slew_fmax": "slew", "p_max": "Pmax", "p_thd": "P@THD",
            "pa_ratio": "Pa/limit", "damping": "damping", "imbalance": "imbalance"}[k]


def _slug(unit):
    return {"mA": "ma", "V": "v", "V peak": "v_peak", "%": "pct", "W": "w", "ohm": "ohm", "kHz": "khz"}[unit]


def _fmt(x):
    if not np.isfinite(x):
        return "-"
    return f"{x:.4g}"


def _display(field_name, values):
    unit = _unit_of(field_name)
    top = float(np.max(np.abs(values))) if len(values) else 1.0
    if unit == "ohm":
        return (1e-6, "Mohm") if top >= 1e6 else (1e-3, "kohm") if top >= 1e3 else (1.0, "ohm")
    if unit == "F":
        return (1e6, "uF") if top >= 1e-7 else (1e9, "nF") if top >= 1e-10 else (1e12, "pF")
    return 1.0, unit


# ---------------------------------------------------------------------------
# Large signal, vectorised over units
# ---------------------------------------------------------------------------


@lru_cache(maxsize=4)
def _harmonic_table(K: int = _NODES):
    """tab[l, m, k]: peak amplitude coefficient of harmonic m (0..10) of T_k(r_l cos theta)
    (k < K).  Cosine input: every term is even in theta, so the harmonics are cosine
    coefficients (signed); the waveform's harmonics are linear in the series coefficients."""
    th = 2 * np.pi * np.arange(_TAB_SAMPLES) / _TAB_SAMPLES
    u = _R[:, None] * np.cos(th)[None, :]  # (L, S)
    Tk = np.cos(np.arange(K)[:, None, None] * np.arccos(np.clip(u, -1, 1))[None])  # (K, L, S)
    m = np.arange(N_HARMONICS + 1)
    basis = np.cos(m[:, None] * th[None, :]) * (2.0 / _TAB_SAMPLES)  # (M, S)
    basis[0] *= 0.5
    return np.einsum("kls,ms->lmk", Tk, basis)


def _margins(stage, banks, op, n, amps, grid_onset, cutoff_fraction):
    """Worst margin (>= 0: past a limit) at the crests +-amps, amps (n, L); and which limit."""
    L = amps.shape[1]
    v = np.concatenate([amps, -amps], axis=1)  # (n, 2L)
    res = _quasi(stage, banks, op, n, v)
    worst = np.full((n, L), -np.inf)
    for p in tube_positions(stage):
        vgk, ia = res[p + ".vgk"], res[p + ".ia"]
        g = np.maximum(vgk[:, :L], vgk[:, L:]) - grid_onset
        c = cutoff_fraction * op[p + ".ia"][:, None] - np.minimum(ia[:, :L], ia[:, L:])
        # scale the current margin to volts-like units by the tube's gm is not needed:
        # only the sign and the crossing of each margin matter
        worst = np.maximum(worst, np.maximum(np.sign(g) * np.minimum(np.abs(g), 1.0),
                                             np.sign(c) * np.minimum(np.abs(c) / (cutoff_fraction * op[p + ".ia"][:, None]), 1.0)))
    return worst


def _quasi(stage, banks, op, n, vin):
    """Quasi-static mid-band solution for inputs ``vin`` (n, k) added to each unit's grid."""
    k = vin.shape[1]
    bk = tuple(b.repeat(k) for b in banks)
    gl = 0.0 if stage.rl is None else 1.0 / stage.rl
    res = _MID[type(stage)](stage, bk, _repeat_op(op, k), vin.ravel(), {}, gl)
    return {key: np.broadcast_to(np.asarray(val, float), (n * k,)).reshape(n, k) for key, val in res.items()}


def _drive_limits(stage, banks, op, n, grid_onset, cutoff_fraction):
    """Input amplitude [V peak] at which each unit first reaches grid-current onset or
    cut-off (the crest search of :func:`fitter.stage.distortion.drive_limit`, for all units
    at once); NaN where a unit is past a limit without signal, the search top where none is
    reached."""
    top = 2.0 * (stage.b_plus + abs(getattr(stage, "vneg", 0.0)))
    # no drive, then 10 mV to the top in steps of a factor of about 1.9
    G = 25
    grid = np.broadcast_to(np.concatenate([[0.0], np.geomspace(1e-2, top, G - 1)]), (n, G))
    # in chunks from small to large drive, stopping once every unit is past a limit: the
    # huge drives at the top of the grid are then never solved (a stack's equations need
    # not converge there, and nothing is learnt from them)
    parts = []
    for c0 in range(0, G, 5):
        m = _margins(stage, banks, op, n, np.ascontiguousarray(grid[:, c0:c0 + 5]), grid_onset, cutoff_fraction)
        parts.append(m)
        if (np.concatenate(parts, axis=1) >= 0).any(axis=1).all():
            break
    m = np.concatenate(parts, axis=1)
    m = np.concatenate([m, np.full((n, G - m.shape[1]), 1.0)], axis=1)
    past = m >= 0
    has = past.any(axis=1)
    i = np.where(has, np.argmax(past, axis=1), G - 1)
    at_rest = has & (i == 0)
    i = np.maximum(i, 1)
    r = np.arange(n)
    lo = grid[r, i - 1]
    hi = grid[r, i]
    # two refinements of 16 steps: the bracket shrinks 256 times, then linear interpolation
    for _ in range(2):
        g = lo[:, None] + (hi - lo)[:, None] * np.linspace(0, 1, 17)[None, :]
        m = _margins(stage, banks, op, n, g, grid_onset, cutoff_fraction)
        past = m >= 0
        j = np.where(past.any(axis=1), np.argmax(past, axis=1), 16)
        j = np.maximum(j, 1)
        lo, hi = g[r, j - 1], g[r, j]
        m0, m1 = m[r, j - 1], m[r, j]
    with np.errstate(invalid="ignore", divide="ignore"):
        w = np.where(m1 != m0, -m0 / (m1 - m0), 1.0)
    a = lo + np.clip(w, 0, 1) * (hi - lo)
    a = np.where(has, a, top)
    return np.where(at_rest, np.nan, a)


def _large_signal(stage, banks, op, n, thd_limit, level, grid_onset, cutoff_fraction):
    """(headroom [V peak out], THD at ``level``) for each unit."""
    alim = _drive_limits(stage, banks, op, n, grid_onset, cutoff_fraction)
    ok = np.isfinite(alim) & (alim > 0)
    a = np.where(ok, alim, 1.0)
    K = _NODES
    x = np.cos(np.pi * (np.arange(K) + 0.5) / K)  # Chebyshev nodes in (-1, 1)
    res = _quasi(stage, banks, op, n, a[:, None] * x[None, :])
    node = output_node(stage)
    y = res[node] - op[node][:, None]
    # Chebyshev coefficients of the transfer over [-alim, alim] (discrete cosine transform)
    kk = np.arange(K)
    C = np.cos(np.pi * kk[:, None] * (np.arange(K) + 0.5)[None, :] / K) * (2.0 / K)
    c = y @ C.T  # (n, K)
    c[:, 0] *= 0.5
    H = np.abs(np.einsum("lmk,nk->nlm", _harmonic_table(K), c))  # (n, L, M)
    h1 = H[:, :, 1]
    with np.errstate(invalid="ignore", divide="ignore"):
        thd = np.sqrt(np.sum(H[:, :, 2:] ** 2, axis=2)) / h1  # (n, L)
    headroom = np.full(n, np.nan)
    thd_at = np.full(n, np.nan)
    for u in np.nonzero(ok)[0]:
        t, o = thd[u], h1[u]
        over = np.nonzero(t > thd_limit)[0]
        if over.size == 0:
            headroom[u] = o[-1]
        elif over[0] == 0:
            headroom[u] = o[0] * thd_limit / t[0]  # THD ~ level below the grid: a first-order estimate
        else:
            i = over[0]
            w = (np.log(thd_limit) - np.log(t[i - 1])) / (np.log(t[i]) - np.log(t[i - 1]))
            headroom[u] = math.exp(np.log(o[i - 1]) + w * (np.log(o[i]) - np.log(o[i - 1])))
        if level is not None and o[0] <= level <= o[-1]:
            lo_ = np.log(o)
            # output level is monotone in the drive up to the limit
            thd_at[u] = math.exp(np.interp(np.log(level), lo_, np.log(np.maximum(t, 1e-300))))
    return headroom, thd_at


def _point(stage, cases, thd_limit, level, slew_vpeak, grid_onset, cutoff_fraction):
    """Every figure for every case at one stage value: dict name -> (U,)."""
    positions = tube_positions(stage)
    U = len(cases)
    out = {}
    groups: dict = {}
    for i, c in enumerate(cases):
        groups.setdefault(tuple(_group_key(t) for t in c), []).append(i)
    for idx in groups.values():
        n = len(idx)
        banks = tuple(_Bank.of([cases[i][j] for i in idx]) for j in range(len(positions)))
        fig = _analyse(stage, banks, n, slew_vpeak)
        row = {"ia": fig["ia"], "gain": fig["gain"], "zout": fig["zout"]}
        for p in positions:
            row[p + ".va"] = fig[p + ".va"]
            row[p + ".pa"] = fig[p + ".pa"]
        vhk = np.max(np.stack([np.abs(np.broadcast_to(fig[p + ".vhk"], (n,))) for p in positions]), axis=0)
        row["vhk_margin"] = stage.vhk_max - vhk
        row["slew_fmax"] = fig["slew_fmax"]
        op = _DC[type(stage)](stage, banks, n)
        op = {k: np.broadcast_to(np.asarray(v, float), (n,)) for k, v in op.items()}
        conducting = np.all(np.stack([op[p + ".ia"] > 1e-6 for p in positions]), axis=0)
        head, thd = _large_signal(stage, banks, op, n, thd_limit, level, grid_onset, cutoff_fraction)
        row["headroom"] = np.where(conducting, head, np.nan)
        row["thd"] = np.where(conducting, thd, np.nan)
        for k, v in row.items():
            out.setdefault(k, np.full(U, np.nan))[idx] = np.broadcast_to(v, (n,))
    return out


def _output_point(stage, cases, thd_limit, level):
    """Every figure of an output stage for every case at one stage value: dict name -> (U,),
    NaN where the stage cannot be solved with that case (a tube cut off at idle, a grid at
    the onset).  All cases at once (:func:`fitter.stage.output._solve_many`, which a test
    compares with one :func:`fitter.stage.output.solve_output` per case)."""
    from .output import _solve_many

    out, failed = _solve_many(stage, cases, thd=thd_limit, level=level)
    if stage.pa_max is None:
        out.pop("pa_ratio")
    out["_failed"] = failed
    return out


def component_sweep(stage, field_name: str, values, cases, *, labels=None, log: bool = False,
                    thd_limit: float = 0.01, level: float | None = None, slew_vpeak: float = 10.0,
                    grid_onset: float = 0.0, cutoff_fraction: float = 0.01, pairing: str = "") -> ComponentSweep:
    """Sweep ``field_name`` of ``stage`` over ``values`` for every case.

    Parameters
    ----------
    stage : CommonCathode, CathodeFollower, Stack, SingleEndedOutput or PushPullOutput
        The circuit; the swept field's own value is replaced by each of ``values`` (an output
        stage's ``load`` replaces its turns ratio, and the other way round).  Output stages
        give each tube's idle current, voltage and dissipation, the largest output
        ``p_max``, the output at ``thd_limit`` ``p_thd``, THD at ``level`` [W], output
        impedance, damping factor, the largest dissipation over the limit (with
        ``pa_max``) and the DC imbalance (push-pull), as
        :func:`fitter.stage.output.solve_output` gives them (computed for all units at once).
    field_name : str
        A numeric field of the stage (see :func:`sweepable_fields`).
    values : array_like
        The values, SI (:func:`sweep_values` makes a range).
    cases : sequence of tuples of FittedTriode
        One tuple per case, a triode for each tube position (``(t,)``, or ``(bottom, top)``).
    thd_limit : float
        THD threshold of the headroom, a fraction (0.01 = 1 %).
    level : float or None
        Output level [V peak; W for an output stage] for the THD column; None: not computed.
    slew_vpeak : float
        Output peak amplitude of the slew-rate figure [V].

    Raises
    ------
    StageInputError
        An unknown or non-numeric field (named), a value the stage refuses (its field
        named, with the value), a bad threshold or level.
    """
    from ..triode import FittedTriode

    output = _is_output(stage)
    _kind(stage)
    names = [f.name for f in fields(stage)]
    if field_name not in names:
        raise StageInputError(f"a {_kind(stage)} stage has no field {field_name!r}; numeric fields: "
                              + ", ".join(sweepable_fields(stage)), field="vary")
    if field_name not in sweepable_fields(stage):
        raise StageInputError(f"{field_name!r} is not a numeric field and cannot be swept", field="vary")
    values = np.asarray(values, float)
    if values.ndim != 1 or values.size == 0 or not np.all(np.isfinite(values)):
        raise StageInputError("the values to sweep must be finite numbers", field=field_name)
    if not (isinstance(thd_limit, (int, float)) and 0 < thd_limit < 1):
        raise StageInputError(f"a fraction between 0 and 1 (0.01 = 1 %), got {thd_limit!r}", field="thd_limit")
    if level is not None and not (isinstance(level, (int, float)) and math.isfinite(level) and level > 0):
        raise StageInputError(f"must be a positive amplitude in volts, got {level!r}", field="level")
    if not (isinstance(slew_vpeak, (int, float)) and math.isfinite(slew_vpeak) and slew_vpeak > 0):
        raise StageInputError(f"must be a positive number of volts, got {slew_vpeak!r}", field="slew_vpeak")
    cases = [tuple(c) for c in cases]
    if not cases:
        raise StageInputError("no units given", field="units")
    npos = len(stage.positions if output else tube_positions(stage))
    for c in cases:
        if len(c) != npos or not all(isinstance(t, FittedTriode) for t in c):
            raise ValueError(f"component_sweep: each case needs {npos} FittedTriode(s)")
    if labels is None:
        labels = ["/".join(t.label for t in c) for c in cases]
    stages = []
    extra = {}
    if output and field_name == "load":
        extra["turns_ratio"] = None  # the load replaces a turns ratio
    elif output and field_name == "turns_ratio":
        extra["load"] = None
    for v in values:
        try:
            stages.append(replace(stage, **{field_name: float(v)}, **extra))
        except StageInputError as e:
            raise StageInputError(f"{e.message} (swept value {v:g})", field=e.field, owner=e.owner) from None
    P, U = len(values), len(cases)
    figures: dict = {}
    notes = []
    failed = 0
    for i, st in enumerate(stages):
        if output:
            row = _output_point(st, cases, thd_limit, level)
            failed += row.pop("_failed")
        else:
            row = _point(st, cases, thd_limit, level, slew_vpeak, grid_onset, cutoff_fraction)
        for k, v in row.items():
            figures.setdefault(k, np.full((P, U), np.nan))[i] = v
    if level is None:
        figures.pop("thd", None)
    if output:
        if failed:
            notes.append(f"{failed} of {P * U} (value, unit) cases could not be solved (a tube cut off at idle, or "
                         "the grid at the grid-current onset): left out")
        if level is not None and np.isnan(figures["thd"]).sum() > failed:
            notes.append(f"THD at {level:g} W: left out where the level is beyond the largest output")
        return ComponentSweep(replace(stage), field_name, values, log, list(labels), figures, thd_limit, level,
                              slew_vpeak, pairing, notes)
    cut = np.isnan(figures["headroom"])
    if cut.any():
        notes.append(f"{int(cut.sum())} of {cut.size} (value, unit) cases have no signal swing (a tube cut off "
                     "or at grid-current onset without signal): no headroom or THD there")
    if level is not None and np.isnan(figures["thd"]).sum() > cut.sum():
        notes.append(f"THD at {level:g} V peak: left out where the level is beyond the drive limit")
    return ComponentSweep(replace(stage), field_name, values, log, list(labels), figures, thd_limit, level,
                          slew_vpeak, pairing, notes)
