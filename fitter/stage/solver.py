"""The tube kernel and the circuits' equations: operating point and quasi-static transfer.

Every tube equation is ``I = f(a0 - a1 I, b0 - b1 I)`` solved by :func:`_solve_tube` (a
bracketed Newton iteration that cannot diverge); stacks use a joint Newton step with a
nested bracketed solve as fallback.  Everything is vectorised over units, levels and samples.
See :mod:`fitter.stage` for the method.
"""

from __future__ import annotations

from typing import Sequence

import numpy as np

from ..triode import FittedTriode
from .circuits import CathodeFollower, CommonCathode, Stack, stage_kind, tube_positions

__all__ = ["StageSolveError", "operating_point", "quasi_static"]


class StageSolveError(RuntimeError):
    """A stage could not be solved; the message says where and why."""



# ---------------------------------------------------------------------------
# Vectorised tube evaluation
# ---------------------------------------------------------------------------


class _Bank:
    """Units of one model, evaluated elementwise against 1-D state arrays.

    Parameters are scalars where they are the same for every unit, else arrays of
    the state length.  Grid-current parameters are kept scalar (units are grouped
    by them) because the models test them with ``if``.
    """

    def __init__(self, model, params):
        self.model = model
        self.params = params
        # models without a grid-current part never give a negative plate current
        self.nonnegative = not model.carries_grid_current(params)

    @classmethod
    def of(cls, triodes: Sequence[FittedTriode]) -> "_Bank":
        model = triodes[0].model
        params = {}
        for name in model.param_names:
            vals = np.array([t.params[name] for t in triodes], dtype=float)
            if len(vals) == 1 or np.all(vals == vals[0]):
                params[name] = float(vals[0])
            else:
                params[name] = vals
        return cls(model, params)

    def arrays(self):
        """The parameters that differ between units (for broadcasting shapes)."""
        return [v for v in self.params.values() if isinstance(v, np.ndarray)]

    def repeat(self, k: int) -> "_Bank":
        """Each unit repeated ``k`` times (units major), for ``k`` cases per unit."""
        if k == 1:
            return self
        return _Bank(self.model, {n: (np.repeat(v, k) if isinstance(v, np.ndarray) else v)
                                  for n, v in self.params.items()})

    def current(self, va, vg):
        return self.model.current(va, vg, **self.params)

    def gradient(self, va, vg):
        return self.model.voltage_gradient(va, vg, **self.params)

    def current_and_gradient(self, va, vg):
        return self.model.current_with_gradient(va, vg, **self.params)


def _group_key(t: FittedTriode):
    return (t.model.name,) + tuple(t.params[p] for p in t.model.grid_param_names)


# ---------------------------------------------------------------------------
# Root finders
# ---------------------------------------------------------------------------

_I_ABS = 1e-16  # [A]
#: try the joint Newton iteration first for mid-band stack solves (the nested bracketed
#: iteration is the fallback, and the only method for the DC solve)
_JOINT = True
_JOINT_MAXIT = 12
_REL = 1e-13
_MAXIT = 80


def _bc(v, shape):
    """``v`` as a float array of ``shape`` (a view where it already has that shape)."""
    if isinstance(v, np.ndarray) and v.shape == shape and v.dtype == float:
        return v
    return np.broadcast_to(np.asarray(v, float), shape)


