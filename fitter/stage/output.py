"""Output stages: a single-ended and a push-pull power stage driving a loudspeaker
through an output transformer (or a choke and a reflected load).

The stage descriptions are plain frozen dataclasses with named numeric fields (SI units),
like :mod:`fitter.stage.circuits`, so that a generic sweep can vary any field.

Method (quasi-static, mid-band, like :mod:`fitter.stage.distortion`):

* The transformer is ideal (no leakage, no loss but the primary's DC resistance, whose
  magnetising inductance is large): at DC it is a short through ``r_primary``; in the
  signal band its magnetising current holds the idle current (an inductor is a current
  battery, as the bypass capacitors are voltage batteries), and the load current
  ``I - I0`` flows into the reflected load.  So the plate sees ``r_primary`` on the DC
  load line and ``r_primary + load`` on the AC load line through the operating point;
  only the reflected load takes power.
* Single-ended: plate = B+ + RL I0 - (Rdc + RL) I; with a bypassed cathode resistor the
  cathode holds Rk I0, unbypassed it follows Rk I.  One call of the tube kernel
  (:func:`fitter.stage.solver._solve_tube`) per waveform.
* Push-pull: a centre-tapped ideal transformer.  With ``v`` the voltage across each half
  primary (plate A = B+ - r IA - v, plate B = B+ - r IB + v, r = r_primary / 2), the
  ampere-turn balance gives v = (Raa / 4) (IA - IB - (IA0 - IB0)); the full primary carries
  2 v into the plate-to-plate load Raa.  ``v`` is found by a bracketed Newton iteration
  whose residual has slope >= 1 (:func:`fitter.stage.solver._solve_outer`), each tube by the
  kernel.  A shared cathode resistor adds the cathode voltage as an outer unknown (DC, and
  the signal when it is not bypassed).
* Harmonics from one period (:func:`fitter.stage.distortion.harmonic_amplitudes`) of the
  voltage across the reflected load; output power = H1^2 / (2 RL).

Figures (:func:`solve_output`): plate dissipation at idle and at full output against the
limit, the largest output before grid current (or cut-off, single-ended), the output at a
chosen THD, H2, H3 and THD against output power (30 levels), the grid drive for both, the
output impedance at the secondary ((rp + Rdc) / n^2, rp + (mu + 1) Rk unbypassed; push-pull
the two halves in parallel on the half winding) and the
damping factor, the primary's DC current (single-ended), the DC imbalance current and the
class-A limit with the crossover dip of the composite transconductance (push-pull).
:func:`load_sweep` gives power and distortion against the reflected load.
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass, field, replace
from functools import lru_cache

import numpy as np

from .. import CAUTION
from ..triode import FittedTriode
from .circuits import StageInputError, _check_number, _check_positive
from .distortion import DB_FLOOR, N_HARMONICS, _fmt_db, harmonic_amplitudes
from .solver import StageSolveError, _Bank, _solve_outer, _solve_tube

__all__ = ["SingleEndedOutput", "PushPullOutput", "OutputResult", "PowerSweep", "LoadSweep",
           "solve_output", "load_sweep", "drive_limits", "waveforms", "idle", "composite_characteristic"]

#: A tube carrying less than this fraction of its idle current is cut off (the end of the
#: single-ended swing, the end of class A in push-pull); common practice for "cut-off".
CUTOFF_FRACTION = 0.01
#: Samples per period for harmonics (H2..H10 need more than 20; 128 resolves them to far
#: below 0.01 dB for these smooth waveforms: a test compares with 1024).
N_SAMPLES = 128
#: Levels of the power sweep.
N_LEVELS = 30


def _check_bool(obj, name):
    if not isinstance(getattr(obj, name), bool):
        raise StageInputError(f"must be true or false, got {getattr(obj, name)!r}", field=name,
                              owner=type(obj).__name__)


#: plausible magnitudes of the fields (field, low, high, unit): far outside them a value is a
#: typo or a missing prefix, and the arithmetic would overflow or divide by zero
_RANGES = (("b_plus", 1e-3, 1e5, "V"), ("load", 1.0, 1e8, "ohm"), ("turns_ratio", 1e-3, 1e4, ""),
           ("speaker", 1e-2, 1e6, "ohm"), ("r_primary", 0.0, 1e7, "ohm"), ("grid_bias", 0.0, 1e5, "V"),
           ("rk", 1e-3, 1e7, "ohm"), ("pa_max", 1e-3, 1e5, "W"), ("grid_onset", 0.0, 100.0, "V"),
           ("cgk", 0.0, 1e-6, "F"), ("cga", 0.0, 1e-6, "F"), ("cak", 0.0, 1e-6, "F"), ("rs", 0.0, 1e8, "ohm"),
           ("c_in", 1e-15, 1.0, "F"), ("rg", 1.0, 1e9, "ohm"), ("ck", 1e-12, 10.0, "F"),
           ("l_primary", 1e-3, 1e5, "H"), ("l_leak", 0.0, 100.0, "H"), ("c_winding", 0.0, 1e-6, "F"))


@dataclass(frozen=True, kw_only=True)
class _OutputCommon:
    """Fields shared by both output stages.

    Parameters
    ----------
    b_plus : float
        Supply at the primary's centre tap or top [V].
    load : float or None
        Reflected load [ohm]: single-ended the primary load, push-pull plate to plate.
        Give it, or ``turns_ratio``.
    turns_ratio : float or None
        Primary : secondary turns ratio n (push-pull: the whole primary); the reflected
        load is then n^2 * ``speaker``.
    speaker : float
        Loudspeaker (secondary) impedance [ohm], for the damping factor, the secondary
        voltage and (with ``turns_ratio``) the reflected load.
    r_primary : float
        DC resistance of the primary [ohm] (push-pull: plate to plate, half per side).
    grid_bias : float or None
        Fixed bias: the grid's DC voltage [V] (negative).  Give it, or ``rk``.
    rk : float or None
        Cathode resistor [ohm] (push-pull: shared by both cathodes).
    bypassed : bool
        The cathode resistor is bypassed (its voltage holds the DC value in the signal band).
    pa_max : float or None
        Plate dissipation limit of each tube [W]; None: not checked.
    grid_onset : float
        Grid-cathode voltage where grid current starts [V] (0 V: common practice; real
        directly heated tubes begin slightly below).

    The remaining fields only shape the frequency response
    (:func:`fitter.stage.frequency.response`); the defaults leave a flat, ideal stage and
    change none of the quasi-static figures.

    cgk, cga, cak : float
        Interelectrode capacitances of each tube [F].
    rs : float
        Resistance of the driving source [ohm] (each grid's, push-pull).
    c_in : float or None
        Coupling capacitor to each grid [F]; None: direct coupling.
    rg : float or None
        Grid resistor to AC ground [ohm] (the grid leak, or the bias feed); None: none.
    ck : float or None
        The cathode bypass capacitor [F] (needs ``bypassed``); None: an ideal bypass.
    l_primary : float or None
        Magnetising inductance of the whole primary [H] (the low-frequency corner); None:
        an ideal transformer.
    l_leak : float
        Leakage inductance referred to the whole primary [H], in series with the reflected
        load (push-pull: half in each side); 0: none.
    c_winding : float
        Capacitance across the primary [F] (single-ended plate to AC ground, push-pull plate
        to plate); 0: none.
    """

    b_plus: float
    load: float | None = None
    turns_ratio: float | None = None
    speaker: float = 8.0
    r_primary: float = 0.0
    grid_bias: float | None = None
    rk: float | None = None
    bypassed: bool = True
    pa_max: float | None = None
    grid_onset: float = 0.0
    cgk: float = 0.0
    cga: float = 0.0
    cak: float = 0.0
    rs: float = 0.0
    c_in: float | None = None
    rg: float | None = None
    ck: float | None = None
    l_primary: float | None = None
    l_leak: float = 0.0
    c_winding: float = 0.0

    def __post_init__(self):
        owner = type(self).__name__
        _check_positive(self, "b_plus")
        _check_positive(self, "load", optional=True)
        _check_positive(self, "turns_ratio", optional=True)
        _check_positive(self, "speaker")
        _check_positive(self, "r_primary", allow_zero=True)
        _check_number(self, "grid_bias", optional=True)
        _check_positive(self, "rk", optional=True)
        _check_positive(self, "pa_max", optional=True)
        _check_number(self, "grid_onset")
        _check_bool(self, "bypassed")
        for name in ("cgk", "cga", "cak", "rs", "l_leak", "c_winding"):
            _check_positive(self, name, allow_zero=True)
        for name in ("c_in", "rg", "ck", "l_primary"):
            _check_positive(self, name, optional=True)
        for name, lo, hi, unit in _RANGES:
            v = getattr(self, name)
            if v is not None and not (lo <= abs(v) <= hi) and not (v == 0 and lo == 0):
                raise StageInputError(f"{v!r} is not a plausible value here ({lo:g} to {hi:g} {unit} "
                                      f"in magnitude)", field=name, owner=owner)
        if (self.load is None) == (self.turns_ratio is None):
            raise StageInputError("give the reflected load or the turns ratio, not both" if self.load is not None
                                  else "give the reflected load or the turns ratio (neither was given)",
                                  field="load", owner=owner, label="load/turns_ratio")
        if (self.grid_bias is None) == (self.rk is None):
            raise StageInputError("give a fixed grid bias or a cathode resistor, not both" if self.rk is not None
                                  else "give a fixed grid bias or a cathode resistor (neither was given)",
                                  field="grid_bias", owner=owner, label="grid_bias/rk")
        if not (1.0 <= self.reflected_load <= 1e8):
            raise StageInputError(f"the reflected load {self.reflected_load:.4g} ohm is not a plausible "
                                  f"transformer load (1 ohm to 100 Mohm)", field="load" if self.load is not None
                                  else "turns_ratio", owner=owner)
        if self.ck is not None and (self.rk is None or not self.bypassed):
            raise StageInputError("a bypass capacitor needs a bypassed cathode resistor", field="ck", owner=owner)
        if self.c_in is not None and self.rg is None:
            raise StageInputError("a coupling capacitor needs a grid resistor to hold the grid's DC voltage",
                                  field="rg", owner=owner)
        if self.grid_bias is not None and self.grid_bias > self.grid_onset:
            raise StageInputError(f"a fixed bias above the grid-current onset ({self.grid_onset:g} V) "
                                  f"draws grid current at idle, got {self.grid_bias!r}",
                                  field="grid_bias", owner=owner)

    @property
    def reflected_load(self) -> float:
        """The reflected load [ohm] (plate to plate for push-pull)."""
        return self.load if self.load is not None else self.turns_ratio ** 2 * self.speaker

    @property
    def ratio(self) -> float:
        """Primary : secondary turns ratio."""
        return self.turns_ratio if self.turns_ratio is not None else math.sqrt(self.load / self.speaker)

    @property
    def _rk(self) -> float:
        return 0.0 if self.rk is None else float(self.rk)

    @property
    def _vg(self) -> float:
        return 0.0 if self.grid_bias is None else float(self.grid_bias)


@dataclass(frozen=True, kw_only=True)
class SingleEndedOutput(_OutputCommon):
    """A single-ended output stage: one power triode, its plate load a transformer's primary
    (or a choke feeding the load through a capacitor: the same circuit), see
    :class:`_OutputCommon` for the fields."""

    kind = "single-ended"
    positions = ("tube",)


@dataclass(frozen=True, kw_only=True)
class PushPullOutput(_OutputCommon):
    """A push-pull output stage: two power triodes (A and B), grids driven in antiphase, a
    centre-tapped primary (``load`` plate to plate), fixed bias or one shared cathode
    resistor; class A or AB as the bias makes it.  See :class:`_OutputCommon`."""

    kind = "push-pull"
    positions = ("A", "B")


# ---------------------------------------------------------------------------
# Equations
# ---------------------------------------------------------------------------


def _banks(stage, triodes):
    n = len(stage.positions)
    if len(triodes) != n:
        raise StageInputError(f"a {stage.kind} stage takes {n} tube(s), got {len(triodes)}", field="tubes")
    for t in triodes:
        if not isinstance(t, FittedTriode):
            raise StageInputError(f"expected a fitted tube, got {type(t).__name__}", field="tubes")
    return [_Bank.of([t]) for t in triodes]


def _pp_tubes(banks, b_plus, r, v, vk, vga, vgb, xa=None, xb=None):
    """Both tubes of the push-pull at half-primary voltage v and cathode voltage vk."""
    ia, gaa, gga, da = _solve_tube(banks[0], b_plus - v - vk, r, vga - vk, 0.0, xa)
    ib, gab, ggb, db = _solve_tube(banks[1], b_plus + v - vk, r, vgb - vk, 0.0, xb)
    return ia, ib, (gaa, gga, da), (gab, ggb, db)


_JOINT_MAXIT = 40
#: the speed-ups that change no result beyond the iteration's tolerance: both tubes in one
#: model call, each sine value solved once, later solves started from the transfer already
#: solved (False: the plain path, which a test compares with)
_FAST = True
#: the transfer of a stage whose cathode does not shift solved at Chebyshev nodes, and every
#: level's harmonics taken from its series (within 1e-9 of the largest coefficient, so the
#: figures agree with sampling every level to about 1e-6; a test compares them)
_SERIES = True


def _pair_bank(banks, m, shape=None):
    """Both tubes as one bank over 2 m states (A's then B's, each flattened), so each step of
    the joint iteration evaluates the model once (a call's fixed cost is most of a step's for
    the waveforms' few hundred samples); None when the tubes differ in model or grid-current
    parameters (those stay scalar in a bank).  Banks of many units (parameters (rows, 1), for
    states of ``shape``) are spread over the states, so the model runs on flat arrays
    (broadcasting a column over short rows costs several times as much a point)."""
    a, b = banks
    if a.model is not b.model:
        return None
    if any(isinstance(a.params[n], np.ndarray) or isinstance(b.params[n], np.ndarray) or a.params[n] != b.params[n]
           for n in a.model.grid_param_names):
        return None
    arrays = bool(a.arrays() or b.arrays())
    if arrays and shape is None:
        return None
    # kept on the first bank (a solve makes the pair for the same sizes again and again)
    cache = a.__dict__.setdefault("_pairs", {})
    got = cache.get((id(b), m, shape if arrays else None))
    if got is not None and got[0] is b:
        return got[1]
    if arrays:
        def spread(v):
            return np.broadcast_to(v, shape).ravel() if isinstance(v, np.ndarray) else np.full(m, v)
        params = {n: (a.params[n] if not isinstance(a.params[n], np.ndarray) and not isinstance(b.params[n], np.ndarray)
                      and a.params[n] == b.params[n] else np.concatenate([spread(a.params[n]), spread(b.params[n])]))
                  for n in a.model.param_names}
        pair = _Bank(a.model, params)
        cache[(id(b), m, shape)] = (b, pair)
        return pair
    params = {n: (a.params[n] if a.params[n] == b.params[n] else np.repeat([a.params[n], b.params[n]], m))
              for n in a.model.param_names}
    pair = _Bank(a.model, params)
    cache[(id(b), m)] = (b, pair)
    return pair


def _pp_joint(stage, banks, vga, vgb, vk=None, d0=None, x0=None, grads=None):
    """Joint Newton iteration on (IA, IB, v, vk) for every sample at once; the tube
    equations are eliminated per sample, leaving a 2 x 2 (or 1 x 1) system in (v, vk).
    Returns None when any sample has not converged (the bracketed solve then takes over).
    ``grads`` (a list): receives (gaa, gga, gab, ggb), the tubes' voltage gradients at the
    last step's start (within the tolerance of the solution), for a caller's Newton slope."""
    B = stage.b_plus
    r = stage.r_primary / 2.0
    q = stage.reflected_load / 4.0
    rk = stage._rk
    vga = np.asarray(vga, float)
    vgb = np.asarray(vgb, float)
    shape = vga.shape if vga.shape == vgb.shape else np.broadcast_shapes(vga.shape, vgb.shape)
    solve_v = d0 is not None
    solve_k = vk is None

    def state(x):
        # the iteration makes new arrays (never writes into these): a view does
        x = np.asarray(x, float)
        return x if x.shape == shape else np.broadcast_to(x, shape)
    if x0 is None:
        ia = ib = v = k = np.zeros(shape)
    else:
        ia, ib, v, k = (state(x) for x in x0)
    if not solve_k:
        k = state(vk)
    tol = 1e-11 * B
    m = math.prod(shape)
    pair = _pair_bank(banks, m, shape) if _FAST else None
    vga_ = state(vga)
    vgb_ = state(vgb)
    prev = None
    for _ in range(_JOINT_MAXIT):
        if pair is not None:
            f, gv, gg = pair.current_and_gradient(
                np.concatenate([(B - r * ia - v - k).ravel(), (B - r * ib + v - k).ravel()]),
                np.concatenate([(vga_ - k).ravel(), (vgb_ - k).ravel()]))
            fa, fb = f[:m].reshape(shape), f[m:].reshape(shape)
            gaa, gab = gv[:m].reshape(shape), gv[m:].reshape(shape)
            gga, ggb = gg[:m].reshape(shape), gg[m:].reshape(shape)
        else:
            fa, gaa, gga = banks[0].current_and_gradient(B - r * ia - v - k, vga - k)
            fb, gab, ggb = banks[1].current_and_gradient(B - r * ib + v - k, vgb - k)
        R1 = ia - fa
        R2 = ib - fb
        ca = 1.0 + r * gaa
        cb = 1.0 + r * gab
        sa = gaa + gga
        sb = gab + ggb
        # dIA = (-R1 - gaa dv - sa dk) / ca ; dIB = (-R2 + gab dv - sb dk) / cb
        if solve_v:
            R3 = v - q * (ia - ib - d0)
            # R3 + dv - q (dIA - dIB) = 0
            a11 = 1.0 + q * (gaa / ca + gab / cb)
            a12 = q * (sa / ca - sb / cb)
            b1 = -R3 + q * (-R1 / ca + R2 / cb)
        if solve_k:
            R4 = k - rk * (ia + ib)
            # R4 + dk - rk (dIA + dIB) = 0
            a21 = rk * (gaa / ca - gab / cb)
            a22 = 1.0 + rk * (sa / ca + sb / cb)
            b2 = -R4 + rk * (-R1 / ca - R2 / cb)
        if solve_v and solve_k:
            det = a11 * a22 - a12 * a21
            dv = (b1 * a22 - a12 * b2) / det
            dk = (a11 * b2 - a21 * b1) / det
        elif solve_v:
            dv, dk = b1 / a11, 0.0
        elif solve_k:
            dv, dk = 0.0, b2 / a22
        else:
            dv = dk = 0.0
        dia = (-R1 - gaa * dv - sa * dk) / ca
        dib = (-R2 + gab * dv - sb * dk) / cb
        ia = ia + dia
        ib = ib + dib
        v = v + dv
        k = k + dk
        # (a NaN or infinity anywhere makes the sum so)
        if not math.isfinite(np.add.reduce(ia, None) + np.add.reduce(ib, None)):
            return None
        # the next step's size predicted from this one's and its ratio to the last (as in
        # :func:`_rows_joint`): the step that would only confirm convergence is not taken
        steps = np.array([np.abs(dv).max(initial=0.0), np.abs(dk).max(initial=0.0),
                          (np.abs(dia) + np.abs(dib)).max(initial=0.0)])
        ahead = steps * np.minimum(1.0, steps / prev) if prev is not None else steps
        prev = np.maximum(steps, 1e-300)
        if (ahead[0] <= tol and ahead[1] <= tol
                and ahead[2] <= 1e-13 + 1e-11 * (np.abs(ia) + np.abs(ib)).max(initial=0.0)):
            if grads is not None:
                grads[:] = [gaa, gga, gab, ggb]
            return v, ia, ib, k
    return None


def _pp_solve(stage, banks, vga, vgb, vk=None, d0=None, x0=None, grads=None):
    """Push-pull solve: the joint Newton iteration, else the bracketed one."""
    got = _pp_joint(stage, banks, vga, vgb, vk, d0, x0, grads)
    if got is not None:
        return got
    return _pp_bracketed(stage, banks, vga, vgb, vk, d0)


def _pp_bracketed(stage, banks, vga, vgb, vk=None, d0=None):
    """Push-pull currents for grid voltages (arrays).  ``vk`` None: the shared cathode
    resistor sets the cathode voltage; ``d0`` None: DC (no transformer voltage)."""
    B = stage.b_plus
    r = stage.r_primary / 2.0
    q = stage.reflected_load / 4.0
    shape = np.broadcast(np.asarray(vga), np.asarray(vgb)).shape

    def with_v(vk_):
        if d0 is None:
            ia, ib, ga, gb = _pp_tubes(banks, B, r, 0.0, vk_, vga, vgb)
            return np.zeros(shape), ia, ib, ga, gb

        def fun(v):
            ia, ib, ga, gb = _pp_tubes(banks, B, r, v, vk_, vga, vgb)
            F = v - q * (ia - ib - d0)
            dF = 1.0 + q * (ga[0] / ga[2] + gb[0] / gb[2])
            return F, dF, (ia, ib, ga, gb)

        v, (ia, ib, ga, gb) = _solve_outer(fun, np.zeros(shape), np.full(shape, -2.0 * B),
                                           np.full(shape, 2.0 * B), 1e-10 * B)
        return v, ia, ib, ga, gb

    if vk is not None:
        v, ia, ib, _, _ = with_v(vk)
        return v, ia, ib, np.broadcast_to(np.asarray(vk, float), shape)
    rk = stage._rk

    def fun_k(vk_):
        v, ia, ib, ga, gb = with_v(vk_)
        F = vk_ - rk * (ia + ib)
        dF = 1.0 + rk * ((ga[0] + ga[1]) / ga[2] + (gb[0] + gb[1]) / gb[2])
        return F, dF, (v, ia, ib)

    vk_, (v, ia, ib) = _solve_outer(fun_k, np.zeros(shape), np.zeros(shape), np.full(shape, 2.0 * B),
                                    1e-10 * B)
    return v, ia, ib, vk_


def _pp_dc(stage, banks):
    """The push-pull's DC point (IA, IB, vk) by the joint Newton iteration of :func:`_pp_joint`
    in plain floats (one model call a step for both tubes; a scalar's numpy arithmetic
    costs more than the step's model call); None where it does not converge."""
    pair = _pair_bank(banks, 1)
    if pair is None:
        return None
    B, r, rk, vg = stage.b_plus, stage.r_primary / 2.0, stage._rk, stage._vg
    shared = stage.rk is not None
    ia = ib = k = 0.0
    last = None
    for _ in range(_JOINT_MAXIT):
        f, gv, gg = (x.tolist() for x in pair.current_and_gradient(
            np.array([B - r * ia - k, B - r * ib - k]), np.array([vg - k, vg - k])))
        (fa, fb), (gaa, gab), (gga, ggb) = f, gv, gg
        R1, R2 = ia - fa, ib - fb
        ca, cb = 1.0 + r * gaa, 1.0 + r * gab
        sa, sb = gaa + gga, gab + ggb
        dk = 0.0
        if shared:
            # R4 + dk - rk (dIA + dIB) = 0, dIA = (-R1 - sa dk) / ca, dIB = (-R2 - sb dk) / cb
            dk = (-(k - rk * (ia + ib)) + rk * (-R1 / ca - R2 / cb)) / (1.0 + rk * (sa / ca + sb / cb))
        dia = (-R1 - sa * dk) / ca
        dib = (-R2 - sb * dk) / cb
        ia, ib, k = ia + dia, ib + dib, k + dk
        if not (math.isfinite(ia) and math.isfinite(ib) and math.isfinite(k)):
            return None
        # the next steps predicted from these and their ratio to the last (as in _rows_joint)
        sk, si = abs(dk), abs(dia) + abs(dib)
        ak, ai = (sk, si) if last is None else (sk * min(1.0, sk / last[0]), si * min(1.0, si / last[1]))
        last = (max(sk, 1e-300), max(si, 1e-300))
        if ak <= 1e-11 * B and ai <= 1e-13 + 1e-11 * (abs(ia) + abs(ib)):
            return ia, ib, k
    return None


def idle(stage, *triodes) -> dict:
    """The DC operating point: per tube ``<pos>.va``, ``.vgk``, ``.ia``, ``.pa``; ``vk``."""
    banks = _banks(stage, triodes)
    return _idle(stage, banks)


def _idle(stage, banks) -> dict:
    rk, vg = stage._rk, stage._vg
    if isinstance(stage, SingleEndedOutput):
        i, *_ = _solve_tube(banks[0], stage.b_plus, stage.r_primary + rk, vg, rk)
        i = float(i)
        va = stage.b_plus - (stage.r_primary + rk) * i
        op = {"vk": rk * i, "tube.va": va, "tube.vgk": vg - rk * i, "tube.ia": i, "tube.pa": va * i}
    else:
        got = _pp_dc(stage, banks) if _FAST else None
        if got is not None:
            ia, ib, vk = got
        elif stage.rk is None:
            _, ia, ib, vk = _pp_solve(stage, banks, vg, vg, vk=0.0)
        else:
            _, ia, ib, vk = _pp_solve(stage, banks, vg, vg)
        vk = float(vk)
        op = {"vk": vk}
        for p, i in (("A", float(ia)), ("B", float(ib))):
            va = stage.b_plus - stage.r_primary / 2.0 * i - vk
            op.update({f"{p}.va": va, f"{p}.vgk": vg - vk, f"{p}.ia": i, f"{p}.pa": va * i})
    if min(op[f"{p}.ia"] for p in stage.positions) <= 1e-7:
        off = [p for p in stage.positions if op[f"{p}.ia"] <= 1e-7]
        who = ("the tube is" if off == ["tube"] else f"tube {off[0]} is" if len(off) == 1 else "tubes A and B are")
        cure = ("make the grid bias less negative" if stage.grid_bias is not None
                else "lower the cathode resistor")
        raise StageSolveError(f"{who} cut off at idle (no plate current): {cure}")
    return op


def _waveforms(stage, banks, op, vin, guide=None, vk=None, x0=None, grads=None) -> dict:
    """Quasi-static response to the grid signal ``vin`` (any shape; push-pull: +vin on grid A,
    -vin on grid B).  Returns arrays: ``v_load`` (voltage across the reflected load [V],
    positive when the plate (A) swings down), per tube ``.ia``, ``.va``, ``.vgk``."""
    vin = np.asarray(vin, float)
    rk, vg, RL = stage._rk, stage._vg, stage.reflected_load
    if isinstance(stage, SingleEndedOutput):
        i0 = op["tube.ia"]
        vk0 = op["vk"]
        if stage.bypassed or rk == 0.0:
            a0, a1, b0, b1 = stage.b_plus + RL * i0 - vk0, stage.r_primary + RL, vg + vin - vk0, 0.0
        else:
            a0, a1, b0, b1 = stage.b_plus + RL * i0, stage.r_primary + RL + rk, vg + vin, rk
        if x0 is not None:
            pass  # (the current of a solve nearby)
        elif guide is not None:
            # start from the transfer already solved on a grid of drives: a step or two
            x0 = np.interp(vin, guide[0], guide[1]["tube.ia"])
        else:
            # start from the linear response (a few iterations fewer than from the idle current)
            ga, gg = banks[0].gradient(np.array(op["tube.va"]), np.array(op["tube.vgk"]))
            # (not below zero: past cut-off the current is nearly nil, not negative)
            x0 = np.maximum(i0 + vin * (gg / (1.0 + a1 * ga + b1 * gg)), 0.0)
        i, *_ = _solve_tube(banks[0], a0, a1, b0, b1, x0=x0)
        vk = vk0 if (stage.bypassed or rk == 0.0) else rk * i
        plate = stage.b_plus + RL * i0 - (stage.r_primary + RL) * i
        return {"v_load": RL * (i - i0), "tube.ia": i, "tube.va": plate - vk, "tube.vgk": vg + vin - vk}
    d0 = op["A.ia"] - op["B.ia"]
    hold = stage.rk is None or stage.bypassed
    if x0 is not None:
        pass  # (push-pull: IA, IB, v, vk of a solve nearby)
    elif guide is None and hold and _FAST:
        # the circuit linearised at idle, the cathode held (a step fewer than from idle); no
        # current below zero (past cut-off a tube carries nearly none).  (With an unbypassed
        # cathode resistor the same start was tried: no fewer steps, and some samples of the
        # batched sweep then fell to the bracketed solve.)
        gaa, gga = banks[0].gradient(np.asarray(op["A.va"], float), np.asarray(op["A.vgk"], float))
        gab, ggb = banks[1].gradient(np.asarray(op["B.va"], float), np.asarray(op["B.vgk"], float))
        ca, cb = 1.0 + stage.r_primary / 2.0 * gaa, 1.0 + stage.r_primary / 2.0 * gab
        q = stage.reflected_load / 4.0
        dv = q * (gga / ca + ggb / cb) * vin / (1.0 + q * (gaa / ca + gab / cb))
        x0 = (np.maximum(op["A.ia"] + (-gaa * dv + gga * vin) / ca, 0.0),
              np.maximum(op["B.ia"] + (gab * dv - ggb * vin) / cb, 0.0), dv, op["vk"])
    elif guide is None:
        x0 = (op["A.ia"], op["B.ia"], 0.0, op["vk"])
    else:
        # start from the transfer already solved on a grid of drives: a step or two from the answer
        xg, wg = guide
        x0 = (np.interp(vin, xg, wg["A.ia"]), np.interp(vin, xg, wg["B.ia"]), np.interp(vin, xg, wg["v_load"]) / 2.0,
              np.interp(vin, xg, vg + xg - wg["A.vgk"]))
    if hold and vk is None:
        vk = op["vk"]
    v, ia, ib, vk = _pp_solve(stage, banks, vg + vin, vg - vin, vk=vk if hold else None, d0=d0, x0=x0,
                              grads=grads)
    r = stage.r_primary / 2.0
    return {"v_load": 2.0 * v, "A.ia": ia, "B.ia": ib,
            "A.va": stage.b_plus - r * ia - v - vk, "B.va": stage.b_plus - r * ib + v - vk,
            "A.vgk": vg + vin - vk, "B.vgk": vg - vin - vk, "vk": np.broadcast_to(vk, np.shape(v))}


def _shifts(stage) -> bool:
    """The bias follows the drive: a push-pull's shared, bypassed cathode resistor charges its
    capacitor to Rk times the mean of both currents over a period (class AB draws more)."""
    return stage.kind == "push-pull" and stage.rk is not None and stage.bypassed


def _cathode_at(stage, banks, op, amps, guide=None, n_samples=N_SAMPLES, vk0=None):
    """Cathode voltage of a :func:`_shifts` stage at each drive amplitude (a sine of
    ``n_samples`` a period, each distinct value solved once): see :func:`_cathode_rows`.
    ``vk0``: a start for each amplitude (None: the idle voltage).  Returns (vk (len(amps),),
    waveforms of the distinct samples, (distinct, where) of :func:`_half_period`)."""
    amps = np.atleast_1d(np.asarray(amps, float))
    sines, weight, distinct, where = _period_samples(n_samples)
    vk, w = _cathode_rows(stage, banks, op, amps[:, None] * sines[None, :], weight, guide, vk0)
    return vk, w, (distinct, where)


def _period_samples(n_samples=N_SAMPLES):
    """(sin of the distinct samples, each one's share of the period, distinct, where); kept
    (read-only) for each size and speed-up setting."""
    return _period_samples_kept(n_samples, _FAST)


@lru_cache(maxsize=8)
def _period_samples_kept(n_samples, fast):
    theta = 2 * np.pi * np.arange(n_samples) / n_samples
    distinct, where = _half_period(n_samples)
    weight = np.bincount(where, minlength=distinct.size) / n_samples
    out = (np.sin(theta[distinct]), weight, distinct, where)
    for a in out:
        a.flags.writeable = False
    return out


def _vk_start(op, known, amps):
    """A start for the shared bypassed cathode's voltage at ``amps`` from the (amplitude,
    voltage) pairs already solved (``known``, a list of array pairs; the idle point is one),
    interpolated in the square of the amplitude (the bias shift of a class-A pair grows as
    its square); None without any."""
    if not known:
        return None
    a = np.concatenate([[0.0]] + [np.ravel(k[0]) for k in known])
    v = np.concatenate([[float(op["vk"])]] + [np.ravel(k[1]) for k in known])
    o = np.argsort(a)
    return np.interp(np.square(np.ravel(amps)), np.square(a[o]), v[o])


def _rows_joint(stage, banks, op, vin, weight, guide=None, vk0=None, follow=None):
    """:func:`_cathode_rows` as one Newton iteration on every sample's (IA, IB, v) and each
    row's cathode voltage together (a bordered system): per sample the tube equations and the
    transformer's ampere-turn balance are eliminated, leaving dIA + dIB affine in the row's
    dvk, so the row's equation vk = Rk mean(IA + IB) gives dvk in closed form.  Three or
    four model calls in all, where the nested iteration (a joint solve at each cathode
    voltage) takes ten or more.  Returns None when it does not converge (the nested
    iteration then takes over)."""
    rk, vg = stage._rk, stage._vg
    B, r, q = stage.b_plus, stage.r_primary / 2.0, stage.reflected_load / 4.0
    rows, S = vin.shape
    d0 = op["A.ia"] - op["B.ia"]
    vk = np.array(np.broadcast_to(np.ravel(np.asarray(op["vk"] if vk0 is None else vk0, float)), (rows,)))
    sines = vin
    if follow is not None:
        vin = (follow + vk)[:, None] * sines
    if guide is not None:
        xg, wg = guide
        ia, ib, v = (np.interp(vin, xg, wg["A.ia"]), np.interp(vin, xg, wg["B.ia"]),
                     np.interp(vin, xg, wg["v_load"]) / 2.0)
    else:
        # the circuit linearised at idle, with the cathode moved to the start
        gaa, gga = banks[0].gradient(np.asarray(op["A.va"], float), np.asarray(op["A.vgk"], float))
        gab, ggb = banks[1].gradient(np.asarray(op["B.va"], float), np.asarray(op["B.vgk"], float))
        ca, cb = 1.0 + r * gaa, 1.0 + r * gab
        sa, sb = gaa + gga, gab + ggb
        dk = (vk - np.ravel(op["vk"]))[:, None]
        v = q * ((sb / cb - sa / ca) * dk + (gga / ca + ggb / cb) * vin) / (1.0 + q * (gaa / ca + gab / cb))
        ia = op["A.ia"] + (-gaa * v - sa * dk + gga * vin) / ca
        ib = op["B.ia"] + (gab * v - sb * dk - ggb * vin) / cb
    ia, ib, v = (x if np.shape(x) == (rows, S) else np.broadcast_to(x, (rows, S)) for x in (ia, ib, v))
    m = rows * S
    pair = _pair_bank(banks, m, (rows, S))
    tol_v = 1e-11 * B
    tol_k = 1e-10 * B
    prev = None
    for _ in range(_JOINT_MAXIT):
        k = vk[:, None]
        if follow is not None:
            vin = (follow + vk)[:, None] * sines
        va_a, vg_a = B - r * ia - v - k, vg + vin - k
        va_b, vg_b = B - r * ib + v - k, vg - vin - k
        if pair is not None:
            f, gv, gg = pair.current_and_gradient(np.concatenate([va_a.ravel(), va_b.ravel()]),
                                                  np.concatenate([vg_a.ravel(), vg_b.ravel()]))
            fa, fb = f[:m].reshape(rows, S), f[m:].reshape(rows, S)
            gaa, gab = gv[:m].reshape(rows, S), gv[m:].reshape(rows, S)
            gga, ggb = gg[:m].reshape(rows, S), gg[m:].reshape(rows, S)
        else:
            fa, gaa, gga = banks[0].current_and_gradient(va_a, vg_a)
            fb, gab, ggb = banks[1].current_and_gradient(va_b, vg_b)
        R1, R2, R3 = ia - fa, ib - fb, v - q * (ia - ib - d0)
        ca, cb = 1.0 + r * gaa, 1.0 + r * gab
        # d(vgk)/d(vk): -1, or (drive following the cathode) +-sine - 1
        sa, sb = gaa + gga, gab + ggb
        if follow is not None:
            sa, sb = sa - gga * sines, sb + ggb * sines
        a11 = 1.0 + q * (gaa / ca + gab / cb)
        dv0 = (-R3 + q * (-R1 / ca + R2 / cb)) / a11
        dv1 = -q * (sa / ca - sb / cb) / a11
        al_a, be_a = (-R1 - gaa * dv0) / ca, (-gaa * dv1 - sa) / ca
        al_b, be_b = (-R2 + gab * dv0) / cb, (gab * dv1 - sb) / cb
        G = vk - rk * ((ia + ib) @ weight)
        den = 1.0 - rk * ((be_a + be_b) @ weight)
        if not den.min() >= (1.0 if follow is None else 0.05):  # (False for a NaN as well)
            return None
        dk = (-G + rk * ((al_a + al_b) @ weight)) / den
        dkc = dk[:, None]
        dv = dv0 + dv1 * dkc
        dia = al_a + be_a * dkc
        dib = al_b + be_b * dkc
        ia = ia + dia
        ib = ib + dib
        v = v + dv
        vk = vk + dk
        # (a NaN or infinity anywhere makes the sum so)
        if not math.isfinite(np.add.reduce(ia, None) + np.add.reduce(ib, None) + np.add.reduce(vk, None)):
            return None
        # each step's size times its ratio to the step before: the next step's size where the
        # iteration contracts (quadratically here), so the step that would only confirm
        # convergence is not taken (the first step is judged by its own size)
        steps = np.array([np.abs(dk).max(), np.abs(dv).max(), (np.abs(dia) + np.abs(dib)).max()])
        ahead = steps * np.minimum(1.0, steps / prev) if prev is not None else steps
        prev = np.maximum(steps, 1e-300)
        if (ahead[0] <= tol_k and ahead[1] <= tol_v
                and ahead[2] <= 1e-13 + 1e-11 * (np.abs(ia) + np.abs(ib)).max()):
            if follow is not None:
                vin = (follow + vk)[:, None] * sines
            k = vk[:, None]
            w = {"v_load": 2.0 * v, "A.ia": ia, "B.ia": ib,
                 "A.va": B - r * ia - v - k, "B.va": B - r * ib + v - k,
                 "A.vgk": vg + vin - k, "B.vgk": vg - vin - k, "vk": np.broadcast_to(k, (rows, S))}
            return vk, w
    return None


def _cathode_rows(stage, banks, op, vin, weight, guide=None, vk0=None, follow=None):
    """The shared bypassed cathode's voltage for each row of ``vin`` (a period's samples,
    ``weight`` each sample's share of the period): the root of G(vk) = vk - Rk mean(IA + IB)
    with the cathode held at vk.  G rises with slope 1 + Rk mean(-d(IA + IB)/dvk) > 1 (the
    currents fall as the cathode rises), taken from the solved circuit's linearisation for a
    Newton step, which also predicts the next solve's start: three or four solves of a step
    or two each.

    ``follow`` (rows,): the drive follows the cathode, amplitude follow + vk, ``vin`` the
    unit sine's samples (the grid's crest at a fixed distance from the cathode: the
    grid-current limit, :func:`_grid_limit_shifting`).  ``op``'s values may be (rows, 1)
    arrays and ``banks`` one unit a row (many units at once).  Returns (vk (rows,), the
    waveforms there)."""
    if _FAST:
        got = _rows_joint(stage, banks, op, vin, weight, guide, vk0, follow)
        if got is not None:
            return got
    rk = stage._rk
    rows = vin.shape[0]
    slope = 1.0
    g0 = []
    for b, p in zip(banks, stage.positions):
        gva, gvg = b.gradient(np.asarray(op[f"{p}.va"], float), np.asarray(op[f"{p}.vgk"], float))
        slope = slope + rk * (gva + gvg)
        g0 += [gva, gvg]
    slope = np.broadcast_to(np.ravel(slope), (rows,))
    vk = np.array(np.broadcast_to(np.ravel(np.asarray(op["vk"] if vk0 is None else vk0, float)), (rows,)))
    r, q = stage.r_primary / 2.0, stage.reflected_load / 4.0
    tol = 1e-10 * stage.b_plus
    x0 = None
    sines = vin
    for it in range(40):
        if follow is not None:
            vin = (follow + vk)[:, None] * sines
        if it == 0 and guide is None and _FAST:
            # start from the circuit linearised at idle (a step or two fewer than from idle)
            gaa, gga, gab, ggb = g0
            ca, cb = 1.0 + r * gaa, 1.0 + r * gab
            sa, sb = gaa + gga, gab + ggb
            dk = (vk - np.ravel(op["vk"]))[:, None]
            dv = q * ((sb / cb - sa / ca) * dk + (gga / ca + ggb / cb) * vin) / (1.0 + q * (gaa / ca + gab / cb))
            x0 = (op["A.ia"] + (-gaa * dv - sa * dk + gga * vin) / ca,
                  op["B.ia"] + (gab * dv - sb * dk - ggb * vin) / cb, dv, vk[:, None])
        grads = [] if _FAST else None
        w = _waveforms(stage, banks, op, vin, guide, vk=vk[:, None], x0=x0, grads=grads)
        G = vk - rk * ((w["A.ia"] + w["B.ia"]) @ weight)
        if np.all(np.abs(G) <= tol):
            return vk, w
        # Newton: dG/dvk from the solved circuit's linearisation at each sample (the tube
        # equations and the transformer's ampere-turn balance with the cathode held)
        if grads:
            gaa, gga, gab, ggb = grads
        else:
            _, gaa, gga = banks[0].current_and_gradient(w["A.va"], w["A.vgk"])
            _, gab, ggb = banks[1].current_and_gradient(w["B.va"], w["B.vgk"])
        ca, cb = 1.0 + r * gaa, 1.0 + r * gab
        sa, sb = gaa + gga, gab + ggb
        if follow is None:
            ea = eb = 0.0
        else:  # the drive (grid A up, grid B down) moves with the cathode
            ea, eb = gga * sines, ggb * sines
        dv = q * (sb / cb - sa / ca + ea / ca + eb / cb) / (1.0 + q * (gaa / ca + gab / cb))
        dia = (-gaa * dv - sa + ea) / ca
        dib = (gab * dv - sb - eb) / cb
        s_ = 1.0 - rk * ((dia + dib) @ weight)
        s_ = np.where(np.isfinite(s_) & (s_ >= (1.0 if follow is None else 0.05)), s_, slope)
        dk = -G / s_
        vk = vk + dk
        if _FAST:
            # the next solve starts from the linear prediction there: a step or two
            x0 = (w["A.ia"] + dia * dk[:, None], w["B.ia"] + dib * dk[:, None],
                  w["v_load"] / 2.0 + dv * dk[:, None], vk[:, None])
        else:
            x0 = (w["A.ia"], w["B.ia"], w["v_load"] / 2.0, w["vk"])
    raise StageSolveError("the shared cathode resistor's voltage under drive did not converge")


def waveforms(stage, *triodes, vin) -> dict:
    """Public form of the quasi-static response (solves the operating point first).  For a
    push-pull on a shared bypassed cathode resistor a 1-D ``vin`` is taken as one period, and
    the cathode sits at Rk times the mean current over it (the bias shift)."""
    banks = _banks(stage, triodes)
    return _period_waveforms(stage, banks, _idle(stage, banks), vin)


def _period_waveforms(stage, banks, op, vin) -> dict:
    """:func:`_waveforms` with the operating point solved; a 1-D ``vin`` of a stage whose bias
    shifts is one period, with the shared bypass capacitor at Rk times its mean current."""
    vin = np.asarray(vin, float)
    if _shifts(stage) and vin.ndim == 1 and vin.size > 1:
        w = _cathode_rows(stage, banks, op, vin[None, :], np.full(vin.size, 1.0 / vin.size))[1]
        return {k: np.asarray(v)[0] for k, v in w.items()}
    return _waveforms(stage, banks, op, vin)


def composite_characteristic(stage, *triodes, drives, v):
    """The push-pull composite characteristic: for each grid drive e (grid A at bias + e,
    grid B at bias - e) and each half-primary voltage v (plate A at B+ - v - r IA, plate B at
    B+ + v - r IB, cathode at its idle voltage), the composite current IA - IB [A], shape
    (len(drives), len(v)).  The load line is v = (Raa / 4)(IA - IB - imbalance): where it
    crosses a curve is the stage's state at that drive (common practice: the composite
    characteristic of a push-pull pair)."""
    if not isinstance(stage, PushPullOutput):
        raise StageInputError("the composite characteristic is a push-pull's", field="stage")
    banks = _banks(stage, triodes)
    op = _idle(stage, banks)
    e = np.asarray(drives, float)[:, None]
    vv = np.asarray(v, float)[None, :]
    r = stage.r_primary / 2.0
    vk = op["vk"]
    ia, *_ = _solve_tube(banks[0], stage.b_plus - vv - vk, r, stage._vg + e - vk, 0.0)
    ib, *_ = _solve_tube(banks[1], stage.b_plus + vv - vk, r, stage._vg - e - vk, 0.0)
    return ia - ib


# ---------------------------------------------------------------------------
# Drive limits
# ---------------------------------------------------------------------------


def _margins(stage, banks, op, amps, keep=None):
    """(grid margin, cut-off margin) at each amplitude: positive while inside.  The extremes
    of a quasi-static swing are at the sine's peaks (the transfer is monotone).

    ``keep``: a dict; its ``"guide"`` (the transfer at the crests of the first
    call, as drives and waveforms) starts every later call, and is left there for the
    caller's solves."""
    amps = np.asarray(amps, float)
    guide = None if keep is None else keep.get("guide")
    vk = None
    if _shifts(stage):
        known = None if keep is None else keep.setdefault("vk", [])
        vk = _cathode_at(stage, banks, op, amps.ravel(), guide, vk0=_vk_start(op, known, amps))[0]
        if known is not None:
            known.append((amps.ravel(), vk))
        vk = vk.reshape(amps.shape)[..., None]
    w = _waveforms(stage, banks, op, np.stack([amps, -amps], axis=-1), guide, vk=vk)
    if keep is not None and guide is None and amps.ndim == 1:
        order = np.argsort(amps)
        keep["guide"] = (np.concatenate([-amps[order][::-1], amps[order]]),
                         {k: np.concatenate([np.broadcast_to(v, amps.shape + (2,))[order][::-1, 1],
                                             np.broadcast_to(v, amps.shape + (2,))[order, 0]])
                          for k, v in w.items()})
    grid = np.min([stage.grid_onset - np.max(w[f"{p}.vgk"], axis=-1) for p in stage.positions], axis=0)
    cut = np.min([np.min(w[f"{p}.ia"], axis=-1) - CUTOFF_FRACTION * op[f"{p}.ia"] for p in stage.positions],
                 axis=0)
    return grid, cut


def _first_crossing(fun, hi, lo=0.0, n=64, passes=2, scan=None):
    """Smallest a in (lo, hi] where fun(a) <= 0 (fun > 0 at lo): a scan of ``n`` points, an
    ``n``-section of the bracket (each pass one vectorised call), then linear interpolation
    of fun inside the last bracket (1/n^2 of the range: fun is smooth there, so the root is
    found to far below 1e-6 of the range); None when fun stays positive up to hi.  ``scan``:
    fun at the scan's points, when the caller has it."""
    a = np.linspace(lo, hi, n + 1)
    m = np.empty_like(a)
    m[0] = np.inf
    m[1:] = fun(a[1:]) if scan is None else scan
    for p in range(passes):
        bad = np.nonzero(m <= 0)[0]
        if bad.size == 0:
            return None
        k = bad[0]
        a_lo, a_up, m_lo, m_up = a[k - 1], a[k], m[k - 1], m[k]
        if p == passes - 1:
            break
        a = np.linspace(a_lo, a_up, n + 1)
        m = np.empty_like(a)
        m[0], m[-1] = m_lo, m_up
        m[1:-1] = fun(a[1:-1])
    if not np.isfinite(m_lo):
        return float(a_lo)
    return float(a_lo + (a_up - a_lo) * m_lo / (m_lo - m_up))


def _two_crossings(fun, hi, lo=0.0, n=64):
    """:func:`_first_crossing` (two passes) of both margins of ``fun`` (which returns a pair
    of arrays) at once: they share the scan, and both refinements are one call of ``fun``
    (each call of the push-pull solve has a fixed cost, whatever its size)."""
    a = np.linspace(lo, hi, n + 1)
    scan = fun(a[1:])
    found = []
    for j in range(2):
        m = np.concatenate([[np.inf], scan[j]])
        bad = np.nonzero(m <= 0)[0]
        found.append(None if bad.size == 0 else (a[bad[0] - 1], a[bad[0]], m[bad[0] - 1], m[bad[0]]))
    grids = [None if f is None else np.linspace(f[0], f[1], n + 1) for f in found]
    inner = [g[1:-1] for g in grids if g is not None]
    if not inner:
        return None, None
    got = fun(np.concatenate(inner))
    out, at = [], 0
    for j, (f, g) in enumerate(zip(found, grids)):
        if f is None:
            out.append(None)
            continue
        m = np.empty_like(g)
        m[0], m[-1] = f[2], f[3]
        m[1:-1] = got[j][at:at + n - 1]
        at += n - 1
        k = np.nonzero(m <= 0)[0][0]
        a_lo, a_up, m_lo, m_up = g[k - 1], g[k], m[k - 1], m[k]
        out.append(float(a_lo) if not np.isfinite(m_lo) else float(a_lo + (a_up - a_lo) * m_lo / (m_lo - m_up)))
    return out[0], out[1]


def drive_limits(stage, *triodes) -> dict:
    """Peak grid drive [V] (per grid) where grid current begins (``grid``) and where a tube
    cuts off (``cutoff``; push-pull: the end of class A), None where not reached."""
    banks = _banks(stage, triodes)
    return _drive_limits(stage, banks, _idle(stage, banks))


def _scan_range(stage, op, head):
    """Drive up to which the limits of a stage with an unbypassed cathode resistor are
    searched: four (single-ended) or two (push-pull) times the headroom."""
    hi = (4.0 if stage.kind == "single-ended" else 2.0) * head + 1.0
    if stage.kind == "single-ended":
        # the plate cannot swing below its cathode, so the current stays below
        # i_max = (B+ + RL I0) / (Rdc + RL + Rk), and the grid passes the onset once the
        # drive exceeds onset - bias + Rk i_max: no need to search past that
        i_max = (stage.b_plus + stage.reflected_load * op["tube.ia"]) / (
            stage.r_primary + stage.reflected_load + stage._rk)
        hi = min(hi, stage.grid_onset - stage._vg + stage._rk * i_max + 1.0)
    return hi


def _drive_limits(stage, banks, op, keep=None):
    vgk0 = max(op[f"{p}.vgk"] for p in stage.positions)
    head = stage.grid_onset - vgk0
    fixed_cathode = (stage.rk is None or stage.bypassed) and not _shifts(stage)
    if fixed_cathode:
        # the cathode holds its DC voltage: the grid reaches the onset when the drive
        # equals the headroom, exactly
        grid = head
    else:
        # the unbypassed resistor's feedback moves the cathode with the grid (single-ended);
        # push-pull's cathode moves only with the rectified sum of the currents (bypassed:
        # with its mean over a period, each amplitude's found by _cathode_at, so fewer points)
        hi = _scan_range(stage, op, head)
        if _shifts(stage):
            grid = _grid_limit_shifting(stage, banks, op, head, None if keep is None else keep.setdefault("vk", []))
            cut = _first_crossing(lambda a: _margins(stage, banks, op, a, keep)[1], grid, n=16, passes=3)
            return {"grid": grid, "cutoff": cut}
        grid, cut = _two_crossings(lambda a: _margins(stage, banks, op, a, keep), hi)
        if cut is not None and grid is not None and cut >= grid:
            cut = None
        return {"grid": grid, "cutoff": cut}
    cut = _first_crossing(lambda a: _margins(stage, banks, op, a, keep)[1], grid)
    return {"grid": grid, "cutoff": cut}


def _grid_limit_shifting(stage, banks, op, head, known=None):
    """The drive where a grid reaches the onset when the shared bypassed cathode follows the
    mean current: the crest reaches it at a = onset - bias + vk(a), a fixed point (vk grows
    slowly with a), found with the cathode's own Newton iteration by moving the drive with
    the cathode (:func:`_cathode_rows` ``follow``).  ``known``: a list that receives the
    (amplitude, cathode voltage) pair."""
    sines, weight, _, _ = _period_samples()
    c = np.array([stage.grid_onset - stage._vg])
    vk, _ = _cathode_rows(stage, banks, op, sines[None, :], weight, follow=c)
    a = float(c[0] + vk[0])
    if known is not None:
        known.append((np.array([a]), vk.copy()))
    return a


# ---------------------------------------------------------------------------
# Results
# ---------------------------------------------------------------------------


def _db(x):
    with np.errstate(divide="ignore"):
        return 20.0 * np.log10(np.maximum(np.asarray(x, float), 1e-300))


@dataclass
class PowerSweep:
    """H2, H3 and THD against output power: ``vin`` peak grid drive per grid [V], ``power``
    [W], ``h2``, ``h3`` [dB re H1], ``thd`` (fraction), ``h`` the amplitudes H1..H10 [V]."""

    vin: np.ndarray
    power: np.ndarray
    h2: np.ndarray
    h3: np.ndarray
    thd: np.ndarray
    h: np.ndarray

    def to_dict(self) -> dict:
        """Lists by level; a harmonic under the numerical floor (-140 dB) is None."""
        def db(a):
            return [float(x) if x >= DB_FLOOR else None for x in a]
        return {"vin_peak_v": self.vin.tolist(), "power_w": self.power.tolist(),
                "h2_db": db(self.h2), "h3_db": db(self.h3), "thd_pct": (100.0 * self.thd).tolist()}


def _half_period(n):
    """(distinct sample indices, index of each sample among them) of a sine sampled n times
    a period: sin(2 pi k / n) = sin(2 pi (n/2 - k) / n), so only the quarter-periods either
    side of the zero crossing at k = 0 differ (n/2 + 1 samples when 4 divides n)."""
    k = np.arange(n)
    if n % 4 or not _FAST:
        return k, k
    canon = np.where((k <= n // 4) | (k >= 3 * n // 4), k, (n // 2 - k) % n)
    distinct = np.unique(canon)
    return distinct, np.searchsorted(distinct, canon)


def _spectra(stage, banks, op, amps, n_samples=N_SAMPLES, guide=None, known=None):
    """Waveforms of one period at each amplitude (rows) and their harmonics H1..H10.  The
    quasi-static response has no memory, so the samples where the sine repeats a value are
    solved once (about half of them) and copied.  ``guide`` (drives, waveforms): the
    push-pull's transfer on a grid of drives covering ``amps``, to start the solve from;
    ``known``: the shared bypassed cathode's (amplitude, voltage) pairs solved so far (for
    a start; this solve's are added)."""
    amps = np.atleast_1d(np.asarray(amps, float))
    if _shifts(stage):
        vk, w, (distinct, where) = _cathode_at(stage, banks, op, amps, guide, n_samples,
                                               _vk_start(op, known, amps))
        if known is not None:
            known.append((amps, vk))
        shape = (amps.size, distinct.size)
    else:
        theta = 2 * np.pi * np.arange(n_samples) / n_samples
        distinct, where = _half_period(n_samples)
        vin = amps[:, None] * np.sin(theta[distinct])[None, :]
        w = _waveforms(stage, banks, op, vin, guide)
        shape = vin.shape
    w = {key: np.broadcast_to(val, shape)[:, where] for key, val in w.items()}
    h = harmonic_amplitudes(w["v_load"], N_HARMONICS)[:, 1:]
    return w, h


def _sweep_from(stage, amps, h):
    h1 = h[:, 0]
    with np.errstate(divide="ignore", invalid="ignore"):
        thd = np.sqrt(np.sum(h[:, 1:] ** 2, axis=1)) / h1
        h2 = _db(h[:, 1] / h1)
        h3 = _db(h[:, 2] / h1)
    power = h1 ** 2 / (2.0 * stage.reflected_load)
    return PowerSweep(np.asarray(amps, float), power, h2, h3, thd, h)


def _level_at_thd(stage, sweep, target, spectra):
    """Drive where THD first reaches ``target`` (interpolated in the sweep, then refined by
    one secant step from a solve there, ``spectra(amps) -> (waveforms, harmonics)``); None
    when it stays below up to the sweep's end."""
    over = np.nonzero(sweep.thd >= target)[0]
    if over.size == 0:
        return None
    k = over[0]
    if k == 0:
        lo, up = 0.0, sweep.vin[0]
        tlo = 0.0
    else:
        lo, up = sweep.vin[k - 1], sweep.vin[k]
        tlo = sweep.thd[k - 1]
    tup = sweep.thd[k]
    # THD grows smoothly with the drive: interpolate between the bracketing levels, then
    # one secant step from a solve at the estimate
    x = lo + (up - lo) * (target - tlo) / (tup - tlo)
    _, h = spectra([x])
    tx = _sweep_from(stage, [x], h).thd[0]
    if tx < target:
        lo, tlo = x, tx
    else:
        up, tup = x, tx
    return float(lo + (up - lo) * (target - tlo) / (tup - tlo))


#: what the figures assume (reports and JSON state it)
ASSUMPTIONS = ("quasi-static mid-band (the transformer is ideal, its magnetising current holds the idle "
               "current; a bypass capacitor holds its charge over a period: a push-pull's shared one at Rk times "
               "the mean current at each level, so the bias shift under drive is modelled, a single-ended one at "
               "its idle voltage); no grid current")


@dataclass
class OutputResult:
    """Every figure of an output stage (SI units; ``to_dict`` gives W, mA, dB, %)."""

    stage: object
    tubes: list[str]
    op: dict
    figures: dict
    sweep: PowerSweep
    warnings: list[str] = field(default_factory=list)
    fitted: tuple = ()  # the FittedTriode objects (for plots), not in to_dict

    def to_dict(self) -> dict:
        f = self.figures
        st = self.stage
        fields = {k: v for k, v in asdict(st).items()}
        tubes = {}
        for p, label in zip(st.positions, self.tubes):
            tubes[p] = {"tube": label, "va_v": self.op[f"{p}.va"], "vgk_v": self.op[f"{p}.vgk"],
                        "ia_ma": 1e3 * self.op[f"{p}.ia"], "pa_idle_w": self.op[f"{p}.pa"],
                        "pa_full_w": f["pa_full"][p], "ia_full_ma": 1e3 * f["ia_full"][p]}

        def opt(x, scale=1.0):
            return None if x is None else scale * x

        out = {
            "kind": st.kind, "stage": fields, "reflected_load_ohm": st.reflected_load,
            "turns_ratio": st.ratio, "tubes": tubes, "cathode_v": self.op["vk"],
            "pa_max_w": st.pa_max,
            "max_output": {"power_w": f["p_max"], "vin_peak_v": f["vin_max"], "limit": f["limit"],
                           "thd_pct": 100 * f["thd_max"], "secondary_v_rms": f["vsec_max"]},
            "at_thd": {"thd_pct": 100 * f["thd_target"], "power_w": f["p_thd"],
                       "vin_peak_v": f["vin_thd"]},
            "output_impedance_ohm": f["z_out"], "damping_factor": f["damping"],
            "sweep": self.sweep.to_dict(), "warnings": list(self.warnings),
            "assumptions": ASSUMPTIONS, "caution": CAUTION,
        }
        if "errors" in f:
            e = f["errors"]

            def num(x, k=1.0):
                return None if not math.isfinite(x) else k * x

            out["errors"] = {"ia_ma": {p: num(e[f"ia_{'A' if p == 'tube' else p}"], 1e3) for p in st.positions},
                             "power_max_w": num(e["p_max"]), "thd_max_pct": num(e["thd_max"], 100.0),
                             "power_at_thd_w": num(e["p_thd"]), "output_impedance_ohm": num(e["z_out"])}
        if st.kind == "single-ended":
            out["primary_dc_ma"] = 1e3 * self.op["tube.ia"]
            out["cutoff_vin_peak_v"] = f["vin_cut"]
        else:
            out["imbalance_ma"] = 1e3 * f["imbalance"]
            out["class_a"] = {"vin_peak_v": f["vin_cut"], "power_w": f["p_class_a"],
                              "class": f["class"], "crossover_gm_ratio": f["gm_dip"],
                              "least_current_pct_of_idle": {p: 100.0 * f["ia_least"][p] for p in st.positions},
                              "cutoff_pct_of_idle": 100.0 * CUTOFF_FRACTION}
            if "vk_full" in f:
                out["cathode_full_v"] = f["vk_full"]
                out["bias_shift_v"] = f["bias_shift"]
        return out

    def report(self) -> str:
        st = self.stage
        f = self.figures
        L = []
        L.append(f"{st.kind.capitalize()} output stage: B+ {st.b_plus:g} V, reflected load "
                 f"{st.reflected_load:.4g} ohm{' plate to plate' if st.kind == 'push-pull' else ''} "
                 f"(n {st.ratio:.3g}:1 into {st.speaker:g} ohm), primary {st.r_primary:g} ohm DC, "
                 + (f"fixed bias {st.grid_bias:g} V" if st.grid_bias is not None else
                    f"cathode resistor {st.rk:g} ohm {'bypassed' if st.bypassed else 'unbypassed'}"))
        for p, label in zip(st.positions, self.tubes):
            pa = self.op[f"{p}.pa"]
            lim = "" if st.pa_max is None else f" of {st.pa_max:g} W ({100 * pa / st.pa_max:.0f} %)"
            L.append(f"  {'tube' if p == 'tube' else 'tube ' + p} {label}: Va {self.op[f'{p}.va']:.1f} V, "
                     f"Vgk {self.op[f'{p}.vgk']:.2f} V, Ia {1e3 * self.op[f'{p}.ia']:.2f} mA, "
                     f"dissipation {pa:.2f} W{lim} idle; at full output {f['pa_full'][p]:.2f} W, "
                     f"mean Ia {1e3 * f['ia_full'][p]:.1f} mA")
        if st.kind == "single-ended":
            L.append(f"  DC current in the primary: {1e3 * self.op['tube.ia']:.1f} mA")
        else:
            L.append(f"  DC imbalance in the primary: {1e3 * f['imbalance']:+.2f} mA (A - B)")
        L.append(f"  largest output before {f['limit']}: {f['p_max']:.3g} W "
                 f"({f['vsec_max']:.3g} V rms at the secondary), THD {100 * f['thd_max']:.2f} %, "
                 f"grid drive {f['vin_max']:.3g} V peak{' per grid' if st.kind == 'push-pull' else ''}")
        if f["p_thd"] is None:
            L.append(f"  THD stays below {100 * f['thd_target']:g} % up to that limit")
        else:
            L.append(f"  output at {100 * f['thd_target']:g} % THD: {f['p_thd']:.3g} W, grid drive "
                     f"{f['vin_thd']:.3g} V peak")
        if st.kind == "push-pull":
            least = ", ".join(f"{p} {100 * f['ia_least'][p]:.2g} %" for p in st.positions)
            if f["class"] == "A":
                L.append(f"  class A over the whole swing: at full output the least plate current is {least} "
                         f"of idle (a tube counts as cut off below {100 * CUTOFF_FRACTION:g} %)")
            else:
                L.append(f"  class AB: class A up to {f['p_class_a']:.3g} W (grid drive {f['vin_cut']:.3g} V), where a "
                         f"tube falls below {100 * CUTOFF_FRACTION:g} % of its idle current")
            L.append(f"  crossover: the pair's gain (output voltage per grid volt) at idle is {100 * f['gm_dip']:.0f} % "
                     f"of its largest over the swing (below 100 %: a dip where the tubes hand over)")
            if "vk_full" in f:
                L.append(f"  shared cathode: {self.op['vk']:.2f} V at idle, {f['vk_full']:.2f} V "
                         f"{'(the bypass capacitor) ' if st.bypassed else '(mean) '}at full output: the bias "
                         f"shifts by {f['bias_shift']:+.2f} V")
        L.append(f"  output impedance at the secondary {f['z_out']:.3g} ohm, damping factor {f['damping']:.3g}")
        if "errors" in f:
            e = f["errors"]

            def pm(x, fmt, k=1.0):
                return "unknown (no covariance on the card)" if not math.isfinite(x) else f"+-{format(k * x, fmt)}"

            L.append(f"  error bars (one sigma, from the fits' covariance): largest output {pm(e['p_max'], '.2g')} W, "
                     f"THD there {pm(e['thd_max'], '.2g', 100)} %, idle current "
                     + ", ".join(f"{pm(e['ia_A' if p == 'tube' else 'ia_' + p], '.2g', 1e3)} mA" for p in st.positions))
        L.append("  power [W]   H2 [dB]   H3 [dB]   THD [%]   grid drive [V pk]")
        idx = np.unique(np.linspace(0, len(self.sweep.power) - 1, 8).round().astype(int))
        for k in idx:
            s = self.sweep
            L.append(f"  {s.power[k]:9.3g} {_fmt_db(s.h2[k], 9)} {_fmt_db(s.h3[k], 9)} "
                     f"{100 * s.thd[k]:9.3f} {s.vin[k]:12.3g}")
        L.append("  assumptions: " + ASSUMPTIONS)
        for w in self.warnings:
            L.append(f"  warning: {w}")
        L.append(CAUTION)
        return "\n".join(L)


def _z_out(stage, banks, op):
    """Output impedance at the secondary [ohm].

    Single-ended: the plate circuit's small-signal source resistance R = rp (rp + (mu+1) Rk
    with an unbypassed cathode resistor) plus the primary's DC resistance, over n^2.
    Push-pull: each half is a source R_A = rp_A + Rdc/2, R_B = rp_B + Rdc/2 on its half
    winding; the ampere-turn balance puts them in parallel on the half-winding voltage, so
    the whole primary sees 4 R_A R_B / (R_A + R_B) (= 2 rp + Rdc for equal halves), over n^2.
    A shared unbypassed cathode resistor carries no differential current (equal halves)."""
    rps = []
    for b, p in zip(banks, stage.positions):
        gva, gvg = b.gradient(np.array(op[f"{p}.va"]), np.array(op[f"{p}.vgk"]))
        gva, gvg = float(gva), float(gvg)
        rp = 1.0 / gva if gva > 0 else math.inf
        if stage.rk is not None and not stage.bypassed and stage.kind == "single-ended":
            rp = rp + (gvg * rp + 1.0) * stage.rk
        rps.append(rp)
    if stage.kind == "single-ended":
        return (rps[0] + stage.r_primary) / stage.ratio ** 2
    ra, rb = (r + stage.r_primary / 2.0 for r in rps)
    return 4.0 * ra * rb / (ra + rb) / stage.ratio ** 2


def solve_output(stage, *triodes, thd: float = 0.05, levels: int = N_LEVELS, errors: bool = False) -> OutputResult:
    """Solve an output stage: operating point and every figure (see the module docstring).

    Parameters
    ----------
    stage : SingleEndedOutput or PushPullOutput
    *triodes : FittedTriode
        One tube (single-ended) or two (push-pull, A then B).
    thd : float
        THD (fraction) at which the output power is reported (5 %: common practice for
        single-ended triode ratings).
    levels : int
        Levels of the power sweep (up to the largest output).
    errors : bool
        Also propagate each tube's fit covariance (central differences, as
        :func:`fitter.triode.propagate`) to the main figures: ``figures["errors"]``, one-sigma
        [SI], NaN where a card has no covariance.  One whole solve per perturbed parameter
        (10-20 solves): off by default.
    """
    if isinstance(thd, bool) or not isinstance(thd, (int, float)) or not (0 < thd < 1):
        raise StageInputError(f"must be a fraction between 0 and 1, got {thd!r}", field="thd")
    if isinstance(levels, bool) or not isinstance(levels, int) or not (2 <= levels <= 1000):
        raise StageInputError(f"must be a whole number from 2 to 1000, got {levels!r}", field="levels")
    banks = _banks(stage, triodes)
    op = _idle(stage, banks)
    keep = {} if _FAST else None
    got = _series_limits(stage, banks, op, levels) if _FAST and _SERIES else None
    lim, series = got if got is not None else (_drive_limits(stage, banks, op, keep), None)
    se = stage.kind == "single-ended"
    ends = [x for x in ((lim["grid"], "grid current"), (lim["cutoff"] if se else None, "cut-off"))
            if x[0] is not None]
    if not ends:
        raise StageSolveError("no drive limit found (neither grid current nor cut-off) within four "
                              "times the bias")
    vin_max, limit = min(ends)
    if not vin_max > 1e-9 * stage.b_plus:
        raise StageSolveError("the grid sits at the grid-current onset at idle: there is no drive before "
                              "grid current (bias the grid below it)")
    amps = vin_max * np.linspace(1.0 / levels, 1.0, levels)
    class_ab = not se and lim["cutoff"] is not None and lim["cutoff"] < vin_max
    # single-ended: the transfer at the crests of the limit's scan starts every later solve
    guide = keep.get("guide") if _FAST else None
    x = np.linspace(-vin_max, vin_max, 201)
    if series is None and _FAST and _SERIES and not _shifts(stage):
        series = _transfer_series(stage, banks, op, vin_max, guide, levels)
    if series is not None:
        # every level's harmonics from the transfer's Chebyshev series (no solve per sample)
        spectra = series.spectra
        h = series.levels()
        w = series.full()
        if not se:
            w_x = {"v_load": series.on_grid(x.size)}
    else:
        if not se:
            # the transfer over the whole drive range: the composite transconductance, and the
            # start of every later solve (each then needs a step or two instead of six or seven)
            w_x = _waveforms(stage, banks, op, x, guide)
            guide = (x, w_x) if _FAST else None
        known = keep.get("vk") if _FAST else None

        def spectra(a):
            return _spectra(stage, banks, op, a, guide=guide, known=known)
        # one solve for the power sweep (the end of class A's own below)
        w, h = spectra(amps)
        w = {key: val[-1:] for key, val in w.items()}
    h_cut = spectra([lim["cutoff"]])[1] if class_ab else None
    sweep = _sweep_from(stage, amps, h)
    vin_thd = _level_at_thd(stage, sweep, thd, spectra)
    if vin_thd is not None:
        _, h_t = spectra([vin_thd])
        p_thd = float(_sweep_from(stage, [vin_thd], h_t).power[0])
    else:
        p_thd = None
    pa_full = {p: float(np.mean(w[f"{p}.va"][-1] * w[f"{p}.ia"][-1])) for p in stage.positions}
    ia_full = {p: float(np.mean(w[f"{p}.ia"][-1])) for p in stage.positions}
    # each tube's least current over the full-output swing, a fraction of its idle current
    # (class A holds it above CUTOFF_FRACTION; a designer may want more margin than that)
    ia_least = {p: float(np.min(w[f"{p}.ia"][-1]) / op[f"{p}.ia"]) for p in stage.positions}
    p_max = float(sweep.power[-1])
    figures = {
        "vin_max": float(vin_max), "limit": limit, "p_max": p_max, "thd_max": float(sweep.thd[-1]),
        "vsec_max": math.sqrt(p_max * stage.speaker), "thd_target": float(thd),
        "p_thd": p_thd, "vin_thd": vin_thd, "pa_full": pa_full, "ia_full": ia_full, "ia_least": ia_least,
        "vin_cut": lim["cutoff"], "z_out": _z_out(stage, banks, op),
    }
    figures["damping"] = stage.speaker / figures["z_out"]
    if not se:
        figures["imbalance"] = op["A.ia"] - op["B.ia"]
        if stage.rk is not None:
            # the shared cathode at full output: its mean over the period (bypassed: the
            # capacitor's voltage, Rk times the mean of both currents)
            figures["vk_full"] = float(np.mean(w["vk"][-1]))
            figures["bias_shift"] = figures["vk_full"] - op["vk"]
        # crossover: the composite transconductance (slope of the load voltage against the
        # grid drive) at the idle point against its largest over the swing; a cold bias makes
        # the middle flat (a notch), 1.0 means no dip
        # (central differences inside, one-sided at the ends: np.gradient's, written out)
        vl = w_x["v_load"]
        g = np.concatenate([[(vl[1] - vl[0]) / (x[1] - x[0])], (vl[2:] - vl[:-2]) / (x[2:] - x[:-2]),
                            [(vl[-1] - vl[-2]) / (x[-1] - x[-2])]])
        figures["gm_dip"] = float(g[100] / np.max(g))
        if not class_ab:
            figures.update({"class": "A", "p_class_a": p_max, "vin_cut": None})
        else:
            figures["p_class_a"] = float(_sweep_from(stage, [lim["cutoff"]], h_cut).power[0])
            figures["class"] = "AB"
    warn = []
    for p, t in zip(stage.positions, triodes):
        why = t.outside_reason(np.concatenate([[op[f"{p}.va"]], w[f"{p}.va"][-1]]),
                               np.concatenate([[op[f"{p}.vgk"]], w[f"{p}.vgk"][-1]]),
                               ia=np.concatenate([[op[f"{p}.ia"]], w[f"{p}.ia"][-1]]))
        if why:
            warn.append(f"over the idle point and the full-output swing, {why}")
        if stage.pa_max is not None and op[f"{p}.pa"] > stage.pa_max:
            warn.append(f"{t.label} dissipates {op[f'{p}.pa']:.3g} W at idle, above the "
                        f"{stage.pa_max:g} W limit")
        elif stage.pa_max is not None and pa_full[p] > stage.pa_max:
            warn.append(f"{t.label} dissipates {pa_full[p]:.3g} W at full output, above the "
                        f"{stage.pa_max:g} W limit")
    if errors:
        figures["errors"] = _errors(stage, triodes, thd, levels)
    return OutputResult(stage, [t.label for t in triodes], op, figures, sweep, warn, tuple(triodes))


#: the figures that get error bars (name -> how to read it from a result)
_ERROR_FIGURES = ("ia_A", "ia_B", "p_max", "thd_max", "p_thd", "z_out")


def _main_figures(res: "OutputResult") -> np.ndarray:
    f = res.figures
    pos = res.stage.positions
    ia = [res.op[f"{p}.ia"] for p in pos] + [math.nan] * (2 - len(pos))
    return np.array(ia + [f["p_max"], f["thd_max"], math.nan if f["p_thd"] is None else f["p_thd"], f["z_out"]])


def _errors(stage, triodes, thd, levels) -> dict:
    from ..triode import error_from_differences, perturbed

    var = np.zeros(len(_ERROR_FIGURES))
    known = False
    for i, t in enumerate(triodes):
        if t.covariance is None or not t.free:
            var[:] = np.nan
            continue
        known = True
        sets, steps = perturbed(t)
        rows = []
        for tt in sets:
            ts = list(triodes)
            ts[i] = tt
            rows.append(_main_figures(solve_output(stage, *ts, thd=thd, levels=levels)))
        var += error_from_differences(rows, steps, t.covariance) ** 2
    err = np.sqrt(var) if known else np.full(len(_ERROR_FIGURES), np.nan)
    return dict(zip(_ERROR_FIGURES, (float(x) for x in err)))


# ---------------------------------------------------------------------------
# Reflected-load sweep (single-ended and push-pull alike)
# ---------------------------------------------------------------------------


@dataclass
class LoadSweep:
    """Power and distortion against the reflected load: ``load`` [ohm], ``p_max`` [W] (the
    largest output), ``thd_max`` at it, ``p_thd`` [W] at the THD target (nan: not reached),
    ``thd_at`` THD at the fixed ``level`` [W] (nan: beyond the largest output)."""

    load: np.ndarray
    p_max: np.ndarray
    thd_max: np.ndarray
    p_thd: np.ndarray
    thd_at: np.ndarray
    level: float
    thd_target: float

    def to_dict(self) -> dict:
        def lst(a, s=1.0):
            return [None if not np.isfinite(x) else s * float(x) for x in a]
        return {"load_ohm": self.load.tolist(), "power_max_w": lst(self.p_max),
                "thd_at_max_pct": lst(self.thd_max, 100), "power_at_thd_w": lst(self.p_thd),
                "thd_target_pct": 100 * self.thd_target, "level_w": self.level,
                "thd_at_level_pct": lst(self.thd_at, 100)}

    def report(self) -> str:
        L = [f"reflected load [ohm]  largest output [W]  THD there [%]  at {100 * self.thd_target:g} % THD [W]"
             f"  THD at {self.level:g} W [%]"]
        for i in range(len(self.load)):
            def f(x, fmt):
                return format(x, fmt) if np.isfinite(x) else "-"
            L.append(f"{self.load[i]:20.4g} {self.p_max[i]:19.3g} {100 * self.thd_max[i]:14.2f} "
                     f"{f(self.p_thd[i], '20.3g'):>20} {f(100 * self.thd_at[i], '18.3f'):>18}")
        L.append(CAUTION)
        return "\n".join(L)


def load_sweep(stage, *triodes, loads, thd: float = 0.05, level: float = 1.0) -> LoadSweep:
    """Output power and distortion against the reflected load (``loads`` [ohm]); the stage's
    other fields stay (the turns ratio, if given, is replaced by each load)."""
    loads = np.asarray(loads, float)
    if loads.ndim != 1 or loads.size == 0 or not np.all(np.isfinite(loads)) or np.any(loads <= 0):
        raise StageInputError("must be a list of positive resistances", field="loads")
    if isinstance(level, bool) or not isinstance(level, (int, float)) or not (level > 0 and math.isfinite(level)):
        raise StageInputError(f"must be a positive power, got {level!r}", field="level")
    rows = []
    for RL in loads:
        try:
            st = replace(stage, load=float(RL), turns_ratio=None)
        except StageInputError as e:
            raise StageInputError(e.message, field="loads") from None
        res = solve_output(st, *triodes, thd=thd, levels=N_LEVELS)
        s = res.sweep
        if level <= s.power[-1]:
            thd_at = float(np.interp(level, s.power, s.thd))
        else:
            thd_at = math.nan
        p_thd = res.figures["p_thd"]
        rows.append((res.figures["p_max"], res.figures["thd_max"], math.nan if p_thd is None else p_thd, thd_at))
    a = np.array(rows)
    return LoadSweep(loads, a[:, 0], a[:, 1], a[:, 2], a[:, 3], float(level), float(thd))


# ---------------------------------------------------------------------------
# Many units at once (design sweeps over a stock)
# ---------------------------------------------------------------------------
#
# :func:`solve_output` defines every figure; :func:`_solve_many` gives the figures a design
# sweep needs for many cases (tuples of tubes) of one stage in a few vectorised passes, and
# a test compares the two to 1e-6 relative.  How: the idle point and the drive limits are
# the same equations solved for all units at once (the crest scan as three 16-point passes
# instead of two of 64: the same 1/4096 bracket before the linear interpolation); the
# quasi-static transfer has no memory, so each unit's waveform keys are sampled once at
# Chebyshev nodes over its drive range and every period of the power sweep is that series
# evaluated at r sin(theta) (one matrix product for all units and levels).  A unit whose
# series does not fall to the round-off floor (its transfer is not smooth enough for the
# nodes) is solved by :func:`solve_output` instead, as is a group whose batched solve fails.

#: Chebyshev nodes of the transfer, tried in turn until the series' last coefficients fall
#: under _CHEB_TAIL of its largest (300B-like units, measured: 32 single-ended, 64 to 128
#: push-pull, 128 to 192 with a shared unbypassed cathode resistor).  At 1e-9 the figures
#: agreed with solve_output's to 3e-8 relative or better over the bench's stages
_CHEB = (32, 64, 128, 192)
_CHEB_TAIL = 1e-9


def _flat_waveforms(stage, banks, op, vin, x0=None):
    """:func:`_waveforms` for n units with k inputs each: ``banks`` of n units, ``op`` of
    (n,) arrays, ``vin`` (n, k), ``x0`` a start as :func:`_waveforms` takes it ((n, k)
    arrays); returns (n, k) arrays."""
    n, k = vin.shape
    bk = [b.repeat(k) for b in banks]
    opk = {key: np.repeat(np.asarray(v, float), k) for key, v in op.items()}
    if x0 is not None:
        x0 = np.ravel(x0) if isinstance(x0, np.ndarray) else tuple(np.ravel(v) for v in x0)
    w = _waveforms(stage, bk, opk, vin.ravel(), x0=x0)
    return {key: np.broadcast_to(v, (n * k,)).reshape(n, k) for key, v in w.items()}


def _idle_many(stage, banks, n):
    rk, vg = stage._rk, stage._vg
    if isinstance(stage, SingleEndedOutput):
        i, *_ = _solve_tube(banks[0], np.full(n, float(stage.b_plus)), stage.r_primary + rk, vg, rk)
        va = stage.b_plus - (stage.r_primary + rk) * i
        return {"vk": rk * i, "tube.va": va, "tube.vgk": vg - rk * i, "tube.ia": i, "tube.pa": va * i}
    g = np.full(n, vg)
    _, ia, ib, vk = _pp_solve(stage, banks, g, g, vk=0.0 if stage.rk is None else None)
    vk = np.broadcast_to(np.asarray(vk, float), (n,)).copy()
    op = {"vk": vk}
    for p, i in (("A", ia), ("B", ib)):
        va = stage.b_plus - stage.r_primary / 2.0 * i - vk
        op.update({f"{p}.va": va, f"{p}.vgk": vg - vk, f"{p}.ia": i, f"{p}.pa": va * i})
    return op


def _margins_many(stage, banks, op, amps):
    """(grid margin, cut-off margin), each (n, k), at the crests +-amps (n, k)."""
    k = amps.shape[1]
    w = _flat_waveforms(stage, banks, op, np.concatenate([amps, -amps], axis=1))
    grid = np.min([stage.grid_onset - np.maximum(w[f"{p}.vgk"][:, :k], w[f"{p}.vgk"][:, k:])
                   for p in stage.positions], axis=0)
    cut = np.min([np.minimum(w[f"{p}.ia"][:, :k], w[f"{p}.ia"][:, k:]) - CUTOFF_FRACTION * op[f"{p}.ia"][:, None]
                  for p in stage.positions], axis=0)
    return grid, cut


def _crossings_many(fun, hi, which, n=16, passes=3):
    """For each margin index in ``which``: the smallest a in (0, hi] (per unit) where that
    margin of ``fun(a)`` is <= 0, NaN where it stays positive (:func:`_first_crossing`
    vectorised over units, with ``passes`` scans of ``n`` points)."""
    N = hi.size
    rows = np.arange(N)
    a = hi[:, None] * np.linspace(0.0, 1.0, n + 1)[None, :]
    scan = fun(np.ascontiguousarray(a[:, 1:]))
    out = []
    for j in which:
        m = np.concatenate([np.full((N, 1), np.inf), scan[j]], axis=1)
        bad = m <= 0
        found = bad.any(axis=1)
        kk = np.where(found, np.argmax(bad, axis=1), 1)
        a_lo, a_up, m_lo, m_up = a[rows, kk - 1], a[rows, kk], m[rows, kk - 1], m[rows, kk]
        for _ in range(passes - 1):
            g = a_lo[:, None] + (a_up - a_lo)[:, None] * np.linspace(0.0, 1.0, n + 1)[None, :]
            mm = np.empty_like(g)
            mm[:, 0], mm[:, -1] = m_lo, m_up
            mm[:, 1:-1] = fun(np.ascontiguousarray(g[:, 1:-1]))[j]
            bad = mm <= 0
            bad[:, -1] |= ~found  # a unit without a crossing keeps a dummy bracket
            kk = np.argmax(bad, axis=1)
            kk = np.maximum(kk, 1)
            a_lo, a_up, m_lo, m_up = g[rows, kk - 1], g[rows, kk], mm[rows, kk - 1], mm[rows, kk]
        with np.errstate(invalid="ignore", divide="ignore"):
            root = np.where(np.isfinite(m_lo), a_lo + (a_up - a_lo) * m_lo / (m_lo - m_up), a_lo)
        out.append(np.where(found, root, np.nan))
    return out


@lru_cache(maxsize=16)
def _cheb_nodes(K):
    """(nodes cos(pi (j + 1/2) / K), descending; their barycentric weights)."""
    j = np.arange(K)
    theta = np.pi * (j + 0.5) / K
    return np.cos(theta), (-1.0) ** j * np.sin(theta)


@lru_cache(maxsize=16)
def _cheb_grid(K, n):
    """T_k(u) at u = linspace(-1, 1, n): (K, n)."""
    u = np.linspace(-1.0, 1.0, n)
    return np.cos(np.arange(K)[:, None] * np.arccos(u)[None, :])


@lru_cache(maxsize=64)
def _cheb_transform(K):
    """C (K, K): the values at K Chebyshev nodes (first kind, descending) to the coefficients
    of the series through them."""
    kk = np.arange(K)
    C = np.cos(np.pi * kk[:, None] * (np.arange(K) + 0.5)[None, :] / K) * (2.0 / K)
    C[0] *= 0.5
    C.flags.writeable = False
    return C


@lru_cache(maxsize=16)
def _cheb_matrices(K, levels, n_samples):
    """(C, tab, E_full): C maps node values to the Chebyshev coefficients; tab[l, m, k] is
    the signed amplitude of harmonic m + 1 (1..10) of T_k(r_l cos theta) at the sweep's
    levels r_l, from ``n_samples`` samples as :func:`harmonic_amplitudes` takes them (the
    sine drive's samples are these shifted by a quarter period, which changes each
    harmonic's phase by a factor common to all k, not its amplitude); E_full evaluates a
    series at sin(theta_j), the largest level's samples."""
    kk = np.arange(K)
    C = _cheb_transform(K)
    theta = 2 * np.pi * np.arange(n_samples) / n_samples
    r = np.linspace(1.0 / levels, 1.0, levels)
    u = r[:, None] * np.cos(theta)[None, :]  # (L, S)
    Tk = np.cos(kk[:, None, None] * np.arccos(np.clip(u, -1.0, 1.0))[None])  # (K, L, S)
    m = np.arange(1, N_HARMONICS + 1)
    tab = np.einsum("kls,ms->lmk", Tk, np.cos(m[:, None] * theta[None, :]) * (2.0 / n_samples))
    E_full = np.cos(kk[None, :] * np.arccos(np.clip(np.sin(theta), -1.0, 1.0))[:, None])
    return C, tab, E_full


class _Series:
    """A stage's quasi-static transfer as Chebyshev series in the drive over [-vin_max, vin_max]
    (``coef``: quantity -> (K,) coefficients, the quantities of :func:`_waveforms`)."""

    def __init__(self, vin_max, coef, levels, guide, values):
        self.vin_max, self.coef, self.n_levels = vin_max, coef, levels
        self.K = next(iter(coef.values())).size
        #: each quantity at the nodes (in the order of :func:`_cheb_nodes`)
        self.values = values
        #: (drives ascending, waveforms there): the nodes' solution, to start other solves from
        self.guide = guide

    def on_grid(self, n, key="v_load"):
        """:meth:`at` the drives vin_max * linspace(-1, 1, n) (the polynomials there kept)."""
        T = _cheb_grid(self.K, n)
        keys = (key,) if isinstance(key, str) else key
        got = np.stack([self.coef[k] for k in keys]) @ T
        return got[0] if isinstance(key, str) else got

    def cut_scan(self, op, stage, n=64):
        """:meth:`cut_margin` at vin_max * (1..n) / n (from :meth:`on_grid`)."""
        ia = self.on_grid(2 * n + 1, tuple(f"{p}.ia" for p in stage.positions))
        return np.min([np.minimum(ia[j, n + 1:], ia[j, n - 1::-1]) - CUTOFF_FRACTION * op[f"{p}.ia"]
                       for j, p in enumerate(stage.positions)], axis=0)

    def margins(self, amps, op, stage):
        """:func:`_margins` at the amplitudes ``amps``: (grid margin, the grid-current onset
        less each tube's highest grid-cathode voltage over the swing; cut-off margin, as
        :meth:`cut_margin`), both from the crests, in one evaluation."""
        amps = np.asarray(amps, float)
        pos = stage.positions
        got = self.at(np.stack([amps, -amps]), tuple(f"{p}.vgk" for p in pos) + tuple(f"{p}.ia" for p in pos))
        n = len(pos)
        grid = np.min([stage.grid_onset - np.max(got[j], axis=0) for j in range(n)], axis=0)
        cut = np.min([np.min(got[n + j], axis=0) - CUTOFF_FRACTION * op[f"{p}.ia"] for j, p in enumerate(pos)],
                     axis=0)
        return grid, cut

    def cut_margin(self, amps, op, stage):
        """:func:`_margins`' cut-off margin at the amplitudes ``amps`` (each tube's least
        current over the swing, at a crest, less CUTOFF_FRACTION of its idle current)."""
        amps = np.asarray(amps, float)
        ia = self.at(np.stack([amps, -amps]), tuple(f"{p}.ia" for p in stage.positions))
        return np.min([np.min(ia[j], axis=0) - CUTOFF_FRACTION * op[f"{p}.ia"]
                       for j, p in enumerate(stage.positions)], axis=0)

    def levels(self):
        """H1..H10 [V] of the load voltage at the power sweep's levels (``n_levels`` steps up to
        ``vin_max``), exactly as :func:`harmonic_amplitudes` finds them from N_SAMPLES samples."""
        _, tab, _ = _cheb_matrices(self.K, self.n_levels, N_SAMPLES)
        return np.abs(np.einsum("lmk,k->lm", tab, self.coef["v_load"]))

    def at(self, x, key="v_load"):
        """A quantity (or a tuple of them, stacked first) at the drives ``x`` (any shape within
        the range): the same polynomial by the barycentric formula through the node values
        (Chebyshev points of the first kind; no cosine per term, so a few operations a point
        and node)."""
        u = np.clip(np.asarray(x, float) / self.vin_max, -1.0, 1.0)
        flat = u.ravel()
        nodes, weights = _cheb_nodes(self.K)
        keys = (key,) if isinstance(key, str) else key
        F = np.stack([self.values[k] for k in keys], axis=1)  # (K, keys)
        d = flat[:, None] - nodes[None, :]
        hit = d == 0.0
        if hit.any():
            d[hit] = 1.0
        r = weights[None, :] / d
        got = (r @ F) / r.sum(axis=1)[:, None]
        if hit.any():
            row, col = np.nonzero(hit)
            got[row] = F[col]
        got = got.T.reshape((len(keys),) + u.shape)
        return got[0] if isinstance(key, str) else got

    def full(self):
        """One period at the full drive: quantity -> (1, N_SAMPLES)."""
        _, _, E_full = _cheb_matrices(self.K, self.n_levels, N_SAMPLES)
        return {k: (E_full @ c)[None, :] for k, c in self.coef.items()}

    def spectra(self, amps):
        """As :func:`_spectra` (the load voltage only): (one period at each amplitude, rows;
        their H1..H10)."""
        amps = np.atleast_1d(np.asarray(amps, float))
        sines, _, _, where = _period_samples()  # (the distinct values of the sine, each once)
        w = {"v_load": self.at(amps[:, None] * sines[None, :])[:, where]}
        return w, harmonic_amplitudes(w["v_load"], N_HARMONICS)[:, 1:]


def _transfer_series(stage, banks, op, vin_max, guide, levels, start=None):
    """The transfer of a stage whose cathode does not shift with the drive, solved at K
    Chebyshev nodes over the drive range (K = 32, 64, ... until the series' last four
    coefficients are below 1e-9 of its largest; the batched sweep's method), as a
    :class:`_Series`; None when even 192 nodes do not resolve it (a tube's cut-off bends it
    too sharply: the caller then solves every sample).  ``guide`` (drives, waveforms): a
    transfer already solved, to start from; ``start``: a :class:`_Series` covering the range,
    to start from instead (its values at the new nodes: a step from the answer)."""
    # a push-pull's transfer is never as smooth as a single-ended one's; with a shared
    # unbypassed cathode resistor, a tube near cut-off bends it further (64 nodes have
    # never been enough there: measured)
    first = 0 if stage.kind == "single-ended" else 1 if stage.rk is None else 2
    for K in _CHEB[first:]:
        C = _cheb_transform(K)
        x = vin_max * np.cos(np.pi * (np.arange(K) + 0.5) / K)  # descending
        x0 = None
        if start is not None:
            if stage.kind == "single-ended":
                x0 = start.at(x, "tube.ia")
            else:
                ia, ib, vl, vk = start.at(x, ("A.ia", "B.ia", "v_load", "vk"))
                x0 = (ia, ib, vl / 2.0, vk)
            start = None
        w = _waveforms(stage, banks, op, x, guide, x0=x0)
        w = {k: np.broadcast_to(v, x.shape) for k, v in w.items()}
        coef = {k: C @ v for k, v in w.items()}
        c = coef["v_load"]
        guide = (x[::-1], {k: v[::-1] for k, v in w.items()})
        if np.max(np.abs(c[-4:])) <= _CHEB_TAIL * np.max(np.abs(c)):
            return _Series(vin_max, coef, levels, guide, w)
    return None


def _cheb_values(t, J):
    """T_m(t) and dT_m/dt for m < J at the points ``t`` (any shape, inside (-1, 1)): (..., J)
    each, as cos(m phi) and m sin(m phi) / sin(phi) with t = cos(phi)."""
    phi = np.arccos(np.clip(np.asarray(t, float), -1.0 + 1e-15, 1.0 - 1e-15))[..., None]
    m = np.arange(J)
    return np.cos(m * phi), m * np.sin(m * phi) / np.sin(phi)


@lru_cache(maxsize=8)
def _cheb_means(K, levels, n_samples):
    """mean over a period (``n_samples`` samples) of T_k(r_l sin theta) at the power sweep's
    levels r_l: (levels, K)."""
    return _cheb_period_means(K, np.linspace(1.0 / levels, 1.0, levels), n_samples)


def _cheb_period_means(K, r, n_samples=N_SAMPLES):
    """mean over a period of T_k(r sin theta) for each r: (len(r), K) (the sine's distinct
    samples, each by its share of the period)."""
    sines, weight, _, _ = _period_samples(n_samples)
    u = np.asarray(r, float)[:, None] * np.asarray(sines)[None, :]
    return np.cos(np.arccos(np.clip(u, -1.0, 1.0))[..., None] * np.arange(K)).transpose(0, 2, 1) @ weight


class _ShiftSeries:
    """A push-pull on a shared bypassed cathode resistor: its transfer with the cathode held
    at vk (over a period the capacitor holds it), as a two-dimensional Chebyshev series in
    the drive over [-vin_max, vin_max] and in vk over [lo, hi]; at each level the cathode
    sits where vk = Rk mean(IA + IB), solved in the series (a few operations, no solve of the
    circuit).  The interface of :class:`_Series` that :func:`solve_output` uses."""

    def __init__(self, stage, op, vin_max, lo, hi, coef, levels, vk_top):
        self.stage, self.op, self.vin_max, self.lo, self.hi = stage, op, vin_max, lo, hi
        self.coef, self.n_levels = coef, levels
        self.vk_top = vk_top  # the cathode at the largest drive (the grid-current limit)
        self.J, self.K = coef["v_load"].shape
        self.vk_levels = self.cathode(_cheb_means(self.K, levels, N_SAMPLES), self._start(
            np.linspace(1.0 / levels, 1.0, levels)))

    def _t(self, vk):
        return (2.0 * np.asarray(vk, float) - (self.lo + self.hi)) / (self.hi - self.lo)

    def _start(self, r):
        # the bias shift of a class-A pair grows as the square of the drive
        return self.op["vk"] + (self.vk_top - self.op["vk"]) * np.asarray(r) ** 2

    def along(self, vk, key="v_load"):
        """The series in the drive at cathode voltages ``vk`` ((n,) -> (n, K)); a tuple of keys
        gives a tuple."""
        T, _ = _cheb_values(self._t(np.atleast_1d(vk)), self.J)
        if isinstance(key, str):
            return T @ self.coef[key]
        return tuple(T @ self.coef[k] for k in key)

    def cathode(self, mu, vk):
        """The cathode voltage at each amplitude whose period means of T_k are ``mu`` (n, K):
        Newton on vk - Rk mean(IA + IB) from ``vk`` (n,); raises StageSolveError outside the
        series' range (the caller then solves the circuit)."""
        d = mu @ (self.coef["A.ia"] + self.coef["B.ia"]).T  # (n, J): the mean sum, a series in vk
        rk = self.stage._rk
        scale = 2.0 / (self.hi - self.lo)
        vk = np.array(vk, float)
        last = None
        for _ in range(30):
            T, D = _cheb_values(self._t(vk), self.J)
            g = vk - rk * np.sum(d * T, axis=-1)
            dg = 1.0 - rk * scale * np.sum(d * D, axis=-1)
            step = g / dg
            vk = vk - step
            if not (vk.min() >= self.lo and vk.max() <= self.hi):  # (False for a NaN)
                raise StageSolveError("the cathode voltage left the range of its series")
            size = float(np.max(np.abs(step)))
            # (the next step predicted from this one and its ratio to the last, as in _rows_joint)
            ahead = size * min(1.0, size / last) if last else size
            last = max(size, 1e-300)
            if ahead <= 1e-12 * self.stage.b_plus:
                return vk
        raise StageSolveError("the cathode voltage did not converge in its series")

    def levels(self):
        _, tab, _ = _cheb_matrices(self.K, self.n_levels, N_SAMPLES)
        c = self.along(self.vk_levels)  # (L, K)
        return np.abs(np.einsum("lmk,lk->lm", tab, c))

    def full(self):
        _, _, E_full = _cheb_matrices(self.K, self.n_levels, N_SAMPLES)
        keys = tuple(self.coef)
        return {k: (E_full @ c[0])[None, :] for k, c in zip(keys, self.along(self.vk_levels[-1:], keys))}

    def on_grid(self, n, key="v_load"):
        """``key`` at the drives vin_max * linspace(-1, 1, n), the cathode at its idle voltage."""
        return self.along(self.op["vk"], key)[0] @ _cheb_grid(self.K, n)

    def at_amplitudes(self, amps, keys):
        """The cathode voltage at each amplitude and the waveforms there (the sine's distinct
        samples): (vk (n,), {key: (n, distinct)})."""
        amps = np.atleast_1d(np.asarray(amps, float))
        r = amps / self.vin_max
        vk = self.cathode(_cheb_period_means(self.K, r), self._start(r))
        sines, _, _, _ = _period_samples()
        u = np.clip(r[:, None] * np.asarray(sines)[None, :], -1.0, 1.0)
        Tk = np.cos(np.arccos(u)[..., None] * np.arange(self.K))  # (n, S, K)
        return vk, {k: np.einsum("nsk,nk->ns", Tk, c) for k, c in zip(keys, self.along(vk, tuple(keys)))}

    def spectra(self, amps):
        _, _, _, where = _period_samples()
        _, w = self.at_amplitudes(amps, ("v_load",))
        w = {"v_load": w["v_load"][:, where]}
        return w, harmonic_amplitudes(w["v_load"], N_HARMONICS)[:, 1:]

    def cut_margin(self, amps, vk=None):
        """:func:`_margins`' cut-off margin at the amplitudes (each tube's least current over
        the swing, at a crest, less CUTOFF_FRACTION of its idle current), each with its
        cathode voltage (``vk``, else solved)."""
        r = np.atleast_1d(np.asarray(amps, float)) / self.vin_max
        if vk is None:
            vk = self.cathode(_cheb_period_means(self.K, r), self._start(r))
        crest = np.cos(np.arccos(np.clip(np.stack([r, -r], axis=1), -1.0, 1.0))[..., None]
                       * np.arange(self.K))  # (n, 2, K)
        out = []
        pos = self.stage.positions
        for p, c in zip(pos, self.along(vk, tuple(f"{p}.ia" for p in pos))):
            ia = np.einsum("nck,nk->nc", crest, c)
            out.append(np.min(ia, axis=1) - CUTOFF_FRACTION * self.op[f"{p}.ia"])
        return np.min(out, axis=0)


def _vk_nodes(shift):
    """A first count of Chebyshev nodes in the held cathode voltage for a bias shift of
    ``shift`` [V] (measured on power triodes, to 1e-9: 8 nodes for 2 V, 10 for 5 V, 13 for
    9 V, about 17 for 14 V and 28 for 32 V); the coefficients' decay corrects it."""
    return int(min(48, max(8, math.ceil(7.0 + 0.65 * shift))))


def _shift_series(stage, banks, op, levels):
    """(limits, :class:`_ShiftSeries`) of a push-pull on a shared bypassed cathode resistor, or
    None when the series do not resolve it (the caller then solves level by level)."""
    head = stage.grid_onset - max(op[f"{p}.vgk"] for p in stage.positions)
    grid = _grid_limit_shifting(stage, banks, op, head)
    if not grid > 1e-9 * stage.b_plus:
        return None
    vk0 = float(op["vk"])
    vk_top = float(grid - (stage.grid_onset - stage._vg))  # the cathode at the grid limit
    pad = 0.05 * abs(vk_top - vk0) + 1e-3 * max(abs(vk0), 1.0)
    lo, hi = min(vk0, vk_top) - pad, max(vk0, vk_top) + pad
    r, q = stage.r_primary / 2.0, stage.reflected_load / 4.0
    gaa, gga = banks[0].gradient(np.asarray(op["A.va"], float), np.asarray(op["A.vgk"], float))
    gab, ggb = banks[1].gradient(np.asarray(op["B.va"], float), np.asarray(op["B.vgk"], float))
    ca, cb = 1.0 + r * gaa, 1.0 + r * gab
    sa, sb = gaa + gga, gab + ggb
    # nodes in the cathode voltage as the bias shift needs (:func:`_vk_nodes`); in the drive
    # from 32 up, as the series' tail asks
    J, Ks = _vk_nodes(np.max(np.abs(vk_top - vk0))), list(_CHEB)
    for _ in range(6):
        K = Ks[0]
        tj = np.cos(np.pi * (np.arange(J) + 0.5) / J)
        vkn = 0.5 * (lo + hi) + 0.5 * (hi - lo) * tj
        CJ, CK = _cheb_transform(J), _cheb_transform(K)
        x = grid * np.cos(np.pi * (np.arange(K) + 0.5) / K)
        vin = np.broadcast_to(x[None, :], (J, K))
        dk = (vkn - vk0)[:, None]
        # the circuit linearised at idle, the cathode moved to each node's voltage
        dv = q * ((sb / cb - sa / ca) * dk + (gga / ca + ggb / cb) * vin) / (1.0 + q * (gaa / ca + gab / cb))
        x0 = (np.maximum(op["A.ia"] + (-gaa * dv - sa * dk + gga * vin) / ca, 0.0),
              np.maximum(op["B.ia"] + (gab * dv - sb * dk - ggb * vin) / cb, 0.0), dv, vkn[:, None])
        w = _waveforms(stage, banks, op, vin, vk=vkn[:, None], x0=x0)
        keys = list(w)
        W = np.stack([np.broadcast_to(w[k], (J, K)) for k in keys])
        # the two-dimensional transform, one axis at a time
        got = (CJ @ W) @ CK.T  # (keys, J, K)
        coef = dict(zip(keys, got))
        c = coef["v_load"]
        s_ = coef["A.ia"] + coef["B.ia"]
        big = np.max(np.abs(c))
        vin_ok = np.max(np.abs(c[:, -4:])) <= _CHEB_TAIL * big
        vk_ok = (np.max(np.abs(c[-2:, :])) <= _CHEB_TAIL * big
                 and np.max(np.abs(s_[-2:, :])) <= _CHEB_TAIL * np.max(np.abs(s_)))
        if not vin_ok:
            Ks.pop(0)
        if not vk_ok:
            # the coefficients fall geometrically along vk: as many nodes as take them below
            # 1e-10 of the largest at that rate (two more for the test)
            rows = np.max(np.abs(c), axis=1) / big
            rate = (rows[-1] / rows[-5]) ** 0.25 if rows[-5] > 0 else 0.5
            if not 0.0 < rate < 1.0 or J >= 48:
                return None
            J = int(min(48, max(J + 4, math.ceil(math.log(1e-10) / math.log(rate)) + 2)))
        if not (vin_ok and vk_ok):
            if not Ks:
                return None
            continue
        try:
            ser = _ShiftSeries(stage, op, grid, lo, hi, coef, levels, vk_top)
        except StageSolveError:
            return None
        # the end of class A: the first level where a tube's least current falls below
        # CUTOFF_FRACTION of its idle current, then the root between the levels by the
        # Illinois form of the false-position method, in the series
        cut = None
        m = ser.cut_margin(grid * np.linspace(1.0 / levels, 1.0, levels), ser.vk_levels)
        below = np.nonzero(m <= 0)[0]
        if below.size:
            k = below[0]
            a_lo, m_lo = (0.0, math.inf) if k == 0 else (grid * k / levels, float(m[k - 1]))
            a_up, m_up = grid * (k + 1) / levels, float(m[k])
            side = 0
            tol = 1e-13 * max(op["A.ia"], op["B.ia"])
            for _ in range(100):
                a = 0.5 * (a_lo + a_up) if not math.isfinite(m_lo) else a_lo + (a_up - a_lo) * m_lo / (m_lo - m_up)
                ma = float(ser.cut_margin([a])[0])
                if abs(ma) <= tol or a_up - a_lo <= 1e-13 * grid:
                    break
                if ma > 0:
                    a_lo, m_lo = a, ma
                    m_up = 0.5 * m_up if side > 0 else m_up
                    side = 1
                else:
                    a_up, m_up = a, ma
                    m_lo = 0.5 * m_lo if side < 0 and math.isfinite(m_lo) else m_lo
                    side = -1
            cut = a
        return {"grid": grid, "cutoff": cut}, ser
    return None


def _series_limits(stage, banks, op, levels):
    """The drive limits and the transfer's series of a stage whose cathode holds its voltage
    (fixed bias, or a bypassed cathode resistor; not the shared push-pull one): the grid
    reaches the onset when the drive equals the headroom, exactly, so the transfer is solved
    once over that range and the cut-off searched in its series (no scan of solves).  A
    single-ended stage cut off sooner is solved again over its shorter range.  Returns
    (limits as :func:`_drive_limits`, series over [-vin_max, vin_max]) or None (the caller
    then scans)."""
    if _shifts(stage):
        return _shift_series(stage, banks, op, levels)
    se = stage.kind == "single-ended"
    head = stage.grid_onset - max(op[f"{p}.vgk"] for p in stage.positions)
    if stage.rk is None or stage.bypassed:
        if not head > 1e-9 * stage.b_plus:
            return None
        series = _transfer_series(stage, banks, op, head, None, levels)
        if series is None:
            return None
        cut = _first_crossing(lambda a: series.cut_margin(a, op, stage), head, scan=series.cut_scan(op, stage))
        lim = {"grid": head, "cutoff": cut}
    elif se:
        return None
    else:
        hi = _scan_range(stage, op, head)
        series = _transfer_series(stage, banks, op, hi, None, levels)
        if series is None:
            return None
        grid, cut = _two_crossings(lambda a: series.margins(a, op, stage), hi)
        if cut is not None and grid is not None and cut >= grid:
            cut = None
        lim = {"grid": grid, "cutoff": cut}
    ends = [x for x in (lim["grid"], lim["cutoff"] if se else None) if x is not None]
    if not ends:
        return lim, None
    vin_max = min(ends)
    if vin_max != series.vin_max:
        series = _transfer_series(stage, banks, op, vin_max, series.guide, levels, series) if vin_max > 0 else None
        if series is None:
            return None
    return lim, series


def _cheb_at(c, r, s):
    """Series ``c`` (n, K) at r sin(theta): r (n,), ``s`` (S,) a sine sampled S times a period
    -> (n, S) (Clenshaw's recurrence, over the distinct samples only: :func:`_half_period`)."""
    distinct, where = _half_period(s.size)
    u = r[:, None] * s[distinct][None, :]
    u2 = 2.0 * u
    b1 = np.zeros_like(u)
    b2 = np.zeros_like(u)
    for k in range(c.shape[1] - 1, 0, -1):
        b1, b2 = u2 * b1 - b2 + c[:, k:k + 1], b1
    return (u * b1 - b2 + c[:, :1])[:, where]


def _thd_of(v, RL):
    """(power [W], THD) of periods ``v`` (..., S) of the voltage across the load."""
    h = harmonic_amplitudes(v, N_HARMONICS)[..., 1:]
    h1 = h[..., 0]
    with np.errstate(divide="ignore", invalid="ignore"):
        thd = np.sqrt(np.sum(h[..., 1:] ** 2, axis=-1)) / h1
    return h1 ** 2 / (2.0 * RL), thd


def _many_keys(stage):
    keys = [f"{p}.{q}" for p in stage.positions for q in ("ia", "va", "pa")]
    keys += ["p_max", "p_thd", "thd", "zout", "damping", "pa_ratio"]
    if stage.kind == "push-pull":
        keys.append("imbalance")
    return keys


def _from_result(stage, r, level):
    """The sweep's figures of one :func:`solve_output` result."""
    f = r.figures
    out = {}
    for p in stage.positions:
        for q in ("ia", "va", "pa"):
            out[f"{p}.{q}"] = r.op[f"{p}.{q}"]
    out["p_max"] = f["p_max"]
    out["p_thd"] = math.nan if f["p_thd"] is None else f["p_thd"]
    s = r.sweep
    out["thd"] = (float(np.interp(level, s.power, s.thd))
                  if level is not None and s.power[0] <= level <= s.power[-1] else math.nan)
    out["zout"] = f["z_out"]
    out["damping"] = f["damping"]
    out["pa_ratio"] = (max(max(r.op[f"{p}.pa"], f["pa_full"][p]) for p in stage.positions) / stage.pa_max
                       if stage.pa_max is not None else math.nan)
    if stage.kind == "push-pull":
        out["imbalance"] = f["imbalance"]
    return out


def _solve_many(stage, cases, thd=0.05, level=None, levels=N_LEVELS):
    """The design sweep's figures for every case (a tuple of tubes) of one stage: dict
    name -> (U,) [SI] (each tube's ``ia``, ``va``, ``pa``; ``p_max``, ``p_thd``, ``thd`` at
    ``level`` [W], ``zout``, ``damping``, ``pa_ratio``, ``imbalance``), NaN where
    :func:`solve_output` raises :class:`StageSolveError`; and the count of such cases."""
    from .solver import _group_key

    U = len(cases)
    out = {k: np.full(U, np.nan) for k in _many_keys(stage)}
    failed = np.zeros(U, bool)
    groups: dict = {}
    for i, c in enumerate(cases):
        groups.setdefault(tuple(_group_key(t) for t in c), []).append(i)
    for idx in groups.values():
        idx = np.asarray(idx)
        try:
            got, bad, alone = _many_group(stage, [cases[i] for i in idx], thd, level, levels)
        except StageSolveError:
            got, bad, alone = None, np.zeros(len(idx), bool), np.ones(len(idx), bool)
        if got is not None:
            for k, v in got.items():
                out[k][idx] = v
        failed[idx[bad]] = True
        for j in np.nonzero(alone)[0]:
            u = idx[j]
            try:
                r = solve_output(stage, *cases[u], thd=thd, levels=levels)
            except StageSolveError:
                failed[u] = True
                for k in out:
                    out[k][u] = math.nan
                continue
            for k, v in _from_result(stage, r, level).items():
                out[k][u] = v
    return out, int(failed.sum())


def _many_group(stage, cases, thd, level, levels):
    """:func:`_solve_many` for cases of one group (same models and grid-current parameters):
    (figures (n,), failed (n,), to solve one by one (n,))."""
    n0 = len(cases)
    if _shifts(stage):
        # the cathode follows each level's mean current: no single transfer to sample, so
        # solve_output's own steps, run for many units at once
        figs = {k: np.full(n0, np.nan) for k in _many_keys(stage)}
        failed = np.zeros(n0, bool)
        for at in range(0, n0, _SHIFT_BLOCK):
            ix = slice(at, min(n0, at + _SHIFT_BLOCK))
            got, bad = _many_shifting(stage, cases[ix], thd, level, levels)
            for k, v in got.items():
                figs[k][ix] = v
            failed[ix] = bad
        return figs, failed, np.zeros(n0, bool)
    se = stage.kind == "single-ended"
    npos = len(stage.positions)
    banks = [_Bank.of([c[j] for c in cases]) for j in range(npos)]
    op = _idle_many(stage, banks, n0)
    failed = np.zeros(n0, bool)
    alone = np.zeros(n0, bool)
    failed |= np.min([op[f"{p}.ia"] for p in stage.positions], axis=0) <= 1e-7
    vgk0 = np.max([op[f"{p}.vgk"] for p in stage.positions], axis=0)
    head = stage.grid_onset - vgk0
    fixed_cathode = stage.rk is None or stage.bypassed
    if fixed_cathode:
        failed |= ~(head > 1e-9 * stage.b_plus)
    keep = np.nonzero(~failed)[0]
    figs = {k: np.full(n0, np.nan) for k in _many_keys(stage)}
    if keep.size == 0:
        return figs, failed, alone

    def sub(ix):
        return ([_Bank.of([cases[i][j] for i in ix]) for j in range(npos)],
                {k: np.asarray(v, float)[ix] for k, v in op.items()})

    banks, opk = sub(keep)
    h = head[keep]
    fun = lambda a: _margins_many(stage, banks, opk, a)  # noqa: E731
    # the drive limit (the push-pull's end of class A is no figure of the sweep's, and the
    # cut-off margin is only searched where it can end the swing)
    if fixed_cathode:
        vin_max = np.fmin(h, _crossings_many(fun, h, [1])[0]) if se else h
    elif se:
        grid, cut = _crossings_many(fun, 4.0 * h + 1.0, [0, 1])
        vin_max = np.fmin(grid, cut)
    else:
        vin_max = _crossings_many(fun, 2.0 * h + 1.0, [0])[0]
    bad = ~(vin_max > 1e-9 * stage.b_plus)
    if bad.any():
        failed[keep[bad]] = True
        keep = keep[~bad]
        if keep.size == 0:
            return figs, failed, alone
        banks, opk = sub(keep)
        vin_max = vin_max[~bad]
    # the transfer at Chebyshev nodes: few for a smooth one (single-ended), more where a
    # tube's cut-off bends it (class AB, a shared unbypassed cathode resistor)
    names = ["v_load"] + ([f"{p}.{q}" for p in stage.positions for q in ("ia", "va")]
                          if stage.pa_max is not None else [])
    coef = {}
    top = 0
    todo = np.arange(keep.size)
    # the unknowns of a solve (a finer series' solve starts from the coarser one's series
    # at its nodes: a step or two instead of seven)
    unknowns = ["tube.ia"] if se else ["A.ia", "B.ia", "v_load", "A.vgk"]
    start = None
    # a push-pull's transfer is never as smooth as a single-ended one's; a shared unbypassed
    # cathode resistor bends it further (as :func:`_transfer_series`)
    for K in _CHEB[0 if se else 1 if stage.rk is None else 2:]:
        C = _cheb_transform(K)
        x = np.cos(np.pi * (np.arange(K) + 0.5) / K)
        bk, ok_ = sub(keep[todo])
        x0 = None
        if start is not None and _FAST:
            E = np.cos(np.arccos(x)[:, None] * np.arange(start[next(iter(start))].shape[1])[None, :])
            got = {k: np.einsum("nk,jk->nj", v, E) for k, v in start.items()}
            if se:
                x0 = got["tube.ia"]
            else:
                vin = vin_max[todo, None] * x[None, :]
                x0 = (got["A.ia"], got["B.ia"], got["v_load"] / 2.0, stage._vg + vin - got["A.vgk"])
        w = _flat_waveforms(stage, bk, ok_, vin_max[todo, None] * x[None, :], x0)
        # einsum, not BLAS: these products are small, and BLAS threads on a busy machine
        # cost many times the arithmetic (measured: 80 ms against 4 ms)
        cf = {k: np.einsum("nj,kj->nk", w[k], C) for k in names}
        c = cf["v_load"]
        tail = np.max(np.abs(c[:, -4:]), axis=1) / np.max(np.abs(c), axis=1)
        done = tail <= _CHEB_TAIL
        if done.any():
            top = K
        for k in names:
            coef.setdefault(k, np.zeros((keep.size, _CHEB[-1])))[todo[done], :K] = cf[k][done]
        if (~done).any():
            start = {k: (cf[k] if k in cf else np.einsum("nj,kj->nk", w[k], C))[~done] for k in unknowns}
        todo = todo[~done]
        if todo.size == 0:
            break
    # a transfer the series cannot follow is solved one by one
    smooth = np.ones(keep.size, bool)
    smooth[todo] = False
    alone[keep[todo]] = True
    if not top:
        return figs, failed, alone
    n = keep.size
    coef = {k: v[:, :top] for k, v in coef.items()}
    C, tab, E_full = _cheb_matrices(top, levels, N_SAMPLES)
    s = E_full[:, 1]  # T_1(sin theta)
    c = coef["v_load"]
    RL = stage.reflected_load
    h = np.abs(np.einsum("lmk,nk->nlm", tab, c))  # H1..H10 at every level
    with np.errstate(divide="ignore", invalid="ignore"):
        t = np.sqrt(np.sum(h[:, :, 1:] ** 2, axis=2)) / h[:, :, 0]
    power = h[:, :, 0] ** 2 / (2.0 * RL)
    # the drive where THD reaches the target: interpolated, one secant step (as _level_at_thd)
    over = t >= thd
    has = over.any(axis=1)
    k = np.where(has, np.argmax(over, axis=1), 1)
    rows = np.arange(n)
    r_l = np.linspace(1.0 / levels, 1.0, levels)
    lo = np.where(k == 0, 0.0, r_l[np.maximum(k - 1, 0)])
    tlo = np.where(k == 0, 0.0, t[rows, np.maximum(k - 1, 0)])
    up, tup = r_l[k], t[rows, k]
    with np.errstate(invalid="ignore", divide="ignore"):
        rx = lo + (up - lo) * (thd - tlo) / (tup - tlo)
        rx = np.where(has, rx, 1.0)
        _, tx = _thd_of(_cheb_at(c, rx, s), RL)
        below = tx < thd
        lo, tlo = np.where(below, rx, lo), np.where(below, tx, tlo)
        up, tup = np.where(below, up, rx), np.where(below, tup, tx)
        rt = np.where(has, lo + (up - lo) * (thd - tlo) / (tup - tlo), 1.0)
        p_thd, _ = _thd_of(_cheb_at(c, rt, s), RL)
    res = {}
    res["p_thd"] = np.where(has, p_thd, np.nan)
    _batch_common(stage, banks, opk, power, t, level, res)
    if stage.pa_max is not None:
        pa = []
        for p in stage.positions:
            full = np.mean(np.einsum("nk,sk->ns", coef[f"{p}.va"], E_full)
                           * np.einsum("nk,sk->ns", coef[f"{p}.ia"], E_full), axis=1)
            pa.append(np.maximum(opk[f"{p}.pa"], full))
        res["pa_ratio"] = np.max(pa, axis=0) / stage.pa_max
    if not se:
        res["imbalance"] = opk["A.ia"] - opk["B.ia"]
    for key, v in res.items():
        figs[key][keep] = v
    for key in figs:
        figs[key][keep[~smooth]] = np.nan
    return figs, failed, alone


#: units solved at once by :func:`_many_shifting` (the series' nodes are a few hundred a
#: unit; 64 units a block measured 15 % faster than 16, whose fixed costs weighed more)
_SHIFT_BLOCK = 64


def _rows_bank(bank, k):
    """``bank`` (n units) as a column of n k rows (each unit repeated ``k`` times), to
    broadcast against (rows, samples) states."""
    return _Bank(bank.model, {n: (np.repeat(v, k)[:, None] if isinstance(v, np.ndarray) else v)
                              for n, v in bank.params.items()})


def _many_shifting(stage, cases, thd, level, levels):
    """:func:`_many_group` for a push-pull on a shared bypassed cathode resistor: the steps of
    :func:`solve_output` (grid-current limit, power sweep, level at the THD target) for every
    unit at once, each level's cathode voltage by :func:`_cathode_rows` over (unit, level)
    rows.  Returns (figures (n,), failed (n,))."""
    n0 = len(cases)
    npos = len(stage.positions)
    figs = {k: np.full(n0, np.nan) for k in _many_keys(stage)}
    banks = [_Bank.of([c[j] for c in cases]) for j in range(npos)]
    op = _idle_many(stage, banks, n0)
    failed = np.min([op[f"{p}.ia"] for p in stage.positions], axis=0) <= 1e-7
    keep = np.nonzero(~failed)[0]
    if keep.size == 0:
        return figs, failed
    banks = [_Bank.of([cases[i][j] for i in keep]) for j in range(npos)]
    op = {k: np.asarray(v, float)[keep] for k, v in op.items()}
    n = keep.size
    sines, weight, distinct, where = _period_samples()

    def rows(k):
        return [_rows_bank(b, k) for b in banks], {key: np.repeat(v, k)[:, None] for key, v in op.items()}

    def solve(amps, vk0):
        """(vk, waveforms over a period (rows, N_SAMPLES)) for amplitudes (n, k)."""
        bk, ok = rows(amps.shape[1])
        vk, w = _cathode_rows(stage, bk, ok, amps.reshape(-1, 1) * sines[None, :], weight, vk0=vk0.ravel())
        return vk, {key: np.broadcast_to(val, (vk.size, distinct.size))[:, where] for key, val in w.items()}

    # the grid-current limit (as _grid_limit_shifting)
    bk, ok = rows(1)
    c = stage.grid_onset - stage._vg
    vk_g, _ = _cathode_rows(stage, bk, ok, np.broadcast_to(sines, (n, sines.size)), weight,
                            follow=np.full(n, c))
    vin_max = c + vk_g
    good = vin_max > 1e-9 * stage.b_plus
    res = _shift_series_many(stage, banks, op, vin_max, vk_g, thd, level, levels) if (
        _FAST and _SERIES and good.all()) else None
    if res is not None:
        for key, v in res.items():
            figs[key][keep] = np.asarray(v)
        return figs, failed
    # the power sweep, each level started from the cathode's square-law growth to the limit
    r_l = np.linspace(1.0 / levels, 1.0, levels)
    vk0 = op["vk"][:, None] + (vk_g - op["vk"])[:, None] * r_l[None, :] ** 2
    amps = vin_max[:, None] * r_l[None, :]
    vk, w = solve(amps, vk0)
    RL = stage.reflected_load
    v_load = w["v_load"].reshape(n, levels, N_SAMPLES)
    power, t = _thd_of(v_load, RL)
    vk = vk.reshape(n, levels)
    # the drive at the THD target: interpolated, one secant step from a solve there (as
    # _level_at_thd), and the power at that drive
    over = t >= thd
    has = over.any(axis=1) & good
    p_thd = np.full(n, np.nan)
    if has.any():
        hx = np.nonzero(has)[0]
        k = np.argmax(over[hx], axis=1)
        av = amps[hx]
        lo = np.where(k == 0, 0.0, av[np.arange(hx.size), np.maximum(k - 1, 0)])
        tlo = np.where(k == 0, 0.0, t[hx, np.maximum(k - 1, 0)])
        up, tup = av[np.arange(hx.size), k], t[hx, k]
        vk_at = np.where(k == 0, op["vk"][hx], vk[hx, np.maximum(k - 1, 0)])
        sub = [_Bank(b.model, {m: (v[hx] if isinstance(v, np.ndarray) else v) for m, v in b.params.items()})
               for b in banks]
        opx = {key: v[hx] for key, v in op.items()}

        def at(x, vk0):
            bk_, ok_ = [_rows_bank(b, 1) for b in sub], {key: v[:, None] for key, v in opx.items()}
            vkx, wx = _cathode_rows(stage, bk_, ok_, x[:, None] * sines[None, :], weight, vk0=vk0)
            return vkx, _thd_of(np.broadcast_to(wx["v_load"], (x.size, distinct.size))[:, where], RL)

        x = lo + (up - lo) * (thd - tlo) / (tup - tlo)
        vkx, (_, tx) = at(x, vk_at)
        below = tx < thd
        lo, tlo = np.where(below, x, lo), np.where(below, tx, tlo)
        up, tup = np.where(below, up, x), np.where(below, tup, tx)
        xt = lo + (up - lo) * (thd - tlo) / (tup - tlo)
        _, (pt, _) = at(xt, vkx)
        p_thd[hx] = pt
    res = {}
    res["p_thd"] = p_thd
    _batch_common(stage, banks, op, power, t, level, res)
    if stage.pa_max is not None:
        full = [np.mean((w[f"{p}.va"] * w[f"{p}.ia"]).reshape(n, levels, N_SAMPLES)[:, -1], axis=1)
                for p in stage.positions]
        res["pa_ratio"] = np.max([np.maximum(op[f"{p}.pa"], f) for p, f in zip(stage.positions, full)],
                                 axis=0) / stage.pa_max
    res["imbalance"] = op["A.ia"] - op["B.ia"]
    for key, v in res.items():
        figs[key][keep[good]] = np.asarray(v)[good]
    failed[keep[~good]] = True
    return figs, failed


def _shift_series_many(stage, banks, op, grid, vk_top, thd, level, levels):
    """:func:`_many_shifting`'s figures from :class:`_ShiftSeries`' method run for n units at
    once (the transfer with the cathode held, a series in the drive and the cathode voltage
    per unit; each level's cathode voltage, the level at the THD target and the power there
    in the series).  ``grid``, ``vk_top`` (n,): the grid-current limit and the cathode there.
    Returns the figures (n,), or None when a unit's series does not resolve (the caller then
    solves level by level)."""
    n = grid.size
    vk0 = np.asarray(op["vk"], float)
    pad = 0.05 * np.abs(vk_top - vk0) + 1e-3 * np.maximum(np.abs(vk0), 1.0)
    lo, hi = np.minimum(vk0, vk_top) - pad, np.maximum(vk0, vk_top) + pad
    mid, half = 0.5 * (lo + hi), 0.5 * (hi - lo)
    r, q, rk, RL = stage.r_primary / 2.0, stage.reflected_load / 4.0, stage._rk, stage.reflected_load
    gaa, gga = (g[:, None, None] for g in banks[0].gradient(op["A.va"], op["A.vgk"]))
    gab, ggb = (g[:, None, None] for g in banks[1].gradient(op["B.va"], op["B.vgk"]))
    ca, cb = 1.0 + r * gaa, 1.0 + r * gab
    sa, sb = gaa + gga, gab + ggb
    # each unit's nodes as its own series asks (a retry solves only the units not yet
    # resolved); the coefficients are then padded with zeros to the largest counts (the same
    # polynomials), so the rest runs on common arrays
    J, Ks = _vk_nodes(np.max(np.abs(vk_top - vk0))), list(_CHEB)
    todo = np.arange(n)
    got_units = {}  # unit -> {key: (J, K) coefficients}
    for _ in range(6):
        K = Ks[0]
        m = todo.size
        tj = np.cos(np.pi * (np.arange(J) + 0.5) / J)
        vkn = mid[todo, None] + half[todo, None] * tj[None, :]  # (m, J)
        vin = np.broadcast_to(grid[todo, None, None] * np.cos(np.pi * (np.arange(K) + 0.5) / K)[None, None, :],
                              (m, J, K))
        dk = (vkn - vk0[todo, None])[..., None]
        g_ = [g[todo] for g in (gaa, gga, gab, ggb, ca, cb, sa, sb)]
        gaa_, gga_, gab_, ggb_, ca_, cb_, sa_, sb_ = g_
        dv = q * ((sb_ / cb_ - sa_ / ca_) * dk + (gga_ / ca_ + ggb_ / cb_) * vin) / (
            1.0 + q * (gaa_ / ca_ + gab_ / cb_))
        x0 = tuple(np.reshape(np.broadcast_to(x, (m, J, K)), (m * J, K)) for x in (
            np.maximum(op["A.ia"][todo, None, None] + (-gaa_ * dv - sa_ * dk + gga_ * vin) / ca_, 0.0),
            np.maximum(op["B.ia"][todo, None, None] + (gab_ * dv - sb_ * dk - ggb_ * vin) / cb_, 0.0),
            dv, vkn[..., None]))
        sub = [_Bank(b.model, {k: (v[todo] if isinstance(v, np.ndarray) else v) for k, v in b.params.items()})
               for b in banks]
        bk = [_rows_bank(b, J) for b in sub]
        ok = {key: np.repeat(np.asarray(v, float)[todo], J)[:, None] for key, v in op.items()}
        w = _waveforms(stage, bk, ok, vin.reshape(m * J, K), vk=vkn.reshape(m * J, 1), x0=x0)
        keys = list(w)
        W = np.stack([np.broadcast_to(w[k], (m * J, K)).reshape(m, J, K) for k in keys])
        CJ, CK = _cheb_transform(J), _cheb_transform(K)
        # (stacked small products: measured faster than one large product after moving axes)
        got = (CJ @ W) @ CK.T  # (keys, m, J, K)
        cf = dict(zip(keys, got))
        c, s_ = cf["v_load"], cf["A.ia"] + cf["B.ia"]
        big = np.max(np.abs(c), axis=(1, 2))
        vin_ok = np.max(np.abs(c[:, :, -4:]), axis=(1, 2)) <= _CHEB_TAIL * big
        vk_ok = ((np.max(np.abs(c[:, -2:, :]), axis=(1, 2)) <= _CHEB_TAIL * big)
                 & (np.max(np.abs(s_[:, -2:, :]), axis=(1, 2)) <= _CHEB_TAIL * np.max(np.abs(s_), axis=(1, 2))))
        done = vin_ok & vk_ok
        for j in np.nonzero(done)[0]:
            got_units[int(todo[j])] = {k: cf[k][j] for k in keys}
        if done.all():
            break
        if not vin_ok[~done].all():
            Ks.pop(0)
            if not Ks:
                return None
        if not vk_ok[~done].all():
            bad = ~vk_ok
            rows = np.max(np.abs(c[bad]), axis=2) / big[bad, None]  # (bad, J)
            with np.errstate(divide="ignore", invalid="ignore"):
                rate = np.max((rows[:, -1] / rows[:, -5]) ** 0.25)
            if not 0.0 < rate < 1.0 or J >= 48:
                return None
            J = int(min(48, max(J + 4, math.ceil(math.log(1e-10) / math.log(rate)) + 2)))
        todo = todo[~done]
    else:
        return None
    J = max(next(iter(u.values())).shape[0] for u in got_units.values())
    K = max(next(iter(u.values())).shape[1] for u in got_units.values())
    coef = {}
    for key in keys:
        a = np.zeros((n, J, K))
        for u, cu in got_units.items():
            a[u, :cu[key].shape[0], :cu[key].shape[1]] = cu[key]
        coef[key] = a
    s_ = coef["A.ia"] + coef["B.ia"]
    scale = (2.0 / (hi - lo))[:, None]

    def cathode(mu, start):
        """Each unit's cathode voltage at amplitudes whose period means of T_k are ``mu``
        (n, a, K), from ``start`` (n, a); None outside a series' range."""
        d = np.einsum("nak,nmk->nam", mu, s_)
        v = start
        for _ in range(30):
            T, D = _cheb_values((2.0 * v - (lo + hi)[:, None]) / (hi - lo)[:, None], J)
            step = (v - rk * np.sum(d * T, axis=-1)) / (1.0 - rk * scale * np.sum(d * D, axis=-1))
            v = v - step
            if not (np.all(v >= lo[:, None]) and np.all(v <= hi[:, None])):  # (False for a NaN)
                return None
            if np.max(np.abs(step)) <= 1e-12 * stage.b_plus:
                return v
        return None

    def along(v, key):
        """The series in the drive of ``key`` at cathode voltages v (n, a): (n, a, K)."""
        T, _ = _cheb_values((2.0 * v - (lo + hi)[:, None]) / (hi - lo)[:, None], J)
        return np.einsum("nam,nmk->nak", T, coef[key])

    r_l = np.linspace(1.0 / levels, 1.0, levels)
    vk_l = cathode(np.broadcast_to(_cheb_means(K, levels, N_SAMPLES), (n, levels, K)),
                   vk0[:, None] + (vk_top - vk0)[:, None] * r_l[None, :] ** 2)
    if vk_l is None:
        return None
    _, tab, E_full = _cheb_matrices(K, levels, N_SAMPLES)
    h = np.abs(np.einsum("lhk,nlk->nlh", tab, along(vk_l, "v_load")))
    with np.errstate(divide="ignore", invalid="ignore"):
        t = np.sqrt(np.sum(h[:, :, 1:] ** 2, axis=2)) / h[:, :, 0]
    power = h[:, :, 0] ** 2 / (2.0 * RL)
    sines, _, _, where = _period_samples()

    def at(x):
        """(power, THD) at the drive x (n,) (each unit's cathode solved there)."""
        rr = x / grid
        Tk = np.cos(np.arccos(np.clip(rr[:, None] * np.asarray(sines)[None, :], -1.0, 1.0))[..., None]
                    * np.arange(K))  # (n, S, K)
        _, weight, _, _ = _period_samples()
        v = cathode(np.einsum("nsk,s->nk", Tk, weight)[:, None, :],
                    (vk0 + (vk_top - vk0) * rr ** 2)[:, None])
        if v is None:
            return None
        wave = np.einsum("nsk,nk->ns", Tk, along(v, "v_load")[:, 0])[:, where]
        return _thd_of(wave, RL)

    # the drive at the THD target: interpolated between levels, one secant step (as
    # _level_at_thd); units that never reach it keep NaN
    over = t >= thd
    has = over.any(axis=1)
    k = np.where(has, np.argmax(over, axis=1), 1)
    rows_ = np.arange(n)
    lo_a = np.where(k == 0, 0.0, grid * r_l[np.maximum(k - 1, 0)])
    tlo = np.where(k == 0, 0.0, t[rows_, np.maximum(k - 1, 0)])
    up_a, tup = grid * r_l[k], t[rows_, k]
    p_thd = np.full(n, np.nan)
    if has.any():
        with np.errstate(invalid="ignore", divide="ignore"):
            x = np.where(has, lo_a + (up_a - lo_a) * (thd - tlo) / (tup - tlo), grid)
            got = at(x)
            if got is None:
                return None
            tx = got[1]
            below = tx < thd
            lo_a, tlo = np.where(below, x, lo_a), np.where(below, tx, tlo)
            up_a, tup = np.where(below, up_a, x), np.where(below, tup, tx)
            xt = np.where(has, lo_a + (up_a - lo_a) * (thd - tlo) / (tup - tlo), grid)
            got = at(xt)
            if got is None:
                return None
        p_thd = np.where(has, got[0], np.nan)
    res = {"p_thd": p_thd}
    _batch_common(stage, banks, op, power, t, level, res)
    if stage.pa_max is not None:
        full = []
        for p in stage.positions:
            va = np.einsum("sk,nk->ns", E_full, along(vk_l[:, -1:], f"{p}.va")[:, 0])
            ia = np.einsum("sk,nk->ns", E_full, along(vk_l[:, -1:], f"{p}.ia")[:, 0])
            full.append(np.maximum(op[f"{p}.pa"], np.mean(va * ia, axis=1)))
        res["pa_ratio"] = np.max(full, axis=0) / stage.pa_max
    res["imbalance"] = op["A.ia"] - op["B.ia"]
    return res


def _batch_common(stage, banks, op, power, t, level, res):
    """The figures both batched solves fill alike: each tube's idle point, the largest output,
    THD at ``level`` [W] (interpolated in each unit's power sweep), output impedance, damping."""
    n = power.shape[0]
    for p in stage.positions:
        for q in ("ia", "va", "pa"):
            res[f"{p}.{q}"] = op[f"{p}.{q}"]
    res["p_max"] = power[:, -1]
    thd_at = np.full(n, np.nan)
    if level is not None:
        for u in range(n):
            if power[u, 0] <= level <= power[u, -1]:
                thd_at[u] = np.interp(level, power[u], t[u])
    res["thd"] = thd_at
    res["zout"] = _z_out_many(stage, banks, op)
    res["damping"] = stage.speaker / res["zout"]


def _z_out_many(stage, banks, op):
    """:func:`_z_out` for n units (arrays)."""
    rps = []
    for b, p in zip(banks, stage.positions):
        gva, gvg = b.gradient(np.asarray(op[f"{p}.va"], float), np.asarray(op[f"{p}.vgk"], float))
        with np.errstate(divide="ignore"):
            rp = np.where(gva > 0, 1.0 / gva, np.inf)
        if stage.rk is not None and not stage.bypassed and stage.kind == "single-ended":
            rp = rp + (gvg * rp + 1.0) * stage.rk
        rps.append(rp)
    if stage.kind == "single-ended":
        return (rps[0] + stage.r_primary) / stage.ratio ** 2
    ra, rb = (r + stage.r_primary / 2.0 for r in rps)
    return 4.0 * ra * rb / (ra + rb) / stage.ratio ** 2
