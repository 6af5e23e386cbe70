"""Stage descriptions: the circuits (plain frozen dataclasses, SI units, keyword fields).

:class:`CommonCathode`, :class:`CathodeFollower` and :class:`Stack` check themselves; an
impossible value raises :class:`StageInputError`, an :class:`~fitter.errors.InputError`
carrying the field it is about (``"ra"``, ``"b_plus"``).  Also the names of a stage's kind,
title, tube positions and output node.
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass

from ..errors import InputError

__all__ = ["StageInputError", "CommonCathode", "CathodeFollower", "Stack", "stage_kind", "stage_title",
           "tube_positions", "output_node"]


class StageInputError(InputError):
    """An impossible value given for a stage, its tubes or an analysis.

    ``field`` is the stage's (or the analysis's) field name (``"ra"``, ``"vin_peak"``);
    the text reads ``CommonCathode.ra: must be positive, got -1.0`` (``owner`` given) or
    ``vin_peak: must be positive ...``.  ``label`` names the field(s) in the text where it
    differs from ``field`` (``"r_upper/r_lower"``).
    """

    def __init__(self, message: str, *, field: str | None = None, owner: str | None = None,
                 label: str | None = None):
        self.owner = owner
        self.label = label or field
        super().__init__(message, field=field)

    def __str__(self) -> str:
        if self.label is None:
            return self.message
        return f"{self.owner + '.' if self.owner else ''}{self.label}: {self.message}"


# ---------------------------------------------------------------------------
# Stage descriptions
# ---------------------------------------------------------------------------


def _check_positive(obj, name, allow_zero=False, optional=False):
    v = getattr(obj, name)
    if v is None:
        if optional:
            return
        raise StageInputError("a value is required", field=name, owner=type(obj).__name__)
    if isinstance(v, bool) or not isinstance(v, (int, float)):
        raise StageInputError(f"must be a number, got {v!r}", field=name, owner=type(obj).__name__)
    if not math.isfinite(v):
        raise StageInputError(f"must be finite, got {v!r}", field=name, owner=type(obj).__name__)
    if v < 0 or (v == 0 and not allow_zero):
        need = "must not be negative" if allow_zero else "must be positive"
        raise StageInputError(f"{need}, got {v!r}", field=name, owner=type(obj).__name__)


def _check_number(obj, name, optional=False):
    v = getattr(obj, name)
    if v is None and optional:
        return
    if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v):
        raise StageInputError(f"must be a finite number, got {v!r}", field=name, owner=type(obj).__name__)


@dataclass(frozen=True, kw_only=True)
class _Common:
    """Fields shared by every stage (all optional).

    Parameters
    ----------
    rg : float
        Grid leak of the input tube [ohm] (sets the input resistance).
    c_in : float or None
        Input coupling capacitor [F]; None: direct coupling (no low corner).
    rs : float
        Source resistance driving the input [ohm]; sets the input high corner.
    rl : float or None
        AC load at the output through the output coupling capacitor [ohm]; None: none.
    c_out : float or None
        Output coupling capacitor [F] (only for the low corner).
    c_load : float
        Capacitance loading the output [F] (cable, next stage).
    cgk, cga, cak : float
        Interelectrode capacitances grid-cathode, grid-plate (grid-anode) and
        plate-cathode of each tube [F].
    pa_max : float or None
        Plate dissipation limit of each tube [W]; None: not checked.
    heater : float
        Heater reference voltage to ground [V]: 0 for grounded heaters, or the
        elevation of the heater supply.
    vhk_max : float
        Heater-cathode voltage limit [V] (datasheets often give 100-200 V).
    """

    rg: float = 1e6
    c_in: float | None = None
    rs: float = 0.0
    rl: float | None = None
    c_out: float | None = None
    c_load: float = 0.0
    cgk: float = 0.0
    cga: float = 0.0
    cak: float = 0.0
    pa_max: float | None = None
    heater: float = 0.0
    vhk_max: float = 100.0

    def _check_common(self):
        _check_positive(self, "rg")
        _check_positive(self, "c_in", optional=True)
        _check_positive(self, "rs", allow_zero=True)
        _check_positive(self, "rl", optional=True)
        _check_positive(self, "c_out", optional=True)
        for name in ("c_load", "cgk", "cga", "cak"):
            _check_positive(self, name, allow_zero=True)
        _check_positive(self, "pa_max", optional=True)
        _check_number(self, "heater")
        _check_positive(self, "vhk_max")

    def to_dict(self) -> dict:
        """The circuit's values in SI units (None where not given)."""
        return {"kind": stage_kind(self), **asdict(self)}


