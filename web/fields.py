"""The web's own names for the service's fields: what a form labels each input, and how an
error names the field it is about (the command line has its own table, fitter/cli/fields.py)."""

from __future__ import annotations

#: field -> form label (unit in brackets)
LABELS: dict[str, str] = {
    "b_plus": "B+ [V]", "ra": "Ra [Ω]", "rk": "Rk [Ω]", "ck": "Ck, cathode bypass [F]",
    "vbias": "fixed bias [V]", "rg": "grid leak [Ω]", "c_in": "input coupling C [F]",
    "rs": "source resistance [Ω]", "rl": "load RL [Ω]", "c_out": "output coupling C [F]",
    "c_load": "load C [F]", "cgk": "Cgk [F]", "cga": "Cga [F]", "cak": "Cak [F]",
    "pa_max": "plate dissipation limit [W]", "heater": "heater elevation [V]",
    "vhk_max": "heater-cathode limit [V]", "vneg": "negative rail [V]",
    "r_upper": "divider, upper R [Ω]", "r_lower": "divider, lower R [Ω]", "r_top": "R top [Ω]",
    "r_mid": "R mid (mu follower) [Ω]", "top_grid": "top grid (tied / coupled)",
    "rg_top": "top grid leak [Ω]", "c_top": "top grid coupling C [F]",
    "output": "output (top-cathode / bottom-plate)", "tube": "tube", "bottom": "bottom tube",
    "top": "top tube",
}


def label(field: str | None) -> str:
    """The form's name for ``field`` (the field's own name where the table has none)."""
    if field is None:
        return ""
    return LABELS.get(field, LABELS.get(field.split(".", 1)[0], field))
