"""Shared fixtures of the fitting-engine tests: a plate-curve generator.

The generator is written for the tests, independently of ``curves/make_demo.py``
(it shares no code with it): it evaluates a registered model at known parameters on
a tracer-like grid, drops the points a tracer would refuse (current limit, plate
dissipation limit), adds gaussian noise (relative, plus an optional absolute floor)
and, on request, a few "tracer glitches" whose positions it remembers, so that a
test can check that the fitter finds exactly those.

Every data set made here is INVENTED; none is a measurement of a real tube.

Fixtures
--------
synth
    The function :func:`synthesize`.
tube_types
    :data:`TUBE_TYPES`, the three published Koren sets with tracer settings.
write_long
    Writes a list of :class:`Synthetic` units to one long-layout CSV file.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pytest

from fitter.models import get_model
from fitter.reader import CurveSet


@dataclass(frozen=True)
class TubeType:
    """A tube type as the tests trace it: published parameters plus tracer limits."""

    name: str
    model: str
    params: dict
    grid_voltages: tuple  # [V]
    va_max: float  # [V]
    va_step: float  # [V]
    i_max: float  # tracer current limit [A]
    p_max: float  # plate dissipation limit [W]


# Koren's published parameter sets, FROM MEMORY of the table in N. Koren, "Improved
# vacuum tube models for SPICE simulations", Glass Audio 8(5), 1996, rev. 2003.
# Dissipation limits are the datasheet maxima per section, from memory (12AX7 1 W,
# 12AU7 2.75 W, 300B 36 W); grid ranges and current limits are the usual tracer
# settings for those types (common practice).
TUBE_TYPES = {
    "12AX7": TubeType(
        "12AX7", "koren", dict(mu=100.0, ex=1.4, kg1=1060.0, kp=600.0, kvb=300.0),
        tuple(np.arange(0.0, -4.01, -0.5)), 400.0, 10.0, 8e-3, 1.0,
    ),
    "12AU7": TubeType(
        "12AU7", "koren", dict(mu=21.5, ex=1.3, kg1=1180.0, kp=84.0, kvb=300.0),
        tuple(np.arange(0.0, -24.01, -2.0)), 400.0, 10.0, 30e-3, 2.75,
    ),
    "300B": TubeType(
        "300B", "koren", dict(mu=3.95, ex=1.4, kg1=1550.0, kp=65.0, kvb=300.0),
        tuple(np.arange(0.0, -100.01, -10.0)), 500.0, 10.0, 250e-3, 36.0,
    ),
}


@dataclass
class Synthetic:
    """One invented unit: the points, the true currents and where the glitches are."""

    va: np.ndarray  # [V]
    vg: np.ndarray  # [V]
    ia_true: np.ndarray  # noiseless model current [A]
    ia: np.ndarray  # "measured" current [A]
    outlier: np.ndarray  # bool mask of the injected glitches
    model: str
    params: dict
    tube: str = "T1"
    section: str | None = None
    lines: np.ndarray = field(default=None)  # line numbers once written to a file

    @property
    def n_points(self) -> int:
        return int(self.va.size)

    def noise_rms(self) -> float:
        """RMS of the added noise over the clean points [A]."""
        d = (self.ia - self.ia_true)[~self.outlier]
        return float(np.sqrt(np.mean(d**2)))

    def curveset(self) -> CurveSet:
        lines = self.lines if self.lines is not None else np.arange(self.n_points) + 2
        return CurveSet(self.tube, self.section, self.va.copy(), self.vg.copy(), self.ia.copy(),
                        source="<synthetic>", lines=np.asarray(lines, dtype=np.int64))

    def outlier_lines(self) -> set[int]:
        lines = self.lines if self.lines is not None else np.arange(self.n_points) + 2
        return set(int(x) for x in np.asarray(lines)[self.outlier])


def synthesize(
    model: str | TubeType,
    params: dict | None = None,
    grid_voltages=None,
    va_max: float = 400.0,
    va_step: float = 10.0,
    i_max: float = np.inf,
    p_max: float = np.inf,
    noise: float = 0.01,
    noise_floor: float = 0.0,
    outliers: float = 0.0,
    seed: int = 0,
    tube: str = "T1",
    section: str | None = None,
    min_current: float = 0.0,
) -> Synthetic:
    """Invented plate curves of a known model, as a tracer would record them.

    Parameters
    ----------
    model : str or TubeType
        Registered model name, or a :class:`TubeType` (which supplies every tracer
        setting not given here).
    params : dict
        Model parameters (SI units of the model).
    grid_voltages : sequence of float
        One curve per grid voltage [V].
    va_max, va_step : float
        Plate sweep from ``va_step`` to ``va_max`` [V].
    i_max : float
        Tracer current limit [A]: points above it are not recorded.
    p_max : float
        Plate dissipation limit [W]: points with va*ia above it are not recorded.
    noise : float
        Relative gaussian noise (sigma as a fraction of the current).
    noise_floor : float
        Absolute gaussian noise [A]; readings are clipped at 0 as a tracer does.
    outliers : float
        Fraction of the points turned into glitches (reading x 1.35..2 or
        x 0.3..0.65), chosen among points above 10 % of the largest current.
    seed : int
        Seed of the random generator: the same arguments give the same data.
    min_current : float
        Points whose true current is below this are not recorded [A].
    """
    if isinstance(model, TubeType):
        t = model
        model, params = t.model, dict(params or t.params)
        grid_voltages = t.grid_voltages if grid_voltages is None else grid_voltages
        va_max, va_step = t.va_max, t.va_step
        i_max = min(i_max, t.i_max)
        p_max = min(p_max, t.p_max)
    rng = np.random.default_rng(seed)
    m = get_model(model)
    plate = np.arange(va_step, va_max + 1e-9, va_step)
    VA, VG = np.meshgrid(plate, np.asarray(grid_voltages, float))
    va, vg = VA.ravel(), VG.ravel()
    it = m.current(va, vg, **params)
    keep = (it <= i_max) & (va * it <= p_max) & (it >= min_current)
    va, vg, it = va[keep], vg[keep], it[keep]
    ia = it * (1.0 + noise * rng.standard_normal(it.size))
    if noise_floor:
        ia = np.maximum(ia + noise_floor * rng.standard_normal(it.size), 0.0)
    mask = np.zeros(it.size, dtype=bool)
    if outliers:
        candidates = np.flatnonzero(it > 0.1 * it.max())
        k = max(1, int(round(outliers * it.size)))
        idx = rng.choice(candidates, size=k, replace=False)
        up = rng.random(k) < 0.5
        factor = np.where(up, rng.uniform(1.35, 2.0, k), rng.uniform(0.3, 0.65, k))
        ia[idx] = it[idx] * factor
        mask[idx] = True
    return Synthetic(va, vg, it, ia, mask, m.name, dict(params), tube, section)


def write_long(path, units, unit: str = "ma", with_section: bool = True, header_comment: str | None = None):
    """Write units to one long-layout CSV; sets each unit's ``lines``.  Returns the path."""
    scale = {"ma": 1e3, "a": 1.0, "ua": 1e6}[unit]
    path = Path(path)
    out = [f"# {header_comment or 'INVENTED test data (tests/conftest.py)'}"]
    cols = ["tube"] + (["section"] if with_section else []) + ["va", "vg", f"ia_{unit}"]
    out.append(",".join(cols))
    for u in units:
        lines = []
        for a, g, i in zip(u.va, u.vg, u.ia):
            row = [u.tube] + ([u.section or ""] if with_section else []) + [repr(float(a)), repr(float(g)),
                                                                            repr(float(i * scale))]
            out.append(",".join(row))
            lines.append(len(out))
        u.lines = np.array(lines, dtype=np.int64)
    path.write_text("\n".join(out) + "\n")
    return path


@pytest.fixture(scope="session")
def synth():
    return synthesize


@pytest.fixture(scope="session")
def tube_types():
    return TUBE_TYPES


@pytest.fixture(name="write_long", scope="session")
def write_long_fixture():
    return write_long