@dataclass(frozen=True, kw_only=True)
class CommonCathode(_Common):
    """Common-cathode stage.

    Parameters
    ----------
    b_plus : float
        Supply voltage [V].
    ra : float
        Plate resistor [ohm].
    rk : float
        Cathode resistor [ohm]; 0 with fixed grid bias.
    ck : float or None
        Cathode bypass capacitor [F]; None: Rk unbypassed.
    vbias : float or None
        Fixed grid bias, the grid's DC voltage to ground [V]; None: the grid leak
        returns the grid to 0 V.
    Other fields: see the shared fields (:class:`_Common`).
    """

    b_plus: float
    ra: float
    rk: float = 0.0
    ck: float | None = None
    vbias: float | None = None

    def __post_init__(self):
        _check_positive(self, "b_plus")
        _check_positive(self, "ra")
        _check_positive(self, "rk", allow_zero=True)
        _check_positive(self, "ck", optional=True)
        _check_number(self, "vbias", optional=True)
        if self.vbias is not None and self.vbias >= self.b_plus:
            raise StageInputError("the grid bias must be below B+", field="vbias", owner="CommonCathode")
        self._check_common()


@dataclass(frozen=True, kw_only=True)
class CathodeFollower(_Common):
    """Cathode follower.

    Parameters
    ----------
    b_plus : float
        Supply voltage at the plate end [V].
    rk : float
        Cathode resistor [ohm], returned to ``vneg``.
    vneg : float
        Voltage the cathode resistor returns to [V]: 0 (ground) or a negative rail.
    ra : float
        Plate resistor [ohm] (0: plate straight to B+, the usual case).
    r_upper, r_lower : float or None
        Grid bias divider from B+ to ground [ohm]; its junction feeds the grid
        through ``rg``.  None: the grid leak ``rg`` returns the grid to 0 V.
    Other fields: see the shared fields (:class:`_Common`).
    """

    b_plus: float
    rk: float
    vneg: float = 0.0
    ra: float = 0.0
    r_upper: float | None = None
    r_lower: float | None = None

    def __post_init__(self):
        _check_positive(self, "b_plus")
        _check_positive(self, "rk")
        _check_number(self, "vneg")
        if self.vneg > 0:
            raise StageInputError(f"the cathode resistor returns to ground or a negative rail, got {self.vneg!r} V",
                                  field="vneg", owner="CathodeFollower")
        _check_positive(self, "ra", allow_zero=True)
        if (self.r_upper is None) != (self.r_lower is None):
            raise StageInputError("give both divider resistors or neither", field="r_lower" if self.r_lower is None else "r_upper",
                                  owner="CathodeFollower", label="r_upper/r_lower")
        _check_positive(self, "r_upper", optional=True)
        _check_positive(self, "r_lower", optional=True)
        self._check_common()

    @property
    def grid_dc(self) -> float:
        """DC grid voltage to ground [V]."""
        if self.r_upper is None:
            return 0.0
        return self.b_plus * self.r_lower / (self.r_upper + self.r_lower)