def _solve_tube(bank: _Bank, a0, a1, b0, b1, x0=None):
    """Solve I = f(a0 - a1 I, b0 - b1 I) elementwise (a1, b1 >= 0).

    Returns (I, dIa/dva, dIa/dvg, D) at the solution, D = 1 + a1 dIa/dva + b1 dIa/dvg
    (the slope of the residual; the sensitivity of I to a0 is dIa/dva / D).
    """
    shape = np.broadcast(a0, a1, b0, b1, *bank.arrays()).shape
    if x0 is not None:
        shape = np.broadcast(np.zeros(shape), x0).shape
    x = np.zeros(shape) if x0 is None else np.broadcast_to(np.asarray(x0, float), shape).copy()
    lo = hi = None
    errs = np.seterr(divide="ignore", invalid="ignore")
    try:
        for it in range(_MAXIT):
            va = a0 - a1 * x
            vg = b0 - b1 * x
            f, gva, gvg = bank.current_and_gradient(va, vg)
            F = x - f
            D = 1.0 + a1 * gva + b1 * gvg
            step = F / D
            tol = _I_ABS + _REL * np.abs(x)
            small = np.abs(step) <= tol
            if small.all():
                # every step below the tolerance (the usual end): converged at x
                break
            if it == 0:
                # F' >= 1 (the models rise with va and vg), so the root is within |F| of x;
                # the factor 4 leaves room where a model's slope is slightly negative.
                lo = np.where(F > 0, x - 4.0 * F, x)
                hi = np.where(F > 0, x, x - 4.0 * F)
            else:
                lo = np.where(F < 0, np.maximum(lo, x), lo)
                hi = np.where(F > 0, np.minimum(hi, x), hi)
            xn = x - step
            # a step below the tolerance is taken even onto a bracket end (it is converged)
            bad = ~((xn > lo) & (xn < hi)) & ~small
            xn = np.where(bad, 0.5 * (lo + hi), xn)
            xn = np.where(F == 0, x, xn)
            if (np.abs(xn - x) <= tol).all():
                break
            x = xn
        else:
            raise StageSolveError(
                f"tube equation did not converge in {_MAXIT} iterations at "
                f"{int(np.sum(np.abs(xn - x) > tol))} of {x.size} points"
            )
    finally:
        np.seterr(**errs)
    # the residual against the slope: a large load makes F' = D huge, so the current is
    # settled to rounding while F, the difference of two large terms, is not small
    if np.any(np.abs(F) > 1e-9 * np.maximum(np.abs(x), 1e-6) * np.maximum(np.abs(D), 1.0)):
        raise StageSolveError("tube equation: no consistent plate current found (model not monotone?)")
    return x, gva, gvg, D


def _solve_outer(fun, x0, lo, hi, xtol):
    """Bracketed Newton on an increasing residual ``fun(x) -> (F, dF, state)``.

    ``lo``/``hi`` are assumed to bracket the root; if the iteration ends on a bracket
    end with a residual that is not small, the bracket is widened and it goes on.
    """
    x = np.clip(x0, lo, hi)
    lo = np.array(lo, dtype=float, copy=True)
    hi = np.array(hi, dtype=float, copy=True)
    span = hi - lo
    widen = 0
    for it in range(4 * _MAXIT):
        F, dF, state = fun(x)
        lo = np.where(F < 0, np.maximum(lo, x), lo)
        hi = np.where(F > 0, np.minimum(hi, x), hi)
        with np.errstate(divide="ignore", invalid="ignore"):
            xn = x - F / dF
        bad = ~((xn > lo) & (xn < hi)) & ~(np.abs(xn - x) <= xtol)
        xn = np.where(bad, 0.5 * (lo + hi), xn)
        xn = np.where(F == 0, x, xn)
        step = np.abs(xn - x)
        if np.all(step <= xtol):
            # residual [A] small against the iteration's scale, or below what the inner
            # solves resolve (1e-13 A) where both tubes are cut off
            stuck = np.abs(F) > 1e-9 * np.abs(dF) * span + 1e-13
            if not np.any(stuck):
                return x, state
            widen += 1
            if widen > 6:
                break
            lo = np.where(stuck & (F > 0), lo - span, lo)
            hi = np.where(stuck & (F < 0), hi + span, hi)
            xn = np.where(stuck, 0.5 * (lo + hi), xn)
        x = xn
    raise StageSolveError("stack: the bottom-plate voltage iteration did not converge")


# ---------------------------------------------------------------------------
# The circuits' equations
# ---------------------------------------------------------------------------
#
# Each solver returns a dict of arrays: node voltages under their node names, and
# for each tube position p the keys p+".va", p+".vgk", p+".ia".  ``vin`` is the
# signal added to the input grid, ``inj`` a dict node -> current injected into that
# node [A] (for output impedances), ``gl`` the load conductance [S] (0: no load).


