"""Load lines and signal swings of a solved stage, as data.

:func:`load_lines` gives, for each tube position, the operating point, the DC load line (a
straight line ``Ra + Rk`` for a common-cathode stage or cathode follower; for a stack the
locus of the operating point as the bottom grid bias varies), the AC load line (the path of
the mid-band signal), the swing up to grid-current onset or cutoff, the span of plate
voltage and current that shows them, and the tube's plate curves over that span.  :mod:`fitter.plotting_stage` only draws these; a web
page can draw them its own way from :meth:`LoadLines.to_dict`.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .circuits import CathodeFollower, CommonCathode, tube_positions
from .distortion import drive_limit
from .results import StageResult, _num
from .solver import operating_point, quasi_static

__all__ = ["PlateCurves", "LoadLine", "LoadLines", "load_lines", "plate_curves"]


def _listed(a, scale=1.0):
    return [_num(x * scale) for x in np.asarray(a, float).ravel()]


@dataclass(frozen=True)
class PlateCurves:
    """A tube's plate-curve family over a load-line plot's span (SI: V, A).

    Attributes
    ----------
    va : ndarray
        Plate voltages of every curve [V].
    vg : ndarray
        Grid voltage of each curve [V], from 0 V down past cutoff, every ``step`` volts.
    ia : ndarray
        Plate current, one row per curve [A].
    extrapolated : ndarray of bool
        Curves outside the card's fitted grid range (beyond 2 % of its span).
    step : float
        Grid step between the curves [V] (a round number: about 11 curves down to cutoff).
    vg_q : float
        Grid voltage of the operating point [V]; ``ia_q_curve`` its curve [A] and
        ``q_extrapolated`` whether that curve is outside the fitted range.
    fitted_vg : tuple or None
        The card's fitted grid range [V].
    """

    va: np.ndarray
    vg: np.ndarray
    ia: np.ndarray
    extrapolated: np.ndarray
    step: float
    vg_q: float
    ia_q_curve: np.ndarray
    q_extrapolated: bool
    fitted_vg: tuple | None

    def to_dict(self) -> dict:
        return {"va_v": _listed(self.va), "vg_v": _listed(self.vg),
                "ia_ma": [_listed(row, 1e3) for row in self.ia],
                "extrapolated": [bool(x) for x in self.extrapolated], "step_v": _num(self.step),
                "vg_q_v": _num(self.vg_q), "ia_q_curve_ma": _listed(self.ia_q_curve, 1e3),
                "q_extrapolated": self.q_extrapolated,
                "fitted_vg_v": None if self.fitted_vg is None else [_num(x) for x in self.fitted_vg]}


def _nice_step(span: float, most: int = 12) -> float:
    for s in (0.1, 0.2, 0.25, 0.5, 1.0, 2.0, 2.5, 5.0, 10.0, 20.0, 25.0, 50.0, 100.0):
        if span / s <= most:
            return s
    return 200.0


def _outside_grid(triode, vg) -> bool:
    """True when grid voltage ``vg`` [V] lies outside the card's fitted grid range
    (beyond a 2 % margin of its span), i.e. the curve is extrapolated."""
    rng = triode.valid_range
    if not rng or "vg" not in rng:
        return False
    lo, hi = rng["vg"]
    tol = 0.02 * max(hi - lo, 0.1)
    return bool(vg < lo - tol or vg > hi + tol)


def plate_curves(triode, va_max: float, vg_q: float, mu: float) -> PlateCurves:
    """The plate-curve family of ``triode`` from 0 to ``va_max`` [V], grid from 0 V down
    to past cutoff (``-va_max / mu``) in round steps, and the curve at ``vg_q`` [V]."""
    vg_cut = -va_max / max(mu, 0.5)
    step = _nice_step(abs(vg_cut), 11)
    va = np.linspace(0.0, va_max, 400)
    grids = np.array([float(np.round(g, 9)) + 0.0 for g in np.arange(0.0, vg_cut - step, -step)])
    ia = np.array([triode.current(va, np.full_like(va, g)) for g in grids]).reshape(grids.size, va.size)
    out = np.array([_outside_grid(triode, g) for g in grids], dtype=bool)
    rng = triode.valid_range
    fitted = tuple(rng["vg"]) if rng and "vg" in rng else None
    return PlateCurves(va, grids, ia, out, step, float(vg_q), triode.current(va, np.full_like(va, vg_q)),
                       _outside_grid(triode, vg_q), fitted)


@dataclass(frozen=True)
class LoadLine:
    """The load lines of one tube position (SI: V, A, ohm).

    Attributes
    ----------
    position : str
        ``"tube"``, ``"bottom"`` or ``"top"``.
    va_q, vgk_q, ia_q, mu_q : float
        The operating point: plate and grid voltage to the cathode [V], plate current [A], mu.
    dc_va, dc_ia : ndarray
        The DC load line (points) [V], [A].
    dc_resistance : float or None
        Its resistance [ohm] where it is a straight line (``Ra + Rk``), else None.
    ac_va, ac_ia : ndarray
        The AC load line (points through the operating point) [V], [A].
    ac_resistance : float or None
        Its resistance [ohm] where it is a straight line, else None.
    swing_va, swing_ia : ndarray
        The path of the signal up to the drive limit [V], [A].
    va_max, ia_max : float
        The span of plate voltage [V] and current [A] that shows all of it.
    curves : PlateCurves
        The tube's plate curves over that span.
    """

    position: str
    va_q: float
    vgk_q: float
    ia_q: float
    mu_q: float
    dc_va: np.ndarray
    dc_ia: np.ndarray
    dc_resistance: float | None
    ac_va: np.ndarray
    ac_ia: np.ndarray
    ac_resistance: float | None
    swing_va: np.ndarray
    swing_ia: np.ndarray
    va_max: float
    ia_max: float
    curves: PlateCurves

    def to_dict(self) -> dict:
        """Voltages in V, currents in mA, resistances in ohm."""
        return {
            "position": self.position, "va_q_v": _num(self.va_q), "vgk_q_v": _num(self.vgk_q),
            "ia_q_ma": _num(1e3 * self.ia_q), "mu_q": _num(self.mu_q),
            "dc": {"va_v": _listed(self.dc_va), "ia_ma": _listed(self.dc_ia, 1e3),
                   "resistance_ohm": None if self.dc_resistance is None else _num(self.dc_resistance)},
            "ac": {"va_v": _listed(self.ac_va), "ia_ma": _listed(self.ac_ia, 1e3),
                   "resistance_ohm": None if self.ac_resistance is None else _num(self.ac_resistance)},
            "swing": {"va_v": _listed(self.swing_va), "ia_ma": _listed(self.swing_ia, 1e3)},
            "va_max_v": _num(self.va_max), "ia_max_ma": _num(1e3 * self.ia_max),
            "curves": self.curves.to_dict(),
        }


@dataclass(frozen=True)
class LoadLines:
    """The load lines of every tube of a solved stage and the swing that drove them.

    Attributes
    ----------
    result : StageResult
        The solved stage.
    lines : tuple of LoadLine
        One per tube position.
    swing_vin_peak : float
        Input peak amplitude of the swing [V] (the drive limit).
    swing_limit : str
        What ends the swing (``"grid-current onset"``, ``"cutoff"`` ...).
    """

    result: StageResult
    lines: tuple
    swing_vin_peak: float
    swing_limit: str

    def to_dict(self) -> dict:
        return {"stage": self.result.to_dict()["stage"], "swing_vin_peak_v": _num(self.swing_vin_peak),
                "swing_limit": self.swing_limit, "tubes": {ln.position: ln.to_dict() for ln in self.lines}}


def load_lines(result: StageResult) -> LoadLines:
    """The DC and AC load lines and the signal swing of each tube of ``result``.

    The swing runs to the drive limit (:func:`fitter.stage.distortion.drive_limit`); the AC
    line of a single-tube stage is a straight line through the operating point whose slope
    is fitted to the mid-band path over three times that swing (least squares, its points
    with current); a stack's lines are the quasi-static loci themselves.
    """
    st = result.stage
    triodes = result.triodes
    f = result.figures
    op = operating_point(st, *triodes)
    lim = drive_limit(st, *triodes, op=op)
    amp = lim.vin_peak
    swing = quasi_static(st, *triodes, vin=np.linspace(-amp, amp, 201), op=op)
    wide = quasi_static(st, *triodes, vin=np.linspace(-3 * amp, 3 * amp, 301), op=op)
    single = isinstance(st, (CommonCathode, CathodeFollower))
    lines = []
    for pos, t in zip(tube_positions(st), triodes):
        va_q, ia_q, vgk_q = f[pos + ".va"], f[pos + ".ia"], f[pos + ".vgk"]
        va_max = (st.b_plus - st.vneg if isinstance(st, CathodeFollower) else st.b_plus) * 1.05
        if single:
            supply = st.b_plus - (st.vneg if isinstance(st, CathodeFollower) else 0.0)
            r_dc = st.ra + st.rk
            ia_top = min(supply / r_dc * 1.15, 4.0 * ia_q) if r_dc > 0 else 4.0 * ia_q
        else:
            ia_top = 2.6 * ia_q
        ia_top = max(ia_top, 1.8 * ia_q)
        if single:
            dc_va, dc_ia = np.array([supply, 0.0]), np.array([0.0, supply / r_dc])
            # the AC line through Q with the mid-band resistance the tube sees
            va_w, ia_w = wide[pos + ".va"], wide[pos + ".ia"]
            on = ia_w > 0
            slope = np.polyfit(1e3 * ia_w[on], va_w[on], 1)[0] if np.sum(on) > 3 else -1.0  # [V/mA]
            r_ac = -slope * 1e3
            i_line = np.linspace(0.0, 1e3 * ia_top, 50)  # [mA]
            ac_va, ac_ia = va_q + (i_line - 1e3 * ia_q) * slope, i_line / 1e3
            dc_r, ac_r = r_dc, r_ac
        else:
            # the bottom grid swept from well below this tube's bias to above the bottom's
            dcl = quasi_static(st, *triodes, vin=np.linspace(-40.0 * abs(vgk_q) - 5, 3.0 * abs(f["bottom.vgk"]) + 2, 300),
                               dc_grid=True)
            dc_va, dc_ia = dcl[pos + ".va"], dcl[pos + ".ia"]
            ac_va, ac_ia = wide[pos + ".va"], wide[pos + ".ia"]
            dc_r = ac_r = None
        lines.append(LoadLine(pos, va_q, vgk_q, ia_q, f[pos + ".mu"], dc_va, dc_ia, dc_r, ac_va, ac_ia, ac_r,
                              swing[pos + ".va"], swing[pos + ".ia"], va_max, ia_top,
                              plate_curves(t, va_max, vgk_q, f[pos + ".mu"])))
    return LoadLines(result, tuple(lines), amp, lim.reason)
