"""Large-signal distortion of a stage from its fitted tubes (quasi-static, mid-band).

For a sine on the input grid, the output waveform is solved point by point with the
stage's mid-band large-signal equations (:func:`fitter.stage.quasi_static`): the
coupling and bypass capacitors hold their DC charge, the signal is slow enough for
the interelectrode capacitances not to matter, and no grid current flows unless the
tube's model has a grid-current part.  The harmonics H2..H10 of the output come
from projecting one period onto cosines and sines (:func:`harmonic_amplitudes`),
and THD = sqrt(H2^2 + ... + H10^2) / H1.

* :func:`analyse`: harmonics and THD at one level (input or output amplitude);
* :func:`drive_limit`: the largest input before grid-current onset or cutoff of
  any tube (the end of a sweep);
* :func:`sweep`: THD against output level up to that limit, with the headroom at
  a THD threshold (the largest output before THD passes it).

Everything is vectorised over levels and waveform samples.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

from functools import lru_cache

import numpy as np

from .. import CAUTION
from .circuits import StageInputError, output_node, stage_kind, stage_title, tube_positions
from .solver import StageSolveError, operating_point, quasi_static

__all__ = [
    "N_HARMONICS",
    "harmonic_amplitudes",
    "Distortion",
    "DriveLimit",
    "DistortionSweep",
    "analyse",
    "drive_limit",
    "sweep",
    "assumptions",
]

#: Harmonics reported: H1 (fundamental) to H10.
N_HARMONICS = 10


@lru_cache(maxsize=32)
def _fourier_basis(N, n_harmonics):
    """(2/N) cos(k theta), (2/N) sin(k theta) for k = 0..n at the N samples, (N, n + 1) each
    (kept: the spectra of a solve use the same few sizes over and over)."""
    theta = 2 * np.pi * np.arange(N) / N
    k = np.arange(n_harmonics + 1)[:, None]
    c, s = np.cos(k * theta).T * (2.0 / N), np.sin(k * theta).T * (2.0 / N)
    c.flags.writeable = False
    s.flags.writeable = False
    return c, s


def harmonic_amplitudes(y, n_harmonics: int = N_HARMONICS):
    """Peak amplitude of harmonics 0..n of periodic samples (one period per row).

    Parameters
    ----------
    y : array_like, shape (..., N)
        Samples y(2 pi k / N), k = 0..N-1, of one period [any unit].
    n_harmonics : int
        Highest harmonic (N must exceed 2 n for the projection to be exact).

    Returns
    -------
    ndarray, shape (..., n_harmonics + 1)
        Index 0 is the mean (DC); index k the peak amplitude sqrt(a_k^2 + b_k^2)
        with a_k = (2/N) sum y cos(k theta), b_k = (2/N) sum y sin(k theta).
    """
    y = np.asarray(y, dtype=float)
    N = y.shape[-1]
    if N <= 2 * n_harmonics:
        raise ValueError(f"harmonic_amplitudes: need more than {2 * n_harmonics} samples per period, got {N}")
    cos_t, sin_t = _fourier_basis(N, n_harmonics)
    a = y @ cos_t
    b = y @ sin_t
    amp = np.hypot(a, b)
    amp[..., 0] = a[..., 0] / 2.0
    return amp


def assumptions(triodes) -> list[str]:
    """The assumptions a distortion report states."""
    grid = [t.label for t in triodes if t.model.carries_grid_current(t.params)]
    out = [
        "quasi-static: the waveform is solved point by point (no reactances in the signal band)",
        "mid-band: coupling and bypass capacitors hold their DC charge",
    ]
    if grid:
        out.append("grid current: the model of " + ", ".join(grid) + " includes it in the plate current; "
                   "loading of the source by grid current is not modelled")
    else:
        out.append("no grid current: the models have none, so results past grid-current onset are not valid")
    out.append(f"harmonics H2..H{N_HARMONICS} of the output's fundamental; THD = sqrt(sum Hk^2)/H1; "
               f"below {DB_FLOOR:.0f} dB they are under the solve's numerical resolution (shown as <{DB_FLOOR:.0f})")
    return out


def _lower(title: str) -> str:
    return title[:1].lower() + title[1:]


def _who(pos: str) -> str:
    return "the tube" if pos == "tube" else f"the {pos} tube"


def _levels_waveforms(stage, triodes, op, amps, n_samples):
    """Solve the output for each input amplitude: returns (theta, results dict of (L, N))."""
    amps = np.atleast_1d(np.asarray(amps, dtype=float))
    theta = 2 * np.pi * np.arange(n_samples) / n_samples
    vin = amps[:, None] * np.sin(theta)[None, :]
    res = quasi_static(stage, *triodes, vin=vin, op=op)
    return theta, vin, res


def _spectrum(stage, op, res):
    node = output_node(stage)
    y = res[node] - op[node]
    return y, harmonic_amplitudes(y)


#: Real triodes start to draw grid current somewhat below 0 V grid-cathode voltage, about
#: -0.5 to -1 V depending on the heater and contact potential (common practice).  A
#: swing that comes this close to the onset without a grid-current model gets a warning.
GRID_CURRENT_MARGIN = 1.0


#: A tube drawing less than this at the operating point [A] is cut off: there is no
#: signal to analyse.
CUTOFF_CURRENT = 1e-6


def _require_conduction(stage, triodes, op):
    """Raise StageSolveError when a tube is cut off at the operating point."""
    for p, t in zip(tube_positions(stage), triodes):
        ia = float(np.max(np.atleast_1d(op[p + ".ia"])))
        if ia < CUTOFF_CURRENT:
            raise StageSolveError(
                f"{_who(p)} ({t.label}) is cut off at the operating point (Ia {ia * 1e3:.3g} mA, "
                f"Vgk {float(np.max(np.atleast_1d(op[p + '.vgk']))):+.4g} V): the stage passes no signal to analyse")


def _stage_warnings(stage, triodes) -> list[str]:
    """The stage's DC warnings (heater-cathode, dissipation, extrapolation), so that a
    distortion report does not hide what the stage report would say."""
    from .analysis import solve

    return list(solve(stage, *triodes, errors=False).warnings)


def _has_grid_current(t) -> bool:
    return t.model.carries_grid_current(t.params)


#: Harmonics below this [dB re H1] are under the numerical resolution of the quasi-static
#: solve (256 samples, solver tolerance); reports print them as "<-140".
DB_FLOOR = -140.0


def _fmt_db(x: float, width: int) -> str:
    return f"{'<' + format(DB_FLOOR, '.0f'):>{width}}" if not np.isfinite(x) or x < DB_FLOOR else f"{x:{width}.1f}"


@dataclass
class Distortion:
    """Harmonics and THD of the output at one level.

    Attributes
    ----------
    vin_peak : float
        Input grid amplitude [V peak].
    vout_peak : float
        Fundamental amplitude at the output [V peak].
    harmonics : ndarray
        Peak amplitudes H1..H10 [V].
    thd : float
        Total harmonic distortion (fraction, not %).
    dc_shift : float
        Mean output offset from the operating point [V] (rectification).
    theta, vin, vout : ndarray
        One period of the waveform: phase [rad], input [V], output (AC) [V].
    tubes : dict
        Per tube position: arrays of va, vgk [V] and ia [A] over the period.
    """

    stage: object
    triodes: tuple
    vin_peak: float
    vout_peak: float
    harmonics: np.ndarray
    thd: float
    dc_shift: float
    theta: np.ndarray
    vin: np.ndarray
    vout: np.ndarray
    tubes: dict
    warnings: list = field(default_factory=list)

    @property
    def gain(self) -> float:
        """Large-signal gain: output fundamental over input amplitude (signed by phase)."""
        return self.vout_peak / self.vin_peak * self._sign

    @property
    def _sign(self) -> float:
        # sign of the fundamental's in-phase part relative to the input sine
        s = np.sum(self.vout * np.sin(self.theta))
        return 1.0 if s >= 0 else -1.0

    def harmonics_db(self) -> np.ndarray:
        """H2..H10 in dB relative to the fundamental."""
        with np.errstate(divide="ignore"):
            return 20 * np.log10(np.maximum(self.harmonics[1:], 1e-300) / self.harmonics[0])

    def to_dict(self) -> dict:
        h = self.harmonics
        db = self.harmonics_db()
        return {
            "stage": stage_kind(self.stage),
            "output": output_node(self.stage),
            "tubes": {p: t.label for p, t in zip(tube_positions(self.stage), self.triodes)},
            "vin_peak_v": float(self.vin_peak),
            "vout_peak_v": float(self.vout_peak),
            "vout_rms_v": float(self.vout_peak / math.sqrt(2)),
            "gain": float(self.gain),
            "thd_pct": float(100 * self.thd),
            "thd_db": float(20 * np.log10(self.thd)) if self.thd > 0 else None,
            "dc_shift_v": float(self.dc_shift),
            "harmonics": [
                {"n": k + 2, "v_peak": float(h[k + 1]), "db": (float(db[k]) if np.isfinite(db[k]) else None),
                 "pct": float(100 * h[k + 1] / h[0])}
                for k in range(N_HARMONICS - 1)
            ],
            "extremes": {
                p: {"va_v": [float(np.min(d["va"])), float(np.max(d["va"]))],
                    "vgk_max_v": float(np.max(d["vgk"])),
                    "ia_ma": [1e3 * float(np.min(d["ia"])), 1e3 * float(np.max(d["ia"]))]}
                for p, d in self.tubes.items()
            },
            "warnings": list(self.warnings),
            "assumptions": assumptions(self.triodes),
            "caution": CAUTION,
        }

    def report(self) -> str:
        lines = [f"Distortion of the {_lower(stage_title(self.stage))} at "
                 f"{self.vin_peak:.4g} V peak in, {self.vout_peak:.4g} V peak out "
                 f"({self.vout_peak / math.sqrt(2):.4g} V rms) at {output_node(self.stage).replace('_', ' ')}",
                 CAUTION, "",
                 f"  THD {100 * self.thd:.4g} %  ({20 * np.log10(max(self.thd, 1e-300)):.1f} dB)   "
                 f"large-signal gain {self.gain:.4g}   DC shift {self.dc_shift:+.3g} V", "",
                 "  harmonic   dB re H1        %      V peak"]
        db = self.harmonics_db()
        for k in range(N_HARMONICS - 1):
            lines.append(f"  H{k + 2:<8} {_fmt_db(db[k], 8)} {100 * self.harmonics[k + 1] / self.harmonics[0]:10.4f} "
                         f"{self.harmonics[k + 1]:10.3g}")
        if self.warnings:
            lines.append("")
            lines.extend("  ! " + w for w in self.warnings)
        lines.append("")
        lines.append("Assumptions:")
        lines.extend("  - " + a for a in assumptions(self.triodes))
        return "\n".join(lines)


@dataclass
class DriveLimit:
    """Largest input amplitude before a tube leaves its valid region.

    Attributes
    ----------
    vin_peak : float
        Input amplitude [V peak] at the first limit.
    reason : str
        ``"grid-current onset"``, ``"cutoff"`` or ``"none found"``.
    position : str or None
        Tube position that reached it.
    detail : str
    """

    vin_peak: float
    reason: str
    position: str | None
    detail: str

    def to_dict(self) -> dict:
        return {"vin_peak_v": float(self.vin_peak), "reason": self.reason, "tube": self.position,
                "detail": self.detail}


def _check_common(stage, triodes, n_samples):
    stage_kind(stage)
    if not (isinstance(n_samples, int) and n_samples > 2 * N_HARMONICS):
        raise StageInputError(f"need an integer above {2 * N_HARMONICS}, got {n_samples!r}", field="n_samples")


def drive_limit(stage, *triodes, op=None, grid_onset: float = 0.0, cutoff_fraction: float = 0.01,
                max_drive: float | None = None) -> DriveLimit:
    """Input amplitude at which the first tube reaches grid-current onset or cutoff.

    Grid-current onset: a tube's grid-cathode voltage reaches ``grid_onset`` [V] at
    the crest.  Cutoff: a tube's current falls below ``cutoff_fraction`` of its
    standing current.  The quasi-static transfer is monotone in the input, so the
    extremes occur at the crests +-A; the amplitude is found on a geometric grid and
    refined twice (relative precision about 1e-4), then interpolated.
    """
    if op is None:
        op = operating_point(stage, *triodes)
    if not (0 < cutoff_fraction < 1):
        raise StageInputError(f"must lie between 0 and 1, got {cutoff_fraction!r}", field="cutoff_fraction")
    positions = tube_positions(stage)
    top = max_drive if max_drive is not None else 2.0 * (stage.b_plus + abs(getattr(stage, "vneg", 0.0)))

    def margins(amps):
        amps = np.asarray(amps, float)
        v = np.concatenate([amps, -amps])
        res = quasi_static(stage, *triodes, vin=v, op=op)
        m = {}
        k = amps.size
        for p in positions:
            vgk = res[p + ".vgk"]
            ia = res[p + ".ia"]
            m[(p, "grid-current onset")] = np.maximum(vgk[:k], vgk[k:]) - grid_onset
            m[(p, "cutoff")] = cutoff_fraction * op[p + ".ia"] - np.minimum(ia[:k], ia[k:])
        return m

    first = None
    lo_a, hi_a = 1e-4, top
    grid = np.geomspace(lo_a, hi_a, 48)
    for rnd in range(3):
        if rnd == 0:
            # the first, geometric grid is solved from small drives up, a few at a time, and
            # stops at the first chunk that passes a limit: drives far beyond it (up to twice
            # the supply) need not be solved, and a stack may not converge there at all
            m = {}
            for lo in range(0, grid.size, 8):
                part = margins(grid[lo:lo + 8])
                m = {key: np.concatenate([m.get(key, np.empty(0)), v]) for key, v in part.items()}
                if any(np.any(v >= 0) for v in part.values()):
                    grid = grid[:lo + 8]
                    break
        else:
            m = margins(grid)
        best = None
        for key, v in m.items():
            idx = np.nonzero(v >= 0)[0]
            if idx.size and (best is None or idx[0] < best[1]):
                best = (key, idx[0])
        if best is None:
            if rnd == 0:
                return DriveLimit(float(top), "none found", None,
                                  f"no grid-current onset or cutoff below {top:.4g} V peak input")
            break
        key, i = best
        if i == 0:
            if rnd == 0:
                # already past a limit at the smallest drive: the operating point itself
                who = "the tube" if key[0] == "tube" else f"the {key[0]} tube"
                return DriveLimit(0.0, key[1], key[0], f"{who} is at {key[1]} without signal")
            first = (key, grid[0], grid[0], 0.0, 0.0)
            break
        first = (key, grid[i - 1], grid[i], m[key][i - 1], m[key][i])
        grid = np.linspace(grid[i - 1], grid[i], 32)
    key, a0, a1, m0, m1 = first
    a = a0 if m1 == m0 else a0 + (a1 - a0) * (-m0) / (m1 - m0)
    p, reason = key
    who = "the tube" if p == "tube" else f"the {p} tube"
    detail = (f"{who}'s grid reaches {grid_onset:g} V to its cathode" if reason == "grid-current onset"
              else f"{who}'s current falls below {100 * cutoff_fraction:g} % of its standing current")
    return DriveLimit(float(a), reason, p, detail)


def _distortion_at(stage, triodes, op, amps, n_samples):
    theta, vin, res = _levels_waveforms(stage, triodes, op, amps, n_samples)
    y, H = _spectrum(stage, op, res)
    h = H[:, 1:]
    with np.errstate(invalid="ignore", divide="ignore"):
        thd = np.sqrt(np.sum(h[:, 1:] ** 2, axis=1)) / h[:, 0]
    return theta, vin, res, y, H, thd


def analyse(stage, *triodes, vin_peak: float | None = None, vout_peak: float | None = None,
            n_samples: int = 256, grid_onset: float = 0.0) -> Distortion:
    """Harmonics and THD at one level, given as input or output amplitude.

    Parameters
    ----------
    vin_peak : float
        Input grid amplitude [V peak], or
    vout_peak : float
        Target fundamental amplitude at the output [V peak] (the input is found by a
        bracketed secant search).
    n_samples : int
        Samples per period (exact projection for harmonics below n_samples/2).
    """
    _check_common(stage, triodes, n_samples)
    if (vin_peak is None) == (vout_peak is None):
        raise StageInputError("give exactly one of vin_peak and vout_peak")
    for name, v in (("vin_peak", vin_peak), ("vout_peak", vout_peak)):
        if v is not None and not (isinstance(v, (int, float)) and math.isfinite(v) and v > 0):
            raise StageInputError(f"must be a positive amplitude in volts, got {v!r}", field=name)
    op = operating_point(stage, *triodes)
    _require_conduction(stage, triodes, op)
    warnings = _stage_warnings(stage, triodes)
    if vout_peak is not None:
        vin_peak = _input_for_output(stage, triodes, op, float(vout_peak), n_samples)
    theta, vin, res, y, H, thd = _distortion_at(stage, triodes, op, [vin_peak], n_samples)
    tubes = {p: {"va": res[p + ".va"][0], "vgk": res[p + ".vgk"][0], "ia": res[p + ".ia"][0]}
             for p in tube_positions(stage)}
    for p, t in zip(tube_positions(stage), triodes):
        vmax = float(np.max(tubes[p]["vgk"]))
        if vmax >= grid_onset:
            warnings.append(f"{_who(p)}'s grid reaches {vmax:+.3g} V to its cathode: "
                            "past grid-current onset" + ("" if t.model.grid_current else
                                                         " (this model has no grid current: not valid)"))
        elif vmax >= grid_onset - GRID_CURRENT_MARGIN and not _has_grid_current(t):
            warnings.append(f"{_who(p)}'s grid comes to {vmax:+.3g} V from its cathode: real tubes begin "
                            f"to draw grid current within about {GRID_CURRENT_MARGIN:g} V of 0 V (common "
                            "practice), which this model leaves out")
        if np.min(tubes[p]["ia"]) <= 0.01 * op[p + ".ia"]:
            warnings.append(f"{_who(p)} cuts off over part of the cycle")
        if t.outside_range(tubes[p]["va"], tubes[p]["vgk"], ia=tubes[p]["ia"]):
            warnings.append(f"{_who(p)}'s swing leaves the fitted data of {t.label}: extrapolating"
                            + (f" ({t.envelope.outside(tubes[p]['va'], tubes[p]['vgk'], tubes[p]['ia'])}; "
                               f"{t.envelope.describe()})" if t.envelope is not None else ""))
    return Distortion(stage, tuple(triodes), float(vin_peak), float(H[0, 1]), H[0, 1:], float(thd[0]),
                      float(H[0, 0]), theta, vin[0], y[0], tubes, warnings)


def _input_for_output(stage, triodes, op, target, n_samples):
    def out(a):
        *_, H, _ = _distortion_at(stage, triodes, op, [a], n_samples)
        return float(H[0, 1])

    a0 = 1e-3
    g = out(a0) / a0
    if not g > 0:
        raise StageInputError("the stage has no gain at this operating point", field="vout_peak")
    lo, flo = 0.0, 0.0
    hi = target / g
    fhi = out(hi)
    top = 4.0 * (stage.b_plus + abs(getattr(stage, "vneg", 0.0)))
    while fhi < target:
        lo, flo = hi, fhi
        hi *= 2.0
        if hi > top:
            raise StageInputError(f"{target:g} V peak is more than the stage can deliver", field="vout_peak")
        fhi = out(hi)
    # Illinois regula falsi on the monotone output(amplitude)
    side = 0
    for _ in range(60):
        a = hi - (fhi - target) * (hi - lo) / (fhi - flo)
        fa = out(a)
        if abs(fa - target) <= 1e-9 * target:
            return a
        if fa > target:
            hi, fhi = a, fa
            if side == -1:
                flo = target + (flo - target) / 2
            side = -1
        else:
            lo, flo = a, fa
            if side == 1:
                fhi = target + (fhi - target) / 2
            side = 1
    return a


@dataclass
class DistortionSweep:
    """THD and harmonics against level, up to the drive limit, with the headroom.

    Attributes
    ----------
    vin_peak, vout_peak, thd : ndarray
        Per level: input [V peak], output fundamental [V peak], THD (fraction).
    harmonics : ndarray, shape (levels, 10)
        H1..H10 peak amplitudes [V].
    limit : DriveLimit
    thd_limit : float
        THD threshold of the headroom (fraction).
    headroom_vout_peak, headroom_vin_peak : float
        Largest output (and its input) before THD passes ``thd_limit``; the limit
        level itself when THD stays below the threshold.
    headroom_reason : str
    """

    stage: object
    triodes: tuple
    vin_peak: np.ndarray
    vout_peak: np.ndarray
    thd: np.ndarray
    harmonics: np.ndarray
    limit: DriveLimit
    thd_limit: float
    headroom_vout_peak: float
    headroom_vin_peak: float
    headroom_reason: str
    #: the stage's own DC warnings (heater-cathode, dissipation, extrapolation ...)
    warnings: list = field(default_factory=list)

    def to_dict(self) -> dict:
        h = self.harmonics
        with np.errstate(divide="ignore"):
            db = 20 * np.log10(np.maximum(h[:, 1:], 1e-300) / h[:, :1])
        return {
            "stage": stage_kind(self.stage),
            "output": output_node(self.stage),
            "tubes": {p: t.label for p, t in zip(tube_positions(self.stage), self.triodes)},
            "limit": self.limit.to_dict(),
            "thd_limit_pct": 100 * self.thd_limit,
            "headroom": {"vout_peak_v": float(self.headroom_vout_peak),
                         "vout_rms_v": float(self.headroom_vout_peak / math.sqrt(2)),
                         "vin_peak_v": float(self.headroom_vin_peak),
                         "limited_by": self.headroom_reason},
            "levels": [
                {"vin_peak_v": float(self.vin_peak[i]), "vout_peak_v": float(self.vout_peak[i]),
                 "vout_rms_v": float(self.vout_peak[i] / math.sqrt(2)), "thd_pct": float(100 * self.thd[i]),
                 "h_db": {f"h{k + 2}": float(db[i, k]) for k in range(N_HARMONICS - 1)}}
                for i in range(len(self.vin_peak))
            ],
            "warnings": list(self.warnings),
            "assumptions": assumptions(self.triodes),
            "caution": CAUTION,
        }

    def report(self) -> str:
        lines = [f"THD sweep of the {_lower(stage_title(self.stage))} "
                 f"({', '.join(t.label for t in self.triodes)}), output at "
                 f"{output_node(self.stage).replace('_', ' ')}", CAUTION, "",
                 f"  sweep ends at {self.limit.vin_peak:.4g} V peak input: {self.limit.reason}"
                 + (f" ({self.limit.detail})" if self.limit.detail else ""),
                 f"  headroom at {100 * self.thd_limit:g} % THD: {self.headroom_vout_peak:.4g} V peak "
                 f"({self.headroom_vout_peak / math.sqrt(2):.4g} V rms) out, {self.headroom_vin_peak:.4g} V peak in"
                 f" [{self.headroom_reason}]", "",
                 f"  {'Vin pk':>9} {'Vout pk':>9} {'THD %':>9} {'H2 dB':>7} {'H3 dB':>7} {'H4 dB':>7} {'H5 dB':>7}"]
        h = self.harmonics
        with np.errstate(divide="ignore"):
            db = 20 * np.log10(np.maximum(h[:, 1:], 1e-300) / h[:, :1])
        for i in range(len(self.vin_peak)):
            lines.append(f"  {self.vin_peak[i]:9.4g} {self.vout_peak[i]:9.4g} {100 * self.thd[i]:9.4g} "
                         + " ".join(_fmt_db(db[i, k], 7) for k in range(4)))
        if self.warnings:
            lines.append("")
            lines.extend("  ! " + w for w in self.warnings)
        lines.append("")
        lines.append("Assumptions:")
        lines.extend("  - " + a for a in assumptions(self.triodes))
        return "\n".join(lines)


def sweep(stage, *triodes, levels: int = 30, thd_limit: float = 0.01, lowest: float = 0.01,
          n_samples: int = 256, grid_onset: float = 0.0, cutoff_fraction: float = 0.01) -> DistortionSweep:
    """THD against output level, from ``lowest`` times the drive limit up to the limit.

    Parameters
    ----------
    levels : int
        Number of input levels (geometric spacing).
    thd_limit : float
        THD threshold for the headroom, as a fraction (0.01 = 1 %).
    lowest : float
        Lowest level as a fraction of the drive limit.
    grid_onset, cutoff_fraction : float
        Limits of the sweep (see :func:`drive_limit`).
    """
    _check_common(stage, triodes, n_samples)
    if not (isinstance(levels, int) and levels >= 2):
        raise StageInputError(f"need an integer of at least 2, got {levels!r}", field="levels")
    if not (0 < thd_limit < 1):
        raise StageInputError(f"a fraction between 0 and 1 (0.01 = 1 %), got {thd_limit!r}", field="thd_limit")
    if not (0 < lowest < 1):
        raise StageInputError(f"a fraction between 0 and 1, got {lowest!r}", field="lowest")
    op = operating_point(stage, *triodes)
    _require_conduction(stage, triodes, op)
    lim = drive_limit(stage, *triodes, op=op, grid_onset=grid_onset, cutoff_fraction=cutoff_fraction)
    if lim.vin_peak <= 0:
        raise StageInputError(f"sweep: no signal swing is possible ({lim.detail})")
    amps = np.geomspace(lowest * lim.vin_peak, lim.vin_peak, levels)
    *_, H, thd = _distortion_at(stage, triodes, op, amps, n_samples)
    over = np.nonzero(thd > thd_limit)[0]
    if over.size == 0:
        hv_in, hv_out = amps[-1], H[-1, 1]
        reason = f"{lim.reason} (THD stays below {100 * thd_limit:g} %)"
    else:
        i = over[0]
        lo_a, hi_a = (amps[i - 1], amps[i]) if i > 0 else (amps[0] * 1e-3, amps[0])
        for _ in range(2):
            grid = np.linspace(lo_a, hi_a, 24)
            *_, Hg, tg = _distortion_at(stage, triodes, op, grid, n_samples)
            above = np.nonzero(tg > thd_limit)[0]
            j = int(above[0]) if above.size else len(grid) - 1
            j = max(j, 1)
            lo_a, hi_a = grid[j - 1], grid[j]
            t0, t1 = tg[j - 1], tg[j]
            o0, o1 = Hg[j - 1, 1], Hg[j, 1]
        w = (thd_limit - t0) / (t1 - t0) if t1 != t0 else 1.0
        hv_in = lo_a + w * (hi_a - lo_a)
        hv_out = o0 + w * (o1 - o0)
        reason = f"THD reaches {100 * thd_limit:g} %"
    return DistortionSweep(stage, tuple(triodes), amps, H[:, 1], thd, H[:, 1:], lim, thd_limit,
                           float(hv_out), float(hv_in), reason, _stage_warnings(stage, triodes))