def _single_tube_nodes(vg, k, p, I):
    """Node voltages and tube figures of a one-tube stage (grid, cathode, plate, current),
    all broadcast to the shape of the current."""
    return {"grid": vg + 0 * I, "cathode": k + 0 * I, "plate": p,
            "tube.va": p - k, "tube.vgk": vg - k, "tube.ia": I}


def _cc_dc(st: CommonCathode, banks, n, dvg=0.0):
    (bank,) = banks
    vg = (0.0 if st.vbias is None else st.vbias) + dvg
    I, *_ = _solve_tube(bank, st.b_plus, st.ra + st.rk, vg, st.rk)
    I = np.broadcast_to(I, np.broadcast(I, np.zeros(n)).shape)
    k = st.rk * I
    p = st.b_plus - st.ra * I
    return _single_tube_nodes(vg, k, p, I)


def _cc_mid(st: CommonCathode, banks, op, vin, inj, gl):
    (bank,) = banks
    ix = inj.get("plate", 0.0)
    g = 1.0 / st.ra + gl
    rth = 1.0 / g
    pth = rth * (st.b_plus / st.ra + gl * op["plate"] + ix)
    if st.ck is not None:
        kc, ru = op["cathode"], 0.0
    else:
        kc, ru = 0.0, st.rk
    vg = op["grid"] + vin
    I, *_ = _solve_tube(bank, pth - kc, rth + ru, vg - kc, ru, x0=op["tube.ia"])
    k = kc + ru * I
    p = pth - rth * I
    return _single_tube_nodes(vg, k, p, I)


def _cf_dc(st: CathodeFollower, banks, n, dvg=0.0):
    (bank,) = banks
    vg = st.grid_dc + dvg
    I, *_ = _solve_tube(bank, st.b_plus - st.vneg, st.ra + st.rk, vg - st.vneg, st.rk)
    I = np.broadcast_to(I, np.broadcast(I, np.zeros(n)).shape)
    k = st.vneg + st.rk * I
    p = st.b_plus - st.ra * I
    return _single_tube_nodes(vg, k, p, I)


def _cf_mid(st: CathodeFollower, banks, op, vin, inj, gl):
    (bank,) = banks
    ix = inj.get("cathode", 0.0)
    g = 1.0 / st.rk + gl
    rth = 1.0 / g
    kth = rth * (ix + st.vneg / st.rk + gl * op["cathode"])
    vg = op["grid"] + vin
    I, *_ = _solve_tube(bank, st.b_plus - kth, st.ra + rth, vg - kth, rth, x0=op["tube.ia"])
    k = kth + rth * I
    p = st.b_plus - st.ra * I
    return _single_tube_nodes(vg, k, p, I)


