"""The export use case: a model card and what to make of it in, the text to write out.

:func:`export` turns an :class:`ExportSpec` (a card, a format, and that format's fields) into
an :class:`ExportResult`: the text (a SPICE subcircuit, a model card, a CSV curve family), a
one-line summary, and the warnings a front end shows beside it.  The front end writes the
text where the user asked (:func:`fitter.outfiles.write_atomic`).
"""

from __future__ import annotations

from dataclasses import dataclass

from ..export import GRID_RESISTANCE
from .specs import NoResult, SpecError

__all__ = ["GRID_RESISTANCE", "FORMATS", "ExportSpec", "ExportResult", "export"]

#: format -> the fields that belong to it alone
FORMATS = {"spice": ("cgk", "cga", "cak", "grid_resistance"), "json": (), "csv": ("va", "vg")}


@dataclass(frozen=True)
class ExportSpec:
    """What to export.

    Attributes
    ----------
    card : str
        The model card.
    format : str
        ``"spice"``, ``"json"`` or ``"csv"``.
    name : str, optional
        Subcircuit name (spice) or tube name written (json, csv).
    cgk, cga, cak : float, optional
        spice: interelectrode capacitances [F].
    grid_resistance : float, optional
        spice: the generic grid-conduction resistance above 0 V [ohm], for models without
        grid current (default :data:`fitter.export.GRID_RESISTANCE`).
    va, vg : str, optional
        csv: the plate and grid voltages, ``start:stop:step`` or a list [V]; both or neither
        (neither: the card's fitted range).
    """

    card: str
    format: str
    name: str | None = None
    cgk: float | None = None
    cga: float | None = None
    cak: float | None = None
    grid_resistance: float | None = None
    va: str | None = None
    vg: str | None = None


@dataclass(frozen=True)
class ExportResult:
    """The text to write, a summary of it, and warnings/notes as ``(kind, text)`` pairs."""

    format: str
    text: str
    summary: str
    remarks: tuple = ()

    def to_dict(self) -> dict:
        return {"format": self.format, "text": self.text, "summary": self.summary,
                "remarks": [{"kind": k, "text": t} for k, t in self.remarks]}


def export(spec: ExportSpec) -> ExportResult:
    """The export of ``spec.card`` in ``spec.format``.

    Raises
    ------
    SpecError
        An unknown format, a field of another format, a grid-conduction resistance for a
        model with its own grid current, only one of ``va`` and ``vg``.
    ExportError
        A name, capacitance or grid that cannot be used (field named).
    CardError
        A card that cannot be read.
    NoResult
        The model gives no finite current on the grid asked for.
    """
    import numpy as np

    from ..card import load_card, read_json
    from ..export import (card_json, curve_family, curves_csv, default_sweep, parse_sweep,
                          spice_name, spice_subcircuit)

    fmt = spec.format
    if fmt not in FORMATS:
        raise SpecError(f"unknown format {fmt!r}; formats: {', '.join(FORMATS)}", field="format")
    for other, fields in FORMATS.items():
        for f in fields:
            if other != fmt and getattr(spec, f) is not None:
                raise SpecError(f"applies to the {other} format only (this is {fmt})", field=f)
    triode = load_card(spec.card)
    if spec.grid_resistance is not None and triode.model.carries_grid_current(triode.params):
        raise SpecError(f"does not apply to {spec.card}: its {triode.model.name} model carries its own fitted "
                        "grid current, which the subcircuit uses", field="grid_resistance")
    if fmt == "spice":
        sub_name = spec.name or spice_name(triode)
        text = spice_subcircuit(triode, name=sub_name, cgk=spec.cgk, cga=spec.cga, cak=spec.cak, card=str(spec.card),
                                grid_resistance=GRID_RESISTANCE if spec.grid_resistance is None else spec.grid_resistance)
        return ExportResult(fmt, text, f"subcircuit {sub_name}, pins plate grid cathode, model {triode.model.name}")
    if fmt == "json":
        raw = read_json(spec.card)  # already validated by load_card above
        text = card_json(triode, fit=raw.get("fit"), source=raw.get("source"), tube=spec.name)
        return ExportResult(fmt, text, f"model card of {spec.name or triode.label}, model {triode.model.name}")
    if (spec.va is None) != (spec.vg is None):
        raise SpecError("give both the plate and the grid voltages, or neither to use the card's fitted range",
                        field="vg" if spec.vg is None else "va")
    if spec.va is None:
        va, vg = default_sweep(triode)
    else:
        va, vg = parse_sweep(spec.va, "va"), parse_sweep(spec.vg, "vg")
    with np.errstate(all="ignore"):  # overflow far out is caught on the result just below
        fam = curve_family(triode, va, vg, tube=spec.name)
    if not np.all(np.isfinite(fam.ia)):
        bad = int(np.argmax(~np.isfinite(fam.ia)))
        raise NoResult(f"the model gives no finite plate current at va {fam.va[bad]:g} V, "
                       f"vg {fam.vg[bad]:g} V; choose a grid within a tube's range", field="va")
    remarks = []
    grid_va, grid_vg = np.meshgrid(va, vg)
    with np.errstate(all="ignore"):
        why = triode.envelope.outside(grid_va, grid_vg, triode.current) if triode.envelope is not None else None
    if why is not None:
        remarks.append(("warning", f"the grid reaches outside the measured data ({why}; "
                                   f"{triode.envelope.describe()}); those points are extrapolated"))
    elif triode.envelope is None and triode.outside_range(va, vg):
        r = triode.valid_range
        remarks.append(("note", f"the grid reaches outside the fitted data (va {r['va'][0]:g}..{r['va'][1]:g} V, "
                                f"vg {r['vg'][0]:g}..{r['vg'][1]:g} V); those curves are extrapolated"))
    text = curves_csv(fam, card=str(spec.card))
    return ExportResult(fmt, text, f"{fam.va.size} points ({vg.size} curves x {va.size} plate voltages) of {fam.tube}",
                        tuple(remarks))
