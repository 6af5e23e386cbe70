"""Engineering notation for component values: 100k, 1.5k, 4.7M, 470n, 22u, 100p, 2k2."""

from __future__ import annotations

import math
import re

__all__ = ["parse_value", "format_value"]

_PREFIX = {
    "f": 1e-15, "p": 1e-12, "n": 1e-9, "u": 1e-6, "µ": 1e-6, "μ": 1e-6, "m": 1e-3,
    "": 1.0, "k": 1e3, "K": 1e3, "M": 1e6, "meg": 1e6, "MEG": 1e6, "Meg": 1e6, "G": 1e9,
}
_UNIT = r"(?:ohm|Ohm|OHM|Ω|R|F|H|V|A|S)?"
_PLAIN = re.compile(rf"^([-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?)\s*(meg|MEG|Meg|[fpnuµμmkKMG]?)\s*{_UNIT}$")
# "2k2" / "4M7" / "4R7": the prefix letter stands for the decimal point (common practice on schematics)
_INFIX = re.compile(r"^(\d+)([pnuµμmkKMGR])(\d+)$")


def parse_value(text, what: str = "value") -> float:
    """Parse ``text`` in engineering notation and return a float in SI units.

    Raises ``ValueError`` naming ``what`` and the text when it cannot be read or is
    not finite (``nan``, ``inf``, or a number too large for a float such as ``1e400``).
    """
    if isinstance(text, (int, float)) and not isinstance(text, bool):
        return _finite(float(text), text, what)
    s = str(text).strip()
    m = _PLAIN.match(s)
    if m:
        return _finite(float(m.group(1)) * _PREFIX[m.group(2)], text, what)
    m = _INFIX.match(s)
    if m:
        scale = 1.0 if m.group(2) == "R" else _PREFIX[m.group(2)]
        return _finite(float(f"{m.group(1)}.{m.group(3)}") * scale, text, what)
    if s.lower().lstrip("+-") in ("nan", "inf", "infinity"):
        raise ValueError(f"{what}: {_shown(text)!r} is not a finite number")
    raise ValueError(
        f"{what}: cannot read {_shown(text)!r}; use a number with an optional prefix "
        "f p n u m k M G (e.g. 100k, 1.5k, 4.7M, 470n, 22u, 100p)"
    )


def _shown(text) -> str:
    """``text`` as quoted in an error: at most 40 characters, so a pasted file stays out."""
    s = str(text)
    return s if len(s) <= 40 else s[:37] + "..."


def _finite(x: float, text, what: str) -> float:
    if not math.isfinite(x):
        raise ValueError(f"{what}: {_shown(text)!r} is not a finite number")
    return x


def format_value(x: float, unit: str = "") -> str:
    """Format ``x`` with an engineering prefix, e.g. 47000 -> '47k'."""
    if x == 0:
        return f"0{unit}"
    for p, s in (("G", 1e9), ("M", 1e6), ("k", 1e3), ("", 1.0), ("m", 1e-3), ("u", 1e-6), ("n", 1e-9), ("p", 1e-12)):
        if abs(x) >= s:
            return f"{x / s:.4g}{p}{unit}"
    return f"{x:.3g}{unit}"