def _stack_solve(st: Stack, banks, vg1, mid_op=None, inj=None, gl=0.0, x0=None, n=1, joint_first=True):
    """Solve the stack for bottom grid voltage ``vg1``.

    ``mid_op`` None: DC (capacitors open).  Otherwise mid-band with the capacitors
    holding the charge of the DC solution ``mid_op``.  ``joint_first`` False: the nested
    bracketed iteration only (for the samples the joint one left unconverged).
    """
    bottom, top = banks
    inj = inj or {}
    B = st.b_plus
    rm, rt = st.r_mid, st.r_top
    gt = 1.0 / rt
    dc = mid_op is None
    if dc:
        kc, ru = 0.0, st.rk
        glp = glk = 0.0
        ixp = ixk = 0.0
    else:
        kc, ru = (mid_op["cathode_bottom"], 0.0) if st.ck is not None else (0.0, st.rk)
        out_top = st.output == "top-cathode"
        glk = gl if out_top else 0.0
        glp = 0.0 if out_top else gl
        ixp = inj.get("plate_bottom", 0.0)
        ixk = inj.get("cathode_top", 0.0)
        coupled = st.top_grid == "coupled"
        gg = 1.0 / st.rg_top if coupled else 0.0
        vc0 = (mid_op["plate_bottom"] - mid_op["grid_top"]) if coupled else 0.0
        w = 1.0 / (1.0 + rm * (gt + gg))
        DK = gt + glk - gt * gt * rm * w
        cK = 1.0 / DK
        k20 = mid_op["cathode_top"]
        p10 = mid_op["plate_bottom"]
        dkap = gt * w * (rm * gg + 1.0) / DK

    shape = np.broadcast(vg1, gl, ixp, ixk, np.zeros(n)).shape
    warm = {"i1": None if x0 is None else x0[0], "i2": None if x0 is None else x0[1]}

    def top_coeffs(p1):
        if dc:
            a0 = B - p1
            a1 = rm + rt
            g2 = p1 if st.top_grid == "tied" else None
            b1 = rt if st.top_grid == "coupled" else rm + rt
            return a0, a1, 0.0, b1, -1.0, 0.0, g2
        g2 = p1 - vc0
        kap = (ixk + glk * k20 + gt * w * (rm * gg * g2 + p1)) / DK
        return B - kap, cK, g2 - kap, cK, -dkap, 1.0 - dkap, g2

    def residual(p1):
        i1, f1va, f1vg, D1 = _solve_tube(bottom, p1 - kc, ru, vg1 - kc, ru, x0=warm["i1"])
        a0, a1, b0, b1, da0, db0, g2 = top_coeffs(p1)
        i2, f2va, f2vg, D2 = _solve_tube(top, a0, a1, b0, b1, x0=warm["i2"])
        warm["i1"], warm["i2"] = i1, i2
        di1 = f1va / D1
        di2 = (f2va * da0 + f2vg * db0) / D2
        if dc:
            F = i1 - i2
            dF = di1 - di2
        else:
            k2 = cK * i2 + (B - a0)
            idown = i2 + ixk - glk * (k2 - k20)
            F = i1 + glp * (p1 - p10) - ixp - idown
            dF = di1 + glp - (di2 * (1.0 - glk * cK) - glk * dkap)
        return F, dF, (i1, i2)

    def joint(p1, i1, i2):
        """Newton on (P1, I1, I2) together: one tube evaluation each per step.  Its
        step in P1 is the nested iteration's step with the inner solves cut to one
        Newton step, so near the root it is the same iteration, only cheaper."""
        with np.errstate(divide="ignore", invalid="ignore"):
            return _joint_loop(p1, i1, i2)

    def _joint_loop(p1, i1, i2):
        tol_p = 1e-12 * B
        for it in range(_JOINT_MAXIT):
            va1 = p1 - kc - ru * i1
            vg = vg1 - kc - ru * i1
            f1, f1va, f1vg = bottom.current_and_gradient(va1, vg)
            a0, a1, b0, b1, da0, db0, _ = top_coeffs(p1)
            va2 = a0 - a1 * i2
            vg2 = b0 - b1 * i2
            f2, f2va, f2vg = top.current_and_gradient(va2, vg2)
            r1 = i1 - f1
            r2 = i2 - f2
            D1 = 1.0 + ru * (f1va + f1vg)
            D2 = 1.0 + a1 * f2va + b1 * f2vg
            c2 = f2va * da0 + f2vg * db0
            if dc:
                r3 = i1 - i2
                e, h = -1.0, 0.0
            else:
                k2 = cK * i2 + (B - a0)
                r3 = i1 + glp * (p1 - p10) - ixp - (i2 + ixk - glk * (k2 - k20))
                e, h = -(1.0 - glk * cK), glp + glk * dkap
            dp = -(r3 - r1 / D1 - e * r2 / D2) / (f1va / D1 + e * c2 / D2 + h)
            dp = np.minimum(np.maximum(dp, -0.2 * B), 0.2 * B)
            di1 = (-r1 + f1va * dp) / D1
            di2 = (-r2 + c2 * dp) / D2
            finite = np.isfinite(dp + di1 + di2)
            # currents to 1e-11 relative (node voltages then agree with ngspice to about
            # 1e-11, far below any figure a report shows); the plate voltage to 1e-12 B+
            ok = (finite & (np.abs(dp) <= tol_p) & (np.abs(di1) <= _I_ABS + 1e-11 * np.abs(i1))
                  & (np.abs(di2) <= _I_ABS + 1e-11 * np.abs(i2)))
            if ok.all():
                return p1, i1, i2
            if not finite.all() or it == _JOINT_MAXIT - 1:
                # the samples converged here keep this answer; the rest are solved by the
                # bracketed iteration (all of them where the arrays do not allow that)
                return (p1, i1, i2, ok) if np.ndim(ok) == 1 and ok.any() else None
            p1 = p1 + dp
            # currents stay non-negative where the model cannot give a negative one
            i1 = np.where(i1 + di1 < 0, 0.5 * i1, i1 + di1) if bottom.nonnegative else i1 + di1
            i2 = np.where(i2 + di2 < 0, 0.5 * i2, i2 + di2) if top.nonnegative else i2 + di2
        return None

    got = None
    if not joint_first:
        pass
    elif _JOINT and not dc:
        got = joint(np.broadcast_to(mid_op["plate_bottom"], shape).astype(float),
                    np.broadcast_to(x0[0], shape).astype(float), np.broadcast_to(x0[1], shape).astype(float))
    elif _JOINT:
        # DC start: bottom plate at B+/2 and the current the bottom tube draws there
        pstart = np.full(shape, 0.5 * B)
        # one Newton step of the bottom tube's equation from zero current (F' >= 1 keeps
        # it between zero and the bottom tube's unloaded current)
        va_s, vg_s = pstart - kc, vg1 - kc
        f0, g0a, g0g = bottom.current_and_gradient(va_s, vg_s)
        istart = np.broadcast_to(f0 / (1.0 + ru * (g0a + g0g)), shape).astype(float)
        got = joint(pstart, istart, istart.copy())
    if got is not None and len(got) == 4:
        p1, i1, i2, ok = (np.array(np.broadcast_to(v, shape)) for v in got)
        ok = ok.astype(bool)
        bad = ~ok
        N = shape[0]

        def take(v):
            return v[bad] if isinstance(v, np.ndarray) and v.shape == (N,) else v

        sub = _stack_solve(st, tuple(_Bank(b.model, {k: take(v) for k, v in b.params.items()}) for b in banks),
                           take(np.broadcast_to(vg1, shape)),
                           None if dc else {k: take(np.broadcast_to(np.asarray(v, float), shape))
                                            for k, v in mid_op.items()},
                           {k: take(np.broadcast_to(np.asarray(v, float), shape)) for k, v in inj.items()},
                           take(np.broadcast_to(np.asarray(gl, float), shape)) if np.ndim(gl) else gl,
                           None if x0 is None else tuple(take(np.broadcast_to(np.asarray(v, float), shape))
                                                         for v in x0),
                           n=int(bad.sum()), joint_first=False)
        p1[bad] = sub["plate_bottom"]
        i1[bad] = sub["bottom.ia"]
        i2[bad] = sub["top.ia"]
    elif got is not None:
        p1, i1, i2 = got
    else:
        p0 = (0.5 * B) if dc else mid_op["plate_bottom"]
        p0 = np.broadcast_to(p0, shape).astype(float)
        lo = np.full(shape, -0.5 * B)
        hi = np.full(shape, 1.5 * B)
        p1, (i1, i2) = _solve_outer(residual, p0, lo, hi, xtol=1e-12 * B)
    i1 = _bc(i1, shape)
    i2 = _bc(i2, shape)
    k1 = kc + ru * i1
    if dc:
        mid = p1 + rm * i2
        k2 = mid + rt * i2
        g2 = mid if st.top_grid == "coupled" else p1
    else:
        a0, a1, b0, b1, _, _, g2 = top_coeffs(p1)
        k2 = cK * i2 + (B - a0)
        mid = rm * w * (gt * k2 + gg * g2) + w * p1
    g1 = np.broadcast_to(vg1, shape) + 0.0
    return {
        "grid": g1, "cathode_bottom": k1 + 0 * p1, "plate_bottom": p1, "mid": mid,
        "cathode_top": k2, "grid_top": g2 + 0 * p1, "plate_top": B + 0 * p1,
        "bottom.va": p1 - k1, "bottom.vgk": g1 - k1, "bottom.ia": i1,
        "top.va": B - k2, "top.vgk": g2 - k2, "top.ia": i2,
    }