@dataclass(frozen=True, kw_only=True)
class Stack(_Common):
    """Two triodes in series across B+: mu follower or SRPP (one parametrised circuit).

    The bottom tube is a common-cathode stage (cathode resistor ``rk`` to ground,
    bypassed by ``ck`` or not, or fixed bias ``vbias``).  From its plate ``r_mid``
    leads to the node ``mid`` and ``r_top`` from there to the top cathode; the top
    plate is at B+.

    Parameters
    ----------
    b_plus : float
        Supply voltage [V].
    rk : float
        Bottom cathode resistor [ohm]; 0 with fixed grid bias.
    ck : float or None
        Bottom cathode bypass capacitor [F]; None: unbypassed.
    vbias : float or None
        Fixed bias of the bottom grid [V]; None: grid leak to 0 V.
    r_top : float
        Resistor from the top cathode to ``mid`` [ohm]: it sets the top tube's bias.
    r_mid : float
        Load resistor from ``mid`` to the bottom plate [ohm]; 0 for the SRPP.
    top_grid : {"coupled", "tied"}
        ``"coupled"`` (mu follower): the top grid is AC-coupled from the bottom plate
        through ``c_top`` and DC-biased from ``mid`` through ``rg_top``.
        ``"tied"`` (SRPP): the top grid is wired to the bottom plate.
    rg_top : float
        Top grid bias resistor [ohm] (coupled only).
    c_top : float or None
        Top grid coupling capacitor [F] (coupled only; sets a low corner).
    output : {"top-cathode", "bottom-plate"}
        Where the output (and the load ``rl``) is taken.
    Other fields: see the shared fields (:class:`_Common`).  The interelectrode
    capacitances, dissipation and heater limits apply to both tubes.
    """

    b_plus: float
    rk: float
    r_top: float
    r_mid: float = 0.0
    ck: float | None = None
    vbias: float | None = None
    top_grid: str = "tied"
    rg_top: float = 1e6
    c_top: float | None = None
    output: str = "top-cathode"

    def __post_init__(self):
        _check_positive(self, "b_plus")
        _check_positive(self, "rk", allow_zero=True)
        _check_positive(self, "r_top")
        _check_positive(self, "r_mid", allow_zero=True)
        _check_positive(self, "ck", optional=True)
        _check_number(self, "vbias", optional=True)
        if self.vbias is not None and self.vbias >= self.b_plus:
            raise StageInputError("the grid bias must be below B+", field="vbias", owner="Stack")
        if self.top_grid not in ("coupled", "tied"):
            raise StageInputError(f"must be 'coupled' or 'tied', got {self.top_grid!r}", field="top_grid", owner="Stack")
        _check_positive(self, "rg_top")
        _check_positive(self, "c_top", optional=True)
        if self.output not in ("top-cathode", "bottom-plate"):
            raise StageInputError(f"must be 'top-cathode' or 'bottom-plate', got {self.output!r}",
                                  field="output", owner="Stack")
        self._check_common()

    @classmethod
    def srpp(cls, *, b_plus, rk, r_top=None, **kw) -> "Stack":
        """An SRPP: top grid tied to the bottom plate, ``r_top`` (default ``rk``)
        between the top cathode and the bottom plate, output at the top cathode."""
        kw.setdefault("output", "top-cathode")
        return cls(b_plus=b_plus, rk=rk, r_top=rk if r_top is None else r_top,
                   r_mid=0.0, top_grid="tied", **kw)

    @classmethod
    def mu_follower(cls, *, b_plus, rk, r_top, r_mid, **kw) -> "Stack":
        """A mu follower: load resistor ``r_mid`` between the tubes, top grid AC-coupled
        from the bottom plate and biased from ``mid``; output at the top cathode
        unless ``output="bottom-plate"``."""
        return cls(b_plus=b_plus, rk=rk, r_top=r_top, r_mid=r_mid, top_grid="coupled", **kw)


_KINDS = {CommonCathode: "common-cathode", CathodeFollower: "cathode-follower", Stack: "stack"}


def stage_kind(stage) -> str:
    """``"common-cathode"``, ``"cathode-follower"`` or ``"stack"``."""
    try:
        return _KINDS[type(stage)]
    except KeyError:
        raise ValueError(
            f"not a stage description: {type(stage).__name__}; use CommonCathode, "
            "CathodeFollower or Stack"
        ) from None


def stage_title(stage) -> str:
    """Human-readable name: "Common-cathode stage", "Stack (SRPP)", ..."""
    if isinstance(stage, Stack):
        return "Stack (SRPP)" if stage.top_grid == "tied" else "Stack (mu follower)"
    return {"common-cathode": "Common-cathode stage", "cathode-follower": "Cathode follower"}[stage_kind(stage)]


def tube_positions(stage) -> tuple[str, ...]:
    """Names of the tube positions: ``("tube",)`` or ``("bottom", "top")``."""
    return ("bottom", "top") if isinstance(stage, Stack) else ("tube",)


def output_node(stage) -> str:
    """The node the output (and the load) is taken from."""
    if isinstance(stage, CommonCathode):
        return "plate"
    if isinstance(stage, CathodeFollower):
        return "cathode"
    return "cathode_top" if stage.output == "top-cathode" else "plate_bottom"


def _output_nodes(stage) -> tuple[str, ...]:
    """Nodes that are outputs (gain and zout are reported for each)."""
    if isinstance(stage, Stack):
        return ("cathode_top", "plate_bottom")
    return (output_node(stage),)
