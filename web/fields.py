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
    # a type's stock (stage spread, sweeps)
    "type": "tube type (its whole stock)", "spread": "tube type (its whole stock)", "cards": "tube type (its whole stock)",
    "units": "tube type (its whole stock)",
    # output stages (fitter/stage/output.py)
    "load": "reflected load [Ω]", "turns_ratio": "turns ratio n (primary:secondary)",
    "speaker": "loudspeaker [Ω]", "r_primary": "primary DC resistance [Ω]", "grid_bias": "fixed grid bias [V]",
    "bypassed": "cathode resistor bypassed", "grid_onset": "grid-current onset [V]",
    "l_primary": "primary inductance [H]", "l_leak": "leakage inductance [H]", "c_winding": "winding capacitance [F]",
    "tube_a": "tube A", "tube_b": "tube B", "thd": "THD for the output power [%]", "loads": "load sweep [Ω, Ω, ...]",
    "level": "level for the THD column", "kind": "kind of stage",
    # design sweeps
    "vary": "field to sweep", "start": "from", "stop": "to", "points": "points", "log": "logarithmic steps",
    "thd_limit": "THD limit [%]", "slew_vpeak": "slew check amplitude [V peak]",
}


#: what an empty field means where the stage has no number for it (None), by kind of stage
#: ("*": every kind, unless the kind says otherwise); the stages' docstrings say the same
EMPTY: dict[str, dict[str, str]] = {
    "*": {"c_in": "direct coupling", "rl": "no load", "c_out": "an ideal coupling", "pa_max": "not checked",
          "r_upper": "no divider", "r_lower": "no divider",
          "c_top": "an ideal coupling"},
    "common-cathode": {"ck": "Rk unbypassed", "vbias": "bias from Rk"},
    "stack": {"ck": "Rk unbypassed", "vbias": "bias from Rk"},
    "single-ended": {"load": "from the turns ratio", "turns_ratio": "give it or the load",
                     "grid_bias": "cathode bias by Rk", "rk": "give it or the fixed bias",
                     "rg": "none", "ck": "an ideal bypass", "l_primary": "an ideal transformer"},
}
EMPTY["push-pull"] = EMPTY["single-ended"]


def field_hint(kind: str, field: str, default, required=()) -> str:
    """The words under a form's field: ``required``, ``default 1M`` (engineering notation, the
    unit is in the label), or what leaving it empty means (``empty: Rk unbypassed``)."""
    if field in required:
        return "required"
    if default is None:
        meaning = EMPTY.get(kind, {}).get(field) or EMPTY["*"].get(field)
        return f"empty: {meaning}" if meaning else "empty: none"
    return "default " + shown_default(default)


def shown_default(default) -> str:
    """A field's default as its input's placeholder: engineering notation, empty for None."""
    from fitter.units import format_value

    if default is None:
        return ""
    if isinstance(default, bool):
        return "yes" if default else "no"
    if isinstance(default, (int, float)):
        return format_value(float(default))
    return str(default)


def form_hints(kind: str, fields, required=()) -> dict:
    """``{field: (placeholder, hint)}`` for a form of ``(field, default)`` pairs."""
    return {n: (shown_default(d), field_hint(kind, n, d, required)) for n, d in fields}


def label(field: str | None) -> str:
    """The form's name for ``field`` (the field's own name where the table has none)."""
    if field is None:
        return ""
    return LABELS.get(field, LABELS.get(field.split(".", 1)[0], field))