def _stack_dc(st: Stack, banks, n, dvg=0.0):
    vg = (0.0 if st.vbias is None else st.vbias) + dvg
    return _stack_solve(st, banks, vg + np.zeros(n), n=n)


def _stack_mid(st: Stack, banks, op, vin, inj, gl):
    return _stack_solve(st, banks, op["grid"] + vin, mid_op=op, inj=inj, gl=gl,
                        x0=(op["bottom.ia"], op["top.ia"]), n=np.size(vin))


_DC = {CommonCathode: _cc_dc, CathodeFollower: _cf_dc, Stack: _stack_dc}
_MID = {CommonCathode: _cc_mid, CathodeFollower: _cf_mid, Stack: _stack_mid}


def _repeat_op(op, k):
    return {key: np.repeat(np.atleast_1d(v), k) for key, v in op.items()}



def _check_triodes(stage, triodes):
    positions = tube_positions(stage)
    if len(triodes) != len(positions):
        what = "two triodes (bottom, top)" if len(positions) == 2 else "one triode"
        raise ValueError(f"{stage_kind(stage)}: needs {what}, got {len(triodes)}")
    for t in triodes:
        if not isinstance(t, FittedTriode):
            raise ValueError(f"{stage_kind(stage)}: tubes must be FittedTriode objects, got {type(t).__name__}")


def operating_point(stage, *triodes) -> dict:
    """DC node voltages [V] and tube va, vgk [V], ia [A] (floats, SI)."""
    stage_kind(stage)
    _check_triodes(stage, triodes)
    banks = tuple(_Bank.of([t]) for t in triodes)
    op = _DC[type(stage)](stage, banks, 1)
    return {k: float(np.asarray(v).ravel()[0]) for k, v in op.items()}


def quasi_static(stage, *triodes, vin, op=None, dc_grid=False) -> dict:
    """Mid-band large-signal transfer for an array of input-grid signals.

    Parameters
    ----------
    stage : CommonCathode, CathodeFollower or Stack
    *triodes : FittedTriode
        One tube, or bottom then top for a stack.
    vin : array_like
        Signal added to the input grid's DC voltage [V].
    op : dict or None
        The DC operating point (from :func:`operating_point`); computed if None.
    dc_grid : bool
        If True, solve the DC circuit with the grid moved by ``vin`` instead (the DC
        load line of the stage; capacitors open).

    Returns
    -------
    dict
        Arrays shaped like ``vin``: node voltages [V] by node name, and for each tube
        position ``p`` the keys ``p.va``, ``p.vgk`` [V] and ``p.ia`` [A].  Capacitors
        hold their DC charge (quasi-static, mid-band); the load ``rl`` is connected.
    """
    stage_kind(stage)
    _check_triodes(stage, triodes)
    vin = np.asarray(vin, dtype=float)
    shape = vin.shape
    flat = vin.ravel()
    banks = tuple(_Bank.of([t]) for t in triodes)
    if dc_grid:
        res = _DC[type(stage)](stage, banks, flat.size, dvg=flat)
    else:
        if op is None:
            op = operating_point(stage, *triodes)
        opk = {k: np.full(flat.size, v) for k, v in op.items()}
        gl = 0.0 if stage.rl is None else 1.0 / stage.rl
        res = _MID[type(stage)](stage, banks, opk, flat, {}, gl)
    return {k: np.broadcast_to(np.asarray(v, float), flat.shape).reshape(shape) for k, v in res.items()}

